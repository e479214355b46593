//! R10: integration accuracy of nonlinear-rate models, against the closed-form solution of
//! the damped harmonic oscillator (any mechanics text; common practice):
//!   x(t) = e^{−ζωt} (x₀ cos ω_d t + (v₀ + ζω x₀)/ω_d sin ω_d t),  ω_d = ω√(1−ζ²).
//! A line with no readings gives the pure prediction, so the mean follows the flow. A
//! second plant, a crane trolley under a constant drive force, checks the constant term of
//! affine rates against x(t) = x₀ + v₀t + F t²/(2m).

use super::support::{matrix, ok, rel};
use serde_json::{json, Value};

const OMEGA: f64 = 2.0;
const ZETA: f64 = 0.1;

fn closed_form(t: f64) -> f64 {
    let wd = OMEGA * (1.0 - ZETA * ZETA).sqrt();
    (-ZETA * OMEGA * t).exp() * ((wd * t).cos() + ZETA * OMEGA / wd * (wd * t).sin())
}

fn body(dynamics: Value, integration: Value) -> Value {
    let lines: Vec<Value> = (1..=40).map(|k| json!({"t": k as f64 * 0.25})).collect();
    json!({
        "model": {
            "states": ["x", "v"],
            "parameters": {"w": OMEGA, "z": ZETA},
            "dynamics": dynamics,
            "process_noise": {"density": {"v": 0.01}},
            "sensors": {"probe": {"measures": "x", "std": 0.1}}
        },
        "filter": {"method": "ekf", "integration": integration},
        "prior": {"t": 0.0, "mean": {"x": 1.0, "v": 0.0}, "std": {"x": 0.01, "v": 0.01}},
        "measurements": lines
    })
}

/// The oscillator as rates the integrator must handle. Written plainly it is affine, and
/// tacit discretises affine rates exactly instead of integrating them; the `+ 0*t` makes
/// the formula read time, so it stays on the Runge–Kutta path these checks are about.
fn rates() -> Value {
    json!({"rates": {"x": "v", "v": "-w^2*x - 2*z*w*v + 0*t"}})
}

/// The same oscillator written plainly: recognised as affine and discretised exactly.
fn affine_rates() -> Value {
    json!({"rates": {"x": "v", "v": "-w^2*x - 2*z*w*v"}})
}

#[test]
fn mean_prediction_matches_closed_form() {
    for (integration, tol) in [
        (json!({}), 1e-5),
        (json!({"rtol": 1e-10, "atol": 1e-13}), 1e-9),
        (json!({"fixed_step": 0.001}), 1e-9),
    ] {
        let out = ok(&body(rates(), integration.clone()));
        for e in out["estimates"].as_array().unwrap() {
            let t = e["t"].as_f64().unwrap();
            let x = e["mean"]["x"].as_f64().unwrap();
            assert!(
                (x - closed_form(t)).abs() < tol,
                "{integration}: t={t} x={x} want {}",
                closed_form(t)
            );
            // Integration error stays far below the reported spread (API contract).
            assert!((x - closed_form(t)).abs() < 0.01 * e["std"]["x"].as_f64().unwrap());
        }
    }
}

#[test]
fn covariance_from_rates_matches_exact_linear_discretisation() {
    let w2 = OMEGA * OMEGA;
    let linear =
        json!({"linear": {"time": "continuous", "A": [[0.0, 1.0], [-w2, -2.0 * ZETA * OMEGA]]}});
    let exact = ok(&body(linear, json!({})));
    let ode = ok(&body(rates(), json!({"rtol": 1e-10, "atol": 1e-14})));
    for (a, b) in exact["estimates"]
        .as_array()
        .unwrap()
        .iter()
        .zip(ode["estimates"].as_array().unwrap())
    {
        let (pa, pb) = (matrix(&a["covariance"]), matrix(&b["covariance"]));
        for i in 0..2 {
            for j in 0..2 {
                assert!(
                    rel(pa[i][j], pb[i][j], pa[i][i].max(pa[j][j])) < 1e-7,
                    "P[{i}][{j}] {} vs {}",
                    pa[i][j],
                    pb[i][j]
                );
            }
        }
    }
}

#[test]
fn affine_rates_are_discretised_exactly() {
    // Recognised as affine, the formulas give the matrix model's answer bit for bit (the
    // same A goes through the same discretisation) and the closed form to rounding.
    let w2 = OMEGA * OMEGA;
    let linear =
        json!({"linear": {"time": "continuous", "A": [[0.0, 1.0], [-w2, -2.0 * ZETA * OMEGA]]}});
    let exact = ok(&body(linear, json!({})));
    let affine = ok(&body(affine_rates(), json!({})));
    assert_eq!(exact["estimates"], affine["estimates"]);
    for e in affine["estimates"].as_array().unwrap() {
        let t = e["t"].as_f64().unwrap();
        let x = e["mean"]["x"].as_f64().unwrap();
        assert!((x - closed_form(t)).abs() < 1e-12, "t={t} x={x}");
    }
}

#[test]
fn constant_term_of_affine_rates_follows_the_trolley_under_constant_force() {
    // An overhead crane trolley of 850 kg pushed by its drive with a constant 1.2 kN and
    // negligible rolling losses (an invented plant): v' = F/m, so
    // x(t) = x0 + v0 t + F t²/(2m), v(t) = v0 + F t/m (Newton's second law integrated
    // twice; common practice). The constant term F/m is discretised with the state.
    let (force, mass) = (1200.0, 850.0);
    let lines: Vec<Value> = (1..=8).map(|k| json!({"t": k as f64 * 0.125})).collect();
    let out = ok(&json!({
        "model": {
            "states": ["x", "v"],
            "parameters": {"force": force, "mass": mass},
            "dynamics": {"rates": {"x": "v", "v": "force/mass"}},
            "process_noise": {"density": {"v": 0.01}},
            "sensors": {"encoder": {"measures": "x", "std": 0.1}}
        },
        "filter": {"method": "ekf"},
        "prior": {"t": 0.0, "mean": {"x": 3.0, "v": 0.4}, "std": {"x": 0.01, "v": 0.01}},
        "measurements": lines
    }));
    let a = force / mass;
    for e in out["estimates"].as_array().unwrap() {
        let t = e["t"].as_f64().unwrap();
        let (x, v) = (
            e["mean"]["x"].as_f64().unwrap(),
            e["mean"]["v"].as_f64().unwrap(),
        );
        assert!(
            (x - (3.0 + 0.4 * t + 0.5 * a * t * t)).abs() < 1e-12,
            "t={t} x={x}"
        );
        assert!((v - (0.4 + a * t)).abs() < 1e-12, "t={t} v={v}");
    }
}
