//! How the state moves (`model.dynamics`: rates, a discrete map or matrices) and the
//! process noise that goes with it (`model.process_noise`).

use super::common::{
    check_covariance, compile, matrix, non_negative, optional, positive_value, present, required,
    typed, unknown_fields,
};
use crate::formula::{FormulaLimits, Program};
use crate::model::{Dynamics, EstimatedParameter, LinearTime, ProcessNoise};
use crate::request::error::{SpecErrorKind, SpecErrors};
use crate::request::raw::{Entries, Field, FormulaText, RawDynamics, RawLinear, RawProcessNoise};
use crate::request::reader::child;
use nalgebra::{DMatrix, DVector};

/// Check `model.dynamics`. `dims` is `(n, nu)`: all states (estimated parameters
/// included) and inputs; `slots` are the formula variables of rates (`[x, u, t]`) and of
/// a map (`[x, u, t, dt]`).
#[allow(clippy::too_many_arguments)]
pub(super) fn dynamics(
    d: &RawDynamics,
    ptr: &str,
    model_states: &[String],
    (n, nu): (usize, usize),
    (slots, next_slots): (&[&str], &[&str]),
    consts: &[(&str, f64)],
    flimits: &FormulaLimits,
    errs: &mut SpecErrors,
) -> Option<Dynamics> {
    let given = forms_given([
        ("rates", d.rates.is_some()),
        ("next", d.next.is_some()),
        ("linear", d.linear.is_some()),
    ]);
    unknown_fields(&d.unknown, ptr, RawDynamics::KNOWN, &[], errs);
    if given.len() != 1 {
        errs.push(ptr, SpecErrorKind::DynamicsForm { given });
        return None;
    }
    let kind = given[0];
    let kptr = child(ptr, kind);
    let formulas = match kind {
        "rates" => &d.rates,
        "next" => &d.next,
        _ => {
            let l = optional(&d.linear, ptr, "linear", errs)?;
            return linear(l, &kptr, model_states.len(), n, nu, errs);
        }
    };
    let f = optional(formulas, ptr, kind, errs)?;
    formulas_of(
        f,
        kind,
        &kptr,
        model_states,
        n,
        nu,
        (slots, next_slots),
        consts,
        flimits,
        errs,
    )
}

/// The names of the alternative forms a section gives (each paired with whether it is
/// present), for the error when it gives other than one.
fn forms_given<const K: usize>(forms: [(&'static str, bool); K]) -> Vec<&'static str> {
    forms
        .into_iter()
        .filter_map(|(k, present)| present.then_some(k))
        .collect()
}

/// Compile `rates` or `next`: one formula per model state; a state left out keeps rate
/// 0 (rates) or its value (next).
#[allow(clippy::too_many_arguments)]
fn formulas_of(
    f: &Entries<FormulaText>,
    kind: &str,
    kptr: &str,
    model_states: &[String],
    n: usize,
    nu: usize,
    (slots, next_slots): (&[&str], &[&str]),
    consts: &[(&str, f64)],
    flimits: &FormulaLimits,
    errs: &mut SpecErrors,
) -> Option<Dynamics> {
    for (k, _) in &f.0 {
        if !model_states.iter().any(|s| s == k) {
            errs.push(
                child(kptr, k),
                SpecErrorKind::NotAModelState {
                    name: k.to_string(),
                    states: model_states.to_vec(),
                },
            );
        }
    }
    let mut texts: Vec<(String, String)> = Vec::with_capacity(model_states.len());
    for s in model_states {
        let p = child(kptr, s);
        match f.get(s) {
            Some(Field::Ok(FormulaText::Text(text))) => texts.push((text.to_string(), p)),
            Some(Field::Ok(FormulaText::Number(x))) => texts.push((x.to_string(), p)),
            Some(wrong) => {
                typed(wrong, &p, errs);
                texts.push(("0".into(), p));
            }
            None => texts.push((
                if kind == "rates" {
                    "0".into()
                } else {
                    s.clone()
                },
                p,
            )),
        }
    }
    let slot_names = if kind == "rates" { slots } else { next_slots };
    let p = compile(&texts, slot_names, consts, flimits, errs)?;
    Some(if kind == "rates" {
        rates_or_affine(p, n, nu)
    } else {
        Dynamics::Next(p)
    })
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

/// Linear dynamics from matrices over the model's states, widened to all `n` states.
fn linear(
    l: &RawLinear,
    ptr: &str,
    n_model: usize,
    n: usize,
    nu: usize,
    errs: &mut SpecErrors,
) -> Option<Dynamics> {
    let time = required(&l.time, ptr, "time", errs)?;
    let (time, core) = match *time {
        "continuous" => {
            misplaced(
                &[("F", l.f.is_some()), ("dt", l.dt.is_some())],
                ptr,
                RawLinear::CONTINUOUS,
                errs,
            );
            unknown_fields(&l.unknown, ptr, RawLinear::CONTINUOUS, &[], errs);
            (LinearTime::Continuous, ("A", &l.a))
        }
        "discrete" => {
            misplaced(&[("A", l.a.is_some())], ptr, RawLinear::DISCRETE, errs);
            unknown_fields(&l.unknown, ptr, RawLinear::DISCRETE, &[], errs);
            let dt = required(&l.dt, ptr, "dt", errs)
                .and_then(|&dt| positive_value(dt, &child(ptr, "dt"), "dt", errs))?;
            (LinearTime::Discrete { dt }, ("F", &l.f))
        }
        other => {
            errs.push(
                child(ptr, "time"),
                SpecErrorKind::NotAChoice {
                    what: "time",
                    choices: &["continuous", "discrete"],
                    found: other.to_string(),
                },
            );
            return None;
        }
    };
    let (key, core) = core;
    let core = present(core, ptr, key, errs)
        .and_then(|f| matrix(f, &child(ptr, key), n_model, n_model, errs))?;
    let b = match &l.b {
        Some(f) => matrix(f, &child(ptr, "B"), n_model, nu, errs)?,
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

/// Refuse fields of the other time form of linear dynamics (`F` on a continuous model).
fn misplaced(
    fields: &[(&str, bool)],
    ptr: &str,
    known: &'static [&'static str],
    errs: &mut SpecErrors,
) {
    for (k, present) in fields {
        if *present {
            errs.push(
                child(ptr, k),
                SpecErrorKind::UnknownField {
                    name: k.to_string(),
                    known,
                },
            );
        }
    }
}

/// Check `model.process_noise` against the dynamics' time form, adding each estimated
/// parameter's random-walk density on its diagonal.
pub(super) fn process_noise(
    f: Option<&Field<RawProcessNoise>>,
    ptr: &str,
    dynamics: &Dynamics,
    model_states: &[String],
    estimated: &[EstimatedParameter],
    errs: &mut SpecErrors,
) -> Option<ProcessNoise> {
    let n_model = model_states.len();
    let n = n_model + estimated.len();
    let continuous = dynamics.is_continuous();
    let mut q = DMatrix::zeros(n, n);
    if let Some(f) = f {
        let pn = typed(f, ptr, errs)?;
        unknown_fields(&pn.unknown, ptr, RawProcessNoise::KNOWN, &[], errs);
        let given = forms_given([
            ("density", pn.density.is_some()),
            ("density_matrix", pn.density_matrix.is_some()),
            ("covariance", pn.covariance.is_some()),
        ]);
        if given.len() > 1 {
            errs.push(ptr, SpecErrorKind::NoiseForms { given });
            return None;
        }
        match given.first().copied() {
            Some(k @ ("density" | "density_matrix")) if !continuous => {
                errs.push(child(ptr, k), SpecErrorKind::DensityForDiscrete);
                return None;
            }
            Some("covariance") if continuous => {
                errs.push(
                    child(ptr, "covariance"),
                    SpecErrorKind::CovarianceForContinuous,
                );
                return None;
            }
            Some("density") => {
                let dp = child(ptr, "density");
                let d = optional(&pn.density, ptr, "density", errs)?;
                for (k, x) in &d.0 {
                    let p = child(&dp, k);
                    match model_states.iter().position(|s| s == k) {
                        Some(i) => {
                            if let Some(x) = non_negative(x, &p, "density", errs) {
                                q[(i, i)] = x;
                            }
                        }
                        None => errs.push(
                            &p,
                            SpecErrorKind::NotAModelState {
                                name: k.to_string(),
                                states: model_states.to_vec(),
                            },
                        ),
                    }
                }
            }
            Some(k @ ("density_matrix" | "covariance")) => {
                let kp = child(ptr, k);
                let given = if k == "covariance" {
                    &pn.covariance
                } else {
                    &pn.density_matrix
                };
                let vals = matrix(given.as_ref()?, &kp, n_model, n_model, errs)?;
                let mut m = DMatrix::from_row_slice(n_model, n_model, &vals);
                if !check_covariance(&mut m, &kp, false, errs) {
                    return None;
                }
                q.view_mut((0, 0), (n_model, n_model)).copy_from(&m);
            }
            _ => {}
        }
    }
    let mut random_walk = DVector::zeros(n);
    for (k, p) in estimated.iter().enumerate() {
        random_walk[n_model + k] = p.random_walk;
    }
    Some(if continuous {
        for i in n_model..n {
            q[(i, i)] = random_walk[i];
        }
        ProcessNoise::Density(q)
    } else {
        ProcessNoise::PerStep { q, random_walk }
    })
}

#[cfg(test)]
mod tests {
    use super::super::common::faults;
    use super::super::model::check_model;
    use crate::config::Limits;
    use crate::model::{Dynamics, LinearTime, Model, ProcessNoise};
    use serde_json::{json, Value};

    /// A water tower: level and inflow, the level read by a gauge, the outflow
    /// coefficient estimated.
    fn tower(dynamics: Value, noise: Value) -> Value {
        json!({
            "states": ["level", "inflow"],
            "parameters": {"outflow": {"initial": 0.1, "std": 0.05, "random_walk": 1e-6}},
            "dynamics": dynamics, "process_noise": noise,
            "sensors": {"gauge": {"measures": "level", "std": 0.01}}
        })
    }

    fn check(v: &Value) -> Result<Model, Vec<crate::request::error::SpecError>> {
        check_model(v, "/model", &Limits::default())
    }

    #[test]
    fn discrete_matrices_widen_to_parameters_as_identity() {
        let v = tower(
            json!({"linear": {"time": "discrete", "dt": 0.5, "F": [[1, 0.5], [0, 1]]}}),
            json!({"covariance": [[1e-4, 0], [0, 1e-3]]}),
        );
        let m = check(&v).unwrap();
        let Dynamics::Linear { time, matrix, .. } = &m.dynamics else {
            panic!()
        };
        assert_eq!(*time, LinearTime::Discrete { dt: 0.5 });
        assert_eq!((matrix[(0, 1)], matrix[(2, 2)]), (0.5, 1.0));
        let ProcessNoise::PerStep { q, random_walk } = &m.noise else {
            panic!()
        };
        assert_eq!((q[(1, 1)], q[(2, 2)], random_walk[2]), (1e-3, 0.0, 1e-6));
    }

    #[test]
    fn dynamics_take_exactly_one_form() {
        let none = tower(json!({}), json!(null));
        assert_eq!(
            faults(check(&none)),
            [(
                "/model/dynamics".into(),
                "dynamics needs exactly one of rates, next or linear; found none".into()
            )]
        );
        let two = tower(json!({"rates": {}, "next": {}}), json!(null));
        assert_eq!(
            faults(check(&two))[0].1,
            "dynamics needs exactly one of rates, next or linear; found rates, next"
        );
    }

    #[test]
    fn formulas_name_model_states_and_carry_columns() {
        let v = tower(
            json!({"rates": {"level": "inflow - outflw*level", "height": "1", "inflow": true}}),
            json!(null),
        );
        let errs = check_model(&v, "/model", &Limits::default()).unwrap_err();
        let at: Vec<&str> = errs.iter().map(|e| e.pointer.as_str()).collect();
        assert_eq!(
            at,
            [
                "/model/dynamics/rates/height",
                "/model/dynamics/rates/inflow",
                "/model/dynamics/rates/level"
            ]
        );
        assert_eq!(
            errs[0].kind.to_string(),
            "'height' is not a model state; states are level, inflow"
        );
        assert_eq!(
            errs[1].kind.to_string(),
            "expected a formula string, found a boolean"
        );
        let field = crate::problem::FieldError::from(errs[2].clone());
        assert_eq!(field.column, Some(10), "{field:?}");
    }

    #[test]
    fn linear_fields_follow_the_time_form() {
        let v = tower(
            json!({"linear": {"time": "continuous", "A": [[0, 1], [0, 0]], "F": [], "dt": 1}}),
            json!(null),
        );
        let got = faults(check(&v));
        assert_eq!(got.len(), 2, "{got:?}");
        assert_eq!(got[0].0, "/model/dynamics/linear/F");
        assert_eq!(got[0].1, "unknown field 'F'; expected one of time, A, B");
        let v = tower(json!({"linear": {"time": "yearly"}}), json!(null));
        assert_eq!(
            faults(check(&v)),
            [(
                "/model/dynamics/linear/time".into(),
                "time must be \"continuous\" or \"discrete\", found \"yearly\"".into()
            )]
        );
    }

    #[test]
    fn process_noise_matches_the_time_form() {
        let rates = json!({"rates": {"level": "inflow"}});
        let cases = [
            (
                json!({"density": {"level": 1}, "covariance": [[1, 0], [0, 1]]}),
                "/model/process_noise",
                "give one of density, density_matrix or covariance, not density and covariance",
            ),
            (
                json!({"covariance": [[1, 0], [0, 1]]}),
                "/model/process_noise/covariance",
                "a continuous-time model takes process_noise.density or density_matrix \
                 (variance per unit time), not a per-step covariance",
            ),
            (
                json!({"density": {"level": -1}}),
                "/model/process_noise/density/level",
                "density must not be negative, got -1",
            ),
            (
                json!({"density_matrix": [[1, 0.5], [0, 1]]}),
                "/model/process_noise/density_matrix",
                "covariance must be symmetric",
            ),
        ];
        for (noise, at, msg) in cases {
            let got = faults(check(&tower(rates.clone(), noise)));
            assert_eq!(got, [(at.to_string(), msg.to_string())]);
        }
        let discrete = json!({"next": {"level": "level + inflow*dt"}});
        let got = faults(check(&tower(discrete, json!({"density": {"level": 1}}))));
        assert_eq!(
            got,
            [(
                "/model/process_noise/density".into(),
                "a discrete-time model takes process_noise.covariance (per step), not a density"
                    .into()
            )]
        );
    }
}
