//! The building blocks of the raw types: [`Field`] (a value of the expected JSON type,
//! or what was found instead), [`Entries`] (an object keyed by the request's own names),
//! [`Expected`] (how a type is named in messages), and the two macros that give raw types
//! their `Deserialize` and `Expected` impls.

use serde::de::{self, value, IntoDeserializer, MapAccess, SeqAccess, Visitor};
use serde::{Deserialize, Deserializer};
use serde_json::{Number, Value};
use std::fmt;
use std::marker::PhantomData;

/// A human name of a JSON value's type, for "expected X, found Y" messages.
pub fn kind_of(v: &Value) -> &'static str {
    crate::request::reader::kind_of(v)
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

impl<T> Expected for Entries<'_, T> {
    const EXPECTED: &'static str = "an object";
    const OBJECT: bool = true;
}

/// Raw types read from a JSON object.
macro_rules! an_object {
    ($($t:ty),*) => {
        $(impl $crate::request::raw::Expected for $t {
            const EXPECTED: &'static str = "an object";
            const OBJECT: bool = true;
        })*
    };
}
pub(crate) use an_object;

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
        impl<'de: 'a, 'a> serde::Deserialize<'de> for $t {
            fn deserialize<D: serde::Deserializer<'de>>(d: D) -> Result<Self, D::Error> {
                struct V<'a>(std::marker::PhantomData<&'a ()>);
                impl<'de: 'a, 'a> serde::de::Visitor<'de> for V<'a> {
                    type Value = $t;
                    fn expecting(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
                        f.write_str(<$t as $crate::request::raw::Expected>::EXPECTED)
                    }
                    $(
                    fn visit_u64<E: serde::de::Error>(self, x: u64) -> Result<$t, E> {
                        let $n = serde_json::Number::from(x);
                        Ok($num)
                    }
                    fn visit_i64<E: serde::de::Error>(self, x: i64) -> Result<$t, E> {
                        let $n = serde_json::Number::from(x);
                        Ok($num)
                    }
                    fn visit_f64<E: serde::de::Error>(self, x: f64) -> Result<$t, E> {
                        let $n = serde_json::Number::from_f64(x)
                            .ok_or_else(|| E::custom("number is out of range"))?;
                        Ok($num)
                    }
                    )?
                    $(
                    fn visit_borrowed_str<E: serde::de::Error>(self, $s: &'de str) -> Result<$t, E> {
                        Ok($str)
                    }
                    )?
                    $(
                    fn visit_seq<A: serde::de::SeqAccess<'de>>(self, seq: A) -> Result<$t, A::Error> {
                        serde::Deserialize::deserialize(serde::de::value::SeqAccessDeserializer::new(seq)).map($arr)
                    }
                    )?
                    $(
                    fn visit_map<A: serde::de::MapAccess<'de>>(self, map: A) -> Result<$t, A::Error> {
                        serde::Deserialize::deserialize(serde::de::value::MapAccessDeserializer::new(map)).map($obj)
                    }
                    )?
                }
                d.deserialize_any(V(std::marker::PhantomData))
            }
        }
    };
}
pub(crate) use by_json_type;

/// Read a section's JSON tree into its raw type, or `None` with the tree when it is not an
/// object. Every field of a raw object type accepts any JSON value (see [`Field`]), so an
/// object always reads.
pub fn section<'a, T: Deserialize<'a>>(v: &'a Value) -> Field<T> {
    match T::deserialize(v) {
        Ok(t) if v.is_object() => Field::Ok(t),
        _ => Field::Wrong(v.clone()),
    }
}
