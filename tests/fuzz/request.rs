//! The request parser under mutated requests: the committed requests (OpenAPI examples and
//! demo plants) with random values replaced, members removed or copied, and bytes cut or
//! flipped, sent to `estimate`, `smooth`, `check` and `simulate`. None may panic; a refusal
//! is a 4xx problem (or the deadline's 503) with a title and detail, and an
//! `invalid-request` lists its faults at RFC 6901 pointers; an answer is JSON whose every
//! number is finite (a NaN or infinity cannot even be read back).

use super::{config, corpus};
use proptest::prelude::*;
use serde_json::{json, Value};
use std::sync::atomic::{AtomicU64, Ordering};
use std::time::Duration;
use tacit::config::Limits;
use tacit::job::Stop;
use tacit::problem::{Problem, ProblemKind};

/// Values a mutation puts in place of a node.
fn replacement(k: u32) -> Value {
    let all = [
        Value::Null,
        json!(true),
        json!(""),
        json!("x"),
        json!("ekf"),
        json!("enkf"),
        json!("ukf"),
        json!("sqrt(-1)"),
        json!("1/0"),
        json!("2000-01-01T00:00:00Z"),
        json!("9999-12-31T23:59:59.999999999+14:00"),
        json!(0),
        json!(-1),
        json!(-0.0),
        json!(0.5),
        json!(1),
        json!(3),
        json!(1e300),
        json!(-1e300),
        json!(5e-324),
        json!(4294967296u64),
        json!(u64::MAX),
        json!(i64::MIN),
        json!([]),
        json!([[]]),
        json!([[1.0, 0.0], [0.0, 1.0]]),
        json!([[1.0, 2.0], [2.0, 1.0]]),
        json!({}),
        json!({"t": 1, "values": {}}),
    ];
    all[k as usize % all.len()].clone()
}

/// One edit of a request; the numbers pick the node (in preorder) and the value.
#[derive(Debug, Clone)]
enum Edit {
    Replace(u32, u32),
    Remove(u32),
    CopyOver(u32, u32),
    Scale(u32, u8),
}

fn edit() -> impl Strategy<Value = Edit> {
    prop_oneof![
        3 => (any::<u32>(), any::<u32>()).prop_map(|(a, b)| Edit::Replace(a, b)),
        2 => any::<u32>().prop_map(Edit::Remove),
        1 => (any::<u32>(), any::<u32>()).prop_map(|(a, b)| Edit::CopyOver(a, b)),
        2 => (any::<u32>(), any::<u8>()).prop_map(|(a, b)| Edit::Scale(a, b)),
    ]
}

/// JSON Pointers of every node, in preorder (the root is "").
fn pointers(v: &Value, at: String, out: &mut Vec<String>) {
    out.push(at.clone());
    match v {
        Value::Object(o) => {
            for (k, x) in o {
                pointers(
                    x,
                    format!("{at}/{}", k.replace('~', "~0").replace('/', "~1")),
                    out,
                );
            }
        }
        Value::Array(a) => {
            for (i, x) in a.iter().enumerate() {
                pointers(x, format!("{at}/{i}"), out);
            }
        }
        _ => {}
    }
}

fn apply(req: &mut Value, e: &Edit) {
    let mut ps = Vec::new();
    pointers(req, String::new(), &mut ps);
    let pick = |a: u32| ps[a as usize % ps.len()].clone();
    match *e {
        Edit::Replace(a, b) => {
            if let Some(slot) = req.pointer_mut(&pick(a)) {
                *slot = replacement(b);
            }
        }
        Edit::Remove(a) => {
            let p = pick(a);
            if let Some((parent, last)) = p.rsplit_once('/') {
                let last = last.replace("~1", "/").replace("~0", "~");
                match req.pointer_mut(parent) {
                    Some(Value::Object(o)) => {
                        o.remove(&last);
                    }
                    Some(Value::Array(v)) => {
                        if let Ok(i) = last.parse::<usize>() {
                            v.remove(i);
                        }
                    }
                    _ => {}
                }
            }
        }
        Edit::CopyOver(a, b) => {
            let from = req.pointer(&pick(a)).cloned();
            if let (Some(from), Some(slot)) = (from, req.pointer_mut(&pick(b))) {
                *slot = from;
            }
        }
        Edit::Scale(a, b) => {
            // Numbers across magnitudes: the scale is 10^(b/8 - 16).
            if let Some(slot) = req.pointer_mut(&pick(a)) {
                if let Some(x) = slot.as_f64() {
                    let y = x * 10f64.powi(i32::from(b / 8) - 16);
                    if let Some(n) = serde_json::Number::from_f64(y) {
                        *slot = Value::Number(n);
                    }
                }
            }
        }
    }
}

/// A byte-level damage to the serialised request: cut it short, or change one byte.
fn damage(bytes: &mut Vec<u8>, d: (u8, u32, u8)) {
    if bytes.is_empty() {
        return;
    }
    let at = d.1 as usize % bytes.len();
    match d.0 % 3 {
        0 => bytes.truncate(at),
        1 => bytes[at] = d.2,
        _ => bytes.insert(at, d.2),
    }
}

/// Every number in `v` is finite.
fn finite(v: &Value) -> bool {
    match v {
        Value::Number(n) => n.as_f64().is_some_and(f64::is_finite),
        Value::Array(a) => a.iter().all(finite),
        Value::Object(o) => o.values().all(finite),
        _ => true,
    }
}

/// A refusal is well formed: 4xx (or the deadline's 503), title and detail, and an invalid
/// request names its faults at pointers.
fn well_formed(p: &Problem) -> Result<(), String> {
    let deadline = ProblemKind::DeadlineExceeded;
    let status_ok =
        (400..500).contains(&p.status) || (p.status == 503 && p.type_uri == deadline.type_uri());
    if !status_ok {
        return Err(format!("status {} for {p}", p.status));
    }
    if p.title.is_empty() || p.detail.is_empty() {
        return Err(format!("no title or detail: {p:?}"));
    }
    if p.type_uri == ProblemKind::InvalidRequest.type_uri() {
        if p.errors.is_empty() {
            return Err(format!("invalid-request without errors: {p:?}"));
        }
        for e in &p.errors {
            let ptr_ok = e.pointer.is_empty()
                || (e.pointer.starts_with('/')
                    && !e
                        .pointer
                        .split("~")
                        .skip(1)
                        .any(|t| !(t.starts_with('0') || t.starts_with('1'))));
            if !ptr_ok || e.detail.is_empty() {
                return Err(format!("bad field error {e:?}"));
            }
        }
    }
    // The problem renders as JSON with the same status.
    let v: Value = serde_json::from_slice(&p.to_json()).map_err(|e| e.to_string())?;
    if v["status"] != json!(p.status) {
        return Err(format!("rendered status differs: {v}"));
    }
    Ok(())
}

static CASES: AtomicU64 = AtomicU64::new(0);
static ANSWERED: AtomicU64 = AtomicU64::new(0);

type Job = fn(&[u8], &Limits, &Stop) -> Result<tacit::job::Done, Problem>;
const JOBS: [(&str, Job); 4] = [
    ("estimate", tacit::job::estimate),
    ("smooth", tacit::job::smooth),
    ("check", tacit::job::check),
    ("simulate", tacit::job::simulate),
];

proptest! {
    #![proptest_config(config())]

    #[test]
    fn mutated_requests_are_answered_or_refused_with_a_4xx_problem(
        seed in any::<u32>(),
        edits in prop::collection::vec(edit(), 1..5),
        damaged in prop::option::weighted(0.15, (any::<u8>(), any::<u32>(), any::<u8>())),
    ) {
        let seeds = corpus("request");
        let (name, text) = &seeds[seed as usize % seeds.len()];
        let mut req: Value = serde_json::from_str(text).unwrap();
        for e in &edits {
            apply(&mut req, e);
        }
        let mut bytes = serde_json::to_vec(&req).unwrap();
        if let Some(d) = damaged {
            damage(&mut bytes, d);
        }
        let n = CASES.fetch_add(1, Ordering::Relaxed) + 1;
        if n % 2_000 == 0 {
            eprintln!("request fuzz: {n} cases, {} answered", ANSWERED.load(Ordering::Relaxed));
        }
        let limits = Limits::default();
        for (job, run) in JOBS {
            let stop = Stop::within(Some(Duration::from_secs(5)));
            match run(&bytes, &limits, &stop) {
                Ok(done) => {
                    ANSWERED.fetch_add(1, Ordering::Relaxed);
                    let v: Result<Value, _> = serde_json::from_slice(&done.body);
                    prop_assert!(v.is_ok(), "{job} on mutated {name}: answer is not JSON: {:?}", v.err());
                    prop_assert!(finite(&v.unwrap()), "{job} on mutated {name}: a non-finite number");
                }
                Err(p) => {
                    let r = well_formed(&p);
                    prop_assert!(r.is_ok(), "{job} on mutated {name}: {}", r.unwrap_err());
                }
            }
        }
    }
}
