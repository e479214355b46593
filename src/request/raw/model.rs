//! The `model` section as it appears in JSON.

use super::field::{an_object, by_json_type, Entries, Expected, Field, Matrix};
use serde::Deserialize;
use serde_json::{Map, Number, Value};

/// The `model` section.
#[derive(Debug, Deserialize)]
pub struct RawModel<'a> {
    /// The model's state names.
    #[serde(default)]
    #[serde(borrow)]
    pub states: Option<Field<Vec<Field<&'a str>>>>,
    /// Input names.
    #[serde(default)]
    #[serde(borrow)]
    pub inputs: Option<Field<Vec<Field<&'a str>>>>,
    /// Fixed and estimated parameters.
    #[serde(default)]
    #[serde(borrow)]
    pub parameters: Option<Field<Entries<'a, RawParameter>>>,
    /// How the state moves.
    #[serde(default)]
    #[serde(borrow)]
    pub dynamics: Option<Field<RawDynamics<'a>>>,
    /// Process noise.
    #[serde(default)]
    #[serde(borrow)]
    pub process_noise: Option<Field<RawProcessNoise<'a>>>,
    /// Sensors by name.
    #[serde(default)]
    #[serde(borrow)]
    pub sensors: Option<Field<Entries<'a, RawSensor<'a>>>>,
    /// Bounds of model states, by name (watched, not enforced).
    #[serde(default)]
    #[serde(borrow)]
    pub bounds: Option<Field<Entries<'a, RawBounds>>>,
    /// Keys the section does not have.
    #[serde(flatten)]
    pub unknown: Map<String, Value>,
}

impl RawModel<'_> {
    /// The section's fields, in the order messages list them.
    pub const KNOWN: &'static [&'static str] = &[
        "states",
        "inputs",
        "parameters",
        "dynamics",
        "process_noise",
        "sensors",
        "bounds",
    ];
}

/// One parameter: a number is a constant, an object is estimated as an extra state.
#[derive(Debug)]
pub enum RawParameter {
    /// A fixed value.
    Fixed(f64),
    /// Estimated jointly with the state.
    Estimated(Box<RawEstimated>),
}

impl Expected for RawParameter {
    const EXPECTED: &'static str = "a number or an object";
    const OBJECT: bool = true;
}

/// An estimated parameter.
#[derive(Debug, Deserialize)]
pub struct RawEstimated {
    /// Prior mean.
    #[serde(default)]
    pub initial: Option<Field<f64>>,
    /// Prior standard deviation.
    #[serde(default)]
    pub std: Option<Field<f64>>,
    /// Random-walk spectral density.
    #[serde(default)]
    pub random_walk: Option<Field<f64>>,
    /// Lowest value the parameter may take.
    #[serde(default)]
    pub min: Option<Field<f64>>,
    /// Highest value the parameter may take.
    #[serde(default)]
    pub max: Option<Field<f64>>,
    /// Keys the object does not have (`drift`, the v1 name of `random_walk`, among them).
    #[serde(flatten)]
    pub unknown: Map<String, Value>,
}

impl RawEstimated {
    /// The object's fields, in the order messages list them.
    pub const KNOWN: &'static [&'static str] = &["initial", "std", "random_walk", "min", "max"];
    /// v1 names and the names that replaced them.
    pub const RENAMED: &'static [(&'static str, &'static str)] = &[("drift", "random_walk")];
}

/// One entry of `model.bounds`: the interval a model state should stay in.
#[derive(Debug, Deserialize)]
pub struct RawBounds {
    /// Lower bound.
    #[serde(default)]
    pub min: Option<Field<f64>>,
    /// Upper bound.
    #[serde(default)]
    pub max: Option<Field<f64>>,
    /// Keys the object does not have.
    #[serde(flatten)]
    pub unknown: Map<String, Value>,
}

impl RawBounds {
    /// The object's fields, in the order messages list them.
    pub const KNOWN: &'static [&'static str] = &["min", "max"];
}

/// The `dynamics` object: exactly one of its three forms.
#[derive(Debug, Deserialize)]
pub struct RawDynamics<'a> {
    /// Continuous rates, one formula per model state.
    #[serde(default)]
    #[serde(borrow)]
    pub rates: Option<Field<Entries<'a, FormulaText<'a>>>>,
    /// A discrete map, one formula per model state.
    #[serde(default)]
    #[serde(borrow)]
    pub next: Option<Field<Entries<'a, FormulaText<'a>>>>,
    /// Matrices.
    #[serde(default)]
    #[serde(borrow)]
    pub linear: Option<Field<RawLinear<'a>>>,
    /// Keys the object does not have.
    #[serde(flatten)]
    pub unknown: Map<String, Value>,
}

impl RawDynamics<'_> {
    /// The object's fields, in the order messages list them.
    pub const KNOWN: &'static [&'static str] = &["rates", "next", "linear"];
}

/// A formula: a string, or a plain number standing for a constant formula.
#[derive(Debug, Clone)]
pub enum FormulaText<'a> {
    /// Formula text.
    Text(&'a str),
    /// A constant, kept as written so it compiles from the same text.
    Number(Number),
}

impl Expected for FormulaText<'_> {
    const EXPECTED: &'static str = "a formula string";
}

/// Linear dynamics given as matrices.
#[derive(Debug, Deserialize)]
pub struct RawLinear<'a> {
    /// `"continuous"` or `"discrete"`.
    #[serde(default)]
    #[serde(borrow)]
    pub time: Option<Field<&'a str>>,
    /// Continuous-time state matrix.
    #[serde(default, rename = "A")]
    pub a: Option<Field<Matrix>>,
    /// Discrete-time transition matrix.
    #[serde(default, rename = "F")]
    pub f: Option<Field<Matrix>>,
    /// Input matrix.
    #[serde(default, rename = "B")]
    pub b: Option<Field<Matrix>>,
    /// Grid step of a discrete model.
    #[serde(default)]
    pub dt: Option<Field<f64>>,
    /// Keys the object does not have.
    #[serde(flatten)]
    pub unknown: Map<String, Value>,
}

impl RawLinear<'_> {
    /// Fields of continuous linear dynamics.
    pub const CONTINUOUS: &'static [&'static str] = &["time", "A", "B"];
    /// Fields of discrete linear dynamics.
    pub const DISCRETE: &'static [&'static str] = &["time", "F", "B", "dt"];
}

/// The `process_noise` object.
#[derive(Debug, Deserialize)]
pub struct RawProcessNoise<'a> {
    /// Spectral density per model state (a diagonal).
    #[serde(default)]
    #[serde(borrow)]
    pub density: Option<Field<Entries<'a, f64>>>,
    /// Full spectral density matrix.
    #[serde(default)]
    pub density_matrix: Option<Field<Matrix>>,
    /// Per-step covariance of a discrete model.
    #[serde(default)]
    pub covariance: Option<Field<Matrix>>,
    /// Keys the object does not have.
    #[serde(flatten)]
    pub unknown: Map<String, Value>,
}

impl RawProcessNoise<'_> {
    /// The object's fields, in the order messages list them.
    pub const KNOWN: &'static [&'static str] = &["density", "density_matrix", "covariance"];
}

/// One sensor.
#[derive(Debug, Deserialize)]
pub struct RawSensor<'a> {
    /// What it measures.
    #[serde(default)]
    #[serde(borrow)]
    pub measures: Option<Field<Measures<'a>>>,
    /// Noise std, one for all components or one each.
    #[serde(default)]
    pub std: Option<Field<Spread>>,
    /// Noise covariance.
    #[serde(default)]
    pub covariance: Option<Field<Matrix>>,
    /// Keys the object does not have.
    #[serde(flatten)]
    pub unknown: Map<String, Value>,
}

impl RawSensor<'_> {
    /// The object's fields, in the order messages list them.
    pub const KNOWN: &'static [&'static str] = &["measures", "std", "covariance"];
}

/// A sensor's formula, or one formula per component.
#[derive(Debug)]
pub enum Measures<'a> {
    /// A scalar sensor.
    One(&'a str),
    /// A vector sensor.
    Many(Vec<Field<&'a str>>),
}

impl Expected for Measures<'_> {
    const EXPECTED: &'static str = "a formula string or a list of them";
    const ARRAY: bool = true;
}

/// A noise std: one number for every component, or one per component.
#[derive(Debug)]
pub enum Spread {
    /// The same std on every component.
    One(f64),
    /// One std per component.
    PerComponent(Vec<Field<f64>>),
}

impl Expected for Spread {
    const EXPECTED: &'static str = "a number";
    const ARRAY: bool = true;
}

an_object!(
    RawModel<'_>,
    RawEstimated,
    RawBounds,
    RawDynamics<'_>,
    RawLinear<'_>,
    RawProcessNoise<'_>,
    RawSensor<'_>
);

by_json_type!(RawParameter {
    number: |n| RawParameter::Fixed(n.as_f64().unwrap_or(f64::NAN)),
    object: |e| RawParameter::Estimated(Box::new(e)),
});
by_json_type!(FormulaText<'a> {
    number: |n| FormulaText::Number(n),
    string: |s| FormulaText::Text(s),
});
by_json_type!(Measures<'a> {
    string: |s| Measures::One(s),
    array: Measures::Many,
});
by_json_type!(Spread {
    number: |n| Spread::One(n.as_f64().unwrap_or(f64::NAN)),
    array: Spread::PerComponent,
});
