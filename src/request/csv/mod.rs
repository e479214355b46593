//! Readings from a historian's CSV export: the request's `csv` section (which column is the
//! time, wide or long layout, the quality rule, the time zone of offset-less timestamps)
//! checked into a [`CsvSpec`], and the file converted by [`convert`] into the text of
//! measurement lines, the very form a JSON request's `measurements` array holds. The filters
//! and the answer writer never see the CSV, so an upload's answer is byte for byte the
//! answer to the same readings sent as JSON.
//!
//! Errors in the section carry pointers under `/csv`; errors in the file name their CSV line
//! (1-based, the header is line 1) and column (1-based) in the detail, and their pointer is
//! `/readings/{line}/{column}` (the project's convention for a non-JSON part).

mod convert;
#[cfg(test)]
mod tests;

pub use convert::{convert, Converted, Note};

use crate::problem::{escape_token, FieldError, Problem};
use jiff::tz::TimeZone;
use serde::Deserialize;
use std::collections::BTreeMap;

/// How the file is laid out.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Layout {
    /// A time column and one column per sensor; a blank cell is no reading.
    Wide,
    /// One row per (time, tag, value[, quality]); rows with the same time make one line.
    Long,
}

/// A checked `csv` section, with sensors resolved to the model's scalar sensors.
#[derive(Debug, Clone)]
pub struct CsvSpec {
    /// Wide or long.
    pub layout: Layout,
    /// Header of the time column.
    pub time_column: String,
    /// Where timestamps without an offset are read.
    pub zone: TimeZone,
    /// The zone's name as given, for messages.
    pub zone_name: String,
    /// The field separator.
    pub delimiter: u8,
    /// Wide: (column header, sensor name); `None` means "headers equal to sensor names".
    pub columns: Option<Vec<(String, String)>>,
    /// Long: header of the tag column.
    pub tag_column: String,
    /// Long: header of the value column.
    pub value_column: String,
    /// Long: (tag, sensor name); `None` means "tag equals sensor name".
    pub tags: Option<Vec<(String, String)>>,
    /// Long: header of the quality column, if rows are filtered by quality.
    pub quality_column: Option<String>,
    /// Long: the quality values kept.
    pub good: Vec<String>,
}

/// The section as sent (serde mirror).
#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct RawCsv {
    layout: Option<String>,
    time_column: Option<String>,
    time_zone: Option<String>,
    delimiter: Option<String>,
    columns: Option<BTreeMap<String, String>>,
    tag_column: Option<String>,
    value_column: Option<String>,
    tags: Option<BTreeMap<String, String>>,
    quality_column: Option<String>,
    good: Option<Vec<String>>,
}

/// One model sensor as the section sees it: its name and how many components it has.
#[derive(Debug, Clone, Copy)]
pub struct SensorDim<'a> {
    /// The sensor's name.
    pub name: &'a str,
    /// Its number of components (only 1 can come from a CSV cell).
    pub dim: usize,
}

/// Check the `csv` section (its JSON text) against the model's sensors. Every fault is
/// collected at its pointer under `/csv`.
pub fn spec(raw: &str, sensors: &[SensorDim<'_>]) -> Result<CsvSpec, Problem> {
    let de = &mut serde_json::Deserializer::from_str(raw);
    let r: RawCsv = serde_path_to_error::deserialize(de).map_err(|e| {
        let path = e.path().to_string();
        let at = if path == "." || path.is_empty() {
            "/csv".to_string()
        } else {
            format!(
                "/csv/{}",
                path.split('.')
                    .map(escape_token)
                    .collect::<Vec<_>>()
                    .join("/")
            )
        };
        let inner = e.into_inner().to_string();
        let clean = inner
            .split(" at line ")
            .next()
            .unwrap_or(&inner)
            .to_string();
        Problem::field(at, clean)
    })?;
    let mut errors = Vec::new();
    let layout = match r.layout.as_deref() {
        Some("wide") => Some(Layout::Wide),
        Some("long") => Some(Layout::Long),
        Some(other) => {
            errors.push(FieldError::new(
                "/csv/layout",
                format!("unknown layout '{other}'; use \"wide\" (a column per sensor) or \"long\" (time, tag, value rows)"),
            ));
            None
        }
        None => {
            errors.push(FieldError::new(
                "/csv/layout",
                "missing required field 'layout': \"wide\" (a column per sensor) or \"long\" (time, tag, value rows)",
            ));
            None
        }
    };
    let zone_name = r.time_zone.unwrap_or_else(|| "UTC".to_string());
    let zone = match TimeZone::get(&zone_name) {
        Ok(tz) if tz.iana_name() == Some(zone_name.as_str()) => Some(tz),
        _ => {
            errors.push(FieldError::new(
                "/csv/time_zone",
                format!("unknown time zone '{zone_name}'; give an IANA name such as \"Europe/Berlin\" or \"UTC\""),
            ));
            None
        }
    };
    let delimiter = match r.delimiter.as_deref().unwrap_or(",").as_bytes() {
        [b] if b.is_ascii() && *b != b'"' && *b != b'\n' && *b != b'\r' => *b,
        _ => {
            errors.push(FieldError::new(
                "/csv/delimiter",
                "the delimiter is one ASCII character other than a quote or a line break, such as \",\" or \";\"",
            ));
            b','
        }
    };
    let wide = layout == Some(Layout::Wide);
    let long = layout == Some(Layout::Long);
    for (field, given, allowed) in [
        ("columns", r.columns.is_some(), !long),
        ("tag_column", r.tag_column.is_some(), !wide),
        ("value_column", r.value_column.is_some(), !wide),
        ("tags", r.tags.is_some(), !wide),
        ("quality_column", r.quality_column.is_some(), !wide),
        ("good", r.good.is_some(), !wide),
    ] {
        if given && !allowed {
            errors.push(FieldError::new(
                format!("/csv/{field}"),
                format!(
                    "'{field}' belongs to the {} layout, not to this one",
                    if wide { "long" } else { "wide" }
                ),
            ));
        }
    }
    let columns = r
        .columns
        .map(|m| mapping(m, sensors, "columns", &mut errors));
    let tags = r.tags.map(|m| mapping(m, sensors, "tags", &mut errors));
    match (&r.quality_column, &r.good) {
        (Some(_), None) => errors.push(FieldError::new(
            "/csv/good",
            "with a quality_column, list the quality values to keep in 'good', such as [\"good\", \"192\"]",
        )),
        (None, Some(_)) => errors.push(FieldError::new(
            "/csv/quality_column",
            "'good' needs the header of the quality column in 'quality_column'",
        )),
        (Some(_), Some(g)) if g.is_empty() => errors.push(FieldError::new(
            "/csv/good",
            "list at least one quality value to keep",
        )),
        _ => {}
    }
    if !errors.is_empty() {
        return Err(Problem::invalid(errors));
    }
    Ok(CsvSpec {
        layout: layout.unwrap_or(Layout::Wide),
        time_column: r.time_column.unwrap_or_else(|| "time".to_string()),
        zone: zone.unwrap_or(TimeZone::UTC),
        zone_name,
        delimiter,
        columns,
        tag_column: r.tag_column.unwrap_or_else(|| "tag".to_string()),
        value_column: r.value_column.unwrap_or_else(|| "value".to_string()),
        tags,
        quality_column: r.quality_column,
        good: r.good.unwrap_or_default(),
    })
}

/// A `sensor -> header` (or `sensor -> tag`) map checked against the model: every key a
/// scalar sensor. Returned as (header, sensor) pairs.
fn mapping(
    m: BTreeMap<String, String>,
    sensors: &[SensorDim<'_>],
    field: &str,
    errors: &mut Vec<FieldError>,
) -> Vec<(String, String)> {
    let mut out = Vec::with_capacity(m.len());
    for (sensor, header) in m {
        let at = format!("/csv/{field}/{}", escape_token(&sensor));
        match sensors.iter().find(|s| s.name == sensor) {
            None => errors.push(FieldError::new(
                at,
                format!(
                    "the model has no sensor '{sensor}'; its sensors are {}",
                    names(sensors)
                ),
            )),
            Some(s) if s.dim != 1 => errors.push(FieldError::new(
                at,
                format!("sensor '{sensor}' reads {} values at once; a CSV cell holds one, so send its readings as JSON measurements", s.dim),
            )),
            Some(_) => {
                if let Some((h, first)) = out.iter().find(|(h, _)| *h == header) {
                    errors.push(FieldError::new(
                        at,
                        format!("'{h}' is already mapped to sensor '{first}'"),
                    ));
                } else {
                    out.push((header, sensor));
                }
            }
        }
    }
    out
}

/// The sensors' names, quoted, for messages.
fn names(sensors: &[SensorDim<'_>]) -> String {
    if sensors.is_empty() {
        return "none".to_string();
    }
    sensors
        .iter()
        .map(|s| format!("'{}'", s.name))
        .collect::<Vec<_>>()
        .join(", ")
}

/// A fault in the file at 1-based `line` and `column`, at `/readings/{line}/{column}`.
pub fn cell_error(line: u64, column: usize, detail: impl std::fmt::Display) -> FieldError {
    FieldError::new(
        format!("/readings/{line}/{column}"),
        format!("line {line}, column {column}: {detail}"),
    )
}
