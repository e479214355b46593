//! Cholesky factorisation and the triangular solves built on it, over column-major
//! slices (`a[i + j * m]`) in preallocated buffers; nothing here allocates.
//!
//! For a symmetric positive definite `A`, `A = L Lᵀ` with `L` lower triangular and
//!
//! ```text
//! l_jj = √(a_jj − Σ_{k<j} l_jk²),    l_ij = (a_ij − Σ_{k<j} l_ik l_jk) / l_jj   (i > j)
//! ```
//!
//! (Golub & Van Loan, *Matrix Computations*, 4th ed., §4.2, Algorithms 4.2.1–4.2.2, from
//! memory). It fails, and says at which column, when a pivot `a_jj − Σ l_jk²` is not
//! positive or not finite: the matrix is then not positive definite to working precision.
//! The filters use it for innovation covariances and gains (`cholesky`, `cholesky_solve`,
//! `mahalanobis`) and, in its semi-definite form, for covariances that may have a
//! direction without spread (`cholesky_psd`). The tests keep the dot-product form above
//! as the oracle, and the factor must equal it bit for bit.

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
///
/// Column by column, each earlier column `k` is subtracted from the whole of column `j` at
/// once (contiguous, so it vectorises); every entry still receives `l_ik l_jk` for
/// `k = 0, 1, …` in order, so the factor equals the dot-product form bit for bit.
pub fn cholesky(a: &[f64], l: &mut [f64], m: usize) -> Result<(), NotPositive> {
    for j in 0..m {
        let (done, rest) = l.split_at_mut(j * m);
        let col = &mut rest[..m];
        col[j..].copy_from_slice(&a[j + j * m..(j + 1) * m]);
        for k in 0..j {
            let lk = &done[k * m..(k + 1) * m];
            let w = lk[j];
            for (x, &y) in col[j..].iter_mut().zip(&lk[j..]) {
                *x -= y * w;
            }
        }
        let d = col[j];
        if !(d > 0.0) || !d.is_finite() {
            return Err(NotPositive {
                column: j,
                pivot: d,
            });
        }
        let djj = d.sqrt();
        col[j] = djj;
        for x in col[j + 1..].iter_mut() {
            *x /= djj;
        }
        col[..j].fill(0.0);
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
///
/// Column-oriented: once `y_i` is known it is subtracted from every later row, walking down
/// column `i` of `L` (contiguous, so the loop vectorises and no long chain of dependent
/// additions forms). Each `y_r` still receives `l_rk y_k` for `k = 0, 1, …` in order, so
/// the result is the same, bit for bit, as the row-by-row dot-product form.
pub fn solve_lower(l: &[f64], m: usize, b: &mut [f64]) {
    let b = &mut b[..m];
    for i in 0..m {
        let yi = b[i] / l[i + i * m];
        b[i] = yi;
        let col = &l[i * m + i + 1..(i + 1) * m];
        for (br, lr) in b[i + 1..].iter_mut().zip(col) {
            *br -= lr * yi;
        }
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
    /// The dot-product (inner product) form of the Cholesky factor, written as the
    /// formula in this module's doc reads: the oracle for [`cholesky`].
    fn textbook_cholesky(a: &[f64], n: usize) -> Vec<f64> {
        let mut l = vec![0.0; n * n];
        for j in 0..n {
            let mut d = a[j + j * n];
            for k in 0..j {
                d -= l[j + k * n] * l[j + k * n];
            }
            let djj = d.sqrt();
            l[j + j * n] = djj;
            for i in j + 1..n {
                let mut s = a[i + j * n];
                for k in 0..j {
                    s -= l[i + k * n] * l[j + k * n];
                }
                l[i + j * n] = s / djj;
            }
        }
        l
    }

    /// A symmetric positive definite `n × n` matrix: `Y Yᵀ + n I` for irregular `Y`.
    fn spd(n: usize) -> Vec<f64> {
        let y: Vec<f64> = (0..n * n)
            .map(|k| ((k * 13 + 5) % 17) as f64 / 6.0 - 1.3 + (k as f64 * 0.61).cos())
            .collect();
        let mut a = vec![0.0; n * n];
        for j in 0..n {
            for i in 0..n {
                a[i + j * n] = (0..n).map(|k| y[i + k * n] * y[j + k * n]).sum::<f64>()
                    + if i == j { n as f64 } else { 0.0 };
            }
        }
        a
    }

    #[test]
    fn factor_and_solves_equal_the_textbook_forms_bit_for_bit() {
        // The column-oriented loops add the same terms in the same order as the
        // dot-product form (Golub & Van Loan §4.2, from memory) and as row-wise forward
        // substitution (§3.1), so they must agree to the last bit, at sizes on both sides
        // of the unrolled widths.
        let bits = |x: &[f64]| x.iter().map(|v| v.to_bits()).collect::<Vec<_>>();
        for n in [1usize, 2, 3, 5, 8, 13, 40] {
            let a = spd(n);
            let mut l = vec![f64::NAN; n * n];
            cholesky(&a, &mut l, n).unwrap();
            assert_eq!(bits(&l), bits(&textbook_cholesky(&a, n)), "L, n = {n}");
            // On a positive definite matrix the semi-definite form takes the same steps.
            let mut l_psd = vec![f64::NAN; n * n];
            cholesky_psd(&a, &mut l_psd, n).unwrap();
            assert_eq!(bits(&l_psd), bits(&l), "semi-definite L, n = {n}");
            // Forward substitution: y_r = (b_r − Σ_{k<r} l_rk y_k) / l_rr.
            let b: Vec<f64> = (0..n).map(|i| (i as f64 * 0.7).sin() + 0.2).collect();
            let mut want = b.clone();
            for r in 0..n {
                let mut s = want[r];
                for k in 0..r {
                    s -= l[r + k * n] * want[k];
                }
                want[r] = s / l[r + r * n];
            }
            let mut got = b.clone();
            solve_lower(&l, n, &mut got);
            assert_eq!(bits(&got), bits(&want), "L y = b, n = {n}");
            let mut tmp = vec![0.0; n];
            let m2: f64 = want.iter().map(|x| x * x).sum();
            assert_eq!(mahalanobis(&l, n, &b, &mut tmp).to_bits(), m2.to_bits());
        }
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
