//! The demo plants: the committed files are what the simulator makes from the committed
//! seeds, and `tacit demo` (run through the library, against the real service on a
//! loopback port) recovers the unmeasured quantities to within what the sensors allow.
//!
//! These check that the demo works end to end; the reference-grade checks of each filter
//! live in `tests/estimation/`. Every scenario is seeded, so each run sees the same
//! numbers; the tolerances below are still set from independent values with a wide
//! margin, so that they hold for any seed a maintainer might commit, not just this one.

use serde_json::Value;
use std::sync::OnceLock;
use tacit::demo::{self, Report, StateReport, SCENARIOS};

/// The demo runs once; the checks below share its reports.
fn reports() -> &'static [Report] {
    static REPORTS: OnceLock<Vec<Report>> = OnceLock::new();
    REPORTS.get_or_init(|| demo::run().unwrap_or_else(|e| panic!("demo failed: {e}")))
}

fn report(name: &str) -> &'static Report {
    reports()
        .iter()
        .find(|r| r.scenario == name)
        .unwrap_or_else(|| panic!("no report for {name}"))
}

fn state<'a>(r: &'a Report, name: &str) -> &'a StateReport {
    r.states
        .iter()
        .find(|s| s.name == name)
        .unwrap_or_else(|| panic!("{}: no state {name}", r.scenario))
}

fn json(text: &str) -> Value {
    serde_json::from_str(text).expect("scenario file is JSON")
}

fn scenario(name: &str) -> &'static demo::Scenario {
    SCENARIOS.iter().find(|s| s.name == name).expect("scenario")
}

fn model_number(s: &demo::Scenario, pointer: &str) -> f64 {
    json(s.model)
        .pointer(pointer)
        .and_then(Value::as_f64)
        .unwrap_or_else(|| panic!("{}: no number at {pointer}", s.name))
}

#[test]
fn regenerating_from_the_seeds_reproduces_the_committed_files() {
    for s in &SCENARIOS {
        let g = s
            .generate()
            .unwrap_or_else(|e| panic!("{}: regenerate failed: {e}", s.name));
        assert!(
            g.truth == s.truth,
            "{}: truth.json differs from what the seed gives; run demo-data/regenerate.sh",
            s.name
        );
        assert!(
            g.measurements == s.measurements,
            "{}: measurements.json differs from what the seed gives; run demo-data/regenerate.sh",
            s.name
        );
        // Small enough to read and to diff (the brief: under 1 MB per file).
        assert!(s.truth.len() < 1 << 20 && s.measurements.len() < 1 << 20);
        let n = json(s.truth).as_array().map_or(0, Vec::len);
        assert!(
            (300..=5000).contains(&n),
            "{}: {n} times; keep a few hundred to a few thousand",
            s.name
        );
    }
}

#[test]
fn a_changed_seed_changes_the_readings() {
    // The regeneration check above could pass by ignoring the seed; it must not.
    let s = scenario("crane");
    let mut settings = json(s.simulate);
    let seed = settings["seed"].as_u64().expect("a committed seed");
    settings["seed"] = Value::from(seed + 1);
    let g = demo::generate(s.model, s.prior, &settings.to_string()).expect("simulate");
    assert_ne!(g.measurements, s.measurements);
}

#[test]
fn the_truth_follows_the_filters_model_except_where_the_readme_says() {
    // crane and water tower: the truth is simulated with the very model the filter gets.
    for s in &SCENARIOS {
        if s.truth_model.is_none() {
            assert!(s.truth_prior.is_none(), "{}", s.name);
        }
    }
    // kiln: same sensor and heat balance; only `loss` moves differently (a state with a
    // steady rise plus a random walk, where the filter assumes a random walk alone).
    let kiln = scenario("kiln");
    let (m, t) = (
        json(kiln.model),
        json(kiln.truth_model.expect("kiln truth model")),
    );
    assert_eq!(m["sensors"], t["sensors"]);
    assert_eq!(
        m["dynamics"]["rates"]["temperature"],
        t["dynamics"]["rates"]["temperature"]
    );
    assert_eq!(t["states"][1], "loss");
    assert!(m["parameters"]["loss"].is_object());
}

#[test]
fn crane_velocity_is_recovered_and_the_glitches_are_gated() {
    let r = report("crane");
    let s = scenario("crane");
    let sigma = model_number(s, "/sensors/encoder/std");
    let q = model_number(s, "/process_noise/density/velocity");
    let dt = json(s.simulate)["times"]["step"].as_f64().expect("step");
    let pos = state(r, "position");
    let vel = state(r, "velocity");
    assert!(pos.measured && !vel.measured);

    // The filtered position beats a raw reading (common practice: filtering averages).
    assert!(pos.rmse < sigma, "position RMSE {} vs {sigma}", pos.rmse);

    // Differencing two consecutive independent readings has velocity error std
    // √2·σ/Δt (common practice); the filter must do far better than that.
    let differencing = 2f64.sqrt() * sigma / dt;
    assert!(
        vel.rmse < differencing / 3.0,
        "velocity RMSE {} vs differencing {differencing}",
        vel.rmse
    );
    // Steady-state continuous-time Kalman–Bucy filter for a double integrator with
    // acceleration noise density q and position noise density r = σ²Δt/(1 − dropout):
    // P_vv = √2 q^{3/4} r^{1/4} (from memory; it solves the 2×2 algebraic Riccati
    // equation 0 = AP + PAᵀ + Q − PHᵀHP/r in closed form). The trolley's damping
    // (c/m = 0.14 /s) is slow next to the filter's bandwidth (q/r)^{1/4} ≈ 6.5 /s, and
    // sampling at Δt = 0.05 s moves the discrete value by some per cent, so the band is
    // wide: [0.6, 1.5] × the closed form.
    let dropout = json(s.simulate)["sampling"]["encoder"]["dropout"]
        .as_f64()
        .expect("dropout");
    let r_density = sigma * sigma * dt / (1.0 - dropout);
    let closed_form = (2f64.sqrt() * q.powf(0.75) * r_density.powf(0.25)).sqrt();
    assert!(
        (0.6 * closed_form..1.5 * closed_form).contains(&vel.rmse),
        "velocity RMSE {} vs steady-state std {closed_form}",
        vel.rmse
    );

    // Every injected glitch (over 6σ off the truth) is refused, and the gate refuses few
    // good readings: at probability 0.999 about one in a thousand (χ² tail, common
    // practice), so over ~1000 readings more than 6 false refusals would be a fault
    // (Poisson(1.1) exceeds 6 with probability below 10⁻³).
    assert!(r.glitches >= 5, "the scenario should inject glitches");
    assert_eq!(r.glitches_rejected, r.glitches);
    assert!(r.rejected as usize >= r.glitches);
    assert!(
        r.rejected as usize <= r.glitches + 6,
        "{} rejected for {} glitches",
        r.rejected,
        r.glitches
    );
    assert_eq!(r.updates as usize + r.rejected as usize, r.readings);
}

#[test]
fn water_tower_draw_off_is_recovered_from_the_level() {
    let r = report("water-tower");
    let s = scenario("water-tower");
    let flow = state(r, "draw_off");
    assert!(!flow.measured);
    // Same closed form as for the crane: the level integrates −draw_off/(1000·A), a
    // double integrator with gain b = 1/(1000·A); in draw_off units the steady-state
    // variance is √2 q^{3/4} (r/b²)^{1/4}. The filter's time constant (r/(b²q))^{1/4}
    // ≈ 100 s is long next to the 10 s sampling, so the continuous form is close; the
    // errors are correlated over that time, so ~130 s-apart samples over 3.6 h give some
    // 100 independent ones and the RMSE scatters by ~7 %: band [0.7, 1.4].
    let sigma = model_number(s, "/sensors/level_gauge/std");
    let q = model_number(s, "/process_noise/density/draw_off");
    let area = model_number(s, "/parameters/area");
    let settings = json(s.simulate);
    let dt = settings["times"]["step"].as_f64().expect("step");
    let dropout = settings["sampling"]["level_gauge"]["dropout"]
        .as_f64()
        .expect("dropout");
    let b = 1.0 / (1000.0 * area);
    let r_density = sigma * sigma * dt / (1.0 - dropout);
    let closed_form = (2f64.sqrt() * q.powf(0.75) * (r_density / (b * b)).powf(0.25)).sqrt();
    assert!(
        (0.7 * closed_form..1.4 * closed_form).contains(&flow.rmse),
        "draw-off RMSE {} vs steady-state std {closed_form}",
        flow.rmse
    );
    // What the filter claims agrees with the same closed form.
    assert!(
        (0.7 * closed_form..1.4 * closed_form).contains(&flow.mean_std),
        "draw-off mean std {} vs {closed_form}",
        flow.mean_std
    );
    // The ensemble filter continued across four requests gives the single request's
    // estimates bit for bit, given members and step in the posterior (API contract).
    assert_eq!(r.resumed_identical, Some(true));
}

#[test]
fn kiln_loss_coefficient_is_learned_and_its_drift_followed() {
    let r = report("kiln");
    let s = scenario("kiln");
    let temp = state(r, "temperature");
    let loss = state(r, "loss");
    assert!(loss.parameter && !loss.measured);
    let sigma = model_number(s, "/sensors/thermocouple/std");
    assert!(
        temp.rmse < sigma,
        "temperature RMSE {} vs {sigma}",
        temp.rmse
    );
    let prior_std = model_number(s, "/parameters/loss/std");
    // The final estimate lies within 3 std of the true final value (a 99.7 % normal
    // interval, common practice) and is much surer than the prior.
    assert!(
        (loss.final_estimate - loss.final_truth).abs() < 3.0 * loss.final_std,
        "loss {} ± {} vs truth {}",
        loss.final_estimate,
        loss.final_std,
        loss.final_truth
    );
    assert!(loss.final_std < prior_std / 5.0);
    // The drift is real (larger than the final uncertainty) and was followed: the final
    // estimate is nearer the final truth than the start-of-run truth.
    let drift = (loss.final_truth - loss.initial_truth).abs();
    assert!(
        drift > 3.0 * loss.final_std,
        "drift {drift} too small to show"
    );
    assert!(
        (loss.final_estimate - loss.final_truth).abs()
            < (loss.final_estimate - loss.initial_truth).abs()
    );
}

#[test]
fn every_scenario_is_consistent_by_its_innovations() {
    for r in reports() {
        // The mean of ~1000 χ²₁ values has std √(2/1000) ≈ 0.045 (common practice);
        // [0.8, 1.25] is over 4 of those either side, while a filter whose noise settings
        // were off by a factor of 1.5 would land outside it.
        assert!(
            (0.8..1.25).contains(&r.nis.mean),
            "{}: mean NIS {}",
            r.scenario,
            r.nis.mean
        );
        assert!(r.nis.dof == 1.0, "{}: one scalar sensor", r.scenario);
        // And every state: a consistent filter's RMSE is close to the std it claims;
        // errors are correlated in time, so allow a factor 2 either way.
        for st in &r.states {
            assert!(
                st.rmse < 2.0 * st.mean_std && st.rmse > 0.5 * st.mean_std,
                "{} {}: RMSE {} vs claimed std {}",
                r.scenario,
                st.name,
                st.rmse,
                st.mean_std
            );
        }
    }
}

#[test]
fn the_printout_and_json_carry_every_scenario() {
    let text = demo::render(reports());
    for s in &SCENARIOS {
        assert!(text.contains(&format!("== {} ", s.name)), "{text}");
    }
    assert!(text.contains("UNMEASURED"));
    let v = demo::to_json(reports());
    assert_eq!(
        v["scenarios"].as_array().map(Vec::len),
        Some(SCENARIOS.len())
    );
    assert!(v["scenarios"][0]["states"][1]["rmse"].is_f64());
}

#[tokio::test]
async fn the_client_hands_back_a_200_body_and_the_detail_of_a_refusal() {
    let server = crate::support::start_default().await;
    let ok = demo::post(
        server.addr,
        "/v1/check",
        "application/json",
        CHECK_BODY.as_bytes(),
    )
    .await
    .expect("a valid check is answered");
    let v: Value = serde_json::from_slice(&ok).expect("JSON");
    assert_eq!(v["states"][0], "level");
    // A body that is not JSON is refused with 400 (openapi/openapi.yaml): the error names the status
    // and carries the problem's detail, not the raw response.
    let err = demo::post(server.addr, "/v1/check", "application/json", b"{\"model\":")
        .await
        .unwrap_err();
    assert!(err.starts_with("http /v1/check answered 400: "), "{err}");
    assert!(!err.contains("\"type\""), "{err}");
    server.shutdown().await.expect("server stops");
}

/// A one-tank water tower: level read by a pressure gauge.
const CHECK_BODY: &str = r#"{"model":{"states":["level"],
    "dynamics":{"rates":{"level":"0"}},
    "process_noise":{"density":{"level":0.01}},
    "sensors":{"gauge":{"measures":"level","std":0.02}}}}"#;
