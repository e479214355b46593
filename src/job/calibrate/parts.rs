//! The calibrate request split at its top level without building a tree of its readings
//! (millions of lines would take kilobytes each as JSON trees), and the answer's echo of
//! the request written with the readings put back line by line.
//!
//! The body is read as an ordered list of members, each kept as raw JSON text; every
//! member but `measurements` then becomes a tree (an empty list holds the readings'
//! place). When the answer is written, the echoed request is that tree (fitted values
//! substituted) with `measurements` written in its place,
//! each line parsed on its own, its `null` members dropped, and written at once: the same
//! bytes as writing one tree of the whole request, without holding it.

use crate::model::Stop;
use crate::problem::Problem;
use crate::request::envelope;
use serde::de::{Deserialize, Deserializer, MapAccess, Visitor};
use serde::ser::{Error as _, Serialize, SerializeMap, SerializeSeq, Serializer};
use serde_json::value::RawValue;
use serde_json::{Map, Value};
use std::fmt;
use std::marker::PhantomData;

/// The body's top-level members in their order, each as raw JSON text; a key given twice
/// keeps its first place and its last value (as a JSON tree of the body would).
pub(super) struct Members<'a>(pub Vec<(String, &'a RawValue)>);

impl<'de: 'a, 'a> Deserialize<'de> for Members<'a> {
    fn deserialize<D: Deserializer<'de>>(d: D) -> Result<Self, D::Error> {
        struct V<'a>(PhantomData<&'a ()>);
        impl<'de: 'a, 'a> Visitor<'de> for V<'a> {
            type Value = Members<'a>;
            fn expecting(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
                f.write_str("a JSON object")
            }
            fn visit_map<A: MapAccess<'de>>(self, mut m: A) -> Result<Members<'a>, A::Error> {
                let mut out: Vec<(String, &'a RawValue)> = Vec::new();
                while let Some(k) = m.next_key::<String>()? {
                    let v: &'a RawValue = m.next_value()?;
                    match out.iter_mut().find(|(x, _)| *x == k) {
                        Some(slot) => slot.1 = v,
                        None => out.push((k, v)),
                    }
                }
                Ok(Members(out))
            }
        }
        d.deserialize_map(V(PhantomData))
    }
}

/// Split `body`: a syntax error is a 400, anything but an object a 422 at the root.
pub(super) fn members(body: &[u8]) -> Result<Members<'_>, Problem> {
    serde_json::from_slice::<Members<'_>>(body).map_err(|e| match e.classify() {
        serde_json::error::Category::Data => Problem::field("", "the request is a JSON object"),
        _ => envelope::json_problem(e),
    })
}

impl<'a> Members<'a> {
    /// Take the member `key` out.
    pub(super) fn take(&mut self, key: &str) -> Option<&'a RawValue> {
        let i = self.0.iter().position(|(k, _)| k == key)?;
        Some(self.0.remove(i).1)
    }

    /// The raw text of member `key`.
    pub(super) fn get(&self, key: &str) -> Option<&'a RawValue> {
        self.0.iter().find(|(k, _)| k == key).map(|(_, v)| *v)
    }

    /// Every member as one tree, `measurements` (when given) as an empty list holding
    /// its place.
    pub(super) fn head(&self) -> Result<Map<String, Value>, Problem> {
        let mut head = Map::new();
        for (k, v) in &self.0 {
            let tree: Value = if k == "measurements" {
                Value::Array(Vec::new())
            } else {
                serde_json::from_str(v.get()).map_err(envelope::json_problem)?
            };
            head.insert(k.clone(), tree);
        }
        Ok(head)
    }
}

/// An object written as `map` with the value of its member `key` (a placeholder) given
/// by `value`.
pub(super) struct Spliced<'a, T> {
    /// The members, in order.
    pub map: &'a Map<String, Value>,
    /// The member whose value is written from `value`.
    pub key: &'a str,
    /// Its value.
    pub value: T,
}

impl<T: Serialize> Serialize for Spliced<'_, T> {
    fn serialize<S: Serializer>(&self, s: S) -> Result<S::Ok, S::Error> {
        let mut m = s.serialize_map(Some(self.map.len()))?;
        for (k, v) in self.map {
            if k == self.key {
                m.serialize_entry(k, &self.value)?;
            } else {
                m.serialize_entry(k, v)?;
            }
        }
        m.end()
    }
}

/// Lines between two looks at the request's stop while the readings are written back.
const STOP_EVERY: usize = 4096;

/// The measurement lines written back, each without its `null` members (an optional
/// field given as `null` counts as absent), stopping when the request's stop fires.
pub(super) struct Echoed<'a> {
    /// Each line's text.
    pub lines: &'a [&'a str],
    /// The request's stop.
    pub stop: &'a Stop,
}

impl Serialize for Echoed<'_> {
    fn serialize<S: Serializer>(&self, s: S) -> Result<S::Ok, S::Error> {
        let mut seq = s.serialize_seq(Some(self.lines.len()))?;
        for (i, text) in self.lines.iter().enumerate() {
            if self.stop.every(i, STOP_EVERY).is_some() {
                return Err(S::Error::custom("stopped"));
            }
            let mut line: Value = serde_json::from_str(text).map_err(S::Error::custom)?;
            if let Value::Object(l) = &mut line {
                l.retain(|_, y| !y.is_null());
            }
            seq.serialize_element(&line)?;
        }
        seq.end()
    }
}
