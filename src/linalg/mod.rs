//! Dense numerical linear algebra for the filters, the discretisation and the request
//! checks: one algorithm per file, each over column-major storage (`a[i + j * rows]`) in
//! buffers the caller owns, so the per-step loops allocate nothing.
//!
//! | file | holds | source |
//! | --- | --- | --- |
//! | [`cholesky`](mod@cholesky) | `A = L Lᵀ` (definite and semi-definite), triangular solves | Golub & Van Loan §4.2 |
//! | [`lu`] | `P A = L U` with partial pivoting, solve in place | Golub & Van Loan §3.4 |
//! | [`products`] | `A B`, `A Bᵀ`, `+=` forms, `Φ P Φᵀ + Q`, dot product | Golub & Van Loan §1.1, §1.5 |
//! | [`symmetric_eigen`](mod@symmetric_eigen) | `A = V Λ Vᵀ` by Householder and implicit QL | Wilkinson & Reinsch II/2–II/3 |
//! | [`repair`] | `(P + Pᵀ)/2`, symmetry check, exact rounding | Higham §10.1 |
//! | [`finite`] | no NaN or infinity anywhere | IEEE 754 |
//! | [`norm`] | `‖A‖₁` | Golub & Van Loan §2.3 |
//! | `dispatch.rs` | AVX2 copies of hot kernels, chosen at run time | |
//!
//! Rules every kernel keeps: the order of floating-point operations is fixed and
//! documented (results are the same bits on every machine, which bit-exact resume relies
//! on); each file's tests keep a plain textbook version as the oracle; a reordering for
//! speed stays only with a named bench showing more than 5 %.
//!
//! This module sits below `filter`, `dynamics` and `spec` and imports none of them.

pub mod cholesky;
pub(crate) mod dispatch;
pub mod finite;
pub mod lu;
pub mod norm;
pub mod products;
pub mod repair;
pub mod symmetric_eigen;

pub use cholesky::{
    cholesky, cholesky_psd, cholesky_solve, mahalanobis, solve_lower, solve_lower_transposed,
    NotPositive,
};
pub use dispatch::has_avx2;
pub use finite::all_finite;
pub use lu::lu_solve_in_place;
pub use norm::norm1;
pub use products::{
    add_mul_ab, add_mul_abt, congruence_plus, dot4, gemm_nn, gemm_nt, gemm_nt_upper, mul_ab,
    mul_abt,
};
pub use repair::{is_symmetric, round_half_away, symmetrize};
pub use symmetric_eigen::symmetric_eigen;
