//! Linear Kalman filter throughput (the extended filter on linear models is the plain KF):
//! a conveyor carriage (n = 2, one position gauge) and a gantry head (n = 6, three position
//! encoders), each as a discrete model (plain matrix step x⁺ = F x) and as a continuous one
//! (Van Loan discretisation, cached per distinct gap). Readings are built once, outside the
//! timed loop; each iteration runs 10⁵ steps from a fresh run. Targets (issue 2): n = 2 at
//! ≥ 5·10⁶ steps/s, n = 6 at ≥ 10⁶ steps/s, one core.

// `criterion_group!` defines an undocumented public function.
#![allow(missing_docs)]

mod support;

use criterion::{criterion_group, criterion_main, Criterion};
use std::time::Duration;
use support::{cv1, cv1_readings, cv3, cv3_readings, timed};

const STEPS: usize = 100_000;

fn kf(c: &mut Criterion) {
    // dt = 0.1 s with times k·0.1 as a client sends them (seed 21 for the gauge noise).
    let dt = 0.1;
    let r1 = cv1_readings(STEPS, dt, 21);
    timed(
        c,
        "kf",
        "kf_n2_cv_steps1e5",
        &cv1("ekf", "discrete", dt),
        &r1,
    );
    let r3 = cv3_readings(STEPS, dt, 22);
    timed(
        c,
        "kf",
        "kf_n6_cv3d_steps1e5",
        &cv3("ekf", "discrete", dt),
        &r3,
    );
    timed(
        c,
        "kf",
        "kf_n2_cv_continuous_steps1e5",
        &cv1("ekf", "continuous", dt),
        &r1,
    );
    timed(
        c,
        "kf",
        "kf_n6_cv3d_continuous_steps1e5",
        &cv3("ekf", "continuous", dt),
        &r3,
    );
    // A gap exact in binary (0.125 s): every gap has the same bits, so the cached Van Loan
    // result is always reused; the decimal gaps above differ in their last bits.
    let dt = 0.125;
    let r1 = cv1_readings(STEPS, dt, 21);
    timed(
        c,
        "kf",
        "kf_n2_cv_continuous_exactdt_steps1e5",
        &cv1("ekf", "continuous", dt),
        &r1,
    );
    let r3 = cv3_readings(STEPS, dt, 22);
    timed(
        c,
        "kf",
        "kf_n6_cv3d_continuous_exactdt_steps1e5",
        &cv3("ekf", "continuous", dt),
        &r3,
    );
}

criterion_group! {
    name = benches;
    config = Criterion::default().sample_size(10).measurement_time(Duration::from_secs(4)).warm_up_time(Duration::from_secs(1));
    targets = kf
}
criterion_main!(benches);
