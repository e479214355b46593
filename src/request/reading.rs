//! Measurement lines: parsed straight from JSON text into a compact [`Reading`] whose
//! sensor and input names are already resolved to indices. This is the hot parsing path
//! (a million lines per request), so it uses typed serde with borrowed strings rather than
//! a generic JSON tree.

use crate::model::Model;
use crate::model::Reading;
use crate::model::{Instant, TimeMode, Zone};
use crate::problem::{escape_token, FieldError};
use crate::request::line_scan::Scan;
use crate::request::raw::repeated_key;
use crate::request::reader::names_list;
use serde::de::{Deserializer, MapAccess, SeqAccess, Visitor};
use serde::Deserialize;
use std::borrow::Cow;
use std::fmt;

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
    noise_std: Option<Entries<'a, RawVal>>,
    /// The v1 name of `noise_std`, accepted by the parser only to be refused by name.
    #[serde(default)]
    std: Option<serde::de::IgnoredAny>,
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
    /// Where timestamps without an offset are read (the request's `time_zone`).
    zone: &'m Zone,
}

impl<'m> ReadingParser<'m> {
    /// A parser for readings of `model` whose times take the form `mode`, offset-less
    /// timestamps read in `zone`.
    pub fn new(model: &'m Model, mode: TimeMode, zone: &'m Zone) -> Self {
        Self { model, mode, zone }
    }

    /// Parse one line (JSON text). Pointers in errors are relative to the line (`/t`,
    /// `/values/encoder`); a batch puts them under `/measurements/{i}` with
    /// [`LineError::under`], only once a line has failed.
    ///
    /// The line is read with plain serde first. Only a line that fails is read again
    /// through `serde_path_to_error` to locate the bad field: tracking the path costs
    /// about as much as the parse itself, and almost every line is fine.
    pub fn parse(&self, text: &str, out: &mut Reading) -> Result<(), LineError> {
        if self.parse_plain(text, out).is_some() {
            return Ok(());
        }
        self.parse_full(text, out)
    }

    /// [`ReadingParser::parse`] by serde alone: any line, with its errors.
    fn parse_full(&self, text: &str, out: &mut Reading) -> Result<(), LineError> {
        let mut de = serde_json::Deserializer::from_str(text);
        let fast = RawReading::deserialize(&mut de).and_then(|raw| de.end().map(|()| raw));
        let raw = match fast {
            Ok(raw) => raw,
            Err(_) => return Err(self.parse_failed(text)),
        };
        self.resolve(raw, out).map_err(LineError::Invalid)
    }

    /// The usual line, `{"t": <number> | "<timestamp>", "values": {"<sensor>": <number> |
    /// [<numbers>] | null, ...}}` with its keys in that order and its sensors in model
    /// order, read in one pass over the bytes (a timestamp without escapes in the same
    /// pass, its offset with it). `None` for anything else (other keys or orders, escapes
    /// in a name, an unknown, repeated or out-of-order sensor, a wrong count of values, a
    /// number out of range, a timestamp that does not read): the serde reader then reads
    /// the line and reports what is wrong, so errors are the same as ever. Numbers are
    /// checked against JSON's grammar and then converted by `f64::from_str`, which rounds
    /// correctly, as serde_json does with its `float_roundtrip` feature: both readers
    /// give the same bits (tested).
    fn parse_plain(&self, text: &str, out: &mut Reading) -> Option<()> {
        let m = self.model;
        let mut sc = Scan::new(text);
        out.sensors.clear();
        out.z.clear();
        out.std_overrides.clear();
        out.std.clear();
        out.inputs.clear();
        sc.eat(b'{')?;
        (sc.key()? == "t").then_some(())?;
        sc.eat(b':')?;
        let t = match self.mode {
            TimeMode::Seconds => Instant::seconds(sc.number()?),
            TimeMode::Stamp => Instant::parse_stamp(sc.key()?, self.zone).ok()?,
        };
        sc.eat(b',')?;
        (sc.key()? == "values").then_some(())?;
        sc.eat(b':')?;
        sc.eat(b'{')?;
        if !sc.eat_if(b'}') {
            let mut last = None;
            loop {
                let si = m.sensor_index(sc.key()?)?;
                if last.is_some_and(|l| si <= l) {
                    return None;
                }
                last = Some(si);
                sc.eat(b':')?;
                let dim = m.sensors[si].dim;
                let start = out.z.len();
                if sc.eat_if(b'[') {
                    for k in 0..dim {
                        if k > 0 {
                            sc.eat(b',')?;
                        }
                        out.z.push(sc.number()?);
                    }
                    sc.eat(b']')?;
                    out.sensors.push((si, start));
                } else if sc.literal(b"null") {
                    // No reading from this sensor on this line.
                } else if dim == 1 {
                    out.z.push(sc.number()?);
                    out.sensors.push((si, start));
                } else {
                    return None;
                }
                if !sc.eat_if(b',') {
                    break;
                }
            }
            sc.eat(b'}')?;
        }
        sc.eat(b'}')?;
        sc.end()?;
        out.t = t;
        Some(())
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
                        let msg = clean_message(&inner);
                        // serde's derive names a line's key given twice in backquotes.
                        let twice = msg
                            .strip_prefix("duplicate field `")
                            .and_then(|r| r.split('`').next());
                        let e = match twice {
                            Some(key) => FieldError::new(
                                format!("{path}/{}", escape_token(key)),
                                repeated_key(key),
                            ),
                            None => FieldError::new(path, msg),
                        };
                        LineError::Invalid(vec![e])
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
            RawTime::Str(s) if self.mode == TimeMode::Stamp => {
                match Instant::parse_stamp(&s, self.zone) {
                    Ok(i) => out.t = i,
                    Err(e) => errs.push(FieldError::new(tp(), e)),
                }
            }
            RawTime::Num(_) if self.mode == TimeMode::Seconds => {
                errs.push(FieldError::new(tp(), "number is out of range"))
            }
            _ => errs.push(FieldError::new(
                tp(),
                "one request uses one time form: this line's t differs from the prior's",
            )),
        }
        if let Some(values) = raw.values {
            let twice = repeated_keys(&values.0);
            for (i, (name, v)) in values.0.into_iter().enumerate() {
                let p = || format!("/values/{}", escape_token(&name));
                if twice.contains(&i) {
                    errs.push(FieldError::new(p(), repeated_key(&name)));
                    continue;
                }
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
            let twice = repeated_keys(&inputs.0);
            for (i, (name, v)) in inputs.0.into_iter().enumerate() {
                let p = || format!("/inputs/{}", escape_token(&name));
                if twice.contains(&i) {
                    errs.push(FieldError::new(p(), repeated_key(&name)));
                    continue;
                }
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
        if raw.std.is_some() {
            errs.push(FieldError::new("/std", "`std` was renamed `noise_std`"));
        }
        if let Some(stds) = raw.noise_std {
            let twice = repeated_keys(&stds.0);
            for (i, (name, v)) in stds.0.into_iter().enumerate() {
                let p = || format!("/noise_std/{}", escape_token(&name));
                if twice.contains(&i) {
                    errs.push(FieldError::new(p(), repeated_key(&name)));
                    continue;
                }
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
                                "sensor '{name}' has {dim} component(s), found {} noise_std values",
                                xs.len()
                            ),
                        ));
                        continue;
                    }
                }
                if out.std[start..].iter().any(|s| !(*s > 0.0)) {
                    errs.push(FieldError::new(p(), "noise_std must be positive"));
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

/// The positions of the members whose key an earlier member of the same object has
/// (empty, without allocating, when every key is unique). A few members are compared
/// pairwise; more are looked up in a set, so a line of many keys costs linear time.
fn repeated_keys<V>(members: &[(Cow<'_, str>, V)]) -> Vec<usize> {
    const PAIRWISE_UP_TO: usize = 16;
    let mut out = Vec::new();
    if members.len() <= PAIRWISE_UP_TO {
        for (i, (k, _)) in members.iter().enumerate() {
            if members[..i].iter().any(|(e, _)| e == k) {
                out.push(i);
            }
        }
    } else {
        let mut seen = std::collections::HashSet::with_capacity(members.len());
        for (i, (k, _)) in members.iter().enumerate() {
            if !seen.insert(k.as_ref()) {
                out.push(i);
            }
        }
    }
    out
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

#[cfg(test)]
mod plain_line_tests {
    use super::*;
    use crate::config::Limits;
    use serde_json::json;

    fn model() -> Model {
        crate::request::validate::model(
            &json!({"states": ["x", "y"], "dynamics": {"rates": {"x": "y"}},
                    "sensors": {"a": {"measures": "x", "std": 1.0},
                                "v": {"measures": ["x", "y"], "std": 1.0},
                                "b": {"measures": "y", "std": 1.0}}}),
            "/model",
            &Limits::default(),
        )
        .unwrap()
    }

    /// The byte reader must take a line only when serde (the reference, with exact
    /// float parsing) reads it the same way, bit for bit; what it refuses goes to serde.
    fn check(p: &ReadingParser, line: &str) -> bool {
        let (mut fast, mut full) = (Reading::default(), Reading::default());
        let took = p.parse_plain(line, &mut fast).is_some();
        let reference = p.parse_full(line, &mut full);
        if took {
            assert!(
                reference.is_ok(),
                "fast path took a line serde refuses: {line}"
            );
            assert_eq!(format!("{:?}", fast.t), format!("{:?}", full.t), "{line}");
            assert_eq!(fast.sensors, full.sensors, "{line}");
            let bits = |r: &Reading| r.z.iter().map(|v| v.to_bits()).collect::<Vec<_>>();
            assert_eq!(bits(&fast), bits(&full), "{line}");
        }
        // And the public reader agrees with serde whichever path it took.
        let mut public = Reading::default();
        assert_eq!(
            p.parse(line, &mut public).is_ok(),
            reference.is_ok(),
            "{line}"
        );
        took
    }

    #[test]
    fn plain_lines_read_as_serde_reads_them() {
        let m = model();
        let zone = Zone::none();
        let p = ReadingParser::new(&m, TimeMode::Seconds, &zone);
        let taken = [
            r#"{"t":0.5,"values":{"a":1.25}}"#,
            " { \"t\" : 1e-3 ,\n\"values\" : { \"a\" : -0 , \"v\" : [ 1 , 2.5E+2 ] } }\t",
            r#"{"t":12345678901234567890,"values":{"a":0.1}}"#,
            r#"{"t":1,"values":{}}"#,
            r#"{"t":1,"values":{"a":null,"b":3}}"#,
            r#"{"t":9007199254740993,"values":{"a":1.7976931348623157e308}}"#,
            r#"{"t":5e-324,"values":{"a":2.2250738585072011e-308,"b":0.30000000000000004}}"#,
            r#"{"t":123456789012345678901234567890e-10,"values":{"a":-0.0,"b":1E5}}"#,
        ];
        for line in taken {
            assert!(check(&p, line), "fast path refused {line}");
        }
        let refused = [
            r#"{"values":{"a":1},"t":2}"#,
            r#"{"t":1,"values":{"b":1,"a":2}}"#,
            r#"{"t":1,"values":{"a":1},"inputs":{}}"#,
            r#"{"t":01,"values":{}}"#,
            r#"{"t":1,"values":{"a":1,}}"#,
            r#"{"t":1,"values":{"a":1}} x"#,
            r#"{"t":1e999,"values":{}}"#,
            r#"{"t":1,"values":{"zz":1}}"#,
            r#"{"t":1,"values":{"a":1,"a":2}}"#,
            r#"{"t":1,"values":{"v":3}}"#,
            r#"{"t":1,"values":{"v":[1]}}"#,
            r#"{"t":1,"values":{"v":[1,2,3]}}"#,
            r#"{"t":1,"values":{"a":nul}}"#,
            r#"{"t":1,"values":{"a":nullx}}"#,
            r#"{"t":-,"values":{}}"#,
            r#"{"t":1.,"values":{}}"#,
            r#"{"t":.5,"values":{}}"#,
            r#"{"t":1e,"values":{}}"#,
            r#"{"t":+1,"values":{}}"#,
            r#"{"t":1,"values":{"a":"1"}}"#,
            r#"{"t":1,"values":{"a\u0062":1}}"#,
            r#"{"t":1,"values":{"a":1}"#,
            r#"{"t":1,"values":{"a":1}}}"#,
            r#"{"t":"2026-01-01T00:00:00Z","values":{}}"#,
            "",
        ];
        for line in refused {
            assert!(!check(&p, line), "fast path took {line}");
        }
    }

    #[test]
    fn timestamp_lines_read_on_the_fast_path_as_serde_reads_them() {
        // Timestamps (with their offsets and forms) go through the byte reader too; the
        // serde reader is the reference for the time, its offset and form, and the values.
        let m = model();
        let zone = Zone::named("Europe/Berlin").unwrap();
        let p = ReadingParser::new(&m, TimeMode::Stamp, &zone);
        for line in [
            r#"{"t":"2026-03-01T06:00:10+01:00","values":{"a":1.25}}"#,
            r#"{"t": "2026-03-01T06:00:10.5-05:30", "values": {"v": [1, 2]}}"#,
            r#"{"t":"2026-03-01 06:00:10","values":{"a":null,"b":3}}"#,
            r#"{"t":"2026-03-01T06:00:10.000000001Z","values":{}}"#,
        ] {
            assert!(check(&p, line), "fast path refused {line}");
        }
        for line in [
            r#"{"t":1.5,"values":{"a":1}}"#,
            r#"{"t":"2026-03-29 02:30:00","values":{"a":1}}"#,
            r#"{"t":"2026-03-01T06:00:10\u002B01:00","values":{"a":1}}"#,
            r#"{"t":"yesterday","values":{"a":1}}"#,
        ] {
            assert!(!check(&p, line), "fast path took {line}");
        }
        // The escaped line is still read, by serde, to the same instant and offset.
        let mut r = Reading::default();
        assert!(p
            .parse(
                r#"{"t":"2026-03-01T06:00:10\u002B01:00","values":{"a":1}}"#,
                &mut r
            )
            .is_ok());
        assert_eq!(r.t.to_rfc3339(), "2026-03-01T06:00:10+01:00");
        // Without a zone the offset-less line is refused at /t, saying what to add.
        let none = Zone::none();
        let p = ReadingParser::new(&m, TimeMode::Stamp, &none);
        match p.parse(r#"{"t":"2026-03-01 06:00:10","values":{}}"#, &mut r) {
            Err(LineError::Invalid(e)) => {
                assert_eq!(e[0].pointer, "/t");
                assert!(e[0].detail.contains("has no UTC offset"), "{}", e[0].detail);
            }
            _ => panic!("an offset-less time without a zone was not refused"),
        }
    }

    #[test]
    fn plain_numbers_round_as_serde_rounds() {
        // 20,000 numbers in shortest, scientific, long and integer forms, seeded.
        let m = model();
        let zone = Zone::none();
        let p = ReadingParser::new(&m, TimeMode::Seconds, &zone);
        let mut state = 0x9e3779b97f4a7c15u64;
        let mut next = || {
            state ^= state << 13;
            state ^= state >> 7;
            state ^= state << 17;
            state
        };
        for k in 0..20_000 {
            let bits = next();
            let x = f64::from_bits(bits);
            if !x.is_finite() {
                continue;
            }
            let text = match k % 4 {
                0 => format!("{x:?}"),
                1 => format!("{x:e}"),
                2 => format!("{:.25e}", x),
                _ => format!("{}", (bits >> 11) as i64 - (1 << 52)),
            };
            let line = format!(r#"{{"t":{},"values":{{"a":{text}}}}}"#, k as f64 * 0.01);
            assert!(check(&p, &line), "fast path refused {line}");
        }
    }

    #[test]
    fn a_line_overrides_noise_under_its_v2_name_only() {
        let m = model();
        let zone = Zone::none();
        let p = ReadingParser::new(&m, TimeMode::Seconds, &zone);
        let mut r = Reading::default();
        p.parse(
            r#"{"t": 1, "values": {"v": [1, 2]}, "noise_std": {"v": [0.5, 2]}}"#,
            &mut r,
        )
        .unwrap_or_else(|_| panic!("noise_std refused"));
        assert_eq!(
            (r.std_overrides.as_slice(), r.std.as_slice()),
            (&[(1, 0)][..], &[0.5, 2.0][..])
        );
        let pointed = |line: &str| match p.parse(line, &mut Reading::default()) {
            Err(LineError::Invalid(e)) => e
                .into_iter()
                .map(|e| (e.pointer, e.detail))
                .collect::<Vec<_>>(),
            _ => panic!("{line} was not refused as invalid"),
        };
        assert_eq!(
            pointed(r#"{"t": 1, "values": {"a": 1}, "std": {"a": 0.1}}"#),
            [(
                "/std".to_string(),
                "`std` was renamed `noise_std`".to_string()
            )]
        );
        assert_eq!(
            pointed(r#"{"t": 1, "values": {"a": 1}, "noise_std": {"a": 0}}"#),
            [(
                "/noise_std/a".to_string(),
                "noise_std must be positive".to_string()
            )]
        );
    }
}
