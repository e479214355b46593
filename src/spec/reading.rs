//! Measurement lines: parsed straight from JSON text into a compact [`Reading`] whose
//! sensor and input names are already resolved to indices. This is the hot parsing path
//! (a million lines per request), so it uses typed serde with borrowed strings rather than
//! a generic JSON tree.

use crate::problem::{escape_token, FieldError};
use crate::spec::model::Model;
use crate::spec::reader::names_list;
use crate::spec::time::{Instant, TimeMode};
use serde::de::{Deserializer, MapAccess, SeqAccess, Visitor};
use serde::Deserialize;
use std::borrow::Cow;
use std::fmt;

/// One measurement line, checked against the model.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct Reading {
    /// Time of the line.
    pub t: Instant,
    /// Sensors read on this line: `(sensor index, offset into z)`, in model sensor order.
    pub sensors: Vec<(usize, usize)>,
    /// Stacked reading values.
    pub z: Vec<f64>,
    /// Per-reading noise overrides: `(sensor index, offset into std)`.
    pub std_overrides: Vec<(usize, usize)>,
    /// Override std values.
    pub std: Vec<f64>,
    /// Inputs set on this line: `(input index, value)`.
    pub inputs: Vec<(usize, f64)>,
}

impl Default for Instant {
    fn default() -> Self {
        Instant::seconds(0.0)
    }
}

enum RawTime<'a> {
    Num(f64),
    Str(Cow<'a, str>),
}

impl<'de: 'a, 'a> Deserialize<'de> for RawTime<'a> {
    fn deserialize<D: Deserializer<'de>>(d: D) -> Result<Self, D::Error> {
        struct V<'a>(std::marker::PhantomData<&'a ()>);
        impl<'de: 'a, 'a> Visitor<'de> for V<'a> {
            type Value = RawTime<'a>;
            fn expecting(&self, f: &mut fmt::Formatter) -> fmt::Result {
                f.write_str("seconds (a number) or an RFC 3339 timestamp string")
            }
            fn visit_f64<E>(self, v: f64) -> Result<Self::Value, E> {
                Ok(RawTime::Num(v))
            }
            fn visit_i64<E>(self, v: i64) -> Result<Self::Value, E> {
                Ok(RawTime::Num(v as f64))
            }
            fn visit_u64<E>(self, v: u64) -> Result<Self::Value, E> {
                Ok(RawTime::Num(v as f64))
            }
            fn visit_borrowed_str<E>(self, v: &'de str) -> Result<Self::Value, E> {
                Ok(RawTime::Str(Cow::Borrowed(v)))
            }
            fn visit_str<E>(self, v: &str) -> Result<Self::Value, E> {
                Ok(RawTime::Str(Cow::Owned(v.to_string())))
            }
        }
        d.deserialize_any(V(std::marker::PhantomData))
    }
}

/// A reading value: absent, one number, or a list for a vector sensor.
enum RawVal {
    Null,
    Num(f64),
    List(Vec<f64>),
}

impl<'de> Deserialize<'de> for RawVal {
    fn deserialize<D: Deserializer<'de>>(d: D) -> Result<Self, D::Error> {
        struct V;
        impl<'de> Visitor<'de> for V {
            type Value = RawVal;
            fn expecting(&self, f: &mut fmt::Formatter) -> fmt::Result {
                f.write_str("a number, a list of numbers, or null")
            }
            fn visit_f64<E>(self, v: f64) -> Result<Self::Value, E> {
                Ok(RawVal::Num(v))
            }
            fn visit_i64<E>(self, v: i64) -> Result<Self::Value, E> {
                Ok(RawVal::Num(v as f64))
            }
            fn visit_u64<E>(self, v: u64) -> Result<Self::Value, E> {
                Ok(RawVal::Num(v as f64))
            }
            fn visit_unit<E>(self) -> Result<Self::Value, E> {
                Ok(RawVal::Null)
            }
            fn visit_none<E>(self) -> Result<Self::Value, E> {
                Ok(RawVal::Null)
            }
            fn visit_seq<A: SeqAccess<'de>>(self, mut seq: A) -> Result<Self::Value, A::Error> {
                let mut v = Vec::with_capacity(seq.size_hint().unwrap_or(2).min(64));
                while let Some(x) = seq.next_element::<f64>()? {
                    v.push(x);
                }
                Ok(RawVal::List(v))
            }
        }
        d.deserialize_any(V)
    }
}

/// Object members in document order, keys borrowed where possible.
struct Entries<'a, V>(Vec<(Cow<'a, str>, V)>);

impl<'de: 'a, 'a, V: Deserialize<'de>> Deserialize<'de> for Entries<'a, V> {
    fn deserialize<D: Deserializer<'de>>(d: D) -> Result<Self, D::Error> {
        struct Vis<'a, V>(std::marker::PhantomData<(&'a (), V)>);
        impl<'de: 'a, 'a, V: Deserialize<'de>> Visitor<'de> for Vis<'a, V> {
            type Value = Entries<'a, V>;
            fn expecting(&self, f: &mut fmt::Formatter) -> fmt::Result {
                f.write_str("an object")
            }
            fn visit_map<A: MapAccess<'de>>(self, mut map: A) -> Result<Self::Value, A::Error> {
                let mut v = Vec::with_capacity(map.size_hint().unwrap_or(2).min(64));
                while let Some(k) = map.next_key::<Cow<'a, str>>()? {
                    let val = map.next_value::<V>()?;
                    v.push((k, val));
                }
                Ok(Entries(v))
            }
        }
        d.deserialize_map(Vis(std::marker::PhantomData))
    }
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct RawReading<'a> {
    #[serde(borrow)]
    t: RawTime<'a>,
    #[serde(default, borrow)]
    values: Option<Entries<'a, RawVal>>,
    #[serde(default, borrow)]
    inputs: Option<Entries<'a, Option<f64>>>,
    #[serde(default, borrow)]
    std: Option<Entries<'a, RawVal>>,
}

/// What went wrong while reading one measurement line.
pub enum LineError {
    /// The text is not JSON at all (a 400 for a batch, an error line for a stream).
    Syntax(String),
    /// Valid JSON that is not a valid reading; pointers relative to the line.
    Invalid(Vec<FieldError>),
}

impl LineError {
    /// The same error with every pointer put under `base` (e.g. `/measurements/7`).
    pub fn under(self, base: &str) -> Self {
        match self {
            Self::Invalid(errors) => Self::Invalid(
                errors
                    .into_iter()
                    .map(|mut e| {
                        e.pointer.insert_str(0, base);
                        e
                    })
                    .collect(),
            ),
            other => other,
        }
    }
}

/// Parses measurement lines against one model, reusing nothing but the model.
pub struct ReadingParser<'m> {
    model: &'m Model,
    mode: TimeMode,
}

impl<'m> ReadingParser<'m> {
    /// A parser for readings of `model` whose times take the form `mode`.
    pub fn new(model: &'m Model, mode: TimeMode) -> Self {
        Self { model, mode }
    }

    /// Parse one line (JSON text). Pointers in errors are relative to the line (`/t`,
    /// `/values/encoder`); a batch puts them under `/measurements/{i}` with
    /// [`LineError::under`], only once a line has failed.
    ///
    /// The line is read with plain serde first. Only a line that fails is read again
    /// through `serde_path_to_error` to locate the bad field: tracking the path costs
    /// about as much as the parse itself, and almost every line is fine.
    pub fn parse(&self, text: &str, out: &mut Reading) -> Result<(), LineError> {
        let mut de = serde_json::Deserializer::from_str(text);
        let fast = RawReading::deserialize(&mut de).and_then(|raw| de.end().map(|()| raw));
        let raw = match fast {
            Ok(raw) => raw,
            Err(_) => return Err(self.parse_failed(text)),
        };
        self.resolve(raw, out).map_err(LineError::Invalid)
    }

    /// The error of a line that failed the fast parse, read again with path tracking so
    /// it carries the same pointer and message as ever.
    fn parse_failed(&self, text: &str) -> LineError {
        let mut de = serde_json::Deserializer::from_str(text);
        match serde_path_to_error::deserialize::<_, RawReading>(&mut de) {
            Err(e) => {
                let path = path_to_pointer(e.path());
                let inner = e.into_inner();
                match inner.classify() {
                    serde_json::error::Category::Data => {
                        LineError::Invalid(vec![FieldError::new(path, clean_message(&inner))])
                    }
                    _ => LineError::Syntax(inner.to_string()),
                }
            }
            Ok(_) => match de.end() {
                Err(e) => LineError::Syntax(e.to_string()),
                // Both readers take the same input the same way; this is not reached.
                Ok(()) => LineError::Syntax("the line could not be read".to_string()),
            },
        }
    }

    fn resolve(&self, raw: RawReading<'_>, out: &mut Reading) -> Result<(), Vec<FieldError>> {
        let m = self.model;
        let mut errs = Vec::new();
        out.sensors.clear();
        out.z.clear();
        out.std_overrides.clear();
        out.std.clear();
        out.inputs.clear();
        let tp = || "/t".to_string();
        match raw.t {
            RawTime::Num(x) if self.mode == TimeMode::Seconds && x.is_finite() => {
                out.t = Instant::seconds(x)
            }
            RawTime::Str(s) if self.mode == TimeMode::Stamp => match Instant::parse_rfc3339(&s) {
                Ok(i) => out.t = i,
                Err(e) => errs.push(FieldError::new(tp(), e)),
            },
            RawTime::Num(_) if self.mode == TimeMode::Seconds => {
                errs.push(FieldError::new(tp(), "number is out of range"))
            }
            _ => errs.push(FieldError::new(
                tp(),
                "one request uses one time form: this line's t differs from the prior's",
            )),
        }
        if let Some(values) = raw.values {
            for (name, v) in values.0 {
                let p = || format!("/values/{}", escape_token(&name));
                let Some(si) = m.sensor_index(&name) else {
                    errs.push(FieldError::new(
                        p(),
                        format!(
                            "unknown sensor '{name}'; sensors are {}",
                            names_list(
                                &m.sensors
                                    .iter()
                                    .map(|s| s.name.as_str())
                                    .collect::<Vec<_>>()
                            )
                        ),
                    ));
                    continue;
                };
                if out.sensors.iter().any(|(s, _)| *s == si) {
                    errs.push(FieldError::new(
                        p(),
                        format!("sensor '{name}' appears twice"),
                    ));
                    continue;
                }
                let dim = m.sensors[si].dim;
                let start = out.z.len();
                match v {
                    RawVal::Null => continue,
                    RawVal::Num(x) if dim == 1 => out.z.push(x),
                    RawVal::List(xs) if xs.len() == dim => out.z.extend_from_slice(&xs),
                    RawVal::Num(_) => {
                        errs.push(FieldError::new(
                            p(),
                            format!("sensor '{name}' reads {dim} values; give a list of {dim}"),
                        ));
                        continue;
                    }
                    RawVal::List(xs) => {
                        errs.push(FieldError::new(
                            p(),
                            format!(
                                "sensor '{name}' reads {dim} value(s), found a list of {}",
                                xs.len()
                            ),
                        ));
                        continue;
                    }
                }
                out.sensors.push((si, start));
            }
            // Stack in model sensor order so the same readings give the same update whatever
            // order the client wrote them in.
            if out.sensors.windows(2).any(|w| w[0].0 > w[1].0) {
                let mut pairs: Vec<(usize, Vec<f64>)> = out
                    .sensors
                    .iter()
                    .map(|&(s, o)| (s, out.z[o..o + m.sensors[s].dim].to_vec()))
                    .collect();
                pairs.sort_by_key(|p| p.0);
                out.sensors.clear();
                out.z.clear();
                for (s, vals) in pairs {
                    out.sensors.push((s, out.z.len()));
                    out.z.extend_from_slice(&vals);
                }
            }
        }
        if let Some(inputs) = raw.inputs {
            for (name, v) in inputs.0 {
                let p = || format!("/inputs/{}", escape_token(&name));
                match (m.input_index(&name), v) {
                    (Some(i), Some(x)) => out.inputs.push((i, x)),
                    (Some(_), None) => {}
                    (None, _) => errs.push(FieldError::new(
                        p(),
                        format!(
                            "unknown input '{name}'; inputs are {}",
                            names_list(&m.inputs)
                        ),
                    )),
                }
            }
        }
        if let Some(stds) = raw.std {
            for (name, v) in stds.0 {
                let p = || format!("/std/{}", escape_token(&name));
                let Some(si) = m.sensor_index(&name) else {
                    errs.push(FieldError::new(p(), format!("unknown sensor '{name}'")));
                    continue;
                };
                let dim = m.sensors[si].dim;
                let start = out.std.len();
                match v {
                    RawVal::Null => continue,
                    RawVal::Num(x) => out.std.extend(std::iter::repeat_n(x, dim)),
                    RawVal::List(xs) if xs.len() == dim => out.std.extend_from_slice(&xs),
                    RawVal::List(xs) => {
                        errs.push(FieldError::new(
                            p(),
                            format!(
                                "sensor '{name}' has {dim} component(s), found {} std values",
                                xs.len()
                            ),
                        ));
                        continue;
                    }
                }
                if out.std[start..].iter().any(|s| !(*s > 0.0)) {
                    errs.push(FieldError::new(p(), "std must be positive"));
                    out.std.truncate(start);
                    continue;
                }
                out.std_overrides.push((si, start));
            }
        }
        if errs.is_empty() {
            Ok(())
        } else {
            Err(errs)
        }
    }
}

fn path_to_pointer(path: &serde_path_to_error::Path) -> String {
    use serde_path_to_error::Segment;
    let mut s = String::new();
    for seg in path.iter() {
        match seg {
            Segment::Seq { index } => s.push_str(&format!("/{index}")),
            Segment::Map { key } => {
                s.push('/');
                s.push_str(&escape_token(key));
            }
            Segment::Enum { variant } => {
                s.push('/');
                s.push_str(&escape_token(variant));
            }
            Segment::Unknown => {}
        }
    }
    s
}

/// serde_json's message without its " at line 1 column 17" tail.
pub fn clean_message(e: &serde_json::Error) -> String {
    let s = e.to_string();
    match s.rfind(" at line ") {
        Some(i) => s[..i].to_string(),
        None => s,
    }
}
