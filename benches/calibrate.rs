//! Wall time and run count of `/v1/calibrate` (issue 11): two noise settings of a
//! 2-state cart (random-walk velocity, position read every 0.1 s) on 100,000 readings,
//! target under 5 s on the two-core development machine; and the R11 Nile fit (100
//! readings). Least of three repeats. Run with `cargo bench --bench calibrate`.

// A bench binary, not a library: no public items to document.
#![allow(missing_docs)]

use rand::SeedableRng;
use rand_distr::{Distribution, StandardNormal};
use serde_json::{json, Value};
use std::time::Instant;
use tacit::config::Limits;
use tacit::job::Stop;

/// The cart request with `n` readings drawn exactly from the discretised model.
fn cart(n: usize) -> Value {
    let mut rng = rand_chacha::ChaCha20Rng::seed_from_u64(42);
    let mut z = || -> f64 { StandardNormal.sample(&mut rng) };
    let (q, r, dt) = (0.5, 0.2, 0.1_f64);
    let (q11, q12, q22) = (q * dt.powi(3) / 3.0, q * dt * dt / 2.0, q * dt);
    let l11 = q11.sqrt();
    let l21 = q12 / l11;
    let l22 = (q22 - l21 * l21).sqrt();
    let (mut pos, mut vel) = (0.0, 1.0);
    let lines: Vec<Value> = (1..=n)
        .map(|k| {
            let (a, b) = (z(), z());
            pos += vel * dt + l11 * a;
            vel += l21 * a + l22 * b;
            json!({"t": k as f64 * dt, "values": {"encoder": pos + r * z()}})
        })
        .collect();
    json!({
        "model": {"states": ["pos", "vel"],
                  "dynamics": {"rates": {"pos": "vel", "vel": "0"}},
                  "process_noise": {"density": {"vel": 1.0}},
                  "sensors": {"encoder": {"measures": "pos", "std": 0.1}}},
        "filter": {"method": "ekf"},
        "prior": {"t": 0, "mean": {"pos": 0.0, "vel": 1.0}, "std": {"pos": 1.0, "vel": 1.0}},
        "measurements": lines,
        "free": {"/model/process_noise/density/vel": {}, "/model/sensors/encoder/std": {}}
    })
}

fn nile() -> Value {
    let text = include_str!("../tests/data/nile.csv");
    let lines: Vec<Value> = text
        .lines()
        .filter(|l| !l.starts_with('#') && !l.starts_with("year"))
        .map(|l| {
            let (y, v) = l.split_once(',').unwrap();
            json!({"t": y.parse::<f64>().unwrap(), "values": {"gauge": v.parse::<f64>().unwrap()}})
        })
        .collect();
    json!({
        "model": {"states": ["level"], "dynamics": {"rates": {"level": "0"}},
                  "process_noise": {"density": {"level": 1000.0}},
                  "sensors": {"gauge": {"measures": "level", "std": 100.0}}},
        "filter": {"method": "ekf"},
        "prior": {"t": 1871, "mean": {"level": 0.0}, "std": {"level": 1e7}},
        "measurements": lines,
        "free": {"/model/sensors/gauge/std": {}, "/model/process_noise/density/level": {}},
        "likelihood": {"skip": 1}
    })
}

fn time(name: &str, req: &Value) {
    let body = serde_json::to_vec(req).unwrap();
    let stop = Stop::never();
    let mut best = f64::INFINITY;
    let mut answer = Value::Null;
    for _ in 0..3 {
        let t0 = Instant::now();
        let done = tacit::job::calibrate(&body, &Limits::default(), &stop, &|_, _| {})
            .unwrap_or_else(|p| panic!("{name}: {p}"));
        best = best.min(t0.elapsed().as_secs_f64());
        answer = serde_json::from_slice(&done.body).unwrap();
    }
    println!(
        "{name}: {best:.3} s wall (least of 3), {} runs, converged {}, loglik {}, free {}",
        answer["runs"], answer["converged"], answer["log_likelihood"]["best"], answer["free"]
    );
}

fn main() {
    time("calibrate_n2_cart_readings1e5", &cart(100_000));
    time("calibrate_r11_nile", &nile());
}
