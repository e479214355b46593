//! Extended Kalman filter throughput on a nonlinear discrete map: a survey cart in the
//! plane ([x, y, heading, speed], `next` map with cos/sin of the heading) read by one range
//! beacon sqrt(x² + y²). Exact Jacobians by forward-mode differentiation of the formulas.
//! Readings built once; 10⁵ steps per iteration from a fresh run. Target (issue 2):
//! ≥ 5·10⁵ steps/s on one core.

// `criterion_group!` defines an undocumented public function.
#![allow(missing_docs)]

mod support;

use criterion::{criterion_group, criterion_main, Criterion};
use std::time::Duration;
use support::{cart, cart_readings, timed};

const STEPS: usize = 100_000;

fn ekf(c: &mut Criterion) {
    let setup = cart("ekf");
    // dt = 0.1 s, beacon noise seed 31.
    let readings = cart_readings(STEPS, 0.1, 31);
    timed(c, "ekf", "ekf_n4_next_range_steps1e5", &setup, &readings);
}

criterion_group! {
    name = benches;
    config = Criterion::default().sample_size(10).measurement_time(Duration::from_secs(4)).warm_up_time(Duration::from_secs(1));
    targets = ekf
}
criterion_main!(benches);
