//! The identify request into checked types, once: every fault collected at its JSON
//! Pointer, formulas compiled with their columns.
//!
//! `{form, states, inputs?, outputs?, series, known?, library?, sparsity?, order?,
//! holdout?, time?, window?}`; each `series` entry is `{t, values, inputs?}` where
//! `values` (and `inputs`) is an object by name or an array in the order of `states`
//! (`outputs` for `subspace`, which has no states) and `inputs`.

use crate::config::Limits;
use crate::formula::{FormulaError, FormulaLimits, Program, Source};
use crate::identify::library::monomial_count;
use crate::identify::Series;
use crate::model::{TimeMode, Zone};
use crate::problem::{FieldError, Problem};
use crate::request::reader::{self, array, index, kind_of, number, whole, Errors, Obj};
use crate::request::validate;
use serde_json::Value;

/// The fitting forms.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub(crate) enum Form {
    /// x' = A x + B u, or x⁺ = F x + G u when `discrete`.
    Linear {
        /// A discrete map rather than rates.
        discrete: bool,
    },
    /// Sparse rates over a term library.
    Sparse,
    /// Known rates plus a sparse remainder.
    Known,
    /// Linear state space from inputs and outputs (answered in `modal.rs`).
    Subspace,
    /// Few-mode linear model of many states (answered in `modal.rs`).
    Reduced,
}

/// `order`: a number of states, or chosen from the singular values.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub(crate) enum Order {
    /// Chosen automatically.
    Auto,
    /// As given.
    Fixed(usize),
}

/// A checked identify request.
#[derive(Debug)]
pub(crate) struct Request {
    pub(crate) form: Form,
    pub(crate) states: Vec<String>,
    pub(crate) inputs: Vec<String>,
    pub(crate) outputs: Vec<String>,
    /// Values are the states (the outputs for `subspace`), then the inputs.
    pub(crate) series: Series,
    /// Polynomial degree of the library.
    pub(crate) degree: u32,
    /// User terms (texts) and their compiled program.
    pub(crate) terms: Vec<String>,
    pub(crate) term_program: Option<Program>,
    /// Known rates, one output per state (`0` where none is given), and their texts.
    pub(crate) known: Option<(Program, Vec<Option<String>>)>,
    pub(crate) sparsity: f64,
    pub(crate) holdout: f64,
    pub(crate) window: usize,
    pub(crate) order: Order,
}

/// The most states a `reduced` request may name (its snapshots are also bounded by the
/// body size and `max_identify_samples`).
pub(crate) const REDUCED_MAX_STATES: usize = 100_000;

const FIELDS: &[&str] = &[
    "form", "states", "inputs", "outputs", "series", "known", "library", "sparsity", "order",
    "holdout", "time", "window",
];

/// Parse `body` into a [`Request`], or a problem listing every fault.
pub(crate) fn request(body: &[u8], limits: &Limits) -> Result<Request, Problem> {
    let text = std::str::from_utf8(body).map_err(|_| {
        Problem::new(
            crate::problem::ProblemKind::MalformedJson,
            "the body is not UTF-8",
        )
    })?;
    let doc = crate::request::raw::tree(text, "").map_err(|e| match e {
        crate::request::raw::TreeError::Repeated(f) => Problem::invalid(vec![f]),
        crate::request::raw::TreeError::Json { error, .. } => {
            crate::request::envelope::json_problem(error)
        }
    })?;
    let mut errs = Errors::default();
    let Some(top) = Obj::new(&doc, "", &mut errs) else {
        return Err(Problem::invalid(errs.into_vec()));
    };
    top.deny_unknown(FIELDS, &mut errs);
    let form = top
        .required("form", &mut errs)
        .and_then(|v| form(v, &top, &mut errs));
    let subspace = form == Some(Form::Subspace);
    // A reduced model is for plants of many states: its names are bounded by the body
    // and by REDUCED_MAX_STATES, not by the filters' max_states.
    let state_cap = if form == Some(Form::Reduced) {
        REDUCED_MAX_STATES
    } else {
        limits.max_states
    };
    let states = names(&top, "states", !subspace, state_cap, &mut errs);
    let inputs = names(&top, "inputs", false, limits.max_states, &mut errs);
    let outputs = names(&top, "outputs", subspace, state_cap, &mut errs);
    if form == Some(Form::Reduced) {
        for (i, o) in outputs.iter().enumerate() {
            if !states.contains(o) {
                errs.push(
                    &index(&top.at("outputs"), i),
                    format!(
                        "'{o}' is not among the states; a reduced model's outputs name the \
                         states its sensors read"
                    ),
                );
            }
        }
    }
    let valued = if subspace { &outputs } else { &states };
    let series = top
        .required("series", &mut errs)
        .and_then(|v| series(v, valued, &inputs, limits, &mut errs));
    let flimits = FormulaLimits {
        max_len: limits.max_formula_len,
        max_depth: limits.max_formula_depth,
    };
    let mut slots: Vec<&str> = states.iter().map(String::as_str).collect();
    slots.extend(inputs.iter().map(String::as_str));
    let (degree, terms, term_program) = library(&top, &slots, &flimits, &mut errs);
    let known = known(&top, form, &states, &slots, &flimits, &mut errs);
    let sparsity = top
        .get("sparsity")
        .and_then(|v| non_negative(v, &top.at("sparsity"), &mut errs))
        .unwrap_or(0.05);
    let holdout = top
        .get("holdout")
        .and_then(|v| fraction(v, &top.at("holdout"), &mut errs))
        .unwrap_or(0.2);
    let window = match top
        .get("window")
        .map(|v| (v, whole(v, &top.at("window"), &mut errs)))
    {
        Some((_, Some(0))) => {
            errs.push(
                &top.at("window"),
                "window must be at least 1 sample interval",
            );
            1
        }
        Some((_, Some(w))) => usize::try_from(w).unwrap_or(usize::MAX),
        _ => 1,
    };
    let order = top
        .get("order")
        .map_or(Order::Auto, |v| order(v, &top.at("order"), &mut errs));
    if let Some(Form::Linear { .. } | Form::Sparse | Form::Known) = form {
        let vars = slots.len();
        let (lo, hi) = if matches!(form, Some(Form::Linear { .. })) {
            (1, 1)
        } else {
            (0, degree)
        };
        let count = monomial_count(vars, lo, hi).saturating_add(terms.len());
        if count > limits.max_identify_terms {
            errs.push(
                &top.at("library"),
                format!(
                    "the library has {count} terms, over the limit of {}",
                    limits.max_identify_terms
                ),
            );
        }
    }
    match (form, series, errs.is_empty()) {
        (Some(form), Some(series), true) => Ok(Request {
            form,
            states,
            inputs,
            outputs,
            series,
            degree,
            terms,
            term_program,
            known,
            sparsity,
            holdout,
            window,
            order,
        }),
        _ => Err(Problem::invalid(errs.into_vec())),
    }
}

fn form(v: &Value, top: &Obj<'_>, errs: &mut Errors) -> Option<Form> {
    let ptr = top.at("form");
    let time = top.get("time").and_then(|t| match t.as_str() {
        Some("continuous") => Some(false),
        Some("discrete") => Some(true),
        _ => {
            errs.push(&top.at("time"), "time is \"continuous\" or \"discrete\"");
            None
        }
    });
    let f = match v.as_str() {
        Some("linear") => Form::Linear {
            discrete: time.unwrap_or(false),
        },
        Some("sparse") => Form::Sparse,
        Some("known") => Form::Known,
        Some("subspace") => Form::Subspace,
        Some("reduced") => Form::Reduced,
        _ => {
            errs.push(
                &ptr,
                "form is one of \"linear\", \"sparse\", \"known\", \"subspace\", \"reduced\"",
            );
            return None;
        }
    };
    if time == Some(true) && !matches!(f, Form::Linear { .. }) {
        errs.push(&top.at("time"), "only the linear form fits a discrete map");
    }
    Some(f)
}

/// A list of distinct, non-empty names (required or not).
fn names(top: &Obj<'_>, key: &str, required: bool, cap: usize, errs: &mut Errors) -> Vec<String> {
    let ptr = top.at(key);
    let v = if required {
        top.required(key, errs)
    } else {
        top.get(key)
    };
    let Some(items) = v.and_then(|v| array(v, &ptr, errs)) else {
        return Vec::new();
    };
    if items.len() > cap {
        errs.push(
            &ptr,
            format!("{} names exceed the limit of {cap}", items.len()),
        );
        return Vec::new();
    }
    if required && items.is_empty() {
        errs.push(&ptr, format!("{key} needs at least one name"));
    }
    let mut out: Vec<String> = Vec::with_capacity(items.len());
    for (i, it) in items.iter().enumerate() {
        match it.as_str() {
            Some("") => errs.push(&index(&ptr, i), "a name must not be empty"),
            Some(s) if out.iter().any(|o| o == s) => {
                errs.push(&index(&ptr, i), format!("'{s}' is named twice"))
            }
            Some(s) => out.push(s.to_string()),
            None => errs.push(
                &index(&ptr, i),
                format!("expected a name, found {}", kind_of(it)),
            ),
        }
    }
    out
}

/// Values by name (an object holding every name) or in order (an array as long as
/// `names`), into `out[s]`.
fn values(v: &Value, ptr: &str, names: &[String], out: &mut [f64], errs: &mut Errors) {
    match v {
        Value::Array(a) => {
            if a.len() != names.len() {
                errs.push(
                    ptr,
                    format!(
                        "expected {} values (in the order {}), found {}",
                        names.len(),
                        reader::names_list(names),
                        a.len()
                    ),
                );
                return;
            }
            for (s, x) in a.iter().enumerate() {
                if let Some(x) = number(x, &index(ptr, s), errs) {
                    out[s] = x;
                }
            }
        }
        Value::Object(_) => {
            let Some(o) = Obj::new(v, ptr, errs) else {
                return;
            };
            let allowed: Vec<&str> = names.iter().map(String::as_str).collect();
            o.deny_unknown(&allowed, errs);
            for (s, n) in names.iter().enumerate() {
                if let Some(x) = o.required(n, errs) {
                    if let Some(x) = number(x, &o.at(n), errs) {
                        out[s] = x;
                    }
                }
            }
        }
        other => errs.push(
            ptr,
            format!(
                "expected an object by name or an array, found {}",
                kind_of(other)
            ),
        ),
    }
}

fn series(
    v: &Value,
    valued: &[String],
    inputs: &[String],
    limits: &Limits,
    errs: &mut Errors,
) -> Option<Series> {
    let ptr = "/series";
    let items = array(v, ptr, errs)?;
    if items.len() > limits.max_identify_samples {
        errs.push(
            ptr,
            format!(
                "{} samples exceed the limit of {}",
                items.len(),
                limits.max_identify_samples
            ),
        );
        return None;
    }
    let m = items.len();
    let (n, p) = (valued.len(), inputs.len());
    let mut t = Vec::with_capacity(m);
    let mut cols = vec![0.0; (n + p) * m];
    let mut row = vec![0.0; n + p];
    let mut mode: Option<TimeMode> = None;
    let zone = Zone::none();
    let mut first_ns: Option<i128> = None;
    let before = errs.is_empty();
    for (j, it) in items.iter().enumerate() {
        let ip = index(ptr, j);
        let Some(o) = Obj::new(it, &ip, errs) else {
            continue;
        };
        o.deny_unknown(&["t", "values", "inputs"], errs);
        let secs = o
            .required("t", errs)
            .and_then(|tv| validate::time_value(tv, &o.at("t"), &mut mode, &zone, errs))
            .map(|i| match mode.unwrap_or(TimeMode::Seconds) {
                TimeMode::Seconds => i.secs,
                TimeMode::Stamp => {
                    let base = *first_ns.get_or_insert(i.nanos);
                    (i.nanos - base) as f64 / 1e9
                }
            });
        if let (Some(s), Some(&last)) = (secs, t.last()) {
            if s <= last {
                errs.push(
                    &o.at("t"),
                    "times must increase from one sample to the next",
                );
            }
        }
        t.push(secs.unwrap_or(0.0));
        row.fill(0.0);
        if let Some(vv) = o.required("values", errs) {
            values(vv, &o.at("values"), valued, &mut row[..n], errs);
        }
        if p > 0 {
            if let Some(iv) = o.required("inputs", errs) {
                values(iv, &o.at("inputs"), inputs, &mut row[n..], errs);
            }
        } else if let Some(iv) = o.get("inputs") {
            values(iv, &o.at("inputs"), inputs, &mut row[n..], errs);
        }
        for (s, &x) in row.iter().enumerate() {
            cols[s * m + j] = x;
        }
        if errs.len() > 50 {
            break;
        }
    }
    (before && errs.is_empty()).then_some(Series {
        t,
        values: cols,
        states: n,
        inputs: p,
    })
}

fn compile(
    texts: &[(String, String)],
    slots: &[&str],
    flimits: &FormulaLimits,
    errs: &mut Errors,
) -> Option<Program> {
    let sources: Vec<Source<'_>> = texts
        .iter()
        .map(|(text, pointer)| Source {
            text,
            pointer: pointer.clone(),
        })
        .collect();
    match Program::compile(&sources, slots, &[], flimits) {
        Ok(p) => Some(p),
        Err(list) => {
            for FormulaError {
                pointer,
                column,
                message,
            } in list
            {
                let mut f = FieldError::new(pointer, message);
                f.column = Some(column);
                errs.push_field(f);
            }
            None
        }
    }
}

/// `library: {degree, terms}`: degree 2 and no user term unless given.
fn library(
    top: &Obj<'_>,
    slots: &[&str],
    flimits: &FormulaLimits,
    errs: &mut Errors,
) -> (u32, Vec<String>, Option<Program>) {
    let Some(lib) = top.object("library", errs) else {
        return (2, Vec::new(), None);
    };
    lib.deny_unknown(&["degree", "terms"], errs);
    let degree = match lib.get("degree").map(|v| whole(v, &lib.at("degree"), errs)) {
        Some(Some(d)) if d <= 8 => d as u32,
        Some(Some(d)) => {
            errs.push(&lib.at("degree"), format!("degree is at most 8, got {d}"));
            2
        }
        _ => 2,
    };
    let mut texts = Vec::new();
    if let Some(items) = lib
        .get("terms")
        .and_then(|v| array(v, &lib.at("terms"), errs))
    {
        for (i, it) in items.iter().enumerate() {
            let p = index(&lib.at("terms"), i);
            match it.as_str() {
                Some(s) => texts.push((s.to_string(), p)),
                None => errs.push(&p, format!("expected a formula, found {}", kind_of(it))),
            }
        }
    }
    if texts.is_empty() {
        return (degree, Vec::new(), None);
    }
    let prog = compile(&texts, slots, flimits, errs);
    (degree, texts.into_iter().map(|(t, _)| t).collect(), prog)
}

/// `known: {rates: {state: formula}}`, required for the `known` form only.
fn known(
    top: &Obj<'_>,
    form: Option<Form>,
    states: &[String],
    slots: &[&str],
    flimits: &FormulaLimits,
    errs: &mut Errors,
) -> Option<(Program, Vec<Option<String>>)> {
    let is_known = form == Some(Form::Known);
    let k = if is_known {
        top.required("known", errs)
    } else {
        if top.get("known").is_some() {
            errs.push(
                &top.at("known"),
                "known rates belong to the known form only",
            );
        }
        None
    };
    let k = Obj::new(k?, &top.at("known"), errs)?;
    k.deny_unknown(&["rates"], errs);
    let rates = k.required("rates", errs)?;
    let r = Obj::new(rates, &k.at("rates"), errs)?;
    let allowed: Vec<&str> = states.iter().map(String::as_str).collect();
    r.deny_unknown(&allowed, errs);
    let mut texts = Vec::with_capacity(states.len());
    let mut given = Vec::with_capacity(states.len());
    for s in states {
        match r.get(s) {
            Some(Value::String(f)) => {
                texts.push((f.clone(), r.at(s)));
                given.push(Some(f.clone()));
            }
            Some(other) => {
                errs.push(
                    &r.at(s),
                    format!("expected a formula, found {}", kind_of(other)),
                );
                texts.push(("0".to_string(), r.at(s)));
                given.push(None);
            }
            None => {
                texts.push(("0".to_string(), r.at(s)));
                given.push(None);
            }
        }
    }
    if given.iter().all(Option::is_none) {
        errs.push(
            &k.at("rates"),
            "the known form needs at least one known rate",
        );
    }
    compile(&texts, slots, flimits, errs).map(|p| (p, given))
}

fn non_negative(v: &Value, ptr: &str, errs: &mut Errors) -> Option<f64> {
    let x = number(v, ptr, errs)?;
    if x >= 0.0 {
        Some(x)
    } else {
        errs.push(ptr, format!("must be zero or more, got {x}"));
        None
    }
}

fn fraction(v: &Value, ptr: &str, errs: &mut Errors) -> Option<f64> {
    let x = number(v, ptr, errs)?;
    if (0.0..0.9).contains(&x) {
        Some(x)
    } else {
        errs.push(ptr, format!("holdout is a fraction in [0, 0.9), got {x}"));
        None
    }
}

fn order(v: &Value, ptr: &str, errs: &mut Errors) -> Order {
    if v.as_str() == Some("auto") {
        return Order::Auto;
    }
    match v.as_u64() {
        Some(k) if k >= 1 => Order::Fixed(usize::try_from(k).unwrap_or(usize::MAX)),
        _ => {
            errs.push(ptr, "order is \"auto\" or a whole number ≥ 1");
            Order::Auto
        }
    }
}
