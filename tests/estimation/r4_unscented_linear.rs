//! R4: on a linear-Gaussian model the unscented filter reproduces the linear Kalman filter
//! (Julier & Uhlmann 2004, Proc. IEEE 92(3); scaled weights: Wan & van der Merwe 2000):
//! the unscented transform is exact for linear maps, for any α, β, κ with n + λ > 0.

use super::support::{matrix, ok, rel};
use serde_json::{json, Value};

fn body(method: &str, unscented: Value, dynamics: Value, noise: Value) -> Value {
    let readings: Vec<Value> = (1..=300)
        .map(|k| {
            let t = k as f64 * 0.05 + if k % 7 == 0 { 0.013 } else { 0.0 };
            let mut values = json!({"level": (t * 0.9).sin()});
            if k % 3 == 0 {
                values["flow"] = json!(0.2 * (t * 0.4).cos());
            }
            json!({"t": t, "values": values, "inputs": {"pump": if k % 50 < 25 { 1.0 } else { 0.0 }}})
        })
        .collect();
    json!({
        "model": {
            "states": ["level", "inflow", "bias"],
            "inputs": ["pump"],
            "dynamics": dynamics,
            "process_noise": noise,
            "sensors": {"level": {"measures": "level + bias", "std": 0.05}, "flow": {"measures": "inflow", "std": 0.1}}
        },
        "filter": {"method": method, "unscented": unscented},
        "prior": {"t": 0.0, "mean": {"level": 1.0, "inflow": 0.0, "bias": 0.0}, "std": {"level": 0.5, "inflow": 0.3, "bias": 0.1}},
        "measurements": readings
    })
}

fn compare(a: &Value, b: &Value, tol: f64) {
    let (ea, eb) = (
        a["estimates"].as_array().unwrap(),
        b["estimates"].as_array().unwrap(),
    );
    assert_eq!(ea.len(), eb.len());
    for (x, y) in ea.iter().zip(eb) {
        let (pa, pb) = (matrix(&x["covariance"]), matrix(&y["covariance"]));
        let scale = pa[0][0].abs().max(pa[1][1].abs()).max(pa[2][2].abs());
        for s in ["level", "inflow", "bias"] {
            let (ma, mb) = (
                x["mean"][s].as_f64().unwrap(),
                y["mean"][s].as_f64().unwrap(),
            );
            assert!(rel(ma, mb, scale.sqrt()) < tol, "{s}: {ma} vs {mb}");
        }
        for i in 0..3 {
            for j in 0..3 {
                assert!(
                    rel(pa[i][j], pb[i][j], scale) < tol,
                    "P[{i}][{j}]: {} vs {}",
                    pa[i][j],
                    pb[i][j]
                );
            }
        }
    }
}

#[test]
fn ukf_equals_kalman_filter_on_linear_continuous_model() {
    let dynamics = json!({"linear": {"time": "continuous", "A": [[0.0, 1.0, 0.0], [0.0, -0.5, 0.0], [0.0, 0.0, 0.0]], "B": [[0.0], [0.3], [0.0]]}});
    let noise = json!({"density": {"inflow": 0.02, "bias": 1e-4}});
    let kf = ok(&body("ekf", json!({}), dynamics.clone(), noise.clone()));
    for params in [
        json!({}),
        json!({"alpha": 0.5, "beta": 2.0, "kappa": 1.0}),
        json!({"alpha": 1e-2, "beta": 0.0, "kappa": 0.0}),
    ] {
        let ukf = ok(&body("ukf", params, dynamics.clone(), noise.clone()));
        compare(&kf, &ukf, 1e-9);
    }
}

#[test]
fn ukf_equals_kalman_filter_on_formula_model_with_linear_rates() {
    // The same model written as formulas. Plainly written it is recognised as affine and
    // discretised exactly, so the filters agree as on the matrix model. With `+ 0*t` the
    // formula reads time, so both filters go through the ODE integrator; they must still
    // agree (linear flow), to the integrator's tolerance.
    let noise = json!({"density": {"inflow": 0.02}});
    for (rate, tol) in [
        ("-0.5*inflow + 0.3*pump", 1e-9),
        ("-0.5*inflow + 0.3*pump + 0*t", 1e-5),
    ] {
        let dynamics = json!({"rates": {"level": "inflow", "inflow": rate}});
        let kf = ok(&body("ekf", json!({}), dynamics.clone(), noise.clone()));
        let ukf = ok(&body("ukf", json!({}), dynamics, noise.clone()));
        compare(&kf, &ukf, tol);
    }
}
