//! The `prior` section: where a run starts (time, mean, spread, held inputs and, to resume
//! an ensemble, its members), checked against the model.

use super::common::{
    check_covariance, finite, matrix, non_negative, number, optional, present, required, time,
    typed, unknown_fields, whole,
};
use crate::model::{FilterConfig, Method, Model, Prior, Running};
use crate::model::{TimeMode, Zone};
use crate::problem::FieldError;
use crate::request::error::{SpecError, SpecErrorKind, SpecErrors};
use crate::request::raw::{self, Entries, Field, RawPrior, RawRunning};
use crate::request::reader::child;
use nalgebra::{DMatrix, DVector};
use serde_json::Value;

/// Parse and check the `prior` section at `ptr` against the model (and, for members, the
/// ensemble size), reporting every fault found as the problem document's field errors.
pub fn prior(
    v: &Value,
    ptr: &str,
    model: &Model,
    cfg: Option<&FilterConfig>,
) -> Result<Prior, Vec<FieldError>> {
    prior_in(v, ptr, model, cfg, &Zone::none())
}

/// [`prior`] for a request with a `time_zone`: an offset-less `t` is read in `zone`.
pub fn prior_in(
    v: &Value,
    ptr: &str,
    model: &Model,
    cfg: Option<&FilterConfig>,
    zone: &Zone,
) -> Result<Prior, Vec<FieldError>> {
    check_prior_in(v, ptr, model, cfg, zone)
        .map_err(|e| e.into_iter().map(FieldError::from).collect())
}

/// [`prior`] with typed errors.
pub fn check_prior(
    v: &Value,
    ptr: &str,
    model: &Model,
    cfg: Option<&FilterConfig>,
) -> Result<Prior, Vec<SpecError>> {
    check_prior_in(v, ptr, model, cfg, &Zone::none())
}

/// [`prior_in`] with typed errors.
pub fn check_prior_in(
    v: &Value,
    ptr: &str,
    model: &Model,
    cfg: Option<&FilterConfig>,
    zone: &Zone,
) -> Result<Prior, Vec<SpecError>> {
    let mut errs = SpecErrors::default();
    let section = raw::section::<RawPrior>(v);
    let prior =
        typed(&section, ptr, &mut errs).and_then(|p| checked(p, ptr, model, cfg, zone, &mut errs));
    match prior {
        Some(p) if errs.is_empty() => Ok(p),
        _ => Err(errs.into_vec()),
    }
}

/// An entry naming nothing in `known`.
fn unknown_name(ptr: &str, k: &str, known: &[String], errs: &mut SpecErrors) {
    errs.push(
        child(ptr, k),
        SpecErrorKind::UnknownName {
            name: k.to_string(),
            known: known.to_vec(),
        },
    );
}

fn checked(
    p: &RawPrior,
    ptr: &str,
    model: &Model,
    cfg: Option<&FilterConfig>,
    zone: &Zone,
    errs: &mut SpecErrors,
) -> Option<Prior> {
    unknown_fields(&p.unknown, ptr, RawPrior::KNOWN, &[], errs);
    let at = |k: &str| child(ptr, k);
    let mut mode = None;
    let t = present(&p.t, ptr, "t", errs).and_then(|t| time(t, &at("t"), &mut mode, zone, errs));
    let n = model.n();
    let nm = model.n_model;

    // Mean: names the model's states, or every state (as a posterior does).
    let mut mean = DVector::zeros(n);
    let mut named = vec![false; n];
    let mp = at("mean");
    if let Some(mo) = required(&p.mean, ptr, "mean", errs) {
        for (k, x) in &mo.0 {
            match model.states.iter().position(|s| s == k) {
                Some(i) => {
                    if let Some(x) = number(x, &child(&mp, k), errs) {
                        mean[i] = x;
                        named[i] = true;
                    }
                }
                None => unknown_name(&mp, k, &model.states, errs),
            }
        }
        for (i, s) in model.states.iter().enumerate().take(nm) {
            if !named[i] && mo.get(s).is_none() {
                errs.push(
                    child(&mp, s),
                    SpecErrorKind::MissingState {
                        what: "mean",
                        state: s.clone(),
                    },
                );
            }
        }
    }
    // A bounded parameter's mean (a posterior sent back) lies inside its bounds: the
    // filters keep it there. The slack admits the rounding of an ensemble mean over members
    // on a bound. Model states' bounds are only watched, so their means are not checked:
    // a posterior whose state left its bounds must still continue.
    for i in nm..n {
        let (b, x) = (model.bounds[i], mean[i]);
        let slack = 1e-12 * x.abs();
        if named[i] && (x < b.min - slack || x > b.max + slack) {
            errs.push(
                child(&mp, &model.states[i]),
                SpecErrorKind::OutsideBounds {
                    what: "mean",
                    value: x,
                    min: b.min,
                    max: b.max,
                },
            );
        }
    }
    let all_named = named.iter().all(|x| *x);
    let dim = if all_named { n } else { nm };
    if !all_named && named[nm..].iter().any(|x| *x) {
        errs.push(&mp, SpecErrorKind::PartialMean);
    }
    for (k, e) in model.estimated.iter().enumerate() {
        if !all_named {
            mean[nm + k] = e.initial;
        }
    }

    let mut cov = DMatrix::zeros(n, n);
    match (&p.std, &p.covariance) {
        (Some(_), Some(_)) => errs.push(
            ptr,
            SpecErrorKind::StdAndCovariance {
                what: "the prior spread",
            },
        ),
        (None, None) => errs.push(
            at("std"),
            SpecErrorKind::NoSpread {
                what: "prior spread",
            },
        ),
        (Some(_), None) => {
            if let Some(so) = optional(&p.std, ptr, "std", errs) {
                spread(so, &at("std"), model, dim, &mut cov, errs);
            }
        }
        (None, Some(cv)) => {
            let cp = at("covariance");
            if let Some(vals) = matrix(cv, &cp, dim, dim, errs) {
                let mut m = DMatrix::from_row_slice(dim, dim, &vals);
                if check_covariance(&mut m, &cp, false, errs) {
                    cov.view_mut((0, 0), (dim, dim)).copy_from(&m);
                }
            }
        }
    }
    if !all_named {
        for (k, e) in model.estimated.iter().enumerate() {
            cov[(nm + k, nm + k)] = e.std * e.std;
        }
    }

    let mut inputs = DVector::zeros(model.nu());
    let ip = at("inputs");
    if let Some(io) = optional(&p.inputs, ptr, "inputs", errs) {
        for (k, x) in &io.0 {
            match model.input_index(k) {
                Some(i) => {
                    if let Some(x) = number(x, &child(&ip, k), errs) {
                        inputs[i] = x;
                    }
                }
                None => unknown_name(&ip, k, &model.inputs, errs),
            }
        }
    }

    let step = p
        .step
        .as_ref()
        .and_then(|s| whole(s, &at("step"), errs))
        .unwrap_or(0);
    let mut members = None;
    if let Some(mv) = &p.members {
        let mp = at("members");
        match cfg {
            Some(c) if c.method == Method::Enkf => {
                let want = c.ensemble.members;
                if let Some(vals) = matrix(mv, &mp, want, n, errs) {
                    // Members are rows: `members × n`, stored column-major for batch evaluation.
                    members = Some(DMatrix::from_row_slice(want, n, &vals));
                }
            }
            _ => errs.push(&mp, SpecErrorKind::MembersWithoutEnsemble),
        }
    }
    let mut in_a_row = vec![0; model.sensors.len()];
    let running = optional(&p.running, ptr, "running", errs)
        .map(|r| running(r, model, &at("running"), &mut in_a_row, errs))
        .unwrap_or_default();
    Some(Prior {
        running,
        in_a_row,
        t: t?,
        mode: mode.unwrap_or(TimeMode::Seconds),
        mean,
        cov,
        members,
        step,
        inputs,
    })
}

/// `prior.running`, as a posterior wrote it: every field is required (a partial tally
/// would give a verdict over a history it does not describe), counts whole, sums finite,
/// NIS and degrees of freedom not negative, refusals no more than the readings judged,
/// repeated refusals no more than refusals. `in_a_row` names sensors of the model (each
/// run written into `in_a_row` by sensor index).
fn running(
    r: &RawRunning,
    model: &Model,
    ptr: &str,
    in_a_row: &mut [u64],
    errs: &mut SpecErrors,
) -> Running {
    unknown_fields(&r.unknown, ptr, RawRunning::KNOWN, &[], errs);
    let at = |k: &str| child(ptr, k);
    let count = |f: &Option<Field<u64>>, k: &str, errs: &mut SpecErrors| {
        required(f, ptr, k, errs).copied().unwrap_or(0)
    };
    let sum = |f: &Option<Field<f64>>, k: &str, errs: &mut SpecErrors| {
        required(f, ptr, k, errs)
            .and_then(|x| finite(*x, &at(k), errs))
            .unwrap_or(0.0)
    };
    let out = Running {
        readings: count(&r.readings, "readings", errs),
        nis_sum: sum(&r.nis_sum, "nis_sum", errs),
        dof_sum: count(&r.dof_sum, "dof_sum", errs),
        log_likelihood: sum(&r.log_likelihood, "log_likelihood", errs),
        judged: count(&r.judged, "judged", errs),
        refused: count(&r.refused, "refused", errs),
        refused_again: count(&r.refused_again, "refused_again", errs),
    };
    if let Some(runs) = required(&r.in_a_row, ptr, "in_a_row", errs) {
        let rp = at("in_a_row");
        for (k, v) in &runs.0 {
            let kp = child(&rp, k);
            match model.sensor_index(k) {
                Some(i) => {
                    if let Some(v) = whole(v, &kp, errs) {
                        in_a_row[i] = v;
                    }
                }
                None => {
                    let known: Vec<String> = model.sensors.iter().map(|s| s.name.clone()).collect();
                    unknown_name(&rp, k, &known, errs);
                }
            }
        }
    }
    if out.refused_again > out.refused {
        errs.push(
            at("refused_again"),
            SpecErrorKind::OutOfRange {
                what: "refused_again",
                range: "at most running.refused",
                value: out.refused_again as f64,
            },
        );
    }
    if out.nis_sum < 0.0 {
        errs.push(
            at("nis_sum"),
            SpecErrorKind::Negative {
                what: "nis_sum",
                value: out.nis_sum,
            },
        );
    }
    if out.refused > out.judged {
        errs.push(
            at("refused"),
            SpecErrorKind::OutOfRange {
                what: "refused",
                range: "at most running.judged",
                value: out.refused as f64,
            },
        );
    }
    out
}

/// The prior std per state as variances on the diagonal of `cov`, over the first `dim`
/// states (the model's own, or every state when the mean names them all).
fn spread(
    so: &Entries<f64>,
    sp: &str,
    model: &Model,
    dim: usize,
    cov: &mut DMatrix<f64>,
    errs: &mut SpecErrors,
) {
    for (k, x) in &so.0 {
        let p = child(sp, k);
        match model.states.iter().position(|s| s == k) {
            Some(i) if i < dim => {
                if let Some(x) = non_negative(x, &p, "std", errs) {
                    cov[(i, i)] = x * x;
                }
            }
            Some(_) => errs.push(
                &p,
                SpecErrorKind::ParameterSpread {
                    name: k.to_string(),
                },
            ),
            None => unknown_name(sp, k, &model.states, errs),
        }
    }
    for s in model.states.iter().take(dim) {
        if so.get(s).is_none() {
            errs.push(
                child(sp, s),
                SpecErrorKind::MissingState {
                    what: "std",
                    state: s.clone(),
                },
            );
        }
    }
}

#[cfg(test)]
mod tests {
    use super::super::common::{faults, pairs};
    use super::super::filter::check_filter;
    use super::super::model::check_model;
    use super::*;
    use crate::config::Limits;
    use serde_json::json;

    /// A bottling conveyor: belt position and speed, the belt's slip factor estimated.
    fn conveyor() -> Model {
        check_model(
            &json!({"states": ["pos", "speed"], "inputs": ["drive"],
                    "parameters": {"slip": {"initial": 0.9, "std": 0.1}},
                    "dynamics": {"rates": {"pos": "slip*speed", "speed": "drive"}},
                    "sensors": {"tacho": {"measures": "speed", "std": 0.1}}}),
            "/model",
            &Limits::default(),
        )
        .unwrap()
    }

    fn check(v: Value) -> Result<Prior, Vec<SpecError>> {
        check_prior(&v, "/prior", &conveyor(), None)
    }

    #[test]
    fn the_model_states_prior_gets_the_parameters_own() {
        let p = check(json!({"t": 2.0, "mean": {"pos": 1.0, "speed": 0.5},
                             "std": {"pos": 0.3, "speed": 0.2}, "inputs": {"drive": 4}, "step": 3}))
        .unwrap();
        assert_eq!(p.mean.as_slice(), [1.0, 0.5, 0.9]);
        // Variances are std * std, the parameter's from the model.
        assert_eq!(p.cov[(0, 0)], 0.3 * 0.3);
        assert_eq!(p.cov[(2, 2)], 0.1 * 0.1);
        assert_eq!((p.inputs[0], p.step, p.t.secs), (4.0, 3, 2.0));
        assert_eq!(p.mode, TimeMode::Seconds);
    }

    #[test]
    fn a_full_covariance_over_every_state_is_symmetrised() {
        let p = check(json!({"t": "2026-03-01T06:00:00Z",
            "mean": {"pos": 1.0, "speed": 0.5, "slip": 0.8},
            "covariance": [[1, 0.1, 0], [0.1000000000001, 1, 0], [0, 0, 0.5]]}))
        .unwrap();
        assert_eq!(p.mode, TimeMode::Stamp);
        assert_eq!(p.mean[2], 0.8);
        assert_eq!(p.cov[(0, 1)].to_bits(), p.cov[(1, 0)].to_bits());
        assert_eq!(p.cov[(2, 2)], 0.5);
    }

    #[test]
    fn every_fault_is_reported_at_its_pointer() {
        let got = faults(check(json!({
            "t": 0, "mean": {"pos": "zero", "slip": 1, "belt": 2},
            "std": {"pos": -1, "slip": 0.1}, "inputs": {"brake": 1},
            "step": 1.5, "members": [[0, 0, 0]], "colour": "red"
        })));
        let want = [
            ("/prior/colour", "unknown field 'colour'; expected one of t, mean, std, covariance, members, step, inputs, running"),
            ("/prior/mean/pos", "expected a number, found a string"),
            ("/prior/mean/belt", "unknown name 'belt'; known names are pos, speed, slip"),
            ("/prior/mean/speed", "missing prior mean of state 'speed'"),
            ("/prior/mean", "name either the model's states only (parameters start from their initial values) or every state"),
            ("/prior/std/pos", "std must not be negative, got -1"),
            ("/prior/std/slip", "'slip' is an estimated parameter; its prior comes from the model unless the mean names every state"),
            ("/prior/std/speed", "missing prior std of state 'speed'"),
            ("/prior/inputs/brake", "unknown name 'brake'; known names are drive"),
            ("/prior/step", "expected a whole number ≥ 0, found 1.5"),
            ("/prior/members", "members belong to an ensemble (enkf) prior"),
        ];
        assert_eq!(got, pairs(&want));
    }

    #[test]
    fn the_spread_is_given_one_way() {
        assert_eq!(
            faults(check(json!({"t": 0, "mean": {"pos": 0, "speed": 0}}))),
            [(
                "/prior/std".into(),
                "missing prior spread: give std (or covariance)".into()
            )]
        );
        assert_eq!(
            faults(check(
                json!({"mean": {"pos": 0, "speed": 0}, "std": {"pos": 1, "speed": 1},
                                "covariance": [[1, 0], [0, 1]]})
            )),
            [
                ("/prior/t".into(), "missing required field 't'".into()),
                (
                    "/prior".into(),
                    "give the prior spread as std or as covariance, not both".into()
                ),
            ]
        );
    }

    #[test]
    fn ensemble_members_are_rows_of_every_state() {
        let cfg = check_filter(
            &json!({"method": "enkf", "ensemble": {"members": 2}}),
            "/filter",
            &Limits::default(),
        )
        .unwrap();
        let v = json!({"t": 0, "mean": {"pos": 0, "speed": 0}, "std": {"pos": 1, "speed": 1},
                       "members": [[1, 2, 3], [4, 5, 6]]});
        let p = check_prior(&v, "/prior", &conveyor(), Some(&cfg)).unwrap();
        let m = p.members.unwrap();
        assert_eq!((m.nrows(), m.ncols(), m[(1, 0)]), (2, 3, 4.0));
        let short = json!({"t": 0, "mean": {"pos": 0, "speed": 0}, "std": {"pos": 1, "speed": 1},
                           "members": [[1, 2, 3]]});
        assert_eq!(
            faults(check_prior(&short, "/prior", &conveyor(), Some(&cfg))),
            [("/prior/members".into(), "expected 2 rows, found 1".into())]
        );
    }
}
