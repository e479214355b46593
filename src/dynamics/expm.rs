//! Matrix exponential by scaling and squaring with a Padé approximant.
//!
//! Linear continuous models are propagated exactly through `exp(A dt)` (and the block
//! exponentials of [`super::Discretiser`]), so this is the one place the exponential is
//! computed. All scratch lives in [`Expm`], so repeated calls allocate nothing.

use crate::linalg::{lu_solve_in_place, mul_ab, norm1};
use nalgebra::DMatrix;

/// Padé degrees tried in order, with the largest 1-norm each handles to unit roundoff
/// (Higham 2005, Table 2.3, values θ_m for IEEE double; digits from memory, and only
/// their size matters: a θ slightly off changes the degree chosen, not correctness).
const DEGREES: [(usize, f64); 5] = [
    (3, 1.495_585_217_958_292e-2),
    (5, 2.539_398_330_063_23e-1),
    (7, 9.504_178_996_162_932e-1),
    (9, 2.097_847_961_257_068e0),
    (13, 5.371_920_351_148_152e0),
];

/// Numerator coefficients `b_0..b_m` of the diagonal `[m/m]` Padé approximant of `e^x`,
/// scaled so that `b_m = 1`: `b_j = (2m−j)! / (j! (m−j)!)` up to a common factor
/// (Higham 2005, §2; the integers of his Algorithm 2.3). A test rederives them.
const B3: [f64; 4] = [120.0, 60.0, 12.0, 1.0];
const B5: [f64; 6] = [30240.0, 15120.0, 3360.0, 420.0, 30.0, 1.0];
const B7: [f64; 8] = [
    17297280.0, 8648640.0, 1995840.0, 277200.0, 25200.0, 1512.0, 56.0, 1.0,
];
const B9: [f64; 10] = [
    17643225600.0,
    8821612800.0,
    2075673600.0,
    302702400.0,
    30270240.0,
    2162160.0,
    110880.0,
    3960.0,
    90.0,
    1.0,
];
const B13: [f64; 14] = [
    64764752532480000.0,
    32382376266240000.0,
    7771770303897600.0,
    1187353796428800.0,
    129060195264000.0,
    10559470521600.0,
    670442572800.0,
    33522128640.0,
    1323241920.0,
    40840800.0,
    960960.0,
    16380.0,
    182.0,
    1.0,
];

/// Preallocated workspace computing `exp(A)` for `n × n` matrices without allocating.
///
/// # Method
///
/// Higham's scaling and squaring algorithm (N. J. Higham, "The scaling and squaring method
/// for the matrix exponential revisited", SIAM J. Matrix Anal. Appl. 26(4), 2005,
/// Algorithm 2.3). With `‖A‖₁ ≤ θ_m` for some `m ∈ {3, 5, 7, 9}` the diagonal Padé
/// approximant `r_m(A) = q_m(A)⁻¹ p_m(A)` is used directly; otherwise `A` is scaled by
/// `2^-s`, `s = ⌈log₂(‖A‖₁/θ₁₃)⌉`, so `r₁₃` applies, and the result is squared `s` times:
/// `exp(A) = r₁₃(2^-s A)^(2^s)`. Writing `p_m(A) = V + U` with `V` the even and `U` the
/// odd powers, `q_m(A) = V − U`, so one LU solve `(V − U) X = (V + U)` gives `r_m(A)`.
/// The θ_m bound the backward error by the unit roundoff.
///
/// # Failure
///
/// A non-finite entry in `A` (or an `exp` that overflows) leaves non-finite entries in
/// the output; callers check `out.iter().all(|x| x.is_finite())` before using it.
#[derive(Debug, Clone)]
pub struct Expm {
    n: usize,
    /// `2^-s A`.
    a1: DMatrix<f64>,
    a2: DMatrix<f64>,
    a4: DMatrix<f64>,
    a6: DMatrix<f64>,
    u: DMatrix<f64>,
    v: DMatrix<f64>,
    tmp: DMatrix<f64>,
    piv: Vec<usize>,
}

impl Expm {
    /// Workspace for `n × n` matrices.
    pub fn new(n: usize) -> Self {
        let z = || DMatrix::zeros(n, n);
        Self {
            n,
            a1: z(),
            a2: z(),
            a4: z(),
            a6: z(),
            u: z(),
            v: z(),
            tmp: z(),
            piv: vec![0; n],
        }
    }

    /// The matrix size this workspace was built for.
    pub fn dim(&self) -> usize {
        self.n
    }

    /// `out = exp(a)`; `a` and `out` are `n × n`.
    ///
    /// # Panics
    ///
    /// If `a` or `out` is not `n × n` (a programming error, not bad input).
    pub fn compute(&mut self, a: &DMatrix<f64>, out: &mut DMatrix<f64>) {
        let n = self.n;
        assert_eq!(a.shape(), (n, n), "expm: input is not {n} x {n}");
        assert_eq!(out.shape(), (n, n), "expm: output is not {n} x {n}");
        let norm = norm1(a);
        if !norm.is_finite() {
            out.fill(f64::NAN);
            return;
        }
        if norm == 0.0 {
            out.fill_with_identity();
            return;
        }
        self.a1.copy_from(a);
        mul_ab(&self.a1, &self.a1, &mut self.a2);
        for &(m, theta) in &DEGREES[..4] {
            if norm <= theta {
                self.pade_low(m);
                self.solve(out);
                return;
            }
        }
        let theta13 = DEGREES[4].1;
        // s ≤ 1100 or so for any finite norm; the result then overflows, as exp does.
        let s = (norm / theta13).log2().ceil().max(0.0) as i32;
        if s > 0 {
            let scale = 2f64.powi(-s);
            self.a1.iter_mut().for_each(|x| *x *= scale);
            // Scaling by a power of two is exact, so A² scales exactly too.
            self.a2.iter_mut().for_each(|x| *x *= scale * scale);
        }
        self.pade13();
        self.solve(out);
        for _ in 0..s {
            mul_ab(out, out, &mut self.tmp);
            out.copy_from(&self.tmp);
        }
    }

    /// `U` and `V` of `r_m(A)` for `m ∈ {3, 5, 7, 9}` by explicit powers (Higham 2005,
    /// Algorithm 2.3, lines 2–4), given `a1 = A` and `a2 = A²`.
    fn pade_low(&mut self, m: usize) {
        let b: &[f64] = match m {
            3 => &B3,
            5 => &B5,
            7 => &B7,
            _ => &B9,
        };
        // tmp accumulates the odd part before it is multiplied by A; v the even part.
        self.tmp.fill_with_identity();
        self.tmp.iter_mut().for_each(|x| *x *= b[1]);
        self.v.fill_with_identity();
        self.v.iter_mut().for_each(|x| *x *= b[0]);
        axpy(&mut self.tmp, b[3], &self.a2);
        axpy(&mut self.v, b[2], &self.a2);
        if m >= 5 {
            mul_ab(&self.a2, &self.a2, &mut self.a4);
            axpy(&mut self.tmp, b[5], &self.a4);
            axpy(&mut self.v, b[4], &self.a4);
        }
        if m >= 7 {
            mul_ab(&self.a4, &self.a2, &mut self.a6);
            axpy(&mut self.tmp, b[7], &self.a6);
            axpy(&mut self.v, b[6], &self.a6);
        }
        if m >= 9 {
            // A⁸ goes into u, which is overwritten below anyway.
            mul_ab(&self.a6, &self.a2, &mut self.u);
            axpy(&mut self.tmp, b[9], &self.u);
            axpy(&mut self.v, b[8], &self.u);
        }
        mul_ab(&self.a1, &self.tmp, &mut self.u);
    }

    /// `U` and `V` of `r₁₃(A)` with six products (Higham 2005, Algorithm 2.3, line 10).
    fn pade13(&mut self) {
        let b = &B13;
        mul_ab(&self.a2, &self.a2, &mut self.a4);
        mul_ab(&self.a4, &self.a2, &mut self.a6);
        // u = A (A6 (b13 A6 + b11 A4 + b9 A2) + b7 A6 + b5 A4 + b3 A2 + b1 I).
        self.even_part([b[13], b[11], b[9]], [b[7], b[5], b[3]], b[1]);
        mul_ab(&self.a1, &self.v, &mut self.u);
        // v = A6 (b12 A6 + b10 A4 + b8 A2) + b6 A6 + b4 A4 + b2 A2 + b0 I.
        self.even_part([b[12], b[10], b[8]], [b[6], b[4], b[2]], b[0]);
    }

    /// `v = A6 (h0 A6 + h1 A4 + h2 A2) + l0 A6 + l1 A4 + l2 A2 + c I`: the polynomial in
    /// `A²` that both halves of `r₁₃` share, built through `tmp` with one product.
    fn even_part(&mut self, high: [f64; 3], low: [f64; 3], c: f64) {
        self.tmp.fill(0.0);
        add_lin3(&mut self.tmp, high, &self.a6, &self.a4, &self.a2, 0.0);
        mul_ab(&self.a6, &self.tmp, &mut self.v);
        add_lin3(&mut self.v, low, &self.a6, &self.a4, &self.a2, c);
    }

    /// `out = (V − U)⁻¹ (V + U)` from the `u` and `v` buffers.
    fn solve(&mut self, out: &mut DMatrix<f64>) {
        for ((num, den), (&u, &v)) in out
            .iter_mut()
            .zip(self.tmp.iter_mut())
            .zip(self.u.iter().zip(self.v.iter()))
        {
            *num = v + u;
            *den = v - u;
        }
        // θ_m keep ‖U‖ well below ‖V‖, so V − U is far from singular for finite input;
        // a failure can only come from non-finite entries, which the output then shows.
        if !lu_solve_in_place(&mut self.tmp, &mut self.piv, out) {
            out.fill(f64::NAN);
        }
    }
}

/// `y += alpha x`.
fn axpy(y: &mut DMatrix<f64>, alpha: f64, x: &DMatrix<f64>) {
    for (yi, xi) in y.iter_mut().zip(x.iter()) {
        *yi += alpha * xi;
    }
}

/// `out += c0 x0 + c1 x1 + c2 x2 + diag · I`.
fn add_lin3(
    out: &mut DMatrix<f64>,
    c: [f64; 3],
    x0: &DMatrix<f64>,
    x1: &DMatrix<f64>,
    x2: &DMatrix<f64>,
    diag: f64,
) {
    for (((o, a), b), d) in out.iter_mut().zip(x0.iter()).zip(x1.iter()).zip(x2.iter()) {
        *o += c[0] * a + c[1] * b + c[2] * d;
    }
    for i in 0..out.nrows().min(out.ncols()) {
        out[(i, i)] += diag;
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn expm(a: &DMatrix<f64>) -> DMatrix<f64> {
        let mut out = DMatrix::zeros(a.nrows(), a.ncols());
        Expm::new(a.nrows()).compute(a, &mut out);
        out
    }

    /// Largest elementwise error relative to the largest entry of `expected`.
    fn rel_err(got: &DMatrix<f64>, expected: &DMatrix<f64>) -> f64 {
        (got - expected).amax() / expected.amax()
    }

    #[test]
    fn pade_coefficients_follow_their_formula() {
        // b_j ∝ (2m−j)! / (j! (m−j)!), normalised so b_m = 1 (the
        // classical [m/m] Padé numerator of e^x, Higham 2005, §2; formula from memory).
        fn fact(k: u128) -> u128 {
            (1..=k).product()
        }
        let tables: [&[f64]; 5] = [&B3, &B5, &B7, &B9, &B13];
        for (table, &(m, _)) in tables.iter().zip(DEGREES.iter()) {
            let m = m as u128;
            assert_eq!(table.len() as u128, m + 1);
            for j in 0..=m {
                // At j = m the formula gives m!/m! = 1, the normalisation.
                let exact = fact(2 * m - j) / (fact(j) * fact(m - j));
                assert_eq!(table[j as usize], exact as f64, "m = {m}, j = {j}");
            }
        }
    }

    #[test]
    fn zero_matrix_gives_identity() {
        // exp(0) = I exactly (definition of the exponential series).
        let out = expm(&DMatrix::zeros(3, 3));
        assert_eq!(out, DMatrix::identity(3, 3));
    }

    #[test]
    fn rotation_generator_gives_rotation() {
        // exp([[0, −w],[w, 0]] t) = [[cos wt, −sin wt],[sin wt, cos wt]] (common practice).
        // The angles cover every Padé degree and the scaling path.
        for &wt in &[1e-3, 0.1, 0.5, 1.5, 4.0, 9.0, 37.0] {
            let a = DMatrix::from_row_slice(2, 2, &[0.0, -wt, wt, 0.0]);
            let (s, c) = f64::sin_cos(wt);
            let expected = DMatrix::from_row_slice(2, 2, &[c, -s, s, c]);
            let tol = 1e-15 * 8.0 * (1.0 + wt);
            assert!((expm(&a) - &expected).amax() < tol, "wt = {wt}");
        }
    }

    #[test]
    fn diagonal_gives_elementwise_exp() {
        // exp(diag(d)) = diag(exp(d)) (common practice).
        let d = [-3.0, 0.25, 2.0, 6.5];
        let a = DMatrix::from_diagonal(&nalgebra::DVector::from_row_slice(&d));
        let out = expm(&a);
        for i in 0..4 {
            for j in 0..4 {
                let expected = if i == j { d[i].exp() } else { 0.0 };
                assert!(
                    (out[(i, j)] - expected).abs() <= 1e-14 * expected.abs().max(1.0),
                    "({i},{j})"
                );
            }
        }
    }

    #[test]
    fn nilpotent_series_terminates() {
        // N strictly upper triangular with N³ = 0: exp(N) = I + N + N²/2 (series, common practice).
        let n = DMatrix::from_row_slice(3, 3, &[0.0, 2.0, -1.0, 0.0, 0.0, 3.0, 0.0, 0.0, 0.0]);
        let expected = DMatrix::identity(3, 3) + &n + &n * &n * 0.5;
        assert!(rel_err(&expm(&n), &expected) < 1e-15);
        // Scaled up so the squaring path runs; the series is still exact.
        let big = &n * 10.0;
        let expected = DMatrix::identity(3, 3) + &big + &big * &big * 0.5;
        assert!(rel_err(&expm(&big), &expected) < 1e-14);
    }

    #[test]
    fn two_by_two_with_real_eigenvalues_matches_closed_form() {
        // For A with mean eigenvalue m and Δ = sqrt(((a−d)/2)² + bc) > 0 (Cayley–Hamilton,
        // common practice): exp(A) = e^m [cosh Δ · I + sinh Δ / Δ · (A − m I)].
        for &(a, b, c, d) in &[
            (1.0f64, 2.0, 0.5, -1.0),
            (-4.0, 3.0, 1.0, -7.0),
            (0.01, 0.02, 0.03, 0.0),
        ] {
            let mat = DMatrix::from_row_slice(2, 2, &[a, b, c, d]);
            let mean = 0.5 * (a + d);
            let delta = (0.25 * (a - d) * (a - d) + b * c).sqrt();
            let shifted = &mat - DMatrix::identity(2, 2) * mean;
            let expected = (DMatrix::identity(2, 2) * delta.cosh()
                + shifted * (delta.sinh() / delta))
                * mean.exp();
            assert!(rel_err(&expm(&mat), &expected) < 1e-14, "{a} {b} {c} {d}");
        }
    }

    #[test]
    fn exp_a_times_exp_minus_a_is_identity() {
        // exp(A) exp(−A) = I since A and −A commute (common practice).
        let a = DMatrix::from_fn(5, 5, |i, j| ((3 * i + 5 * j) as f64 * 0.7).sin() * 1.3);
        let prod = expm(&a) * expm(&(-&a));
        let cond = expm(&a).amax() * expm(&(-&a)).amax();
        assert!((prod - DMatrix::identity(5, 5)).amax() < 1e-15 * 64.0 * cond);
    }

    #[test]
    fn large_norm_uses_scaling_and_stays_accurate() {
        // exp([[σ, −w],[w, σ]]) = e^σ [[cos w, −sin w],[sin w, cos w]] (common practice);
        // ‖A‖₁ = 60.5 needs s = 4 squarings.
        let (sigma, w): (f64, f64) = (0.5, 60.0);
        let a = DMatrix::from_row_slice(2, 2, &[sigma, -w, w, sigma]);
        let (s, c) = f64::sin_cos(w);
        let expected = DMatrix::from_row_slice(2, 2, &[c, -s, s, c]) * sigma.exp();
        // Rounding in the angle alone costs about w·ε relative.
        assert!(rel_err(&expm(&a), &expected) < 1e-15 * 16.0 * w);
    }

    #[test]
    fn upper_triangular_with_huge_norm() {
        // exp([[a, b],[0, d]]) = [[e^a, b (e^a − e^d)/(a − d)],[0, e^d]] (common practice).
        let (a, b, d): (f64, f64, f64) = (-30.0, 400.0, -32.0);
        let mat = DMatrix::from_row_slice(2, 2, &[a, b, 0.0, d]);
        let expected = DMatrix::from_row_slice(
            2,
            2,
            &[a.exp(), b * (a.exp() - d.exp()) / (a - d), 0.0, d.exp()],
        );
        let out = expm(&mat);
        for i in 0..2 {
            for j in 0..2 {
                let e = expected[(i, j)];
                assert!(
                    (out[(i, j)] - e).abs() <= 1e-12 * e.abs(),
                    "({i},{j}): {} vs {e}",
                    out[(i, j)]
                );
            }
        }
    }

    #[test]
    fn non_finite_input_shows_in_output() {
        // No silent garbage: a NaN entry must not produce a finite-looking result.
        let a = DMatrix::from_row_slice(2, 2, &[0.0, f64::NAN, 0.0, 0.0]);
        assert!(expm(&a).iter().any(|x| !x.is_finite()));
    }
}
