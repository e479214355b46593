//! The `filter` section: which filter runs and its settings, each defaulted when absent.

use super::common::{
    non_negative, number, optional, positive, required, typed, unknown_fields, whole,
};
use crate::config::Limits;
use crate::model::{
    Ensemble, EnsembleUpdate, FilterConfig, Integration, LateLines, Method, Unscented,
};
use crate::problem::FieldError;
use crate::request::error::{SpecError, SpecErrorKind, SpecErrors};
use crate::request::raw::{
    self, RawEnsemble, RawFilter, RawGate, RawIntegration, RawReacquire, RawUnscented,
};
use crate::request::reader::child;
use serde_json::Value;

/// Parse and check the `filter` section at `ptr`, reporting every fault found as the
/// problem document's field errors.
pub fn filter(v: &Value, ptr: &str, limits: &Limits) -> Result<FilterConfig, Vec<FieldError>> {
    check_filter(v, ptr, limits).map_err(|e| e.into_iter().map(FieldError::from).collect())
}

/// [`filter`] with typed errors.
pub fn check_filter(v: &Value, ptr: &str, limits: &Limits) -> Result<FilterConfig, Vec<SpecError>> {
    let mut errs = SpecErrors::default();
    let section = raw::section::<RawFilter>(v);
    let cfg = typed(&section, ptr, &mut errs).and_then(|f| checked(f, ptr, limits, &mut errs));
    match cfg {
        Some(c) if errs.is_empty() => Ok(c),
        _ => Err(errs.into_vec()),
    }
}

fn checked(
    f: &RawFilter,
    ptr: &str,
    limits: &Limits,
    errs: &mut SpecErrors,
) -> Option<FilterConfig> {
    unknown_fields(&f.unknown, ptr, RawFilter::KNOWN, &[], errs);
    let method = match required(&f.method, ptr, "method", errs).copied() {
        Some("ekf") => Some(Method::Ekf),
        Some("ukf") => Some(Method::Ukf),
        Some("enkf") => Some(Method::Enkf),
        Some(other) => {
            errs.push(
                child(ptr, "method"),
                SpecErrorKind::UnknownMethod {
                    name: other.to_string(),
                },
            );
            None
        }
        None => None,
    };
    let unscented = optional(&f.unscented, ptr, "unscented", errs)
        .map_or(UNSCENTED, |u| unscented(u, &child(ptr, "unscented"), errs));
    let ensemble = optional(&f.ensemble, ptr, "ensemble", errs).map_or(ENSEMBLE, |e| {
        ensemble(e, &child(ptr, "ensemble"), limits, errs)
    });
    let integration = optional(&f.integration, ptr, "integration", errs).map_or(INTEGRATION, |i| {
        integration(i, &child(ptr, "integration"), errs)
    });
    let gate =
        optional(&f.gate, ptr, "gate", errs).and_then(|g| gate(g, &child(ptr, "gate"), errs));
    let reacquire = optional(&f.reacquire, ptr, "reacquire", errs)
        .and_then(|r| reacquire(r, &child(ptr, "reacquire"), errs));
    if reacquire.is_some() && gate.is_none() {
        errs.push(child(ptr, "reacquire"), SpecErrorKind::ReacquireWithoutGate);
    }
    let late = match optional(&f.late, ptr, "late", errs).copied() {
        Some("reject") | None => LateLines::Reject,
        Some("skip") => LateLines::Skip,
        Some(other) => {
            errs.push(
                child(ptr, "late"),
                SpecErrorKind::NotAChoice {
                    what: "late",
                    choices: &["reject", "skip"],
                    found: other.to_string(),
                },
            );
            LateLines::Reject
        }
    };
    let max_gap = f
        .max_gap
        .as_ref()
        .and_then(|g| positive(g, &child(ptr, "max_gap"), "max_gap", errs));
    Some(FilterConfig {
        method: method?,
        unscented,
        ensemble,
        integration,
        gate,
        reacquire,
        late,
        max_gap,
    })
}

/// The scaled unscented transform's defaults: α = 1, β = 2 (optimal for Gaussians), κ = 0.
const UNSCENTED: Unscented = Unscented {
    alpha: 1.0,
    beta: 2.0,
    kappa: 0.0,
};

/// 64 members, seed 0, no inflation, perturbed-observation update, parameter spread
/// relaxed 80 % of the way back to the forecast spread (`filter::enkf::relax`).
const ENSEMBLE: Ensemble = Ensemble {
    members: 64,
    seed: 0,
    inflation: 1.0,
    update: EnsembleUpdate::Perturbed,
    parameter_relaxation: 0.8,
};

/// Adaptive steps without a cap, rtol 1e-6, atol 1e-9.
const INTEGRATION: Integration = Integration {
    max_step: f64::INFINITY,
    rtol: 1e-6,
    atol: 1e-9,
    fixed_step: None,
};

fn unscented(u: &RawUnscented, ptr: &str, errs: &mut SpecErrors) -> Unscented {
    unknown_fields(&u.unknown, ptr, RawUnscented::KNOWN, &[], errs);
    let mut out = UNSCENTED;
    if let Some(a) = &u.alpha {
        out.alpha = positive(a, &child(ptr, "alpha"), "alpha", errs).unwrap_or(UNSCENTED.alpha);
    }
    if let Some(b) = &u.beta {
        out.beta = non_negative(b, &child(ptr, "beta"), "beta", errs).unwrap_or(UNSCENTED.beta);
    }
    if let Some(k) = u
        .kappa
        .as_ref()
        .and_then(|k| number(k, &child(ptr, "kappa"), errs))
    {
        out.kappa = k;
    }
    out
}

fn ensemble(e: &RawEnsemble, ptr: &str, limits: &Limits, errs: &mut SpecErrors) -> Ensemble {
    unknown_fields(&e.unknown, ptr, RawEnsemble::KNOWN, &[], errs);
    let mut out = ENSEMBLE;
    let mp = child(ptr, "members");
    if let Some(m) = e.members.as_ref().and_then(|m| whole(m, &mp, errs)) {
        if m < 2 {
            errs.push(&mp, SpecErrorKind::TooFewMembers { count: m });
        } else if m as usize > limits.max_members || m > u32::MAX as u64 {
            errs.push(
                &mp,
                SpecErrorKind::OverLimit {
                    what: "members",
                    count: m,
                    limit: limits.max_members,
                },
            );
        } else {
            out.members = m as usize;
        }
    }
    if let Some(s) = &e.seed {
        out.seed = whole(s, &child(ptr, "seed"), errs).unwrap_or(0);
    }
    if let Some(i) = &e.inflation {
        let ip = child(ptr, "inflation");
        match number(i, &ip, errs) {
            Some(x) if (1.0..=10.0).contains(&x) => out.inflation = x,
            Some(x) => errs.push(
                &ip,
                SpecErrorKind::OutOfRange {
                    what: "inflation",
                    range: "in [1, 10]",
                    value: x,
                },
            ),
            None => {}
        }
    }
    if let Some(r) = &e.parameter_relaxation {
        let rp = child(ptr, "parameter_relaxation");
        match number(r, &rp, errs) {
            Some(x) if (0.0..=1.0).contains(&x) => out.parameter_relaxation = x,
            Some(x) => errs.push(
                &rp,
                SpecErrorKind::OutOfRange {
                    what: "parameter_relaxation",
                    range: "in [0, 1]",
                    value: x,
                },
            ),
            None => {}
        }
    }
    match optional(&e.update, ptr, "update", errs).copied() {
        Some("perturbed") | None => {}
        Some("deterministic") => out.update = EnsembleUpdate::Deterministic,
        Some(other) => errs.push(
            child(ptr, "update"),
            SpecErrorKind::NotAChoice {
                what: "update",
                choices: &["perturbed", "deterministic"],
                found: other.to_string(),
            },
        ),
    }
    out
}

fn integration(i: &RawIntegration, ptr: &str, errs: &mut SpecErrors) -> Integration {
    unknown_fields(&i.unknown, ptr, RawIntegration::KNOWN, &[], errs);
    let mut out = INTEGRATION;
    if let Some(x) = &i.max_step {
        out.max_step =
            positive(x, &child(ptr, "max_step"), "max_step", errs).unwrap_or(f64::INFINITY);
    }
    if let Some(x) = &i.rtol {
        let rp = child(ptr, "rtol");
        match positive(x, &rp, "rtol", errs) {
            Some(r) if (1e-13..=1e-2).contains(&r) => out.rtol = r,
            Some(r) => errs.push(
                &rp,
                SpecErrorKind::OutOfRange {
                    what: "rtol",
                    range: "in [1e-13, 1e-2]",
                    value: r,
                },
            ),
            None => {}
        }
    }
    if let Some(x) = &i.atol {
        out.atol = positive(x, &child(ptr, "atol"), "atol", errs).unwrap_or(INTEGRATION.atol);
    }
    if let Some(x) = &i.fixed_step {
        out.fixed_step = positive(x, &child(ptr, "fixed_step"), "fixed_step", errs);
    }
    out
}

fn reacquire(r: &RawReacquire, ptr: &str, errs: &mut SpecErrors) -> Option<u64> {
    unknown_fields(&r.unknown, ptr, RawReacquire::KNOWN, &[], errs);
    let ap = child(ptr, "after");
    let k = *required(&r.after, ptr, "after", errs)?;
    if k == 0 {
        errs.push(&ap, SpecErrorKind::ReacquireAfterZero);
        return None;
    }
    Some(k)
}

fn gate(g: &RawGate, ptr: &str, errs: &mut SpecErrors) -> Option<f64> {
    unknown_fields(&g.unknown, ptr, RawGate::KNOWN, &[], errs);
    let pp = child(ptr, "probability");
    let p = required(&g.probability, ptr, "probability", errs)?;
    let p = super::common::finite(*p, &pp, errs)?;
    if p > 0.0 && p < 1.0 {
        Some(p)
    } else {
        errs.push(
            &pp,
            SpecErrorKind::OutOfRange {
                what: "probability",
                range: "strictly between 0 and 1",
                value: p,
            },
        );
        None
    }
}

#[cfg(test)]
mod tests {
    use super::super::common::{faults, pairs};
    use super::*;
    use serde_json::json;

    fn check(v: Value) -> Result<FilterConfig, Vec<SpecError>> {
        check_filter(&v, "/filter", &Limits::default())
    }

    #[test]
    fn absent_settings_take_their_defaults() {
        let c = check(json!({"method": "ukf"})).unwrap();
        assert_eq!(c.method, Method::Ukf);
        assert_eq!(c.unscented, UNSCENTED);
        assert_eq!(c.ensemble, ENSEMBLE);
        assert_eq!(c.integration, INTEGRATION);
        assert_eq!(c.gate, None);
        let c = check(json!({"method": "enkf",
            "ensemble": {"members": 16, "seed": 7, "inflation": 1.1, "update": "deterministic"},
            "integration": {"fixed_step": 0.01}, "gate": {"probability": 0.99}}))
        .unwrap();
        assert_eq!(
            (c.ensemble.members, c.ensemble.seed, c.ensemble.update),
            (16, 7, EnsembleUpdate::Deterministic)
        );
        assert_eq!((c.integration.fixed_step, c.gate), (Some(0.01), Some(0.99)));
    }

    #[test]
    fn every_fault_is_reported_at_its_pointer() {
        let got = faults(check(json!({
            "method": "kalman",
            "unscented": {"alpha": -1, "beta": "two"},
            "ensemble": {"members": 1, "seed": -2, "inflation": 20, "update": "random"},
            "integration": {"rtol": 0.5, "atol": 0},
            "gate": {"probability": 1.5},
            "smoother": true
        })));
        let want = [
            ("/filter/smoother", "unknown field 'smoother'; expected one of method, unscented, ensemble, integration, gate, reacquire, late, max_gap"),
            ("/filter/method", "unknown method 'kalman'; methods are ekf, ukf, enkf"),
            ("/filter/unscented/alpha", "alpha must be positive, got -1"),
            ("/filter/unscented/beta", "expected a number, found a string"),
            ("/filter/ensemble/members", "an ensemble needs at least 2 members, got 1"),
            ("/filter/ensemble/seed", "expected a whole number ≥ 0, found -2"),
            ("/filter/ensemble/inflation", "inflation must lie in [1, 10], got 20"),
            ("/filter/ensemble/update", "update must be \"perturbed\" or \"deterministic\", found \"random\""),
            ("/filter/integration/rtol", "rtol must lie in [1e-13, 1e-2], got 0.5"),
            ("/filter/integration/atol", "atol must be positive, got 0"),
            ("/filter/gate/probability", "probability must lie strictly between 0 and 1, got 1.5"),
        ];
        assert_eq!(got, pairs(&want));
    }

    #[test]
    fn members_are_held_to_the_server_limit() {
        assert_eq!(
            faults(check(
                json!({"method": "enkf", "ensemble": {"members": 100000000}})
            )),
            [(
                "/filter/ensemble/members".into(),
                "100000000 members exceed the limit of 4096".into()
            )]
        );
        assert_eq!(
            faults(check(json!({}))),
            [(
                "/filter/method".into(),
                "missing required field 'method'".into()
            )]
        );
    }
}
