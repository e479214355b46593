//! R7: with many members the ensemble filters approach the Kalman filter within O(1/√N)
//! (Burgers, van Leeuwen & Evensen 1998, MWR 126, perturbed observations; Bishop, Etherton
//! & Majumdar 2001, MWR 129, and Hunt, Kostelich & Szunyogh 2007, Physica D 230, transform).
//! R8: Lorenz-96 with 40 variables and F = 8, every variable read every 0.05 with noise
//! std 1 (Lorenz 1996, ECMWF Seminar on Predictability). Tuned ensemble filters reach an
//! analysis RMSE near 0.2 in the literature (from memory, e.g. Sakov & Oke 2008, Tellus A 60).
//! Our bar is a time-averaged RMSE below 0.5: half the reading noise, which a filter that
//! merely echoed the readings (RMSE ≈ 1) or lost track (RMSE ≈ 3.6, the climatological
//! spread) cannot meet, while leaving room for an untuned global ETKF without localisation.

use super::support::{matrix, ok, simulate};
use serde_json::{json, Value};

fn cv_body(method: &str, members: usize, update: &str) -> Value {
    let readings: Vec<Value> = (1..=15).map(|k| json!({"t": k as f64 * 0.2, "values": {"gauge": 0.5 * k as f64 * 0.2 + 0.1 * (k as f64).sin()}})).collect();
    json!({
        "model": {
            "states": ["pos", "vel"],
            "dynamics": {"linear": {"time": "continuous", "A": [[0.0, 1.0], [0.0, 0.0]]}},
            "process_noise": {"density": {"vel": 0.2}},
            "sensors": {"gauge": {"measures": "pos", "std": 0.3}}
        },
        "filter": {"method": method, "ensemble": {"members": members, "seed": 11, "update": update}},
        "prior": {"t": 0.0, "mean": {"pos": 0.0, "vel": 0.0}, "std": {"pos": 1.0, "vel": 1.0}},
        "measurements": readings
    })
}

fn check_close(update: &str, members: usize) {
    let kf = ok(&cv_body("ekf", 2, "perturbed"));
    let en = ok(&cv_body("enkf", members, update));
    let (a, b) = (&kf["posterior"], &en["posterior"]);
    let pk = matrix(&a["covariance"]);
    let pe = matrix(&b["covariance"]);
    let root_n = (members as f64).sqrt();
    for (i, s) in ["pos", "vel"].iter().enumerate() {
        let sd = pk[i][i].sqrt();
        let d = (a["mean"][*s].as_f64().unwrap() - b["mean"][*s].as_f64().unwrap()).abs();
        assert!(
            d < 5.0 * sd / root_n,
            "{update} N={members} {s}: mean off by {d} (kf sd {sd})"
        );
        let r = (pe[i][i] / pk[i][i] - 1.0).abs();
        // Sampling error of a variance is about √(2/N) relative (common practice); 5× margin.
        assert!(
            r < 5.0 * (2.0f64).sqrt() / root_n,
            "{update} N={members} {s}: variance ratio off by {r}"
        );
    }
}

#[test]
fn perturbed_ensemble_approaches_kalman_filter() {
    check_close("perturbed", 4000);
}

#[test]
fn transform_ensemble_approaches_kalman_filter() {
    check_close("deterministic", 400);
}

fn lorenz96(n: usize) -> Value {
    let names: Vec<String> = (0..n).map(|i| format!("x{i}")).collect();
    let mut rates = serde_json::Map::new();
    for i in 0..n {
        let (p1, m1, m2) = ((i + 1) % n, (i + n - 1) % n, (i + n - 2) % n);
        rates.insert(
            names[i].clone(),
            json!(format!("(x{p1} - x{m2})*x{m1} - x{i} + forcing")),
        );
    }
    let measures: Vec<String> = names.clone();
    json!({
        "states": names,
        "parameters": {"forcing": 8.0},
        "dynamics": {"rates": rates},
        "sensors": {"all": {"measures": measures, "std": 1.0}}
    })
}

#[test]
fn lorenz96_analysis_rmse_is_well_below_reading_noise() {
    let n = 40;
    let model = lorenz96(n);
    let mean: serde_json::Map<String, Value> = (0..n)
        .map(|i| (format!("x{i}"), json!(if i == 19 { 8.5 } else { 8.0 })))
        .collect();
    let std: serde_json::Map<String, Value> =
        (0..n).map(|i| (format!("x{i}"), json!(1.0))).collect();
    let prior = json!({"t": 0.0, "mean": mean, "std": std});
    let cycles = 1200;
    let sim = simulate(
        &json!({"model": model, "prior": prior, "times": {"start": 0.05, "step": 0.05, "count": cycles}, "seed": 96}),
    );
    let filter = json!({"method": "enkf", "ensemble": {"members": 40, "seed": 3, "inflation": 1.05, "update": "deterministic"}, "integration": {"fixed_step": 0.01}});
    let out = ok(
        &json!({"model": model, "filter": filter, "prior": prior, "measurements": sim["measurements"], "output": {"covariance": "none", "innovations": false}}),
    );
    let est = out["estimates"].as_array().unwrap();
    let truth = sim["truth"].as_array().unwrap();
    let spin_up = 200;
    let mut total = 0.0;
    for k in spin_up..cycles {
        let se: f64 = (0..n)
            .map(|i| {
                (est[k]["mean"][format!("x{i}")].as_f64().unwrap()
                    - truth[k]["state"][format!("x{i}")].as_f64().unwrap())
                .powi(2)
            })
            .sum();
        total += (se / n as f64).sqrt();
    }
    let rmse = total / (cycles - spin_up) as f64;
    assert!(rmse < 0.5, "time-averaged analysis RMSE {rmse}");
}
