//! Helpers: call the job functions with JSON and read answers back.

use serde_json::Value;
use tacit::config::Limits;
use tacit::job::Stop;
use tacit::problem::Problem;

static NOT_CANCELLED: Stop = Stop::never();

/// Run `/v1/estimate` in-process.
pub(super) fn estimate(body: &Value) -> Result<Value, Problem> {
    let bytes = serde_json::to_vec(body).unwrap();
    tacit::job::estimate(&bytes, &Limits::default(), &NOT_CANCELLED)
        .map(|d| serde_json::from_slice(&d.body).unwrap())
}

/// Run `/v1/smooth` in-process.
pub(super) fn smooth(body: &Value) -> Result<Value, Problem> {
    let bytes = serde_json::to_vec(body).unwrap();
    tacit::job::smooth(&bytes, &Limits::default(), &NOT_CANCELLED)
        .map(|d| serde_json::from_slice(&d.body).unwrap())
}

/// Run `/v1/simulate` in-process.
pub(super) fn simulate(body: &Value) -> Value {
    simulate_or_problem(body).unwrap_or_else(|p| panic!("simulate failed: {p}"))
}

/// Run `/v1/simulate` in-process, keeping a refusal.
pub(super) fn simulate_or_problem(body: &Value) -> Result<Value, Problem> {
    let bytes = serde_json::to_vec(body).unwrap();
    tacit::job::simulate(&bytes, &Limits::default(), &NOT_CANCELLED)
        .map(|d| serde_json::from_slice(&d.body).unwrap())
}

/// Run `/v1/check` in-process.
pub(super) fn check(body: &Value) -> Result<Value, Problem> {
    let bytes = serde_json::to_vec(body).unwrap();
    tacit::job::check(&bytes, &Limits::default(), &NOT_CANCELLED)
        .map(|d| serde_json::from_slice(&d.body).unwrap())
}

/// Estimate, panicking with the problem on failure.
pub(super) fn ok(body: &Value) -> Value {
    estimate(body).unwrap_or_else(|p| panic!("estimate failed: {p}"))
}

/// `v[key]` as f64.
pub(super) fn f(v: &Value, key: &str) -> f64 {
    v[key]
        .as_f64()
        .unwrap_or_else(|| panic!("{key} is not a number in {v}"))
}

/// A covariance matrix from an estimate.
pub(super) fn matrix(v: &Value) -> Vec<Vec<f64>> {
    v.as_array()
        .unwrap()
        .iter()
        .map(|r| {
            r.as_array()
                .unwrap()
                .iter()
                .map(|x| x.as_f64().unwrap())
                .collect()
        })
        .collect()
}

/// Relative difference scaled by `max(|a|, |b|, floor)`.
pub(super) fn rel(a: f64, b: f64, floor: f64) -> f64 {
    (a - b).abs() / a.abs().max(b.abs()).max(floor)
}

/// Run `/v1/calibrate` in-process (no progress).
pub(super) fn calibrate(body: &Value) -> Result<Value, Problem> {
    let bytes = serde_json::to_vec(body).unwrap();
    tacit::job::calibrate(&bytes, &Limits::default(), &NOT_CANCELLED, &|_, _| {})
        .map(|d| serde_json::from_slice(&d.body).unwrap())
}
