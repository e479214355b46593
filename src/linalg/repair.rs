//! Covariance repair and exact rounding: the one home of making a covariance symmetric.
//!
//! Rounding in `P ← F P Fᵀ + Q` and in the update leaves `P` very slightly asymmetric;
//! left alone the asymmetry grows and a later factorisation sees a matrix that is not
//! symmetric. Every filter therefore replaces `P` by its symmetric part
//!
//! ```text
//! sym(P) = (P + Pᵀ) / 2
//! ```
//!
//! the nearest symmetric matrix in the Frobenius norm (Higham, *Accuracy and Stability of
//! Numerical Algorithms*, 2nd ed., §10.1, from memory; common practice in Kalman
//! filtering). Nothing here adds jitter to a diagonal: a covariance that is not positive
//! definite is reported by the factorisation (see `cholesky`), never hidden.
//! `round_half_away` sits here because it, too, must give exactly what the textbook
//! operation gives (`f64::round`) without its cost.

use nalgebra::DMatrix;

/// Replace `p` by `(p + p') / 2`: the single place where covariances are made symmetric.
#[inline]
pub fn symmetrize(p: &mut DMatrix<f64>) {
    let n = p.nrows();
    for j in 0..n {
        for i in (j + 1)..n {
            let v = 0.5 * (p[(i, j)] + p[(j, i)]);
            p[(i, j)] = v;
            p[(j, i)] = v;
        }
    }
}

/// Whether `p` is symmetric to within `rtol` of its diagonal scale.
pub fn is_symmetric(p: &DMatrix<f64>, rtol: f64) -> bool {
    let n = p.nrows();
    for j in 0..n {
        for i in (j + 1)..n {
            let scale = (p[(i, i)].abs() * p[(j, j)].abs())
                .sqrt()
                .max(f64::MIN_POSITIVE);
            if (p[(i, j)] - p[(j, i)]).abs() > rtol * scale.max(p[(i, j)].abs()) {
                return false;
            }
        }
    }
    true
}

/// `x.round()` (halves away from zero) without a call into libm, which the baseline x86-64
/// target makes for `round`; used twice per step of a discrete model. Exact: below 2^52 the
/// fractional part `x − trunc(x)` is computed without rounding, and above it every `f64`
/// is already an integer. NaN stays NaN.
#[inline]
pub fn round_half_away(x: f64) -> f64 {
    const INTEGRAL: f64 = 4_503_599_627_370_496.0; // 2^52
    if !(x.abs() < INTEGRAL) {
        return x;
    }
    let t = x as i64 as f64;
    let f = x - t;
    let r = if f >= 0.5 {
        t + 1.0
    } else if f <= -0.5 {
        t - 1.0
    } else {
        t
    };
    // Keep the sign of a zero result (-0.3 rounds to -0.0, as std does).
    r.copysign(x)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn symmetrize_equals_half_the_sum_with_the_transpose() {
        // (P + Pᵀ) / 2 formed plainly by nalgebra is the oracle: the same two additions
        // and halvings per pair, and a diagonal left as it is, so bit-equal.
        for n in [1usize, 2, 5, 9] {
            let p = DMatrix::from_fn(n, n, |i, j| ((i * 5 + j * 3) as f64 * 0.77).sin() * 4.0);
            let want = (&p + p.transpose()) * 0.5;
            let mut got = p.clone();
            symmetrize(&mut got);
            for (g, w) in got.iter().zip(want.iter()) {
                assert_eq!(g.to_bits(), w.to_bits(), "n = {n}");
            }
            assert!(is_symmetric(&got, 0.0));
        }
    }

    #[test]
    fn is_symmetric_accepts_rounding_and_refuses_a_real_difference() {
        // A relative tolerance on the diagonal scale: 1e-12 off passes at 1e-9, 1e-3 does not.
        let mut p = DMatrix::from_row_slice(2, 2, &[4.0, 1.0, 1.0 + 1e-12, 9.0]);
        assert!(is_symmetric(&p, 1e-9));
        p[(1, 0)] = 1.001;
        assert!(!is_symmetric(&p, 1e-9));
    }

    #[test]
    fn round_half_away_matches_std_round() {
        // f64::round is the reference (std documents halves away from zero).
        let mut xs = vec![
            0.0,
            -0.0,
            0.5,
            -0.5,
            1.5,
            -1.5,
            2.5,
            0.49999999999999994,
            -0.49999999999999994,
            4503599627370495.5,
            4503599627370496.0,
            -4503599627370497.0,
            1e300,
            -1e300,
            f64::INFINITY,
            f64::NEG_INFINITY,
            12345.678,
            -98765.4321,
        ];
        xs.extend((0..2000).map(|k| (k as f64 - 1000.0) * 0.1 + 1e-13 * k as f64));
        for x in xs {
            assert_eq!(round_half_away(x).to_bits(), x.round().to_bits(), "{x}");
        }
        assert!(round_half_away(f64::NAN).is_nan());
    }
}
