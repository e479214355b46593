//! The one validation step: parsed JSON sections in, checked [`Model`], [`FilterConfig`],
//! [`Prior`] and [`OutputConfig`] out, or every problem found with its JSON Pointer.

use crate::config::Limits;
use crate::formula::{FormulaLimits, Program, Source};
use crate::linalg::{cholesky_psd, is_symmetric, symmetrize};
use crate::problem::FieldError;
use crate::spec::model::*;
use crate::spec::reader::{
    array, child, index, kind_of, matrix, names_list, non_negative, number, positive, string,
    whole, Errors, Obj,
};
use crate::spec::time::{Instant, TimeMode};
use nalgebra::{DMatrix, DVector};
use serde_json::Value;

const RESERVED: &[&str] = &[
    "t", "dt", "pi", "e", "sin", "cos", "tan", "asin", "acos", "atan", "atan2", "sinh", "cosh",
    "tanh", "exp", "ln", "log10", "sqrt", "abs", "sign", "min", "max", "pow", "hypot", "clamp",
];

fn is_identifier(s: &str) -> bool {
    let mut chars = s.chars();
    matches!(chars.next(), Some(c) if c.is_ascii_alphabetic() || c == '_')
        && chars.all(|c| c.is_ascii_alphanumeric() || c == '_')
}

fn formula_limits(limits: &Limits) -> FormulaLimits {
    FormulaLimits {
        max_len: limits.max_formula_len,
        max_depth: limits.max_formula_depth,
    }
}

fn push_formula_errors(errs: &mut Errors, list: Vec<crate::formula::FormulaError>) {
    for e in list {
        errs.push_field(FieldError {
            pointer: e.pointer,
            detail: e.message,
            column: Some(e.column),
        });
    }
}

/// Read a list of unique identifiers (states or inputs).
fn name_list(
    v: Option<&Value>,
    ptr: &str,
    what: &str,
    taken: &mut Vec<String>,
    errs: &mut Errors,
) -> Vec<String> {
    let Some(v) = v else { return Vec::new() };
    let Some(items) = array(v, ptr, errs) else {
        return Vec::new();
    };
    let mut out = Vec::with_capacity(items.len());
    for (i, item) in items.iter().enumerate() {
        let p = index(ptr, i);
        let Some(name) = string(item, &p, errs) else {
            continue;
        };
        check_new_name(name, &p, what, taken, errs);
        out.push(name.to_string());
    }
    out
}

fn check_new_name(name: &str, ptr: &str, what: &str, taken: &mut Vec<String>, errs: &mut Errors) {
    if !is_identifier(name) {
        errs.push(ptr, format!("{what} name '{name}' must start with a letter or '_' and hold only letters, digits and '_'"));
    } else if RESERVED.contains(&name) {
        errs.push(
            ptr,
            format!("{what} name '{name}' is reserved (a function, a constant, t or dt)"),
        );
    } else if taken.iter().any(|t| t == name) {
        errs.push(ptr, format!("name '{name}' is used twice"));
    }
    taken.push(name.to_string());
}

/// Check that a covariance is symmetric and positive semi-definite (`definite` demands PD).
pub fn check_covariance(
    m: &mut DMatrix<f64>,
    ptr: &str,
    definite: bool,
    errs: &mut Errors,
) -> bool {
    let n = m.nrows();
    if !is_symmetric(m, 1e-9) {
        errs.push(ptr, "covariance must be symmetric");
        return false;
    }
    symmetrize(m);
    let mut l = vec![0.0; n * n];
    match cholesky_psd(m.as_slice(), &mut l, n) {
        Err(e) => {
            errs.push(
                ptr,
                format!(
                    "covariance is not positive semi-definite (pivot {:.3e} at row {})",
                    e.pivot, e.column
                ),
            );
            false
        }
        Ok(()) if definite && (0..n).any(|i| l[i + i * n] <= 0.0) => {
            errs.push(ptr, "covariance must be positive definite (a reading with zero noise cannot be weighed)");
            false
        }
        Ok(()) => true,
    }
}

/// Parse and check the `model` section.
pub fn model(v: &Value, ptr: &str, limits: &Limits) -> Result<Model, Vec<FieldError>> {
    let mut errs = Errors::default();
    let Some(obj) = Obj::new(v, ptr, &mut errs) else {
        return Err(errs.into_vec());
    };
    obj.deny_unknown(
        &[
            "states",
            "inputs",
            "parameters",
            "dynamics",
            "process_noise",
            "sensors",
        ],
        &mut errs,
    );

    let mut taken = Vec::new();
    let model_states = name_list(
        obj.required("states", &mut errs),
        &obj.at("states"),
        "state",
        &mut taken,
        &mut errs,
    );
    if model_states.is_empty() && obj.get("states").is_some() {
        errs.push(&obj.at("states"), "a model needs at least one state");
    }
    let inputs = name_list(
        obj.get("inputs"),
        &obj.at("inputs"),
        "input",
        &mut taken,
        &mut errs,
    );

    // Parameters: numbers are constants, objects are estimated as extra states.
    let mut constants: Vec<(String, f64)> = Vec::new();
    let mut estimated = Vec::new();
    if let Some(params) = obj.object("parameters", &mut errs) {
        for (name, pv) in params.map {
            let p = params.at(name);
            check_new_name(name, &p, "parameter", &mut taken, &mut errs);
            match pv {
                Value::Number(_) => {
                    if let Some(x) = number(pv, &p, &mut errs) {
                        constants.push((name.clone(), x));
                    }
                }
                Value::Object(_) => {
                    let Some(po) = Obj::new(pv, &p, &mut errs) else { continue };
                    po.deny_unknown(&["initial", "std", "drift"], &mut errs);
                    let initial = po.required_number("initial", &mut errs);
                    let std = po.required("std", &mut errs).and_then(|s| positive(s, &po.at("std"), "std", &mut errs));
                    let drift = po.get("drift").map_or(Some(0.0), |d| non_negative(d, &po.at("drift"), "drift", &mut errs));
                    if let (Some(initial), Some(std), Some(drift)) = (initial, std, drift) {
                        estimated.push(EstimatedParameter { name: name.clone(), initial, std, drift });
                    }
                }
                other => errs.push(&p, format!("a parameter is a number (fixed) or an object {{initial, std, drift}} (estimated), found {}", kind_of(other))),
            }
        }
    }

    let n_model = model_states.len();
    let mut states = model_states.clone();
    states.extend(estimated.iter().map(|p| p.name.clone()));
    let n = states.len();
    let nu = inputs.len();
    if n > limits.max_states {
        errs.push(
            &obj.at("states"),
            format!(
                "{n} states (with estimated parameters) exceed the limit of {}",
                limits.max_states
            ),
        );
    }
    if !errs.is_empty() {
        return Err(errs.into_vec());
    }

    let consts: Vec<(&str, f64)> = constants.iter().map(|(k, v)| (k.as_str(), *v)).collect();
    let mut slots: Vec<&str> = states.iter().map(String::as_str).collect();
    slots.extend(inputs.iter().map(String::as_str));
    slots.push("t");
    let mut next_slots = slots.clone();
    next_slots.push("dt");
    let flimits = formula_limits(limits);

    let dynamics = obj.required("dynamics", &mut errs).and_then(|d| {
        dynamics(
            d,
            &obj.at("dynamics"),
            &model_states,
            n,
            nu,
            &slots,
            &next_slots,
            &consts,
            &flimits,
            &mut errs,
        )
    });

    let noise = dynamics.as_ref().and_then(|d| {
        process_noise(
            obj.get("process_noise"),
            &obj.at("process_noise"),
            d,
            &model_states,
            n_model,
            &estimated,
            &mut errs,
        )
    });

    let sensors = match obj.required("sensors", &mut errs) {
        Some(sv) => sensors(
            sv,
            &obj.at("sensors"),
            &slots,
            &consts,
            &flimits,
            limits,
            &mut errs,
        ),
        None => Vec::new(),
    };

    match (dynamics, noise) {
        (Some(dynamics), Some(noise)) if errs.is_empty() => Ok(Model {
            states,
            n_model,
            inputs,
            estimated,
            dynamics,
            noise,
            sensors,
        }),
        _ => Err(errs.into_vec()),
    }
}

#[allow(clippy::too_many_arguments)]
fn dynamics(
    v: &Value,
    ptr: &str,
    model_states: &[String],
    n: usize,
    nu: usize,
    slots: &[&str],
    next_slots: &[&str],
    consts: &[(&str, f64)],
    flimits: &FormulaLimits,
    errs: &mut Errors,
) -> Option<Dynamics> {
    let obj = Obj::new(v, ptr, errs)?;
    let kinds: Vec<&str> = ["rates", "next", "linear"]
        .into_iter()
        .filter(|k| obj.get(k).is_some())
        .collect();
    obj.deny_unknown(&["rates", "next", "linear"], errs);
    if kinds.len() != 1 {
        errs.push(
            ptr,
            format!(
                "dynamics needs exactly one of rates, next or linear; found {}",
                if kinds.is_empty() {
                    "none".to_string()
                } else {
                    kinds.join(", ")
                }
            ),
        );
        return None;
    }
    let kind = kinds[0];
    let kptr = obj.at(kind);
    if kind == "linear" {
        return linear(obj.get("linear")?, &kptr, model_states.len(), n, nu, errs);
    }
    // One formula per model state; a state left out keeps rate 0 (rates) or its value (next).
    let fobj = Obj::new(obj.get(kind)?, &kptr, errs)?;
    for k in fobj.map.keys() {
        if !model_states.iter().any(|s| s == k) {
            errs.push(
                &fobj.at(k),
                format!(
                    "'{k}' is not a model state; states are {}",
                    names_list(model_states)
                ),
            );
        }
    }
    let mut texts: Vec<(String, String)> = Vec::with_capacity(model_states.len());
    for s in model_states {
        match fobj.map.get(s) {
            Some(Value::String(text)) => texts.push((text.clone(), fobj.at(s))),
            Some(Value::Number(x)) => texts.push((x.to_string(), fobj.at(s))),
            Some(other) => {
                errs.push(
                    &fobj.at(s),
                    format!("expected a formula string, found {}", kind_of(other)),
                );
                texts.push(("0".into(), fobj.at(s)));
            }
            None => texts.push((
                if kind == "rates" {
                    "0".into()
                } else {
                    s.clone()
                },
                fobj.at(s),
            )),
        }
    }
    let sources: Vec<Source> = texts
        .iter()
        .map(|(t, p)| Source {
            text: t,
            pointer: p.clone(),
        })
        .collect();
    let slot_names = if kind == "rates" { slots } else { next_slots };
    match Program::compile(&sources, slot_names, consts, flimits) {
        Ok(p) if kind == "rates" => Some(rates_or_affine(p, n, nu)),
        Ok(p) => Some(Dynamics::Next(p)),
        Err(list) => {
            push_formula_errors(errs, list);
            None
        }
    }
}

/// Rates that are affine in states and inputs with constant coefficients (no `t`, no
/// product of two states, ...) become a continuous linear model `x' = A x + B u + c`,
/// which is discretised exactly (Van Loan) instead of integrated: no integration error,
/// and the discretisation of a repeated gap is computed once. Anything else stays as
/// rates. Slots of `p` are `[x (n), u (nu), t]`.
fn rates_or_affine(p: Program, n: usize, nu: usize) -> Dynamics {
    let cols = n + nu;
    let Some(form) = p.affine_form(cols) else {
        return Dynamics::Rates(p);
    };
    let n_model = p.outputs();
    let mut a = DMatrix::zeros(n, n);
    let mut b = DMatrix::zeros(n, nu);
    let mut offset = DVector::zeros(n);
    for k in 0..n_model {
        let row = &form.jacobian[k * cols..(k + 1) * cols];
        for j in 0..n {
            a[(k, j)] = row[j];
        }
        for j in 0..nu {
            b[(k, j)] = row[n + j];
        }
        offset[k] = form.offset[k];
    }
    Dynamics::Linear {
        time: LinearTime::Continuous,
        matrix: a,
        b,
        offset,
    }
}

fn linear(
    v: &Value,
    ptr: &str,
    n_model: usize,
    n: usize,
    nu: usize,
    errs: &mut Errors,
) -> Option<Dynamics> {
    let obj = Obj::new(v, ptr, errs)?;
    let time = obj
        .required("time", errs)
        .and_then(|t| string(t, &obj.at("time"), errs));
    let (time, key) = match time? {
        "continuous" => {
            obj.deny_unknown(&["time", "A", "B"], errs);
            (LinearTime::Continuous, "A")
        }
        "discrete" => {
            obj.deny_unknown(&["time", "F", "B", "dt"], errs);
            let dt = obj
                .required("dt", errs)
                .and_then(|d| positive(d, &obj.at("dt"), "dt", errs))?;
            (LinearTime::Discrete { dt }, "F")
        }
        other => {
            errs.push(
                &obj.at("time"),
                format!("time must be \"continuous\" or \"discrete\", found \"{other}\""),
            );
            return None;
        }
    };
    let core = obj
        .required(key, errs)
        .and_then(|m| matrix(m, &obj.at(key), n_model, n_model, errs))?;
    let b = match obj.get("B") {
        Some(bv) => matrix(bv, &obj.at("B"), n_model, nu, errs)?,
        None => vec![0.0; n_model * nu],
    };
    // Estimated parameters: zero rate (continuous) or identity map (discrete).
    let mut m = DMatrix::zeros(n, n);
    for i in 0..n_model {
        for j in 0..n_model {
            m[(i, j)] = core[i * n_model + j];
        }
    }
    if matches!(time, LinearTime::Discrete { .. }) {
        for i in n_model..n {
            m[(i, i)] = 1.0;
        }
    }
    let mut bm = DMatrix::zeros(n, nu);
    for i in 0..n_model {
        for j in 0..nu {
            bm[(i, j)] = b[i * nu + j];
        }
    }
    Some(Dynamics::Linear {
        time,
        matrix: m,
        b: bm,
        offset: DVector::zeros(n),
    })
}

fn process_noise(
    v: Option<&Value>,
    ptr: &str,
    dynamics: &Dynamics,
    model_states: &[String],
    n_model: usize,
    estimated: &[EstimatedParameter],
    errs: &mut Errors,
) -> Option<ProcessNoise> {
    let n = n_model + estimated.len();
    let continuous = dynamics.is_continuous();
    let mut q = DMatrix::zeros(n, n);
    if let Some(v) = v {
        let obj = Obj::new(v, ptr, errs)?;
        obj.deny_unknown(&["density", "density_matrix", "covariance"], errs);
        let given: Vec<&str> = ["density", "density_matrix", "covariance"]
            .into_iter()
            .filter(|k| obj.get(k).is_some())
            .collect();
        if given.len() > 1 {
            errs.push(
                ptr,
                format!(
                    "give one of density, density_matrix or covariance, not {}",
                    given.join(" and ")
                ),
            );
            return None;
        }
        match given.first().copied() {
            Some(k @ ("density" | "density_matrix")) if !continuous => {
                errs.push(&obj.at(k), "a discrete-time model takes process_noise.covariance (per step), not a density");
                return None;
            }
            Some("covariance") if continuous => {
                errs.push(&obj.at("covariance"), "a continuous-time model takes process_noise.density or density_matrix (variance per unit time), not a per-step covariance");
                return None;
            }
            Some("density") => {
                let d = obj.object("density", errs)?;
                for (k, x) in d.map {
                    let p = d.at(k);
                    match model_states.iter().position(|s| s == k) {
                        Some(i) => {
                            if let Some(x) = non_negative(x, &p, "density", errs) {
                                q[(i, i)] = x;
                            }
                        }
                        None => errs.push(
                            &p,
                            format!(
                                "'{k}' is not a model state; states are {}",
                                names_list(model_states)
                            ),
                        ),
                    }
                }
            }
            Some(k @ ("density_matrix" | "covariance")) => {
                let kp = obj.at(k);
                let vals = matrix(obj.get(k)?, &kp, n_model, n_model, errs)?;
                let mut m = DMatrix::from_row_slice(n_model, n_model, &vals);
                if !check_covariance(&mut m, &kp, false, errs) {
                    return None;
                }
                q.view_mut((0, 0), (n_model, n_model)).copy_from(&m);
            }
            _ => {}
        }
    }
    let mut drift = DVector::zeros(n);
    for (k, p) in estimated.iter().enumerate() {
        drift[n_model + k] = p.drift;
    }
    Some(if continuous {
        for i in n_model..n {
            q[(i, i)] = drift[i];
        }
        ProcessNoise::Density(q)
    } else {
        ProcessNoise::PerStep { q, drift }
    })
}

fn sensors(
    v: &Value,
    ptr: &str,
    slots: &[&str],
    consts: &[(&str, f64)],
    flimits: &FormulaLimits,
    limits: &Limits,
    errs: &mut Errors,
) -> Vec<Sensor> {
    let Some(obj) = Obj::new(v, ptr, errs) else {
        return Vec::new();
    };
    if obj.map.is_empty() {
        errs.push(ptr, "a model needs at least one sensor");
    }
    if obj.map.len() > limits.max_sensors {
        errs.push(
            ptr,
            format!(
                "{} sensors exceed the limit of {}",
                obj.map.len(),
                limits.max_sensors
            ),
        );
        return Vec::new();
    }
    let mut out = Vec::with_capacity(obj.map.len());
    for (name, sv) in obj.map {
        let sp = obj.at(name);
        if !is_identifier(name) {
            errs.push(&sp, format!("sensor name '{name}' must start with a letter or '_' and hold only letters, digits and '_'"));
        }
        let Some(so) = Obj::new(sv, &sp, errs) else {
            continue;
        };
        so.deny_unknown(&["measures", "std", "covariance"], errs);
        let mp = so.at("measures");
        let texts: Vec<(String, String)> = match so.required("measures", errs) {
            Some(Value::String(s)) => vec![(s.clone(), mp.clone())],
            Some(Value::Array(items)) if !items.is_empty() => items
                .iter()
                .enumerate()
                .filter_map(|(i, it)| {
                    string(it, &index(&mp, i), errs).map(|s| (s.to_string(), index(&mp, i)))
                })
                .collect(),
            Some(Value::Array(_)) => {
                errs.push(&mp, "a vector sensor needs at least one formula");
                continue;
            }
            Some(other) => {
                errs.push(
                    &mp,
                    format!(
                        "expected a formula string or a list of them, found {}",
                        kind_of(other)
                    ),
                );
                continue;
            }
            None => continue,
        };
        let dim = texts.len();
        let r = sensor_noise(&so, dim, errs);
        let sources: Vec<Source> = texts
            .iter()
            .map(|(t, p)| Source {
                text: t,
                pointer: p.clone(),
            })
            .collect();
        let program = match Program::compile(&sources, slots, consts, flimits) {
            Ok(p) => p,
            Err(list) => {
                push_formula_errors(errs, list);
                continue;
            }
        };
        if let Some(r) = r {
            // Slots are [x, u, t]: affine in states and inputs, never reading t.
            let affine = program.affine_form(slots.len() - 1);
            out.push(Sensor {
                name: name.clone(),
                program,
                dim,
                r,
                affine,
            });
        }
    }
    out
}

/// A sensor's noise covariance from `std` (scalar or list) or `covariance`.
fn sensor_noise(so: &Obj<'_>, dim: usize, errs: &mut Errors) -> Option<DMatrix<f64>> {
    match (so.get("std"), so.get("covariance")) {
        (Some(_), Some(_)) => {
            errs.push(&so.ptr, "give the noise as std or as covariance, not both");
            None
        }
        (None, None) => {
            errs.push(&so.at("std"), "missing noise: give std (or covariance)");
            None
        }
        (Some(s), None) => std_to_cov(s, &so.at("std"), dim, errs),
        (None, Some(c)) => {
            let cp = so.at("covariance");
            let vals = matrix(c, &cp, dim, dim, errs)?;
            let mut m = DMatrix::from_row_slice(dim, dim, &vals);
            check_covariance(&mut m, &cp, true, errs).then_some(m)
        }
    }
}

/// Noise std (a number, or one per component) as a diagonal covariance.
pub fn std_to_cov(v: &Value, ptr: &str, dim: usize, errs: &mut Errors) -> Option<DMatrix<f64>> {
    let mut r = DMatrix::zeros(dim, dim);
    match v {
        Value::Array(items) => {
            if items.len() != dim {
                errs.push(
                    ptr,
                    format!(
                        "expected {dim} std values (one per component), found {}",
                        items.len()
                    ),
                );
                return None;
            }
            let mut ok = true;
            for (i, x) in items.iter().enumerate() {
                match positive(x, &index(ptr, i), "std", errs) {
                    Some(s) => r[(i, i)] = s * s,
                    None => ok = false,
                }
            }
            ok.then_some(r)
        }
        other => {
            let s = positive(other, ptr, "std", errs)?;
            for i in 0..dim {
                r[(i, i)] = s * s;
            }
            Some(r)
        }
    }
}

/// Parse and check the `filter` section.
pub fn filter(v: &Value, ptr: &str, limits: &Limits) -> Result<FilterConfig, Vec<FieldError>> {
    let mut errs = Errors::default();
    let Some(obj) = Obj::new(v, ptr, &mut errs) else {
        return Err(errs.into_vec());
    };
    obj.deny_unknown(
        &["method", "unscented", "ensemble", "integration", "gate"],
        &mut errs,
    );
    let method = match obj
        .required("method", &mut errs)
        .and_then(|m| string(m, &obj.at("method"), &mut errs))
    {
        Some("ekf") => Some(Method::Ekf),
        Some("ukf") => Some(Method::Ukf),
        Some("enkf") => Some(Method::Enkf),
        Some(other) => {
            errs.push(
                &obj.at("method"),
                format!("unknown method '{other}'; methods are ekf, ukf, enkf"),
            );
            None
        }
        None => None,
    };
    let mut unscented = Unscented {
        alpha: 1.0,
        beta: 2.0,
        kappa: 0.0,
    };
    if let Some(u) = obj.object("unscented", &mut errs) {
        u.deny_unknown(&["alpha", "beta", "kappa"], &mut errs);
        if let Some(a) = u.get("alpha") {
            unscented.alpha = positive(a, &u.at("alpha"), "alpha", &mut errs).unwrap_or(1.0);
        }
        if let Some(b) = u.get("beta") {
            unscented.beta = non_negative(b, &u.at("beta"), "beta", &mut errs).unwrap_or(2.0);
        }
        if let Some(k) = u.number("kappa", &mut errs) {
            unscented.kappa = k;
        }
    }
    let mut ensemble = Ensemble {
        members: 64,
        seed: 0,
        inflation: 1.0,
        update: EnsembleUpdate::Perturbed,
    };
    if let Some(e) = obj.object("ensemble", &mut errs) {
        e.deny_unknown(&["members", "seed", "inflation", "update"], &mut errs);
        if let Some(m) = e.get("members") {
            if let Some(m) = whole(m, &e.at("members"), &mut errs) {
                if m < 2 {
                    errs.push(
                        &e.at("members"),
                        format!("an ensemble needs at least 2 members, got {m}"),
                    );
                } else if m as usize > limits.max_members || m > u32::MAX as u64 {
                    errs.push(
                        &e.at("members"),
                        format!("{m} members exceed the limit of {}", limits.max_members),
                    );
                } else {
                    ensemble.members = m as usize;
                }
            }
        }
        if let Some(s) = e.get("seed") {
            ensemble.seed = whole(s, &e.at("seed"), &mut errs).unwrap_or(0);
        }
        if let Some(i) = e.get("inflation") {
            match number(i, &e.at("inflation"), &mut errs) {
                Some(x) if (1.0..=10.0).contains(&x) => ensemble.inflation = x,
                Some(x) => errs.push(
                    &e.at("inflation"),
                    format!("inflation must lie in [1, 10], got {x}"),
                ),
                None => {}
            }
        }
        match e.string("update", &mut errs) {
            Some("perturbed") | None => {}
            Some("deterministic") => ensemble.update = EnsembleUpdate::Deterministic,
            Some(other) => errs.push(
                &e.at("update"),
                format!("update must be \"perturbed\" or \"deterministic\", found \"{other}\""),
            ),
        }
    }
    let mut integration = Integration {
        max_step: f64::INFINITY,
        rtol: 1e-6,
        atol: 1e-9,
        fixed_step: None,
    };
    if let Some(i) = obj.object("integration", &mut errs) {
        i.deny_unknown(&["max_step", "rtol", "atol", "fixed_step"], &mut errs);
        if let Some(x) = i.get("max_step") {
            integration.max_step =
                positive(x, &i.at("max_step"), "max_step", &mut errs).unwrap_or(f64::INFINITY);
        }
        if let Some(x) = i.get("rtol") {
            match positive(x, &i.at("rtol"), "rtol", &mut errs) {
                Some(r) if (1e-13..=1e-2).contains(&r) => integration.rtol = r,
                Some(r) => errs.push(
                    &i.at("rtol"),
                    format!("rtol must lie in [1e-13, 1e-2], got {r}"),
                ),
                None => {}
            }
        }
        if let Some(x) = i.get("atol") {
            integration.atol = positive(x, &i.at("atol"), "atol", &mut errs).unwrap_or(1e-9);
        }
        if let Some(x) = i.get("fixed_step") {
            integration.fixed_step = positive(x, &i.at("fixed_step"), "fixed_step", &mut errs);
        }
    }
    let mut gate = None;
    if let Some(g) = obj.object("gate", &mut errs) {
        g.deny_unknown(&["probability"], &mut errs);
        match g.required_number("probability", &mut errs) {
            Some(p) if p > 0.0 && p < 1.0 => gate = Some(p),
            Some(p) => errs.push(
                &g.at("probability"),
                format!("probability must lie strictly between 0 and 1, got {p}"),
            ),
            None => {}
        }
    }
    match method {
        Some(method) if errs.is_empty() => Ok(FilterConfig {
            method,
            unscented,
            ensemble,
            integration,
            gate,
        }),
        _ => Err(errs.into_vec()),
    }
}

/// Parse a time value (number of seconds or RFC 3339 string), enforcing one form per request.
pub fn time_value(
    v: &Value,
    ptr: &str,
    mode: &mut Option<TimeMode>,
    errs: &mut Errors,
) -> Option<Instant> {
    let (inst, m) = match v {
        Value::Number(_) => (Instant::seconds(number(v, ptr, errs)?), TimeMode::Seconds),
        Value::String(s) => match Instant::parse_rfc3339(s) {
            Ok(i) => (i, TimeMode::Stamp),
            Err(e) => {
                errs.push(ptr, e);
                return None;
            }
        },
        other => {
            errs.push(
                ptr,
                format!(
                    "expected seconds (a number) or an RFC 3339 timestamp, found {}",
                    kind_of(other)
                ),
            );
            return None;
        }
    };
    match mode {
        None => *mode = Some(m),
        Some(prev) if *prev != m => {
            errs.push(
                ptr,
                "one request uses one time form: all numbers (seconds) or all RFC 3339 strings",
            );
            return None;
        }
        _ => {}
    }
    Some(inst)
}

/// Parse and check the `prior` section against the model (and the ensemble size).
pub fn prior(
    v: &Value,
    ptr: &str,
    model: &Model,
    cfg: Option<&FilterConfig>,
) -> Result<Prior, Vec<FieldError>> {
    let mut errs = Errors::default();
    let Some(obj) = Obj::new(v, ptr, &mut errs) else {
        return Err(errs.into_vec());
    };
    obj.deny_unknown(
        &[
            "t",
            "mean",
            "std",
            "covariance",
            "members",
            "step",
            "inputs",
        ],
        &mut errs,
    );
    let mut mode = None;
    let t = obj
        .required("t", &mut errs)
        .and_then(|t| time_value(t, &obj.at("t"), &mut mode, &mut errs));
    let n = model.n();
    let nm = model.n_model;

    // Mean: names the model's states, or every state (as a posterior does).
    let mut mean = DVector::zeros(n);
    let mut named = vec![false; n];
    if let Some(mo) = obj
        .required("mean", &mut errs)
        .and_then(|m| Obj::new(m, &obj.at("mean"), &mut errs))
    {
        for (k, x) in mo.map {
            match model.states.iter().position(|s| s == k) {
                Some(i) => {
                    if let Some(x) = number(x, &mo.at(k), &mut errs) {
                        mean[i] = x;
                        named[i] = true;
                    }
                }
                None => mo_unknown(&mo, k, &model.states, &mut errs),
            }
        }
        for (i, s) in model.states.iter().enumerate().take(nm) {
            if !named[i] && mo.map.get(s).is_none() {
                errs.push(&mo.at(s), format!("missing prior mean of state '{s}'"));
            }
        }
    }
    let all_named = named.iter().all(|x| *x);
    let dim = if all_named { n } else { nm };
    if !all_named && named[nm..].iter().any(|x| *x) {
        errs.push(&obj.at("mean"), "name either the model's states only (parameters start from their initial values) or every state");
    }
    for (k, p) in model.estimated.iter().enumerate() {
        if !all_named {
            mean[nm + k] = p.initial;
        }
    }

    let mut cov = DMatrix::zeros(n, n);
    match (obj.get("std"), obj.get("covariance")) {
        (Some(_), Some(_)) => errs.push(
            ptr,
            "give the prior spread as std or as covariance, not both",
        ),
        (None, None) => errs.push(
            &obj.at("std"),
            "missing prior spread: give std (or covariance)",
        ),
        (Some(sv), None) => {
            if let Some(so) = Obj::new(sv, &obj.at("std"), &mut errs) {
                for (k, x) in so.map {
                    match model.states.iter().position(|s| s == k) {
                        Some(i) if i < dim => {
                            if let Some(x) = non_negative(x, &so.at(k), "std", &mut errs) {
                                cov[(i, i)] = x * x;
                            }
                        }
                        Some(_) => errs.push(&so.at(k), format!("'{k}' is an estimated parameter; its prior comes from the model unless the mean names every state")),
                        None => mo_unknown(&so, k, &model.states, &mut errs),
                    }
                }
                for s in model.states.iter().take(dim) {
                    if so.map.get(s).is_none() {
                        errs.push(&so.at(s), format!("missing prior std of state '{s}'"));
                    }
                }
            }
        }
        (None, Some(cv)) => {
            let cp = obj.at("covariance");
            if let Some(vals) = matrix(cv, &cp, dim, dim, &mut errs) {
                let mut m = DMatrix::from_row_slice(dim, dim, &vals);
                if check_covariance(&mut m, &cp, false, &mut errs) {
                    cov.view_mut((0, 0), (dim, dim)).copy_from(&m);
                }
            }
        }
    }
    if !all_named {
        for (k, p) in model.estimated.iter().enumerate() {
            cov[(nm + k, nm + k)] = p.std * p.std;
        }
    }

    let mut inputs = DVector::zeros(model.nu());
    if let Some(io) = obj.object("inputs", &mut errs) {
        for (k, x) in io.map {
            match model.input_index(k) {
                Some(i) => {
                    if let Some(x) = number(x, &io.at(k), &mut errs) {
                        inputs[i] = x;
                    }
                }
                None => mo_unknown(&io, k, &model.inputs, &mut errs),
            }
        }
    }

    let step = obj
        .get("step")
        .and_then(|s| whole(s, &obj.at("step"), &mut errs))
        .unwrap_or(0);
    let mut members = None;
    if let Some(mv) = obj.get("members") {
        let mp = obj.at("members");
        match cfg {
            Some(c) if c.method == Method::Enkf => {
                let want = c.ensemble.members;
                if let Some(vals) = matrix(mv, &mp, want, n, &mut errs) {
                    // Members are rows: `members × n`, stored column-major for batch evaluation.
                    members = Some(DMatrix::from_row_slice(want, n, &vals));
                }
            }
            _ => errs.push(&mp, "members belong to an ensemble (enkf) prior"),
        }
    }
    match t {
        Some(t) if errs.is_empty() => Ok(Prior {
            t,
            mode: mode.unwrap_or(TimeMode::Seconds),
            mean,
            cov,
            members,
            step,
            inputs,
        }),
        _ => Err(errs.into_vec()),
    }
}

fn mo_unknown(o: &Obj<'_>, k: &str, known: &[String], errs: &mut Errors) {
    errs.push(
        &child(&o.ptr, k),
        format!("unknown name '{k}'; known names are {}", names_list(known)),
    );
}

/// Parse the optional `output` section.
pub fn output(
    v: Option<&Value>,
    ptr: &str,
    mode: TimeMode,
) -> Result<OutputConfig, Vec<FieldError>> {
    let mut errs = Errors::default();
    let mut out = OutputConfig::default();
    let Some(v) = v.filter(|v| !v.is_null()) else {
        return Ok(out);
    };
    let Some(obj) = Obj::new(v, ptr, &mut errs) else {
        return Err(errs.into_vec());
    };
    obj.deny_unknown(&["covariance", "innovations", "at"], &mut errs);
    match obj.string("covariance", &mut errs) {
        Some("full") | None => {}
        Some("std") => out.covariance = CovarianceOutput::Std,
        Some("none") => out.covariance = CovarianceOutput::None,
        Some(other) => errs.push(
            &obj.at("covariance"),
            format!("covariance must be \"full\", \"std\" or \"none\", found \"{other}\""),
        ),
    }
    match obj.get("innovations") {
        Some(Value::Bool(b)) => out.innovations = *b,
        Some(other) => errs.push(
            &obj.at("innovations"),
            format!("expected true or false, found {}", kind_of(other)),
        ),
        None => {}
    }
    if let Some(at) = obj.get("at") {
        let ap = obj.at("at");
        if let Some(items) = array(at, &ap, &mut errs) {
            let mut m = Some(mode);
            for (i, x) in items.iter().enumerate() {
                if let Some(t) = time_value(x, &index(&ap, i), &mut m, &mut errs) {
                    if let Some(prev) = out.at.last() {
                        if prev.is_after(&t, mode) {
                            errs.push(&index(&ap, i), "times in at must not decrease");
                        }
                    }
                    out.at.push(t);
                }
            }
        }
    }
    if errs.is_empty() {
        Ok(out)
    } else {
        Err(errs.into_vec())
    }
}
