//! Small models shared by the filters' unit tests.

use crate::config::Limits;
use crate::model::{Ensemble, EnsembleUpdate, Integration, Model};
use nalgebra::{DMatrix, DVector};
use serde_json::{json, Value};

/// A three-state oscillator (a' = b, b' = −a, c constant) read by `sensors`.
pub(super) fn three_states(sensors: Value) -> Model {
    crate::request::validate::model(
        &json!({"states": ["a", "b", "c"], "dynamics": {"rates": {"a": "b", "b": "-a"}},
                "sensors": sensors}),
        "/model",
        &Limits::default(),
    )
    .unwrap()
}

/// Two sensors, one of them a nonlinear pair: a + c, then (b², a).
pub(super) fn two_sensors() -> Value {
    json!({"s1": {"measures": "a + c", "std": 0.3},
           "s2": {"measures": ["b*b", "a"], "std": [0.5, 0.2]}})
}

/// Adaptive integration at its defaults.
pub(super) fn integration() -> Integration {
    Integration {
        max_step: f64::INFINITY,
        rtol: 1e-6,
        atol: 1e-9,
        fixed_step: None,
    }
}

/// The prior mean (1, 0.5, −0.2) with independent variances (0.4, 0.3, 0.2).
pub(super) fn prior() -> (DVector<f64>, DMatrix<f64>) {
    (
        DVector::from_vec(vec![1.0, 0.5, -0.2]),
        DMatrix::from_diagonal(&DVector::from_vec(vec![0.4, 0.3, 0.2])),
    )
}

/// A 25-member ETKF without inflation, seeded.
pub(super) fn etkf(seed: u64) -> Ensemble {
    Ensemble {
        members: 25,
        seed,
        inflation: 1.0,
        update: EnsembleUpdate::Deterministic,
        parameter_relaxation: 0.0,
    }
}
