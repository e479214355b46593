//! The request envelope: top-level sections kept as raw JSON text so each can be parsed
//! with its own rules (the model as a tree with pointers, readings on the fast path), and
//! the request-level `time_zone` every section's times are read in. A key given twice,
//! at the top level (serde's derive refuses it) or inside a section ([`tree`]), is a 422
//! at its second occurrence.

use crate::model::Zone;
use crate::problem::{escape_token, FieldError, Problem, ProblemKind};
use crate::request::raw::{repeated_key, tree, TreeError};
use crate::request::reading::clean_message;
use serde::Deserialize;
use serde_json::value::RawValue;
use serde_json::Value;

/// The sections of any POST body; which are required depends on the endpoint.
#[derive(Deserialize, Default)]
#[serde(deny_unknown_fields)]
pub struct Envelope<'a> {
    /// `model` section.
    #[serde(borrow, default)]
    pub model: Option<&'a RawValue>,
    /// `filter` section.
    #[serde(borrow, default)]
    pub filter: Option<&'a RawValue>,
    /// `prior` section.
    #[serde(borrow, default)]
    pub prior: Option<&'a RawValue>,
    /// `measurements` array.
    #[serde(borrow, default)]
    pub measurements: Option<&'a RawValue>,
    /// `output` section.
    #[serde(borrow, default)]
    pub output: Option<&'a RawValue>,
    /// Simulation times.
    #[serde(borrow, default)]
    pub times: Option<&'a RawValue>,
    /// Simulation input schedule.
    #[serde(borrow, default)]
    pub inputs: Option<&'a RawValue>,
    /// Simulation seed.
    #[serde(borrow, default)]
    pub seed: Option<&'a RawValue>,
    /// Simulation sampling schedule per sensor.
    #[serde(borrow, default)]
    pub sampling: Option<&'a RawValue>,
    /// The v1 name of `sampling`, kept only to refuse it with a message naming the new one.
    #[serde(borrow, default)]
    pub readings: Option<&'a RawValue>,
    /// The IANA time zone that timestamps without a UTC offset are read in.
    #[serde(borrow, default)]
    pub time_zone: Option<&'a RawValue>,
}

/// The request's `time_zone` (none when absent or `null`): an IANA name such as
/// `"Europe/Berlin"`, looked up in the tz database compiled into the service; anything
/// else is a 422 at `/time_zone`.
pub fn time_zone(env: &Envelope<'_>) -> Result<Zone, Problem> {
    let Some(raw) = env.time_zone else {
        return Ok(Zone::none());
    };
    match serde_json::from_str::<Option<&str>>(raw.get()) {
        Ok(None) => Ok(Zone::none()),
        Ok(Some(name)) => Zone::named(name).map_err(|e| Problem::field("/time_zone", e)),
        // A name with JSON escapes (not borrowable) or not a string at all.
        Err(_) => match serde_json::from_str::<String>(raw.get()) {
            Ok(name) => Zone::named(&name).map_err(|e| Problem::field("/time_zone", e)),
            Err(_) => Err(Problem::field(
                "/time_zone",
                "time_zone is an IANA time zone name such as \"Europe/Berlin\"",
            )),
        },
    }
}

/// Parse the envelope; a syntax error is a 400, a wrong shape a 422.
pub fn envelope(body: &[u8]) -> Result<Envelope<'_>, Problem> {
    let text = std::str::from_utf8(body).map_err(|e| {
        Problem::new(
            ProblemKind::MalformedJson,
            format!("the body is not UTF-8 ({e})"),
        )
    })?;
    let mut de = serde_json::Deserializer::from_str(text);
    let env = Envelope::deserialize(&mut de).map_err(json_problem)?;
    de.end().map_err(json_problem)?;
    Ok(env)
}

/// Map a serde_json error to 400 (syntax) or 422 (shape).
pub fn json_problem(e: serde_json::Error) -> Problem {
    match e.classify() {
        serde_json::error::Category::Data => {
            let msg = clean_message(&e);
            // serde's derive names a top-level key it does not know, or one given twice,
            // in backquotes; the pointer is that key's.
            // The key ends at the backquote before ", expected" (unknown) or at the last
            // one (repeated), so a key holding a backquote is named whole.
            let named = |prefix: &str| {
                msg.strip_prefix(prefix)
                    .and_then(|r| {
                        r.split_once("`, expected")
                            .map(|(k, _)| k)
                            .or_else(|| r.strip_suffix('`'))
                            .or_else(|| r.split('`').next())
                    })
                    .map(str::to_string)
            };
            if let Some(key) = named("duplicate field `") {
                return Problem::invalid(vec![FieldError::new(
                    format!("/{}", escape_token(&key)),
                    repeated_key(&key),
                )]);
            }
            let pointer = named("unknown field `")
                .map(|f| format!("/{}", escape_token(&f)))
                .unwrap_or_default();
            Problem::invalid(vec![FieldError::new(pointer, msg)])
        }
        _ => Problem::new(
            ProblemKind::MalformedJson,
            format!("the body is not valid JSON: {e}"),
        ),
    }
}

/// A section's text as a JSON tree: a key repeated within one object is a 422 at its
/// second occurrence (see [`tree`]), anything else serde_json says goes through
/// [`json_problem`].
fn section_tree(raw: &RawValue, name: &str) -> Result<Value, Problem> {
    tree(raw.get(), &format!("/{name}")).map_err(|e| match e {
        TreeError::Repeated(f) => Problem::invalid(vec![f]),
        TreeError::Json { error, .. } => json_problem(error),
    })
}

/// A required section as a JSON tree, or a 422 naming it.
pub fn section(raw: Option<&RawValue>, name: &str) -> Result<Value, Problem> {
    match raw {
        Some(r) => section_tree(r, name),
        None => Err(Problem::field(
            format!("/{name}"),
            format!("missing required field '{name}'"),
        )),
    }
}

/// An optional section (named `name` at the top level) as a JSON tree.
pub fn optional_section(raw: Option<&RawValue>, name: &str) -> Result<Option<Value>, Problem> {
    raw.map(|r| section_tree(r, name)).transpose()
}

/// Read the named required sections, collecting every missing one (and reporting a section
/// of the wrong JSON shape through the caller's validation) before failing.
pub fn sections<const N: usize>(
    raw: [(Option<&RawValue>, &str); N],
) -> Result<[Value; N], Problem> {
    let mut missing = Vec::new();
    let mut out: [Value; N] = std::array::from_fn(|_| Value::Null);
    for (i, (r, name)) in raw.iter().enumerate() {
        match r {
            Some(r) => out[i] = section_tree(r, name)?,
            None => missing.push(FieldError::new(
                format!("/{name}"),
                format!("missing required field '{name}'"),
            )),
        }
    }
    if missing.is_empty() {
        Ok(out)
    } else {
        Err(Problem::invalid(missing))
    }
}

/// The elements of a JSON array as text slices, in one pass over bytes.
///
/// Meant for text the envelope parse has already checked to be valid JSON (its sections
/// are raw values, which serde_json validates): the scan only tracks strings and nesting
/// to find the top-level commas, several times faster than deserialising the array into
/// raw values, which re-validates every byte. Returns `None` for anything that is not a
/// well-formed array (including text that was not checked); callers then take the full
/// parser's path, which reports the error properly. Never panics.
pub fn array_elements(text: &str) -> Option<Vec<&str>> {
    let b = text.as_bytes();
    let ws = |c: u8| matches!(c, b' ' | b'\t' | b'\n' | b'\r');
    let skip_ws = |mut i: usize| {
        while i < b.len() && ws(b[i]) {
            i += 1;
        }
        i
    };
    let mut i = skip_ws(0);
    if b.get(i) != Some(&b'[') {
        return None;
    }
    let mut out = Vec::new();
    i = skip_ws(i + 1);
    if b.get(i) == Some(&b']') {
        return (skip_ws(i + 1) == b.len()).then_some(out);
    }
    loop {
        let start = i;
        let mut depth = 0usize;
        loop {
            match *b.get(i)? {
                b'"' => {
                    // To the closing quote, stepping over escapes.
                    i += 1;
                    loop {
                        match *b.get(i)? {
                            b'\\' => i += 2,
                            b'"' => break,
                            _ => i += 1,
                        }
                    }
                }
                b'{' | b'[' => depth += 1,
                b'}' | b']' if depth > 0 => depth -= 1,
                b']' | b',' if depth == 0 => break,
                b'}' => return None,
                _ => {}
            }
            i += 1;
        }
        let mut end = i;
        while end > start && ws(b[end - 1]) {
            end -= 1;
        }
        if end == start {
            return None;
        }
        out.push(text.get(start..end)?);
        if b[i] == b']' {
            return (skip_ws(i + 1) == b.len()).then_some(out);
        }
        i = skip_ws(i + 1);
    }
}

#[cfg(test)]
mod array_tests {
    use super::array_elements;
    use serde_json::value::RawValue;

    /// The reference: serde_json's own split into raw values.
    fn serde_split(text: &str) -> Vec<String> {
        let v: Vec<&RawValue> = serde_json::from_str(text).unwrap();
        v.iter().map(|r| r.get().to_string()).collect()
    }

    #[test]
    fn splits_like_serde_json() {
        for text in [
            "[]",
            " [ ] ",
            "[1]",
            "[ {\"t\": 1, \"values\": {\"a\": [1, 2]}} , {\"t\":2} ]",
            "[\"a,b]\", \"q\\\"uote,]\", {\"k\": \"}\"}, [[1,[2]],3], null, -1.5e3]",
            "[{\"t\":\"2026-01-01T00:00:00Z\",\"values\":{\"x\":1}},\n\t{\"t\":\"\\\\\"}]",
        ] {
            let ours: Vec<String> = array_elements(text)
                .unwrap_or_else(|| panic!("{text}"))
                .into_iter()
                .map(str::to_string)
                .collect();
            assert_eq!(ours, serde_split(text), "{text}");
        }
    }

    #[test]
    fn refuses_what_is_not_a_well_formed_array() {
        for text in [
            "", "{}", "1", "[", "[1", "[1,", "[1,]", "[,1]", "[1]]", "[1] x", "[\"open]", "[1}",
            "[{]",
        ] {
            assert!(array_elements(text).is_none(), "{text:?} accepted");
        }
    }
}

#[cfg(test)]
mod time_zone_tests {
    use super::{envelope, time_zone};

    fn zone_of(body: &str) -> Result<Option<String>, String> {
        let env = envelope(body.as_bytes()).map_err(|p| p.detail)?;
        time_zone(&env)
            .map(|z| z.name().map(str::to_string))
            .map_err(|p| format!("{}: {}", p.errors[0].pointer, p.errors[0].detail))
    }

    #[test]
    fn the_time_zone_is_an_iana_name_at_the_top_level() {
        assert_eq!(zone_of("{}"), Ok(None));
        assert_eq!(zone_of(r#"{"time_zone": null}"#), Ok(None));
        assert_eq!(
            zone_of(r#"{"time_zone": "Europe/Berlin"}"#),
            Ok(Some("Europe/Berlin".into()))
        );
        // JSON may escape the slash (RFC 8259 §7); the name is the same.
        assert_eq!(
            zone_of(r#"{"time_zone": "America\/Chicago"}"#),
            Ok(Some("America/Chicago".into()))
        );
        let refused = zone_of(r#"{"time_zone": ["Europe/Berlin"]}"#).unwrap_err();
        assert!(
            refused.starts_with("/time_zone: time_zone is an IANA time zone name"),
            "{refused}"
        );
        let unknown = zone_of(r#"{"time_zone": "Mars/Olympus"}"#).unwrap_err();
        assert!(
            unknown.starts_with("/time_zone: unknown time zone 'Mars/Olympus'"),
            "{unknown}"
        );
    }
}
