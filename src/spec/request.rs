//! The request envelope: top-level sections kept as raw JSON text so each can be parsed
//! with its own rules (the model as a tree with pointers, readings on the fast path).

use crate::problem::{FieldError, Problem, ProblemKind};
use crate::spec::reading::clean_message;
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
    /// Simulation reading schedule per sensor.
    #[serde(borrow, default)]
    pub readings: Option<&'a RawValue>,
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
            let pointer = msg
                .strip_prefix("unknown field `")
                .and_then(|r| r.split('`').next())
                .map(|f| format!("/{f}"))
                .unwrap_or_default();
            Problem::invalid(vec![FieldError::new(pointer, msg)])
        }
        _ => Problem::new(
            ProblemKind::MalformedJson,
            format!("the body is not valid JSON: {e}"),
        ),
    }
}

/// A required section as a JSON tree, or a 422 naming it.
pub fn section(raw: Option<&RawValue>, name: &str) -> Result<Value, Problem> {
    match raw {
        Some(r) => serde_json::from_str(r.get()).map_err(json_problem),
        None => Err(Problem::field(
            format!("/{name}"),
            format!("missing required field '{name}'"),
        )),
    }
}

/// An optional section as a JSON tree.
pub fn optional_section(raw: Option<&RawValue>) -> Result<Option<Value>, Problem> {
    raw.map(|r| serde_json::from_str(r.get()).map_err(json_problem))
        .transpose()
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
            Some(r) => out[i] = serde_json::from_str(r.get()).map_err(json_problem)?,
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
