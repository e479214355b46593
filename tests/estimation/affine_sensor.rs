//! Sensors whose formulas are affine (`measures: "pos"`, `"2*pos - vel + 0.5*u + 3"`)
//! are read as constant matrices by the extended filter instead of being differentiated
//! on every update. The answer must be the one the formula path gives: the same sensor
//! written with `+ 0*t` reads time, so it stays on the formula path, and both runs are
//! compared to 1e-12 (the paths differ only in the order of additions).

use super::support::{matrix, ok};
use serde_json::{json, Value};

fn body(gauge: &str) -> Value {
    let lines: Vec<Value> = (1..=60)
        .map(|k| {
            let t = k as f64 * 0.2;
            let mut line = json!({"t": t, "values": {"gauge": 3.0 + 2.0 * 0.4 * t - 0.4 + 0.25 * ((k * 7 % 11) as f64 - 5.0) / 5.0}});
            if k % 20 == 1 {
                line["inputs"] = json!({"u": if k % 40 == 1 { 1.0 } else { -1.0 }});
            }
            line
        })
        .collect();
    json!({
        "model": {
            "states": ["pos", "vel"],
            "inputs": ["u"],
            "dynamics": {"linear": {"time": "continuous", "A": [[0.0, 1.0], [0.0, 0.0]], "B": [[0.0], [0.2]]}},
            "process_noise": {"density": {"vel": 0.05}},
            "sensors": {"gauge": {"measures": gauge, "std": 0.3}}
        },
        "filter": {"method": "ekf", "gate": {"probability": 0.999}},
        "prior": {"t": 0.0, "mean": {"pos": 0.0, "vel": 0.0}, "std": {"pos": 2.0, "vel": 1.0}},
        "measurements": lines,
        "output": {"covariance": "full", "innovations": true}
    })
}

#[test]
fn affine_sensor_matches_the_formula_path() {
    let fast = ok(&body("2*pos - vel + 0.5*u + 3"));
    let slow = ok(&body("2*pos - vel + 0.5*u + 3 + 0*t"));
    let (a, b) = (
        fast["estimates"].as_array().unwrap(),
        slow["estimates"].as_array().unwrap(),
    );
    assert_eq!(a.len(), b.len());
    let close = |x: &Value, y: &Value| {
        let (x, y) = (x.as_f64().unwrap(), y.as_f64().unwrap());
        assert!((x - y).abs() <= 1e-12 * (1.0 + y.abs()), "{x} vs {y}");
    };
    for (ea, eb) in a.iter().zip(b) {
        for s in ["pos", "vel"] {
            close(&ea["mean"][s], &eb["mean"][s]);
        }
        let (pa, pb) = (matrix(&ea["covariance"]), matrix(&eb["covariance"]));
        for i in 0..2 {
            for j in 0..2 {
                assert!((pa[i][j] - pb[i][j]).abs() <= 1e-12 * (1.0 + pb[i][i]));
            }
        }
        close(
            &ea["innovations"]["gauge"]["nis"],
            &eb["innovations"]["gauge"]["nis"],
        );
    }
}
