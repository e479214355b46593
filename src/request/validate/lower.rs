//! A family model of at most `max_states` states written out state by state (issue 13),
//! so the Gaussian filters (`ekf`, `ukf`) and the global ensemble filter run it as the
//! plain model it is: element `k` of family `x` becomes the state `x[k]`, its rate the
//! family formula written for that element ([`element_text`]), a family sensor a vector
//! sensor over the elements it reads, a family's density or prior value each element's.
//!
//! The family model is checked first ([`super::families::check_families`]), so every
//! fault is reported at its place in the request; the plain model built here then passes
//! the plain checks. Its states carry internal names (`x__7`) that formulas can read,
//! which the caller renames to the display names (`x[7]`) once it is checked.

use crate::formula::element_text;
use crate::model::FamilyModel;
use crate::request::error::{SpecError, SpecErrorKind};
use crate::request::reader::child;
use serde_json::{json, Map, Value};

/// The internal name of state `s` of `fm` in the plain model.
fn internal(fm: &FamilyModel, s: usize) -> String {
    let f = fm.set.starts.partition_point(|&st| st <= s) - 1;
    format!("{}__{}", fm.set.shapes[f].name, s - fm.set.starts[f])
}

/// The plain model section equal to the checked family model `fm` read from `v`.
pub fn lower_model(fm: &FamilyModel, v: &Value) -> Value {
    let n = fm.n();
    let names: Vec<String> = (0..n).map(|s| internal(fm, s)).collect();
    let mut consts = Map::new();
    let mut arrays: Vec<(&str, Vec<f64>)> = Vec::new();
    if let Some(p) = v.get("parameters").and_then(Value::as_object) {
        for (k, x) in p {
            match x {
                Value::Array(a) => arrays.push((k, a.iter().filter_map(Value::as_f64).collect())),
                _ => {
                    consts.insert(k.clone(), x.clone());
                }
            }
        }
    }
    let refs: Vec<(&str, &[f64])> = arrays.iter().map(|(k, a)| (*k, a.as_slice())).collect();
    let state = |c: usize| names[c].clone();
    let mut rates = Map::new();
    for (f, shape) in fm.set.shapes.iter().enumerate() {
        let key = format!("{}[i]", shape.name);
        let text = v["dynamics"]["rates"][&key].as_str().unwrap_or("");
        for e in 0..shape.size {
            let s = fm.set.starts[f] + e;
            let t = element_text(text, &fm.set, shape.size, &refs, e, &state)
                .unwrap_or_else(|| text.to_string());
            rates.insert(names[s].clone(), Value::String(t));
        }
    }
    let mut model = Map::new();
    model.insert("states".into(), json!(names));
    model.insert("parameters".into(), Value::Object(consts));
    model.insert("dynamics".into(), json!({ "rates": rates }));
    if v.get("process_noise").is_some() {
        let mut d = Map::new();
        for (s, q) in fm.density.iter().enumerate() {
            if *q != 0.0 {
                d.insert(names[s].clone(), json!(q));
            }
        }
        if !d.is_empty() {
            model.insert("process_noise".into(), json!({ "density": d }));
        }
    }
    let mut sensors = Map::new();
    for s in &fm.sensors {
        let start = fm.set.starts[s.family];
        let measures: Vec<&str> = s
            .elements
            .iter()
            .map(|e| names[start + e].as_str())
            .collect();
        sensors.insert(
            s.name.clone(),
            json!({"measures": measures, "std": vec![s.std; measures.len()]}),
        );
    }
    model.insert("sensors".into(), Value::Object(sensors));
    Value::Object(model)
}

/// The prior section with each family's `mean` and `std` (a number for every element or
/// an array, one per element) written out per element under the display names; other
/// members (a posterior's per-state names and covariance) are kept as they are.
pub fn lower_prior(fm: &FamilyModel, prior: &Value, ptr: &str) -> Result<Value, Vec<SpecError>> {
    let mut out = prior.clone();
    let mut errs = Vec::new();
    for part in ["mean", "std"] {
        let Some(obj) = out.get_mut(part).and_then(Value::as_object_mut) else {
            continue;
        };
        let keys: Vec<String> = obj.keys().cloned().collect();
        for k in keys {
            let Some(f) = fm.set.index(&k) else { continue };
            let (start, size) = (fm.set.starts[f], fm.set.shapes[f].size);
            let p = child(&child(ptr, part), &k);
            let values: Vec<Value> = match obj.remove(&k) {
                Some(Value::Array(a)) if a.len() == size => a,
                Some(Value::Array(a)) => {
                    errs.push(SpecError::new(
                        p,
                        SpecErrorKind::Family(format!(
                            "expected {size} values, one per element, found {}",
                            a.len()
                        )),
                    ));
                    continue;
                }
                Some(x) => vec![x; size],
                None => continue,
            };
            for (e, x) in values.into_iter().enumerate() {
                obj.insert(fm.state_name(start + e), x);
            }
        }
    }
    if errs.is_empty() {
        Ok(out)
    } else {
        Err(errs)
    }
}
