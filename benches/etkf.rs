//! Ensemble transform Kalman filter throughput on Lorenz-96 (Lorenz 1996): n = 40, F = 8,
//! 40 members, every variable read with std 1 every 0.05, inflation 1.05. The forecast is
//! classic RK4 with a fixed step: 0.05 (one RK4 step per cycle, the usual benchmark
//! setting) and 0.01 (five steps per cycle, as the accuracy test uses). One cycle is one
//! prediction plus one analysis. Readings built once from a seeded truth; 10³ cycles per
//! iteration from a fresh ensemble. Target (issue 2): ≥ 10⁴ cycles/s on one core.

// `criterion_group!` defines an undocumented public function.
#![allow(missing_docs)]

mod support;

use criterion::{criterion_group, criterion_main, Criterion};
use std::time::Duration;
use support::{lorenz96, lorenz96_readings, timed};

const CYCLES: usize = 1_000;

fn etkf(c: &mut Criterion) {
    // Reading noise seed 96.
    let readings = lorenz96_readings(CYCLES, 96);
    for (name, h) in [
        ("etkf_n40_m40_rk4h05_cycles1e3", 0.05),
        ("etkf_n40_m40_rk4h01_cycles1e3", 0.01),
    ] {
        timed(c, "etkf", name, &lorenz96(h), &readings);
    }
}

criterion_group! {
    name = benches;
    config = Criterion::default().sample_size(10).measurement_time(Duration::from_secs(5)).warm_up_time(Duration::from_secs(1));
    targets = etkf
}
criterion_main!(benches);
