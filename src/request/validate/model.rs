//! The `model` section: names (states, inputs, parameters), then dynamics, process noise
//! and sensors (each checked in its own file), into the checked [`Model`].

use super::common::{
    check_new_name, finite, non_negative, number, positive_value, present, required, typed,
    unknown_fields,
};
use super::dynamics::{dynamics, process_noise};
use super::sensors::sensors;
use crate::config::Limits;
use crate::formula::FormulaLimits;
use crate::model::{Bounds, EstimatedParameter, Model};
use crate::problem::FieldError;
use crate::request::error::{SpecError, SpecErrorKind, SpecErrors};
use crate::request::raw::{self, Entries, Field, RawBounds, RawEstimated, RawModel, RawParameter};
use crate::request::reader::{child, index};
use serde_json::Value;
use std::collections::HashSet;

/// Parse and check the `model` section at `ptr`, reporting every fault found as the
/// problem document's field errors.
pub fn model(v: &Value, ptr: &str, limits: &Limits) -> Result<Model, Vec<FieldError>> {
    check_model(v, ptr, limits).map_err(|e| e.into_iter().map(FieldError::from).collect())
}

/// [`model`] with typed errors.
pub fn check_model(v: &Value, ptr: &str, limits: &Limits) -> Result<Model, Vec<SpecError>> {
    let mut errs = SpecErrors::default();
    let section = raw::section::<RawModel>(v);
    let model = typed(&section, ptr, &mut errs).and_then(|m| checked(m, ptr, limits, &mut errs));
    match model {
        Some(m) if errs.is_empty() => Ok(m),
        _ => Err(errs.into_vec()),
    }
}

/// Read a list of unique names (states or inputs), recording each fault.
fn name_list(
    f: &Option<Field<Vec<Field<&str>>>>,
    ptr: &str,
    what: &'static str,
    taken: &mut HashSet<String>,
    errs: &mut SpecErrors,
) -> Vec<String> {
    let Some(items) = f.as_ref().and_then(|f| typed(f, ptr, errs)) else {
        return Vec::new();
    };
    let mut out = Vec::with_capacity(items.len());
    for (i, item) in items.iter().enumerate() {
        let p = index(ptr, i);
        let Some(name) = typed(item, &p, errs) else {
            continue;
        };
        check_new_name(name, &p, what, taken, errs);
        out.push(name.to_string());
    }
    out
}

/// `min`/`max` at `ptr`: each finite when given, `min` below `max`; a side not given is
/// infinite. `None` after recording faults.
fn bounds(
    min: &Option<Field<f64>>,
    max: &Option<Field<f64>>,
    ptr: &str,
    errs: &mut SpecErrors,
) -> Option<Bounds> {
    let side = |f: &Option<Field<f64>>, k: &str, none: f64, errs: &mut SpecErrors| match f {
        Some(f) => number(f, &child(ptr, k), errs),
        None => Some(none),
    };
    let lo = side(min, "min", f64::NEG_INFINITY, errs);
    let hi = side(max, "max", f64::INFINITY, errs);
    let (min, max) = (lo?, hi?);
    if min >= max {
        errs.push(child(ptr, "min"), SpecErrorKind::BoundsOrder { min, max });
        return None;
    }
    Some(Bounds { min, max })
}

/// `model.bounds`: one `{min, max}` per named model state (watched, not enforced: a state
/// that leaves its interval gives an `out_of_bounds` warning). One entry per model state.
fn state_bounds(
    f: &Field<Entries<RawBounds>>,
    ptr: &str,
    model_states: &[String],
    errs: &mut SpecErrors,
) -> Vec<Bounds> {
    let mut out = vec![Bounds::NONE; model_states.len()];
    let Some(entries) = typed(f, ptr, errs) else {
        return out;
    };
    for (name, b) in &entries.0 {
        let p = child(ptr, name);
        let Some(i) = model_states.iter().position(|s| s == name) else {
            errs.push(
                &p,
                SpecErrorKind::NotAModelState {
                    name: name.to_string(),
                    states: model_states.to_vec(),
                },
            );
            continue;
        };
        let Some(b) = typed(b, &p, errs) else {
            continue;
        };
        unknown_fields(&b.unknown, &p, RawBounds::KNOWN, &[], errs);
        if let Some(b) = bounds(&b.min, &b.max, &p, errs) {
            out[i] = b;
        }
    }
    out
}

/// An estimated parameter's prior, random-walk density and bounds; `None` after recording
/// faults. The prior mean `initial` must lie inside the bounds.
fn estimated(
    e: &RawEstimated,
    name: &str,
    ptr: &str,
    errs: &mut SpecErrors,
) -> Option<(EstimatedParameter, Bounds)> {
    unknown_fields(
        &e.unknown,
        ptr,
        RawEstimated::KNOWN,
        RawEstimated::RENAMED,
        errs,
    );
    let initial = required(&e.initial, ptr, "initial", errs)
        .and_then(|&x| finite(x, &child(ptr, "initial"), errs));
    let std = required(&e.std, ptr, "std", errs)
        .and_then(|&x| positive_value(x, &child(ptr, "std"), "std", errs));
    let random_walk = match &e.random_walk {
        Some(f) => non_negative(f, &child(ptr, "random_walk"), "random_walk", errs),
        None => Some(0.0),
    };
    let b = bounds(&e.min, &e.max, ptr, errs);
    if let (Some(x), Some(b)) = (initial, b) {
        if !b.contains(x) {
            errs.push(
                child(ptr, "initial"),
                SpecErrorKind::OutsideBounds {
                    what: "initial",
                    value: x,
                    min: b.min,
                    max: b.max,
                },
            );
            return None;
        }
    }
    Some((
        EstimatedParameter {
            name: name.to_string(),
            initial: initial?,
            std: std?,
            random_walk: random_walk?,
        },
        b?,
    ))
}

/// The count limits, checked before anything is read one by one: a model of 200,000 state
/// names is refused at once, whatever else is wrong with it, rather than after each
/// name is checked. States count with the estimated parameters (objects in `parameters`),
/// as the filter carries both; every item of `states` counts, even one that is not a
/// name. Whether anything was over a limit.
fn over_limits(m: &RawModel, ptr: &str, limits: &Limits, errs: &mut SpecErrors) -> bool {
    let states = match &m.states {
        Some(Field::Ok(list)) => list.len(),
        _ => 0,
    };
    let estimated = match &m.parameters {
        Some(Field::Ok(params)) => params
            .0
            .iter()
            .filter(|(_, p)| matches!(p, Field::Ok(RawParameter::Estimated(_))))
            .count(),
        _ => 0,
    };
    let sensors = match &m.sensors {
        Some(Field::Ok(list)) => list.len(),
        _ => 0,
    };
    let mut over = false;
    if states + estimated > limits.max_states {
        errs.push(
            child(ptr, "states"),
            SpecErrorKind::OverLimit {
                what: "states (with estimated parameters)",
                count: (states + estimated) as u64,
                limit: limits.max_states,
            },
        );
        over = true;
    }
    if sensors > limits.max_sensors {
        errs.push(
            child(ptr, "sensors"),
            SpecErrorKind::OverLimit {
                what: "sensors",
                count: sensors as u64,
                limit: limits.max_sensors,
            },
        );
        over = true;
    }
    over
}

/// The checks of [`check_model`] once the section is known to be an object.
fn checked(m: &RawModel, ptr: &str, limits: &Limits, errs: &mut SpecErrors) -> Option<Model> {
    if over_limits(m, ptr, limits, errs) {
        return None;
    }
    unknown_fields(&m.unknown, ptr, RawModel::KNOWN, &[], errs);
    let at = |k: &str| child(ptr, k);

    let mut taken = HashSet::new();
    present(&m.states, ptr, "states", errs);
    let model_states = name_list(&m.states, &at("states"), "state", &mut taken, errs);
    if model_states.is_empty() && m.states.is_some() {
        errs.push(
            at("states"),
            SpecErrorKind::NeedsAtLeastOne {
                holder: "a model",
                item: "state",
            },
        );
    }
    let inputs = name_list(&m.inputs, &at("inputs"), "input", &mut taken, errs);

    // Parameters: numbers are constants, objects are estimated as extra states.
    let mut constants: Vec<(String, f64)> = Vec::new();
    let mut estimated_params = Vec::new();
    let mut parameter_bounds = Vec::new();
    let pp = at("parameters");
    if let Some(params) = m.parameters.as_ref().and_then(|f| typed(f, &pp, errs)) {
        for (name, pv) in &params.0 {
            let p = child(&pp, name);
            check_new_name(name, &p, "parameter", &mut taken, errs);
            match pv {
                Field::Ok(RawParameter::Fixed(x)) => {
                    if let Some(x) = finite(*x, &p, errs) {
                        constants.push((name.to_string(), x));
                    }
                }
                Field::Ok(RawParameter::Estimated(e)) => {
                    if let Some((e, b)) = estimated(e, name, &p, errs) {
                        estimated_params.push(e);
                        parameter_bounds.push(b);
                    }
                }
                Field::Wrong(other) => errs.push(
                    &p,
                    SpecErrorKind::ParameterShape {
                        found: raw::kind_of(other).to_string(),
                    },
                ),
            }
        }
    }

    let n_model = model_states.len();
    let mut all_bounds = match &m.bounds {
        Some(f) => state_bounds(f, &at("bounds"), &model_states, errs),
        None => vec![Bounds::NONE; n_model],
    };
    all_bounds.extend(parameter_bounds);
    let mut states = model_states.clone();
    states.extend(estimated_params.iter().map(|p| p.name.clone()));
    let n = states.len();
    let nu = inputs.len();
    if !errs.is_empty() {
        return None;
    }

    let consts: Vec<(&str, f64)> = constants.iter().map(|(k, v)| (k.as_str(), *v)).collect();
    let mut slots: Vec<&str> = states.iter().map(String::as_str).collect();
    slots.extend(inputs.iter().map(String::as_str));
    slots.push("t");
    let mut next_slots = slots.clone();
    next_slots.push("dt");
    let flimits = FormulaLimits {
        max_len: limits.max_formula_len,
        max_depth: limits.max_formula_depth,
    };

    let dynamics = required(&m.dynamics, ptr, "dynamics", errs).and_then(|d| {
        dynamics(
            d,
            &at("dynamics"),
            &model_states,
            (n, nu),
            (&slots, &next_slots),
            &consts,
            &flimits,
            errs,
        )
    });
    let noise = dynamics.as_ref().and_then(|d| {
        process_noise(
            m.process_noise.as_ref(),
            &at("process_noise"),
            d,
            &model_states,
            &estimated_params,
            errs,
        )
    });
    let sensors = match required(&m.sensors, ptr, "sensors", errs) {
        Some(s) => sensors(s, &at("sensors"), &slots, &consts, &flimits, limits, errs),
        None => Vec::new(),
    };
    Some(Model {
        states,
        n_model,
        inputs,
        estimated: estimated_params,
        dynamics: dynamics?,
        noise: noise?,
        sensors,
        bounds: all_bounds,
    })
}

#[cfg(test)]
mod tests {
    use super::super::common::faults;
    use super::*;
    use crate::model::{Dynamics, LinearTime, ProcessNoise};
    use serde_json::json;

    /// An overhead crane trolley pushed by a motor, its rail drag estimated.
    fn trolley() -> Value {
        json!({
            "states": ["pos", "vel"], "inputs": ["force"],
            "parameters": {"mass": 12.0, "drag": {"initial": 0.4, "std": 0.2, "random_walk": 1e-4}},
            "dynamics": {"rates": {"pos": "vel", "vel": "(force - drag*vel*abs(vel))/mass"}},
            "process_noise": {"density": {"vel": 0.05}},
            "sensors": {"encoder": {"measures": "pos", "std": 0.002}}
        })
    }

    fn check(v: &Value) -> Result<Model, Vec<SpecError>> {
        check_model(v, "/model", &Limits::default())
    }

    #[test]
    fn names_the_formulas_give_a_meaning_are_refused() {
        // Every function of the formula language, the constants and the time names; a
        // state called `atan2` or `dt` would be shadowed or shadow one in every formula.
        for name in ["atan2", "clamp", "log10", "dt", "pi"] {
            let mut m = trolley();
            m["states"] = json!(["pos", name]);
            let got = faults(check(&m));
            assert!(
                got.iter().any(|(p, d)| p == "/model/states/1"
                    && d == &format!(
                        "state name '{name}' is reserved (a function, a constant, t or dt)"
                    )),
                "{name}: {got:?}"
            );
        }
    }

    #[test]
    fn a_valid_model_becomes_the_checked_model() {
        let m = check(&trolley()).unwrap();
        assert_eq!(m.states, ["pos", "vel", "drag"]);
        assert_eq!((m.n_model, m.nu()), (2, 1));
        assert_eq!(m.estimated[0].random_walk, 1e-4);
        assert!(matches!(m.dynamics, Dynamics::Rates(_)));
        // Continuous noise: the state's density, then the parameter's random walk on the
        // diagonal.
        let ProcessNoise::Density(q) = &m.noise else {
            panic!("{:?}", m.noise)
        };
        assert_eq!((q[(1, 1)], q[(2, 2)], q[(0, 0)]), (0.05, 1e-4, 0.0));
        // A std becomes the variance std² (common practice), computed as std * std.
        assert_eq!(m.sensors[0].r[(0, 0)], 0.002 * 0.002);
    }

    #[test]
    fn affine_rates_become_linear_dynamics() {
        let mut v = trolley();
        v["dynamics"]["rates"]["vel"] = json!("(force - 0.4*vel)/mass");
        let m = check(&v).unwrap();
        let Dynamics::Linear {
            time, matrix, b, ..
        } = &m.dynamics
        else {
            panic!("{:?}", m.dynamics)
        };
        assert_eq!(*time, LinearTime::Continuous);
        assert_eq!(matrix[(0, 1)], 1.0);
        assert_eq!(b[(1, 0)], 1.0 / 12.0);
    }

    #[test]
    fn every_fault_is_reported_at_its_pointer() {
        let mut v = trolley();
        v["colour"] = json!("red");
        v["states"] = json!(["pos", "pos", 3]);
        v["inputs"] = json!(["t"]);
        v["parameters"]["drag"] = json!({"initial": 0.4, "std": 0, "drift": 1e-4});
        v["parameters"]["mass"] = json!("heavy");
        assert_eq!(
            faults(check(&v)),
            [
                (
                    "/model/colour".into(),
                    "unknown field 'colour'; expected one of states, inputs, parameters, \
                     dynamics, process_noise, sensors, bounds"
                        .into()
                ),
                ("/model/states/1".into(), "name 'pos' is used twice".into()),
                (
                    "/model/states/2".into(),
                    "expected a string, found a number".into()
                ),
                (
                    "/model/inputs/0".into(),
                    "input name 't' is reserved (a function, a constant, t or dt)".into()
                ),
                (
                    "/model/parameters/mass".into(),
                    "a parameter is a number (fixed) or an object {initial, std, random_walk, \
                     min, max} (estimated), found a string"
                        .into()
                ),
                (
                    "/model/parameters/drag/drift".into(),
                    "`drift` was renamed `random_walk`".into()
                ),
                (
                    "/model/parameters/drag/std".into(),
                    "std must be positive, got 0".into()
                ),
            ]
        );
    }

    #[test]
    fn missing_and_empty_sections_are_named() {
        // Faults in the names stop the check before formulas are compiled against them.
        assert_eq!(
            faults(check(&json!({"dynamics": {"rates": {}}}))),
            [(
                "/model/states".into(),
                "missing required field 'states'".into()
            )]
        );
        assert_eq!(
            faults(check(
                &json!({"states": [], "dynamics": {"rates": {}}, "sensors": {}})
            )),
            [(
                "/model/states".into(),
                "a model needs at least one state".into()
            )]
        );
        assert_eq!(
            faults(check(&json!({"states": ["x"], "sensors": {}}))),
            [
                (
                    "/model/dynamics".into(),
                    "missing required field 'dynamics'".into()
                ),
                (
                    "/model/sensors".into(),
                    "a model needs at least one sensor".into()
                ),
            ]
        );
        assert_eq!(
            faults(check(&json!([1]))),
            [("/model".into(), "expected an object, found an array".into())]
        );
    }

    #[test]
    fn the_state_limit_counts_estimated_parameters() {
        let limits = Limits {
            max_states: 2,
            ..Limits::default()
        };
        let r = check_model(&trolley(), "/model", &limits);
        assert_eq!(
            faults(r),
            [(
                "/model/states".into(),
                "3 states (with estimated parameters) exceed the limit of 2".into()
            )]
        );
    }

    #[test]
    fn the_count_limits_are_checked_before_the_names() {
        // 300 state names with a repeat and a reserved one among them, and 300 sensors:
        // the counts alone are reported, before any name is looked at.
        let mut v = trolley();
        let mut names: Vec<String> = (0..300).map(|i| format!("s{i}")).collect();
        names[5] = "s1".into();
        names[6] = "dt".into();
        v["states"] = json!(names);
        let sensors: serde_json::Map<String, Value> = (0..300)
            .map(|i| (format!("g{i}"), json!({"measures": "s0", "std": 1})))
            .collect();
        v["sensors"] = Value::Object(sensors);
        assert_eq!(
            faults(check(&v)),
            [
                (
                    "/model/states".into(),
                    "301 states (with estimated parameters) exceed the limit of 256".into()
                ),
                (
                    "/model/sensors".into(),
                    "300 sensors exceed the limit of 256".into()
                ),
            ]
        );
    }

    #[test]
    fn bounds_are_read_for_parameters_and_model_states() {
        let mut v = trolley();
        v["parameters"]["drag"]["min"] = json!(0.0);
        v["bounds"] = json!({"vel": {"max": 3.5}});
        let m = check(&v).unwrap();
        assert_eq!(m.bounds.len(), 3);
        assert_eq!(m.bounds[0], Bounds::NONE);
        assert_eq!((m.bounds[1].min, m.bounds[1].max), (f64::NEG_INFINITY, 3.5));
        assert_eq!((m.bounds[2].min, m.bounds[2].max), (0.0, f64::INFINITY));
        assert!(m.has_parameter_bounds());
        // Without any, nothing is bounded.
        let m = check(&trolley()).unwrap();
        assert!(m.bounds.iter().all(|b| !b.any()));
        assert!(!m.has_parameter_bounds());
    }

    #[test]
    fn bound_faults_are_reported_at_their_pointers() {
        let mut v = trolley();
        // min not below max; the initial outside the bounds; a bound for a name that is not
        // a model state; a non-number; an unknown key.
        v["parameters"]["drag"]["min"] = json!(0.5);
        v["bounds"] = json!({
            "pos": {"min": 2, "max": 2},
            "speed": {"min": 0},
            "vel": {"min": "low", "most": 1}
        });
        assert_eq!(
            faults(check(&v)),
            [
                (
                    "/model/parameters/drag/initial".into(),
                    "initial 0.4 lies outside its bounds [0.5, inf]".into()
                ),
                (
                    "/model/bounds/pos/min".into(),
                    "min must be below max, got min 2 and max 2".into()
                ),
                (
                    "/model/bounds/speed".into(),
                    "'speed' is not a model state; states are pos, vel".into()
                ),
                (
                    "/model/bounds/vel/most".into(),
                    "unknown field 'most'; expected one of min, max".into()
                ),
                (
                    "/model/bounds/vel/min".into(),
                    "expected a number, found a string".into()
                ),
            ]
        );
        let mut v = trolley();
        v["parameters"]["drag"]["max"] = json!(0.1);
        v["parameters"]["drag"]["min"] = json!(0.3);
        assert_eq!(
            faults(check(&v)),
            [(
                "/model/parameters/drag/min".into(),
                "min must be below max, got min 0.3 and max 0.1".into()
            )]
        );
    }
}
