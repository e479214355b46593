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
//! the value and trying each variant in turn.

use serde::de::{self, value, IntoDeserializer, MapAccess, SeqAccess, Visitor};
use serde::{Deserialize, Deserializer};
use serde_json::{Map, Number, Value};
use std::fmt;
use std::marker::PhantomData;

/// A human name of a JSON value's type, for "expected X, found Y" messages.
pub fn kind_of(v: &Value) -> &'static str {
    crate::spec::reader::kind_of(v)
}

/// What a raw type looks like in JSON, for "expected X, found Y" messages.
pub trait Expected {
    /// The expected JSON shape, with its article (`a number`).
    const EXPECTED: &'static str;
    /// Whether the type is read from a JSON object (a field given one goes to the type).
    const OBJECT: bool = false;
    /// Whether the type is read from a JSON array.
    const ARRAY: bool = false;

    /// How to name a value that did not fit.
    fn found(v: &Value) -> String {
        kind_of(v).to_string()
    }
}

/// A value as given: of the expected type, or anything else, kept to be named in the error.
#[derive(Debug, Clone, PartialEq)]
pub enum Field<T> {
    /// The value, of the expected type.
    Ok(T),
    /// Something else.
    Wrong(Value),
}

impl<'de, T: Deserialize<'de> + Expected> Deserialize<'de> for Field<T> {
    fn deserialize<D: Deserializer<'de>>(d: D) -> Result<Self, D::Error> {
        d.deserialize_any(FieldVisitor(PhantomData))
    }
}

/// Reads a [`Field`] in one pass, without buffering: an object or array goes straight to
/// `T` when `T` takes that shape (and is drained into a `Value` otherwise); a scalar is
/// offered to `T` and kept as a `Value` if `T` refuses it. Buffering every field as a
/// `Value` first and trying `T` on it would copy each subtree once per level of nesting,
/// which doubled the time to read a small model.
struct FieldVisitor<T>(PhantomData<T>);

impl<T: Expected> FieldVisitor<T> {
    /// Offer a scalar to `T`; keep it as `found` when `T` refuses it.
    fn scalar<'de, X>(x: X, found: impl FnOnce() -> Value) -> Field<T>
    where
        T: Deserialize<'de>,
        X: IntoDeserializer<'de, value::Error>,
    {
        match T::deserialize(x.into_deserializer()) {
            Ok(t) => Field::Ok(t),
            Err(_) => Field::Wrong(found()),
        }
    }
}

impl<'de, T: Deserialize<'de> + Expected> Visitor<'de> for FieldVisitor<T> {
    type Value = Field<T>;

    fn expecting(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str("any JSON value")
    }

    fn visit_bool<E: de::Error>(self, b: bool) -> Result<Field<T>, E> {
        Ok(Self::scalar(b, || Value::Bool(b)))
    }

    fn visit_i64<E: de::Error>(self, x: i64) -> Result<Field<T>, E> {
        Ok(Self::scalar(x, || Value::Number(x.into())))
    }

    fn visit_u64<E: de::Error>(self, x: u64) -> Result<Field<T>, E> {
        Ok(Self::scalar(x, || Value::Number(x.into())))
    }

    fn visit_f64<E: de::Error>(self, x: f64) -> Result<Field<T>, E> {
        Ok(Self::scalar(x, || {
            Number::from_f64(x).map_or(Value::Null, Value::Number)
        }))
    }

    fn visit_borrowed_str<E: de::Error>(self, s: &'de str) -> Result<Field<T>, E> {
        Ok(
            match T::deserialize(value::BorrowedStrDeserializer::<value::Error>::new(s)) {
                Ok(t) => Field::Ok(t),
                Err(_) => Field::Wrong(Value::String(s.to_string())),
            },
        )
    }

    fn visit_str<E: de::Error>(self, s: &str) -> Result<Field<T>, E> {
        Ok(Self::scalar(s, || Value::String(s.to_string())))
    }

    fn visit_unit<E: de::Error>(self) -> Result<Field<T>, E> {
        Ok(Field::Wrong(Value::Null))
    }

    fn visit_none<E: de::Error>(self) -> Result<Field<T>, E> {
        Ok(Field::Wrong(Value::Null))
    }

    fn visit_seq<A: SeqAccess<'de>>(self, seq: A) -> Result<Field<T>, A::Error> {
        let d = value::SeqAccessDeserializer::new(seq);
        if T::ARRAY {
            T::deserialize(d).map(Field::Ok)
        } else {
            Value::deserialize(d).map(Field::Wrong)
        }
    }

    fn visit_map<A: MapAccess<'de>>(self, map: A) -> Result<Field<T>, A::Error> {
        let d = value::MapAccessDeserializer::new(map);
        if T::OBJECT {
            T::deserialize(d).map(Field::Ok)
        } else {
            Value::deserialize(d).map(Field::Wrong)
        }
    }
}

impl<T> Field<T> {
    /// The value found instead of a `T`, if it was not one.
    pub fn as_wrong(&self) -> Option<&Value> {
        match self {
            Field::Ok(_) => None,
            Field::Wrong(v) => Some(v),
        }
    }
}

/// The members of a JSON object whose keys are names of the request's own (states,
/// sensors, inputs), in the order given.
#[derive(Debug, Clone, PartialEq)]
pub struct Entries<'a, T>(pub Vec<(&'a str, Field<T>)>);

impl<T> Entries<'_, T> {
    /// The value under `name`, if given.
    pub fn get(&self, name: &str) -> Option<&Field<T>> {
        self.0.iter().find(|(k, _)| *k == name).map(|(_, v)| v)
    }

    /// Whether there are no members.
    pub fn is_empty(&self) -> bool {
        self.0.is_empty()
    }

    /// The number of members.
    pub fn len(&self) -> usize {
        self.0.len()
    }
}

impl<'de: 'a, 'a, T: Deserialize<'de> + Expected> Deserialize<'de> for Entries<'a, T> {
    fn deserialize<D: Deserializer<'de>>(d: D) -> Result<Self, D::Error> {
        struct Vis<'a, T>(PhantomData<(&'a (), T)>);
        impl<'de: 'a, 'a, T: Deserialize<'de> + Expected> Visitor<'de> for Vis<'a, T> {
            type Value = Entries<'a, T>;
            fn expecting(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
                f.write_str("an object")
            }
            fn visit_map<A: MapAccess<'de>>(self, mut m: A) -> Result<Self::Value, A::Error> {
                let mut v = Vec::with_capacity(m.size_hint().unwrap_or(0));
                while let Some((k, x)) = m.next_entry::<&'a str, Field<T>>()? {
                    v.push((k, x));
                }
                Ok(Entries(v))
            }
        }
        d.deserialize_map(Vis(PhantomData))
    }
}

impl Expected for f64 {
    const EXPECTED: &'static str = "a number";
}

impl Expected for u64 {
    const EXPECTED: &'static str = "a whole number ≥ 0";

    /// A number that is not whole (or is negative) is named by its value.
    fn found(v: &Value) -> String {
        match v {
            Value::Number(n) => n.to_string(),
            other => kind_of(other).to_string(),
        }
    }
}

impl Expected for &str {
    const EXPECTED: &'static str = "a string";
}

impl Expected for bool {
    const EXPECTED: &'static str = "true or false";
}

impl<T> Expected for Vec<T> {
    const EXPECTED: &'static str = "an array";
    const ARRAY: bool = true;
}

/// A matrix as rows of numbers; each level may be wrong on its own.
pub type Matrix = Vec<Field<Vec<Field<f64>>>>;

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
    /// Keys the object does not have (`drift`, the v1 name of `random_walk`, among them).
    #[serde(flatten)]
    pub unknown: Map<String, Value>,
}

impl RawEstimated {
    /// The object's fields, in the order messages list them.
    pub const KNOWN: &'static [&'static str] = &["initial", "std", "random_walk"];
    /// v1 names and the names that replaced them.
    pub const RENAMED: &'static [(&'static str, &'static str)] = &[("drift", "random_walk")];
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
    /// Keys the section does not have.
    #[serde(flatten)]
    pub unknown: Map<String, Value>,
}

impl RawFilter<'_> {
    /// The section's fields, in the order messages list them.
    pub const KNOWN: &'static [&'static str] =
        &["method", "unscented", "ensemble", "integration", "gate"];
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
    /// Keys the object does not have.
    #[serde(flatten)]
    pub unknown: Map<String, Value>,
}

impl RawEnsemble<'_> {
    /// The object's fields, in the order messages list them.
    pub const KNOWN: &'static [&'static str] = &["members", "seed", "inflation", "update"];
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

/// Raw types read from a JSON object.
macro_rules! an_object {
    ($($t:ty),*) => {
        $(impl Expected for $t {
            const EXPECTED: &'static str = "an object";
            const OBJECT: bool = true;
        })*
    };
}
an_object!(
    RawModel<'_>,
    RawEstimated,
    RawDynamics<'_>,
    RawLinear<'_>,
    RawProcessNoise<'_>,
    RawSensor<'_>,
    RawFilter<'_>,
    RawUnscented,
    RawEnsemble<'_>,
    RawIntegration,
    RawGate,
    RawPrior<'_>,
    RawOutput<'_>
);

impl<T> Expected for Entries<'_, T> {
    const EXPECTED: &'static str = "an object";
    const OBJECT: bool = true;
}

/// `Deserialize` for an enum whose variant follows from the JSON type alone (a number, a
/// string, an array or an object): the value is read once, straight into its variant.
/// `#[serde(untagged)]` would buffer it and try each variant in turn, which is most of
/// the time of reading a small model.
macro_rules! by_json_type {
    ($t:ty {
        $(number: |$n:ident| $num:expr,)?
        $(string: |$s:ident| $str:expr,)?
        $(array: $arr:expr,)?
        $(object: $obj:expr,)?
    }) => {
        impl<'de: 'a, 'a> Deserialize<'de> for $t {
            fn deserialize<D: Deserializer<'de>>(d: D) -> Result<Self, D::Error> {
                struct V<'a>(PhantomData<&'a ()>);
                impl<'de: 'a, 'a> Visitor<'de> for V<'a> {
                    type Value = $t;
                    fn expecting(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
                        f.write_str(<$t as Expected>::EXPECTED)
                    }
                    $(
                    fn visit_u64<E: de::Error>(self, x: u64) -> Result<$t, E> {
                        let $n = Number::from(x);
                        Ok($num)
                    }
                    fn visit_i64<E: de::Error>(self, x: i64) -> Result<$t, E> {
                        let $n = Number::from(x);
                        Ok($num)
                    }
                    fn visit_f64<E: de::Error>(self, x: f64) -> Result<$t, E> {
                        let $n = Number::from_f64(x)
                            .ok_or_else(|| E::custom("number is out of range"))?;
                        Ok($num)
                    }
                    )?
                    $(
                    fn visit_borrowed_str<E: de::Error>(self, $s: &'de str) -> Result<$t, E> {
                        Ok($str)
                    }
                    )?
                    $(
                    fn visit_seq<A: SeqAccess<'de>>(self, seq: A) -> Result<$t, A::Error> {
                        Deserialize::deserialize(value::SeqAccessDeserializer::new(seq)).map($arr)
                    }
                    )?
                    $(
                    fn visit_map<A: MapAccess<'de>>(self, map: A) -> Result<$t, A::Error> {
                        Deserialize::deserialize(value::MapAccessDeserializer::new(map)).map($obj)
                    }
                    )?
                }
                d.deserialize_any(V(PhantomData))
            }
        }
    };
}

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
by_json_type!(RawTime<'a> {
    number: |n| RawTime::Seconds(n.as_f64().unwrap_or(f64::NAN)),
    string: |s| RawTime::Stamp(s),
});

/// Read a section's JSON tree into its raw type, or `None` with the tree when it is not an
/// object. Every field of a raw object type accepts any JSON value (see [`Field`]), so an
/// object always reads.
pub fn section<'a, T: Deserialize<'a>>(v: &'a Value) -> Field<T> {
    match T::deserialize(v) {
        Ok(t) if v.is_object() => Field::Ok(t),
        _ => Field::Wrong(v.clone()),
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use serde_json::json;

    /// A JSON literal that outlives the test's statements, so raw types can borrow from it.
    macro_rules! leak {
        ($($t:tt)*) => {
            &*Box::leak(Box::new(json!($($t)*)))
        };
    }

    /// Every name in a `KNOWN` list is a field of its type: an object holding them all
    /// leaves nothing unknown.
    macro_rules! all_known {
        ($($t:ty: $known:expr),* $(,)?) => {$({
            let obj: Map<String, Value> =
                $known.iter().map(|k| (k.to_string(), json!(1))).collect();
            let v = Value::Object(obj);
            let Field::Ok(t) = section::<$t>(&v) else {
                panic!("{:?} did not read", $known)
            };
            assert!(t.unknown.is_empty(), "{:?}", $known);
        })*};
    }

    #[test]
    fn known_lists_match_the_types() {
        all_known!(
            RawModel: RawModel::KNOWN,
            RawEstimated: RawEstimated::KNOWN,
            RawDynamics: RawDynamics::KNOWN,
            RawLinear: RawLinear::DISCRETE,
            RawLinear: RawLinear::CONTINUOUS,
            RawProcessNoise: RawProcessNoise::KNOWN,
            RawSensor: RawSensor::KNOWN,
            RawFilter: RawFilter::KNOWN,
            RawUnscented: RawUnscented::KNOWN,
            RawEnsemble: RawEnsemble::KNOWN,
            RawIntegration: RawIntegration::KNOWN,
            RawGate: RawGate::KNOWN,
            RawPrior: RawPrior::KNOWN,
            RawOutput: RawOutput::KNOWN,
        );
    }

    #[test]
    fn wrong_leaves_are_kept_and_unknown_keys_collected() {
        let v = json!({"std": "wide", "initial": 1, "drift": 0.1, "colour": null});
        let Field::Ok(p) = section::<RawEstimated>(&v) else {
            panic!()
        };
        assert_eq!(p.std, Some(Field::Wrong(json!("wide"))));
        assert_eq!(p.initial, Some(Field::Ok(1.0)));
        let keys: Vec<&str> = p.unknown.keys().map(String::as_str).collect();
        assert_eq!(keys, ["drift", "colour"]);
    }

    #[test]
    fn null_reads_as_absent_and_arrays_are_not_objects() {
        let Field::Ok(g) = section::<RawGate>(leak!({"probability": null})) else {
            panic!()
        };
        assert!(g.probability.is_none());
        assert!(matches!(section::<RawGate>(leak!([0.5])), Field::Wrong(_)));
    }

    #[test]
    fn two_shaped_fields_take_either_shape() {
        let Field::Ok(s) = section::<RawSensor>(leak!({"measures": ["a", 2], "std": [1, "x"]}))
        else {
            panic!()
        };
        let Some(Field::Ok(Measures::Many(m))) = s.measures else {
            panic!()
        };
        assert_eq!(m, [Field::Ok("a"), Field::Wrong(json!(2))]);
        let Some(Field::Ok(Spread::PerComponent(sd))) = s.std else {
            panic!()
        };
        assert_eq!(sd, [Field::Ok(1.0), Field::Wrong(json!("x"))]);
        let Field::Ok(w) = section::<RawEnsemble>(leak!({"members": -3, "seed": 2.5})) else {
            panic!()
        };
        assert_eq!(w.members, Some(Field::Wrong(json!(-3))));
        assert_eq!(u64::found(&json!(2.5)), "2.5");
    }

    #[test]
    fn numbers_keep_their_text_and_shapes_their_variant() {
        let Field::Ok(d) = section::<RawDynamics>(leak!({"rates": {"a": 1.0, "b": 2, "c": "a"}}))
        else {
            panic!()
        };
        let Some(Field::Ok(rates)) = d.rates else {
            panic!()
        };
        let texts: Vec<String> = rates
            .0
            .iter()
            .map(|(_, f)| match f {
                Field::Ok(FormulaText::Number(n)) => n.to_string(),
                Field::Ok(FormulaText::Text(t)) => t.to_string(),
                Field::Wrong(v) => panic!("{v}"),
            })
            .collect();
        // A constant compiles from the text serde_json writes for it, as in v1.
        assert_eq!(texts, ["1.0", "2", "a"]);
        let Field::Ok(m) = section::<RawModel>(leak!({"parameters": {"k": 3, "m": "x", "e": {}}}))
        else {
            panic!()
        };
        let Some(Field::Ok(p)) = m.parameters else {
            panic!()
        };
        assert!(matches!(p.0[0].1, Field::Ok(RawParameter::Fixed(x)) if x == 3.0));
        assert_eq!(p.0[1].1.as_wrong(), Some(&json!("x")));
        assert!(matches!(p.0[2].1, Field::Ok(RawParameter::Estimated(_))));
        let Field::Ok(o) = section::<RawOutput>(leak!({"at": [3, "2026-03-01T06:00:00Z", {}]}))
        else {
            panic!()
        };
        let Some(Field::Ok(at)) = o.at else { panic!() };
        assert!(matches!(at[0], Field::Ok(RawTime::Seconds(x)) if x == 3.0));
        assert!(matches!(at[1], Field::Ok(RawTime::Stamp(_))));
        assert_eq!(at[2].as_wrong(), Some(&json!({})));
    }
}
