//! The matrix 1-norm, `‖A‖₁ = max_j Σ_i |a_ij|` (largest absolute column sum; Golub &
//! Van Loan, *Matrix Computations*, 4th ed., §2.3.2, from memory), which the matrix
//! exponential uses to choose its Padé degree and scaling. A NaN entry gives NaN, so a
//! broken matrix never looks harmless.

use nalgebra::DMatrix;

/// Largest absolute column sum, the matrix 1-norm; NaN if any entry is NaN.
pub fn norm1(a: &DMatrix<f64>) -> f64 {
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

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn norm1_is_largest_column_sum() {
        // Hand value: columns sum to |1|+|-3| = 4 and |2|+|0.5| = 2.5.
        let a = DMatrix::from_row_slice(2, 2, &[1.0, 2.0, -3.0, 0.5]);
        assert_eq!(norm1(&a), 4.0);
        let with_nan = DMatrix::from_row_slice(2, 2, &[1.0, f64::NAN, -3.0, 0.5]);
        assert!(norm1(&with_nan).is_nan());
    }
}
