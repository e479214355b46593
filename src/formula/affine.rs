//! Recognises programs that are affine with constant coefficients, `out = J v + c`, so a
//! caller can treat them exactly as matrices (e.g. discretise affine rates exactly
//! instead of integrating them numerically).
//!
//! The test is structural, on the compiled tape: every register gets a class (constant,
//! affine, or anything else) from its instruction and its arguments' classes, by the
//! rules of algebra — sums of affine terms are affine, a product is affine only when one
//! factor is constant, a quotient only when the divisor is constant, and any other
//! function of a non-constant argument is not affine. It never guesses from values, so
//! `x*x` is refused even where it happens to look linear.

use super::instr::Instr;
use super::program::Program;

/// The class of a register, ordered so that `max` combines sums.
#[derive(Debug, Clone, Copy, PartialEq, Eq, PartialOrd, Ord)]
enum Class {
    /// Depends on no slot.
    Constant,
    /// Affine in the chosen slots with constant coefficients.
    Affine,
    /// Anything else.
    Other,
}

/// `out = jacobian · v + offset` for `v` = slots `0..cols`.
#[derive(Debug, Clone, PartialEq)]
pub struct AffineForm {
    /// Row-major `outputs × cols`: `jacobian[k * cols + j] = ∂ out[k] / ∂ v[j]`.
    pub jacobian: Vec<f64>,
    /// `out` at `v = 0`.
    pub offset: Vec<f64>,
}

fn classify(ins: Instr, class: &[Class]) -> Class {
    use Class::*;
    use Instr::*;
    let c = |r: u32| class[r as usize];
    match ins {
        Neg(a) => c(a),
        Add(a, b) | Sub(a, b) => c(a).max(c(b)),
        Mul(a, b) => match (c(a), c(b)) {
            (Constant, x) | (x, Constant) => x,
            _ => Other,
        },
        Div(a, b) if c(b) == Constant => c(a),
        Powi(a, 1) => c(a),
        Powi(_, 0) => Constant,
        _ => {
            let (args, n) = ins.args();
            if args[..n].iter().all(|&r| c(r) == Constant) {
                Constant
            } else {
                Other
            }
        }
    }
}

impl Program {
    /// The exact affine form of this program in slots `0..cols`, if every output is
    /// affine in them with constant coefficients and reads no slot at or past `cols`.
    /// Returns `None` as well when a coefficient is not finite (e.g. `x / 0`), so the
    /// caller keeps the general path and its usual failure report.
    pub fn affine_form(&self, cols: usize) -> Option<AffineForm> {
        if cols > self.n_slots {
            return None;
        }
        let base = self.n_slots + self.consts.len();
        let mut class = vec![Class::Constant; self.registers()];
        for (s, c) in class[..self.n_slots].iter_mut().enumerate() {
            *c = if s < cols {
                Class::Affine
            } else {
                Class::Other
            };
        }
        for (i, &ins) in self.tape.iter().enumerate() {
            class[base + i] = classify(ins, &class);
        }
        if self
            .out_regs
            .iter()
            .any(|&r| class[r as usize] == Class::Other)
        {
            return None;
        }
        // Affine outputs: the Jacobian is the same everywhere, so read it (and the
        // offset) at the origin. Slots past `cols` are read by no output.
        let mut ws = self.workspace();
        let vars = vec![0.0; self.n_slots];
        let mut offset = vec![0.0; self.outputs()];
        let mut jacobian = vec![0.0; self.outputs() * cols];
        self.eval_jacobian(&vars, cols, &mut ws, &mut offset, &mut jacobian);
        let finite = offset.iter().chain(&jacobian).all(|x| x.is_finite());
        finite.then_some(AffineForm { jacobian, offset })
    }
}
