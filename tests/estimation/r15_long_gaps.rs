//! R15: a covariance update stays right when the prior spread dwarfs the reading. A
//! constant-velocity model (q = 4e-4, position read with R = 1e-4, prior diag(1e-4, 1e-2))
//! is read once after gaps of 1 s to 1e12 s; the reference posteriors come from exact
//! rational arithmetic (tests/data/make_r15_fixtures.py, which cross-checks them against
//! the closed form P R / (P + R), common practice). Also: every posterior is symmetric
//! positive definite and is accepted back as the next request's prior, for every filter,
//! and a property test over random small models and gaps.

use super::support::{estimate, matrix, rel};
use nalgebra::DMatrix;
use proptest::prelude::*;
use serde_json::{json, Value};

/// The reading every R15 case takes at the end of its gap (position, metres).
const READING: f64 = 0.5;

/// An overhead crane trolley tracked by a rail encoder: position and velocity, velocity a
/// random walk of density q = 4e-4, the encoder's std 0.01 (R15's model).
fn trolley(filter: Value, gap: f64) -> Value {
    json!({
        "model": {
            "states": ["pos", "vel"],
            "dynamics": {"linear": {"time": "continuous", "A": [[0.0, 1.0], [0.0, 0.0]]}},
            "process_noise": {"density": {"vel": 4e-4}},
            "sensors": {"encoder": {"measures": "pos", "std": 0.01}}
        },
        "filter": filter,
        "prior": {"t": 0.0, "mean": {"pos": 0.0, "vel": 0.0}, "std": {"pos": 0.01, "vel": 0.1}},
        "measurements": [{"t": gap, "values": {"encoder": READING}}]
    })
}

/// The filters R15 covers: ekf, ukf, and enkf with both updates.
fn filters() -> Vec<(&'static str, Value)> {
    vec![
        ("ekf", json!({"method": "ekf"})),
        ("ukf", json!({"method": "ukf"})),
        (
            "enkf perturbed",
            json!({"method": "enkf", "ensemble": {"members": 64, "seed": 5, "update": "perturbed"}}),
        ),
        (
            "enkf deterministic",
            json!({"method": "enkf", "ensemble": {"members": 64, "seed": 5, "update": "deterministic"}}),
        ),
    ]
}

fn fixtures() -> Value {
    let text = std::fs::read_to_string(concat!(
        env!("CARGO_MANIFEST_DIR"),
        "/tests/data/r15_fixtures.json"
    ))
    .unwrap();
    serde_json::from_str(&text).unwrap()
}

fn to_matrix(v: &Value) -> DMatrix<f64> {
    let rows = matrix(v);
    DMatrix::from_fn(rows.len(), rows[0].len(), |i, j| rows[i][j])
}

/// Exactly symmetric, and positive definite (nalgebra's Cholesky succeeds).
fn assert_spd(p: &DMatrix<f64>, what: &str) {
    for i in 0..p.nrows() {
        for j in 0..i {
            assert_eq!(p[(i, j)], p[(j, i)], "{what}: not symmetric\n{p}");
        }
    }
    assert!(
        p.clone().cholesky().is_some(),
        "{what}: not positive definite\n{p}"
    );
}

/// `answer`'s posterior sent back as the prior of a request with one more reading, 1 s
/// later: it must be accepted (the service's promise that any posterior continues).
fn assert_resumes(body: &Value, answer: &Value, t_next: f64, what: &str) {
    if let Err(p) = resume(body, answer, t_next) {
        panic!("{what}: the posterior was refused as a prior: {p}");
    }
}

/// The request `assert_resumes` sends, answered.
fn resume(body: &Value, answer: &Value, t_next: f64) -> Result<Value, tacit::problem::Problem> {
    let mut next = body.clone();
    next["prior"] = answer["posterior"].clone();
    let sensor = next["measurements"][0]["values"].clone();
    next["measurements"] = json!([{"t": t_next, "values": sensor}]);
    estimate(&next)
}

/// Like `assert_resumes`, except that the next update may be refused for a move lost to
/// rounding (issue 15 item 12): the posterior itself was accepted as a prior, since that
/// refusal comes from the filter's step, not from checking the request.
fn assert_resumes_or_rounds(body: &Value, answer: &Value, t_next: f64, what: &str) {
    if let Err(p) = resume(body, answer, t_next) {
        assert!(
            p.detail.contains("rounding") && p.detail.contains("step 1"),
            "{what}: the posterior was refused as a prior: {p}"
        );
    }
}

#[test]
fn r15_ekf_and_ukf_posteriors_match_the_exact_values_after_long_gaps() {
    // R15 (REFERENCES; exact fixture): every posterior entry within 1e-6 relative up to
    // 1e6 s and within 1e-3 up to 1e8 s. The mean is checked too: prior mean 0, so the
    // exact posterior mean is K · 0.5 with the fixture's exact gain K.
    let fx = fixtures();
    for (name, filter) in &filters()[..2] {
        for g in fx["gaps"].as_array().unwrap() {
            let t = g["T"].as_f64().unwrap();
            if t > 1e8 {
                continue;
            }
            let tol = if t <= 1e6 { 1e-6 } else { 1e-3 };
            let answer = estimate(&trolley(filter.clone(), t))
                .unwrap_or_else(|p| panic!("R15 {name} T = {t}: {p}"));
            let got = to_matrix(&answer["posterior"]["covariance"]);
            let want = to_matrix(&g["posterior_covariance"]["f64"]);
            for i in 0..2 {
                for j in 0..2 {
                    let e = rel(got[(i, j)], want[(i, j)], 0.0);
                    assert!(
                        e <= tol,
                        "R15 {name} T = {t}: P[{i}][{j}] = {} vs exact {} (rel {e:e})",
                        got[(i, j)],
                        want[(i, j)]
                    );
                }
            }
            let gain = &g["gain"]["f64"];
            for (i, s) in ["pos", "vel"].iter().enumerate() {
                let want = READING * gain[i].as_f64().unwrap();
                let got = answer["posterior"]["mean"][*s].as_f64().unwrap();
                let e = rel(got, want, 0.0);
                assert!(
                    e <= tol,
                    "R15 {name} T = {t}: mean {s} {got} vs exact {want}"
                );
            }
        }
    }
}

#[test]
fn r15_every_filter_keeps_the_posterior_positive_definite_and_resumable() {
    // R15 (REFERENCES): for every gap from 1 s to 1e12 s, P stays symmetric positive
    // definite and the posterior is accepted back as a prior, for ekf, ukf and enkf (both
    // updates; the ensemble's accuracy is a matter of sampling and is not checked here).
    let fx = fixtures();
    for (name, filter) in filters() {
        for g in fx["gaps"].as_array().unwrap() {
            let t = g["T"].as_f64().unwrap();
            let what = format!("R15 {name} T = {t:e}");
            let body = trolley(filter.clone(), t);
            let answer = estimate(&body).unwrap_or_else(|p| panic!("{what}: {p}"));
            let p = to_matrix(&answer["posterior"]["covariance"]);
            assert_spd(&p, &what);
            // The position variance can only fall by the reading (at most to the prior's),
            // and the reading cannot take it below zero: 0 < P⁺_pos ≤ P⁻_pos.
            let prior_pos = to_matrix(&g["predicted_covariance"]["f64"])[(0, 0)];
            assert!(
                p[(0, 0)] > 0.0 && p[(0, 0)] <= prior_pos * (1.0 + 1e-9),
                "{what}\n{p}"
            );
            assert_resumes(&body, &answer, t + 1.0, &what);
        }
    }
}

/// A random small model for the property test: a chain of `n` integrators (a kiln's
/// temperature and its rates), the last a random walk of density `q`, read by a linear
/// thermocouple on the first state and a nonlinear probe.
#[derive(Debug, Clone)]
struct Small {
    n: usize,
    q: f64,
    prior_std: Vec<f64>,
    std_linear: f64,
    std_probe: f64,
    gap: f64,
}

fn small() -> impl Strategy<Value = Small> {
    (2usize..=4).prop_flat_map(|n| {
        (
            Just(n),
            -8.0f64..2.0,
            prop::collection::vec(-3.0f64..1.0, n),
            -4.0f64..1.0,
            -4.0f64..1.0,
            -3.0f64..12.0,
        )
            .prop_map(|(n, q, ps, sl, sp, gap)| Small {
                n,
                q: 10f64.powf(q),
                prior_std: ps.iter().map(|e| 10f64.powf(*e)).collect(),
                std_linear: 10f64.powf(sl),
                std_probe: 10f64.powf(sp),
                gap: 10f64.powf(gap),
            })
    })
}

fn small_body(c: &Small, filter: &Value) -> Value {
    let names: Vec<String> = (0..c.n).map(|i| format!("s{i}")).collect();
    let a: Vec<Vec<f64>> = (0..c.n)
        .map(|i| {
            (0..c.n)
                .map(|j| if j == i + 1 { 1.0 } else { 0.0 })
                .collect()
        })
        .collect();
    let mean: serde_json::Map<String, Value> =
        names.iter().map(|s| (s.clone(), json!(0.1))).collect();
    let std: serde_json::Map<String, Value> = names
        .iter()
        .zip(&c.prior_std)
        .map(|(s, v)| (s.clone(), json!(v)))
        .collect();
    let last = names[c.n - 1].clone();
    json!({
        "model": {
            "states": names,
            "dynamics": {"linear": {"time": "continuous", "A": a}},
            "process_noise": {"density": {last: c.q}},
            "sensors": {
                "thermocouple": {"measures": "s0", "std": c.std_linear},
                "probe": {"measures": "s0 + 0.1*s1*s1", "std": c.std_probe}
            }
        },
        "filter": filter,
        "prior": {"t": 0.0, "mean": mean, "std": std},
        "measurements": [{"t": c.gap, "values": {"thermocouple": 0.3, "probe": 0.4}}]
    })
}

proptest! {
    #![proptest_config(ProptestConfig { cases: 64, ..ProptestConfig::default() })]

    #[test]
    fn every_posterior_is_accepted_back_as_a_prior(c in small()) {
        // R15's promise over random small models (2–4 states, a linear and a nonlinear
        // sensor, noise levels over decades) and gaps from 1e-3 s to 1e12 s: every
        // filter's posterior is symmetric positive definite and continues as a prior, or
        // the request is refused because the update's move of a mean was lost to rounding
        // (issue 15 item 12: ε·|Δx| above the posterior spread). A refusal must be
        // warranted: s0's forecast has mean 0.1·Σₖ Tᵏ/k! and a spread of at least
        // σ_last·T^(n−1)/(n−1)! (the chain of integrators' exact solution, common
        // practice); ε times the mean plus ten such spreads (an ensemble member's reach)
        // must exceed the smallest sensor std over a million (necessary, loose on purpose).
        for (name, filter) in filters() {
            let what = format!("R15 property {name} {c:?}");
            let body = small_body(&c, &filter);
            match estimate(&body) {
                Ok(answer) => {
                    let p = to_matrix(&answer["posterior"]["covariance"]);
                    assert_spd(&p, &what);
                    assert_resumes_or_rounds(&body, &answer, c.gap * 1.5, &what);
                }
                Err(p) => {
                    prop_assert!(p.status == 422 && p.detail.contains("rounding"), "{}: {}", what, p);
                    let fact = |k: i32| (1..=k).map(f64::from).product::<f64>();
                    let k = c.n as i32 - 1;
                    let mean: f64 = (0..=k).map(|j| 0.1 * c.gap.powi(j) / fact(j)).sum();
                    let spread = c.prior_std[c.n - 1] * c.gap.powi(k) / fact(k);
                    let floor = f64::EPSILON * (mean + 10.0 * spread);
                    prop_assert!(floor > 1e-6 * c.std_linear.min(c.std_probe), "{}: refused too early: {}", what, p);
                }
            }
        }
    }
}

#[test]
fn ensemble_members_keep_their_spread_when_a_reading_is_finer_than_rounding() {
    // The case the property test found (kept in proptest-regressions as well): a 3-state
    // chain after 3.7e11 s, where the forecast spread of s0 is ~1e24 times the reading's
    // std. The perturbed members' updates rounded to one value along s0 and the posterior
    // was singular; the members are now rebuilt from the square-root array (R15: the
    // posterior stays symmetric positive definite and resumable). With the chain's mean
    // started at 0.1 the forecast of s0 is about 0.1·T²/2 ≈ 6.8e21, so moving it to the
    // reading rounds at ε·6.8e21 ≈ 1.5e6, far above the reading's std of 1: that request is
    // refused (issue 15 item 12), or, where the members' own rounding widened the spread
    // past that move, answered with a spread that covers the reading (s0's mean within
    // 3 std of 0.3: wide, never confidently wrong). Started at 0 there is nothing to
    // cancel and it is answered.
    let c = Small {
        n: 3,
        q: 5.888249528498749e-8,
        prior_std: vec![1.0, 1.0, 0.007851350949139716],
        std_linear: 1.0,
        std_probe: 1.0,
        gap: 369720384975.3156,
    };
    for (name, filter) in &filters()[2..] {
        let what = format!("R15 rebuild {name}");
        let mut body = small_body(&c, filter);
        match estimate(&body) {
            Err(p) => assert!(p.detail.contains("state \"s0\""), "{what}: {p}"),
            Ok(a) => {
                let (m, sd) = (
                    a["posterior"]["mean"]["s0"].as_f64().unwrap(),
                    a["posterior"]["covariance"][0][0].as_f64().unwrap().sqrt(),
                );
                assert!((m - 0.3).abs() <= 3.0 * sd, "{what}: {m} ± {sd}");
            }
        }
        for s in ["s0", "s1", "s2"] {
            body["prior"]["mean"][s] = json!(0.0);
        }
        let answer = estimate(&body).unwrap_or_else(|p| panic!("{what}: {p}"));
        assert_spd(&to_matrix(&answer["posterior"]["covariance"]), &what);
        assert_resumes(&body, &answer, c.gap * 1.5, &what);
    }
}

#[test]
#[ignore = "prints the R15 figures for a report; run with --ignored --nocapture"]
fn r15_figures() {
    for (name, filter) in &filters()[..2] {
        for t in [1e5, 1e7] {
            let answer = estimate(&trolley(filter.clone(), t)).unwrap();
            println!("{name} T = {t:e}: {}", answer["posterior"]);
        }
    }
}
