//! Bad requests are refused with the right status and a JSON Pointer to the bad field;
//! the observability check names what cannot be recovered.

use super::support::{check, estimate};
use serde_json::{json, Value};

fn good() -> Value {
    json!({
        "model": {
            "states": ["pos", "vel"],
            "inputs": ["force"],
            "parameters": {"mass": 12.0, "drag": {"initial": 0.4, "std": 0.2, "random_walk": 1e-4}},
            "dynamics": {"rates": {"pos": "vel", "vel": "(force - drag*vel*abs(vel))/mass"}},
            "process_noise": {"density": {"vel": 0.05}},
            "sensors": {
                "encoder": {"measures": "pos", "std": 0.002},
                "range": {"measures": "sqrt(pos^2 + 4)", "std": 0.05},
                "pair": {"measures": ["pos", "vel"], "covariance": [[1e-4, 0], [0, 1e-2]]}
            }
        },
        "filter": {"method": "ukf"},
        "prior": {"t": 0.0, "mean": {"pos": 0.0, "vel": 0.0}, "std": {"pos": 1.0, "vel": 5.0}},
        "measurements": [
            {"t": 0.10, "values": {"encoder": 0.0123}, "inputs": {"force": 2.5}},
            {"t": 0.15, "values": {"encoder": 0.0131, "pair": [0.013, 0.2]}, "noise_std": {"encoder": 0.01}},
            {"t": 0.20, "inputs": {"force": 0.0}}
        ]
    })
}

fn expect(mutate: impl FnOnce(&mut Value), status: u16, pointer: &str) {
    let mut b = good();
    mutate(&mut b);
    let p = estimate(&b).expect_err("request should be refused");
    assert_eq!(p.status, status, "{p}");
    if !pointer.is_empty() {
        assert!(
            p.errors.iter().any(|e| e.pointer == pointer),
            "no error at {pointer}: {p}"
        );
    }
}

#[test]
fn the_contract_example_runs() {
    let out = estimate(&good()).unwrap_or_else(|p| panic!("{p}"));
    assert_eq!(out["states"], json!(["pos", "vel", "drag"]));
    assert_eq!(out["estimates"].as_array().unwrap().len(), 3);
    assert!(
        out["estimates"][2].get("innovations").is_none(),
        "a line without readings has no innovations"
    );
    assert_eq!(out["summary"]["steps"], json!(3));
    assert_eq!(out["posterior"]["inputs"]["force"], json!(0.0));
}

#[test]
fn invalid_fields_point_at_themselves() {
    expect(
        |b| b["model"]["dynamics"]["rates"]["vel"] = json!("(force - drag*vell)/mass"),
        422,
        "/model/dynamics/rates/vel",
    );
    expect(
        |b| b["model"]["sensors"]["encoder"]["measures"] = json!("pos +"),
        422,
        "/model/sensors/encoder/measures",
    );
    expect(
        |b| b["model"]["sensors"]["encoder"]["std"] = json!(-1.0),
        422,
        "/model/sensors/encoder/std",
    );
    expect(
        |b| b["model"]["sensors"]["pair"]["covariance"] = json!([[1.0, 2.0], [2.0, 1.0]]),
        422,
        "/model/sensors/pair/covariance",
    );
    expect(
        |b| b["model"]["sensors"]["pair"]["covariance"] = json!([[1.0, 0.1], [0.2, 1.0]]),
        422,
        "/model/sensors/pair/covariance",
    );
    expect(
        |b| b["model"]["sensors"]["pair"]["covariance"] = json!([[1.0, 0.0]]),
        422,
        "/model/sensors/pair/covariance",
    );
    expect(
        |b| b["model"]["states"] = json!(["pos", "pos"]),
        422,
        "/model/states/1",
    );
    expect(
        |b| b["model"]["states"] = json!(["pos", "t"]),
        422,
        "/model/states/1",
    );
    expect(
        |b| b["model"]["dynamics"] = json!({"rates": {}, "next": {}}),
        422,
        "/model/dynamics",
    );
    expect(
        |b| b["model"]["dynamics"]["rates"]["speed"] = json!("1"),
        422,
        "/model/dynamics/rates/speed",
    );
    expect(
        |b| b["model"]["process_noise"] = json!({"covariance": [[1.0, 0.0], [0.0, 1.0]]}),
        422,
        "/model/process_noise/covariance",
    );
    expect(
        |b| b["model"]["parameters"]["drag"]["std"] = json!(0),
        422,
        "/model/parameters/drag/std",
    );
    expect(
        |b| b["model"]["colour"] = json!("red"),
        422,
        "/model/colour",
    );
    expect(
        |b| b["filter"]["method"] = json!("kalman"),
        422,
        "/filter/method",
    );
    expect(|b| b["filter"] = json!({}), 422, "/filter/method");
    expect(
        |b| b["filter"]["ensemble"] = json!({"members": 0}),
        422,
        "/filter/ensemble/members",
    );
    expect(
        |b| b["filter"]["ensemble"] = json!({"members": 100000000}),
        422,
        "/filter/ensemble/members",
    );
    expect(
        |b| b["filter"]["gate"] = json!({"probability": 1.5}),
        422,
        "/filter/gate/probability",
    );
    expect(
        |b| b["prior"]["std"]["vel"] = json!("five"),
        422,
        "/prior/std/vel",
    );
    expect(
        |b| b["prior"]["mean"] = json!({"pos": 0.0}),
        422,
        "/prior/mean/vel",
    );
    expect(|b| b["prior"]["t"] = json!("yesterday"), 422, "/prior/t");
    expect(
        |b| b["measurements"][1]["t"] = json!(0.05),
        422,
        "/measurements/1/t",
    );
    expect(
        |b| b["measurements"][0]["values"]["encoderr"] = json!(1.0),
        422,
        "/measurements/0/values/encoderr",
    );
    expect(
        |b| b["measurements"][1]["values"]["pair"] = json!([1.0]),
        422,
        "/measurements/1/values/pair",
    );
    expect(
        |b| b["measurements"][1]["values"]["encoder"] = json!("1.0"),
        422,
        "/measurements/1/values/encoder",
    );
    expect(
        |b| b["measurements"][0]["t"] = json!("2026-01-01T00:00:00Z"),
        422,
        "/measurements/0/t",
    );
    expect(
        |b| b["measurements"][0]["inputs"] = json!({"thrust": 1.0}),
        422,
        "/measurements/0/inputs/thrust",
    );
    expect(
        |b| b["measurements"] = json!({"t": 1}),
        422,
        "/measurements",
    );
    expect(
        |b| {
            b.as_object_mut()
                .unwrap()
                .remove("prior")
                .map(|_| ())
                .unwrap()
        },
        422,
        "/prior",
    );
    expect(|b| b["extra"] = json!(1), 422, "/extra");
}

#[test]
fn formula_errors_carry_columns() {
    let mut b = good();
    b["model"]["dynamics"]["rates"]["vel"] = json!("(force - drag*vell)/mass");
    let p = estimate(&b).unwrap_err();
    let e = p
        .errors
        .iter()
        .find(|e| e.pointer == "/model/dynamics/rates/vel")
        .unwrap();
    assert_eq!(e.column, Some(15), "{e:?}");
    assert!(
        e.detail.contains("vell") && e.detail.contains("vel"),
        "{}",
        e.detail
    );
}

#[test]
fn hostile_formulas_are_refused_cleanly() {
    let deep = format!("{}pos{}", "(".repeat(100_000), ")".repeat(100_000));
    let mut b = good();
    b["model"]["sensors"]["encoder"]["measures"] = json!(deep);
    let p = estimate(&b).unwrap_err();
    assert_eq!(p.status, 422);
    let mut b = good();
    b["model"]["sensors"]["encoder"]["measures"] = json!(format!("{}pos", "-".repeat(3000)));
    assert_eq!(estimate(&b).unwrap_err().status, 422);
}

#[test]
fn syntax_errors_are_400() {
    let never = tacit::job::Stop::never();
    for body in [&b"{"[..], b"", b"{\"model\": }", b"[1,2", b"\xff\xfe"] {
        let p = tacit::job::estimate(body, &Default::default(), &never).unwrap_err();
        assert_eq!(p.status, 400, "{:?}: {p}", String::from_utf8_lossy(body));
    }
}

#[test]
fn diverging_filter_fails_with_a_clear_error_not_nan() {
    let mut b = good();
    b["model"]["dynamics"]["rates"]["vel"] = json!("exp(vel*1000)");
    b["filter"]["method"] = json!("ekf");
    b["prior"]["mean"]["vel"] = json!(1.0);
    let p = estimate(&b).unwrap_err();
    assert_eq!(p.status, 422, "{p}");
    assert!(p.detail.contains("step 1"), "{p}");
}

/// Issue 10: a numerical failure names the formula where it arose. A water tower whose
/// outflow formula takes the square root of a head that turns negative gives NaN inside
/// the integration; the answer names the state whose rate formula it is, for the mean's
/// integration (ekf) and the sigma points' (ukf).
#[test]
fn a_rate_formula_that_turns_non_finite_is_named() {
    for method in ["ekf", "ukf"] {
        let body = json!({
            "model": {"states": ["level", "inflow"],
                      "dynamics": {"rates": {"level": "inflow - 0.3*sqrt(level - 4.5)", "inflow": "0"}},
                      "process_noise": {"density": {"inflow": 1e-4}},
                      "sensors": {"gauge": {"measures": "level", "std": 0.01}}},
            "filter": {"method": method},
            "prior": {"t": 0.0, "mean": {"level": 4.0, "inflow": 0.0},
                      "std": {"level": 0.01, "inflow": 0.01}},
            "measurements": [{"t": 1.0, "values": {"gauge": 4.0}}]
        });
        let p = estimate(&body).unwrap_err();
        assert!(
            p.detail
                .contains("in the rate formula of state \"level\" during integration"),
            "{method}: {p}"
        );
    }
}

#[test]
fn observability_of_position_and_velocity_sensors() {
    // Constant velocity (common practice): position readings recover velocity; velocity
    // readings do not recover position.
    let body = json!({"model": {
        "states": ["pos", "vel"],
        "dynamics": {"linear": {"time": "continuous", "A": [[0.0, 1.0], [0.0, 0.0]]}},
        "sensors": {"encoder": {"measures": "pos", "std": 0.01}, "tacho": {"measures": "vel", "std": 0.01}}
    }});
    let out = check(&body).unwrap();
    assert_eq!(out["observability"]["rank"], json!(2));
    assert_eq!(
        out["observability"]["by_sensor"]["encoder"]["unobservable"],
        json!([])
    );
    assert_eq!(
        out["observability"]["by_sensor"]["tacho"]["unobservable"],
        json!(["pos"])
    );
    assert_eq!(out["observability"]["by_sensor"]["tacho"]["rank"], json!(1));
}

#[test]
fn observability_of_a_nonlinear_model_with_a_parameter() {
    // Water tower: level' = (k·√(|level|+1) − draw)/area, read by a level sensor; the
    // draw-off is a constant disturbance state. With k known, level and draw are
    // recoverable; a state that nothing touches is not. With k estimated too, k and draw
    // both enter the level rate as constants, so the linearised model cannot tell them
    // apart (rank argument, common practice).
    let body = |k: Value| {
        json!({"model": {
            "states": ["level", "draw", "ghost"],
            "parameters": {"area": 12.0, "k": k},
            "dynamics": {"rates": {"level": "(k*sqrt(abs(level)+1) - draw)/area"}},
            "sensors": {"gauge": {"measures": "level", "std": 0.01}}
        }, "prior": {"t": 0.0, "mean": {"level": 4.0, "draw": 0.3, "ghost": 0.0}, "std": {"level": 1.0, "draw": 1.0, "ghost": 1.0}}})
    };
    let out = check(&body(json!(0.5))).unwrap();
    assert_eq!(out["observability"]["unobservable"], json!(["ghost"]));
    assert_eq!(out["observability"]["rank"], json!(2));
    assert!(out["warnings"]
        .as_array()
        .unwrap()
        .iter()
        .any(|w| w.as_str().unwrap().contains("ghost")));
    let out = check(&body(json!({"initial": 0.5, "std": 0.1}))).unwrap();
    assert_eq!(
        out["observability"]["unobservable"],
        json!(["draw", "ghost", "k"])
    );
    assert_eq!(out["observability"]["rank"], json!(2));
}

#[test]
fn every_missing_section_is_reported_at_once() {
    let never = tacit::job::Stop::never();
    let p = tacit::job::estimate(br#"{"model": 1}"#, &Default::default(), &never).unwrap_err();
    assert_eq!(p.status, 422);
    let pointers: Vec<&str> = p.errors.iter().map(|e| e.pointer.as_str()).collect();
    assert!(
        pointers.contains(&"/filter") && pointers.contains(&"/prior"),
        "{p}"
    );
    let p = tacit::job::estimate(
        br#"{"model": 1, "filter": {"method": "ekf"}, "prior": {}, "measurements": []}"#,
        &Default::default(),
        &never,
    )
    .unwrap_err();
    assert!(
        p.errors
            .iter()
            .any(|e| e.pointer == "/model" && e.detail.contains("expected an object")),
        "{p}"
    );
}

#[test]
fn a_long_stiff_gap_stops_at_the_compute_deadline() {
    // A stiff rate (λ = −10⁶ against a slowly moving target) over one gap of 1000 s: an
    // explicit Runge–Kutta pair needs steps of a few microseconds, about 3·10⁸ of them, so
    // it would give up only at its step limit (10⁶ steps). With a 5 ms budget the
    // integrator must notice the deadline inside that one gap and answer 503, rather
    // than run on until the step limit turns it into a numerical failure (422).
    let body = json!({
        "model": {
            "states": ["x"],
            "dynamics": {"rates": {"x": "-1e6*(x - sin(t))"}},
            "process_noise": {"density": {"x": 0.01}},
            "sensors": {"gauge": {"measures": "x", "std": 0.1}}
        },
        "filter": {"method": "ekf"},
        "prior": {"t": 0.0, "mean": {"x": 0.0}, "std": {"x": 1.0}},
        "measurements": [{"t": 1000.0, "values": {"gauge": 0.5}}]
    });
    let bytes = serde_json::to_vec(&body).unwrap();
    let limits = tacit::config::Limits::default();
    let budget = tacit::job::Stop::within(Some(std::time::Duration::from_millis(5)));
    let p = tacit::job::estimate(&bytes, &limits, &budget).unwrap_err();
    assert_eq!(p.status, 503, "{p}");
    assert!(p.detail.contains("compute deadline"), "{p}");
    assert!(p.detail.contains("line 1"), "{p}");
    // Without a deadline the same request ends at the integrator's step limit instead.
    let p = tacit::job::estimate(&bytes, &limits, &tacit::job::Stop::never()).unwrap_err();
    assert_eq!(p.status, 422, "{p}");
    assert!(p.detail.contains("too many integration steps"), "{p}");
}
