//! What every bench shares: building a run from the same JSON a request carries (so the
//! benches time exactly what the service runs), seeded noise for synthetic readings, and
//! the scenario models (conveyor carriage, gantry, survey cart, Lorenz-96) with their
//! readings built once, outside the timed loop, as parsed [`Reading`] values.

#![allow(dead_code)]

use criterion::{BatchSize, Criterion, Throughput};
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha20Rng;
use rand_distr::StandardNormal;
use serde_json::{json, Value};
use std::sync::Arc;
use tacit::config::Limits;
use tacit::filter::run::Run;
use tacit::model::Instant;
use tacit::model::Reading;
use tacit::model::{FilterConfig, Model, Prior};
use tacit::request::validate;

/// Pointer passed to `Run::step` (only used in error messages).
pub(crate) const PTR: &str = "/measurements/0";

/// A checked model, filter and prior: everything `Run::new` needs.
#[derive(Clone)]
pub(crate) struct Setup {
    /// The model.
    pub model: Arc<Model>,
    /// Filter settings.
    pub cfg: FilterConfig,
    /// Starting belief.
    pub prior: Prior,
}

impl Setup {
    /// Validate the three request sections exactly as the service does.
    pub(crate) fn new(model: Value, filter: Value, prior: Value) -> Self {
        let limits = Limits::default();
        let model = validate::model(&model, "/model", &limits).expect("bench model is valid");
        let cfg = validate::filter(&filter, "/filter", &limits).expect("bench filter is valid");
        let prior =
            validate::prior(&prior, "/prior", &model, Some(&cfg)).expect("bench prior is valid");
        Self {
            model: Arc::new(model),
            cfg,
            prior,
        }
    }

    /// A fresh run from the prior.
    pub(crate) fn run(&self) -> Run {
        Run::new(self.model.clone(), self.cfg, self.prior.clone(), false).expect("run starts")
    }
}

/// Apply every reading in order; panics on a filter failure (a bench must not time errors).
pub(crate) fn run_all(run: &mut Run, readings: &[Reading]) {
    for r in readings {
        run.step(r, PTR).expect("step succeeds");
    }
}

/// A seeded standard normal stream (the seed is part of each bench's setup).
pub(crate) fn normals(seed: u64) -> impl FnMut() -> f64 {
    let mut rng = ChaCha20Rng::seed_from_u64(seed);
    move || rng.sample(StandardNormal)
}

/// One reading line at `t` with every sensor `0..z.len()` present (scalar sensors).
pub(crate) fn scalar_line(t: f64, z: Vec<f64>) -> Reading {
    Reading {
        t: Instant::seconds(t),
        sensors: (0..z.len()).map(|i| (i, i)).collect(),
        z,
        ..Default::default()
    }
}

/// Reading times `k · dt` for `k = 1..=steps`, computed as a client would send them.
pub(crate) fn time(k: usize, dt: f64) -> f64 {
    k as f64 * dt
}

/// Conveyor carriage on one axis: constant velocity, position read by a laser gauge.
/// `time` is `"discrete"` (F given, fixed `dt`) or `"continuous"` (A given, Van Loan).
pub(crate) fn cv1(method: &str, time: &str, dt: f64) -> Setup {
    let dynamics = if time == "discrete" {
        json!({"linear": {"time": "discrete", "dt": dt, "F": [[1.0, dt], [0.0, 1.0]]}})
    } else {
        json!({"linear": {"time": "continuous", "A": [[0.0, 1.0], [0.0, 0.0]]}})
    };
    let noise = if time == "discrete" {
        // Per-step covariance of white-noise acceleration with density 0.1 (common practice:
        // q [dt³/3, dt²/2; dt²/2, dt]).
        let q = 0.1;
        json!({"covariance": [[q * dt.powi(3) / 3.0, q * dt * dt / 2.0], [q * dt * dt / 2.0, q * dt]]})
    } else {
        json!({"density": {"vel": 0.1}})
    };
    Setup::new(
        json!({"states": ["pos", "vel"], "dynamics": dynamics, "process_noise": noise,
               "sensors": {"gauge": {"measures": "pos", "std": 0.05}}}),
        json!({"method": method}),
        json!({"t": 0.0, "mean": {"pos": 0.0, "vel": 0.0}, "std": {"pos": 1.0, "vel": 1.0}}),
    )
}

/// Readings of the carriage moving at 0.7 m/s, seeded.
pub(crate) fn cv1_readings(steps: usize, dt: f64, seed: u64) -> Vec<Reading> {
    let mut e = normals(seed);
    (1..=steps)
        .map(|k| {
            let t = time(k, dt);
            scalar_line(t, vec![0.7 * t + 0.05 * e()])
        })
        .collect()
}

/// Gantry head in 3-D: constant velocity per axis, each position read by its own encoder.
pub(crate) fn cv3(method: &str, time: &str, dt: f64) -> Setup {
    let states = ["px", "py", "pz", "vx", "vy", "vz"];
    let mut f = vec![vec![0.0; 6]; 6];
    for i in 0..6 {
        f[i][i] = if time == "discrete" { 1.0 } else { 0.0 };
    }
    for i in 0..3 {
        f[i][i + 3] = if time == "discrete" { dt } else { 1.0 };
    }
    let dynamics = if time == "discrete" {
        json!({"linear": {"time": "discrete", "dt": dt, "F": f}})
    } else {
        json!({"linear": {"time": "continuous", "A": f}})
    };
    let noise = if time == "discrete" {
        let q = 0.1;
        let mut c = vec![vec![0.0; 6]; 6];
        for i in 0..3 {
            c[i][i] = q * dt.powi(3) / 3.0;
            c[i][i + 3] = q * dt * dt / 2.0;
            c[i + 3][i] = q * dt * dt / 2.0;
            c[i + 3][i + 3] = q * dt;
        }
        json!({"covariance": c})
    } else {
        json!({"density": {"vx": 0.1, "vy": 0.1, "vz": 0.1}})
    };
    let std: serde_json::Map<String, Value> =
        states.iter().map(|s| (s.to_string(), json!(1.0))).collect();
    let mean: serde_json::Map<String, Value> =
        states.iter().map(|s| (s.to_string(), json!(0.0))).collect();
    Setup::new(
        json!({"states": states, "dynamics": dynamics, "process_noise": noise,
               "sensors": {"ex": {"measures": "px", "std": 0.05},
                           "ey": {"measures": "py", "std": 0.05},
                           "ez": {"measures": "pz", "std": 0.05}}}),
        json!({"method": method}),
        json!({"t": 0.0, "mean": mean, "std": std}),
    )
}

/// Readings of the gantry head moving at (0.7, −0.3, 0.1) m/s, seeded.
pub(crate) fn cv3_readings(steps: usize, dt: f64, seed: u64) -> Vec<Reading> {
    let mut e = normals(seed);
    (1..=steps)
        .map(|k| {
            let t = time(k, dt);
            scalar_line(
                t,
                vec![
                    0.7 * t + 0.05 * e(),
                    -0.3 * t + 0.05 * e(),
                    0.1 * t + 0.05 * e(),
                ],
            )
        })
        .collect()
}

/// Survey cart in the plane: state [x, y, heading, speed], discrete `next` map
/// x⁺ = x + dt·speed·cos(heading), y⁺ = y + dt·speed·sin(heading), heading and speed held
/// (random walk), read by a range beacon at the origin, sqrt(x² + y²).
pub(crate) fn cart(method: &str) -> Setup {
    Setup::new(
        json!({
            "states": ["x", "y", "heading", "speed"],
            "dynamics": {"next": {
                "x": "x + dt*speed*cos(heading)",
                "y": "y + dt*speed*sin(heading)",
                "heading": "heading",
                "speed": "speed"
            }},
            "process_noise": {"covariance": [
                [1e-4, 0, 0, 0], [0, 1e-4, 0, 0], [0, 0, 1e-4, 0], [0, 0, 0, 1e-4]]},
            "sensors": {"beacon": {"measures": "sqrt(x^2 + y^2)", "std": 0.1}}
        }),
        json!({"method": method}),
        json!({"t": 0.0, "mean": {"x": 10.0, "y": 0.0, "heading": 1.5, "speed": 1.0},
               "std": {"x": 0.5, "y": 0.5, "heading": 0.1, "speed": 0.2}}),
    )
}

/// Range readings of the cart circling the beacon (truth: speed 1, turning 0.1 rad/s), seeded.
pub(crate) fn cart_readings(steps: usize, dt: f64, seed: u64) -> Vec<Reading> {
    let mut e = normals(seed);
    let (mut x, mut y, mut h) = (10.0f64, 0.0f64, 1.5f64);
    (1..=steps)
        .map(|k| {
            x += dt * h.cos();
            y += dt * h.sin();
            h += 0.1 * dt;
            scalar_line(time(k, dt), vec![x.hypot(y) + 0.1 * e()])
        })
        .collect()
}

/// Lorenz-96 (Lorenz 1996) with 40 variables and F = 8, every variable read with std 1;
/// ETKF with 40 members and inflation 1.05, RK4 with fixed step `h`.
pub(crate) fn lorenz96(h: f64) -> Setup {
    let n = 40;
    let names: Vec<String> = (0..n).map(|i| format!("x{i}")).collect();
    let mut rates = serde_json::Map::new();
    for i in 0..n {
        let (p1, m1, m2) = ((i + 1) % n, (i + n - 1) % n, (i + n - 2) % n);
        rates.insert(
            names[i].clone(),
            json!(format!("(x{p1} - x{m2})*x{m1} - x{i} + forcing")),
        );
    }
    let mean: serde_json::Map<String, Value> = (0..n)
        .map(|i| (format!("x{i}"), json!(if i == 19 { 8.5 } else { 8.0 })))
        .collect();
    let std: serde_json::Map<String, Value> =
        (0..n).map(|i| (format!("x{i}"), json!(1.0))).collect();
    Setup::new(
        json!({"states": names, "parameters": {"forcing": 8.0}, "dynamics": {"rates": rates},
               "sensors": {"all": {"measures": names, "std": 1.0}}}),
        json!({"method": "enkf", "ensemble": {"members": 40, "seed": 3, "inflation": 1.05,
               "update": "deterministic"}, "integration": {"fixed_step": h}}),
        json!({"t": 0.0, "mean": mean, "std": std}),
    )
}

fn l96_rate(x: &[f64], dx: &mut [f64]) {
    let n = x.len();
    for i in 0..n {
        dx[i] = (x[(i + 1) % n] - x[(i + n - 2) % n]) * x[(i + n - 1) % n] - x[i] + 8.0;
    }
}

/// Readings of a Lorenz-96 truth (RK4, step 0.01, from the prior mean) every 0.05, seeded.
pub(crate) fn lorenz96_readings(cycles: usize, seed: u64) -> Vec<Reading> {
    let n = 40;
    let mut e = normals(seed);
    let mut x: Vec<f64> = (0..n).map(|i| if i == 19 { 8.5 } else { 8.0 }).collect();
    let (mut k1, mut k2, mut k3, mut k4, mut y) = (
        vec![0.0; n],
        vec![0.0; n],
        vec![0.0; n],
        vec![0.0; n],
        vec![0.0; n],
    );
    let h = 0.01;
    (1..=cycles)
        .map(|k| {
            for _ in 0..5 {
                l96_rate(&x, &mut k1);
                (0..n).for_each(|i| y[i] = x[i] + 0.5 * h * k1[i]);
                l96_rate(&y, &mut k2);
                (0..n).for_each(|i| y[i] = x[i] + 0.5 * h * k2[i]);
                l96_rate(&y, &mut k3);
                (0..n).for_each(|i| y[i] = x[i] + h * k3[i]);
                l96_rate(&y, &mut k4);
                (0..n).for_each(|i| x[i] += h / 6.0 * (k1[i] + 2.0 * k2[i] + 2.0 * k3[i] + k4[i]));
            }
            Reading {
                t: Instant::seconds(time(k, 0.05)),
                sensors: vec![(0, 0)],
                z: x.iter().map(|v| v + e()).collect(),
                ..Default::default()
            }
        })
        .collect()
}

/// Time whole runs over `readings` (a fresh run per iteration, built outside the timing),
/// reporting readings per second under `group/name`.
pub(crate) fn timed(
    c: &mut Criterion,
    group: &str,
    name: &str,
    setup: &Setup,
    readings: &[Reading],
) {
    let mut g = c.benchmark_group(group);
    g.throughput(Throughput::Elements(readings.len() as u64));
    g.bench_function(name, |b| {
        b.iter_batched(
            || setup.run(),
            |mut run| {
                run_all(&mut run, readings);
                run
            },
            BatchSize::PerIteration,
        )
    });
    g.finish();
}
