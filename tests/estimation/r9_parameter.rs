//! R9: joint estimation of a constant. Free fall read by a position sensor only; the
//! acceleration is estimated as a parameter. The simulation uses standard gravity
//! g_n = 9.80665 m/s² (3rd CGPM, 1901; ISO 80000-3). The estimate must lie within 3
//! posterior std of g_n, and the velocity estimate must follow the linear growth
//! v(t) = v₀ − g_n t of the simulated truth (common practice).

use super::support::{ok, simulate};
use serde_json::{json, Value};

const G_N: f64 = 9.80665;

fn model(g: Value) -> Value {
    json!({
        "states": ["height", "speed"],
        "parameters": {"g": g},
        "dynamics": {"rates": {"height": "speed", "speed": "-g"}},
        "sensors": {"rangefinder": {"measures": "height", "std": 0.01}}
    })
}

#[test]
fn standard_gravity_is_recovered_from_positions() {
    let prior = json!({"t": 0.0, "mean": {"height": 50.0, "speed": 0.0}, "std": {"height": 0.05, "speed": 0.05}});
    let sim = simulate(
        &json!({"model": model(json!(G_N)), "prior": prior, "times": {"start": 0.02, "step": 0.02, "count": 150}, "seed": 5}),
    );
    let truth = sim["truth"].as_array().unwrap();
    for (method, extra) in [
        ("ekf", json!({})),
        ("ukf", json!({})),
        ("enkf", json!({"members": 200, "seed": 1})),
    ] {
        let body = json!({
            "model": model(json!({"initial": 9.0, "std": 1.0})),
            "filter": {"method": method, "ensemble": extra},
            "prior": prior,
            "measurements": sim["measurements"]
        });
        let out = ok(&body);
        assert_eq!(out["states"], json!(["height", "speed", "g"]));
        let post = &out["posterior"];
        let g = post["mean"]["g"].as_f64().unwrap();
        let sg = post["covariance"][2][2].as_f64().unwrap().sqrt();
        assert!((g - G_N).abs() < 3.0 * sg, "{method}: g = {g} ± {sg}");
        assert!(
            sg < 0.1,
            "{method}: g std {sg} should shrink from the prior's 1.0"
        );
        let est = out["estimates"].as_array().unwrap();
        for k in 75..150 {
            let v = est[k]["mean"]["speed"].as_f64().unwrap();
            let sv = est[k]["std"]["speed"].as_f64().unwrap();
            let vt = truth[k]["state"]["speed"].as_f64().unwrap();
            assert!(
                (v - vt).abs() < 3.5 * sv,
                "{method} step {k}: speed {v} ± {sv} vs truth {vt}"
            );
        }
        // The truth itself falls linearly at g_n (no process noise in this model).
        let (t0, v0) = (
            truth[0]["t"].as_f64().unwrap(),
            truth[0]["state"]["speed"].as_f64().unwrap(),
        );
        let (t1, v1) = (
            truth[149]["t"].as_f64().unwrap(),
            truth[149]["state"]["speed"].as_f64().unwrap(),
        );
        assert!((-(v1 - v0) / (t1 - t0) - G_N).abs() < 1e-6);
    }
}
