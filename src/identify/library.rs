//! The library of candidate terms: monomials of the states and inputs up to a degree
//! (`1`, `a`, `a*b`, `a^2`, ...) and user terms written in the formula language, each
//! evaluated once at every sample into a column (term-major, `terms × samples`).

use super::{IdentifyError, Series};
use crate::formula::Program;
use crate::model::Stop;

/// One candidate term.
#[derive(Debug, Clone)]
pub enum Term {
    /// A monomial: the power of each slot (states, then inputs).
    Monomial(Vec<u32>),
    /// Output `k` of the user terms' compiled program.
    Formula(usize),
}

/// Candidate terms with their names, and the program of the user terms.
#[derive(Debug, Clone, Default)]
pub struct Library {
    /// Canonical name of each term (`a*b^2`, or the user's text).
    pub names: Vec<String>,
    /// What each term computes.
    pub terms: Vec<Term>,
    /// User terms over the slots (states, then inputs), one output each.
    pub program: Option<Program>,
}

/// Every exponent vector over `vars` slots of total degree `d`, in lexicographic order
/// (higher powers of earlier slots first).
fn exponents(vars: usize, d: u32, out: &mut Vec<Vec<u32>>) {
    fn rec(i: usize, left: u32, cur: &mut Vec<u32>, out: &mut Vec<Vec<u32>>) {
        if i + 1 == cur.len() {
            cur[i] = left;
            out.push(cur.clone());
            return;
        }
        for p in (0..=left).rev() {
            cur[i] = p;
            rec(i + 1, left - p, cur, out);
        }
    }
    if vars == 0 {
        if d == 0 {
            out.push(Vec::new());
        }
        return;
    }
    rec(0, d, &mut vec![0; vars], out);
}

/// The canonical name of a monomial: `1`, `a`, `a*b^2`.
pub fn monomial_name(exps: &[u32], names: &[&str]) -> String {
    let parts: Vec<String> = exps
        .iter()
        .zip(names)
        .filter(|(&p, _)| p > 0)
        .map(|(&p, n)| {
            if p == 1 {
                n.to_string()
            } else {
                format!("{n}^{p}")
            }
        })
        .collect();
    if parts.is_empty() {
        "1".to_string()
    } else {
        parts.join("*")
    }
}

/// Number of monomials of degree `min..=max` in `vars` slots (for limits, before building).
pub fn monomial_count(vars: usize, min: u32, max: u32) -> usize {
    // C(vars + d - 1, d) monomials of degree exactly d.
    let exact = |d: u32| -> usize {
        let mut c: u128 = 1;
        for i in 0..d as u128 {
            c = c * (vars as u128 + i) / (i + 1);
        }
        usize::try_from(c).unwrap_or(usize::MAX)
    };
    (min..=max).fold(0usize, |a, d| a.saturating_add(exact(d)))
}

impl Library {
    /// Monomials of degree `min..=max` over `slot_names` (states then inputs), then the
    /// user terms of `program` named by `user`.
    pub fn new(
        slot_names: &[&str],
        min: u32,
        max: u32,
        program: Option<Program>,
        user: &[String],
    ) -> Self {
        let mut exps = Vec::new();
        for d in min..=max {
            exponents(slot_names.len(), d, &mut exps);
        }
        let mut names: Vec<String> = exps.iter().map(|e| monomial_name(e, slot_names)).collect();
        let mut terms: Vec<Term> = exps.into_iter().map(Term::Monomial).collect();
        for (k, u) in user.iter().enumerate() {
            names.push(u.clone());
            terms.push(Term::Formula(k));
        }
        Self {
            names,
            terms,
            program,
        }
    }

    /// Number of terms.
    pub fn len(&self) -> usize {
        self.terms.len()
    }

    /// True when the library has no term.
    pub fn is_empty(&self) -> bool {
        self.terms.is_empty()
    }

    /// Every term at every sample: term `j` of sample `i` at `j * m + i`. A value that is
    /// not finite is refused, naming the term and the sample.
    pub fn columns(&self, series: &Series, stop: &Stop) -> Result<Vec<f64>, IdentifyError> {
        let m = series.len();
        let mut out = vec![0.0; self.len() * m];
        for (j, term) in self.terms.iter().enumerate() {
            halt(stop)?;
            let col = &mut out[j * m..(j + 1) * m];
            if let Term::Monomial(exps) = term {
                col.fill(1.0);
                for (s, &p) in exps.iter().enumerate() {
                    let x = series.slot(s);
                    for _ in 0..p {
                        for (c, &v) in col.iter_mut().zip(x) {
                            *c *= v;
                        }
                    }
                }
            }
        }
        if let Some(prog) = &self.program {
            let first = self
                .terms
                .iter()
                .position(|t| matches!(t, Term::Formula(_)))
                .unwrap_or(self.len());
            evaluate(prog, series, stop, &mut out[first * m..])?;
        }
        for (j, name) in self.names.iter().enumerate() {
            if let Some(i) = out[j * m..(j + 1) * m].iter().position(|v| !v.is_finite()) {
                return Err(IdentifyError::NotFinite {
                    what: name.clone(),
                    sample: i,
                });
            }
        }
        Ok(out)
    }
}

/// Samples evaluated per batch of the formula tape.
const BATCH: usize = 512;

/// Evaluate every output of `prog` (over the series' slots) at every sample, output `k`
/// of sample `i` into `out[k * m + i]`; batches of 512 samples (`BATCH`), `stop` between them.
pub fn evaluate(
    prog: &Program,
    series: &Series,
    stop: &Stop,
    out: &mut [f64],
) -> Result<(), IdentifyError> {
    let m = series.len();
    let slots = series.states + series.inputs;
    let mut ws = prog.batch_workspace(BATCH);
    let mut vars = vec![0.0; prog.slots() * BATCH];
    let mut res = vec![0.0; prog.outputs() * BATCH];
    let mut start = 0;
    while start < m {
        halt(stop)?;
        let b = BATCH.min(m - start);
        for s in 0..prog.slots().min(slots) {
            vars[s * b..(s + 1) * b].copy_from_slice(&series.slot(s)[start..start + b]);
        }
        prog.eval_batch(
            &vars[..prog.slots() * b],
            b,
            &mut ws,
            &mut res[..prog.outputs() * b],
        );
        for k in 0..prog.outputs() {
            out[k * m + start..k * m + start + b].copy_from_slice(&res[k * b..(k + 1) * b]);
        }
        start += b;
    }
    Ok(())
}

/// Err when the request's stop has fired.
pub(super) fn halt(stop: &Stop) -> Result<(), IdentifyError> {
    match stop.halted() {
        None => Ok(()),
        Some(h) => Err(IdentifyError::Stopped(h)),
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn three_slots_to_degree_three_make_twenty_terms() {
        // C(3 + 3, 3) = 20 monomials of degree 0..=3 in 3 variables (common practice).
        let lib = Library::new(&["x", "y", "z"], 0, 3, None, &[]);
        assert_eq!(lib.len(), 20);
        assert_eq!(monomial_count(3, 0, 3), 20);
        assert_eq!(lib.names[0], "1");
        assert!(lib.names.contains(&"x*y*z".to_string()));
        assert!(lib.names.contains(&"x^2*z".to_string()));
    }

    #[test]
    fn monomial_columns_are_products_of_the_slots() {
        let series = Series {
            t: vec![0.0, 1.0],
            values: vec![2.0, 3.0, 5.0, 7.0],
            states: 2,
            inputs: 0,
        };
        let lib = Library::new(&["a", "b"], 2, 2, None, &[]);
        let cols = lib.columns(&series, &Stop::never()).unwrap();
        // a^2, a*b, b^2 at (2, 5) and (3, 7).
        assert_eq!(lib.names, ["a^2", "a*b", "b^2"]);
        assert_eq!(cols, [4.0, 9.0, 10.0, 21.0, 25.0, 49.0]);
    }
}
