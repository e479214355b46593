//! Running the tape: at one point, at one point with exact forward-mode derivatives,
//! and over many points at once (structure of arrays, one pass over the tape per batch
//! so the cost of interpreting an instruction is paid once, not once per point).
//!
//! None of these allocate: every register lives in a workspace made beforehand.

use super::instr::{self, Instr};
use super::program::Program;

/// Scratch registers for single-point evaluation.
#[derive(Debug, Clone)]
pub struct Workspace {
    /// One value per register.
    regs: Vec<f64>,
    /// Tangent lanes: register `r`, lane `j` at `r * cols + j` (stride set per call).
    tan: Vec<f64>,
}

/// Scratch registers for evaluation over `m` points at once.
#[derive(Debug, Clone)]
pub struct BatchWorkspace {
    /// Most points one call may evaluate (also the register stride).
    cap: usize,
    /// Register `r`, point `j` at `r * cap + j` (the slots' rows stay unused: batches read
    /// the slots from the caller's buffers).
    regs: Vec<f64>,
}

impl BatchWorkspace {
    /// Most points [`Program::eval_batch`] may evaluate with this workspace.
    pub fn capacity(&self) -> usize {
        self.cap
    }
}

/// Contribution of a tangent `t` through a local derivative `g`. A structurally zero
/// tangent contributes exactly zero even where `g` is infinite (sqrt at 0), so a slot
/// an output does not read never gets NaN in its Jacobian column.
#[inline(always)]
fn through(g: f64, t: f64) -> f64 {
    if t == 0.0 {
        0.0
    } else {
        g * t
    }
}

impl Program {
    /// Allocate scratch space for [`Program::eval`] and [`Program::eval_jacobian`].
    pub fn workspace(&self) -> Workspace {
        let mut regs = vec![0.0; self.registers()];
        let n = self.n_slots;
        regs[n..n + self.consts.len()].copy_from_slice(&self.consts);
        Workspace {
            regs,
            tan: vec![0.0; self.registers() * n],
        }
    }

    /// Evaluate every output at `vars` (`vars.len() == slots()`), writing `out[k]`.
    ///
    /// `ws` must come from this program's [`Program::workspace`]. Panics (a caller bug,
    /// never user input) if `vars` is shorter than `slots()` or `out` than `outputs()`.
    /// Results may be NaN or infinite (e.g. `sqrt(-1)`); callers check finiteness.
    pub fn eval(&self, vars: &[f64], ws: &mut Workspace, out: &mut [f64]) {
        let regs = self.load(vars, &mut ws.regs);
        let base = self.n_slots + self.consts.len();
        for (i, &ins) in self.tape.iter().enumerate() {
            regs[base + i] = instr::value(ins, regs);
        }
        for (o, &r) in out[..self.outputs()].iter_mut().zip(&self.out_regs) {
            *o = regs[r as usize];
        }
    }

    fn load<'w>(&self, vars: &[f64], regs: &'w mut [f64]) -> &'w mut [f64] {
        let n = self.n_slots;
        assert!(
            vars.len() >= n,
            "formula: {} vars for {n} slots",
            vars.len()
        );
        assert!(
            regs.len() == self.registers(),
            "formula: workspace made for another program"
        );
        regs[..n].copy_from_slice(&vars[..n]);
        regs
    }

    /// Evaluate and differentiate exactly with respect to slots `0..cols`:
    /// `jac[k * cols + j] = d out[k] / d vars[j]`.
    ///
    /// Forward mode: each register carries `cols` tangent lanes and every instruction
    /// applies the chain rule with its exact local partials (conventions at kinks are in
    /// the module doc). `out` receives the same bits [`Program::eval`] gives. Panics (a
    /// caller bug) if `cols > slots()` or a buffer is too short.
    pub fn eval_jacobian(
        &self,
        vars: &[f64],
        cols: usize,
        ws: &mut Workspace,
        out: &mut [f64],
        jac: &mut [f64],
    ) {
        assert!(cols <= self.n_slots, "formula: {cols} columns > slots");
        let nregs = self.registers();
        let base = self.n_slots + self.consts.len();
        let regs = self.load(vars, &mut ws.regs);
        let tan = &mut ws.tan[..nregs * cols];
        // Slot j seeds lane j; constants and slots past `cols` carry no tangent.
        tan[..base * cols].fill(0.0);
        for j in 0..cols {
            tan[j * cols + j] = 1.0;
        }
        for (i, &ins) in self.tape.iter().enumerate() {
            let dst = base + i;
            let v = instr::value(ins, regs);
            regs[dst] = v;
            let g = instr::partials(ins, regs, v);
            let (args, n) = ins.args();
            let (src, rest) = tan.split_at_mut(dst * cols);
            let d = &mut rest[..cols];
            let lane = |k: usize| {
                let a = args[k] as usize * cols;
                &src[a..a + cols]
            };
            match n {
                1 => {
                    for (d, &ta) in d.iter_mut().zip(lane(0)) {
                        *d = through(g[0], ta);
                    }
                }
                2 => {
                    for ((d, &ta), &tb) in d.iter_mut().zip(lane(0)).zip(lane(1)) {
                        *d = through(g[0], ta) + through(g[1], tb);
                    }
                }
                _ => {
                    let it = d.iter_mut().zip(lane(0)).zip(lane(1)).zip(lane(2));
                    for (((d, &ta), &tb), &tc) in it {
                        *d = through(g[0], ta) + through(g[1], tb) + through(g[2], tc);
                    }
                }
            }
        }
        for (k, &r) in self.out_regs.iter().enumerate() {
            let r = r as usize;
            out[k] = regs[r];
            jac[k * cols..(k + 1) * cols].copy_from_slice(&tan[r * cols..(r + 1) * cols]);
        }
    }

    /// Allocate scratch space for [`Program::eval_batch`] over `m` points.
    ///
    /// The workspace serves any batch of up to `m` points.
    pub fn batch_workspace(&self, m: usize) -> BatchWorkspace {
        let mut regs = vec![0.0; self.registers() * m];
        for (c, &v) in self.consts.iter().enumerate() {
            let r = self.n_slots + c;
            regs[r * m..(r + 1) * m].fill(v);
        }
        BatchWorkspace { cap: m, regs }
    }

    /// Evaluate every output at `m` points: `vars[s * m + j]` is slot `s` of point `j`,
    /// `out[k * m + j]` receives output `k` of point `j`.
    ///
    /// `m` may be smaller than the workspace's capacity (any batch up to it works); the
    /// results are bit-for-bit those of [`Program::eval`] at each point. Panics (a caller
    /// bug) if `m` exceeds the capacity or a buffer is too short.
    pub fn eval_batch(&self, vars: &[f64], m: usize, ws: &mut BatchWorkspace, out: &mut [f64]) {
        self.eval_batch_split(vars, &[], m, ws, out);
    }

    /// [`Program::eval_batch`] with the slots in two pieces: the first `head.len() / m`
    /// slots from `head` (the states, straight from an integrator's vector), the rest from
    /// `tail` (inputs and time), which saves the caller gathering them in one buffer.
    pub fn eval_batch_split(
        &self,
        head: &[f64],
        tail: &[f64],
        m: usize,
        ws: &mut BatchWorkspace,
        out: &mut [f64],
    ) {
        let cap = ws.cap;
        assert!(m <= cap, "formula: batch of {m} > workspace capacity {cap}");
        assert!(
            ws.regs.len() == self.registers() * cap,
            "formula: batch workspace made for another program"
        );
        let regs = &mut ws.regs[..];
        // Slots are read where they are (no copy into the register file).
        let inputs = Inputs {
            head,
            tail,
            first: head.len() / m.max(1),
            slots: self.n_slots,
        };
        let base = self.n_slots + self.consts.len();
        for (i, &ins) in self.tape.iter().enumerate() {
            batch_step(ins, regs, inputs, (cap, m, base + i));
        }
        // An output may be a slot itself (a formula that is just a name).
        let all = Args {
            regs,
            inputs,
            cap,
            m,
        };
        for (k, &r) in self.out_regs.iter().enumerate() {
            out[k * m..(k + 1) * m].copy_from_slice(row(&all, r));
        }
    }
}

/// Where a batch's slot values are: the first `first` slots in `head`, the others up
/// to `slots` in `tail`, each slot `m` points long.
#[derive(Clone, Copy)]
struct Inputs<'a> {
    head: &'a [f64],
    tail: &'a [f64],
    first: usize,
    slots: usize,
}

/// The arguments an instruction may read: the slots, and the register rows before its
/// destination (arguments always precede it in SSA order).
struct Args<'a> {
    regs: &'a [f64],
    inputs: Inputs<'a>,
    cap: usize,
    m: usize,
}

/// Split the register file at `dst` into the rows before it (with the slots, as
/// [`Args`]) and the destination row.
#[inline(always)]
fn rows<'a>(
    regs: &'a mut [f64],
    inputs: Inputs<'a>,
    (cap, m, dst): (usize, usize, usize),
) -> (Args<'a>, &'a mut [f64]) {
    let (src, rest) = regs.split_at_mut(dst * cap);
    let args = Args {
        regs: src,
        inputs,
        cap,
        m,
    };
    (args, &mut rest[..m])
}

#[inline(always)]
fn row<'a>(src: &Args<'a>, r: u32) -> &'a [f64] {
    let (r, m, ins) = (r as usize, src.m, &src.inputs);
    if r >= ins.slots {
        &src.regs[r * src.cap..r * src.cap + m]
    } else if r < ins.first {
        &ins.head[r * m..(r + 1) * m]
    } else {
        &ins.tail[(r - ins.first) * m..(r - ins.first + 1) * m]
    }
}

#[inline(always)]
fn un(
    regs: &mut [f64],
    inputs: Inputs<'_>,
    at: (usize, usize, usize),
    a: u32,
    f: impl Fn(f64) -> f64,
) {
    let (src, d) = rows(regs, inputs, at);
    for (d, &x) in d.iter_mut().zip(row(&src, a)) {
        *d = f(x);
    }
}

#[inline(always)]
fn bin(
    regs: &mut [f64],
    inputs: Inputs<'_>,
    at: (usize, usize, usize),
    (a, b): (u32, u32),
    f: impl Fn(f64, f64) -> f64,
) {
    let (src, d) = rows(regs, inputs, at);
    let it = d.iter_mut().zip(row(&src, a)).zip(row(&src, b));
    for ((d, &x), &y) in it {
        *d = f(x, y);
    }
}

/// One instruction over the first `m` points. Each arm applies the same scalar code as
/// [`instr::value`], so batch and point evaluation agree bit for bit.
fn batch_step(ins: Instr, regs: &mut [f64], inputs: Inputs<'_>, at: (usize, usize, usize)) {
    use Instr::*;
    match ins {
        Neg(a) => un(regs, inputs, at, a, |x| -x),
        Sin(a) => un(regs, inputs, at, a, f64::sin),
        Cos(a) => un(regs, inputs, at, a, f64::cos),
        Tan(a) => un(regs, inputs, at, a, f64::tan),
        Asin(a) => un(regs, inputs, at, a, f64::asin),
        Acos(a) => un(regs, inputs, at, a, f64::acos),
        Atan(a) => un(regs, inputs, at, a, f64::atan),
        Sinh(a) => un(regs, inputs, at, a, f64::sinh),
        Cosh(a) => un(regs, inputs, at, a, f64::cosh),
        Tanh(a) => un(regs, inputs, at, a, f64::tanh),
        Exp(a) => un(regs, inputs, at, a, f64::exp),
        Ln(a) => un(regs, inputs, at, a, f64::ln),
        Log10(a) => un(regs, inputs, at, a, f64::log10),
        Sqrt(a) => un(regs, inputs, at, a, f64::sqrt),
        Abs(a) => un(regs, inputs, at, a, f64::abs),
        Sign(a) => un(regs, inputs, at, a, instr::sign),
        Powi(a, k) => un(regs, inputs, at, a, |x| x.powi(k)),
        Add(a, b) => bin(regs, inputs, at, (a, b), |x, y| x + y),
        Sub(a, b) => bin(regs, inputs, at, (a, b), |x, y| x - y),
        Mul(a, b) => bin(regs, inputs, at, (a, b), |x, y| x * y),
        Div(a, b) => bin(regs, inputs, at, (a, b), |x, y| x / y),
        Pow(a, b) => bin(regs, inputs, at, (a, b), f64::powf),
        Atan2(a, b) => bin(regs, inputs, at, (a, b), f64::atan2),
        Min(a, b) => bin(regs, inputs, at, (a, b), instr::min2),
        Max(a, b) => bin(regs, inputs, at, (a, b), instr::max2),
        Hypot(a, b) => bin(regs, inputs, at, (a, b), f64::hypot),
        Clamp(a, b, c) => {
            let (src, d) = rows(regs, inputs, at);
            let (x, lo, hi) = (row(&src, a), row(&src, b), row(&src, c));
            for (((d, &x), &lo), &hi) in d.iter_mut().zip(x).zip(lo).zip(hi) {
                *d = instr::clamp3(x, lo, hi);
            }
        }
    }
}
