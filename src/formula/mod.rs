//! The formula language of model dynamics and sensors: parsed once, compiled to a flat
//! program, evaluated at one point, over many points at once (structure of arrays), and
//! differentiated exactly (never by finite differences).
//!
//! Variables live in numbered *slots* (states, inputs, `t`, `dt`, ...) chosen by the
//! caller; fixed parameters and `pi`/`e` are folded in as constants at compile time.

// INTERFACE (skeleton): the implementation replaces the bodies below.

/// Size limits that turn hostile formulas into clean errors instead of stack overflows.
#[derive(Debug, Clone, Copy)]
pub struct FormulaLimits {
    /// Longest formula in characters.
    pub max_len: usize,
    /// Deepest nesting (parentheses, calls, unary operators, right-nested powers).
    pub max_depth: usize,
}

/// One formula text and the JSON Pointer it came from (for error reports).
#[derive(Debug, Clone)]
pub struct Source<'a> {
    /// The formula text.
    pub text: &'a str,
    /// JSON Pointer of the string in the request.
    pub pointer: String,
}

/// What went wrong in a formula.
#[derive(Debug, Clone, PartialEq)]
pub struct FormulaError {
    /// JSON Pointer of the formula string.
    pub pointer: String,
    /// 1-based column (in characters) where the problem starts.
    pub column: usize,
    /// Lower-case message naming the problem and, for unknown names, the known ones.
    pub message: String,
}

/// A compiled vector function: `outputs()` formulas over `slots()` variables.
#[derive(Debug, Clone)]
pub struct Program {
    _private: (),
}

/// Scratch registers for single-point evaluation.
#[derive(Debug, Clone)]
pub struct Workspace {
    _private: (),
}

/// Scratch registers for evaluation over `m` points at once.
#[derive(Debug, Clone)]
pub struct BatchWorkspace {
    _private: (),
}

impl Program {
    /// Parse and compile `sources` (one output each) over the named `slots`; names in
    /// `constants` are replaced by their values. All errors are reported, not just the first.
    pub fn compile(
        sources: &[Source<'_>],
        slots: &[&str],
        constants: &[(&str, f64)],
        limits: &FormulaLimits,
    ) -> Result<Program, Vec<FormulaError>> {
        let _ = (sources, slots, constants, limits);
        todo!("formula compiler")
    }

    /// Number of outputs (formulas).
    pub fn outputs(&self) -> usize {
        todo!()
    }

    /// Number of variable slots.
    pub fn slots(&self) -> usize {
        todo!()
    }

    /// Whether output `output` depends on slot `slot` at all (structurally).
    pub fn depends_on(&self, output: usize, slot: usize) -> bool {
        let _ = (output, slot);
        todo!()
    }

    /// Allocate scratch space for [`Program::eval`] and [`Program::eval_jacobian`].
    pub fn workspace(&self) -> Workspace {
        todo!()
    }

    /// Evaluate every output at `vars` (`vars.len() == slots()`), writing `out[k]`.
    pub fn eval(&self, vars: &[f64], ws: &mut Workspace, out: &mut [f64]) {
        let _ = (vars, ws, out);
        todo!()
    }

    /// Evaluate and differentiate exactly with respect to slots `0..cols`:
    /// `jac[k * cols + j] = d out[k] / d vars[j]`.
    pub fn eval_jacobian(
        &self,
        vars: &[f64],
        cols: usize,
        ws: &mut Workspace,
        out: &mut [f64],
        jac: &mut [f64],
    ) {
        let _ = (vars, cols, ws, out, jac);
        todo!()
    }

    /// Allocate scratch space for [`Program::eval_batch`] over `m` points.
    pub fn batch_workspace(&self, m: usize) -> BatchWorkspace {
        let _ = m;
        todo!()
    }

    /// Evaluate every output at `m` points: `vars[s * m + j]` is slot `s` of point `j`,
    /// `out[k * m + j]` receives output `k` of point `j`.
    pub fn eval_batch(&self, vars: &[f64], m: usize, ws: &mut BatchWorkspace, out: &mut [f64]) {
        let _ = (vars, m, ws, out);
        todo!()
    }
}
