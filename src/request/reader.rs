//! Pointer-carrying access to a parsed JSON document: every accessor knows the RFC 6901
//! pointer of what it reads, and every problem is collected (not just the first) as a
//! [`FieldError`] naming that pointer.

use crate::problem::{escape_token, FieldError};
use serde_json::{Map, Value};

/// Collects field errors while a request section is being read.
#[derive(Debug, Default)]
pub struct Errors {
    list: Vec<FieldError>,
}

impl Errors {
    /// Record a problem at `pointer`.
    pub fn push(&mut self, pointer: &str, detail: impl Into<String>) {
        self.list.push(FieldError::new(pointer, detail));
    }

    /// Record a ready-made field error.
    pub fn push_field(&mut self, e: FieldError) {
        self.list.push(e);
    }

    /// Whether nothing went wrong so far.
    pub fn is_empty(&self) -> bool {
        self.list.is_empty()
    }

    /// How many errors were collected.
    pub fn len(&self) -> usize {
        self.list.len()
    }

    /// The collected errors.
    pub fn into_vec(self) -> Vec<FieldError> {
        self.list
    }
}

/// `pointer + "/" + token`, with the token escaped.
pub fn child(pointer: &str, token: &str) -> String {
    let mut s = String::with_capacity(pointer.len() + token.len() + 1);
    s.push_str(pointer);
    s.push('/');
    s.push_str(&escape_token(token));
    s
}

/// `pointer + "/" + index`.
pub fn index(pointer: &str, i: usize) -> String {
    format!("{pointer}/{i}")
}

/// A human name of a JSON value's type, for "expected X, found Y" messages.
pub fn kind_of(v: &Value) -> &'static str {
    match v {
        Value::Null => "null",
        Value::Bool(_) => "a boolean",
        Value::Number(_) => "a number",
        Value::String(_) => "a string",
        Value::Array(_) => "an array",
        Value::Object(_) => "an object",
    }
}

/// A JSON object being read, with its pointer.
pub struct Obj<'a> {
    /// The object's members.
    pub map: &'a Map<String, Value>,
    /// Pointer of the object itself.
    pub ptr: String,
}

impl<'a> Obj<'a> {
    /// View `v` as an object, or record an error.
    pub fn new(v: &'a Value, ptr: &str, errs: &mut Errors) -> Option<Self> {
        match v {
            Value::Object(map) => Some(Self {
                map,
                ptr: ptr.to_string(),
            }),
            other => {
                errs.push(ptr, format!("expected an object, found {}", kind_of(other)));
                None
            }
        }
    }

    /// Pointer of member `key`.
    pub fn at(&self, key: &str) -> String {
        child(&self.ptr, key)
    }

    /// Member `key`, treating `null` as absent.
    pub fn get(&self, key: &str) -> Option<&'a Value> {
        self.map.get(key).filter(|v| !v.is_null())
    }

    /// Record every member not in `allowed` as unknown.
    pub fn deny_unknown(&self, allowed: &[&str], errs: &mut Errors) {
        for k in self.map.keys() {
            if !allowed.contains(&k.as_str()) {
                errs.push(
                    &self.at(k),
                    format!(
                        "unknown field '{k}'; expected one of {}",
                        allowed.join(", ")
                    ),
                );
            }
        }
    }

    /// A required member, or an error naming it.
    pub fn required(&self, key: &str, errs: &mut Errors) -> Option<&'a Value> {
        let v = self.get(key);
        if v.is_none() {
            errs.push(&self.at(key), format!("missing required field '{key}'"));
        }
        v
    }

    /// An optional object member.
    pub fn object(&self, key: &str, errs: &mut Errors) -> Option<Obj<'a>> {
        self.get(key).and_then(|v| Obj::new(v, &self.at(key), errs))
    }
}

/// A finite number, or an error.
pub fn number(v: &Value, ptr: &str, errs: &mut Errors) -> Option<f64> {
    match v.as_f64() {
        Some(x) if x.is_finite() => Some(x),
        Some(_) => {
            errs.push(ptr, "number is out of range");
            None
        }
        None => {
            errs.push(ptr, format!("expected a number, found {}", kind_of(v)));
            None
        }
    }
}

/// A finite number that must be strictly positive.
pub fn positive(v: &Value, ptr: &str, what: &str, errs: &mut Errors) -> Option<f64> {
    let x = number(v, ptr, errs)?;
    if x > 0.0 {
        Some(x)
    } else {
        errs.push(ptr, format!("{what} must be positive, got {x}"));
        None
    }
}

/// An array, or an error.
pub fn array<'a>(v: &'a Value, ptr: &str, errs: &mut Errors) -> Option<&'a [Value]> {
    match v {
        Value::Array(a) => Some(a),
        other => {
            errs.push(ptr, format!("expected an array, found {}", kind_of(other)));
            None
        }
    }
}

/// A non-negative whole number that fits `u64`.
pub fn whole(v: &Value, ptr: &str, errs: &mut Errors) -> Option<u64> {
    match v.as_u64() {
        Some(x) => Some(x),
        None => {
            errs.push(
                ptr,
                format!("expected a whole number ≥ 0, found {}", describe(v)),
            );
            None
        }
    }
}

fn describe(v: &Value) -> String {
    match v {
        Value::Number(n) => n.to_string(),
        other => kind_of(other).to_string(),
    }
}

/// "a, b, c" for messages listing known names.
pub fn names_list<S: AsRef<str>>(names: &[S]) -> String {
    if names.is_empty() {
        return "(none)".to_string();
    }
    names
        .iter()
        .map(|s| s.as_ref())
        .collect::<Vec<_>>()
        .join(", ")
}

/// Parse a request section's text (already checked to be JSON syntax) into a tree, or
/// name the field that cannot be held in one: a key given twice in one object (see
/// [`crate::request::raw::tree()`]), or a number beyond the range of a double (`1e400`),
/// which passes the syntax check but has no finite value. `base` is the section's pointer.
pub fn parse_section(text: &str, base: &str) -> Result<Value, FieldError> {
    use crate::request::raw::{tree, TreeError};
    tree(text, base).map_err(|e| match e {
        TreeError::Repeated(f) => f,
        TreeError::Json { pointer, error } => {
            let detail = if error.to_string().contains("out of range") {
                "number is out of range: a value must be a finite number".to_string()
            } else {
                error.to_string()
            };
            FieldError::new(pointer, detail)
        }
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn a_number_beyond_a_double_is_named_by_its_pointer() {
        let e = parse_section(r#"[{"t": 1, "inputs": {"pump": 1e400}}]"#, "/inputs")
            .expect_err("1e400 has no finite value");
        assert_eq!(e.pointer, "/inputs/0/inputs/pump");
        let ok = parse_section(r#"[{"t": 1, "inputs": {"pump": 2.5}}]"#, "/inputs").unwrap();
        assert_eq!(ok[0]["inputs"]["pump"], 2.5);
    }
}
