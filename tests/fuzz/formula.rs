//! The formula compiler under mutated formulas: `Program::compile` never panics, an error
//! carries the formula's pointer and a column inside the text (or one past its end), and
//! a compiled program evaluates, with its Jacobian, without panicking.

use super::{config, corpus};
use proptest::prelude::*;
use std::sync::atomic::{AtomicU64, Ordering};
use tacit::formula::{is_function_name, FormulaLimits, Program, Source};

/// Pieces a mutation inserts: operators, every function, odd numbers, stray characters.
const TOKENS: &[&str] = &[
    "+",
    "-",
    "*",
    "/",
    "^",
    "(",
    ")",
    ",",
    ".",
    "e",
    "E",
    "1e309",
    "-1e309",
    "1e-320",
    "0",
    "0.5",
    "2",
    "1e",
    ".e1",
    "1..2",
    "9999999999999999999999",
    "sin(",
    "cos(",
    "tan(",
    "asin(",
    "acos(",
    "atan(",
    "atan2(",
    "sinh(",
    "cosh(",
    "tanh(",
    "exp(",
    "ln(",
    "log10(",
    "sqrt(",
    "abs(",
    "sign(",
    "min(",
    "max(",
    "pow(",
    "hypot(",
    "clamp(",
    "pi",
    "e",
    "x",
    "_",
    "é",
    "∞",
    "\u{0}",
    "\n",
    " ",
    "\t",
    "#",
    "$",
    "==",
    "**",
    "--",
    "- -",
    "((",
    "))",
    "nan",
    "inf",
];

/// One edit of a formula; the numbers pick positions and tokens (taken modulo sizes).
#[derive(Debug, Clone)]
enum Edit {
    Insert(u32, u32),
    Delete(u32, u32),
    Duplicate(u32, u32),
    Splice(u32, u32),
    Nest(u32, u8),
}

fn edit() -> impl Strategy<Value = Edit> {
    prop_oneof![
        (any::<u32>(), any::<u32>()).prop_map(|(a, b)| Edit::Insert(a, b)),
        (any::<u32>(), 1u32..8).prop_map(|(a, b)| Edit::Delete(a, b)),
        (any::<u32>(), any::<u32>()).prop_map(|(a, b)| Edit::Duplicate(a, b)),
        (any::<u32>(), any::<u32>()).prop_map(|(a, b)| Edit::Splice(a, b)),
        (any::<u32>(), 1u8..80).prop_map(|(a, b)| Edit::Nest(a, b)),
    ]
}

/// Char boundary at `a` modulo the text's length + 1.
fn at(s: &str, a: u32) -> usize {
    let bounds: Vec<usize> = s.char_indices().map(|(i, _)| i).chain([s.len()]).collect();
    bounds[a as usize % bounds.len()]
}

fn apply(text: &mut String, e: &Edit, seeds: &[String]) {
    match *e {
        Edit::Insert(a, b) => {
            let p = at(text, a);
            text.insert_str(p, TOKENS[b as usize % TOKENS.len()]);
        }
        Edit::Delete(a, n) => {
            let p = at(text, a);
            let q = text[p..]
                .char_indices()
                .nth(n as usize)
                .map_or(text.len(), |(i, _)| p + i);
            text.replace_range(p..q, "");
        }
        Edit::Duplicate(a, b) => {
            let (p, q) = (at(text, a), at(text, b));
            let piece = text[p.min(q)..p.max(q)].to_string();
            text.insert_str(p.max(q), &piece);
        }
        Edit::Splice(a, b) => {
            let other = &seeds[b as usize % seeds.len()];
            let p = at(text, a);
            text.insert_str(p, &format!("*({other})"));
        }
        Edit::Nest(a, depth) => {
            let f = ["-", "sqrt(", "(", "abs(", "2^"][a as usize % 5];
            let close = if f.ends_with('(') { ")" } else { "" };
            let mut s = String::new();
            for _ in 0..depth {
                s.push_str(f);
            }
            s.push_str(text);
            for _ in 0..depth {
                s.push_str(close);
            }
            *text = s;
        }
    }
}

/// The names the seed formulas read (every identifier that is not a function), as slots.
fn slot_names(seeds: &[String]) -> Vec<String> {
    let mut names: Vec<String> = Vec::new();
    for s in seeds {
        for w in s.split(|c: char| !(c.is_ascii_alphanumeric() || c == '_')) {
            let first = w.chars().next();
            if first.is_some_and(|c| c.is_ascii_alphabetic() || c == '_')
                && !is_function_name(w)
                && w != "pi"
                && w != "e"
                && !names.iter().any(|n| n == w)
            {
                names.push(w.to_string());
            }
        }
    }
    names
}

static CASES: AtomicU64 = AtomicU64::new(0);
static COMPILED: AtomicU64 = AtomicU64::new(0);

proptest! {
    #![proptest_config(config())]

    #[test]
    fn mutated_formulas_compile_or_fail_with_pointer_and_column(
        seed in any::<u32>(),
        edits in prop::collection::vec(edit(), 0..6),
        vars in prop::collection::vec(prop_oneof![Just(0.0), Just(-1.0), Just(1e308), -1e3f64..1e3], 64),
    ) {
        let seeds: Vec<String> = corpus("formula").into_iter().map(|(_, t)| t.trim().to_string()).collect();
        let names = slot_names(&seeds);
        let slots: Vec<&str> = names.iter().map(String::as_str).collect();
        let mut text = seeds[seed as usize % seeds.len()].clone();
        for e in &edits {
            apply(&mut text, e, &seeds);
        }
        let limits = FormulaLimits { max_len: 4096, max_depth: 64 };
        let sources = [
            Source { text: &text, pointer: "/model/dynamics/rates/a".into() },
            Source { text: "1", pointer: "/model/dynamics/rates/b".into() },
        ];
        let n = CASES.fetch_add(1, Ordering::Relaxed) + 1;
        if n % 10_000 == 0 {
            eprintln!("formula fuzz: {n} cases, {} compiled", COMPILED.load(Ordering::Relaxed));
        }
        match Program::compile(&sources, &slots, &[("k", 2.5)], &limits) {
            Ok(p) => {
                COMPILED.fetch_add(1, Ordering::Relaxed);
                prop_assert_eq!(p.outputs(), 2);
                prop_assert_eq!(p.slots(), slots.len());
                let x = &vars[..slots.len().min(vars.len())];
                prop_assume!(x.len() == slots.len());
                let mut ws = p.workspace();
                let mut out = vec![0.0; 2];
                p.eval(x, &mut ws, &mut out);
                let mut out2 = vec![0.0; 2];
                let mut jac = vec![0.0; 2 * slots.len()];
                p.eval_jacobian(x, slots.len(), &mut ws, &mut out2, &mut jac);
                // The Jacobian pass computes the same values, bit for bit (or both NaN).
                prop_assert!(out[0].to_bits() == out2[0].to_bits() || (out[0].is_nan() && out2[0].is_nan()));
                prop_assert_eq!(out[1], 1.0);
            }
            Err(errs) => {
                prop_assert_eq!(errs.len(), 1, "only the broken formula fails: {:?}", errs);
                let e = &errs[0];
                prop_assert_eq!(e.pointer.as_str(), "/model/dynamics/rates/a");
                let chars = text.chars().count();
                prop_assert!(e.column >= 1 && e.column <= chars + 1,
                    "column {} outside 1..={} for {:?}: {}", e.column, chars + 1, text, e.message);
                prop_assert!(!e.message.trim().is_empty());
            }
        }
    }
}
