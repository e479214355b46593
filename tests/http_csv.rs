//! Readings as a historian CSV (`multipart/form-data` with `request` and `readings` parts,
//! and `tacit run --readings`): the answer is byte for byte the answer to the same
//! readings sent as JSON, for the wide and the long layout; faults point at the CSV's line
//! and column.

use crate::support::{assert_pointer, assert_problem, post, post_json, start_default};
use serde_json::{json, Value};
use std::process::Command;

const BOUNDARY: &str = "tacit-csv-7f3a";

/// A multipart body with a `request` part (JSON) and a `readings` part (CSV).
fn multipart(request: &Value, csv: &str) -> Vec<u8> {
    let mut b = Vec::new();
    b.extend_from_slice(
        format!(
            "--{BOUNDARY}\r\nContent-Disposition: form-data; name=\"request\"\r\nContent-Type: application/json\r\n\r\n"
        )
        .as_bytes(),
    );
    b.extend_from_slice(&serde_json::to_vec(request).unwrap());
    b.extend_from_slice(
        format!(
            "\r\n--{BOUNDARY}\r\nContent-Disposition: form-data; name=\"readings\"; filename=\"plant.csv\"\r\nContent-Type: text/csv\r\n\r\n"
        )
        .as_bytes(),
    );
    b.extend_from_slice(csv.as_bytes());
    b.extend_from_slice(format!("\r\n--{BOUNDARY}--\r\n").as_bytes());
    b
}

fn content_type() -> String {
    format!("multipart/form-data; boundary={BOUNDARY}")
}

/// An overhead crane trolley with a position encoder and a hook-angle sensor (our own
/// plant), prior at 06:00 UTC on 2026-03-02.
fn request() -> Value {
    json!({
      "model": {
        "states": ["pos", "vel"],
        "dynamics": {"rates": {"pos": "vel"}},
        "process_noise": {"density": {"vel": 0.1}},
        "sensors": {
          "encoder": {"measures": "pos", "std": 0.05},
          "sway": {"measures": "0.1*vel", "std": 0.02}
        }
      },
      "filter": {"method": "ekf"},
      "prior": {"t": "2026-03-02T06:00:00Z", "mean": {"pos": 0.0, "vel": 0.0}, "std": {"pos": 1.0, "vel": 5.0}}
    })
}

/// Readings every 0.5 s: (seconds after the prior, encoder, sway), `None` where a sensor
/// has no reading. Deterministic, invented numbers.
fn table(n: usize) -> Vec<(f64, Option<f64>, Option<f64>)> {
    (1..=n)
        .map(|k| {
            let t = k as f64 * 0.5;
            let enc = (k % 5 != 0).then(|| 0.3 * t + ((k * 37) % 11) as f64 * 1e-3);
            let sway = (k % 3 == 0).then(|| 0.03 + ((k * 13) % 7) as f64 * 1e-3);
            (t, enc, sway)
        })
        .collect()
}

/// `2026-03-02T06:00:00Z` plus `secs` (multiples of 0.5), as UTC.
fn utc(secs: f64) -> String {
    let whole = secs as u64;
    let frac = if secs.fract() > 0.0 { ".5" } else { "" };
    format!("2026-03-02T06:{:02}:{:02}{frac}Z", whole / 60, whole % 60)
}

/// The same instant as Berlin wall-clock time: in March before the change, CET is
/// UTC+01:00 (IANA tz database, Europe/Berlin; common practice).
fn berlin(secs: f64) -> String {
    let whole = secs as u64;
    let frac = if secs.fract() > 0.0 { ".5" } else { "" };
    format!("2026-03-02 07:{:02}:{:02}{frac}", whole / 60, whole % 60)
}

fn json_request(rows: &[(f64, Option<f64>, Option<f64>)]) -> Value {
    let lines: Vec<Value> = rows
        .iter()
        .map(|(t, e, s)| {
            let mut values = serde_json::Map::new();
            if let Some(e) = e {
                values.insert("encoder".into(), json!(e));
            }
            if let Some(s) = s {
                values.insert("sway".into(), json!(s));
            }
            json!({"t": utc(*t), "values": values})
        })
        .collect();
    let mut r = request();
    r["measurements"] = Value::Array(lines);
    r
}

fn wide_csv(rows: &[(f64, Option<f64>, Option<f64>)]) -> String {
    let mut s = String::from("Timestamp;ENC-1;SWAY-2;AMBIENT\n");
    let cell = |v: &Option<f64>| v.map(|x| x.to_string()).unwrap_or_default();
    for (t, e, w) in rows {
        s.push_str(&format!("{};{};{};20.5\n", berlin(*t), cell(e), cell(w)));
    }
    s
}

/// Tag by tag, as historians export, with a bad-quality row per sensor.
fn long_csv(rows: &[(f64, Option<f64>, Option<f64>)]) -> String {
    let mut s = String::from("tag,time,value,quality\n");
    for (t, e, _) in rows {
        if let Some(e) = e {
            s.push_str(&format!("ENC-1,{},{e},192\n", berlin(*t)));
        }
    }
    s.push_str(&format!("ENC-1,{},99,0\n", berlin(0.25)));
    for (t, _, w) in rows {
        if let Some(w) = w {
            s.push_str(&format!("sway,{},{w},192\n", berlin(*t)));
        }
    }
    s.push_str(&format!("sway,{},99,0\n", berlin(0.75)));
    s
}

fn with_csv(csv: Value) -> Value {
    let mut r = request();
    r["csv"] = csv;
    r
}

#[tokio::test]
async fn a_wide_or_long_csv_gets_the_answer_of_the_same_readings_sent_as_json() {
    let s = start_default().await;
    let rows = table(40);
    let wide = with_csv(
        json!({"layout": "wide", "time_column": "Timestamp", "time_zone": "Europe/Berlin",
        "delimiter": ";", "columns": {"encoder": "ENC-1", "sway": "SWAY-2"}}),
    );
    let long = with_csv(json!({"layout": "long", "time_zone": "Europe/Berlin",
        "tags": {"encoder": "ENC-1"}, "quality_column": "quality", "good": ["192"]}));
    for path in ["/v1/estimate", "/v1/smooth"] {
        let want = post_json(&s, path, &json_request(&rows)).await;
        assert_eq!(want.status, 200, "{}", want.text);
        let got = post(
            &s,
            path,
            &content_type(),
            multipart(&wide, &wide_csv(&rows)),
        )
        .await;
        assert_eq!(got.status, 200, "{}", got.text);
        // Byte for byte but for the note of the unmapped column.
        let warnings = got.body["summary"]["warnings"].as_array().unwrap();
        assert_eq!(warnings.len(), 1, "{}", got.text);
        assert_eq!(warnings[0]["kind"], "csv_unused");
        assert!(warnings[0]["detail"]
            .as_str()
            .unwrap()
            .contains("'AMBIENT'"));
        let wide_plain = with_csv(json!({"layout": "wide", "time_column": "Timestamp",
            "time_zone": "Europe/Berlin", "delimiter": ";",
            "columns": {"encoder": "ENC-1", "sway": "SWAY-2"}}));
        let plain_csv = {
            let mut s = String::from("Timestamp;ENC-1;SWAY-2\n");
            for (t, e, w) in &rows {
                let cell = |v: &Option<f64>| v.map(|x| x.to_string()).unwrap_or_default();
                s.push_str(&format!("{};{};{}\n", berlin(*t), cell(e), cell(w)));
            }
            s
        };
        let got = post(
            &s,
            path,
            &content_type(),
            multipart(&wide_plain, &plain_csv),
        )
        .await;
        assert_eq!(got.status, 200, "{}", got.text);
        assert!(
            got.text == want.text,
            "wide {path}:\n{}\n{}",
            got.text,
            want.text
        );
        // Long: sorted and merged; the dropped rows are counted in a note. A long file
        // has no row for a time without readings, so neither has its JSON twin.
        let read: Vec<_> = rows
            .iter()
            .copied()
            .filter(|(_, e, w)| e.is_some() || w.is_some())
            .collect();
        let want = post_json(&s, path, &json_request(&read)).await;
        let got = post(
            &s,
            path,
            &content_type(),
            multipart(&long, &long_csv(&rows)),
        )
        .await;
        assert_eq!(got.status, 200, "{}", got.text);
        let mut body = got.body.clone();
        let warnings = body["summary"]["warnings"].as_array_mut().unwrap();
        let note = warnings.pop().unwrap();
        assert_eq!(note["kind"], "csv_dropped");
        assert_eq!(note["count"], 2);
        assert_eq!(body, want.body, "long {path}");
        let mut cut = got.text.find("{\"kind\":\"csv_dropped\"").unwrap();
        if got.text.as_bytes()[cut - 1] == b',' {
            cut -= 1;
        }
        let end = got.text.len() - 3;
        let text = format!("{}{}", &got.text[..cut], &got.text[end..]);
        assert!(text == want.text, "long {path}");
    }
}

#[tokio::test]
async fn numeric_times_stay_numbers_and_calibrate_takes_a_csv_too() {
    let s = start_default().await;
    let mut r = request();
    r["prior"]["t"] = json!(0.0);
    let rows = table(30);
    let mut json_r = r.clone();
    json_r["measurements"] = rows
        .iter()
        .map(|(t, e, _)| json!({"t": t, "values": {"encoder": e}}))
        .collect();
    let csv: String = std::iter::once("time,encoder\n".to_string())
        .chain(
            rows.iter()
                .map(|(t, e, _)| format!("{t},{}\n", e.map(|x| x.to_string()).unwrap_or_default())),
        )
        .collect();
    // A JSON null reading is no reading, as a blank cell is.
    let want = post_json(&s, "/v1/estimate", &json_r).await;
    r["csv"] = json!({"layout": "wide"});
    let got = post(&s, "/v1/estimate", &content_type(), multipart(&r, &csv)).await;
    assert_eq!(got.status, 200, "{}", got.text);
    assert!(got.text == want.text);
    assert!(got.body["estimates"][0]["t"].is_number());
    // Calibration of the encoder's std: the same fit from either form.
    let free = json!({"/model/sensors/encoder/std": {}});
    json_r["free"] = free.clone();
    r["free"] = free;
    let want = post_json(&s, "/v1/calibrate", &json_r).await;
    let got = post(&s, "/v1/calibrate", &content_type(), multipart(&r, &csv)).await;
    assert_eq!(want.status, 200, "{}", want.text);
    assert_eq!(got.status, 200, "{}", got.text);
    assert_eq!(got.body["free"], want.body["free"], "{}", got.text);
    assert_eq!(got.body["log_likelihood"], want.body["log_likelihood"]);
}

#[tokio::test]
async fn faults_in_the_file_point_at_its_line_and_column() {
    let s = start_default().await;
    let r = with_csv(json!({"layout": "wide", "time_zone": "Europe/Berlin"}));
    let mut csv = String::from("time,encoder,sway\n");
    for k in 0..5 {
        csv.push_str(&format!("2026-03-02 07:00:0{k},0.{k},0.01\n"));
    }
    csv.push_str("2026-03-02 07:00:06,0.6,bad\n");
    let a = post(&s, "/v1/estimate", &content_type(), multipart(&r, &csv)).await;
    assert_problem(&a, 422);
    assert_pointer(&a, "/readings/7/3");
    assert!(
        a.body["errors"][0]["detail"]
            .as_str()
            .unwrap()
            .starts_with("line 7, column 3: "),
        "{}",
        a.text
    );
    // A row going back in time is refused by the filter, pointed back at the file.
    let csv =
        "time,encoder\n2026-03-02 07:00:01,0.1\n2026-03-02 07:00:03,0.1\n2026-03-02 07:00:02,0.1\n";
    let a = post(&s, "/v1/estimate", &content_type(), multipart(&r, csv)).await;
    assert_problem(&a, 422);
    assert_pointer(&a, "/readings/4/1");
    assert!(
        a.body["detail"]
            .as_str()
            .unwrap()
            .starts_with("/readings/4/1: line 4, column 1: "),
        "{}",
        a.text
    );
    // The section's faults are under /csv: a sensor the model does not have.
    let bad = with_csv(json!({"layout": "wide", "columns": {"hoist": "H-1"}}));
    let a = post(
        &s,
        "/v1/estimate",
        &content_type(),
        multipart(&bad, "time,H-1\n1,1\n"),
    )
    .await;
    assert_problem(&a, 422);
    assert_pointer(&a, "/csv/columns/hoist");
    // A request with measurements, without csv, or without its readings part.
    let mut both = r.clone();
    both["measurements"] = json!([]);
    let a = post(
        &s,
        "/v1/estimate",
        &content_type(),
        multipart(&both, "time,encoder\n"),
    )
    .await;
    assert_pointer(&a, "/measurements");
    let a = post(
        &s,
        "/v1/estimate",
        &content_type(),
        multipart(&request(), "time,encoder\n"),
    )
    .await;
    assert_pointer(&a, "/csv");
    let only = format!(
        "--{BOUNDARY}\r\nContent-Disposition: form-data; name=\"request\"\r\n\r\n{}\r\n--{BOUNDARY}--\r\n",
        r
    );
    let a = post(&s, "/v1/estimate", &content_type(), only).await;
    assert_problem(&a, 422);
    assert_pointer(&a, "/readings");
    // A model fault is reported as for a JSON request.
    let mut broken = r.clone();
    broken["model"]["sensors"]["encoder"]["std"] = json!(-1);
    let a = post(
        &s,
        "/v1/estimate",
        &content_type(),
        multipart(&broken, "time,encoder\n1,1\n"),
    )
    .await;
    assert_problem(&a, 422);
    assert_pointer(&a, "/model/sensors/encoder/std");
    // Other media types are still refused.
    let a = post(&s, "/v1/estimate", "text/csv", "time,encoder\n1,1\n").await;
    assert_problem(&a, 415);
}

#[test]
fn tacit_run_reads_a_csv_beside_the_request() {
    let dir = std::env::temp_dir().join(format!("tacit-csv-{}", std::process::id()));
    std::fs::create_dir_all(&dir).unwrap();
    let rows = table(12);
    let req = with_csv(
        json!({"layout": "wide", "time_column": "Timestamp", "time_zone": "Europe/Berlin",
        "delimiter": ";", "columns": {"encoder": "ENC-1", "sway": "SWAY-2"}}),
    );
    std::fs::write(dir.join("request.json"), serde_json::to_vec(&req).unwrap()).unwrap();
    std::fs::write(dir.join("plant.csv"), wide_csv(&rows)).unwrap();
    std::fs::write(
        dir.join("batch.json"),
        serde_json::to_vec(&json_request(&rows)).unwrap(),
    )
    .unwrap();
    let run = |args: &[&str]| {
        let out = Command::new(env!("CARGO_BIN_EXE_tacit"))
            .args(args)
            .current_dir(&dir)
            .output()
            .unwrap();
        assert!(
            out.status.success(),
            "{}",
            String::from_utf8_lossy(&out.stderr)
        );
        serde_json::from_slice::<Value>(&out.stdout).unwrap()
    };
    let mut got = run(&["run", "request.json", "--readings", "plant.csv"]);
    let want = run(&["run", "batch.json"]);
    let note = got["summary"]["warnings"]
        .as_array_mut()
        .unwrap()
        .pop()
        .unwrap();
    assert_eq!(note["kind"], "csv_unused");
    assert_eq!(got, want);
    let _ = std::fs::remove_dir_all(&dir);
}

/// The multipart examples of openapi/openapi.yaml are not paired with answer examples
/// (the comparison of tests/openapi.rs posts JSON); they are posted here instead. The wide
/// file's third row is blank (a prediction), the long file's third row has bad quality.
#[tokio::test]
async fn the_contract_files_csv_examples_are_answered() {
    let doc: Value = serde_norway::from_str(tacit::http::OPENAPI_YAML).expect("openapi yaml");
    let exs = &doc["paths"]["/v1/estimate"]["post"]["requestBody"]["content"]
        ["multipart/form-data"]["examples"];
    let s = start_default().await;
    let mut answers = Vec::new();
    for name in ["crane_csv_wide", "crane_csv_long"] {
        let v = &exs[name]["value"];
        let body = multipart(&v["request"], v["readings"].as_str().unwrap());
        let a = post(&s, "/v1/estimate", &content_type(), body).await;
        assert_eq!(a.status, 200, "{name}: {}", a.text);
        answers.push(a.body);
    }
    let (wide, long) = (&answers[0]["estimates"], &answers[1]["estimates"]);
    assert_eq!(wide.as_array().unwrap().len(), 3);
    assert_eq!(long.as_array().unwrap().len(), 2);
    assert_eq!(wide[0], long[0]);
    assert_eq!(wide[1], long[1]);
    // 07:00:01 in Berlin on 2 March is 06:00:01Z (CET, UTC+01:00; IANA tz database).
    assert_eq!(wide[0]["t"], "2026-03-02T06:00:01Z");
    assert_eq!(answers[0]["summary"]["warnings"][0]["kind"], "csv_unused");
    assert_eq!(answers[1]["summary"]["warnings"][0]["kind"], "csv_dropped");
}

/// The text of `text` between `start` and the next `end`.
fn between<'a>(text: &'a str, start: &str, end: &str) -> &'a str {
    let from = text
        .find(start)
        .unwrap_or_else(|| panic!("README lacks {start:?}"))
        + start.len();
    let len = text[from..]
        .find(end)
        .unwrap_or_else(|| panic!("README lacks {end:?}"));
    &text[from..from + len]
}

/// The README's section "Readings from a historian CSV": its two uploads, as its shell
/// lines make them, get the answers it shows (times and warning details).
#[tokio::test]
async fn the_readme_csv_examples_are_the_live_answers() {
    let readme = include_str!("../README.md");
    let section = between(readme, "## Readings from a historian CSV", "\n## ");
    let request: Value =
        serde_json::from_str(between(section, "cat > request.json <<'JSON'\n", "\nJSON")).unwrap();
    let csv_of =
        |file: &str| between(section, "printf '", &format!("' > {file}")).replace("\\n", "\n");
    let wide_csv = csv_of("wide.csv");
    let long_csv = between(
        &section[section.find("> wide.csv").unwrap()..],
        "printf '",
        "' > long.csv",
    )
    .replace("\\n", "\n");
    let mut long = request.clone();
    let long_section =
        between(section, "s/\"csv\": {.*/\"csv\": ", "}/; /\"columns\"/d").replace("\\/", "/");
    long["csv"] = serde_json::from_str(&long_section).unwrap();
    let shown: Vec<&str> = section
        .split("```text\n")
        .skip(1)
        .map(|b| b.split("```").next().unwrap())
        .collect();
    assert_eq!(shown.len(), 2);
    let s = start_default().await;
    for ((req, csv), shown) in [(&request, wide_csv.as_str()), (&long, long_csv.as_str())]
        .into_iter()
        .zip(shown)
    {
        let a = post(&s, "/v1/estimate", &content_type(), multipart(req, csv)).await;
        assert_eq!(a.status, 200, "{}", a.text);
        let times: Vec<Value> = a.body["estimates"]
            .as_array()
            .unwrap()
            .iter()
            .map(|e| e["t"].clone())
            .collect();
        let mut live = serde_json::to_string(&times).unwrap() + "\n";
        for w in a.body["summary"]["warnings"].as_array().unwrap() {
            live.push_str(&format!("{}\n", w["detail"]));
        }
        assert_eq!(live, shown);
    }
}

/// An upload past axum's own 2 MB default (the body limit is the service's
/// `max_body_bytes`, counted over the whole multipart body).
#[tokio::test]
async fn an_upload_of_several_megabytes_is_read_whole() {
    let mut r = request();
    r["prior"]["t"] = json!(0.0);
    r["output"] = json!({"covariance": "none"});
    r["csv"] = json!({"layout": "wide"});
    let n = 200_000;
    let mut csv = String::with_capacity(n * 24);
    csv.push_str("time,encoder\n");
    for k in 1..=n {
        csv.push_str(&format!(
            "{}.{:02},{}\n",
            k / 100,
            k % 100,
            0.5 + (k % 17) as f64 * 1e-3
        ));
    }
    assert!(csv.len() > 2 << 20, "{} bytes", csv.len());
    let s = start_default().await;
    let a = post(&s, "/v1/estimate", &content_type(), multipart(&r, &csv)).await;
    assert_eq!(a.status, 200, "{}", &a.text[..a.text.len().min(400)]);
    assert_eq!(a.body["estimates"].as_array().unwrap().len(), n);
}
