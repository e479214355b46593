//! R11: noise variances fitted by maximum likelihood. The Nile's annual flow at Aswan,
//! 1871–1970 (tests/data/nile.csv, from the statsmodels wheel), with a local level model
//! y = μ + ε, μ' = η: Durbin & Koopman (2012), *Time Series Analysis by State Space
//! Methods*, 2nd ed., ch. 2 (chapter from memory), give σ²ε = 15099, σ²η = 1469.1 and a
//! diffuse log-likelihood of −632.54.
//!
//! The convention behind −632.54: the diffuse first reading is left out entirely, its
//! ln 2π term included, so ln L = −½ Σ_{t=2}^{100} (ln 2π + ln Fₜ + vₜ²/Fₜ) over 99
//! readings (counting ln 2π for all 100 readings would give −633.46). That is what
//! `likelihood.skip: 1` computes after a prior spread of 1e7 (a diffuse start to about
//! 1e-10 relative).

use super::support::calibrate;
use serde_json::{json, Value};

/// The 100 flows, read from the committed file.
fn nile() -> Vec<(f64, f64)> {
    let text = include_str!("../data/nile.csv");
    text.lines()
        .filter(|l| !l.starts_with('#') && !l.starts_with("year"))
        .map(|l| {
            let (y, v) = l.split_once(',').unwrap();
            (y.parse().unwrap(), v.parse().unwrap())
        })
        .collect()
}

/// A local level calibration request on the Nile series.
pub(super) fn nile_request(method: &str) -> Value {
    let lines: Vec<Value> = nile()
        .iter()
        .map(|&(t, v)| json!({"t": t, "values": {"gauge": v}}))
        .collect();
    assert_eq!(lines.len(), 100);
    json!({
        "model": {"states": ["level"], "dynamics": {"rates": {"level": "0"}},
                  "process_noise": {"density": {"level": 1000.0}},
                  "sensors": {"gauge": {"measures": "level", "std": 100.0}}},
        "filter": {"method": method},
        "prior": {"t": 1871, "mean": {"level": 0.0}, "std": {"level": 1e7}},
        "measurements": lines,
        "free": {"/model/sensors/gauge/std": {}, "/model/process_noise/density/level": {}},
        "likelihood": {"skip": 1}
    })
}

#[test]
fn r11_nile_local_level_variances_and_loglik_match_durbin_koopman() {
    for method in ["ekf", "ukf"] {
        let a = calibrate(&nile_request(method)).unwrap_or_else(|p| panic!("{p}"));
        let free = &a["free"];
        let std = free["/model/sensors/gauge/std"]["value"].as_f64().unwrap();
        let q = free["/model/process_noise/density/level"]["value"]
            .as_f64()
            .unwrap();
        let ll = a["log_likelihood"]["best"].as_f64().unwrap();
        eprintln!(
            "{method}: var_eps {} var_eta {q} loglik {ll} runs {} {}",
            std * std,
            a["runs"],
            a["detail"]
        );
        // R11, Durbin & Koopman 2012 ch. 2 (from memory): within 0.5 % and 0.05.
        assert!(
            (std * std / 15099.0 - 1.0).abs() < 5e-3,
            "{method}: {}",
            std * std
        );
        assert!((q / 1469.1 - 1.0).abs() < 5e-3, "{method}: {q}");
        assert!((ll + 632.54).abs() < 0.05, "{method}: {ll}");
        assert_eq!(a["readings"], 99);
        assert_eq!(a["converged"], true, "{}", a["detail"]);
    }
}
