//! Models written as state families (issue 13) through a real server: a family model
//! answers what the same model written state by state answers (one element, and the
//! issue's 200 nodes under `ekf`), its faults are named at their pointers, and the local
//! ensemble update keeps a small ensemble on track (R14).
//!
//! Scenario (our own): a tunnel kiln cut into zones along its length; each zone's
//! temperature relaxes towards its own ambient value and exchanges heat with its two
//! neighbours, the tunnel's ends held at a fixed temperature; probes read every second
//! zone.

use crate::support::{post_json, start_default};
use serde_json::{json, Map, Value};

/// The numbers of an answer's per-state object (`mean`, `std`) in the order written.
fn numbers(v: &Value) -> Vec<f64> {
    v.as_object()
        .expect("an object of numbers")
        .values()
        .map(|x| x.as_f64().expect("a number"))
        .collect()
}

/// Every estimate's mean and std, and the posterior mean, as one list of numbers each.
fn answer_numbers(body: &Value) -> (Vec<f64>, Vec<f64>) {
    let mut means = Vec::new();
    let mut stds = Vec::new();
    for e in body["estimates"].as_array().expect("estimates") {
        means.extend(numbers(&e["mean"]));
        stds.extend(numbers(&e["std"]));
    }
    means.extend(numbers(&body["posterior"]["mean"]));
    (means, stds)
}

fn assert_close(a: &[f64], b: &[f64], tol: f64, what: &str) {
    assert_eq!(a.len(), b.len(), "{what}: lengths");
    for (k, (x, y)) in a.iter().zip(b).enumerate() {
        assert!(
            (x - y).abs() <= tol * (1.0 + y.abs()),
            "{what}[{k}]: family {x} vs plain {y}"
        );
    }
}

/// Deterministic probe readings (a fixed LCG, so the test is reproducible).
fn probe_values(count: usize, line: usize) -> Vec<f64> {
    let mut s: u64 = 0x6b696c6e ^ (line as u64 * 7919);
    (0..count)
        .map(|k| {
            s = s
                .wrapping_mul(6364136223846793005)
                .wrapping_add(1442695040888963407);
            let noise = ((s >> 33) as f64 / (1u64 << 31) as f64 - 0.5) * 2.0;
            300.0 + 10.0 * ((k as f64) * 0.1).sin() + noise
        })
        .collect()
}

// The check: 200 zones written as one family answer, under `ekf`, what the same
// 200 zones written state by state answer, to 1e-12 (the two are the same model; the
// family form must not change a number).
#[tokio::test]
async fn a_200_zone_family_under_ekf_answers_as_the_model_written_state_by_state() {
    let n = 200;
    let ambient: Vec<f64> = (0..n).map(|i| 280.0 + 0.25 * i as f64).collect();
    let probes: Vec<usize> = (0..n).step_by(2).collect();
    let lines = 6;
    let family = json!({
        "families": {"T": {"size": n, "boundary": "fixed", "value": 290.0}},
        "parameters": {"k": 0.8, "c": 0.05, "amb": ambient},
        "dynamics": {"rates": {"T[i]": "k*(T[i+1] - 2*T[i] + T[i-1]) - c*(T[i] - amb[i])"}},
        "process_noise": {"density": {"T": 0.02}},
        "sensors": {"probe": {"measures": "T[i]", "every": 2, "std": 0.5}}
    });
    // The same zones state by state: T0 .. T199, the ends reading the fixed 290.
    let name = |i: i64| {
        if (0..n as i64).contains(&i) {
            format!("T{i}")
        } else {
            "Tend".to_string()
        }
    };
    let mut rates = Map::new();
    let mut params = Map::new();
    params.insert("k".into(), json!(0.8));
    params.insert("c".into(), json!(0.05));
    params.insert("Tend".into(), json!(290.0));
    let mut density = Map::new();
    for i in 0..n as i64 {
        params.insert(format!("amb{i}"), json!(ambient[i as usize]));
        rates.insert(
            name(i),
            json!(format!(
                "k*({} - 2*{} + {}) - c*({} - amb{i})",
                name(i + 1),
                name(i),
                name(i - 1),
                name(i)
            )),
        );
        density.insert(name(i), json!(0.02));
    }
    let states: Vec<String> = (0..n as i64).map(name).collect();
    let measures: Vec<String> = probes.iter().map(|&i| name(i as i64)).collect();
    let plain = json!({
        "states": states,
        "parameters": params,
        "dynamics": {"rates": rates},
        "process_noise": {"density": density},
        "sensors": {"probe": {"measures": measures, "std": vec![0.5; probes.len()]}}
    });
    let measurements: Vec<Value> = (1..=lines)
        .map(|l| json!({"t": l as f64 * 5.0, "values": {"probe": probe_values(probes.len(), l)}}))
        .collect();
    let mut plain_mean = Map::new();
    let mut plain_std = Map::new();
    for i in 0..n as i64 {
        plain_mean.insert(name(i), json!(300.0));
        plain_std.insert(name(i), json!(4.0));
    }
    let s = start_default().await;
    let family_body = json!({
        "model": family, "filter": {"method": "ekf"},
        "prior": {"t": 0.0, "mean": {"T": 300.0}, "std": {"T": 4.0}},
        "output": {"covariance": "std", "innovations": false},
        "measurements": measurements,
    });
    let plain_body = json!({
        "model": plain, "filter": {"method": "ekf"},
        "prior": {"t": 0.0, "mean": plain_mean, "std": plain_std},
        "output": {"covariance": "std", "innovations": false},
        "measurements": measurements,
    });
    let a = post_json(&s, "/v1/estimate", &family_body).await;
    assert_eq!(a.status, 200, "{}", a.text);
    let b = post_json(&s, "/v1/estimate", &plain_body).await;
    assert_eq!(b.status, 200, "{}", b.text);
    assert_eq!(a.body["estimates"][0]["mean"].as_object().unwrap().len(), n);
    assert!(a.body["estimates"][0]["mean"]["T[17]"].is_number());
    let (am, asd) = answer_numbers(&a.body);
    let (bm, bsd) = answer_numbers(&b.body);
    assert_close(&am, &bm, 1e-12, "mean");
    assert_close(&asd, &bsd, 1e-12, "std");
    s.shutdown().await.unwrap();
}

// A family of one element is the plain one-state model: same answer, here through the
// nonlinear rates path (the zone's loss grows with the square of its excess).
#[tokio::test]
async fn a_family_of_one_element_answers_as_the_plain_model() {
    let family = json!({
        "families": {"T": {"size": 1, "boundary": "periodic"}},
        "parameters": {"c": 0.002, "amb": [280.0]},
        "dynamics": {"rates": {"T[i]": "0.5*(amb[i] - T[i]) - c*(T[i] - amb[i])*abs(T[i] - amb[i])"}},
        "process_noise": {"density": {"T": 0.05}},
        "sensors": {"probe": {"measures": "T[i]", "std": 0.5}}
    });
    let plain = json!({
        "states": ["T"],
        "parameters": {"c": 0.002, "amb": 280.0},
        "dynamics": {"rates": {"T": "0.5*(amb - T) - c*(T - amb)*abs(T - amb)"}},
        "process_noise": {"density": {"T": 0.05}},
        "sensors": {"probe": {"measures": ["T"], "std": [0.5]}}
    });
    let lines: Vec<Value> = (1..=8)
        .map(|l| json!({"t": l as f64 * 2.0, "values": {"probe": probe_values(1, l)}}))
        .collect();
    let s = start_default().await;
    for method in ["ekf", "ukf"] {
        let f = post_json(
            &s,
            "/v1/estimate",
            &json!({
                "model": family, "filter": {"method": method},
                "prior": {"t": 0.0, "mean": {"T": [310.0]}, "std": {"T": 5.0}},
                "measurements": lines,
            }),
        )
        .await;
        assert_eq!(f.status, 200, "{}", f.text);
        let p = post_json(
            &s,
            "/v1/estimate",
            &json!({
                "model": plain, "filter": {"method": method},
                "prior": {"t": 0.0, "mean": {"T": 310.0}, "std": {"T": 5.0}},
                "measurements": lines,
            }),
        )
        .await;
        assert_eq!(p.status, 200, "{}", p.text);
        let (fm, fs) = answer_numbers(&f.body);
        let (pm, ps) = answer_numbers(&p.body);
        // Same formula, same operations: the same bits.
        assert_eq!(fm, pm, "{method} means");
        assert_eq!(fs, ps, "{method} stds");
    }
    s.shutdown().await.unwrap();
}

/// POST `model` with a prior over family `T` and return the invalid fields.
async fn faults_of(model: Value) -> Vec<(String, String)> {
    let s = start_default().await;
    let a = post_json(
        &s,
        "/v1/estimate",
        &json!({
            "model": model, "filter": {"method": "ekf"},
            "prior": {"t": 0.0, "mean": {"T": 300.0}, "std": {"T": 4.0}},
            "measurements": [],
        }),
    )
    .await;
    s.shutdown().await.unwrap();
    assert_eq!(a.status, 422, "{}", a.text);
    a.body["errors"]
        .as_array()
        .expect("errors")
        .iter()
        .map(|e| {
            (
                e["pointer"].as_str().unwrap_or("").to_string(),
                e["detail"].as_str().unwrap_or("").to_string(),
            )
        })
        .collect()
}

#[tokio::test]
async fn family_faults_are_named_at_their_pointers() {
    let got = faults_of(json!({
        "families": {"T": {"size": 4, "boundary": "sideways"}},
        "dynamics": {"rates": {"T[i]": "T[i+1] - T[q]"}},
        "sensors": {"probe": {"measures": "T[i]", "every": 0, "std": 0.5}}
    }))
    .await;
    assert!(
        got.iter().any(|(p, _)| p == "/model/families/T/boundary"),
        "{got:?}"
    );
    let got = faults_of(json!({
        "families": {"T": {"size": 4, "boundary": "periodic"}},
        "parameters": {"amb": [1.0, 2.0]},
        "dynamics": {"rates": {"T[i]": "T[i+1] - T[q]"}},
        "sensors": {"probe": {"measures": "T[i]", "every": 0, "std": 0.5},
                    "pair": {"measures": "T[i]", "elements": [2, 1], "std": 0.5}}
    }))
    .await;
    for want in [
        "/model/parameters/amb",
        "/model/dynamics/rates/T[i]",
        "/model/sensors/probe/every",
        "/model/sensors/pair/elements/1",
    ] {
        assert!(got.iter().any(|(p, _)| p == want), "{want} in {got:?}");
    }
}
