//! `POST /v1/simulate` through a real server: inputs follow their own schedule and act
//! from their own time whatever the sampling times, injected outliers and dropped readings
//! are marked on the truth lines, and a bad schedule is refused at its field.

use crate::support::{assert_pointer, assert_problem, post, post_json, start_default, Answer};
use serde_json::{json, Value};

/// A transfer cart on a bottling line: unit mass on rails, pushed by a linear motor with
/// thrust `thrust` (x'' = thrust), read by a position encoder. No process noise and an
/// exact prior, so the truth is the deterministic response to the schedule alone.
fn cart() -> Value {
    json!({
      "states": ["pos", "vel"],
      "inputs": ["thrust"],
      "dynamics": {"rates": {"pos": "vel", "vel": "thrust"}},
      "sensors": {"encoder": {"measures": "pos", "std": 0.001}}
    })
}

/// The same cart as a discrete map of one step `dt` under a held thrust (the exact
/// zero-order-hold step of x'' = thrust, common practice), so the split at a change runs
/// through a map rather than an exact discretisation.
fn cart_as_map() -> Value {
    json!({
      "states": ["pos", "vel"],
      "inputs": ["thrust"],
      "dynamics": {"next": {"pos": "pos + vel*dt + thrust*dt^2/2", "vel": "vel + thrust*dt"}},
      "sensors": {"encoder": {"measures": "pos", "std": 0.001}}
    })
}

fn at_rest(t: Value) -> Value {
    json!({"t": t, "mean": {"pos": 0.0, "vel": 0.0}, "std": {"pos": 0.0, "vel": 0.0},
           "inputs": {"thrust": 1.0}})
}

/// The truth line at time `t` (seconds, or the timestamp text).
fn truth_at<'a>(a: &'a Answer, t: &Value) -> &'a Value {
    a.body["truth"]
        .as_array()
        .unwrap()
        .iter()
        .find(|l| &l["t"] == t)
        .unwrap_or_else(|| panic!("no truth line at {t}: {}", a.text))
}

fn state(line: &Value, name: &str) -> f64 {
    line["state"][name].as_f64().unwrap()
}

/// Line i of the truth and line i of the measurements are at the same time.
fn assert_aligned(a: &Answer) {
    let truth = a.body["truth"].as_array().unwrap();
    let meas = a.body["measurements"].as_array().unwrap();
    assert_eq!(truth.len(), meas.len(), "{}", a.text);
    for (tr, m) in truth.iter().zip(meas) {
        assert_eq!(tr["t"], m["t"], "{}", a.text);
    }
}

/// Thrust 1 on the cart from rest, switched off at t = 1.5, sampled at `times`.
async fn switched_off_at_1_5(model: Value, times: Value, prior_t: Value, off: Value) -> Answer {
    let s = start_default().await;
    let body = json!({"model": model, "prior": at_rest(prior_t), "times": times,
        "inputs": [{"t": off, "inputs": {"thrust": 0.0}}], "seed": 4});
    let a = post_json(&s, "/v1/simulate", &body).await;
    assert_eq!(a.status, 200, "{}", a.text);
    assert_aligned(&a);
    a
}

/// Velocity and position after the thrust stops, by the closed form of x'' = F under a
/// piecewise-constant F (v = ∫F dt, x = ∫v dt; common practice): v(t ≥ 1.5) = 1.5 and
/// x(t) = 1.5²/2 + 1.5·(t − 1.5), so x(2) = 1.875 and x(3) = 3.375. The propagation is
/// exact in exact arithmetic (matrix exponential of a nilpotent matrix, or the exact
/// step map), so the bound is a few rounding errors.
fn assert_coasting(a: &Answer, t: &Value, secs: f64) {
    let line = truth_at(a, t);
    let (v, x) = (state(line, "vel"), state(line, "pos"));
    let x_want = 1.5 * 1.5 / 2.0 + 1.5 * (secs - 1.5);
    assert!(
        (v - 1.5).abs() <= 1e-12,
        "vel at {t}: {v}, want 1.5: {}",
        a.text
    );
    assert!(
        (x - x_want).abs() <= 1e-12,
        "pos at {t}: {x}, want {x_want}: {}",
        a.text
    );
}

#[tokio::test]
async fn an_input_change_between_sampling_times_acts_at_its_own_time() {
    // Before the fix the change acted at the next sampling time: sampled at [1, 2, 3] the
    // cart coasted from t = 2 at 2.0 m/s and ended at x(3) = 4.0; sampled at
    // [1, 1.5, 2, 3] it was right. Now both samplings give the closed form.
    for model in [cart(), cart_as_map()] {
        let coarse =
            switched_off_at_1_5(model.clone(), json!([1, 2, 3]), json!(0), json!(1.5)).await;
        let fine = switched_off_at_1_5(model, json!([1, 1.5, 2, 3]), json!(0), json!(1.5)).await;
        for a in [&coarse, &fine] {
            for secs in [1.5, 2.0, 3.0] {
                assert_coasting(a, &json!(secs), secs);
            }
            let x3 = state(truth_at(a, &json!(3.0)), "pos");
            assert!((x3 - 3.375).abs() <= 1e-12, "x(3) = {x3}");
            // Before the change: v(1) = 1, x(1) = 1/2 (same closed form).
            let one = truth_at(a, &json!(1.0));
            assert!((state(one, "vel") - 1.0).abs() <= 1e-12, "{}", a.text);
            assert!((state(one, "pos") - 0.5).abs() <= 1e-12, "{}", a.text);
        }
        // Sampled coarsely, the change gets a line of its own: the truth there, and a
        // measurement line with only the change, so estimate switches the thrust off at
        // 1.5 as the truth did.
        let m = coarse.body["measurements"].as_array().unwrap();
        let ts: Vec<f64> = m.iter().map(|l| l["t"].as_f64().unwrap()).collect();
        assert_eq!(ts, [1.0, 1.5, 2.0, 3.0], "{}", coarse.text);
        assert_eq!(
            m[1],
            json!({"t": 1.5, "inputs": {"thrust": 0.0}}),
            "{}",
            coarse.text
        );
        assert!(m[0]["values"]["encoder"].is_number() && m[2]["values"]["encoder"].is_number());
        // Sampled on the change, the change rides on that time's readings.
        let m = fine.body["measurements"].as_array().unwrap();
        assert_eq!(m.len(), 4, "{}", fine.text);
        assert_eq!(m[1]["inputs"], json!({"thrust": 0.0}), "{}", fine.text);
        assert!(m[1]["values"]["encoder"].is_number(), "{}", fine.text);
    }
}

#[tokio::test]
async fn an_input_change_between_timestamps_acts_at_its_own_time() {
    // The same cart with RFC 3339 times: thrust on from 06:00:00, off at 06:00:01.5.
    let a = switched_off_at_1_5(
        cart(),
        json!([
            "2026-03-01T06:00:01Z",
            "2026-03-01T06:00:02Z",
            "2026-03-01T06:00:03Z"
        ]),
        json!("2026-03-01T06:00:00Z"),
        json!("2026-03-01T06:00:01.5Z"),
    )
    .await;
    // Lines in time order: 06:00:01, the change at 06:00:01.5, 06:00:02, 06:00:03.
    let truth = a.body["truth"].as_array().unwrap();
    assert_eq!(truth.len(), 4, "{}", a.text);
    for (i, secs) in [(1, 1.5), (2, 2.0), (3, 3.0)] {
        assert_coasting(&a, &truth[i]["t"], secs);
    }
    assert!(
        truth[1]["t"]
            .as_str()
            .unwrap()
            .starts_with("2026-03-01T06:00:01.5"),
        "{}",
        a.text
    );
}

#[tokio::test]
async fn estimate_fed_the_simulated_lines_switches_the_input_when_the_truth_did() {
    // The measurements carry the change at 1.5 on a line of its own; a filter that trusts
    // its model (no process noise, tight prior) must then coast at 1.5 m/s, not 2.0.
    let a = switched_off_at_1_5(cart(), json!([1, 2, 3]), json!(0), json!(1.5)).await;
    let s = start_default().await;
    let prior = json!({"t": 0, "mean": {"pos": 0.0, "vel": 0.0}, "std": {"pos": 0.01, "vel": 0.01},
                       "inputs": {"thrust": 1.0}});
    let est = json!({"model": cart(), "filter": {"method": "ekf"}, "prior": prior,
                     "measurements": a.body["measurements"]});
    let e = post_json(&s, "/v1/estimate", &est).await;
    assert_eq!(e.status, 200, "{}", e.text);
    let last = e.body["estimates"]
        .as_array()
        .unwrap()
        .last()
        .unwrap()
        .clone();
    let (v, sd) = (
        last["mean"]["vel"].as_f64().unwrap(),
        last["std"]["vel"].as_f64().unwrap(),
    );
    // Within 4 posterior std of the truth (common practice for a bound that a correct
    // filter passes and the old timing, 0.5 m/s off, fails by far).
    assert!(
        (v - 1.5).abs() < 4.0 * sd.max(1e-3),
        "vel {v} ± {sd}: {}",
        e.text
    );
}

#[tokio::test]
async fn input_changes_after_the_last_sampling_time_write_nothing() {
    let s = start_default().await;
    let body = json!({"model": cart(), "prior": at_rest(json!(0)), "times": [1, 2],
        "inputs": [{"t": 2.5, "inputs": {"thrust": 0.0}}]});
    let a = post_json(&s, "/v1/simulate", &body).await;
    assert_eq!(a.status, 200, "{}", a.text);
    assert_eq!(
        a.body["measurements"].as_array().unwrap().len(),
        2,
        "{}",
        a.text
    );
    // Still under thrust at t = 2: v = t, x = t²/2 (common practice).
    let two = truth_at(&a, &json!(2.0));
    assert!((state(two, "vel") - 2.0).abs() <= 1e-12 && (state(two, "pos") - 2.0).abs() <= 1e-12);
}

/// A constant-velocity trolley read by an encoder (position) and a tachometer (speed).
fn trolley() -> Value {
    json!({
      "states": ["pos", "vel"],
      "dynamics": {"rates": {"pos": "vel"}},
      "process_noise": {"density": {"vel": 0.01}},
      "sensors": {"encoder": {"measures": "pos", "std": 0.01}, "tacho": {"measures": "vel", "std": 0.05}}
    })
}

#[tokio::test]
async fn injected_outliers_and_dropped_readings_are_marked_on_the_truth() {
    let s = start_default().await;
    let n = 400;
    let body = json!({"model": trolley(),
        "prior": {"t": 0, "mean": {"pos": 0.0, "vel": 0.4}, "std": {"pos": 0.01, "vel": 0.01}},
        "times": {"start": 0.1, "step": 0.1, "count": n}, "seed": 2718,
        "sampling": {"encoder": {"dropout": 0.25, "outliers": {"probability": 0.2, "scale": 50}}}});
    let a = post_json(&s, "/v1/simulate", &body).await;
    assert_eq!(a.status, 200, "{}", a.text);
    assert_aligned(&a);
    let truth = a.body["truth"].as_array().unwrap();
    let meas = a.body["measurements"].as_array().unwrap();
    assert_eq!(truth.len(), n);
    let sigma = 0.01;
    let (mut dropped, mut marked, mut far_marked, mut plain) = (0, 0, 0, 0);
    for (tr, m) in truth.iter().zip(meas) {
        // The tachometer has no fault settings: always read, never marked.
        assert!(m["values"]["tacho"].is_number(), "{m}");
        let listed = tr["dropped"].as_array().cloned().unwrap_or_default();
        assert!(
            !listed.contains(&json!("tacho")) && tr["injected"].get("tacho").is_none(),
            "{tr}"
        );
        let reading = m["values"].get("encoder");
        // Read at every time (`every` 1): absent exactly when listed as dropped.
        assert_eq!(
            reading.is_none(),
            listed.contains(&json!("encoder")),
            "{tr} {m}"
        );
        let Some(reading) = reading else {
            assert!(
                tr["injected"].get("encoder").is_none(),
                "a dropped reading is not also an outlier: {tr}"
            );
            dropped += 1;
            continue;
        };
        let r = (reading.as_f64().unwrap() - state(tr, "pos")).abs() / sigma;
        match tr["injected"].get("encoder") {
            Some(kind) => {
                assert_eq!(kind, "outlier", "{tr}");
                marked += 1;
                if r > 6.0 {
                    far_marked += 1;
                }
            }
            None => {
                // Ordinary noise: beyond 6σ with probability 2e-9 per reading (normal
                // tail, common practice).
                assert!(
                    r < 6.0,
                    "an unmarked reading {r:.1}σ from the truth: {tr} {m}"
                );
                plain += 1;
            }
        }
    }
    // An outlier is 50 × the noise: inside 6σ only when |ε| < 0.12, about 10 % of them
    // (normal tail, common practice); require most to be far.
    assert!(
        marked > 0 && far_marked * 10 >= marked * 8,
        "{far_marked} of {marked} far"
    );
    // Counts within about 3.5 binomial standard deviations of the settings (common
    // practice): dropped ~ Bin(400, 0.25) = 100 ± 8.7, outliers ~ Bin(300, 0.2) = 60 ± 6.9.
    assert!((70..=130).contains(&dropped), "{dropped} dropped");
    assert!(
        (36..=84).contains(&marked),
        "{marked} outliers of {} readings",
        marked + plain
    );
    // The marks stay off the measurement lines, which estimate takes as they are.
    let est = json!({"model": trolley(), "filter": {"method": "ekf", "gate": {"probability": 0.999}},
        "prior": body["prior"], "measurements": a.body["measurements"]});
    let e = post_json(&s, "/v1/estimate", &est).await;
    assert_eq!(e.status, 200, "{}", e.text);
}

#[tokio::test]
async fn input_schedule_faults_point_at_their_field() {
    let s = start_default().await;
    let body = json!({"model": cart(), "prior": at_rest(json!(0)), "times": [1, 2, 3],
    "inputs": [
        {"t": -0.5, "inputs": {"thrust": 1.0}},
        {"t": 2, "inputs": {"thrust": 0.0}},
        {"t": 2, "inputs": {"thrust": 1.0}},
        {"t": 1, "inputs": {"thrust": 1.0}},
        {"t": 3, "inputs": {"brake": 1.0}},
        {"t": 4, "inputs": {"thrust": "full"}},
        {"t": 5, "inputs": {"thrust": 1.0}, "ramp": 2}
    ]});
    let a = post_json(&s, "/v1/simulate", &body).await;
    assert_problem(&a, 422);
    for p in [
        "/inputs/0/t",
        "/inputs/2/t",
        "/inputs/3/t",
        "/inputs/4/inputs/brake",
        "/inputs/5/inputs/thrust",
        "/inputs/6/ramp",
    ] {
        assert_pointer(&a, p);
    }
    let detail = |p: &str| {
        a.body["errors"]
            .as_array()
            .unwrap()
            .iter()
            .find(|e| e["pointer"] == p)
            .map(|e| e["detail"].as_str().unwrap().to_string())
            .unwrap()
    };
    assert!(detail("/inputs/0/t").contains("prior"), "{}", a.text);
    assert!(detail("/inputs/2/t").contains("one entry"), "{}", a.text);
    assert!(
        detail("/inputs/4/inputs/brake").contains("thrust"),
        "{}",
        a.text
    );
    // The good entries add no error: exactly the six faults above.
    assert_eq!(a.body["errors"].as_array().unwrap().len(), 6, "{}", a.text);

    // A value beyond a double has no finite value; it is named by its pointer (as text:
    // a JSON tree cannot hold it).
    let text = r#"{"model": {"states": ["pos", "vel"], "inputs": ["thrust"],
        "dynamics": {"rates": {"pos": "vel", "vel": "thrust"}},
        "sensors": {"encoder": {"measures": "pos", "std": 0.001}}},
        "prior": {"t": 0, "mean": {"pos": 0, "vel": 0}, "std": {"pos": 0, "vel": 0}},
        "times": [1, 2], "inputs": [{"t": 0.5, "inputs": {"thrust": 1}}, {"t": 1.5, "inputs": {"thrust": 1e400}}]}"#;
    let a = post(
        &s,
        "/v1/simulate",
        "application/json",
        text.as_bytes().to_vec(),
    )
    .await;
    assert_problem(&a, 422);
    assert_pointer(&a, "/inputs/1/inputs/thrust");
}

#[tokio::test]
async fn a_discrete_model_takes_input_changes_on_its_grid_only() {
    // x⁺ = x + 0.1·u on a grid of 0.1 s: a change at 0.25 falls inside a step.
    let s = start_default().await;
    let model = json!({"states": ["level"], "inputs": ["inflow"],
        "dynamics": {"linear": {"time": "discrete", "dt": 0.1, "F": [[1.0]], "B": [[0.1]]}},
        "sensors": {"gauge": {"measures": "level", "std": 0.01}}});
    let prior =
        json!({"t": 0, "mean": {"level": 0.0}, "std": {"level": 0.0}, "inputs": {"inflow": 1.0}});
    let mut body = json!({"model": model, "prior": prior, "times": [0.5],
        "inputs": [{"t": 0.25, "inputs": {"inflow": 0.0}}]});
    let a = post_json(&s, "/v1/simulate", &body).await;
    assert_problem(&a, 422);
    assert_pointer(&a, "/inputs/0/t");
    // On the grid it is taken: three steps of inflow 1, then two of none: level 0.3
    // (x_k = x_0 + dt·Σu, common practice).
    body["inputs"][0]["t"] = json!(0.3);
    let a = post_json(&s, "/v1/simulate", &body).await;
    assert_eq!(a.status, 200, "{}", a.text);
    let level = state(truth_at(&a, &json!(0.5)), "level");
    assert!((level - 0.3).abs() <= 1e-12, "level {level}");
}
