//! The per-step loop allocates nothing (issue 2, "Speed"; RULES: hot loops use preallocated
//! workspaces). Each case builds a run from request JSON, warms it up for a few lines, then
//! counts the heap allocations of the current thread over many further `Run::step` calls
//! with readings built beforehand. Cases cover every filter (EKF, UKF, perturbed EnKF,
//! ETKF in both its low-rank and full forms) on linear (discrete and continuous, with
//! irregular gaps so the Van Loan cache is refreshed), `rates` (adaptive and fixed-step
//! integration, an estimated parameter) and `next` models, with partial lines, per-reading
//! noise overrides, inputs, gating and the smoother's cross covariance.
//!
//! Counting uses the `allocation-counter` crate's global allocator, which counts per
//! thread, so tests running in parallel in this binary do not disturb the count.

use serde_json::{json, Value};
use std::sync::Arc;
use tacit::config::Limits;
use tacit::filter::run::Run;
use tacit::model::Instant;
use tacit::model::Reading;
use tacit::request::validate;

/// Lines run before counting (first-use effects, caches).
const WARM_UP: usize = 8;

fn line(t: f64, sensors: &[(usize, usize)], z: &[f64]) -> Reading {
    Reading {
        t: Instant::seconds(t),
        sensors: sensors.to_vec(),
        z: z.to_vec(),
        ..Default::default()
    }
}

/// Heap allocations made by the steps after the warm-up, for a run with `keep_cross`.
fn allocations(
    model: &Value,
    filter: &Value,
    prior: &Value,
    readings: &[Reading],
    keep_cross: bool,
) -> u64 {
    let limits = Limits::default();
    let model = Arc::new(validate::model(model, "/model", &limits).unwrap());
    let cfg = validate::filter(filter, "/filter", &limits).unwrap();
    let prior = validate::prior(prior, "/prior", &model, Some(&cfg)).unwrap();
    let mut run = Run::new(model, cfg, prior, keep_cross).unwrap();
    for r in &readings[..WARM_UP] {
        run.step(r, "/measurements/0").unwrap();
    }
    let info = allocation_counter::measure(|| {
        for r in &readings[WARM_UP..] {
            run.step(r, "/measurements/0").unwrap();
        }
    });
    assert_eq!(run.counts.steps as usize, readings.len());
    info.count_total
}

/// Run every case of `method_filters` on `model` and report the ones that allocate.
fn check(label: &str, model: Value, prior: Value, readings: &[Reading], filters: &[Value]) {
    let mut bad = Vec::new();
    for f in filters {
        for keep_cross in [false, true] {
            let n = allocations(&model, f, &prior, readings, keep_cross);
            if n > 0 {
                bad.push(format!("{f} keep_cross={keep_cross}: {n} allocations"));
            }
        }
    }
    assert!(
        bad.is_empty(),
        "{label}: steps allocate after warm-up ({} steps counted):\n{}",
        readings.len() - WARM_UP,
        bad.join("\n")
    );
}

fn filters() -> Vec<Value> {
    vec![
        json!({"method": "ekf"}),
        json!({"method": "ekf", "gate": {"probability": 0.999}}),
        json!({"method": "ukf"}),
        json!({"method": "ukf", "gate": {"probability": 0.999}}),
        json!({"method": "enkf", "ensemble": {"members": 12, "seed": 5, "update": "perturbed", "inflation": 1.02}}),
        // Low-rank transform (fewer readings than members) ...
        json!({"method": "enkf", "ensemble": {"members": 12, "seed": 5, "update": "deterministic"}}),
        // ... and the full ensemble-space transform (at least as many readings as members).
        json!({"method": "enkf", "ensemble": {"members": 3, "seed": 5, "update": "deterministic"}}),
    ]
}

/// Gantry head in 3-D (n = 6, three encoders): larger than nalgebra's small-matrix path.
fn gantry(time: &str) -> Value {
    let dt = 0.1;
    let mut f = vec![vec![0.0; 6]; 6];
    for i in 0..6 {
        f[i][i] = if time == "discrete" { 1.0 } else { 0.0 };
    }
    for i in 0..3 {
        f[i][i + 3] = if time == "discrete" { dt } else { 1.0 };
    }
    let b = [[0.0], [0.0], [0.0], [0.0], [0.0], [1.0]];
    let (dynamics, noise) = if time == "discrete" {
        (
            json!({"linear": {"time": "discrete", "dt": dt, "F": f, "B": b}}),
            json!({"covariance": (0..6).map(|i| (0..6).map(|j| if i == j { 1e-3 } else { 0.0 }).collect::<Vec<f64>>()).collect::<Vec<_>>()}),
        )
    } else {
        (
            json!({"linear": {"time": "continuous", "A": f, "B": b}}),
            json!({"density": {"vx": 0.1, "vy": 0.1, "vz": 0.1}}),
        )
    };
    json!({"states": ["px", "py", "pz", "vx", "vy", "vz"], "inputs": ["lift"],
           "dynamics": dynamics, "process_noise": noise,
           "sensors": {"ex": {"measures": "px", "std": 0.05},
                       "ey": {"measures": "py", "std": 0.05},
                       "ez": {"measures": "pz", "std": 0.05}}})
}

fn gantry_prior() -> Value {
    json!({"t": 0.0,
           "mean": {"px": 0.0, "py": 0.0, "pz": 0.0, "vx": 0.0, "vy": 0.0, "vz": 0.0},
           "std": {"px": 1.0, "py": 1.0, "pz": 1.0, "vx": 1.0, "vy": 1.0, "vz": 1.0}})
}

/// Partial gantry lines on times `t(k)`: all three, one, none; an input now and then; a
/// per-reading noise override now and then.
fn gantry_readings(t: impl Fn(usize) -> f64) -> Vec<Reading> {
    (1..=60)
        .map(|k| {
            let tk = t(k);
            let mut r = match k % 3 {
                0 => line(tk, &[(0, 0), (1, 1), (2, 2)], &[0.7 * tk, -0.2 * tk, 0.1]),
                1 => line(tk, &[(1, 0)], &[-0.2 * tk]),
                _ => line(tk, &[], &[]),
            };
            if k % 7 == 0 {
                r.inputs = vec![(0, if k % 14 == 0 { 0.3 } else { -0.1 })];
            }
            if k % 5 == 0 && k % 3 == 0 {
                r.std_overrides = vec![(1, 0)];
                r.std = vec![0.2];
            }
            r
        })
        .collect()
}

#[test]
fn linear_discrete_steps_allocate_nothing() {
    // On the grid, with gaps of one and two grid steps.
    let readings = gantry_readings(|k| 0.1 * (k + k / 4) as f64);
    check(
        "linear discrete",
        gantry("discrete"),
        gantry_prior(),
        &readings,
        &filters(),
    );
}

#[test]
fn linear_continuous_steps_allocate_nothing() {
    // Irregular gaps, so the cached discretisation is recomputed on most steps.
    let readings = gantry_readings(|k| 0.1 * k as f64 + 0.013 * ((k * k) % 7) as f64);
    check(
        "linear continuous",
        gantry("continuous"),
        gantry_prior(),
        &readings,
        &filters(),
    );
}

fn trolley_readings() -> Vec<Reading> {
    (1..=60)
        .map(|k| {
            let t = 0.05 * k as f64 + 0.01 * (k % 3) as f64;
            let pos = (0.5 * t).sin();
            let mut r = match k % 4 {
                0 => line(t, &[(0, 0), (1, 1)], &[pos, (pos * pos + 4.0).sqrt()]),
                1 | 2 => line(t, &[(0, 0)], &[pos]),
                _ => line(t, &[(1, 0)], &[(pos * pos + 4.0).sqrt()]),
            };
            if k % 10 == 0 {
                r.inputs = vec![(0, if k % 20 == 0 { 1.0 } else { -0.5 })];
            }
            r
        })
        .collect()
}

#[test]
fn rates_steps_allocate_nothing() {
    // Crane trolley with drag estimated as a parameter; adaptive and fixed-step integration.
    let model = json!({
        "states": ["pos", "vel"], "inputs": ["force"],
        "parameters": {"mass": 12.0, "drag": {"initial": 0.4, "std": 0.1, "random_walk": 1e-4}},
        "dynamics": {"rates": {"pos": "vel", "vel": "(force - drag*vel*abs(vel))/mass"}},
        "process_noise": {"density": {"vel": 0.05}},
        "sensors": {"encoder": {"measures": "pos", "std": 0.01},
                    "range": {"measures": "sqrt(pos^2 + 4)", "std": 0.05}}
    });
    let prior =
        json!({"t": 0.0, "mean": {"pos": 0.0, "vel": 0.5}, "std": {"pos": 0.1, "vel": 0.2}});
    let mut fs = filters();
    fs.extend(filters().into_iter().map(|mut f| {
        f["integration"] = json!({"fixed_step": 0.01});
        f
    }));
    check("rates", model, prior, &trolley_readings(), &fs);
}

#[test]
fn next_steps_allocate_nothing() {
    // Survey cart in the plane read by a range beacon and, now and then, a compass.
    let model = json!({
        "states": ["x", "y", "heading", "speed"],
        "dynamics": {"next": {"x": "x + dt*speed*cos(heading)", "y": "y + dt*speed*sin(heading)"}},
        "process_noise": {"covariance": [[1e-4, 0, 0, 0], [0, 1e-4, 0, 0], [0, 0, 1e-4, 0], [0, 0, 0, 1e-4]]},
        "sensors": {"beacon": {"measures": "sqrt(x^2 + y^2)", "std": 0.1},
                    "compass": {"measures": "heading", "std": 0.05}}
    });
    let prior = json!({"t": 0.0, "mean": {"x": 10.0, "y": 0.0, "heading": 1.5, "speed": 1.0},
                       "std": {"x": 0.5, "y": 0.5, "heading": 0.1, "speed": 0.2}});
    let readings: Vec<Reading> = (1..=60)
        .map(|k| {
            let t = 0.1 * k as f64;
            let (x, y) = (10.0 * (0.1 * t).cos(), 10.0 * (0.1 * t).sin());
            let range = x.hypot(y);
            if k % 5 == 0 {
                line(t, &[(0, 0), (1, 1)], &[range, 1.5 + 0.1 * t])
            } else {
                line(t, &[(0, 0)], &[range])
            }
        })
        .collect();
    check("next", model, prior, &readings, &filters());
}
