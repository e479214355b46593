//! Small dense kernels over column-major slices (`a[i + j * rows]`) that the filter steps
//! use on preallocated buffers, and the one home of covariance repair (symmetrising,
//! semi-definite Cholesky). Nothing here allocates.

use nalgebra::DMatrix;

/// Why a factorisation failed.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct NotPositive {
    /// Column whose pivot was not positive (or was non-finite).
    pub column: usize,
    /// The pivot value.
    pub pivot: f64,
}

/// Lower Cholesky factor `L L' = A` of a symmetric positive definite `m × m` matrix.
/// Only the lower triangle of `a` is read; the strict upper triangle of `l` is zeroed.
pub fn cholesky(a: &[f64], l: &mut [f64], m: usize) -> Result<(), NotPositive> {
    for j in 0..m {
        let mut d = a[j + j * m];
        for k in 0..j {
            d -= l[j + k * m] * l[j + k * m];
        }
        if !(d > 0.0) || !d.is_finite() {
            return Err(NotPositive {
                column: j,
                pivot: d,
            });
        }
        let djj = d.sqrt();
        l[j + j * m] = djj;
        for i in (j + 1)..m {
            let mut s = a[i + j * m];
            for k in 0..j {
                s -= l[i + k * m] * l[j + k * m];
            }
            l[i + j * m] = s / djj;
        }
        for i in 0..j {
            l[i + j * m] = 0.0;
        }
    }
    Ok(())
}

/// Lower factor `L L' = A` of a symmetric positive *semi*-definite `n × n` matrix: a pivot
/// within `tol · max(diag)` of zero gives a zero column (that direction has no spread).
/// A pivot below that is an error: the matrix is not PSD.
pub fn cholesky_psd(a: &[f64], l: &mut [f64], n: usize) -> Result<(), NotPositive> {
    let mut scale: f64 = 0.0;
    for i in 0..n {
        scale = scale.max(a[i + i * n].abs());
    }
    let tol = 1e-10 * scale.max(f64::MIN_POSITIVE);
    for j in 0..n {
        let mut d = a[j + j * n];
        for k in 0..j {
            d -= l[j + k * n] * l[j + k * n];
        }
        if !d.is_finite() || d < -tol {
            return Err(NotPositive {
                column: j,
                pivot: d,
            });
        }
        for i in 0..j {
            l[i + j * n] = 0.0;
        }
        if d <= tol {
            for i in j..n {
                l[i + j * n] = 0.0;
            }
            continue;
        }
        let djj = d.sqrt();
        l[j + j * n] = djj;
        for i in (j + 1)..n {
            let mut s = a[i + j * n];
            for k in 0..j {
                s -= l[i + k * n] * l[j + k * n];
            }
            l[i + j * n] = s / djj;
        }
    }
    Ok(())
}

/// Solve `L y = b` in place (forward substitution), `L` lower `m × m`.
pub fn solve_lower(l: &[f64], m: usize, b: &mut [f64]) {
    for i in 0..m {
        let mut s = b[i];
        for k in 0..i {
            s -= l[i + k * m] * b[k];
        }
        b[i] = s / l[i + i * m];
    }
}

/// Solve `L' x = y` in place (back substitution), `L` lower `m × m`.
pub fn solve_lower_transposed(l: &[f64], m: usize, b: &mut [f64]) {
    for i in (0..m).rev() {
        let mut s = b[i];
        for k in (i + 1)..m {
            s -= l[k + i * m] * b[k];
        }
        b[i] = s / l[i + i * m];
    }
}

/// Solve `(L L') X = B` in place for `B` of `cols` columns (`m × cols`, column-major).
pub fn cholesky_solve(l: &[f64], m: usize, b: &mut [f64], cols: usize) {
    for c in 0..cols {
        let col = &mut b[c * m..(c + 1) * m];
        solve_lower(l, m, col);
        solve_lower_transposed(l, m, col);
    }
}

/// `‖L⁻¹ v‖²`, i.e. `v' (L L')⁻¹ v`, using `tmp` (length ≥ m) as scratch.
pub fn mahalanobis(l: &[f64], m: usize, v: &[f64], tmp: &mut [f64]) -> f64 {
    tmp[..m].copy_from_slice(&v[..m]);
    solve_lower(l, m, &mut tmp[..m]);
    tmp[..m].iter().map(|x| x * x).sum()
}

/// Replace `p` by `(p + p') / 2`: the single place where covariances are made symmetric.
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

/// Whether every entry is finite.
pub fn all_finite(xs: &[f64]) -> bool {
    xs.iter().all(|x| x.is_finite())
}

/// `out = a bᵀ` for `a: r × k`, `b: c × k` (no allocation).
pub fn mul_abt(a: &DMatrix<f64>, b: &DMatrix<f64>, out: &mut DMatrix<f64>) {
    let (r, k, c) = (a.nrows(), a.ncols(), b.nrows());
    let (a, b) = (a.as_slice(), b.as_slice());
    let o = out.as_mut_slice();
    for j in 0..c {
        for i in 0..r {
            let mut s = 0.0;
            for l in 0..k {
                s += a[i + l * r] * b[j + l * c];
            }
            o[i + j * r] = s;
        }
    }
}

/// `p ← φ p φᵀ + q` through the scratch `tmp` (all `n × n`), then symmetrised.
pub fn congruence_plus(
    phi: &DMatrix<f64>,
    p: &mut DMatrix<f64>,
    q: &DMatrix<f64>,
    tmp: &mut DMatrix<f64>,
) {
    phi.mul_to(p, tmp);
    mul_abt(tmp, phi, p);
    *p += q;
    symmetrize(p);
}

#[cfg(test)]
mod tests {
    use super::*;

    fn mul_llt(l: &[f64], n: usize) -> Vec<f64> {
        let mut a = vec![0.0; n * n];
        for i in 0..n {
            for j in 0..n {
                a[i + j * n] = (0..n).map(|k| l[i + k * n] * l[j + k * n]).sum();
            }
        }
        a
    }

    #[test]
    fn cholesky_factor_multiplies_back() {
        // A symmetric positive definite matrix (diagonally dominant, common practice).
        let a = [4.0, 2.0, 0.4, 2.0, 5.0, 1.0, 0.4, 1.0, 3.0];
        let mut l = [0.0; 9];
        cholesky(&a, &mut l, 3).unwrap();
        let back = mul_llt(&l, 3);
        for (x, y) in back.iter().zip(a.iter()) {
            assert!((x - y).abs() < 8.0 * 3.0 * f64::EPSILON * 5.0);
        }
        // Solving against the factor gives x with A x = b.
        let mut b = [1.0, -2.0, 0.5];
        cholesky_solve(&l, 3, &mut b, 1);
        for i in 0..3 {
            let r: f64 = (0..3).map(|j| a[i + j * 3] * b[j]).sum();
            assert!((r - [1.0, -2.0, 0.5][i]).abs() < 1e-14);
        }
    }

    #[test]
    fn semidefinite_factor_tolerates_zero_variance_and_refuses_indefinite() {
        // Rank-one PSD matrix v v' with v = (1, 2, 0).
        let a = [1.0, 2.0, 0.0, 2.0, 4.0, 0.0, 0.0, 0.0, 0.0];
        let mut l = [0.0; 9];
        cholesky_psd(&a, &mut l, 3).unwrap();
        let back = mul_llt(&l, 3);
        for (x, y) in back.iter().zip(a.iter()) {
            assert!((x - y).abs() < 1e-14);
        }
        assert!(cholesky(&a, &mut l, 3).is_err());
        // Eigenvalues 3 and -1: indefinite.
        let bad = [1.0, 2.0, 2.0, 1.0];
        let mut l2 = [0.0; 4];
        assert_eq!(cholesky_psd(&bad, &mut l2, 2).unwrap_err().column, 1);
    }
}
