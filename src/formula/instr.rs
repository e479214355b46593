//! The instruction set of the compiled tape, with each instruction's value and its exact
//! local partial derivatives in one place, so evaluation, constant folding, batch
//! evaluation and differentiation cannot disagree.
//!
//! Conventions at kinks and edges (documented for users in the module doc):
//! `abs'(0) = 0`, `sign' = 0`, `min`/`max` follow the selected argument (ties pick the
//! first), `clamp` follows `x` on `[lo, hi]` inclusive and the bound outside, `pow(a, b)`
//! has `d/da = b·a^(b-1)` and `d/db = a^b·ln a` only when `a > 0` (else 0), `hypot` has
//! derivative 0 at the origin (like `abs`), and `sqrt'(0) = +inf` (left to the caller's
//! finiteness check).

/// One SSA instruction. Arguments are register (or, while compiling, node) indices;
/// the destination is implicit: instruction `i` of the tape writes register `base + i`.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Hash)]
pub(crate) enum Instr {
    Neg(u32),
    Sin(u32),
    Cos(u32),
    Tan(u32),
    Asin(u32),
    Acos(u32),
    Atan(u32),
    Sinh(u32),
    Cosh(u32),
    Tanh(u32),
    Exp(u32),
    Ln(u32),
    Log10(u32),
    Sqrt(u32),
    Abs(u32),
    Sign(u32),
    /// Integer power with a constant exponent (exact sign for negative bases).
    Powi(u32, i32),
    Add(u32, u32),
    Sub(u32, u32),
    Mul(u32, u32),
    Div(u32, u32),
    Pow(u32, u32),
    Atan2(u32, u32),
    Min(u32, u32),
    Max(u32, u32),
    Hypot(u32, u32),
    Clamp(u32, u32, u32),
}

impl Instr {
    /// The argument indices (unused entries are 0) and how many there are.
    pub(crate) fn args(self) -> ([u32; 3], usize) {
        use Instr::*;
        match self {
            Neg(a)
            | Sin(a)
            | Cos(a)
            | Tan(a)
            | Asin(a)
            | Acos(a)
            | Atan(a)
            | Sinh(a)
            | Cosh(a)
            | Tanh(a)
            | Exp(a)
            | Ln(a)
            | Log10(a)
            | Sqrt(a)
            | Abs(a)
            | Sign(a)
            | Powi(a, _) => ([a, 0, 0], 1),
            Add(a, b)
            | Sub(a, b)
            | Mul(a, b)
            | Div(a, b)
            | Pow(a, b)
            | Atan2(a, b)
            | Min(a, b)
            | Max(a, b)
            | Hypot(a, b) => ([a, b, 0], 2),
            Clamp(a, b, c) => ([a, b, c], 3),
        }
    }

    /// The same instruction over other argument indices.
    pub(crate) fn with_args(self, n: [u32; 3]) -> Instr {
        use Instr::*;
        let [a, b, c] = n;
        match self {
            Neg(_) => Neg(a),
            Sin(_) => Sin(a),
            Cos(_) => Cos(a),
            Tan(_) => Tan(a),
            Asin(_) => Asin(a),
            Acos(_) => Acos(a),
            Atan(_) => Atan(a),
            Sinh(_) => Sinh(a),
            Cosh(_) => Cosh(a),
            Tanh(_) => Tanh(a),
            Exp(_) => Exp(a),
            Ln(_) => Ln(a),
            Log10(_) => Log10(a),
            Sqrt(_) => Sqrt(a),
            Abs(_) => Abs(a),
            Sign(_) => Sign(a),
            Powi(_, k) => Powi(a, k),
            Add(..) => Add(a, b),
            Sub(..) => Sub(a, b),
            Mul(..) => Mul(a, b),
            Div(..) => Div(a, b),
            Pow(..) => Pow(a, b),
            Atan2(..) => Atan2(a, b),
            Min(..) => Min(a, b),
            Max(..) => Max(a, b),
            Hypot(..) => Hypot(a, b),
            Clamp(..) => Clamp(a, b, c),
        }
    }
}

/// `sign(x)`: -1, 0 or 1, and NaN for NaN. Unlike `f64::signum`, zero maps to zero.
#[inline(always)]
pub(crate) fn sign(x: f64) -> f64 {
    if x > 0.0 {
        1.0
    } else if x < 0.0 {
        -1.0
    } else if x == 0.0 {
        0.0
    } else {
        x
    }
}

/// `min(a, b)` that keeps NaN visible (`f64::min` would hide it); ties pick `a`.
#[inline(always)]
pub(crate) fn min2(a: f64, b: f64) -> f64 {
    if a <= b {
        a
    } else if b < a {
        b
    } else {
        a + b
    }
}

/// `max(a, b)` that keeps NaN visible; ties pick `a`.
#[inline(always)]
pub(crate) fn max2(a: f64, b: f64) -> f64 {
    if a >= b {
        a
    } else if b > a {
        b
    } else {
        a + b
    }
}

/// `clamp(x, lo, hi)` without `f64::clamp`'s panic when `lo > hi` (user input must not
/// panic): below `lo` gives `lo`, else above `hi` gives `hi`, else `x` (NaN stays NaN).
#[inline(always)]
pub(crate) fn clamp3(x: f64, lo: f64, hi: f64) -> f64 {
    if x < lo {
        lo
    } else if x > hi {
        hi
    } else {
        x
    }
}

/// The value of `ins` with its arguments read from `r`.
#[inline(always)]
pub(crate) fn value(ins: Instr, r: &[f64]) -> f64 {
    use Instr::*;
    let g = |i: u32| r[i as usize];
    match ins {
        Neg(a) => -g(a),
        Sin(a) => g(a).sin(),
        Cos(a) => g(a).cos(),
        Tan(a) => g(a).tan(),
        Asin(a) => g(a).asin(),
        Acos(a) => g(a).acos(),
        Atan(a) => g(a).atan(),
        Sinh(a) => g(a).sinh(),
        Cosh(a) => g(a).cosh(),
        Tanh(a) => g(a).tanh(),
        Exp(a) => g(a).exp(),
        Ln(a) => g(a).ln(),
        Log10(a) => g(a).log10(),
        Sqrt(a) => g(a).sqrt(),
        Abs(a) => g(a).abs(),
        Sign(a) => sign(g(a)),
        Powi(a, k) => g(a).powi(k),
        Add(a, b) => g(a) + g(b),
        Sub(a, b) => g(a) - g(b),
        Mul(a, b) => g(a) * g(b),
        Div(a, b) => g(a) / g(b),
        Pow(a, b) => g(a).powf(g(b)),
        Atan2(a, b) => g(a).atan2(g(b)),
        Min(a, b) => min2(g(a), g(b)),
        Max(a, b) => max2(g(a), g(b)),
        Hypot(a, b) => g(a).hypot(g(b)),
        Clamp(a, b, c) => clamp3(g(a), g(b), g(c)),
    }
}

/// Exact local partial derivatives of `ins` with respect to its arguments, given the
/// argument registers `r` and the instruction's own value `v` (reused where it saves
/// work, e.g. `exp' = exp`). Unused entries are 0.
#[inline(always)]
pub(crate) fn partials(ins: Instr, r: &[f64], v: f64) -> [f64; 3] {
    use Instr::*;
    let g = |i: u32| r[i as usize];
    let one = |d: f64| [d, 0.0, 0.0];
    match ins {
        Neg(_) => one(-1.0),
        Sin(a) => one(g(a).cos()),
        Cos(a) => one(-g(a).sin()),
        // tan' = 1 + tan^2 = sec^2 (calculus).
        Tan(_) => one(1.0 + v * v),
        Asin(a) => one(1.0 / (1.0 - g(a) * g(a)).sqrt()),
        Acos(a) => one(-1.0 / (1.0 - g(a) * g(a)).sqrt()),
        Atan(a) => one(1.0 / (1.0 + g(a) * g(a))),
        Sinh(a) => one(g(a).cosh()),
        Cosh(a) => one(g(a).sinh()),
        Tanh(_) => one(1.0 - v * v),
        Exp(_) => one(v),
        Ln(a) => one(1.0 / g(a)),
        Log10(a) => one(1.0 / (g(a) * std::f64::consts::LN_10)),
        // 0.5 / sqrt(0) = +inf: the documented convention; callers check finiteness.
        Sqrt(_) => one(0.5 / v),
        Abs(a) => one(sign(g(a))),
        Sign(_) => one(0.0),
        Powi(a, k) => {
            if k == 0 {
                one(0.0)
            } else {
                one(f64::from(k) * g(a).powi(k - 1))
            }
        }
        Add(..) => [1.0, 1.0, 0.0],
        Sub(..) => [1.0, -1.0, 0.0],
        Mul(a, b) => [g(b), g(a), 0.0],
        // d(a/b)/db = -a/b^2 = -v/b.
        Div(_, b) => [1.0 / g(b), -v / g(b), 0.0],
        Pow(a, b) => {
            let (x, y) = (g(a), g(b));
            let da = y * x.powf(y - 1.0);
            let db = if x > 0.0 { v * x.ln() } else { 0.0 };
            [da, db, 0.0]
        }
        // atan2(y, x): d/dy = x/(x^2+y^2), d/dx = -y/(x^2+y^2).
        Atan2(a, b) => {
            let (y, x) = (g(a), g(b));
            let q = x * x + y * y;
            [x / q, -y / q, 0.0]
        }
        Min(a, b) => {
            if g(a) <= g(b) {
                [1.0, 0.0, 0.0]
            } else {
                [0.0, 1.0, 0.0]
            }
        }
        Max(a, b) => {
            if g(a) >= g(b) {
                [1.0, 0.0, 0.0]
            } else {
                [0.0, 1.0, 0.0]
            }
        }
        Hypot(a, b) => {
            if v == 0.0 {
                [0.0, 0.0, 0.0]
            } else {
                [g(a) / v, g(b) / v, 0.0]
            }
        }
        Clamp(a, b, c) => {
            let (x, lo, hi) = (g(a), g(b), g(c));
            if x < lo {
                [0.0, 1.0, 0.0]
            } else if x > hi {
                [0.0, 0.0, 1.0]
            } else {
                [1.0, 0.0, 0.0]
            }
        }
    }
}

/// A built-in function: its name, its argument count, and its instruction over
/// argument indices.
pub(crate) struct Function {
    pub(crate) name: &'static str,
    pub(crate) arity: usize,
    pub(crate) make: fn([u32; 3]) -> Instr,
}

/// Every built-in function, in the order error messages list them.
pub(crate) const FUNCTIONS: &[Function] = &[
    Function {
        name: "sin",
        arity: 1,
        make: |a| Instr::Sin(a[0]),
    },
    Function {
        name: "cos",
        arity: 1,
        make: |a| Instr::Cos(a[0]),
    },
    Function {
        name: "tan",
        arity: 1,
        make: |a| Instr::Tan(a[0]),
    },
    Function {
        name: "asin",
        arity: 1,
        make: |a| Instr::Asin(a[0]),
    },
    Function {
        name: "acos",
        arity: 1,
        make: |a| Instr::Acos(a[0]),
    },
    Function {
        name: "atan",
        arity: 1,
        make: |a| Instr::Atan(a[0]),
    },
    Function {
        name: "atan2",
        arity: 2,
        make: |a| Instr::Atan2(a[0], a[1]),
    },
    Function {
        name: "sinh",
        arity: 1,
        make: |a| Instr::Sinh(a[0]),
    },
    Function {
        name: "cosh",
        arity: 1,
        make: |a| Instr::Cosh(a[0]),
    },
    Function {
        name: "tanh",
        arity: 1,
        make: |a| Instr::Tanh(a[0]),
    },
    Function {
        name: "exp",
        arity: 1,
        make: |a| Instr::Exp(a[0]),
    },
    Function {
        name: "ln",
        arity: 1,
        make: |a| Instr::Ln(a[0]),
    },
    Function {
        name: "log10",
        arity: 1,
        make: |a| Instr::Log10(a[0]),
    },
    Function {
        name: "sqrt",
        arity: 1,
        make: |a| Instr::Sqrt(a[0]),
    },
    Function {
        name: "abs",
        arity: 1,
        make: |a| Instr::Abs(a[0]),
    },
    Function {
        name: "sign",
        arity: 1,
        make: |a| Instr::Sign(a[0]),
    },
    Function {
        name: "min",
        arity: 2,
        make: |a| Instr::Min(a[0], a[1]),
    },
    Function {
        name: "max",
        arity: 2,
        make: |a| Instr::Max(a[0], a[1]),
    },
    Function {
        name: "pow",
        arity: 2,
        make: |a| Instr::Pow(a[0], a[1]),
    },
    Function {
        name: "hypot",
        arity: 2,
        make: |a| Instr::Hypot(a[0], a[1]),
    },
    Function {
        name: "clamp",
        arity: 3,
        make: |a| Instr::Clamp(a[0], a[1], a[2]),
    },
];

/// The built-in function called `name`, if any.
pub(crate) fn function(name: &str) -> Option<&'static Function> {
    FUNCTIONS.iter().find(|f| f.name == name)
}
