//! A request section's text read into a JSON tree that refuses a key repeated within one
//! object. serde_json's own tree keeps the last of two equal keys silently, so
//! `{"p": 0, "p": 5}` would read as `{"p": 5}`; RFC 8259 §4 leaves repeated names to the
//! reader ("the names within an object SHOULD be unique"), and this service refuses them
//! everywhere, at the pointer of the second occurrence.
//!
//! The check costs nothing extra: each member is inserted through the map's entry, which
//! finds an earlier equal key in the same lookup the insert makes anyway. Pointers are
//! built only when something fails, each level adding its own key or index to the trail
//! as the error passes back up.

use crate::problem::{escape_token, FieldError};
use serde::de::{self, DeserializeSeed, MapAccess, SeqAccess, Visitor};
use serde_json::map::Entry;
use serde_json::{Map, Number, Value};
use std::fmt;

/// Why a section's text did not become a tree.
#[derive(Debug)]
pub enum TreeError {
    /// A key given twice in one object: a field error at the second occurrence.
    Repeated(FieldError),
    /// serde_json's own error (a number beyond a double, or broken text), with the
    /// pointer of the value it was met in.
    Json {
        /// Where it was met.
        pointer: String,
        /// What serde_json said.
        error: serde_json::Error,
    },
}

/// The message of a key given twice in one object.
pub fn repeated_key(key: &str) -> String {
    format!("'{key}' appears twice in this object")
}

/// Read `text` (a section at pointer `base`) into a tree, refusing repeated keys.
pub fn tree(text: &str, base: &str) -> Result<Value, TreeError> {
    let mut trail = Trail::default();
    let mut de = serde_json::Deserializer::from_str(text);
    let read = Node(&mut trail)
        .deserialize(&mut de)
        .and_then(|v| de.end().map(|()| v));
    read.map_err(|error| {
        let mut pointer = base.to_string();
        // Built here rather than with `reader::child`, as `reader` reads sections with this.
        for seg in trail.segments.iter().rev() {
            pointer.push('/');
            match seg {
                Segment::Key(k) => pointer.push_str(&escape_token(k)),
                Segment::Index(i) => pointer.push_str(&i.to_string()),
            }
        }
        match trail.repeated {
            Some(key) => TreeError::Repeated(FieldError::new(pointer, repeated_key(&key))),
            None => TreeError::Json { pointer, error },
        }
    })
}

/// One step of a pointer.
enum Segment {
    Key(String),
    Index(usize),
}

/// Where a failed read was, innermost step first, and the repeated key if that was why.
#[derive(Default)]
struct Trail {
    segments: Vec<Segment>,
    repeated: Option<String>,
}

/// Reads one value of the tree; the trail is written only on the way out of an error.
struct Node<'t>(&'t mut Trail);

impl<'de> DeserializeSeed<'de> for Node<'_> {
    type Value = Value;

    fn deserialize<D: de::Deserializer<'de>>(self, d: D) -> Result<Value, D::Error> {
        d.deserialize_any(self)
    }
}

impl<'de> Visitor<'de> for Node<'_> {
    type Value = Value;

    fn expecting(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str("any JSON value")
    }

    fn visit_bool<E>(self, b: bool) -> Result<Value, E> {
        Ok(Value::Bool(b))
    }

    fn visit_i64<E>(self, x: i64) -> Result<Value, E> {
        Ok(Value::Number(x.into()))
    }

    fn visit_u64<E>(self, x: u64) -> Result<Value, E> {
        Ok(Value::Number(x.into()))
    }

    /// As serde_json's own tree does: a double that is not finite has no JSON number.
    fn visit_f64<E>(self, x: f64) -> Result<Value, E> {
        Ok(Number::from_f64(x).map_or(Value::Null, Value::Number))
    }

    fn visit_str<E>(self, s: &str) -> Result<Value, E> {
        Ok(Value::String(s.to_string()))
    }

    fn visit_string<E>(self, s: String) -> Result<Value, E> {
        Ok(Value::String(s))
    }

    fn visit_unit<E>(self) -> Result<Value, E> {
        Ok(Value::Null)
    }

    fn visit_none<E>(self) -> Result<Value, E> {
        Ok(Value::Null)
    }

    fn visit_seq<A: SeqAccess<'de>>(self, mut seq: A) -> Result<Value, A::Error> {
        let mut out = Vec::with_capacity(seq.size_hint().unwrap_or(0).min(4096));
        loop {
            match seq.next_element_seed(Node(&mut *self.0)) {
                Ok(Some(v)) => out.push(v),
                Ok(None) => return Ok(Value::Array(out)),
                Err(e) => {
                    self.0.segments.push(Segment::Index(out.len()));
                    return Err(e);
                }
            }
        }
    }

    fn visit_map<A: MapAccess<'de>>(self, mut m: A) -> Result<Value, A::Error> {
        let mut out = Map::new();
        while let Some(key) = m.next_key::<String>()? {
            let v = match m.next_value_seed(Node(&mut *self.0)) {
                Ok(v) => v,
                Err(e) => {
                    self.0.segments.push(Segment::Key(key));
                    return Err(e);
                }
            };
            match out.entry(key) {
                Entry::Vacant(slot) => {
                    slot.insert(v);
                }
                Entry::Occupied(first) => {
                    let key = first.key().clone();
                    self.0.repeated = Some(key.clone());
                    self.0.segments.push(Segment::Key(key));
                    return Err(de::Error::custom("a key appears twice in one object"));
                }
            }
        }
        Ok(Value::Object(out))
    }
}

#[cfg(test)]
mod tests {
    use super::{tree, TreeError};
    use serde_json::json;

    fn repeated(text: &str) -> (String, String) {
        match tree(text, "/prior") {
            Err(TreeError::Repeated(e)) => (e.pointer, e.detail),
            other => panic!("{text}: {other:?}"),
        }
    }

    #[test]
    fn reads_the_tree_serde_json_reads() {
        for text in [
            r#"{"mean": {"p": 0, "v": -1.5e-3}, "t": "2026-03-01T06:00:00Z", "n": null}"#,
            r#"[1, 18446744073709551615, -9223372036854775808, 0.1, true, "a\"b", [], {}]"#,
            r#"{"b": 1, "a": {"b": [{"b": 2}]}}"#,
        ] {
            let ours = tree(text, "").unwrap_or_else(|e| panic!("{text}: {e:?}"));
            let theirs: serde_json::Value = serde_json::from_str(text).unwrap();
            assert_eq!(ours, theirs, "{text}");
            // Key order is kept (the crate's `preserve_order`), as serde_json keeps it.
            assert_eq!(ours.to_string(), theirs.to_string(), "{text}");
        }
    }

    #[test]
    fn a_repeated_key_is_refused_at_its_second_occurrence() {
        // The issue's input: prior.mean {"p": 0, "p": 5}.
        assert_eq!(
            repeated(r#"{"mean": {"p": 0, "p": 5}}"#),
            (
                "/prior/mean/p".to_string(),
                "'p' appears twice in this object".to_string()
            )
        );
        // Deep inside arrays, with a key that needs escaping in a pointer (RFC 6901 §3).
        assert_eq!(
            repeated(r#"{"m": [0, {"a/b": 1, "x": [], "a/b": 2}]}"#).0,
            "/prior/m/1/a~1b"
        );
        // Equal after unescaping is equal: "\u0070" is "p".
        assert_eq!(repeated(r#"{"p": 0, "\u0070": 5}"#).0, "/prior/p");
        // The same key in two different objects is not a repeat.
        assert!(tree(r#"{"a": {"p": 1}, "b": {"p": 1}}"#, "").is_ok());
        assert_eq!(
            tree(r#"{"a": {"p": 1}}"#, "").unwrap(),
            json!({"a": {"p": 1}})
        );
    }

    #[test]
    fn other_faults_carry_the_pointer_of_their_value() {
        match tree(r#"[{"t": 1, "inputs": {"pump": 1e400}}]"#, "/inputs") {
            Err(TreeError::Json { pointer, error }) => {
                assert_eq!(pointer, "/inputs/0/inputs/pump");
                assert!(error.to_string().contains("out of range"), "{error}");
            }
            other => panic!("{other:?}"),
        }
    }
}
