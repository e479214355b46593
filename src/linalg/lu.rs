//! Solving a square linear system `A X = B` by LU factorisation with partial pivoting,
//! in place, without allocating.
//!
//! ```text
//! P A = L U,   L unit lower triangular with |l_ik| ≤ 1,   U upper triangular
//! L Y = P B (forward substitution),   U X = Y (back substitution)
//! ```
//!
//! (Golub & Van Loan, *Matrix Computations*, 4th ed., §3.4, Algorithm 3.4.1, and §3.1 for
//! the substitutions, from memory.) It fails, returning `false`, when a pivot column is
//! zero or not finite: `A` is singular to working precision. The matrix exponential uses it
//! for its Padé denominator; nalgebra's `lu()` returns freshly allocated factors, and this
//! runs between every pair of readings. The tests keep Gaussian elimination on the
//! augmented matrix `[A | B]` as the oracle, bit for bit.

use nalgebra::DMatrix;

/// Solve `a x = b` in place: `a` is overwritten by its LU factors (partial pivoting,
/// Golub & Van Loan, *Matrix Computations*, 4th ed., Algorithm 3.4.1), `b` by `x`.
///
/// `piv` must hold `a.nrows()` entries. Returns `false` (leaving `b` unspecified) when a
/// pivot is zero or not finite, i.e. `a` is singular to working precision.
pub fn lu_solve_in_place(a: &mut DMatrix<f64>, piv: &mut [usize], b: &mut DMatrix<f64>) -> bool {
    let n = a.nrows();
    assert_eq!(a.ncols(), n, "lu_solve_in_place: matrix is not square");
    assert_eq!(
        b.nrows(),
        n,
        "lu_solve_in_place: right-hand side has the wrong rows"
    );
    assert_eq!(
        piv.len(),
        n,
        "lu_solve_in_place: pivot buffer has the wrong length"
    );
    for k in 0..n {
        // Partial pivoting keeps the multipliers at most 1 in magnitude.
        let mut p = k;
        let mut best = a[(k, k)].abs();
        for i in k + 1..n {
            let v = a[(i, k)].abs();
            if v > best {
                best = v;
                p = i;
            }
        }
        if best == 0.0 || !best.is_finite() {
            return false;
        }
        piv[k] = p;
        if p != k {
            a.swap_rows(k, p);
        }
        let pivot = a[(k, k)];
        for i in k + 1..n {
            a[(i, k)] /= pivot;
        }
        for j in k + 1..n {
            let akj = a[(k, j)];
            for i in k + 1..n {
                let lik = a[(i, k)];
                a[(i, j)] -= lik * akj;
            }
        }
    }
    for col in 0..b.ncols() {
        for k in 0..n {
            let p = piv[k];
            if p != k {
                b.swap((k, col), (p, col));
            }
        }
        // Forward substitution with the unit lower factor.
        for k in 0..n {
            let bk = b[(k, col)];
            for i in k + 1..n {
                b[(i, col)] -= a[(i, k)] * bk;
            }
        }
        // Back substitution with the upper factor.
        for k in (0..n).rev() {
            b[(k, col)] /= a[(k, k)];
            let bk = b[(k, col)];
            for i in 0..k {
                b[(i, col)] -= a[(i, k)] * bk;
            }
        }
    }
    true
}

#[cfg(test)]
mod tests {
    use super::*;

    fn sample(rows: usize, cols: usize, seed: f64) -> DMatrix<f64> {
        // Deterministic, irregular entries; no randomness needed for these identities.
        DMatrix::from_fn(rows, cols, |i, j| {
            ((i * 7 + j * 3) as f64 + seed).sin() + if i == j { 3.0 } else { 0.0 }
        })
    }

    /// Gaussian elimination with partial pivoting on the augmented rows `[A | b]`, then
    /// back substitution `x_i = (b_i − Σ_{j>i} u_ij x_j) / u_ii` (the sum from the last
    /// column down): the schoolbook form of Golub & Van Loan §3.2–3.4, the oracle.
    fn textbook_solve(a: &DMatrix<f64>, b: &[f64]) -> Vec<f64> {
        let n = a.nrows();
        let mut rows: Vec<Vec<f64>> = (0..n)
            .map(|i| (0..n).map(|j| a[(i, j)]).chain([b[i]]).collect())
            .collect();
        for k in 0..n {
            let mut p = k;
            for i in k + 1..n {
                if rows[i][k].abs() > rows[p][k].abs() {
                    p = i;
                }
            }
            rows.swap(k, p);
            for i in k + 1..n {
                let m = rows[i][k] / rows[k][k];
                for j in k + 1..=n {
                    let u = rows[k][j];
                    rows[i][j] -= m * u;
                }
            }
        }
        let mut x = vec![0.0; n];
        for i in (0..n).rev() {
            let mut s = rows[i][n];
            for j in (i + 1..n).rev() {
                s -= rows[i][j] * x[j];
            }
            x[i] = s / rows[i][i];
        }
        x
    }

    #[test]
    fn lu_solve_equals_gaussian_elimination_bit_for_bit() {
        // The same multipliers and the same subtractions in the same order per entry.
        for n in [1usize, 2, 5, 12] {
            let a = sample(n, n, 0.4 * n as f64);
            let rhs = sample(n, 1, 1.9);
            let want = textbook_solve(&a, rhs.as_slice());
            let (mut lu, mut x, mut piv) = (a.clone(), rhs.clone(), vec![0usize; n]);
            assert!(lu_solve_in_place(&mut lu, &mut piv, &mut x));
            for (g, w) in x.iter().zip(&want) {
                assert_eq!(g.to_bits(), w.to_bits(), "n = {n}");
            }
        }
    }

    #[test]
    fn lu_solve_multiplies_back() {
        // A solution multiplied back by the matrix must return the right-hand side.
        let a = sample(6, 6, 0.7);
        let rhs = sample(6, 2, 2.0);
        let mut lu = a.clone();
        let mut x = rhs.clone();
        let mut piv = [0usize; 6];
        assert!(lu_solve_in_place(&mut lu, &mut piv, &mut x));
        assert!((&a * &x - &rhs).amax() < 1e-13);
    }

    #[test]
    fn lu_needs_pivoting_and_detects_singularity() {
        // A zero leading entry forces a row swap; a repeated row is singular.
        let a = DMatrix::from_row_slice(2, 2, &[0.0, 1.0, 2.0, 3.0]);
        let mut lu = a.clone();
        let mut x = DMatrix::from_row_slice(2, 1, &[1.0, 8.0]);
        let mut piv = [0usize; 2];
        assert!(lu_solve_in_place(&mut lu, &mut piv, &mut x));
        // Hand solution: y = 1, 2x + 3 = 8 -> x = 2.5.
        assert!((x[0] - 2.5).abs() < 1e-15 && (x[1] - 1.0).abs() < 1e-15);
        let mut s = DMatrix::from_row_slice(2, 2, &[1.0, 2.0, 1.0, 2.0]);
        let mut y = DMatrix::from_row_slice(2, 1, &[1.0, 1.0]);
        assert!(!lu_solve_in_place(&mut s, &mut piv, &mut y));
    }
}
