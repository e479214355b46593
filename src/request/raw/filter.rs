//! The `filter` section as it appears in JSON.

use super::field::{an_object, Field};
use serde::Deserialize;
use serde_json::{Map, Value};

/// The `filter` section.
#[derive(Debug, Deserialize)]
pub struct RawFilter<'a> {
    /// `ekf`, `ukf` or `enkf`.
    #[serde(default)]
    #[serde(borrow)]
    pub method: Option<Field<&'a str>>,
    /// Sigma-point settings.
    #[serde(default)]
    pub unscented: Option<Field<RawUnscented>>,
    /// Ensemble settings.
    #[serde(default)]
    #[serde(borrow)]
    pub ensemble: Option<Field<RawEnsemble<'a>>>,
    /// Integrator settings.
    #[serde(default)]
    pub integration: Option<Field<RawIntegration>>,
    /// Innovation gate.
    #[serde(default)]
    pub gate: Option<Field<RawGate>>,
    /// Taking a locked-out sensor back.
    #[serde(default)]
    pub reacquire: Option<Field<RawReacquire>>,
    /// `reject` or `skip`: what a line whose time goes backwards does.
    #[serde(default)]
    #[serde(borrow)]
    pub late: Option<Field<&'a str>>,
    /// Longest gap between lines, seconds.
    #[serde(default)]
    pub max_gap: Option<Field<f64>>,
    /// Keys the section does not have.
    #[serde(flatten)]
    pub unknown: Map<String, Value>,
}

impl RawFilter<'_> {
    /// The section's fields, in the order messages list them.
    pub const KNOWN: &'static [&'static str] = &[
        "method",
        "unscented",
        "ensemble",
        "integration",
        "gate",
        "reacquire",
        "late",
        "max_gap",
    ];
}

/// `filter.unscented`.
#[derive(Debug, Deserialize)]
pub struct RawUnscented {
    /// Spread of the sigma points.
    #[serde(default)]
    pub alpha: Option<Field<f64>>,
    /// Weight on the centre point's covariance.
    #[serde(default)]
    pub beta: Option<Field<f64>>,
    /// Secondary scaling.
    #[serde(default)]
    pub kappa: Option<Field<f64>>,
    /// Keys the object does not have.
    #[serde(flatten)]
    pub unknown: Map<String, Value>,
}

impl RawUnscented {
    /// The object's fields, in the order messages list them.
    pub const KNOWN: &'static [&'static str] = &["alpha", "beta", "kappa"];
}

/// `filter.ensemble`.
#[derive(Debug, Deserialize)]
pub struct RawEnsemble<'a> {
    /// Number of members.
    #[serde(default)]
    pub members: Option<Field<u64>>,
    /// Seed of every random draw.
    #[serde(default)]
    pub seed: Option<Field<u64>>,
    /// Multiplicative inflation.
    #[serde(default)]
    pub inflation: Option<Field<f64>>,
    /// `perturbed` or `deterministic`.
    #[serde(default)]
    #[serde(borrow)]
    pub update: Option<Field<&'a str>>,
    /// Relaxation of estimated parameters' spread towards the forecast spread.
    #[serde(default)]
    pub parameter_relaxation: Option<Field<f64>>,
    /// Keys the object does not have.
    #[serde(flatten)]
    pub unknown: Map<String, Value>,
}

impl RawEnsemble<'_> {
    /// The object's fields, in the order messages list them.
    pub const KNOWN: &'static [&'static str] = &[
        "members",
        "seed",
        "inflation",
        "update",
        "parameter_relaxation",
    ];
}

/// `filter.integration`.
#[derive(Debug, Deserialize)]
pub struct RawIntegration {
    /// Largest adaptive step.
    #[serde(default)]
    pub max_step: Option<Field<f64>>,
    /// Relative tolerance.
    #[serde(default)]
    pub rtol: Option<Field<f64>>,
    /// Absolute tolerance.
    #[serde(default)]
    pub atol: Option<Field<f64>>,
    /// Fixed RK4 step.
    #[serde(default)]
    pub fixed_step: Option<Field<f64>>,
    /// Keys the object does not have.
    #[serde(flatten)]
    pub unknown: Map<String, Value>,
}

impl RawIntegration {
    /// The object's fields, in the order messages list them.
    pub const KNOWN: &'static [&'static str] = &["max_step", "rtol", "atol", "fixed_step"];
}

/// `filter.gate`.
#[derive(Debug, Deserialize)]
pub struct RawGate {
    /// Probability of the gate.
    #[serde(default)]
    pub probability: Option<Field<f64>>,
    /// Keys the object does not have.
    #[serde(flatten)]
    pub unknown: Map<String, Value>,
}

impl RawGate {
    /// The object's fields, in the order messages list them.
    pub const KNOWN: &'static [&'static str] = &["probability"];
}

/// `filter.reacquire`.
#[derive(Debug, Deserialize)]
pub struct RawReacquire {
    /// Consecutive refusals of one sensor after which its next reading is taken.
    #[serde(default)]
    pub after: Option<Field<u64>>,
    /// Keys the object does not have.
    #[serde(flatten)]
    pub unknown: Map<String, Value>,
}

impl RawReacquire {
    /// The object's fields, in the order messages list them.
    pub const KNOWN: &'static [&'static str] = &["after"];
}

an_object!(
    RawFilter<'_>,
    RawUnscented,
    RawEnsemble<'_>,
    RawIntegration,
    RawGate,
    RawReacquire
);
