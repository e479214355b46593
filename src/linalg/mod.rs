//! Dense numerical linear algebra for the filters, the discretisation and the request
//! checks: one algorithm per file, each over column-major storage (`a[i + j * rows]`) in
//! buffers the caller owns, so the per-step loops allocate nothing.
//!
//! | file | holds | source |
//! | --- | --- | --- |
//! | [`array_update`] | square-root array form of the Kalman update, `P⁺ = L⁺ L⁺ᵀ` | Kailath, Sayed & Hassibi ch. 12 |
//! | [`cholesky`](mod@cholesky) | `A = L Lᵀ` (definite and semi-definite), triangular solves | Golub & Van Loan §4.2 |
//! | [`lu`] | `P A = L U` with partial pivoting, solve in place | Golub & Van Loan §3.4 |
//! | [`products`] | `A B`, `A Bᵀ`, `+=` forms, `Φ P Φᵀ + Q`, dot product | Golub & Van Loan §1.1, §1.5 |
//! | [`symmetric_eigen`](mod@symmetric_eigen) | `A = V Λ Vᵀ` by Householder and implicit QL | Wilkinson & Reinsch II/2–II/3 |
//! | [`repair`] | `(P + Pᵀ)/2`, symmetry check, exact rounding | Higham §10.1 |
//! | [`finite`] | no NaN or infinity anywhere | IEEE 754 |
//! | [`norm`] | `‖A‖₁` | Golub & Van Loan §2.3 |
//!
//! Three kernels are compiled twice, for baseline x86-64 (SSE2, two doubles per
//! instruction) and for AVX2 (four), and pick the copy for the CPU at run time through the
//! `multiversion` crate: the tiled products `gemm_blocked_nn` and `gemm_blocked_nt`
//! (`products.rs`) and `symmetric_eigen`. Each gives its two copies a block size sized to
//! the sixteen registers of each width (tiles of 8 rows or 4, rotations over 16 rows or 8),
//! chosen inside the function with `target_cfg_f!`. Both copies compute the same bits:
//! Rust never fuses a multiplication and an addition on its own (no floating-point
//! contraction without an explicit `mul_add`), LLVM vectorises a sum only where the order
//! of its additions stays as written, only `avx2` is enabled (not `fma`), and the block
//! size decides which entries share a register, never the order in which one entry's
//! terms are added. Each kernel's tests compare the two copies bit for bit. (The AVX2
//! copies were checked instruction for instruction against the hand-written dispatch they
//! replace.)
//!
//! Rules every kernel keeps: the order of floating-point operations is fixed and
//! documented (results are the same bits on every machine, which bit-exact resume relies
//! on); each file's tests keep a plain textbook version as the oracle; a reordering for
//! speed stays only with a named bench showing more than 5 %.
//!
//! This module sits below `filter`, `dynamics`, `model` and `request` and imports none of them.

pub mod array_update;
pub mod cholesky;
pub mod finite;
pub mod lu;
pub mod norm;
pub mod products;
pub mod repair;
pub mod symmetric_eigen;

pub use array_update::{noise_factor, triangularize_rows, ArrayError, ArrayUpdate, RowOutcome};
pub use cholesky::{
    cholesky, cholesky_psd, cholesky_solve, mahalanobis, solve_lower, solve_lower_transposed,
    NotPositive,
};
pub use finite::all_finite;
pub use lu::lu_solve_in_place;
pub use norm::norm1;
pub use products::{
    add_mul_ab, add_mul_abt, congruence_plus, dot4, gemm_nn, gemm_nt, gemm_nt_upper, mul_ab,
    mul_abt,
};
pub use repair::{is_symmetric, round_half_away, symmetrize};
pub use symmetric_eigen::symmetric_eigen;
