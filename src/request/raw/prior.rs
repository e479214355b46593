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
    /// Keys the section does not have.
    #[serde(flatten)]
    pub unknown: Map<String, Value>,
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
    ];
}

an_object!(RawPrior<'_>);

by_json_type!(RawTime<'a> {
    number: |n| RawTime::Seconds(n.as_f64().unwrap_or(f64::NAN)),
    string: |s| RawTime::Stamp(s),
});
