//! Limits in force for one server (or CLI run): what a request may ask of it.
//!
//! The web layer fills these from flags and environment variables; the core reads them
//! while parsing so an oversized request is refused before any work is done.

use serde::Serialize;
use std::time::Duration;

/// Upper bounds on what one request may ask for.
#[derive(Debug, Clone, Serialize)]
pub struct Limits {
    /// Largest accepted request body, bytes (the stream endpoint limits each line instead).
    pub max_body_bytes: usize,
    /// Largest line of an NDJSON stream, bytes.
    pub max_line_bytes: usize,
    /// Most states (model states plus estimated parameters).
    pub max_states: usize,
    /// Most sensors in one model.
    pub max_sensors: usize,
    /// Most ensemble members.
    pub max_members: usize,
    /// Most measurement lines in one batch request (the stream is unbounded).
    pub max_lines: usize,
    /// Most simulated times in one simulate request.
    pub max_sim_times: usize,
    /// Longest formula, characters.
    pub max_formula_len: usize,
    /// Deepest nesting of a formula (parentheses, calls, unary operators).
    pub max_formula_depth: usize,
    /// Most fixed-size steps one gap between readings may need (grid steps of a discrete
    /// model, or steps of `integration.fixed_step`); a longer gap is refused with a 422
    /// before any stepping.
    pub max_gap_steps: u64,
    /// Wall-clock budget of one request, counted from its arrival; `None` for no
    /// deadline (a request whose client goes away still stops).
    #[serde(rename = "deadline_secs", serialize_with = "ser_opt_secs")]
    pub deadline: Option<Duration>,
    /// Most requests doing filter work at once; more are answered 503.
    pub max_concurrency: usize,
}

fn ser_opt_secs<S: serde::Serializer>(d: &Option<Duration>, s: S) -> Result<S::Ok, S::Error> {
    match d {
        Some(d) => s.serialize_some(&d.as_secs_f64()),
        None => s.serialize_none(),
    }
}

impl Default for Limits {
    fn default() -> Self {
        Self {
            max_body_bytes: 256 * 1024 * 1024,
            max_line_bytes: 1024 * 1024,
            max_states: 256,
            max_sensors: 256,
            max_members: 4096,
            max_lines: 5_000_000,
            max_sim_times: 1_000_000,
            max_formula_len: 4096,
            max_formula_depth: 64,
            max_gap_steps: 10_000_000,
            deadline: Some(Duration::from_secs(60)),
            max_concurrency: 64,
        }
    }
}
