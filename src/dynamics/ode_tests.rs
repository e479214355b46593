//! Tests of the Dormand–Prince integrator (`ode.rs`): the tableau's order conditions,
//! closed-form solutions, step control and failure reports. Kept apart so that the
//! integrator's own file stays short enough to read.

use super::*;

/// The Butcher tableau as arrays, for the order-condition checks.
fn tableau() -> ([[f64; 7]; 7], [f64; 7], [f64; 7], [f64; 7]) {
    let a = [
        [0.0; 7],
        [A21, 0.0, 0.0, 0.0, 0.0, 0.0, 0.0],
        [A31, A32, 0.0, 0.0, 0.0, 0.0, 0.0],
        [A41, A42, A43, 0.0, 0.0, 0.0, 0.0],
        [A51, A52, A53, A54, 0.0, 0.0, 0.0],
        [A61, A62, A63, A64, A65, 0.0, 0.0],
        [A71, 0.0, A73, A74, A75, A76, 0.0],
    ];
    let c = [0.0, C2, C3, C4, C5, 1.0, 1.0];
    let b = a[6];
    let e = [E1, 0.0, E3, E4, E5, E6, E7];
    let b_hat: [f64; 7] = std::array::from_fn(|i| b[i] - e[i]);
    (a, c, b, b_hat)
}

fn dot(x: &[f64; 7], y: &[f64; 7]) -> f64 {
    x.iter().zip(y).map(|(a, b)| a * b).sum()
}

fn apply(a: &[[f64; 7]; 7], v: &[f64; 7]) -> [f64; 7] {
    std::array::from_fn(|i| dot(&a[i], v))
}

fn times(x: &[f64; 7], y: &[f64; 7]) -> [f64; 7] {
    std::array::from_fn(|i| x[i] * y[i])
}

#[test]
fn tableau_satisfies_its_order_conditions() {
    // Row sums c_i = Σ_j a_ij, and the Butcher order conditions (one per rooted tree,
    // Hairer, Nørsett & Wanner, Solving ODEs I, §II.2, Table 2.2): all 17 up to
    // order 5 for the propagated weights b, the 8 up to order 4 for the embedded b̂.
    let (a, c, b, b_hat) = tableau();
    let one = [1.0; 7];
    let rows = apply(&a, &one);
    for i in 0..7 {
        assert!((rows[i] - c[i]).abs() < 1e-14, "row {i}");
    }
    let c2 = times(&c, &c);
    let c3 = times(&c2, &c);
    let ac = apply(&a, &c);
    let ac2 = apply(&a, &c2);
    let aac = apply(&a, &ac);
    let up_to_4 = |w: &[f64; 7]| {
        [
            (dot(w, &one), 1.0),
            (dot(w, &c), 1.0 / 2.0),
            (dot(w, &c2), 1.0 / 3.0),
            (dot(w, &ac), 1.0 / 6.0),
            (dot(w, &c3), 1.0 / 4.0),
            (dot(w, &times(&c, &ac)), 1.0 / 8.0),
            (dot(w, &ac2), 1.0 / 12.0),
            (dot(w, &aac), 1.0 / 24.0),
        ]
    };
    let order5 = [
        (dot(&b, &times(&c3, &c)), 1.0 / 5.0),
        (dot(&b, &times(&c2, &ac)), 1.0 / 10.0),
        (dot(&b, &times(&c, &ac2)), 1.0 / 15.0),
        (dot(&b, &times(&c, &aac)), 1.0 / 30.0),
        (dot(&b, &times(&ac, &ac)), 1.0 / 20.0),
        (dot(&b, &apply(&a, &c3)), 1.0 / 20.0),
        (dot(&b, &apply(&a, &times(&c, &ac))), 1.0 / 40.0),
        (dot(&b, &apply(&a, &ac2)), 1.0 / 60.0),
        (dot(&b, &apply(&a, &aac)), 1.0 / 120.0),
    ];
    for (k, (got, want)) in up_to_4(&b).into_iter().chain(order5).enumerate() {
        assert!(
            (got - want).abs() < 1e-14,
            "b condition {k}: {got} vs {want}"
        );
    }
    for (k, (got, want)) in up_to_4(&b_hat).into_iter().enumerate() {
        assert!(
            (got - want).abs() < 1e-14,
            "b̂ condition {k}: {got} vs {want}"
        );
    }
    // The conditions fix the error weights only up to a factor; the published
    // fourth-order weights (Dormand & Prince 1980, from memory) pin it.
    let published = [
        5179.0 / 57600.0,
        0.0,
        7571.0 / 16695.0,
        393.0 / 640.0,
        -92097.0 / 339200.0,
        187.0 / 2100.0,
        1.0 / 40.0,
    ];
    for i in 0..7 {
        assert!((b_hat[i] - published[i]).abs() < 1e-15, "b̂[{i}]");
    }
    // The embedded solution must really be a different (lower-order) formula.
    assert!((dot(&b_hat, &times(&c3, &c)) - 0.2).abs() > 1e-6);
}

/// x'' + 2ζω x' + ω² x = 0 as a first-order system.
fn oscillator(zeta: f64, omega: f64) -> impl FnMut(f64, &[f64], &mut [f64]) {
    move |_t, y, dy| {
        dy[0] = y[1];
        dy[1] = -2.0 * zeta * omega * y[1] - omega * omega * y[0];
    }
}

/// Underdamped closed form from x(0) = 1, v(0) = 0 (any mechanics text; common
/// practice): x = e^{−ζωt}(cos ω_d t + ζω/ω_d sin ω_d t), v = −ω²/ω_d e^{−ζωt} sin ω_d t.
fn oscillator_exact(zeta: f64, omega: f64, t: f64) -> [f64; 2] {
    let wd = omega * (1.0 - zeta * zeta).sqrt();
    let decay = (-zeta * omega * t).exp();
    let (s, c) = (wd * t).sin_cos();
    [
        decay * (c + zeta * omega / wd * s),
        -omega * omega / wd * decay * s,
    ]
}

#[test]
fn damped_oscillator_matches_closed_form_tightly() {
    // R10: ω = 2, ζ = 0.1, to t = 10 in one call and in ten calls of 1.
    let (zeta, omega) = (0.1, 2.0);
    let mut ode = Dopri5::new(2);
    ode.rtol = 1e-9;
    ode.atol = 1e-12;
    let mut y = [1.0, 0.0];
    ode.integrate(oscillator(zeta, omega), 0.0, 10.0, &mut y)
        .unwrap();
    let exact = oscillator_exact(zeta, omega, 10.0);
    assert!(
        (y[0] - exact[0]).abs() < 1e-7 && (y[1] - exact[1]).abs() < 1e-7,
        "{y:?} vs {exact:?}"
    );

    let mut y = [1.0, 0.0];
    for step in 0..10 {
        let (a, b) = (step as f64, step as f64 + 1.0);
        ode.integrate(oscillator(zeta, omega), a, b, &mut y)
            .unwrap();
        let exact = oscillator_exact(zeta, omega, b);
        assert!(
            (y[0] - exact[0]).abs() < 1e-7 && (y[1] - exact[1]).abs() < 1e-7,
            "t = {b}"
        );
    }
}

#[test]
fn damped_oscillator_with_default_tolerances() {
    // R10 at the default rtol 1e-6: the error must stay below 1e-5 everywhere.
    let (zeta, omega) = (0.1, 2.0);
    let mut ode = Dopri5::new(2);
    let mut y = [1.0, 0.0];
    for step in 0..20 {
        let (a, b) = (0.5 * step as f64, 0.5 * (step + 1) as f64);
        ode.integrate(oscillator(zeta, omega), a, b, &mut y)
            .unwrap();
        let exact = oscillator_exact(zeta, omega, b);
        assert!(
            (y[0] - exact[0]).abs() < 1e-5 && (y[1] - exact[1]).abs() < 1e-5,
            "t = {b}"
        );
    }
}

#[test]
fn exponential_decay_forward_and_back() {
    // y' = −y: y(t) = y(0) e^{−t} (common practice); integrating back recovers y(0).
    let mut ode = Dopri5::new(1);
    ode.rtol = 1e-10;
    ode.atol = 1e-14;
    let mut y = [2.0];
    let stats = ode
        .integrate(|_, y, dy| dy[0] = -y[0], 0.0, 5.0, &mut y)
        .unwrap();
    assert!((y[0] - 2.0 * (-5.0f64).exp()).abs() < 1e-9 * 2.0 * (-5.0f64).exp());
    // FSAL: six evaluations per attempted step, plus the first and the starting guess.
    assert_eq!(stats.evaluations, 6 * (stats.accepted + stats.rejected) + 2);
    ode.integrate(|_, y, dy| dy[0] = -y[0], 5.0, 0.0, &mut y)
        .unwrap();
    assert!((y[0] - 2.0).abs() < 1e-8);
}

#[test]
fn max_step_is_respected() {
    // A smooth problem would take a few big steps; the cap forces at least span/max_step.
    let mut ode = Dopri5::new(1);
    ode.max_step = 0.1;
    let mut y = [1.0];
    let mut times = Vec::new();
    let stats = ode
        .integrate(
            |t, y, dy| {
                times.push(t);
                dy[0] = -0.01 * y[0];
            },
            0.0,
            10.0,
            &mut y,
        )
        .unwrap();
    assert!(stats.accepted >= 100, "{stats:?}");
    // No stage may reach further than one capped step past the last step start.
    let mut furthest = 0.0f64;
    for w in times.windows(2) {
        furthest = furthest.max(w[1] - w[0]);
    }
    assert!(furthest <= 0.1 * (1.0 + 1e-12), "{furthest}");
    assert!((y[0] - (-0.1f64).exp()).abs() < 1e-8);
}

#[test]
fn equal_times_do_nothing() {
    // t1 == t0: no step, no evaluation, state untouched.
    let mut ode = Dopri5::new(2);
    let mut y = [3.0, -4.0];
    let stats = ode
        .integrate(|_, _, _| panic!("must not be called"), 7.5, 7.5, &mut y)
        .unwrap();
    assert_eq!(stats, OdeStats::default());
    assert_eq!(y, [3.0, -4.0]);
}

#[test]
fn nan_from_the_model_is_reported() {
    // A rate that turns NaN after t = 0.3 must stop the call there.
    let mut ode = Dopri5::new(1);
    let mut y = [1.0];
    let result = ode.integrate(
        |t, y, dy| dy[0] = if t > 0.3 { f64::NAN } else { -y[0] },
        0.0,
        1.0,
        &mut y,
    );
    match result {
        Err(OdeError::NonFinite { t, component }) => {
            assert!(t > 0.3 && t <= 1.0, "{t}");
            assert_eq!(component, Some(0));
        }
        other => panic!("expected NonFinite, got {other:?}"),
    }
    assert!(y[0].is_finite());
    let mut bad = [f64::NAN];
    assert!(matches!(
        ode.integrate(|_, y, dy| dy[0] = -y[0], 0.0, 1.0, &mut bad),
        Err(OdeError::NonFinite {
            t: 0.0,
            component: Some(0)
        })
    ));
}

#[test]
fn overlong_trial_step_shrinks_instead_of_failing() {
    // A model defined only for y ≥ 0 (a square root or logarithm of a level, say)
    // returns NaN outside; y' = −y stays positive, but a long trial step overshoots
    // below zero. The step must shrink, not end the run; y(t) = e^{−t} (common practice).
    let mut ode = Dopri5::new(1);
    ode.rtol = 1e-3;
    let mut y = [1.0];
    let mut trial_overshoots = 0;
    ode.integrate(
        |_, y, dy| {
            if y[0] < 0.0 {
                trial_overshoots += 1;
                dy[0] = f64::NAN;
            } else {
                dy[0] = -y[0];
            }
        },
        0.0,
        40.0,
        &mut y,
    )
    .unwrap();
    assert!(
        trial_overshoots > 0,
        "the test did not exercise an overshoot"
    );
    assert!(y[0] >= 0.0 && y[0] < 1e-8, "{}", y[0]);
}

#[test]
fn blow_up_collapses_the_step() {
    // y' = y², y(0) = 1 has y = 1/(1 − t), infinite at t = 1 (common practice).
    let mut ode = Dopri5::new(1);
    let mut y = [1.0];
    match ode.integrate(|_, y, dy| dy[0] = y[0] * y[0], 0.0, 2.0, &mut y) {
        // Near t = 1 the step needed to follow y falls below the spacing of doubles
        // while y² (about 1e30) is still finite, so the step collapses first.
        Err(OdeError::StepTooSmall { t }) => assert!((t - 1.0).abs() < 1e-3, "{t}"),
        other => panic!("expected a collapse near t = 1, got {other:?}"),
    }
}

#[test]
fn stiff_problem_hits_the_step_limit() {
    // y' = −1e6 (y − cos t): explicit stability needs |h| ≲ 3.3e-6, so 0..10 needs
    // millions of steps (stability interval of the pair about [−3.3, 0], from memory).
    let mut ode = Dopri5::new(1);
    ode.max_steps = 500;
    let mut y = [1.0];
    match ode.integrate(
        |t, y, dy| dy[0] = -1e6 * (y[0] - t.cos()),
        0.0,
        10.0,
        &mut y,
    ) {
        Err(OdeError::TooManySteps { t }) => assert!(t < 10.0),
        other => panic!("expected TooManySteps, got {other:?}"),
    }
}

#[test]
fn repeat_runs_are_bit_identical() {
    // Van der Pol oscillator, μ = 2: a nonlinear run with rejections must repeat
    // exactly, on a fresh workspace and on one used for something else first.
    let vdp = |_t: f64, y: &[f64], dy: &mut [f64]| {
        dy[0] = y[1];
        dy[1] = 2.0 * (1.0 - y[0] * y[0]) * y[1] - y[0];
    };
    let mut first = [2.0, 0.0];
    let s1 = Dopri5::new(2)
        .integrate(vdp, 0.0, 20.0, &mut first)
        .unwrap();
    let mut reused = Dopri5::new(2);
    let mut other = [0.5, 0.5];
    reused.integrate(vdp, 0.0, 3.0, &mut other).unwrap();
    let mut second = [2.0, 0.0];
    let s2 = reused.integrate(vdp, 0.0, 20.0, &mut second).unwrap();
    assert_eq!(s1, s2);
    assert_eq!(first.map(f64::to_bits), second.map(f64::to_bits));
    assert!(s1.accepted > 10);
}

#[test]
fn tiny_and_far_from_zero_spans_finish() {
    // One ulp of time, and a minute span at a large time origin (a clock in seconds
    // since an epoch), must both finish, with y' = −y giving y ≈ 1 − span.
    for &(t0, t1) in &[
        (0.0, 1e-300),
        (1.7e9, 1.7e9 + 60.0),
        (1.7e9, f64::from_bits(1.7e9f64.to_bits() + 1)),
    ] {
        let mut ode = Dopri5::new(1);
        let mut y = [1.0];
        ode.integrate(|_, y, dy| dy[0] = -y[0], t0, t1, &mut y)
            .unwrap();
        let span: f64 = t1 - t0;
        assert!(
            (y[0] - (-span).exp()).abs() < 1e-8,
            "{t0} -> {t1}: {}",
            y[0]
        );
    }
}

#[test]
fn dimension_is_reported() {
    assert_eq!(Dopri5::new(4).dim(), 4);
}
