//! Requests at the numerical edge (issue 15, items 3 and 12, and the `/v1/check` part of
//! item 2): each must be a clear refusal, never a 500, a hang or a 200 with nonsense.
//! The plants are invented: a kiln's two thermocouple zones and a bottling conveyor.

use super::support::{check, estimate, simulate_or_problem};
use serde_json::{json, Value};

/// A kiln whose "balance" sensor reads the ratio of two zone temperatures: at the default
/// linearisation point (every state zero) its partial derivatives are 1/0 and −0/0, the
/// latter NaN.
fn kiln_check(states: &[&str]) -> Value {
    let rates: serde_json::Map<String, Value> = states
        .iter()
        .map(|s| (s.to_string(), json!(format!("-0.1*{s}"))))
        .collect();
    json!({"model": {
        "states": states,
        "dynamics": {"rates": rates},
        "process_noise": {"density": {states[0]: 0.01}},
        "sensors": {
            "front_tc": {"measures": states[0], "std": 0.5},
            "balance": {"measures": format!("{}/{}", states[0], states[1]), "std": 0.1}
        }
    }})
}

/// Item 3 (two states: a panic inside the SVD, answered 500) and item 2 (three states:
/// never answered). A NaN Jacobian is refused before any SVD, naming the sensor and the
/// point (common practice: a rank test is meaningless on non-finite entries).
#[test]
fn check_with_a_nan_sensor_jacobian_is_a_422_naming_the_sensor() {
    for states in [&["front", "back"][..], &["front", "back", "crown"][..]] {
        let p = check(&kiln_check(states)).expect_err("a NaN Jacobian must be refused");
        assert_eq!(p.status, 422, "{p}");
        let text = p.to_string();
        assert!(
            text.contains("balance") && text.contains("front"),
            "names the sensor and the point: {text}"
        );
        assert!(
            p.errors
                .iter()
                .any(|e| e.pointer == "/model/sensors/balance/measures"),
            "{p}"
        );
    }
}

/// The same guard for the dynamics: a kiln zone whose rate is the ratio of the two zones
/// is refused at its rate formula, before the rank test multiplies H by F.
#[test]
fn check_with_a_nan_dynamics_jacobian_is_a_422_naming_the_rate() {
    let mut body = kiln_check(&["front", "back"]);
    body["model"]["sensors"]["balance"]["measures"] = json!("back");
    body["model"]["dynamics"]["rates"]["front"] = json!("front/back");
    let p = check(&body).expect_err("a NaN Jacobian must be refused");
    assert_eq!(p.status, 422, "{p}");
    assert!(
        p.errors
            .iter()
            .any(|e| e.pointer == "/model/dynamics/rates/front"
                && e.detail.contains("front = 0, back = 0")),
        "{p}"
    );
}

/// A bottling conveyor: belt position and speed, an encoder on the position.
fn conveyor() -> Value {
    json!({
        "states": ["pos", "speed"],
        "dynamics": {"rates": {"pos": "speed"}},
        "process_noise": {"density": {"speed": 0.01}},
        "sensors": {"encoder": {"measures": "pos", "std": 0.01}}
    })
}

fn conveyor_prior() -> Value {
    json!({"t": 0.0, "mean": {"pos": 0.0, "speed": 0.5}, "std": {"pos": 0.1, "speed": 0.1}})
}

/// The refusal of a std whose square is not a finite double: at `pointer`, stating the
/// largest std accepted. √(largest binary64) = 1.3407807929942596e154 (IEEE 754, common
/// practice; the digits from memory, checked by the unit test beside the bound).
fn refused_std(p: &tacit::problem::Problem, pointer: &str) {
    assert_eq!(p.status, 422, "{p}");
    let e = p
        .errors
        .iter()
        .find(|e| e.pointer == pointer)
        .unwrap_or_else(|| panic!("no error at {pointer}: {p}"));
    assert!(e.detail.contains("1.3407807929942596e154"), "{}", e.detail);
}

/// Item 3: a sensor std of 1.4e154 was a 500 ("sensor noise not PSD") from simulate,
/// since its square overflows. Now a 422 at the std, from every endpoint.
#[test]
fn a_sensor_std_whose_square_overflows_is_a_422_at_the_std() {
    let mut model = conveyor();
    model["sensors"]["encoder"]["std"] = json!(1.4e154);
    let sim = json!({"model": model, "prior": conveyor_prior(),
                     "times": {"start": 0.1, "step": 0.1, "count": 3}, "seed": 5});
    let p = simulate_or_problem(&sim).expect_err("simulate must refuse");
    refused_std(&p, "/model/sensors/encoder/std");
    let est = json!({"model": model, "filter": {"method": "ekf"}, "prior": conveyor_prior(),
                     "measurements": [{"t": 0.1, "values": {"encoder": 0.05}}]});
    refused_std(&estimate(&est).unwrap_err(), "/model/sensors/encoder/std");
    refused_std(
        &check(&json!({"model": model})).unwrap_err(),
        "/model/sensors/encoder/std",
    );
    // One per component, too.
    let mut model = conveyor();
    model["sensors"]["encoder"] = json!({"measures": ["pos", "speed"], "std": [0.01, 1.4e154]});
    let est = json!({"model": model, "filter": {"method": "ekf"}, "prior": conveyor_prior(),
                     "measurements": []});
    refused_std(&estimate(&est).unwrap_err(), "/model/sensors/encoder/std/1");
    // The bound itself is accepted: its square is finite.
    let mut model = conveyor();
    model["sensors"]["encoder"]["std"] = json!(1.3407807929942596e154);
    let sim = json!({"model": model, "prior": conveyor_prior(),
                     "times": {"start": 0.1, "step": 0.1, "count": 3}, "seed": 5});
    assert!(check(&json!({"model": model})).is_ok());
    simulate_or_problem(&sim).unwrap_or_else(|p| panic!("the bound is accepted: {p}"));
}

/// Item 12: a prior std of 1.4e154 answered `"covariance": [[null]]`. Now a 422 at
/// /prior/std/<name>.
#[test]
fn a_prior_std_whose_square_overflows_is_a_422_at_the_std() {
    let mut prior = conveyor_prior();
    prior["std"]["speed"] = json!(1.4e154);
    for method in ["ekf", "ukf", "enkf"] {
        let est = json!({"model": conveyor(), "filter": {"method": method}, "prior": prior,
                         "measurements": [{"t": 0.1, "values": {"encoder": 0.05}}]});
        refused_std(&estimate(&est).unwrap_err(), "/prior/std/speed");
    }
    let sim = json!({"model": conveyor(), "prior": prior,
                     "times": {"start": 0.1, "step": 0.1, "count": 3}, "seed": 5});
    refused_std(&simulate_or_problem(&sim).unwrap_err(), "/prior/std/speed");
}

/// A runaway kiln zone, x' = k x, predicted over a 1 s gap: the mean grows by e^k and the
/// variance by e^{2k} (the exponential solution of a linear ODE, common practice). At
/// k = 400 the variance e^800 is beyond every double (largest ≈ 1.8e308, IEEE 754): each
/// method refuses with a 422 naming step 1, never a 200. (At k = 100 the prediction itself
/// is right, e^100 ≈ 2.69e43, from memory, checked below.)
#[test]
fn an_overflowing_prediction_is_a_422_naming_the_step() {
    let body = |method: &str, rate: &str| {
        json!({
            "model": {"states": ["x"], "dynamics": {"rates": {"x": rate}},
                      "process_noise": {"density": {"x": 0.01}},
                      "sensors": {"tc": {"measures": "x", "std": 0.5}}},
            "filter": {"method": method},
            "prior": {"t": 0.0, "mean": {"x": 1.0}, "std": {"x": 1.0}},
            "measurements": [{"t": 1.0}]
        })
    };
    for method in ["ekf", "ukf", "enkf"] {
        match estimate(&body(method, "400*x")) {
            Ok(out) => panic!("{method}: answered 200: {}", out["estimates"]),
            Err(p) => {
                assert_eq!(p.status, 422, "{method}: {p}");
                assert!(p.detail.contains("step 1"), "{method}: {p}");
            }
        }
    }
    for method in ["ekf", "ukf"] {
        let out = estimate(&body(method, "100*x")).unwrap_or_else(|p| panic!("{method}: {p}"));
        let x = out["estimates"][0]["mean"]["x"].as_f64().unwrap();
        let var = out["estimates"][0]["covariance"][0][0].as_f64().unwrap();
        assert!((x / 100f64.exp() - 1.0).abs() < 1e-9, "{method}: {x}");
        assert!(var > 0.0 && var.is_finite(), "{method}: {var}");
    }
}

/// Item 12, the update: the same runaway zone at k = 100, now read once at t = 1 (1 ± 0.5
/// against a forecast of e^100 ± e^100). The exact posterior is near the reading, but the
/// update must move the mean by about −e^100 ≈ −2.69e43, and rounding that move to binary64
/// costs about ε·e^100 ≈ 6e27 (ε = 2⁻⁵², IEEE 754, common practice), far more than the
/// posterior spread of about 0.5: before, ekf and ukf answered 0 ± 0.5 and enkf ~1e26 ±
/// 1e27. Every method now refuses with a 422 naming step 1 and the state.
#[test]
fn an_update_whose_move_is_lost_to_rounding_is_a_422_naming_the_state() {
    for method in ["ekf", "ukf", "enkf"] {
        let body = json!({
            "model": {"states": ["zone"], "dynamics": {"rates": {"zone": "100*zone"}},
                      "sensors": {"tc": {"measures": "zone", "std": 0.5}}},
            "filter": {"method": method},
            "prior": {"t": 0.0, "mean": {"zone": 1.0}, "std": {"zone": 1.0}},
            "measurements": [{"t": 1.0, "values": {"tc": 1.0}}]
        });
        let p = estimate(&body).expect_err("a move lost to rounding must be refused");
        assert_eq!(p.status, 422, "{method}: {p}");
        assert!(p.type_uri.ends_with("/numerical-failure"), "{method}: {p}");
        assert!(
            p.detail.contains("step 1") && p.detail.contains("state \"zone\""),
            "{method}: {p}"
        );
        // The move the detail reports is the forecast's distance from the reading: for the
        // Gaussian filters the forecast mean e^100 exactly (the ensemble's is a sample mean).
        let moved: f64 = p
            .detail
            .split(" by ")
            .nth(1)
            .unwrap()
            .split(' ')
            .next()
            .unwrap()
            .parse()
            .unwrap();
        if method != "enkf" {
            assert!(
                (moved / -(100f64.exp()) - 1.0).abs() < 1e-9,
                "{method}: {moved}"
            );
        } else {
            assert!(moved < -1e42, "{method}: {moved}");
        }
    }
    // The same reading after a short gap (x grows by e^0.01 only) is answered near it.
    let body = json!({
        "model": {"states": ["zone"], "dynamics": {"rates": {"zone": "100*zone"}},
                  "sensors": {"tc": {"measures": "zone", "std": 0.5}}},
        "filter": {"method": "ekf"},
        "prior": {"t": 0.0, "mean": {"zone": 1.0}, "std": {"zone": 1.0}},
        "measurements": [{"t": 1e-4, "values": {"tc": 1.0}}]
    });
    let out = estimate(&body).unwrap();
    let x = out["estimates"][0]["mean"]["zone"].as_f64().unwrap();
    assert!((x - 1.0).abs() < 0.02, "{x}");
}
