//! State families (issue 13): one formula serves every element `i` of a family, with
//! neighbour references `x[i+1]`, `x[i-2]` to its own or another family of the same size.
//!
//! The formula is compiled once into a *kernel*: an ordinary [`Program`] whose slots are
//! the distinct neighbour loads (family, offset relative to `i`), then per-element
//! parameter arrays, then `t`. Evaluating the family gathers, for a block of elements at a
//! time, each load's values (a contiguous copy away from the ends; the boundary rule near
//! them: periodic wrap or a fixed constant) and runs the tape once per block through
//! [`Program::eval_batch`], so the cost of interpreting an instruction is paid once per
//! block, never per element. Each element's value is bit for bit what the same formula
//! written for that one element as a plain state would give (same instructions, same
//! operands). Exact derivatives come from [`Program::eval_jacobian`] on the kernel: the
//! partial of element `i`'s output with respect to load `(f, k)` is the Jacobian entry at
//! column `f[i+k]` (the Jacobian is banded; a fixed boundary's constant has none).
//!
//! Text: `name[i]`, `name[i+K]` and `name[i-K]` (spaces allowed inside the brackets) are
//! rewritten before lexing to internal slot names of no greater length padded with
//! spaces, so error columns still point into the text as written.

use super::error::{Fault, FormulaError};
use super::eval::{BatchWorkspace, Workspace};
use super::program::{FormulaLimits, Program, Source};

/// Elements per block of a batch evaluation.
const BLOCK: usize = 256;

/// What an element outside `0..size` reads.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum Boundary {
    /// Index taken modulo the size (a ring).
    Periodic,
    /// Out-of-range elements read this constant.
    Fixed(f64),
}

/// One family: its name, number of elements and boundary rule.
#[derive(Debug, Clone, PartialEq)]
pub struct FamilyShape {
    /// Name used in formulas (`x` in `x[i+1]`).
    pub name: String,
    /// Number of elements.
    pub size: usize,
    /// What neighbours past the ends read.
    pub boundary: Boundary,
}

/// The families of a model, laid out one after another in the state vector.
#[derive(Debug, Clone)]
pub struct FamilySet {
    /// The families in order.
    pub shapes: Vec<FamilyShape>,
    /// Index in the state vector of each family's element 0.
    pub starts: Vec<usize>,
}

impl FamilySet {
    /// Lay out `shapes` one after another.
    pub fn new(shapes: Vec<FamilyShape>) -> FamilySet {
        let mut starts = Vec::with_capacity(shapes.len());
        let mut at = 0;
        for s in &shapes {
            starts.push(at);
            at += s.size;
        }
        FamilySet { shapes, starts }
    }

    /// Total number of states.
    pub fn n(&self) -> usize {
        self.shapes.iter().map(|s| s.size).sum()
    }

    /// Index of family `name`.
    pub fn index(&self, name: &str) -> Option<usize> {
        self.shapes.iter().position(|s| s.name == name)
    }

    /// The state-vector index that element `i + offset` of family `f` reads, or `None`
    /// where a fixed boundary supplies its constant.
    pub fn column(&self, f: usize, i: usize, offset: i64) -> Option<usize> {
        let s = &self.shapes[f];
        let j = i as i64 + offset;
        let size = s.size as i64;
        if (0..size).contains(&j) {
            return Some(self.starts[f] + j as usize);
        }
        match s.boundary {
            Boundary::Periodic => Some(self.starts[f] + j.rem_euclid(size) as usize),
            Boundary::Fixed(_) => None,
        }
    }

    /// The value element `i + offset` of family `f` reads from the state vector `x`.
    #[inline]
    fn load(&self, x: &[f64], f: usize, i: usize, offset: i64) -> f64 {
        match (self.column(f, i, offset), self.shapes[f].boundary) {
            (Some(c), _) => x[c],
            (None, Boundary::Fixed(v)) => v,
            // `column` always wraps a periodic index.
            (None, Boundary::Periodic) => f64::NAN,
        }
    }
}

/// One neighbour load of a kernel: which family, at which offset from `i`.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Load {
    /// Family index in the [`FamilySet`].
    pub family: usize,
    /// Offset relative to the element index.
    pub offset: i64,
}

/// A family formula compiled once (see the module doc).
#[derive(Debug, Clone)]
pub struct FamilyKernel {
    program: Program,
    loads: Vec<Load>,
    arrays: usize,
    size: usize,
}

/// Scratch space for [`FamilyKernel::eval_all`] and [`FamilyKernel::partials`].
#[derive(Debug, Clone)]
pub struct FamilyWorkspace {
    batch: BatchWorkspace,
    vars: Vec<f64>,
    out: Vec<f64>,
    point: Workspace,
    point_vars: Vec<f64>,
}

impl FamilyKernel {
    /// Compile `src`, the formula of a family of `size` elements, against the families
    /// of `set` (every family it names must have the same size), the per-element
    /// parameter arrays named in `arrays`, shared `constants` and the slot `t`.
    pub fn compile(
        src: &Source<'_>,
        size: usize,
        set: &FamilySet,
        arrays: &[&str],
        constants: &[(&str, f64)],
        limits: &FormulaLimits,
    ) -> Result<FamilyKernel, Vec<FormulaError>> {
        let (text, loads) =
            rewrite(src.text, set, size, arrays).map_err(|f| vec![f.with_pointer(&src.pointer)])?;
        let names: Vec<String> = loads.iter().map(|l| slot_name(set, *l)).collect();
        let mut slots: Vec<&str> = names.iter().map(String::as_str).collect();
        slots.extend_from_slice(arrays);
        slots.push("t");
        let program = Program::compile(
            &[Source {
                text: &text,
                pointer: src.pointer.clone(),
            }],
            &slots,
            constants,
            limits,
        )?;
        Ok(FamilyKernel {
            program,
            loads,
            arrays: arrays.len(),
            size,
        })
    }

    /// The neighbour loads, in slot order.
    pub fn loads(&self) -> &[Load] {
        &self.loads
    }

    /// The compiled kernel (one output; slots: loads, arrays, `t`).
    pub fn program(&self) -> &Program {
        &self.program
    }

    /// Scratch space for this kernel.
    pub fn workspace(&self) -> FamilyWorkspace {
        let slots = self.program.slots();
        FamilyWorkspace {
            batch: self.program.batch_workspace(BLOCK),
            vars: vec![0.0; slots * BLOCK],
            out: vec![0.0; BLOCK],
            point: self.program.workspace(),
            point_vars: vec![0.0; slots + self.loads.len() * slots],
        }
    }

    /// The kernel at every element: `out[i]` for `i` in `0..size`, reading the state
    /// vector `x` laid out by `set`, `arrays[p][i]` for the per-element parameters and
    /// time `t`. Allocates nothing; bit for bit the plain formula at each element.
    pub fn eval_all(
        &self,
        x: &[f64],
        set: &FamilySet,
        arrays: &[&[f64]],
        t: f64,
        ws: &mut FamilyWorkspace,
        out: &mut [f64],
    ) {
        let nl = self.loads.len();
        let mut a = 0;
        while a < self.size {
            let m = BLOCK.min(self.size - a);
            for (s, load) in self.loads.iter().enumerate() {
                let dst = &mut ws.vars[s * m..(s + 1) * m];
                let lo = a as i64 + load.offset;
                let size = set.shapes[load.family].size as i64;
                if lo >= 0 && lo + m as i64 <= size {
                    let at = set.starts[load.family] + lo as usize;
                    dst.copy_from_slice(&x[at..at + m]);
                } else {
                    for (j, d) in dst.iter_mut().enumerate() {
                        *d = set.load(x, load.family, a + j, load.offset);
                    }
                }
            }
            for (p, arr) in arrays.iter().enumerate().take(self.arrays) {
                ws.vars[(nl + p) * m..(nl + p + 1) * m].copy_from_slice(&arr[a..a + m]);
            }
            let ts = nl + self.arrays;
            ws.vars[ts * m..(ts + 1) * m].fill(t);
            let slots = self.program.slots();
            self.program
                .eval_batch(&ws.vars[..slots * m], m, &mut ws.batch, &mut ws.out);
            out[a..a + m].copy_from_slice(&ws.out[..m]);
            a += m;
        }
    }

    /// Exact partial derivatives of element `i`'s output with respect to each load
    /// (`partials[s]` for load `s`, whose state-vector column is
    /// `set.column(load.family, i, load.offset)`) at time `t`; returns the value.
    pub fn partials(
        &self,
        x: &[f64],
        set: &FamilySet,
        arrays: &[&[f64]],
        (i, t): (usize, f64),
        ws: &mut FamilyWorkspace,
        partials: &mut [f64],
    ) -> f64 {
        let nl = self.loads.len();
        let slots = self.program.slots();
        let (vars, jac) = ws.point_vars.split_at_mut(slots);
        for (s, load) in self.loads.iter().enumerate() {
            vars[s] = set.load(x, load.family, i, load.offset);
        }
        for (p, arr) in arrays.iter().enumerate().take(self.arrays) {
            vars[nl + p] = arr[i];
        }
        vars[slots - 1] = t;
        let mut value = [0.0];
        self.program
            .eval_jacobian(vars, nl, &mut ws.point, &mut value, &mut jac[..nl]);
        partials[..nl].copy_from_slice(&jac[..nl]);
        value[0]
    }
}

/// The formula `text` of a family of `size` elements written out for one `element` as a
/// plain formula: each `name[i±K]` becomes `state(column)` (the state-vector index it
/// reads, wrapped on a periodic family) or the fixed boundary's constant in parentheses,
/// and each `a[i]` of a parameter array becomes that element's value in parentheses
/// (shortest round-trip form, so the same number). Used to lower a family model of a few
/// hundred states into the plain model the Gaussian filters run on. `None` where the text
/// does not compile as a family formula ([`FamilyKernel::compile`] reports why).
pub fn element_text(
    text: &str,
    set: &FamilySet,
    size: usize,
    arrays: &[(&str, &[f64])],
    element: usize,
    state: &dyn Fn(usize) -> String,
) -> Option<String> {
    let names: Vec<&str> = arrays.iter().map(|a| a.0).collect();
    let (slotted, loads) = rewrite(text, set, size, &names).ok()?;
    let slots: Vec<String> = loads.iter().map(|l| slot_name(set, *l)).collect();
    let mut out = String::with_capacity(slotted.len() + 16);
    let chars: Vec<char> = slotted.chars().collect();
    let mut k = 0;
    while k < chars.len() {
        let c = chars[k];
        if !(c.is_alphabetic() || c == '_') {
            if !c.is_whitespace() || !out.ends_with(' ') {
                out.push(c);
            }
            k += 1;
            continue;
        }
        let start = k;
        while k < chars.len() && (chars[k].is_alphanumeric() || chars[k] == '_') {
            k += 1;
        }
        let word: String = chars[start..k].iter().collect();
        if let Some(s) = slots.iter().position(|n| *n == word) {
            let l = loads[s];
            match set.column(l.family, element, l.offset) {
                Some(col) => out.push_str(&state(col)),
                None => match set.shapes[l.family].boundary {
                    Boundary::Fixed(v) => out.push_str(&format!("({v:?})")),
                    Boundary::Periodic => return None,
                },
            }
        } else if let Some(a) = arrays.iter().find(|a| a.0 == word) {
            out.push_str(&format!("({:?})", a.1[element]));
        } else {
            out.push_str(&word);
        }
    }
    Some(out)
}

/// The internal slot name of a load (what `rewrite` writes into the text).
fn slot_name(set: &FamilySet, l: Load) -> String {
    let name = &set.shapes[l.family].name;
    match l.offset {
        0 => format!("{name}__0"),
        k if k > 0 => format!("{name}__p{k}"),
        k => format!("{name}__m{}", -k),
    }
}

/// Replace every `name[i±K]` of a family `name` by its slot name padded with spaces to
/// the same length, and every `a[i]` of a parameter array `a` by `a`; returns the text
/// and the distinct loads in order of appearance.
fn rewrite(
    text: &str,
    set: &FamilySet,
    size: usize,
    arrays: &[&str],
) -> Result<(String, Vec<Load>), Fault> {
    let chars: Vec<char> = text.chars().collect();
    let is_start = |c: char| c.is_alphabetic() || c == '_';
    let is_name = |c: char| c.is_alphabetic() || c.is_ascii_digit() || c == '_';
    let mut out = String::with_capacity(text.len());
    let mut loads: Vec<Load> = Vec::new();
    let mut i = 0;
    while i < chars.len() {
        let c = chars[i];
        if !is_start(c) {
            if c == '[' {
                return Err(Fault::new(
                    i + 1,
                    "'[' follows only a family name, as in x[i+1]".to_string(),
                ));
            }
            out.push(c);
            i += 1;
            continue;
        }
        let start = i;
        while i < chars.len() && is_name(chars[i]) {
            i += 1;
        }
        let word: String = chars[start..i].iter().collect();
        let family = set.index(&word);
        if i >= chars.len() || chars[i] != '[' {
            out.push_str(&word);
            continue;
        }
        let open = i;
        let Some(close) = chars[open..].iter().position(|&c| c == ']') else {
            return Err(Fault::new(open + 1, "'[' without its ']'".to_string()));
        };
        let close = open + close;
        let inner: String = chars[open + 1..close]
            .iter()
            .filter(|c| !c.is_whitespace())
            .collect();
        if family.is_none() && arrays.contains(&word.as_str()) {
            if inner != "i" {
                return Err(Fault::new(
                    open + 2,
                    format!("a parameter array is read at the element's own index, {word}[i]"),
                ));
            }
            out.push_str(&word);
            for _ in word.chars().count()..close + 1 - start {
                out.push(' ');
            }
            i = close + 1;
            continue;
        }
        let Some(family) = family else {
            return Err(Fault::new(
                start + 1,
                format!("'{word}' is not a state family, so it cannot be indexed"),
            ));
        };
        if set.shapes[family].size != size {
            return Err(Fault::new(
                start + 1,
                format!(
                    "family '{word}' has {} elements and this one {size}; a formula reads families of its own size only",
                    set.shapes[family].size
                ),
            ));
        }
        let offset = parse_index(&inner, size).ok_or_else(|| {
            Fault::new(
                open + 2,
                format!("an element is written {word}[i], {word}[i+k] or {word}[i-k] with a whole k below the family's size {size}"),
            )
        })?;
        let load = Load { family, offset };
        if !loads.contains(&load) {
            loads.push(load);
        }
        let name = slot_name(set, load);
        out.push_str(&name);
        // `name[...]` spans word + brackets; the slot name is never longer.
        let span = close + 1 - start;
        for _ in name.chars().count()..span {
            out.push(' ');
        }
        i = close + 1;
    }
    Ok((out, loads))
}

/// `i`, `i+K` or `i-K` with `K < size` as an offset.
fn parse_index(inner: &str, size: usize) -> Option<i64> {
    let rest = inner.strip_prefix('i')?;
    if rest.is_empty() {
        return Some(0);
    }
    let (sign, digits) = match rest.as_bytes()[0] {
        b'+' => (1, &rest[1..]),
        b'-' => (-1, &rest[1..]),
        _ => return None,
    };
    if digits.is_empty() || !digits.bytes().all(|b| b.is_ascii_digit()) || digits.len() > 12 {
        return None;
    }
    let k: u64 = digits.parse().ok()?;
    (k < size as u64).then_some(sign * k as i64)
}

#[cfg(test)]
mod tests {
    use super::*;

    fn limits() -> FormulaLimits {
        FormulaLimits {
            max_len: 10_000,
            max_depth: 64,
        }
    }

    const L96: &str = "(x[i+1] - x[ i-2 ])*x[i-1] - x[i] + F";

    fn ring(n: usize) -> FamilySet {
        FamilySet::new(vec![FamilyShape {
            name: "x".into(),
            size: n,
            boundary: Boundary::Periodic,
        }])
    }

    fn kernel(set: &FamilySet, text: &str) -> FamilyKernel {
        let src = Source {
            text,
            pointer: "/model/families/x/rate".into(),
        };
        FamilyKernel::compile(&src, set.n(), set, &[], &[("F", 8.0)], &limits()).unwrap()
    }

    /// The same model written state by state: `x0 .. x{n-1}` with the indices wrapped.
    fn plain(n: usize) -> (Program, Vec<String>) {
        let names: Vec<String> = (0..n).map(|i| format!("x{i}")).collect();
        let w = |i: i64| format!("x{}", i.rem_euclid(n as i64));
        let texts: Vec<String> = (0..n as i64)
            .map(|i| format!("({} - {})*{} - {} + F", w(i + 1), w(i - 2), w(i - 1), w(i)))
            .collect();
        let sources: Vec<Source<'_>> = texts
            .iter()
            .map(|t| Source {
                text: t,
                pointer: String::new(),
            })
            .collect();
        let slots: Vec<&str> = names.iter().map(String::as_str).collect();
        let p = Program::compile(&sources, &slots, &[("F", 8.0)], &limits()).unwrap();
        (p, names)
    }

    fn state(n: usize) -> Vec<f64> {
        (0..n).map(|i| 8.0 + (i as f64 * 0.7).sin() * 3.1).collect()
    }

    // The equivalence the issue asks for (issue 13): a family is the same model as its
    // elements written out as plain states, value and exact derivative (common practice:
    // the same instructions on the same operands give the same bits).
    #[test]
    fn a_family_of_200_gives_the_plain_models_rates_and_jacobian() {
        let n = 200;
        let set = ring(n);
        let k = kernel(&set, L96);
        assert_eq!(k.loads().len(), 4);
        let x = state(n);
        let mut ws = k.workspace();
        let mut fam = vec![0.0; n];
        k.eval_all(&x, &set, &[], 0.0, &mut ws, &mut fam);
        let (p, _) = plain(n);
        let mut pws = p.workspace();
        let (mut out, mut jac) = (vec![0.0; n], vec![0.0; n * n]);
        p.eval_jacobian(&x, n, &mut pws, &mut out, &mut jac);
        let mut partials = vec![0.0; 4];
        for i in 0..n {
            assert_eq!(fam[i].to_bits(), out[i].to_bits(), "rate {i}");
            let v = k.partials(&x, &set, &[], (i, 0.0), &mut ws, &mut partials);
            assert_eq!(v.to_bits(), out[i].to_bits());
            let mut row = vec![0.0; n];
            for (s, l) in k.loads().iter().enumerate() {
                row[set.column(l.family, i, l.offset).unwrap()] += partials[s];
            }
            for j in 0..n {
                assert!((row[j] - jac[i * n + j]).abs() <= 1e-12, "d{i}/d{j}");
            }
        }
    }

    #[test]
    fn a_family_of_one_element_is_the_plain_state() {
        let set = FamilySet::new(vec![FamilyShape {
            name: "h".into(),
            size: 1,
            boundary: Boundary::Periodic,
        }]);
        let src = Source {
            text: "-k*h[i] + 2*sin(t)",
            pointer: String::new(),
        };
        let k = FamilyKernel::compile(&src, 1, &set, &[], &[("k", 0.3)], &limits()).unwrap();
        let p = Program::compile(
            &[Source {
                text: "-k*h + 2*sin(t)",
                pointer: String::new(),
            }],
            &["h", "t"],
            &[("k", 0.3)],
            &limits(),
        )
        .unwrap();
        let mut ws = k.workspace();
        let mut out = [0.0];
        k.eval_all(&[1.7], &set, &[], 0.4, &mut ws, &mut out);
        let mut plain = [0.0];
        p.eval(&[1.7, 0.4], &mut p.workspace(), &mut plain);
        assert_eq!(out[0].to_bits(), plain[0].to_bits());
    }

    #[test]
    fn a_fixed_boundary_reads_its_constant_and_has_no_derivative_there() {
        let set = FamilySet::new(vec![FamilyShape {
            name: "T".into(),
            size: 5,
            boundary: Boundary::Fixed(20.0),
        }]);
        let src = Source {
            text: "a[i]*(T[i-1] - 2*T[i] + T[i+1])",
            pointer: String::new(),
        };
        let k = FamilyKernel::compile(&src, 5, &set, &["a"], &[], &limits()).unwrap();
        let x = [30.0, 31.0, 33.0, 36.0, 40.0];
        let a = [1.0, 2.0, 3.0, 4.0, 5.0];
        let mut ws = k.workspace();
        let mut out = [0.0; 5];
        k.eval_all(&x, &set, &[&a], 0.0, &mut ws, &mut out);
        // Second differences by hand, the ends reading 20 (common practice).
        assert_eq!(out, [-9.0, 2.0, 3.0, 4.0, -120.0]);
        assert_eq!(set.column(0, 4, 1), None);
        assert_eq!(set.column(0, 0, -1), None);
    }

    #[test]
    fn bad_indices_are_refused_at_their_column() {
        let set = ring(10);
        for (text, col) in [
            ("x[j+1]", 3),
            ("x[i+10]", 3),
            ("y[i]", 1),
            ("x[i+1", 2),
            ("y[i", 2),
            ("2*[i]", 3),
        ] {
            let src = Source {
                text,
                pointer: "/p".into(),
            };
            let e = FamilyKernel::compile(&src, 10, &set, &[], &[], &limits()).unwrap_err();
            assert_eq!(e[0].column, col, "{text}: {}", e[0].message);
            assert_eq!(e[0].pointer, "/p");
        }
        // A later error keeps its column in the text as written.
        let src = Source {
            text: "x[i + 1] + q",
            pointer: "/p".into(),
        };
        let e = FamilyKernel::compile(&src, 10, &set, &[], &[], &limits()).unwrap_err();
        assert_eq!(e[0].column, 12);
    }
}
