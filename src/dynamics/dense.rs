//! Small dense kernels (product, 1-norm, LU solve) that never allocate.
//!
//! nalgebra's `gemm` hands dynamic matrices larger than 5 × 5 to `matrixmultiply`, which
//! allocates a packing buffer on every call, and its `lu()` returns freshly allocated
//! factors. The propagation step runs between every pair of readings, so these plain
//! column-major loops over preallocated buffers replace both. At the sizes a plant model
//! has (tens of states) they are fast enough, and their order of operations is fixed, so
//! results are reproducible bit for bit on any machine.

use nalgebra::DMatrix;

/// `c = a · op(b) + beta · c`, where `op(b)` is `b'` when `b_transposed`, else `b`.
///
/// With `beta == 0` the old contents of `c` are ignored (not multiplied), so stale
/// non-finite values cannot leak through.
pub(super) fn mul(
    c: &mut DMatrix<f64>,
    a: &DMatrix<f64>,
    b: &DMatrix<f64>,
    b_transposed: bool,
    beta: f64,
) {
    let (m, k) = a.shape();
    let (bk, n) = if b_transposed {
        (b.ncols(), b.nrows())
    } else {
        b.shape()
    };
    assert_eq!(k, bk, "dense::mul: inner dimensions differ");
    assert_eq!(c.shape(), (m, n), "dense::mul: output has the wrong shape");
    let a = a.as_slice();
    let b_rows = b.nrows();
    let b = b.as_slice();
    let c = c.as_mut_slice();
    for j in 0..n {
        let cj = &mut c[j * m..(j + 1) * m];
        if beta == 0.0 {
            cj.fill(0.0);
        } else if beta != 1.0 {
            cj.iter_mut().for_each(|x| *x *= beta);
        }
        for p in 0..k {
            // Column-major storage: element (r, s) sits at r + s * rows.
            let bpj = if b_transposed {
                b[j + p * b_rows]
            } else {
                b[p + j * b_rows]
            };
            let ap = &a[p * m..(p + 1) * m];
            for (ci, ai) in cj.iter_mut().zip(ap) {
                *ci += ai * bpj;
            }
        }
    }
}

/// Largest absolute column sum, the matrix 1-norm; NaN if any entry is NaN.
pub(super) fn norm1(a: &DMatrix<f64>) -> f64 {
    // `f64::max` would drop a NaN column sum, making a broken matrix look harmless.
    a.column_iter()
        .map(|col| col.iter().map(|x| x.abs()).sum::<f64>())
        .fold(0.0, |acc: f64, s| {
            if acc.is_nan() || s.is_nan() {
                f64::NAN
            } else {
                acc.max(s)
            }
        })
}

/// Solve `a x = b` in place: `a` is overwritten by its LU factors (partial pivoting,
/// Golub & Van Loan, *Matrix Computations*, 4th ed., Algorithm 3.4.1), `b` by `x`.
///
/// `piv` must hold `a.nrows()` entries. Returns `false` (leaving `b` unspecified) when a
/// pivot is zero or not finite, i.e. `a` is singular to working precision.
pub(super) fn lu_solve_in_place(
    a: &mut DMatrix<f64>,
    piv: &mut [usize],
    b: &mut DMatrix<f64>,
) -> bool {
    let n = a.nrows();
    assert_eq!(
        a.ncols(),
        n,
        "dense::lu_solve_in_place: matrix is not square"
    );
    assert_eq!(
        b.nrows(),
        n,
        "dense::lu_solve_in_place: right-hand side has the wrong rows"
    );
    assert_eq!(
        piv.len(),
        n,
        "dense::lu_solve_in_place: pivot buffer has the wrong length"
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

    #[test]
    fn product_matches_nalgebra_in_both_forms() {
        // nalgebra's own product is the independent reference.
        let a = sample(4, 3, 0.3);
        let b = sample(3, 5, 1.1);
        let bt = b.transpose();
        let mut c = DMatrix::from_element(4, 5, f64::NAN);
        mul(&mut c, &a, &b, false, 0.0);
        assert!((&c - &a * &b).amax() < 1e-14);
        let mut c2 = DMatrix::from_element(4, 5, 1.0);
        mul(&mut c2, &a, &bt, true, 2.0);
        let expected = &a * &b + DMatrix::from_element(4, 5, 2.0);
        assert!((&c2 - expected).amax() < 1e-14);
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

    #[test]
    fn norm1_is_largest_column_sum() {
        // Hand value: columns sum to |1|+|-3| = 4 and |2|+|0.5| = 2.5.
        let a = DMatrix::from_row_slice(2, 2, &[1.0, 2.0, -3.0, 0.5]);
        assert_eq!(norm1(&a), 4.0);
        let with_nan = DMatrix::from_row_slice(2, 2, &[1.0, f64::NAN, -3.0, 0.5]);
        assert!(norm1(&with_nan).is_nan());
    }
}
