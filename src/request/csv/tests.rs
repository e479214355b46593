//! The CSV converter: wide and long layouts, the quality rule, time zones across
//! daylight-saving changes, and the line and column of every fault.

use super::*;
use serde_json::{json, Value};

const SENSORS: &[SensorDim<'static>] = &[
    SensorDim {
        name: "trolley_position",
        dim: 1,
    },
    SensorDim {
        name: "hook_angle",
        dim: 1,
    },
    SensorDim {
        name: "camera",
        dim: 2,
    },
];

fn spec_of(v: Value) -> Result<CsvSpec, Problem> {
    spec(&v.to_string(), SENSORS)
}

fn run(v: Value, csv: &str) -> Result<Converted, Problem> {
    convert(csv.as_bytes(), &spec_of(v)?, SENSORS, 1_000_000)
}

/// The converted lines read back as JSON.
fn lines(c: &Converted) -> Vec<Value> {
    let text = format!("[{}]", String::from_utf8(c.text.clone()).unwrap());
    serde_json::from_str::<Vec<Value>>(&text).unwrap()
}

fn first_error(p: &Problem) -> (&str, &str) {
    (p.errors[0].pointer.as_str(), p.errors[0].detail.as_str())
}

#[test]
fn a_wide_file_becomes_one_line_per_row_with_blanks_left_out() {
    let csv =
        "time,PT-101,hook_angle,ambient\n0,1.5,0.25,20\n0.5,,0.125,21\n1,1.75e-3,,22\n1.5,,,23\n";
    let c = run(
        json!({"layout": "wide", "columns": {"trolley_position": "PT-101"}}),
        csv,
    )
    .unwrap();
    assert_eq!(
        lines(&c),
        vec![
            json!({"t": 0.0, "values": {"trolley_position": 1.5, "hook_angle": 0.25}}),
            json!({"t": 0.5, "values": {"hook_angle": 0.125}}),
            json!({"t": 1.0, "values": {"trolley_position": 0.00175}}),
            json!({"t": 1.5, "values": {}}),
        ]
    );
    // A row with no reading is a line all the same; lines remember their CSV line.
    assert_eq!(c.origin, vec![2, 3, 4, 5]);
    assert_eq!(c.time_column, 1);
    assert_eq!(c.notes.len(), 1);
    assert_eq!(c.notes[0].kind, "csv_unused");
    assert!(
        c.notes[0].detail.contains("'ambient'"),
        "{}",
        c.notes[0].detail
    );
}

#[test]
fn numbers_are_written_so_they_read_back_as_the_same_double() {
    let cells = [
        "0.1",
        "1e-300",
        "-2.5E+10",
        "123456789.123456789",
        "+7",
        "0.30000000000000004",
    ];
    let mut csv = String::from("time,hook_angle\n");
    for (i, c) in cells.iter().enumerate() {
        csv.push_str(&format!("{i},{c}\n"));
    }
    let c = run(json!({"layout": "wide"}), &csv).unwrap();
    for (line, cell) in lines(&c).iter().zip(cells) {
        let want: f64 = cell.parse().unwrap();
        assert_eq!(
            line["values"]["hook_angle"].as_f64().unwrap().to_bits(),
            want.to_bits(),
            "{cell}"
        );
    }
}

#[test]
fn a_long_file_is_sorted_by_time_and_merged_with_the_quality_rule_applied() {
    // Exported tag by tag, as historians do; one bad-quality row and an unknown tag.
    let csv = "tag;time;value;quality\n\
               PT-101;2026-01-15 08:00:01;1.5;192\n\
               PT-101;2026-01-15 08:00:00;1.25;good\n\
               HA-7;2026-01-15 08:00:00;0.5;192\n\
               HA-7;2026-01-15 08:00:02;0.75;bad\n\
               TT-9;2026-01-15 08:00:00;20;192\n";
    let spec = json!({"layout": "long", "delimiter": ";", "time_zone": "Europe/Berlin",
        "tags": {"trolley_position": "PT-101", "hook_angle": "HA-7"},
        "quality_column": "quality", "good": ["good", "192"]});
    let c = run(spec, csv).unwrap();
    // 2026-01-15 08:00:00 in Berlin is CET, UTC+01:00 (IANA tz database, Europe/Berlin;
    // common practice), so 07:00:00Z.
    assert_eq!(
        lines(&c),
        vec![
            json!({"t": "2026-01-15T07:00:00Z", "values": {"trolley_position": 1.25, "hook_angle": 0.5}}),
            json!({"t": "2026-01-15T07:00:01Z", "values": {"trolley_position": 1.5}}),
        ]
    );
    assert_eq!(c.origin, vec![3, 2]);
    let kinds: Vec<(&str, u64)> = c.notes.iter().map(|n| (n.kind, n.count)).collect();
    assert_eq!(kinds, vec![("csv_unused", 1), ("csv_dropped", 1)]);
    assert!(c.notes[0].detail.contains("'TT-9'"));
}

/// Unix seconds of a converted single-row file's time.
fn unix_seconds(zone: &str, cell: &str) -> Result<i64, Problem> {
    let c = run(
        json!({"layout": "wide", "time_zone": zone}),
        &format!("time,hook_angle\n{cell},1\n"),
    )?;
    let t = lines(&c)[0]["t"].as_str().unwrap().to_string();
    Ok(jiff::Timestamp::from_str_checked(&t).as_second())
}

trait Checked {
    fn from_str_checked(s: &str) -> Self;
}
impl Checked for jiff::Timestamp {
    fn from_str_checked(s: &str) -> Self {
        s.parse().unwrap()
    }
}

#[test]
fn local_times_are_read_in_the_zone_and_written_in_utc() {
    // Days from 1970-01-01 to 2026-01-01: 56 years of 365 days plus the 14 leap days of
    // 1972, 1976, ..., 2024 = 20440 + 14 = 20454 (Gregorian calendar, common practice).
    // 2026-01-15 is day 20454 + 14 = 20468: 20468 * 86400 = 1_768_435_200 s at midnight UTC.
    let midnight_jan15 = 20_468i64 * 86_400;
    assert_eq!(midnight_jan15, 1_768_435_200);
    // Berlin in January is CET, UTC+01:00, so 08:00 local is 07:00 UTC (IANA tz database,
    // Europe/Berlin; common practice).
    assert_eq!(
        unix_seconds("Europe/Berlin", "2026-01-15 08:00:00").unwrap(),
        midnight_jan15 + 7 * 3600
    );
    // 2026-07-01 is day 20454 + 31+28+31+30+31+30 = 20635; Berlin in July is CEST,
    // UTC+02:00, so 12:00 local is 10:00 UTC.
    assert_eq!(
        unix_seconds("Europe/Berlin", "2026-07-01T12:00:00").unwrap(),
        20_635 * 86_400 + 10 * 3600
    );
    // With an offset the zone is not used; UTC is the default zone.
    assert_eq!(
        unix_seconds("Europe/Berlin", "2026-01-15T08:00:00-05:00").unwrap(),
        midnight_jan15 + 13 * 3600
    );
    assert_eq!(
        unix_seconds("UTC", "2026-01-15 08:00:00").unwrap(),
        midnight_jan15 + 8 * 3600
    );
    // Fractions are kept exactly.
    let c = run(
        json!({"layout": "wide"}),
        "time,hook_angle\n2026-01-15 08:00:00.125,1\n",
    )
    .unwrap();
    assert_eq!(lines(&c)[0]["t"], json!("2026-01-15T08:00:00.125Z"));
}

#[test]
fn a_skipped_or_repeated_local_hour_is_refused_at_its_line_and_column() {
    // EU summer time (Directive 2000/84/EC, IANA tz Europe/Berlin; common practice): on
    // Sunday 2026-03-29 clocks go from 02:00 CET to 03:00 CEST, so 02:30 does not exist;
    // on Sunday 2026-10-25 they go from 03:00 CEST back to 02:00 CET, so 02:30 happens
    // twice (+02:00, then +01:00).
    let spec = json!({"layout": "wide", "time_zone": "Europe/Berlin"});
    let csv = "hook_angle,time\n1,2026-03-29 01:30:00\n2,2026-03-29 02:30:00\n";
    let p = run(spec.clone(), csv).unwrap_err();
    let (pointer, detail) = first_error(&p);
    assert_eq!(pointer, "/readings/3/2");
    assert!(detail.starts_with("line 3, column 2: "), "{detail}");
    assert!(
        detail.contains("does not exist") && detail.contains("+01") && detail.contains("+02"),
        "{detail}"
    );
    let csv = "hook_angle,time\n1,2026-10-25 02:30:00\n";
    let p = run(spec.clone(), csv).unwrap_err();
    let (pointer, detail) = first_error(&p);
    assert_eq!(pointer, "/readings/2/2");
    assert!(detail.contains("happens twice"), "{detail}");
    // Either side of the autumn change is fine: 01:30 CEST = 23:30Z the day before, 03:30
    // CET = 02:30Z; 2026-10-25 is day 20454 + 297 = 20751.
    let day = 20_751i64 * 86_400;
    assert_eq!(
        unix_seconds("Europe/Berlin", "2026-10-25 01:30:00").unwrap(),
        day - 1800
    );
    assert_eq!(
        unix_seconds("Europe/Berlin", "2026-10-25 03:30:00").unwrap(),
        day + 2 * 3600 + 1800
    );
}

#[test]
fn a_bad_cell_names_its_line_and_column() {
    let csv = "time,trolley_position,hook_angle\n0,1,1\n1,1,1\n2,1,1\n3,1,1\n4,1,1\n5,1,n/a\n";
    let p = run(json!({"layout": "wide"}), csv).unwrap_err();
    assert_eq!(p.status, 422);
    let (pointer, detail) = first_error(&p);
    assert_eq!(pointer, "/readings/7/3");
    assert!(
        detail.starts_with("line 7, column 3: 'n/a' is not a number"),
        "{detail}"
    );
    // A time in another form than the first row's, and a short row.
    let p = run(
        json!({"layout": "wide"}),
        "time,hook_angle\n0,1\n2026-01-01T00:00:00Z,1\n",
    )
    .unwrap_err();
    assert_eq!(first_error(&p).0, "/readings/3/1");
    let p = run(json!({"layout": "wide"}), "time,hook_angle\n0,1\n1\n").unwrap_err();
    assert_eq!(first_error(&p).0, "/readings/3");
    // A long file with two values for one sensor at one time.
    let p = run(
        json!({"layout": "long"}),
        "time,tag,value\n0,hook_angle,1\n0,hook_angle,2\n",
    )
    .unwrap_err();
    let (pointer, detail) = first_error(&p);
    assert_eq!(pointer, "/readings/3/3");
    assert!(detail.contains("first is on line 2"), "{detail}");
}

#[test]
fn the_section_is_checked_against_the_model_at_its_pointers() {
    let p = spec_of(json!({"columns": {"camera": "CAM", "crane": "X"}})).unwrap_err();
    let pointers: Vec<&str> = p.errors.iter().map(|e| e.pointer.as_str()).collect();
    assert_eq!(
        pointers,
        vec!["/csv/layout", "/csv/columns/camera", "/csv/columns/crane"]
    );
    assert!(p.errors[1].detail.contains("2 values"));
    let p = spec_of(
        json!({"layout": "long", "time_zone": "Europe/Berln", "delimiter": ";;", "colour": 1}),
    )
    .unwrap_err();
    assert_eq!(first_error(&p).0, "/csv/colour");
    let p = spec_of(json!({"layout": "long", "time_zone": "Europe/Berln", "delimiter": ";;"}))
        .unwrap_err();
    let pointers: Vec<&str> = p.errors.iter().map(|e| e.pointer.as_str()).collect();
    assert_eq!(pointers, vec!["/csv/time_zone", "/csv/delimiter"]);
    let p = spec_of(json!({"layout": "wide", "tags": {"hook_angle": "HA"}})).unwrap_err();
    assert_eq!(first_error(&p).0, "/csv/tags");
    let p = spec_of(json!({"layout": "long", "quality_column": "q"})).unwrap_err();
    assert_eq!(first_error(&p).0, "/csv/good");
    // A missing header.
    let p = run(
        json!({"layout": "wide", "columns": {"hook_angle": "HA"}}),
        "time,PT\n0,1\n",
    )
    .unwrap_err();
    assert_eq!(first_error(&p).0, "/csv/columns/hook_angle");
    let p = run(
        json!({"layout": "long", "value_column": "v"}),
        "time,tag,value\n",
    )
    .unwrap_err();
    assert_eq!(first_error(&p).0, "/csv/value_column");
    let p = run(
        json!({"layout": "wide", "time_column": "stamp"}),
        "time,hook_angle\n",
    )
    .unwrap_err();
    assert_eq!(first_error(&p).0, "/csv/time_column");
    // A vector sensor named by a header.
    let p = run(json!({"layout": "wide"}), "time,camera\n0,1\n").unwrap_err();
    assert_eq!(first_error(&p).0, "/csv/columns");
}

#[test]
fn too_many_lines_are_refused_before_more_are_converted() {
    let s = spec_of(json!({"layout": "wide"})).unwrap();
    let csv = "time,hook_angle\n0,1\n1,1\n2,1\n";
    let p = convert(csv.as_bytes(), &s, SENSORS, 2).unwrap_err();
    assert_eq!(first_error(&p).0, "/readings");
    assert_eq!(convert(csv.as_bytes(), &s, SENSORS, 3).unwrap().lines, 3);
}
