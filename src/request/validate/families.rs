//! A model written as state families (issue 13; `model.families`): the families, the
//! shared and per-element parameters, one rate formula per family keyed `"x[i]"`, the
//! process noise density per family and the sensors over families, checked once into the
//! [`FamilyModel`], every fault at its JSON Pointer.
//!
//! ```json
//! {"families": {"x": {"size": 40, "boundary": "periodic"}},
//!  "parameters": {"F": 8, "c": [0.1, 0.2]},
//!  "dynamics": {"rates": {"x[i]": "(x[i+1] - x[i-2])*x[i-1] - x[i] + F"}},
//!  "process_noise": {"density": {"x": 0.01}},
//!  "sensors": {"probe": {"measures": "x[i]", "every": 2, "std": 1.0}}}
//! ```
//!
//! The section is read from its JSON tree directly (its shapes are few and each is
//! checked where it is read). A family model holds only families: plain `states`,
//! `inputs`, `bounds` and estimated parameters are refused beside them. All families have
//! the same size, so a distance between elements means the same in each.

use super::common::{check_new_name, is_identifier};
use crate::config::Limits;
use crate::formula::{Boundary, FamilyKernel, FamilySet, FamilyShape, FormulaLimits, Source};
use crate::model::{FamilyModel, FamilySensor};
use crate::request::error::{SpecError, SpecErrorKind, SpecErrors};
use crate::request::reader::{child, index};
use serde_json::{Map, Value};
use std::collections::HashSet;

/// Most per-element parameter arrays a family model may give (each kernel reads them
/// all): the `MAX_FAMILY_ARRAYS` of the family RK4 step in `dynamics/`.
const MAX_ARRAYS: usize = 8;

/// Whether the model section declares families.
pub fn has_families(model: &Value) -> bool {
    model.get("families").is_some()
}

fn fault(errs: &mut SpecErrors, ptr: &str, detail: impl Into<String>) {
    errs.push(ptr, SpecErrorKind::Family(detail.into()));
}

fn object<'a>(v: &'a Value, ptr: &str, errs: &mut SpecErrors) -> Option<&'a Map<String, Value>> {
    let o = v.as_object();
    if o.is_none() {
        fault(errs, ptr, "expected an object");
    }
    o
}

fn finite(v: &Value, ptr: &str, errs: &mut SpecErrors) -> Option<f64> {
    match v.as_f64() {
        Some(x) if x.is_finite() => Some(x),
        _ => {
            fault(errs, ptr, "expected a finite number");
            None
        }
    }
}

fn whole(v: &Value, ptr: &str, errs: &mut SpecErrors) -> Option<u64> {
    let w = v.as_u64();
    if w.is_none() {
        fault(errs, ptr, "expected a whole number");
    }
    w
}

/// A number for every element of a family of `size`: one number for all, or an array.
fn per_element(v: &Value, size: usize, ptr: &str, errs: &mut SpecErrors) -> Option<Vec<f64>> {
    match v {
        Value::Array(a) => {
            if a.len() != size {
                fault(
                    errs,
                    ptr,
                    format!("expected {size} values, one per element, found {}", a.len()),
                );
                return None;
            }
            let mut out = Vec::with_capacity(size);
            for (k, x) in a.iter().enumerate() {
                out.push(finite(x, &index(ptr, k), errs)?);
            }
            Some(out)
        }
        _ => finite(v, ptr, errs).map(|x| vec![x; size]),
    }
}

/// Parse and check a family model section at `ptr`.
pub fn check_families(
    v: &Value,
    ptr: &str,
    limits: &Limits,
) -> Result<FamilyModel, Vec<SpecError>> {
    let mut errs = SpecErrors::default();
    let out = checked(v, ptr, limits, &mut errs);
    match out {
        Some(m) if errs.is_empty() => Ok(m),
        _ => Err(errs.into_vec()),
    }
}

const KNOWN: &[&str] = &[
    "families",
    "parameters",
    "dynamics",
    "process_noise",
    "sensors",
];

fn checked(v: &Value, ptr: &str, limits: &Limits, errs: &mut SpecErrors) -> Option<FamilyModel> {
    let m = object(v, ptr, errs)?;
    for k in m.keys() {
        if !KNOWN.contains(&k.as_str()) {
            fault(errs, &child(ptr, k), format!("'{k}' is not a field of a family model; expected one of {} (a family model holds families only: no plain states, inputs or bounds)", KNOWN.join(", ")));
        }
    }
    let set = shapes(&m["families"], &child(ptr, "families"), limits, errs)?;
    let size = set.shapes[0].size;
    let mut taken: HashSet<String> = set.shapes.iter().map(|s| s.name.clone()).collect();

    let (constants, arrays) = parameters(
        m.get("parameters"),
        &child(ptr, "parameters"),
        size,
        &mut taken,
        errs,
    );
    let names: Vec<&str> = arrays.iter().map(|(k, _)| k.as_str()).collect();
    let consts: Vec<(&str, f64)> = constants.iter().map(|(k, x)| (k.as_str(), *x)).collect();
    let flimits = FormulaLimits {
        max_len: limits.max_formula_len,
        max_depth: limits.max_formula_depth,
    };
    let kernels = rates(
        m.get("dynamics"),
        &child(ptr, "dynamics"),
        &set,
        (&names, &consts),
        &flimits,
        errs,
    );
    let density = noise(
        m.get("process_noise"),
        &child(ptr, "process_noise"),
        &set,
        errs,
    );
    let sensors = sensors(m.get("sensors"), &child(ptr, "sensors"), &set, limits, errs);
    let values: Vec<Vec<f64>> = arrays.into_iter().map(|(_, a)| a).collect();
    let kernels = kernels?;
    Some(FamilyModel {
        arrays: vec![values; kernels.len()],
        set,
        kernels,
        density: density?,
        sensors,
    })
}

/// `families`: each name with its size and boundary; all of one size, within the limit.
fn shapes(v: &Value, ptr: &str, limits: &Limits, errs: &mut SpecErrors) -> Option<FamilySet> {
    let m = object(v, ptr, errs)?;
    if m.is_empty() {
        fault(errs, ptr, "a family model needs at least one family");
        return None;
    }
    let mut total: u64 = 0;
    let mut out = Vec::new();
    let mut taken = HashSet::new();
    for (name, f) in m {
        let fp = child(ptr, name);
        check_new_name(name, &fp, "family", &mut taken, errs);
        if name.contains("__") {
            fault(
                errs,
                &fp,
                "a family name may not contain '__' (kept for the names of elements)",
            );
        }
        let Some(o) = object(f, &fp, errs) else {
            continue;
        };
        for k in o.keys() {
            if !["size", "boundary", "value"].contains(&k.as_str()) {
                fault(
                    errs,
                    &child(&fp, k),
                    format!("unknown field '{k}'; expected one of size, boundary, value"),
                );
            }
        }
        let size = match o.get("size") {
            Some(s) => whole(s, &child(&fp, "size"), errs),
            None => {
                fault(errs, &child(&fp, "size"), "missing required field 'size'");
                None
            }
        };
        if size == Some(0) {
            fault(
                errs,
                &child(&fp, "size"),
                "a family has at least one element",
            );
        }
        total = total.saturating_add(size.unwrap_or(0));
        let value = o
            .get("value")
            .and_then(|x| finite(x, &child(&fp, "value"), errs));
        let boundary = match o.get("boundary").map(Value::as_str) {
            Some(Some("periodic")) => {
                if o.contains_key("value") {
                    fault(errs, &child(&fp, "value"), "a periodic family has no boundary value; 'value' goes with \"boundary\": \"fixed\"");
                }
                Some(Boundary::Periodic)
            }
            Some(Some("fixed")) => Some(Boundary::Fixed(value.unwrap_or(0.0))),
            Some(_) => {
                fault(
                    errs,
                    &child(&fp, "boundary"),
                    "expected \"periodic\" or \"fixed\"",
                );
                None
            }
            None => {
                fault(
                    errs,
                    &child(&fp, "boundary"),
                    "missing required field 'boundary' (\"periodic\" or \"fixed\")",
                );
                None
            }
        };
        if let (Some(size), Some(boundary)) = (size, boundary) {
            out.push(FamilyShape {
                name: name.clone(),
                size: size as usize,
                boundary,
            });
        }
    }
    if total > limits.max_family_states as u64 {
        errs.push(
            ptr,
            SpecErrorKind::OverLimit {
                what: "family states",
                count: total,
                limit: limits.max_family_states,
            },
        );
        return None;
    }
    if out.len() != m.len() || total == 0 {
        return None;
    }
    if let Some(other) = out.iter().find(|s| s.size != out[0].size) {
        fault(
            errs,
            &child(&child(ptr, &other.name), "size"),
            format!(
                "every family of a model has the same size; '{}' has {} elements",
                out[0].name, out[0].size
            ),
        );
        return None;
    }
    Some(FamilySet::new(out))
}

type Named = Vec<(String, f64)>;
type Arrays = Vec<(String, Vec<f64>)>;

/// `parameters`: a number is shared by every element, an array gives one per element.
fn parameters(
    v: Option<&Value>,
    ptr: &str,
    size: usize,
    taken: &mut HashSet<String>,
    errs: &mut SpecErrors,
) -> (Named, Arrays) {
    let (mut consts, mut arrays) = (Vec::new(), Vec::new());
    let Some(m) = v.and_then(|v| object(v, ptr, errs)) else {
        return (consts, arrays);
    };
    for (name, x) in m {
        let p = child(ptr, name);
        check_new_name(name, &p, "parameter", taken, errs);
        match x {
            Value::Array(_) => {
                if let Some(a) = per_element(x, size, &p, errs) {
                    arrays.push((name.clone(), a));
                }
            }
            Value::Number(_) => {
                if let Some(x) = finite(x, &p, errs) {
                    consts.push((name.clone(), x));
                }
            }
            _ => fault(errs, &p, "a family model's parameter is a number (shared) or an array (one per element); estimated parameters are not supported with families"),
        }
    }
    if arrays.len() > MAX_ARRAYS {
        fault(
            errs,
            ptr,
            format!("at most {MAX_ARRAYS} per-element parameter arrays"),
        );
    }
    (consts, arrays)
}

/// `dynamics.rates`: one formula per family, keyed `"x[i]"`, compiled once as a kernel.
fn rates(
    v: Option<&Value>,
    ptr: &str,
    set: &FamilySet,
    (arrays, consts): (&[&str], &[(&str, f64)]),
    flimits: &FormulaLimits,
    errs: &mut SpecErrors,
) -> Option<Vec<FamilyKernel>> {
    let Some(v) = v else {
        fault(errs, ptr, "missing required field 'dynamics'");
        return None;
    };
    let d = object(v, ptr, errs)?;
    for k in d.keys().filter(|k| *k != "rates") {
        fault(
            errs,
            &child(ptr, k),
            "a family model's dynamics are 'rates' (one formula per family, keyed \"x[i]\")",
        );
    }
    let rp = child(ptr, "rates");
    let Some(r) = d.get("rates") else {
        fault(errs, &rp, "missing required field 'rates'");
        return None;
    };
    let r = object(r, &rp, errs)?;
    let mut texts: Vec<Option<(&str, String)>> = vec![None; set.shapes.len()];
    for (key, text) in r {
        let kp = child(&rp, key);
        let name = key.strip_suffix("[i]").unwrap_or("");
        let Some(f) = set.index(name) else {
            fault(
                errs,
                &kp,
                format!(
                    "a rate is keyed by a family's element, as \"{}[i]\"",
                    set.shapes[0].name
                ),
            );
            continue;
        };
        match text.as_str() {
            Some(t) => texts[f] = Some((t, kp)),
            None => fault(errs, &kp, "expected a formula (a string)"),
        }
    }
    let mut kernels = Vec::new();
    for (f, t) in texts.iter().enumerate() {
        let Some((text, kp)) = t else {
            fault(
                errs,
                &child(&rp, &format!("{}[i]", set.shapes[f].name)),
                "missing the rate of this family",
            );
            continue;
        };
        let src = Source {
            text,
            pointer: kp.clone(),
        };
        match FamilyKernel::compile(&src, set.shapes[f].size, set, arrays, consts, flimits) {
            Ok(k) => kernels.push(k),
            Err(list) => super::common::formula_errors(errs, list),
        }
    }
    (kernels.len() == set.shapes.len()).then_some(kernels)
}

/// `process_noise.density`: per family, one density for all elements or one each.
fn noise(v: Option<&Value>, ptr: &str, set: &FamilySet, errs: &mut SpecErrors) -> Option<Vec<f64>> {
    let mut out = vec![0.0; set.n()];
    let Some(v) = v else { return Some(out) };
    let m = object(v, ptr, errs)?;
    for k in m.keys().filter(|k| *k != "density") {
        fault(
            errs,
            &child(ptr, k),
            "a family model's process noise is a 'density' per family",
        );
    }
    let dp = child(ptr, "density");
    let Some(d) = m.get("density").and_then(|d| object(d, &dp, errs)) else {
        return Some(out);
    };
    for (name, x) in d {
        let p = child(&dp, name);
        let Some(f) = set.index(name) else {
            fault(errs, &p, "not a family of this model");
            continue;
        };
        let (start, size) = (set.starts[f], set.shapes[f].size);
        if let Some(q) = per_element(x, size, &p, errs) {
            if q.iter().any(|x| *x < 0.0) {
                fault(errs, &p, "a noise density is zero or more");
            }
            out[start..start + size].copy_from_slice(&q);
        }
    }
    Some(out)
}

/// `sensors`: each reads one family's elements directly, every `every`-th from 0 or an
/// explicit ascending list `elements`, with one `std`.
fn sensors(
    v: Option<&Value>,
    ptr: &str,
    set: &FamilySet,
    limits: &Limits,
    errs: &mut SpecErrors,
) -> Vec<FamilySensor> {
    let mut out = Vec::new();
    let Some(v) = v else {
        fault(errs, ptr, "missing required field 'sensors'");
        return out;
    };
    let Some(m) = object(v, ptr, errs) else {
        return out;
    };
    if m.is_empty() {
        fault(errs, ptr, "a model needs at least one sensor");
    }
    if m.len() > limits.max_sensors {
        errs.push(
            ptr,
            SpecErrorKind::OverLimit {
                what: "sensors",
                count: m.len() as u64,
                limit: limits.max_sensors,
            },
        );
        return out;
    }
    for (name, s) in m {
        let sp = child(ptr, name);
        if !is_identifier(name) {
            errs.push(
                &sp,
                SpecErrorKind::BadName {
                    what: "sensor",
                    name: name.clone(),
                },
            );
        }
        let Some(o) = object(s, &sp, errs) else {
            continue;
        };
        for k in o.keys() {
            if !["measures", "every", "elements", "std"].contains(&k.as_str()) {
                fault(errs, &child(&sp, k), format!("unknown field '{k}'; a family sensor has measures, every or elements, and std"));
            }
        }
        let mp = child(&sp, "measures");
        let family = match o.get("measures").and_then(Value::as_str) {
            Some(t) => {
                let t: String = t.chars().filter(|c| !c.is_whitespace()).collect();
                let f = t.strip_suffix("[i]").and_then(|n| set.index(n));
                if f.is_none() {
                    fault(
                        errs,
                        &mp,
                        format!(
                            "a family sensor reads one family's elements directly, as \"{}[i]\"",
                            set.shapes[0].name
                        ),
                    );
                }
                f
            }
            None => {
                fault(
                    errs,
                    &mp,
                    "missing required field 'measures' (a string such as \"x[i]\")",
                );
                None
            }
        };
        let std = match o.get("std") {
            Some(x) => finite(x, &child(&sp, "std"), errs).filter(|x| {
                let ok = *x > 0.0 && (x * x).is_normal();
                if !ok {
                    fault(
                        errs,
                        &child(&sp, "std"),
                        "a standard deviation is positive (and its square a normal number)",
                    );
                }
                ok
            }),
            None => {
                fault(errs, &child(&sp, "std"), "missing required field 'std'");
                None
            }
        };
        let Some(f) = family else { continue };
        let size = set.shapes[f].size;
        let elements = match (o.get("every"), o.get("elements")) {
            (Some(_), Some(_)) => {
                fault(errs, &sp, "give 'every' or 'elements', not both");
                None
            }
            (_, Some(list)) => element_list(list, size, &child(&sp, "elements"), errs),
            (every, None) => {
                let ep = child(&sp, "every");
                match every.map_or(Some(1), |e| whole(e, &ep, errs)) {
                    Some(0) => {
                        fault(errs, &ep, "'every' is a whole number from 1");
                        None
                    }
                    Some(k) => Some((0..size).step_by(k.min(size as u64) as usize).collect()),
                    None => None,
                }
            }
        };
        if let (Some(elements), Some(std)) = (elements, std) {
            out.push(FamilySensor {
                name: name.clone(),
                family: f,
                elements,
                std,
            });
        }
    }
    out
}

/// An explicit, strictly ascending list of element indices below `size`.
fn element_list(v: &Value, size: usize, ptr: &str, errs: &mut SpecErrors) -> Option<Vec<usize>> {
    let Some(a) = v.as_array() else {
        fault(errs, ptr, "expected an array of element indices");
        return None;
    };
    if a.is_empty() {
        fault(errs, ptr, "a sensor reads at least one element");
        return None;
    }
    let mut out: Vec<usize> = Vec::with_capacity(a.len());
    for (k, x) in a.iter().enumerate() {
        let p = index(ptr, k);
        let i = whole(x, &p, errs)?;
        if i >= size as u64 {
            fault(
                errs,
                &p,
                format!("element {i} is past the family's last, {}", size - 1),
            );
            return None;
        }
        if out.last().is_some_and(|&l| l >= i as usize) {
            fault(
                errs,
                &p,
                "element indices are listed in ascending order, each once",
            );
            return None;
        }
        out.push(i as usize);
    }
    Some(out)
}
