//! Bounds on parameters and states, and the ensemble's parameter spread (issue 10).
//!
//! The plant: an electrically heated holding tank for a bottling line's syrup, read by one
//! thermometer. Its heat loss to the hall goes as `k (T − T_amb)`; the loss coefficient `k`
//! is unknown and estimated from the temperatures alone while the heater switches on and
//! off. With a piecewise-constant heater power the tank's temperature has a closed form
//! (a first-order lag, common practice):
//!   T(t) = T_amb + P/k + (T(t₀) − T_amb − P/k) e^{−k (t − t₀)/C},
//! so the readings are that truth plus seeded Gaussian noise and no integrator stands
//! between the checks and their source.

use super::support::{estimate, ok};
use rand::SeedableRng;
use rand_chacha::ChaCha8Rng;
use rand_distr::{Distribution, Normal};
use serde_json::{json, Value};

/// Heat capacity of the tank and its syrup, kJ/K (invented).
const CAP: f64 = 50.0;
/// Hall temperature, °C (invented).
const AMBIENT: f64 = 20.0;
/// Thermometer noise, K (invented).
const NOISE: f64 = 2.0;

/// Heater power, kW: on for 100 s, off for 100 s, from t = 0.
fn power(t: f64, on: f64) -> f64 {
    if (t / 100.0).floor() as i64 % 2 == 0 {
        on
    } else {
        0.0
    }
}

/// Readings every second for `secs` s of a tank with loss coefficient `k` (kW/K), heater
/// power `on` when on, starting at the hall temperature; the heater setting rides on each
/// line where it changes.
fn readings(k: f64, on: f64, secs: usize, seed: u64) -> Vec<Value> {
    let mut rng = ChaCha8Rng::seed_from_u64(seed);
    let noise = Normal::new(0.0, NOISE).unwrap();
    let mut temp = AMBIENT;
    let mut out = Vec::with_capacity(secs);
    for s in 1..=secs {
        let t0 = (s - 1) as f64;
        let p = power(t0, on);
        // Exact over [t0, t0 + 1] with the power held (it switches on whole hundreds).
        let settle = AMBIENT + p / k;
        temp = settle + (temp - settle) * (-k / CAP).exp();
        let mut line = json!({"t": s as f64, "values": {"thermo": temp + noise.sample(&mut rng)}});
        if power(s as f64, on) != p {
            line["inputs"] = json!({"heater": power(s as f64, on)});
        }
        out.push(line);
    }
    out
}

fn model(k: Value) -> Value {
    json!({
        "states": ["temp"],
        "inputs": ["heater"],
        "parameters": {"k": k, "cap": CAP, "ambient": AMBIENT},
        "dynamics": {"rates": {"temp": "(heater - k*(temp - ambient))/cap"}},
        "process_noise": {"density": {"temp": 0.01}},
        "sensors": {"thermo": {"measures": "temp", "std": NOISE}}
    })
}

fn body(k: Value, filter: Value, lines: Vec<Value>, on: f64) -> Value {
    json!({
        "model": model(k),
        "filter": filter,
        "prior": {"t": 0.0, "mean": {"temp": AMBIENT}, "std": {"temp": 1.0},
                  "inputs": {"heater": on}},
        "measurements": lines
    })
}

/// The posterior `(mean, std)` of `k`.
fn k_of(out: &Value) -> (f64, f64) {
    let p = &out["posterior"];
    (
        p["mean"]["k"].as_f64().unwrap(),
        p["covariance"][1][1].as_f64().unwrap().sqrt(),
    )
}

/// `k` on every answer line.
fn k_per_line(out: &Value) -> Vec<f64> {
    out["estimates"]
        .as_array()
        .unwrap()
        .iter()
        .map(|e| e["mean"]["k"].as_f64().unwrap())
        .collect()
}

/// The warnings of `kind` in an answer.
fn warnings_of<'a>(out: &'a Value, kind: &str) -> Vec<&'a Value> {
    out["summary"]["warnings"]
        .as_array()
        .unwrap()
        .iter()
        .filter(|w| w["kind"] == kind)
        .collect()
}

/// The tank over ten hours of 1 Hz readings (36 000 lines), heater 10 kW, true loss
/// coefficient 2.0 kW/K, prior 1.0 ± 1.0, temperatures only.
///
/// Figures of this exact input (seed 5), `k` as mean ± std at the end:
///   ekf                                        1.997 ± 0.012
///   enkf  64 members, no relaxation (before)   2.051 ± 0.00007  (collapsed: truth ~700σ away)
///   enkf 256 members, no relaxation (before)   1.990 ± 0.0044
///   enkf  64 members, default 0.8 (after)      2.014 ± 0.010
///   enkf 256 members, default 0.8 (after)      1.994 ± 0.021
/// (0.5 left the 64 members at 2.023 ± 0.0014 and 0.7 at 2.020 ± 0.0049, the truth 16
/// and 4 of their std away; 0.9 gave 1.996 ± 0.024. Higher values slow learning from few
/// strong readings: the spread can shrink to no less than α of the forecast's per
/// analysis, hence 0.8.)
#[test]
fn ensemble_parameter_spread_stays_near_the_extended_filters() {
    let lines = readings(2.0, 10.0, 36_000, 5);
    let prior = json!({"initial": 1.0, "std": 1.0});
    let ekf = ok(&body(
        prior.clone(),
        json!({"method": "ekf"}),
        lines.clone(),
        10.0,
    ));
    let (ke, se) = k_of(&ekf);
    // The reference itself: within 3 std of the truth (common practice for the bound).
    assert!((ke - 2.0).abs() < 3.0 * se, "ekf: {ke} ± {se}");

    // Before: without relaxation the 64-member ensemble collapses onto a wrong value,
    // and says so.
    let before = ok(&body(
        prior.clone(),
        json!({"method": "enkf", "ensemble": {"members": 64, "parameter_relaxation": 0}}),
        lines.clone(),
        10.0,
    ));
    let (kb, sb) = k_of(&before);
    assert!(sb < 0.01 * se, "64 members unrelaxed: {kb} ± {sb}");
    assert!(
        (kb - 2.0).abs() > 10.0 * sb,
        "64 members unrelaxed: {kb} ± {sb}"
    );
    let w = warnings_of(&before, "collapsed_spread");
    assert_eq!(w.len(), 1, "{}", before["summary"]);
    assert_eq!(w[0]["state"], "k");
    assert!(w[0]["count"].as_u64().unwrap() > 1000, "{}", w[0]);

    // After: the default relaxation keeps the truth within 3 of the ensemble's own std,
    // and that std within a small factor of the extended filter's (RTPS keeps about
    // 1/√(1 − α) of it for weakly informative readings; module doc of enkf/relax.rs).
    for members in [64, 256] {
        let out = ok(&body(
            prior.clone(),
            json!({"method": "enkf", "ensemble": {"members": members}}),
            lines.clone(),
            10.0,
        ));
        let (k, s) = k_of(&out);
        assert!((k - 2.0).abs() < 3.0 * s, "{members} members: {k} ± {s}");
        assert!(
            (0.5 * se..5.0 * se).contains(&s),
            "{members} members: std {s}, ekf {se}"
        );
        assert!(
            warnings_of(&out, "collapsed_spread").is_empty(),
            "{}",
            out["summary"]
        );
    }
}

/// A well-insulated tank: loss coefficient 0.02 kW/K (time constant 2500 s), prior
/// 0.3 ± 0.3, 1000 s of readings. Unbounded, every filter's estimate goes negative on some
/// lines (a heat loss that heats); with `min: 0` none does, and the answer names the
/// method (density truncation for ekf/ukf, member clipping for enkf).
#[test]
fn a_loss_coefficient_bounded_at_zero_stays_non_negative_on_every_line() {
    let lines = readings(0.02, 10.0, 1000, 11);
    for (method, named) in [
        ("ekf", "density_truncation"),
        ("ukf", "density_truncation"),
        ("enkf", "member_clipping"),
    ] {
        let free = json!({"initial": 0.3, "std": 0.3});
        let out = ok(&body(free, json!({"method": method}), lines.clone(), 10.0));
        let neg = k_per_line(&out).iter().filter(|k| **k < 0.0).count();
        assert!(neg > 10, "{method}: unbounded, only {neg} negative lines");
        assert!(out["summary"].get("bounds").is_none(), "{}", out["summary"]);

        let bounded = json!({"initial": 0.3, "std": 0.3, "min": 0.0});
        let out = ok(&body(
            bounded,
            json!({"method": method}),
            lines.clone(),
            10.0,
        ));
        let ks = k_per_line(&out);
        assert_eq!(ks.len(), 1000);
        assert!(ks.iter().all(|k| *k >= 0.0), "{method}: {ks:?}");
        let (k, s) = k_of(&out);
        assert!((k - 0.02).abs() < 3.0 * s, "{method}: {k} ± {s}");
        let b = &out["summary"]["bounds"];
        assert_eq!(b["method"], named, "{method}");
        assert!(b["applied"].as_u64().unwrap() > 0, "{method}: {b}");
        // The posterior is a valid prior for the next request: symmetric, with a
        // non-negative variance for k.
        let c = &out["posterior"]["covariance"];
        assert_eq!(c[0][1], c[1][0]);
        assert!(c[1][1].as_f64().unwrap() >= 0.0);
    }
}

/// A tank whose temperature is declared to stay at or below 24 °C while the heater drives
/// it higher: the bound is not enforced, the estimate crosses it, and one
/// `out_of_bounds` warning counts the lines on which the estimate was above it.
#[test]
fn a_state_leaving_its_bounds_is_warned_with_the_lines_outside() {
    let lines = readings(2.0, 10.0, 600, 3);
    for method in ["ekf", "enkf"] {
        let mut b = body(json!(2.0), json!({"method": method}), lines.clone(), 10.0);
        b["model"]["bounds"] = json!({"temp": {"min": 0, "max": 24}});
        let out = ok(&b);
        let temps: Vec<f64> = out["estimates"]
            .as_array()
            .unwrap()
            .iter()
            .map(|e| e["mean"]["temp"].as_f64().unwrap())
            .collect();
        let outside = temps.iter().filter(|t| **t > 24.0).count() as u64;
        assert!(outside > 0 && (temps.iter().cloned().fold(0.0, f64::max)) < 27.0);
        let w = warnings_of(&out, "out_of_bounds");
        assert_eq!(w.len(), 1, "{method}: {}", out["summary"]);
        assert_eq!(w[0]["state"], "temp");
        assert_eq!(w[0]["count"].as_u64().unwrap(), outside, "{method}");
        let first = temps.iter().position(|t| *t > 24.0).unwrap();
        assert_eq!(w[0]["at_t"], json!((first + 1) as f64));
        let detail = w[0]["detail"].as_str().unwrap();
        assert!(
            detail.contains(&format!("reached {}", temps[first]))
                && detail.contains("above its max 24"),
            "{detail}"
        );
        // Watched only: no summary.bounds (no parameter is bounded).
        assert!(out["summary"].get("bounds").is_none());
    }
}

/// Bounds that cannot hold, and starting values outside them, are refused at their JSON
/// Pointers; a posterior sent back with a state outside its (watched) bounds continues.
#[test]
fn bound_faults_are_refused_at_their_pointers() {
    let lines = readings(2.0, 10.0, 5, 3);
    let faults = |b: &Value| -> Vec<(String, String)> {
        let p = estimate(b).expect_err("should be refused");
        assert_eq!(p.status, 422, "{p}");
        p.errors
            .iter()
            .map(|e| (e.pointer.clone(), e.detail.clone()))
            .collect()
    };
    let k = json!({"initial": 1.0, "std": 1.0, "min": 3.0, "max": 1.0});
    assert_eq!(
        faults(&body(k, json!({"method": "ekf"}), lines.clone(), 10.0)),
        [(
            "/model/parameters/k/min".to_string(),
            "min must be below max, got min 3 and max 1".to_string()
        )]
    );
    let k = json!({"initial": -0.5, "std": 1.0, "min": 0.0});
    assert_eq!(
        faults(&body(k, json!({"method": "ekf"}), lines.clone(), 10.0)),
        [(
            "/model/parameters/k/initial".to_string(),
            "initial -0.5 lies outside its bounds [0, inf]".to_string()
        )]
    );
    let mut b = body(json!(2.0), json!({"method": "ekf"}), lines.clone(), 10.0);
    b["model"]["bounds"] = json!({"pressure": {"max": 3}});
    assert_eq!(
        faults(&b),
        [(
            "/model/bounds/pressure".to_string(),
            "'pressure' is not a model state; states are temp".to_string()
        )]
    );
    // A prior (a posterior sent back) whose bounded parameter lies outside.
    let k = json!({"initial": 1.0, "std": 1.0, "min": 0.0});
    let mut b = body(k.clone(), json!({"method": "ekf"}), lines.clone(), 10.0);
    b["prior"] = json!({"t": 0.0, "mean": {"temp": 20.0, "k": -1.0},
                        "covariance": [[1.0, 0.0], [0.0, 1.0]], "inputs": {"heater": 10.0}});
    assert_eq!(
        faults(&b),
        [(
            "/prior/mean/k".to_string(),
            "mean -1 lies outside its bounds [0, inf]".to_string()
        )]
    );
    // A state outside its watched bounds in the prior is accepted, and warned about.
    let mut b = body(k, json!({"method": "ekf"}), lines, 10.0);
    b["model"]["bounds"] = json!({"temp": {"min": 25}});
    let out = ok(&b);
    let w = warnings_of(&out, "out_of_bounds");
    assert_eq!(w.len(), 1);
    assert_eq!(w[0]["count"], 5);
    assert!(w[0]["detail"]
        .as_str()
        .unwrap()
        .contains("below its min 25"));
}

/// The bounds keep the resume promise: four requests, each from the previous posterior,
/// answer bit for bit what one request answers (API contract), with the bound at work.
#[test]
fn bounded_runs_resume_bit_for_bit() {
    let lines = readings(0.02, 10.0, 400, 11);
    let k = json!({"initial": 0.3, "std": 0.3, "min": 0.0});
    for method in ["ekf", "ukf", "enkf"] {
        let filter = json!({"method": method, "ensemble": {"members": 32, "seed": 4}});
        let single = ok(&body(k.clone(), filter.clone(), lines.clone(), 10.0));
        assert!(single["summary"]["bounds"]["applied"].as_u64().unwrap() > 0);
        let mut b = body(k.clone(), filter.clone(), Vec::new(), 10.0);
        let mut estimates = Vec::new();
        for chunk in lines.chunks(100) {
            b["measurements"] = json!(chunk);
            let out = ok(&b);
            estimates.extend(out["estimates"].as_array().unwrap().iter().cloned());
            b["prior"] = out["posterior"].clone();
        }
        assert_eq!(
            single["estimates"].as_array().unwrap(),
            &estimates,
            "{method}"
        );
        assert_eq!(single["posterior"], b["prior"], "{method}");
    }
}
