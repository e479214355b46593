//! The CSV file turned into measurement-line text (`{"t":..,"values":{..}}`, comma
//! separated: the inside of a `measurements` array).
//!
//! Times: a number is seconds; otherwise a timestamp, RFC 3339 with its offset, or
//! `YYYY-MM-DD HH:MM:SS[.fff]` (`T` or a space) without one, read in the section's
//! `time_zone`. A local time the clocks skip (spring gap) or pass twice (autumn fold) is
//! refused naming its line and column: a historian that writes local times without an
//! offset cannot tell the two hours of a fold apart, and guessing one would silently move
//! readings by an hour. Timestamps are written as UTC (`Z`) with the shortest exact
//! fraction. Every number is written in shortest round-trip form, so it reads back as the
//! same `f64`.
//!
//! Wide files keep their row order (the filter then refuses or skips a row going back in
//! time, as it does a JSON line); long files are sorted by time (stable) and rows of the
//! same time merge into one line.

use super::{cell_error, CsvSpec, Layout, SensorDim};
use crate::model::{Instant, Zone};
use crate::problem::{FieldError, Problem};
use jiff::tz::{AmbiguousOffset, TimeZone};
use jiff::Timestamp;

/// At most this many faults in the file are listed; the rest are counted in the detail.
const MAX_ERRORS: usize = 20;

/// At most this many unused headers or tags are named in the warning.
const MAX_NAMED: usize = 20;

/// A note for the answer's `summary.warnings`.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Note {
    /// `csv_unused` or `csv_dropped`.
    pub kind: &'static str,
    /// How many columns, tags or rows.
    pub count: u64,
    /// What it was.
    pub detail: String,
}

/// A converted file.
#[derive(Debug, Clone, Default)]
pub struct Converted {
    /// The measurement lines, comma separated (the inside of the `measurements` array).
    pub text: Vec<u8>,
    /// Number of lines.
    pub lines: usize,
    /// The CSV line (1-based) each measurement line came from (its first row, long form).
    pub origin: Vec<u64>,
    /// 1-based column of the time.
    pub time_column: usize,
    /// 1-based column of each sensor's value, by sensor name (long form: the value column).
    pub sensor_columns: Vec<(String, usize)>,
    /// Warnings for the answer.
    pub notes: Vec<Note>,
    /// The first line's time as JSON text (the `at_t` of the notes).
    pub first_time: Vec<u8>,
}

/// A cell's time.
#[derive(Debug, Clone, Copy, PartialEq)]
enum Time {
    Secs(f64),
    Nanos(i128),
}

impl Time {
    /// The JSON text of the time.
    fn write(self, buf: &mut Vec<u8>) {
        match self {
            Time::Secs(s) => num(buf, s),
            Time::Nanos(n) => {
                buf.push(b'"');
                Instant::from_nanos(n).write_stamp(buf);
                buf.push(b'"');
            }
        }
    }

    fn cmp(&self, other: &Self) -> std::cmp::Ordering {
        match (self, other) {
            (Time::Secs(a), Time::Secs(b)) => a.total_cmp(b),
            (Time::Nanos(a), Time::Nanos(b)) => a.cmp(b),
            (Time::Secs(_), Time::Nanos(_)) => std::cmp::Ordering::Less,
            (Time::Nanos(_), Time::Secs(_)) => std::cmp::Ordering::Greater,
        }
    }
}

/// Append `x` (finite) in shortest round-trip form.
fn num(buf: &mut Vec<u8>, x: f64) {
    let mut b = zmij::Buffer::new();
    buf.extend_from_slice(b.format_finite(x).as_bytes());
}

/// Reads time cells, all in the form of the first.
struct Clock<'a> {
    zone: &'a TimeZone,
    zone_name: &'a str,
    utc: Zone,
    stamps: Option<bool>,
}

impl Clock<'_> {
    fn read(&mut self, cell: &str) -> Result<Time, String> {
        if cell.is_empty() {
            return Err("the time is blank".to_string());
        }
        let t = match cell.parse::<f64>() {
            Ok(s) if s.is_finite() => Time::Secs(s),
            Ok(_) => return Err(format!("'{cell}' is not a finite number of seconds")),
            Err(_) => Time::Nanos(self.stamp(cell)?),
        };
        let stamp = matches!(t, Time::Nanos(_));
        match self.stamps {
            None => self.stamps = Some(stamp),
            Some(s) if s != stamp => {
                return Err(format!(
                    "'{cell}' is {}, but the first row's time is {}; give every time in one form",
                    form(stamp),
                    form(s)
                ))
            }
            Some(_) => {}
        }
        Ok(t)
    }

    /// Unix nanoseconds of a timestamp cell.
    fn stamp(&self, cell: &str) -> Result<i128, String> {
        let b = cell.as_bytes();
        let offset = b.len() > 19
            && (matches!(b[b.len() - 1], b'Z' | b'z')
                || b[19..].iter().any(|c| matches!(c, b'+' | b'-')));
        if offset {
            return Instant::parse_stamp(cell, &Zone::none()).map(|i| i.nanos);
        }
        // The wall-clock reading, parsed by the request's own strict reader as if in UTC,
        // then placed in the zone.
        let wall = Instant::parse_stamp(cell, &self.utc)?.nanos;
        let civil = TimeZone::UTC.to_datetime(
            Timestamp::from_nanosecond(wall)
                .map_err(|e| format!("'{cell}' is out of range ({e})"))?,
        );
        match self.zone.to_ambiguous_timestamp(civil).offset() {
            AmbiguousOffset::Unambiguous { offset } => Ok(wall - offset.seconds() as i128 * 1_000_000_000),
            AmbiguousOffset::Gap { before, after } => Err(format!(
                "the local time '{cell}' does not exist in {}: the clocks skip it when the offset changes from {before} to {after}; give the time with its offset",
                self.zone_name
            )),
            AmbiguousOffset::Fold { before, after } => Err(format!(
                "the local time '{cell}' happens twice in {} (at offset {before}, then at {after}) and a time without an offset cannot say which; give the time with its offset",
                self.zone_name
            )),
        }
    }
}

fn form(stamp: bool) -> &'static str {
    if stamp {
        "a timestamp"
    } else {
        "a number of seconds"
    }
}

/// A value cell: blank is no reading, otherwise a finite number.
fn value(cell: &str) -> Result<Option<f64>, String> {
    if cell.is_empty() {
        return Ok(None);
    }
    match cell.parse::<f64>() {
        Ok(v) if v.is_finite() => Ok(Some(v)),
        _ => Err(format!(
            "'{}' is not a number (use a dot for decimals; a blank cell is no reading)",
            clip(cell)
        )),
    }
}

fn clip(s: &str) -> &str {
    match s.char_indices().nth(40) {
        Some((i, _)) => &s[..i],
        None => s,
    }
}

/// Collects faults up to [`MAX_ERRORS`] and counts the rest.
#[derive(Default)]
struct Faults {
    list: Vec<FieldError>,
    more: usize,
}

impl Faults {
    fn push(&mut self, e: FieldError) {
        if self.list.len() < MAX_ERRORS {
            self.list.push(e);
        } else {
            self.more += 1;
        }
    }

    fn into_result(self) -> Result<(), Problem> {
        if self.list.is_empty() {
            return Ok(());
        }
        let mut p = Problem::invalid(self.list);
        if self.more > 0 {
            p.detail.push_str(&format!(
                " ({} faults beyond these were not listed)",
                self.more
            ));
        }
        Err(p)
    }
}

/// Convert `data` (the `readings` part) by `spec` into measurement lines for the model's
/// `sensors`; more than `max_lines` lines is a 422 at `/readings`.
pub fn convert(
    data: &[u8],
    spec: &CsvSpec,
    sensors: &[SensorDim<'_>],
    max_lines: usize,
) -> Result<Converted, Problem> {
    let mut rdr = csv::ReaderBuilder::new()
        .delimiter(spec.delimiter)
        .has_headers(false)
        .trim(csv::Trim::All)
        .from_reader(data);
    let mut rec = csv::StringRecord::new();
    let got = rdr.read_record(&mut rec).map_err(|e| csv_problem(&e))?;
    if !got {
        return Err(Problem::field(
            "/readings",
            "the CSV file is empty: it needs a header line and rows",
        ));
    }
    let header: Vec<String> = rec
        .iter()
        .enumerate()
        .map(|(i, h)| {
            if i == 0 {
                h.trim_start_matches('\u{feff}').to_string()
            } else {
                h.to_string()
            }
        })
        .collect();
    let find = |name: &str| header.iter().position(|h| h == name);
    let Some(time_col) = find(&spec.time_column) else {
        return Err(Problem::field(
            "/csv/time_column",
            format!(
                "the CSV header has no column '{}' (its columns: {})",
                spec.time_column,
                listing(&header)
            ),
        ));
    };
    let clock = Clock {
        zone: &spec.zone,
        zone_name: &spec.zone_name,
        utc: Zone::named("UTC").unwrap_or_default(),
        stamps: None,
    };
    let keys: Vec<Vec<u8>> = sensors
        .iter()
        .map(|s| {
            let mut k = serde_json::to_vec(s.name).unwrap_or_default();
            k.push(b':');
            k
        })
        .collect();
    let mut out = Converted {
        time_column: time_col + 1,
        ..Converted::default()
    };
    let mut ctx = Ctx {
        rdr,
        rec,
        clock,
        keys,
        max_lines,
    };
    match spec.layout {
        Layout::Wide => wide(&mut ctx, spec, sensors, &header, time_col, &mut out)?,
        Layout::Long => long(&mut ctx, spec, sensors, &header, time_col, &mut out)?,
    }
    Ok(out)
}

/// What both layouts read with.
struct Ctx<'a, 'd> {
    rdr: csv::Reader<&'d [u8]>,
    rec: csv::StringRecord,
    clock: Clock<'a>,
    keys: Vec<Vec<u8>>,
    max_lines: usize,
}

impl Ctx<'_, '_> {
    /// The next row and its 1-based line; `None` at the end.
    fn next(&mut self) -> Result<Option<u64>, Problem> {
        match self.rdr.read_record(&mut self.rec) {
            Ok(true) => Ok(Some(self.rec.position().map_or(0, |p| p.line()))),
            Ok(false) => Ok(None),
            Err(e) => Err(csv_problem(&e)),
        }
    }

    /// Append one line `{"t":..,"values":{..}}` of (sensor index, value) pairs.
    fn line(
        &self,
        out: &mut Converted,
        t: Time,
        values: &[(usize, f64)],
        origin: u64,
    ) -> Result<(), Problem> {
        if out.lines >= self.max_lines {
            return Err(Problem::field(
                "/readings",
                format!("the file makes more than {} measurement lines, the limit per request; use the stream endpoint or split the file", self.max_lines),
            ));
        }
        let buf = &mut out.text;
        if out.lines > 0 {
            buf.push(b',');
        } else {
            t.write(&mut out.first_time);
        }
        buf.extend_from_slice(b"{\"t\":");
        t.write(buf);
        buf.extend_from_slice(b",\"values\":{");
        for (i, (s, v)) in values.iter().enumerate() {
            if i > 0 {
                buf.push(b',');
            }
            buf.extend_from_slice(&self.keys[*s]);
            num(buf, *v);
        }
        buf.extend_from_slice(b"}}");
        out.lines += 1;
        out.origin.push(origin);
        Ok(())
    }
}

/// Wide: one line per row, in file order.
fn wide(
    ctx: &mut Ctx<'_, '_>,
    spec: &CsvSpec,
    sensors: &[SensorDim<'_>],
    header: &[String],
    time_col: usize,
    out: &mut Converted,
) -> Result<(), Problem> {
    // (column index, sensor index), in sensor order.
    let mut cols: Vec<(usize, usize)> = Vec::new();
    let mut faults = Faults::default();
    // Explicit columns first; then every other header that is a sensor's own name.
    let explicit = spec.columns.as_deref().unwrap_or(&[]);
    for (h, sensor) in explicit {
        let s = sensors.iter().position(|x| x.name == sensor).unwrap_or(0);
        match header.iter().position(|x| x == h) {
            Some(c) => cols.push((c, s)),
            None => faults.push(FieldError::new(
                format!("/csv/columns/{}", crate::problem::escape_token(sensor)),
                format!(
                    "the CSV header has no column '{h}' (its columns: {})",
                    listing(header)
                ),
            )),
        }
    }
    for (c, h) in header.iter().enumerate() {
        if c == time_col || cols.iter().any(|&(k, _)| k == c) {
            continue;
        }
        let Some(s) = sensors.iter().position(|x| x.name == h) else {
            continue;
        };
        if explicit.iter().any(|(_, name)| name == h) {
            continue;
        }
        if sensors[s].dim != 1 {
            faults.push(FieldError::new(
                "/csv/columns",
                format!("column '{h}' names sensor '{h}', which reads {} values at once; a CSV cell holds one, so send its readings as JSON measurements", sensors[s].dim),
            ));
        } else {
            cols.push((c, s));
        }
    }
    if cols.is_empty() && faults.list.is_empty() {
        faults.push(FieldError::new(
            "/csv/columns",
            format!("no column is mapped to a sensor (the model's scalar sensors: {}; the columns: {}); map them with 'columns'", scalar_names(sensors), listing(header)),
        ));
    }
    faults.into_result()?;
    cols.sort_by_key(|&(_, s)| s);
    let unused: Vec<&str> = header
        .iter()
        .enumerate()
        .filter(|(c, _)| *c != time_col && !cols.iter().any(|(k, _)| k == c))
        .map(|(_, h)| h.as_str())
        .collect();
    if !unused.is_empty() {
        out.notes.push(Note {
            kind: "csv_unused",
            count: unused.len() as u64,
            detail: format!(
                "columns not mapped to a sensor were ignored: {}",
                named(&unused)
            ),
        });
    }
    out.sensor_columns = cols
        .iter()
        .map(|&(c, s)| (sensors[s].name.to_string(), c + 1))
        .collect();
    let mut values: Vec<(usize, f64)> = Vec::with_capacity(cols.len());
    let mut faults = Faults::default();
    while let Some(line) = ctx.next()? {
        values.clear();
        let t = match ctx.clock.read(ctx.rec.get(time_col).unwrap_or("")) {
            Ok(t) => Some(t),
            Err(e) => {
                faults.push(cell_error(line, time_col + 1, e));
                None
            }
        };
        for &(c, s) in &cols {
            match value(ctx.rec.get(c).unwrap_or("")) {
                Ok(Some(v)) => values.push((s, v)),
                Ok(None) => {}
                Err(e) => faults.push(cell_error(line, c + 1, e)),
            }
        }
        // A row whose cells are all blank is still a line: its estimate is a prediction,
        // as for a JSON line without values.
        if let (Some(t), true) = (t, faults.list.is_empty()) {
            ctx.line(out, t, &values, line)?;
        }
    }
    faults.into_result()
}

/// One long row that made it through the quality rule.
struct Row {
    t: Time,
    sensor: u32,
    value: f64,
    line: u64,
}

/// Long: rows sorted by time (stable), rows of one time merged into one line.
fn long(
    ctx: &mut Ctx<'_, '_>,
    spec: &CsvSpec,
    sensors: &[SensorDim<'_>],
    header: &[String],
    time_col: usize,
    out: &mut Converted,
) -> Result<(), Problem> {
    let mut faults = Faults::default();
    let mut column = |field: &str, name: &str| match header.iter().position(|h| h == name) {
        Some(c) => c,
        None => {
            faults.push(FieldError::new(
                format!("/csv/{field}"),
                format!(
                    "the CSV header has no column '{name}' (its columns: {})",
                    listing(header)
                ),
            ));
            0
        }
    };
    let tag_col = column("tag_column", &spec.tag_column);
    let value_col = column("value_column", &spec.value_column);
    let quality_col = spec
        .quality_column
        .as_deref()
        .map(|q| column("quality_column", q));
    faults.into_result()?;
    // tag -> sensor index.
    // Explicit tags first; every other scalar sensor is its own tag.
    let explicit = spec.tags.as_deref().unwrap_or(&[]);
    let mut tags: Vec<(&str, usize)> = explicit
        .iter()
        .filter_map(|(tag, s)| {
            sensors
                .iter()
                .position(|x| x.name == s)
                .map(|i| (tag.as_str(), i))
        })
        .collect();
    for (i, s) in sensors.iter().enumerate() {
        if s.dim == 1 && !tags.iter().any(|&(t, k)| k == i || t == s.name) {
            tags.push((s.name, i));
        }
    }
    out.sensor_columns = tags
        .iter()
        .map(|&(_, s)| (sensors[s].name.to_string(), value_col + 1))
        .collect();
    let mut rows: Vec<Row> = Vec::new();
    let mut unused: Vec<String> = Vec::new();
    let mut unused_rows = 0u64;
    let mut dropped = 0u64;
    let mut faults = Faults::default();
    while let Some(line) = ctx.next()? {
        let rec = &ctx.rec;
        if let Some(q) = quality_col {
            let quality = rec.get(q).unwrap_or("");
            if !spec.good.iter().any(|g| g == quality) {
                dropped += 1;
                continue;
            }
        }
        let tag = rec.get(tag_col).unwrap_or("");
        let Some(&(_, sensor)) = tags.iter().find(|(t, _)| *t == tag) else {
            unused_rows += 1;
            if !unused.iter().any(|u| u == tag) {
                unused.push(tag.to_string());
            }
            continue;
        };
        let v = match value(rec.get(value_col).unwrap_or("")) {
            Ok(v) => v,
            Err(e) => {
                faults.push(cell_error(line, value_col + 1, e));
                None
            }
        };
        let t = match ctx.clock.read(ctx.rec.get(time_col).unwrap_or("")) {
            Ok(t) => Some(t),
            Err(e) => {
                faults.push(cell_error(line, time_col + 1, e));
                None
            }
        };
        if let (Some(t), Some(value)) = (t, v) {
            rows.push(Row {
                t,
                sensor: sensor as u32,
                value,
                line,
            });
        }
    }
    faults.into_result()?;
    let mut faults = Faults::default();
    if !unused.is_empty() {
        let names: Vec<&str> = unused.iter().map(String::as_str).collect();
        out.notes.push(Note {
            kind: "csv_unused",
            count: unused.len() as u64,
            detail: format!(
                "rows whose tag is not mapped to a sensor were ignored ({unused_rows} rows): {}",
                named(&names)
            ),
        });
    }
    if dropped > 0 {
        out.notes.push(Note {
            kind: "csv_dropped",
            count: dropped,
            detail: format!(
                "rows whose quality ('{}' column) is not one of {} were dropped",
                spec.quality_column.as_deref().unwrap_or(""),
                named(&spec.good.iter().map(String::as_str).collect::<Vec<_>>())
            ),
        });
    }
    // Stable: rows of one time keep their file order.
    rows.sort_by(|a, b| a.t.cmp(&b.t));
    let mut values: Vec<(usize, f64)> = Vec::with_capacity(sensors.len());
    let mut lines: Vec<u64> = Vec::with_capacity(sensors.len());
    let mut i = 0;
    while i < rows.len() {
        let t = rows[i].t;
        values.clear();
        lines.clear();
        let first = rows[i].line;
        while i < rows.len() && rows[i].t.cmp(&t).is_eq() {
            let r = &rows[i];
            let s = r.sensor as usize;
            if let Some(k) = values.iter().position(|(x, _)| *x == s) {
                faults.push(cell_error(
                    r.line,
                    value_col + 1,
                    format!(
                        "a second value for sensor '{}' at the same time (the first is on line {})",
                        sensors[s].name, lines[k]
                    ),
                ));
            } else {
                values.push((s, r.value));
                lines.push(r.line);
            }
            i += 1;
        }
        if faults.list.is_empty() {
            values.sort_by_key(|&(s, _)| s);
            ctx.line(out, t, &values, first)?;
        }
    }
    faults.into_result()
}

/// A csv reader error (bad quoting, unequal row lengths, invalid UTF-8) at its line.
fn csv_problem(e: &csv::Error) -> Problem {
    let line = e.position().map_or(0, |p| p.line());
    let what = match e.kind() {
        csv::ErrorKind::UnequalLengths {
            expected_len, len, ..
        } => {
            format!("the row has {len} fields where the header has {expected_len}")
        }
        csv::ErrorKind::Utf8 { err, .. } => {
            format!("field {} is not UTF-8 text", err.field() + 1)
        }
        _ => e.to_string(),
    };
    Problem::field(format!("/readings/{line}"), format!("line {line}: {what}"))
}

/// Headers quoted, for messages.
fn listing(header: &[String]) -> String {
    let v: Vec<&str> = header.iter().map(String::as_str).collect();
    named(&v)
}

/// Up to [`MAX_NAMED`] names quoted, then how many more.
fn named(names: &[&str]) -> String {
    let mut s = names
        .iter()
        .take(MAX_NAMED)
        .map(|n| format!("'{}'", clip(n)))
        .collect::<Vec<_>>()
        .join(", ");
    if names.len() > MAX_NAMED {
        s.push_str(&format!(" and {} more", names.len() - MAX_NAMED));
    }
    s
}

fn scalar_names(sensors: &[SensorDim<'_>]) -> String {
    let v: Vec<&str> = sensors
        .iter()
        .filter(|s| s.dim == 1)
        .map(|s| s.name)
        .collect();
    if v.is_empty() {
        "none".to_string()
    } else {
        named(&v)
    }
}
