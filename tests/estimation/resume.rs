//! Resumption: one reading sequence sent as one request, or as several requests each
//! started from the previous posterior, gives bit-identical estimates (API contract), for
//! every filter and both time forms.

use super::support::ok;
use serde_json::{json, Value};

fn stamp(secs: f64) -> String {
    let whole = secs.floor() as i64;
    let nanos = ((secs - whole as f64) * 1e9).round() as i64;
    format!(
        "2026-05-04T08:{:02}:{:02}.{:09}Z",
        whole / 60,
        whole % 60,
        nanos
    )
}

fn readings(stamps: bool) -> Vec<Value> {
    (1..=120)
        .map(|k| {
            let t = k as f64 * 0.1 + if k % 5 == 0 { 0.03 } else { 0.0 };
            let tv = if stamps { json!(stamp(t)) } else { json!(t) };
            let mut line = json!({"t": tv});
            if k % 4 != 0 {
                line["values"] = json!({"encoder": (0.6 * t).sin() * 2.0});
            }
            if k % 9 == 0 {
                line["values"]["tacho"] = json!(1.2 * (0.6 * t).cos());
            }
            if k % 30 == 1 {
                line["inputs"] = json!({"drive": if k % 60 == 1 { 0.5 } else { -0.2 }});
            }
            line
        })
        .collect()
}

fn body(method: &str, prior: Value, lines: &[Value]) -> Value {
    json!({
        "model": {
            "states": ["pos", "vel"],
            "inputs": ["drive"],
            "parameters": {"friction": {"initial": 0.3, "std": 0.1, "random_walk": 1e-4}},
            "dynamics": {"rates": {"pos": "vel", "vel": "drive - friction*vel"}},
            "process_noise": {"density": {"vel": 0.05}},
            "sensors": {"encoder": {"measures": "pos", "std": 0.02}, "tacho": {"measures": "vel", "std": 0.05}}
        },
        "filter": {"method": method, "ensemble": {"members": 30, "seed": 9}, "gate": {"probability": 0.999}},
        "prior": prior,
        "measurements": lines,
        "output": {"covariance": "full"}
    })
}

fn chunked_equals_single(method: &str, stamps: bool) {
    let lines = readings(stamps);
    let t0 = if stamps {
        json!(stamp(0.0))
    } else {
        json!(0.0)
    };
    let prior = json!({"t": t0, "mean": {"pos": 0.0, "vel": 0.0}, "std": {"pos": 0.5, "vel": 0.5}});
    let single = ok(&body(method, prior.clone(), &lines));
    let mut estimates = Vec::new();
    let mut p = prior;
    for chunk in lines.chunks(30) {
        let out = ok(&body(method, p, chunk));
        estimates.extend(out["estimates"].as_array().unwrap().iter().cloned());
        p = out["posterior"].clone();
    }
    let whole = single["estimates"].as_array().unwrap();
    assert_eq!(whole.len(), estimates.len());
    for (k, (a, b)) in whole.iter().zip(&estimates).enumerate() {
        assert_eq!(a, b, "{method} (stamps: {stamps}) differs at line {k}");
    }
    assert_eq!(single["posterior"], p, "{method}: final posterior differs");
}

#[test]
fn chunked_runs_equal_one_run_ekf() {
    chunked_equals_single("ekf", false);
    chunked_equals_single("ekf", true);
}

#[test]
fn chunked_runs_equal_one_run_ukf() {
    chunked_equals_single("ukf", false);
    chunked_equals_single("ukf", true);
}

#[test]
fn chunked_runs_equal_one_run_enkf() {
    chunked_equals_single("enkf", false);
    chunked_equals_single("enkf", true);
}

#[test]
fn same_request_gives_identical_bytes() {
    let lines = readings(false);
    let prior =
        json!({"t": 0.0, "mean": {"pos": 0.0, "vel": 0.0}, "std": {"pos": 0.5, "vel": 0.5}});
    for method in ["ekf", "ukf", "enkf"] {
        let b = serde_json::to_vec(&body(method, prior.clone(), &lines)).unwrap();
        let never = tacit::job::Stop::never();
        let a1 = tacit::job::estimate(&b, &Default::default(), &never)
            .unwrap()
            .body;
        let a2 = tacit::job::estimate(&b, &Default::default(), &never)
            .unwrap()
            .body;
        assert_eq!(a1, a2, "{method}");
    }
}
