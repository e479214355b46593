//! `POST /v1/check`: parse the model (and prior, if any), linearise it at the prior mean
//! and answer which states the sensors can recover, with warnings about sensors and
//! inputs that nothing depends on. The rank test itself is
//! [`crate::diagnostics::observability`].

use crate::config::Limits;
use crate::diagnostics::observability::{analyse, jacobians, Observability, Overflow};
use crate::job::{Done, RunStats};
use crate::model::{Dynamics, Halt, Model, Stop};
use crate::problem::{escape_token, FieldError, Problem, ProblemKind};
use crate::request::envelope;
use crate::request::validate;
use nalgebra::{DMatrix, DVector};
use serde::Serialize;

#[derive(Serialize)]
struct CheckResponse {
    states: Vec<String>,
    inputs: Vec<String>,
    sensors: Vec<SensorInfo>,
    dimensions: Dimensions,
    observability: Full,
    warnings: Vec<String>,
}

#[derive(Serialize)]
struct SensorInfo {
    name: String,
    dimension: usize,
}

#[derive(Serialize)]
struct Dimensions {
    states: usize,
    inputs: usize,
    measurement_size: usize,
}

#[derive(Serialize)]
struct Full {
    rank: usize,
    dimension: usize,
    unobservable: Vec<String>,
    at: std::collections::BTreeMap<String, f64>,
    by_sensor: indexmap_like::Ordered,
}

mod indexmap_like {
    use super::Observability;
    use serde::ser::SerializeMap;
    use serde::{Serialize, Serializer};

    /// Sensor name → observability, serialised in model order.
    pub(super) struct Ordered(pub Vec<(String, Observability)>);

    impl Serialize for Ordered {
        fn serialize<S: Serializer>(&self, s: S) -> Result<S::Ok, S::Error> {
            let mut m = s.serialize_map(Some(self.0.len()))?;
            for (k, v) in &self.0 {
                m.serialize_entry(
                    k,
                    &SensorObs {
                        rank: v.rank,
                        unobservable: &v.unobservable,
                    },
                )?;
            }
            m.end()
        }
    }

    #[derive(Serialize)]
    struct SensorObs<'a> {
        rank: usize,
        unobservable: &'a [String],
    }
}

/// `POST /v1/check`.
pub(super) fn check(body: &[u8], limits: &Limits, stop: &Stop) -> Result<Done, Problem> {
    let env = envelope::envelope(body)?;
    let model_v = envelope::section(env.model, "model")?;
    if validate::has_families(&model_v) {
        return super::family_check::check(&env, &model_v, limits);
    }
    let model = validate::model(&model_v, "/model", limits).map_err(Problem::invalid)?;
    let zone = envelope::time_zone(&env)?;
    let (x, u, t) = match envelope::optional_section(env.prior, "prior")? {
        Some(pv) => {
            let p =
                validate::prior_in(&pv, "/prior", &model, None, &zone).map_err(Problem::invalid)?;
            (p.mean, p.inputs, p.t.secs)
        }
        None => {
            let mut x = DVector::zeros(model.n());
            for (k, p) in model.estimated.iter().enumerate() {
                x[model.n_model + k] = p.initial;
            }
            (x, DVector::zeros(model.nu()), 0.0)
        }
    };
    let (f, hs) = jacobians(&model, &x, &u, t);
    refuse_non_finite(&model, &x, t, &f, &hs)?;
    let mut warnings = Vec::new();
    let mut stacked = DMatrix::zeros(hs.iter().map(|h| h.nrows()).sum(), model.n());
    let mut row = 0;
    for h in &hs {
        stacked
            .view_mut((row, 0), (h.nrows(), model.n()))
            .copy_from(h);
        row += h.nrows();
    }
    halted(stop)?;
    let all = analyse(&f, &stacked, &model.states).map_err(|e| overflow(e, "all sensors"))?;
    // One analysis per sensor, each up to n products of n × n matrices: the stop is
    // looked at between them.
    let by_sensor: Vec<(String, Observability)> = model
        .sensors
        .iter()
        .zip(&hs)
        .map(|(s, h)| {
            halted(stop)?;
            analyse(&f, h, &model.states)
                .map(|o| (s.name.clone(), o))
                .map_err(|e| overflow(e, &format!("sensor '{}'", s.name)))
        })
        .collect::<Result<_, _>>()?;
    for name in &all.unobservable {
        warnings.push(format!("state '{name}' cannot be recovered from these sensors near this point: its estimate will follow the prior and the model only"));
    }
    for (s, h) in model.sensors.iter().zip(&hs) {
        if h.iter().all(|v| *v == 0.0) {
            warnings.push(format!(
                "sensor '{}' does not depend on any state at this point",
                s.name
            ));
        }
    }
    for (i, name) in model.inputs.iter().enumerate() {
        let slot = model.n() + i;
        let used = match &model.dynamics {
            Dynamics::Linear { b, .. } => b.column(i).iter().any(|v| *v != 0.0),
            Dynamics::Rates(p) | Dynamics::Next(p) => {
                (0..p.outputs()).any(|k| p.depends_on(k, slot))
            }
        } || model
            .sensors
            .iter()
            .any(|s| (0..s.dim).any(|k| s.program.depends_on(k, slot)));
        if !used {
            warnings.push(format!(
                "input '{name}' is not used by the dynamics or any sensor"
            ));
        }
    }
    let resp = CheckResponse {
        states: model.states.clone(),
        inputs: model.inputs.clone(),
        sensors: model
            .sensors
            .iter()
            .map(|s| SensorInfo {
                name: s.name.clone(),
                dimension: s.dim,
            })
            .collect(),
        dimensions: Dimensions {
            states: model.n(),
            inputs: model.nu(),
            measurement_size: model.sensors.iter().map(|s| s.dim).sum(),
        },
        observability: Full {
            rank: all.rank,
            dimension: all.dimension,
            unobservable: all.unobservable,
            at: model
                .states
                .iter()
                .cloned()
                .zip(x.iter().copied())
                .collect(),
            by_sensor: indexmap_like::Ordered(by_sensor),
        },
        warnings,
    };
    let body = serde_json::to_vec(&resp)
        .map_err(|e| Problem::new(crate::problem::ProblemKind::Internal, e.to_string()))?;
    Ok(Done {
        body,
        stats: RunStats::default(),
    })
}

/// Err when the request's stop has fired (client gone or deadline passed).
fn halted(stop: &Stop) -> Result<(), Problem> {
    match stop.halted() {
        None => Ok(()),
        Some(Halt::Cancelled) => Err(super::setup::cancelled()),
        Some(Halt::Deadline) => Err(Problem::new(
            ProblemKind::DeadlineExceeded,
            "the request needed more than the compute deadline (counted from its arrival)",
        )),
    }
}

/// Where the Jacobians were taken, for messages: `pos = 0, vel = 1.5 at t = 0`.
fn point(model: &Model, x: &DVector<f64>, t: f64) -> String {
    let at: Vec<String> = model
        .states
        .iter()
        .zip(x.iter())
        .map(|(name, v)| format!("{name} = {v}"))
        .collect();
    format!("{} at t = {t}", at.join(", "))
}

/// The first state column whose entry in `row` is not finite, with that entry.
fn first_bad(model: &Model, row: impl Iterator<Item = f64>) -> Option<(&str, f64)> {
    model
        .states
        .iter()
        .zip(row)
        .find(|(_, v)| !v.is_finite())
        .map(|(name, v)| (name.as_str(), v))
}

/// Refuse a linearisation point where a derivative is not finite, naming each formula
/// and the state it was taken with respect to. The rank test below runs an SVD, which
/// panics or never ends on NaN; a rank read off non-finite entries would mean nothing.
fn refuse_non_finite(
    model: &Model,
    x: &DVector<f64>,
    t: f64,
    f: &DMatrix<f64>,
    hs: &[DMatrix<f64>],
) -> Result<(), Problem> {
    let at = point(model, x, t);
    let fix = "give a prior mean where the formula is smooth";
    let mut errors = Vec::new();
    for (s, h) in model.sensors.iter().zip(hs) {
        for k in 0..h.nrows() {
            if let Some((state, v)) = first_bad(model, h.row(k).iter().copied()) {
                let mut pointer = format!("/model/sensors/{}/measures", escape_token(&s.name));
                if s.dim > 1 {
                    pointer.push_str(&format!("/{k}"));
                }
                errors.push(FieldError::new(
                    pointer,
                    format!(
                        "the derivative of sensor '{}' with respect to '{state}' is {v} at the linearisation point ({at}); {fix}",
                        s.name
                    ),
                ));
            }
        }
    }
    let section = match &model.dynamics {
        Dynamics::Rates(_) => Some("rates"),
        Dynamics::Next(_) => Some("next"),
        // A linear model's matrix was checked finite when it was read.
        Dynamics::Linear { .. } => None,
    };
    if let Some(section) = section {
        for k in 0..model.n_model {
            if let Some((state, v)) = first_bad(model, f.row(k).iter().copied()) {
                let row = &model.states[k];
                errors.push(FieldError::new(
                    format!("/model/dynamics/{section}/{}", escape_token(row)),
                    format!(
                        "the derivative of the formula for '{row}' with respect to '{state}' is {v} at the linearisation point ({at}); {fix}"
                    ),
                ));
            }
        }
    }
    if errors.is_empty() && !f.iter().all(|v| v.is_finite()) {
        // Not reached from a formula (named above); kept so no SVD ever sees a NaN.
        errors.push(FieldError::new(
            "/model/dynamics",
            format!("the dynamics Jacobian is not finite at the linearisation point ({at})"),
        ));
    }
    if errors.is_empty() {
        Ok(())
    } else {
        Err(Problem::invalid(errors))
    }
}

/// The observability matrix of `whom` overflowed at power k of the dynamics Jacobian.
fn overflow(e: Overflow, whom: &str) -> Problem {
    Problem::new(
        ProblemKind::NumericalFailure,
        format!(
            "the observability test for {whom} overflowed: H·F^{} has entries beyond the floating-point range at the linearisation point; rescale the states (units) or give a prior mean where the dynamics are milder",
            e.power
        ),
    )
}
