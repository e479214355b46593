//! A request whose readings come as a historian CSV (`multipart/form-data` on the HTTP
//! side, `tacit run --readings` on the command line): the `request` part (JSON without
//! `measurements`, with a `csv` section) and the `readings` part (the file).
//!
//! The file is converted by [`crate::request::csv`] into measurement-line text and spliced
//! into the request as its `measurements` array; the batch path then runs unchanged, so
//! the answer is byte for byte the answer to the same readings sent as JSON, except that
//! the conversion's notes (unmapped columns or tags, rows dropped by quality) are added to
//! `summary.warnings`. A fault the filter finds on a line (a time going backwards, say) is
//! pointed back at the CSV: `/measurements/{i}/...` becomes `/readings/{line}/{column}`.
//!
//! Memory: the file, its converted text and the line map are counted against
//! `max_request_bytes` once converted; the run's own budget then counts the spliced body.

use super::{budget, filtering, Done, Pieces, Stop};
use crate::config::Limits;
use crate::problem::{escape_token, Problem, ProblemKind};
use crate::request::csv::{self, Converted, SensorDim};
use crate::request::envelope::{self, Envelope};
use crate::request::validate;
use serde::de::{MapAccess, Visitor};
use serde::Deserializer;
use serde_json::value::RawValue;
use std::borrow::Cow;
use std::fmt;

/// A CSV upload made into a JSON request body.
struct Upload {
    /// The request with the converted readings as its `measurements`.
    body: Vec<u8>,
    /// What the conversion produced besides the text (the text itself is in `body`).
    conv: Converted,
}

/// `POST /v1/estimate` (`smooth`: `/v1/smooth`) with a CSV file of readings.
pub(super) fn batch(
    request: &[u8],
    readings: &[u8],
    limits: &Limits,
    stop: &Stop,
    smooth: bool,
) -> Result<Pieces, Problem> {
    let up = upload(request, readings, limits, &|body| {
        filtering::run_batch(body, limits, &Stop::never(), smooth).err()
    })?;
    let mut pieces =
        filtering::run_batch(&up.body, limits, stop, smooth).map_err(|p| up.pointed(p))?;
    if let Some(last) = pieces.parts.last_mut() {
        up.add_notes(last);
    }
    Ok(pieces)
}

/// `POST /v1/calibrate` with a CSV file of readings. The conversion's notes are not part
/// of a calibration answer.
pub(super) fn calibrate(
    request: &[u8],
    readings: &[u8],
    limits: &Limits,
    stop: &Stop,
    progress: &(dyn Fn(u64, Option<f64>) + Sync),
) -> Result<Done, Problem> {
    let up = upload(request, readings, limits, &|body| {
        super::calibrate::calibrate(body, limits, &Stop::never(), &|_, _| {}).err()
    })?;
    super::calibrate::calibrate(&up.body, limits, stop, progress).map_err(|p| up.pointed(p))
}

/// The request's top-level members in order, as raw JSON text.
fn members(request: &[u8]) -> Result<Vec<(Cow<'_, str>, &RawValue)>, Problem> {
    struct V;
    impl<'de> Visitor<'de> for V {
        type Value = Vec<(Cow<'de, str>, &'de RawValue)>;
        fn expecting(&self, f: &mut fmt::Formatter) -> fmt::Result {
            f.write_str("a JSON object")
        }
        fn visit_map<A: MapAccess<'de>>(self, mut m: A) -> Result<Self::Value, A::Error> {
            let mut out = Vec::new();
            while let Some(k) = m.next_key::<Cow<'de, str>>()? {
                let v: &'de RawValue = m.next_value()?;
                out.push((k, v));
            }
            Ok(out)
        }
    }
    let text = std::str::from_utf8(request).map_err(|e| {
        Problem::new(
            ProblemKind::MalformedJson,
            format!("the request part is not UTF-8 ({e})"),
        )
    })?;
    let mut de = serde_json::Deserializer::from_str(text);
    let list = de.deserialize_map(V).map_err(|e| match e.classify() {
        serde_json::error::Category::Data => {
            Problem::field("", "the request part is a JSON object: the request without measurements, with a csv section")
        }
        _ => envelope::json_problem(e),
    })?;
    de.end().map_err(envelope::json_problem)?;
    Ok(list)
}

/// Check the request part and the file, and splice them into one JSON request. When the
/// model is at fault, `judge` gives the endpoint's own answer to the request without
/// readings, so the faults are those a JSON request would get.
fn upload(
    request: &[u8],
    readings: &[u8],
    limits: &Limits,
    judge: &dyn Fn(&[u8]) -> Option<Problem>,
) -> Result<Upload, Problem> {
    let list = members(request)?;
    let mut csv_raw = None;
    let mut base = Vec::with_capacity(request.len() + 32);
    base.push(b'{');
    for (k, v) in &list {
        match k.as_ref() {
            "csv" if csv_raw.is_none() => {
                csv_raw = Some(*v);
                continue;
            }
            "measurements" => {
                return Err(Problem::field(
                    "/measurements",
                    "with a readings part the request has no measurements: the readings come from the CSV file",
                ))
            }
            _ => {}
        }
        if base.len() > 1 {
            base.push(b',');
        }
        base.extend_from_slice(&serde_json::to_vec(k.as_ref()).unwrap_or_default());
        base.push(b':');
        base.extend_from_slice(v.get().as_bytes());
    }
    let Some(csv_raw) = csv_raw else {
        return Err(Problem::field(
            "/csv",
            "missing required field 'csv': say how to read the readings part (layout, time_column, time_zone, ...)",
        ));
    };
    let splice = |text: &[u8]| {
        let mut body = Vec::with_capacity(base.len() + text.len() + 20);
        body.extend_from_slice(&base);
        if body.len() > 1 {
            body.push(b',');
        }
        body.extend_from_slice(b"\"measurements\":[");
        body.extend_from_slice(text);
        body.extend_from_slice(b"]}");
        body
    };
    // The model's sensors; a request whose model (or other sections) is at fault gets the
    // very answer the JSON path gives, from the JSON path.
    let model = model_of(&list, limits).map_err(|_| {
        judge(&splice(b"")).unwrap_or_else(|| Problem::field("/model", "the model is not valid"))
    })?;
    let sensors: Vec<SensorDim<'_>> = model
        .sensors
        .iter()
        .map(|s| SensorDim {
            name: &s.name,
            dim: s.dim,
        })
        .collect();
    let spec = csv::spec(csv_raw.get(), &sensors)?;
    let mut conv = csv::convert(readings, &spec, &sensors, limits.max_lines)?;
    let body = splice(&conv.text);
    let held = readings.len() + body.len() + conv.text.len() + 8 * conv.origin.len();
    budget::within(held as u64, limits)?;
    conv.text = Vec::new();
    Ok(Upload { body, conv })
}

/// The request's model, checked.
fn model_of(
    list: &[(Cow<'_, str>, &RawValue)],
    limits: &Limits,
) -> Result<crate::model::Model, ()> {
    let raw = list.iter().find(|(k, _)| k == "model").map(|(_, v)| *v);
    let env = Envelope {
        model: raw,
        ..Envelope::default()
    };
    let [v] = envelope::sections([(env.model, "model")]).map_err(|_| ())?;
    validate::model(&v, "/model", limits).map_err(|_| ())
}

impl Upload {
    /// `p` with its `/measurements/{i}/...` pointers turned into the CSV's line and column.
    fn pointed(&self, mut p: Problem) -> Problem {
        let mut first = None;
        for (i, e) in p.errors.iter_mut().enumerate() {
            if let Some((pointer, place)) = self.place(&e.pointer) {
                if i == 0 {
                    first = Some((e.pointer.clone(), pointer.clone(), place.clone()));
                }
                e.pointer = pointer;
                e.detail = format!("{place}: {}", e.detail);
            }
        }
        if let Some((old, new, place)) = first {
            p.detail = match p.detail.strip_prefix(&format!("{old}: ")) {
                Some(rest) => format!("{new}: {place}: {rest}"),
                None => p.detail.replacen(&old, &new, 1),
            };
        }
        p
    }

    /// The CSV pointer and "line L, column C" of a measurement pointer.
    fn place(&self, pointer: &str) -> Option<(String, String)> {
        let rest = pointer.strip_prefix("/measurements/")?;
        let (index, tail) = rest.split_once('/').unwrap_or((rest, ""));
        let line = *self.conv.origin.get(index.parse::<usize>().ok()?)?;
        let column = if tail == "t" {
            Some(self.conv.time_column)
        } else if let Some(sensor) = tail.strip_prefix("values/") {
            let sensor = sensor.split('/').next().unwrap_or("");
            self.conv
                .sensor_columns
                .iter()
                .find(|(s, _)| escape_token(s) == sensor)
                .map(|(_, c)| *c)
        } else {
            None
        };
        Some(match column {
            Some(c) => (
                format!("/readings/{line}/{c}"),
                format!("line {line}, column {c}"),
            ),
            None => (format!("/readings/{line}"), format!("line {line}")),
        })
    }

    /// Add the conversion's notes to the answer's `summary.warnings`, the last member of
    /// the last member: the answer ends in `]}}`.
    fn add_notes(&self, last: &mut Vec<u8>) {
        if self.conv.notes.is_empty() || !last.ends_with(b"]}}") {
            return;
        }
        let at = last.len() - 3;
        let empty = at > 0 && last[at - 1] == b'[';
        let mut add = Vec::new();
        for (i, n) in self.conv.notes.iter().enumerate() {
            if i > 0 || !empty {
                add.push(b',');
            }
            add.extend_from_slice(b"{\"kind\":\"");
            add.extend_from_slice(n.kind.as_bytes());
            add.extend_from_slice(b"\",\"at_t\":");
            if self.conv.first_time.is_empty() {
                add.extend_from_slice(b"null");
            } else {
                add.extend_from_slice(&self.conv.first_time);
            }
            add.extend_from_slice(b",\"count\":");
            add.extend_from_slice(itoa::Buffer::new().format(n.count).as_bytes());
            add.extend_from_slice(b",\"detail\":");
            add.extend_from_slice(&serde_json::to_vec(&n.detail).unwrap_or_default());
            add.push(b'}');
        }
        last.splice(at..at, add);
    }
}
