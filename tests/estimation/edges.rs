//! Requests at the numerical edge (issue 15, items 3 and 12, and the `/v1/check` part of
//! item 2): each must be a clear refusal, never a 500, a hang or a 200 with nonsense.
//! The plants are invented: a kiln's two thermocouple zones and a bottling conveyor.

use super::support::check;
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
