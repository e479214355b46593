//! Compiles the formulas of one model part (dynamics, one sensor, ...) into a single
//! flat tape of SSA instructions over numbered registers, shared by all its outputs.
//!
//! Register layout: `[slots | constants | one register per instruction]`. Slots are
//! copied in per evaluation, constants are written once when a workspace is made, and
//! instruction `i` writes register `slots + constants + i`. Only nodes some output needs
//! make it onto the tape.

use super::builder::{Builder, Node};
use super::error::FormulaError;
use super::instr::Instr;
use super::lexer;
use super::parser::{Names, Parser};

/// Size limits that turn hostile formulas into clean errors instead of stack overflows.
#[derive(Debug, Clone, Copy)]
pub struct FormulaLimits {
    /// Longest formula in characters.
    pub max_len: usize,
    /// Deepest nesting (parentheses, calls, unary operators, right-nested powers).
    /// Values above [`MAX_DEPTH_CEILING`](super::MAX_DEPTH_CEILING) act as the ceiling.
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

/// A compiled vector function: `outputs()` formulas over `slots()` variables.
#[derive(Debug, Clone)]
pub struct Program {
    pub(crate) n_slots: usize,
    /// Values of registers `n_slots..n_slots + consts.len()`.
    pub(crate) consts: Vec<f64>,
    /// Instruction `i` writes register `n_slots + consts.len() + i`.
    pub(crate) tape: Vec<Instr>,
    /// The register holding each output.
    pub(crate) out_regs: Vec<u32>,
    /// Row-major `outputs × words` bit sets of the slots each output reads.
    deps: Vec<u64>,
    words: usize,
}

impl Program {
    /// Parse and compile `sources` (one output each) over the named `slots`; names in
    /// `constants` are replaced by their values. All errors are reported, not just the first.
    ///
    /// A name resolves to a slot first, then to a constant, then to `pi` or `e`.
    /// Each failing formula contributes its first error.
    pub fn compile(
        sources: &[Source<'_>],
        slots: &[&str],
        constants: &[(&str, f64)],
        limits: &FormulaLimits,
    ) -> Result<Program, Vec<FormulaError>> {
        let names = Names::new(slots, constants);
        let mut b = Builder::default();
        let mut roots = Vec::with_capacity(sources.len());
        let mut errors = Vec::new();
        for src in sources {
            match parse_one(src.text, limits, &names, &mut b) {
                Ok(id) => roots.push(id),
                Err(f) => errors.push(f.with_pointer(&src.pointer)),
            }
        }
        if !errors.is_empty() {
            return Err(errors);
        }
        Ok(finish(&b, &roots, slots.len()))
    }

    /// Number of outputs (formulas).
    pub fn outputs(&self) -> usize {
        self.out_regs.len()
    }

    /// Number of variable slots.
    pub fn slots(&self) -> usize {
        self.n_slots
    }

    /// Number of instructions on the tape, after constant folding and sharing of
    /// common subexpressions (a measure of the work one evaluation does).
    pub fn instructions(&self) -> usize {
        self.tape.len()
    }

    /// Whether output `output` depends on slot `slot` at all (structurally).
    ///
    /// Structural means the formula reads the slot after folding; `0*x` still counts.
    /// Out-of-range indices give `false`.
    pub fn depends_on(&self, output: usize, slot: usize) -> bool {
        if output >= self.outputs() || slot >= self.n_slots {
            return false;
        }
        let word = self.deps[output * self.words + slot / 64];
        word & (1u64 << (slot % 64)) != 0
    }

    /// Registers in total: slots, constants and one per instruction.
    pub(crate) fn registers(&self) -> usize {
        self.n_slots + self.consts.len() + self.tape.len()
    }
}

/// Lex and parse one formula into `b`, after the length check.
fn parse_one(
    text: &str,
    limits: &FormulaLimits,
    names: &Names<'_>,
    b: &mut Builder,
) -> Result<u32, super::error::Fault> {
    let len = text.chars().count();
    if len > limits.max_len {
        let col = limits.max_len + 1;
        return Err(super::error::Fault::new(
            col,
            format!(
                "formula is {len} characters long; the limit is {} (column {col} is the first too many)",
                limits.max_len
            ),
        ));
    }
    let toks = lexer::lex(text)?;
    Parser::new(&toks, limits.max_depth, names, b).formula()
}

/// Keep the nodes some output needs, give them registers in node order (which is
/// already an evaluation order) and record which slots each output reads.
fn finish(b: &Builder, roots: &[u32], n_slots: usize) -> Program {
    let nodes = &b.nodes;
    let mut live = vec![false; nodes.len()];
    for &r in roots {
        live[r as usize] = true;
    }
    for i in (0..nodes.len()).rev() {
        if let (true, Node::Op(ins)) = (live[i], nodes[i]) {
            let (args, n) = ins.args();
            for &a in &args[..n] {
                live[a as usize] = true;
            }
        }
    }
    let mut reg = vec![u32::MAX; nodes.len()];
    let mut consts = Vec::new();
    for (i, node) in nodes.iter().enumerate() {
        match *node {
            Node::Slot(s) => reg[i] = s,
            Node::Const(v) if live[i] => {
                reg[i] = (n_slots + consts.len()) as u32;
                consts.push(v);
            }
            _ => {}
        }
    }
    let base = n_slots + consts.len();
    let words = n_slots.div_ceil(64);
    // Slot bit sets per node, built forward since arguments precede their users.
    let mut node_deps = vec![0u64; nodes.len() * words];
    let mut tape = Vec::new();
    for (i, node) in nodes.iter().enumerate() {
        if !live[i] {
            continue;
        }
        match *node {
            Node::Slot(s) => {
                let s = s as usize;
                node_deps[i * words + s / 64] |= 1u64 << (s % 64);
            }
            Node::Const(_) => {}
            Node::Op(ins) => {
                let (args, n) = ins.args();
                let mut mapped = [0u32; 3];
                for k in 0..n {
                    let a = args[k] as usize;
                    mapped[k] = reg[a];
                    for w in 0..words {
                        node_deps[i * words + w] |= node_deps[a * words + w];
                    }
                }
                reg[i] = (base + tape.len()) as u32;
                tape.push(ins.with_args(mapped));
            }
        }
    }
    let mut deps = Vec::with_capacity(roots.len() * words);
    for &r in roots {
        let r = r as usize;
        deps.extend_from_slice(&node_deps[r * words..(r + 1) * words]);
    }
    Program {
        n_slots,
        consts,
        tape,
        out_regs: roots.iter().map(|&r| reg[r as usize]).collect(),
        deps,
        words,
    }
}
