//! The `output` section as it appears in JSON.

use super::field::{an_object, Field};
use super::prior::RawTime;
use serde::Deserialize;
use serde_json::{Map, Value};

/// The `output` section.
#[derive(Debug, Deserialize)]
pub struct RawOutput<'a> {
    /// `full`, `std` or `none`.
    #[serde(default)]
    #[serde(borrow)]
    pub covariance: Option<Field<&'a str>>,
    /// Whether innovations are reported.
    #[serde(default)]
    pub innovations: Option<Field<bool>>,
    /// Extra prediction-only times.
    #[serde(default)]
    #[serde(borrow)]
    pub at: Option<Field<Vec<Field<RawTime<'a>>>>>,
    /// Keys the section does not have.
    #[serde(flatten)]
    pub unknown: Map<String, Value>,
}

impl RawOutput<'_> {
    /// The section's fields, in the order messages list them.
    pub const KNOWN: &'static [&'static str] = &["covariance", "innovations", "at"];
}

an_object!(RawOutput<'_>);
