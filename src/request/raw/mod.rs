//! The request sections as they appear in JSON: serde types that mirror the `model`,
//! `filter`, `prior` and `output` objects field for field, before anything is checked.
//!
//! Every leaf is a [`Field`]: either a value of the expected JSON type or the value found
//! instead. A strict serde type would stop at the first wrong field; reading the wrong one
//! aside lets the validation step (`validate/`) report every fault of a request at once,
//! each at its own pointer. For the same reason an object keeps the keys it does not
//! know in `unknown` instead of failing on the first (serde's `deny_unknown_fields`);
//! validation refuses each of them by name, and names the new field for a v1 name.
//! Names and formulas borrow from the parsed JSON tree (`'a`), so reading a section
//! copies no strings. Where a field takes two shapes the type is an enum read by the
//! JSON type met (`by_json_type!`): what `#[serde(untagged)]` does, without buffering
//! the value and trying each variant in turn. The tree they are read from comes from
//! [`tree()`], which refuses a key repeated within one object (serde_json's own tree keeps
//! the last silently).

mod field;
mod filter;
mod model;
mod output;
mod prior;
#[cfg(test)]
mod tests;
mod tree;

pub use field::{kind_of, section, Entries, Expected, Field, Matrix};
pub use filter::{RawEnsemble, RawFilter, RawGate, RawIntegration, RawReacquire, RawUnscented};
pub use model::{
    FormulaText, Measures, RawBounds, RawDynamics, RawEstimated, RawLinear, RawModel, RawParameter,
    RawProcessNoise, RawSensor, Spread,
};
pub use output::RawOutput;
pub use prior::{RawPrior, RawRunning, RawTime};
pub use tree::{repeated_key, tree, TreeError};
