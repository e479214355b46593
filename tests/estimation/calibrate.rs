//! `/v1/calibrate` on simulated plants of our own: interval coverage over seeded
//! repetitions (common practice: a 95 % interval should hold the truth in about 95 % of
//! repetitions; issue 11 asks for at least 90 % of 50), and the identifiability warning
//! when two noise terms cannot be told apart.

use super::support::calibrate;
use crate::support::cart_request;
use serde_json::{json, Value};

/// Whether `truth` lies in the reported interval of `ptr`.
fn covered(a: &Value, ptr: &str, truth: f64) -> bool {
    let f = &a["free"][ptr];
    let (lo, hi) = (
        f["lower_95"].as_f64().unwrap(),
        f["upper_95"].as_f64().unwrap(),
    );
    lo <= truth && truth <= hi
}

#[test]
fn cart_noise_intervals_cover_the_truth_in_at_least_90_percent_of_50_seeds() {
    let (q, r) = (0.5, 0.2);
    let (mut hit_q, mut hit_r) = (0, 0);
    for seed in 0..50 {
        let a = calibrate(&cart_request(1000 + seed, 300, q, r)).unwrap();
        assert_eq!(a["converged"], true, "seed {seed}: {}", a["detail"]);
        hit_q += covered(&a, "/model/process_noise/density/vel", q) as u32;
        hit_r += covered(&a, "/model/sensors/encoder/std", r) as u32;
    }
    eprintln!("cart coverage: q {hit_q}/50, r {hit_r}/50");
    // Common practice: nominal 95 %, at least 90 % asked (issue 11).
    assert!(hit_q >= 45, "q covered {hit_q}/50");
    assert!(hit_r >= 45, "r covered {hit_r}/50");
}

/// A kiln cooling towards the 20 °C room with heat loss rate `k`: T' = −k (T − 20) + w,
/// read every second with std 1; drawn exactly from the discretised model (common
/// practice), seeded.
fn kiln_request(seed: u64, n: usize, k: f64) -> Value {
    use rand::SeedableRng;
    use rand_distr::{Distribution, StandardNormal};
    let mut rng = rand_chacha::ChaCha20Rng::seed_from_u64(seed);
    let (q, r, dt) = (4.0, 1.0, 1.0_f64);
    let a = (-k * dt).exp();
    let w = (q * (1.0 - a * a) / (2.0 * k)).sqrt();
    let mut temp = 300.0;
    let mut lines = Vec::new();
    for i in 1..=n {
        let e: f64 = StandardNormal.sample(&mut rng);
        temp = 20.0 + a * (temp - 20.0) + w * e;
        let v: f64 = StandardNormal.sample(&mut rng);
        lines.push(json!({"t": i as f64 * dt, "values": {"thermocouple": temp + r * v}}));
    }
    json!({
        "model": {"states": ["temp"], "parameters": {"loss": 0.02},
                  "dynamics": {"rates": {"temp": "-loss*(temp - 20)"}},
                  "process_noise": {"density": {"temp": q}},
                  "sensors": {"thermocouple": {"measures": "temp", "std": r}}},
        "filter": {"method": "ekf"},
        "prior": {"t": 0, "mean": {"temp": 300.0}, "std": {"temp": 0.1}},
        "measurements": lines,
        "free": {"/model/parameters/loss": {"min": 0}}
    })
}

#[test]
fn kiln_heat_loss_intervals_cover_the_truth_in_at_least_90_percent_of_50_seeds() {
    let k = 0.05;
    let mut hit = 0;
    for seed in 0..50 {
        let a = calibrate(&kiln_request(2000 + seed, 150, k)).unwrap();
        assert_eq!(a["converged"], true, "seed {seed}: {}", a["detail"]);
        hit += covered(&a, "/model/parameters/loss", k) as u32;
    }
    eprintln!("kiln coverage: {hit}/50");
    // Common practice: nominal 95 %, at least 90 % asked (issue 11).
    assert!(hit >= 45, "loss covered {hit}/50");
}

#[test]
fn two_random_walks_read_only_as_their_sum_are_named_as_not_identifiable() {
    // y = a + b with a and b both random walks: only the sum of their densities shows in
    // the readings (common practice), so the curvature is singular along qa − qb.
    let mut req = cart_request(5, 300, 0.5, 0.2);
    req["model"] = json!({"states": ["a", "b"],
        "dynamics": {"rates": {"a": "0", "b": "0"}},
        "process_noise": {"density": {"a": 0.3, "b": 0.1}},
        "sensors": {"encoder": {"measures": "a + b", "std": 0.2}}});
    req["prior"] = json!({"t": 0, "mean": {"a": 0.0, "b": 0.0}, "std": {"a": 1.0, "b": 1.0}});
    req["free"] = json!({"/model/process_noise/density/a": {}, "/model/process_noise/density/b": {},
                         "/model/sensors/encoder/std": {}});
    let a = calibrate(&req).unwrap();
    let w = &a["warnings"][0];
    assert_eq!(w["kind"], "not_identifiable", "{a}");
    let names: Vec<&str> = w["quantities"]
        .as_array()
        .unwrap()
        .iter()
        .map(|v| v.as_str().unwrap())
        .collect();
    assert_eq!(
        names,
        [
            "/model/process_noise/density/a",
            "/model/process_noise/density/b"
        ]
    );
    for p in names {
        assert!(a["free"][p]["std_error"].is_null(), "{}", a["free"][p]);
    }
    // The sensor's std is still determined, with a finite error.
    let se = a["free"]["/model/sensors/encoder/std"]["std_error"]
        .as_f64()
        .unwrap();
    assert!(se.is_finite() && se > 0.0);
}

#[test]
fn the_ensemble_objective_is_deterministic_with_its_seed_fixed() {
    let mut req = cart_request(7, 100, 0.5, 0.2);
    req["filter"] = json!({"method": "enkf", "ensemble": {"members": 32, "seed": 3}});
    req["search"] = json!({"max_runs": 40});
    let a = calibrate(&req).unwrap();
    let b = calibrate(&req).unwrap();
    assert_eq!(a["free"], b["free"]);
    assert_eq!(a["log_likelihood"], b["log_likelihood"]);
}

#[test]
fn the_compute_deadline_stops_a_calibration_with_its_problem() {
    use std::sync::atomic::AtomicBool;
    use std::sync::Arc;
    use tacit::job::Stop;
    let body = serde_json::to_vec(&cart_request(9, 2000, 0.5, 0.2)).unwrap();
    let past = Stop::within(Some(std::time::Duration::from_nanos(1)));
    let p = tacit::job::calibrate(&body, &Default::default(), &past, &|_, _| {}).unwrap_err();
    assert!(p.type_uri.ends_with("deadline-exceeded"), "{p:?}");
    // A cancelled request stops the same way.
    let gone = Stop::new(Arc::new(AtomicBool::new(true)), None);
    let p = tacit::job::calibrate(&body, &Default::default(), &gone, &|_, _| {}).unwrap_err();
    assert!(p.detail.contains("cancelled"), "{p:?}");
}
