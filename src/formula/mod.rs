//! The formula language of model dynamics and sensors: parsed once, compiled to a flat
//! program, evaluated at one point, over many points at once (structure of arrays), and
//! differentiated exactly (never by finite differences).
//!
//! Variables live in numbered *slots* (states, inputs, `t`, `dt`, ...) chosen by the
//! caller; fixed parameters and `pi`/`e` are folded in as constants at compile time.
//!
//! # Language
//! Numbers (`2`, `.5`, `2.`, `1e-3`), names (letters, digits and `_`, not starting with a
//! digit), `+ - * / ^`, unary `-` and `+`, parentheses, and the functions `sin cos tan
//! asin acos atan atan2(y, x) sinh cosh tanh exp ln log10 sqrt abs sign min(a, b)
//! max(a, b) pow(a, b) hypot(a, b) clamp(x, lo, hi)`. `^` binds tightest and is
//! right-associative (`2^3^2 = 2^9`); unary minus binds below it (`-x^2 = -(x^2)`,
//! `2^-1 = 0.5`); then `* /`, then `+ -`, both left-associative. A name is a slot if
//! one has that name, else a caller constant, else `pi` or `e`.
//!
//! # Compilation
//! All formulas of a [`Program`] share one tape of SSA instructions: identical
//! subexpressions (also across formulas) are computed once, constant subexpressions are
//! folded, and a constant integer exponent (`x^2`, `pow(x, -3)`) becomes an integer
//! power, exact in sign for negative bases. Errors carry the formula's pointer and the
//! 1-based character column; every failing formula reports its first error. Length and
//! nesting limits ([`FormulaLimits`], capped at [`MAX_DEPTH_CEILING`]) are checked
//! before the parser descends, so hostile input is refused, never a stack overflow.
//!
//! # Derivatives
//! [`Program::eval_jacobian`] is forward-mode automatic differentiation: exact chain rule
//! per instruction. At kinks and edges it uses these conventions:
//! - `abs'(x) = sign(x)`, so 0 at 0; `sign' = 0` everywhere;
//! - `min`/`max`: the derivative of the selected argument; ties select the first;
//! - `clamp(x, lo, hi)`: the derivative of `x` on `[lo, hi]` (inclusive), of `lo` below,
//!   of `hi` above;
//! - `pow(a, b)` (and `a^b`): `d/da = b·a^(b-1)` always, `d/db = a^b·ln a` only when
//!   `a > 0` (0 otherwise); a constant integer exponent `n` gives `n·a^(n-1)`;
//! - `hypot(a, b)` at the origin: 0 (as `abs` at 0);
//! - `sqrt'(0) = +inf`, `ln'(0) = inf` and similar are returned as they are; callers
//!   check finiteness and fail cleanly;
//! - a slot an output does not read has a derivative of exactly 0, even next to an
//!   infinite local derivative.
//!
//! Evaluation may return NaN or infinities (`sqrt(-1)`, `1/0`) and never panics on them.

mod affine;
mod builder;
mod error;
mod eval;
mod family;
mod instr;
mod lexer;
mod parser;
mod program;
#[cfg(test)]
mod tests;

pub use affine::AffineForm;
pub use error::FormulaError;
pub use eval::{BatchWorkspace, Workspace};
pub use family::{
    element_text, Boundary, FamilyKernel, FamilySet, FamilyShape, FamilyWorkspace, Load,
};
pub use parser::MAX_DEPTH_CEILING;
pub use program::{FormulaLimits, Program, Source};

/// Whether `name` is a function of the language (`sin`, `atan2`, `clamp`, ...), so a model
/// may not give a state, input or parameter that name.
pub fn is_function_name(name: &str) -> bool {
    instr::FUNCTIONS.iter().any(|f| f.name == name)
}
