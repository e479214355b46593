//! Speed of the identification kernels at the sizes issue 12 names, wall-clock and CPU
//! seconds of single runs (each run is seconds long, so criterion's repeated sampling
//! would take minutes):
//! - `subspace`: 10,000 samples, 2 inputs, 2 outputs, a 10th-order plant (target < 2 s);
//! - `reduced`: 2,000 snapshots of 10,000 states (target < 10 s, memory < 2 GB; measure
//!   the peak with `/usr/bin/time -v cargo bench --bench identify_kernels -- reduced`,
//!   or better on the built bench binary itself).
//!
//! `cargo bench --bench identify_kernels` runs both; a word after `--` picks one.

// A bench binary, not a library: no public items to document.
#![allow(missing_docs)]

use nalgebra::{DMatrix, DVector};
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha20Rng;
use std::time::Instant;
use tacit::identify::reduced::reduced;
use tacit::identify::subspace::subspace;
use tacit::model::Stop;

/// CPU seconds used by this process so far (user + system from `/proc/self/stat`).
fn cpu_seconds() -> Option<f64> {
    let stat = std::fs::read_to_string("/proc/self/stat").ok()?;
    let rest = stat.rsplit(')').next()?;
    let f: Vec<&str> = rest.split_whitespace().collect();
    let ticks: f64 = f.get(11)?.parse::<f64>().ok()? + f.get(12)?.parse::<f64>().ok()?;
    Some(ticks / 100.0)
}

fn timed<T>(what: &str, f: impl FnOnce() -> T) -> T {
    let (c0, w0) = (cpu_seconds(), Instant::now());
    let out = f();
    let wall = w0.elapsed().as_secs_f64();
    let cpu = cpu_seconds().zip(c0).map(|(a, b)| a - b);
    match cpu {
        Some(c) => println!("{what}: {wall:.3} s wall, {c:.2} s CPU"),
        None => println!("{what}: {wall:.3} s wall"),
    }
    out
}

/// A stable 10th-order plant with 2 inputs and 2 outputs: five damped rotations.
fn plant() -> (DMatrix<f64>, DMatrix<f64>, DMatrix<f64>) {
    let mut a = DMatrix::zeros(10, 10);
    for q in 0..5 {
        let (r, th) = (0.95 - 0.1 * q as f64, 0.2 + 0.5 * q as f64);
        a[(2 * q, 2 * q)] = r * th.cos();
        a[(2 * q, 2 * q + 1)] = -r * th.sin();
        a[(2 * q + 1, 2 * q)] = r * th.sin();
        a[(2 * q + 1, 2 * q + 1)] = r * th.cos();
    }
    let mut rng = ChaCha20Rng::seed_from_u64(1);
    let b = DMatrix::from_fn(10, 2, |_, _| rng.gen_range(-1.0..1.0));
    let c = DMatrix::from_fn(2, 10, |_, _| rng.gen_range(-1.0..1.0));
    (a, b, c)
}

fn bench_subspace() {
    let (a, b, c) = plant();
    let mut rng = ChaCha20Rng::seed_from_u64(2);
    let n = 10_000;
    let u = DMatrix::from_fn(n, 2, |_, _| rng.gen_range(-1.0..1.0));
    let mut y = DMatrix::zeros(n, 2);
    let mut x = DVector::zeros(10);
    for k in 0..n {
        let uk = u.row(k).transpose();
        let yk = &c * &x;
        for o in 0..2 {
            y[(k, o)] = yk[o] + 0.01 * (rng.gen::<f64>() - 0.5);
        }
        x = &a * &x + &b * &uk;
    }
    for order in [None, Some(10)] {
        let fit = timed(&format!("subspace_n1e4_m2_l2_order{order:?}"), || {
            subspace(&u, &y, order, &Stop::never()).unwrap()
        });
        println!("  order {} horizon {}", fit.order, fit.horizon);
    }
}

fn bench_reduced() {
    let (states, snaps) = (10_000, 2_000);
    let dt = 1e-4;
    // Heat-rod-like snapshots in closed form: 30 sine modes decaying at k²π² plus a
    // little seeded noise, so the matrix is numerically full rank like measured data.
    let mut rng = ChaCha20Rng::seed_from_u64(3);
    let x = DMatrix::from_fn(states, snaps, |i, k| {
        let xi = (i + 1) as f64 / (states + 1) as f64;
        let t = k as f64 * dt;
        let mut v = 0.0;
        for q in 1..=30 {
            let qf = q as f64;
            v += (qf * std::f64::consts::PI * xi).sin() * (-qf * qf * 9.87 * t).exp() / qf;
        }
        v + 1e-6 * (rng.gen::<f64>() - 0.5)
    });
    let fit = timed("reduced_states1e4_snapshots2e3", || {
        reduced(&x, None, dt, None, &Stop::never()).unwrap()
    });
    println!("  rank {} slowest rate {:?}", fit.rank, fit.rates[0]);
}

fn main() {
    let pick: Vec<String> = std::env::args()
        .skip(1)
        .filter(|a| !a.starts_with('-'))
        .collect();
    let wants = |name: &str| pick.is_empty() || pick.iter().any(|p| name.contains(p.as_str()));
    if wants("subspace") {
        bench_subspace();
    }
    if wants("reduced") {
        bench_reduced();
    }
}
