//! The `prior` section as it appears in JSON, and times (seconds or timestamps).

use super::field::{an_object, by_json_type, Entries, Expected, Field, Matrix};
use serde::Deserialize;
use serde_json::{Map, Value};

/// A time: seconds or an RFC 3339 timestamp.
#[derive(Debug, Clone)]
pub enum RawTime<'a> {
    /// Seconds.
    Seconds(f64),
    /// A timestamp.
    Stamp(&'a str),
}

impl Expected for RawTime<'_> {
    const EXPECTED: &'static str = "seconds (a number) or an RFC 3339 timestamp";
}

/// The `prior` section.
#[derive(Debug, Deserialize)]
pub struct RawPrior<'a> {
    /// Time of the prior.
    #[serde(default)]
    #[serde(borrow)]
    pub t: Option<Field<RawTime<'a>>>,
    /// Mean by state name.
    #[serde(default)]
    #[serde(borrow)]
    pub mean: Option<Field<Entries<'a, f64>>>,
    /// Std by state name.
    #[serde(default)]
    #[serde(borrow)]
    pub std: Option<Field<Entries<'a, f64>>>,
    /// Full covariance.
    #[serde(default)]
    pub covariance: Option<Field<Matrix>>,
    /// Ensemble members as rows.
    #[serde(default)]
    pub members: Option<Field<Matrix>>,
    /// Ensemble step counter.
    #[serde(default)]
    pub step: Option<Field<u64>>,
    /// Inputs held at the prior's time.
    #[serde(default)]
    #[serde(borrow)]
    pub inputs: Option<Field<Entries<'a, f64>>>,
    /// Tallies of the chain so far (a posterior's `running`).
    #[serde(default)]
    #[serde(borrow)]
    pub running: Option<Field<RawRunning<'a>>>,
    /// Keys the section does not have.
    #[serde(flatten)]
    pub unknown: Map<String, Value>,
}

/// `prior.running`: what a chain of requests has tallied (a posterior's own).
#[derive(Debug, Deserialize)]
pub struct RawRunning<'a> {
    /// Updates counted.
    #[serde(default)]
    pub readings: Option<Field<u64>>,
    /// Sum of their NIS.
    #[serde(default)]
    pub nis_sum: Option<Field<f64>>,
    /// Sum of their degrees of freedom.
    #[serde(default)]
    pub dof_sum: Option<Field<u64>>,
    /// Sum of their log-likelihood terms.
    #[serde(default)]
    pub log_likelihood: Option<Field<f64>>,
    /// Readings judged by the gate.
    #[serde(default)]
    pub judged: Option<Field<u64>>,
    /// Of those, refused.
    #[serde(default)]
    pub refused: Option<Field<u64>>,
    /// Of those, refused right after the same sensor's previous refusal.
    #[serde(default)]
    pub refused_again: Option<Field<u64>>,
    /// Per sensor, its latest readings refused in a row.
    #[serde(default)]
    #[serde(borrow)]
    pub in_a_row: Option<Field<Entries<'a, u64>>>,
    /// Keys the object does not have.
    #[serde(flatten)]
    pub unknown: Map<String, Value>,
}

impl RawRunning<'_> {
    /// The object's fields, in the order messages list them.
    pub const KNOWN: &'static [&'static str] = &[
        "readings",
        "nis_sum",
        "dof_sum",
        "log_likelihood",
        "judged",
        "refused",
        "refused_again",
        "in_a_row",
    ];
}

impl RawPrior<'_> {
    /// The section's fields, in the order messages list them.
    pub const KNOWN: &'static [&'static str] = &[
        "t",
        "mean",
        "std",
        "covariance",
        "members",
        "step",
        "inputs",
        "running",
    ];
}

an_object!(RawPrior<'_>, RawRunning<'_>);

by_json_type!(RawTime<'a> {
    number: |n| RawTime::Seconds(n.as_f64().unwrap_or(f64::NAN)),
    string: |s| RawTime::Stamp(s),
});
