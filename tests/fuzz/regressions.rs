//! One test per defect the fuzzers found, named after it.

use super::corpus;
use serde_json::{json, Value};
use tacit::config::Limits;
use tacit::job::Stop;

/// The pointer of some object member that is `null`, if any.
fn null_member(v: &Value, at: &str) -> Option<String> {
    match v {
        Value::Object(o) => o.iter().find_map(|(k, x)| {
            let p = format!("{at}/{k}");
            if x.is_null() {
                Some(p)
            } else {
                null_member(x, &p)
            }
        }),
        Value::Array(a) => a
            .iter()
            .enumerate()
            .find_map(|(i, x)| null_member(x, &format!("{at}/{i}"))),
        _ => None,
    }
}

/// Found by `tests/fuzz/schema.sh`: `/v1/calibrate` echoed an optional field sent as `null`
/// (which counts as absent) in its `request`, which the schema's `EstimateRequest` refuses
/// (`output.innovations` is a boolean, a reading's `noise_std` an object). The echo now
/// leaves such members out.
#[test]
fn calibrate_echo_leaves_out_optional_fields_sent_as_null() {
    let (_, text) = corpus("request")
        .into_iter()
        .find(|(n, _)| n.starts_with("calibrate-"))
        .expect("a calibrate request in the corpus");
    let mut req: Value = serde_json::from_str(&text).unwrap();
    req["output"] = json!({"innovations": null, "covariance": null});
    req["filter"]["max_gap"] = Value::Null;
    let sent = req["measurements"].clone();
    req["measurements"][0]["noise_std"] = Value::Null;
    let body = serde_json::to_vec(&req).unwrap();
    let done = tacit::job::calibrate(&body, &Limits::default(), &Stop::never(), &|_, _| {})
        .unwrap_or_else(|p| panic!("calibrate refused: {p}"));
    let answer: Value = serde_json::from_slice(&done.body).unwrap();
    let echoed = &answer["request"];
    assert_eq!(null_member(echoed, ""), None, "{echoed}");
    assert!(echoed["output"].as_object().is_some_and(|o| o.is_empty()));
    assert!(echoed["filter"].get("max_gap").is_none());
    // The readings are echoed as sent, less the null member.
    assert_eq!(echoed["measurements"], sent);
}

/// Found by the request fuzzer: a `/v1/simulate` grid whose `step` (or `start`) runs past
/// i128 nanoseconds overflowed the sum `start + k·step` (a panic where overflow is
/// checked, wrapped times elsewhere). It is now a 422 at `/times/step` (or `start`).
#[test]
fn simulate_grid_past_the_range_of_times_is_a_422_at_step() {
    let (_, text) = corpus("request")
        .into_iter()
        .find(|(n, _)| n.starts_with("simulate-crane"))
        .expect("a simulate request in the corpus");
    let base: Value = serde_json::from_str(&text).unwrap();
    for (times, at) in [
        (
            json!({"start": 0, "step": 1e300, "count": 3}),
            "/times/step",
        ),
        (
            json!({"start": 0, "step": 1e28, "count": 1_000_000}),
            "/times/step",
        ),
        (
            json!({"start": 1e300, "step": 1, "count": 1}),
            "/times/start",
        ),
    ] {
        let mut req = base.clone();
        req["times"] = times.clone();
        let body = serde_json::to_vec(&req).unwrap();
        let p =
            tacit::job::simulate(&body, &Limits::default(), &Stop::never()).expect_err("refused");
        assert_eq!(p.status, 422, "{times}: {p}");
        assert!(
            p.errors.iter().any(|e| e.pointer == at),
            "{times}: {:?}",
            p.errors
        );
    }
}

/// Found by the request fuzzer: an unknown top-level member's pointer was its name
/// unescaped (`/~eed` for the key `~eed`), not an RFC 6901 pointer (RFC 6901 §3: `~` is
/// written `~0`, `/` is written `~1`); a name holding a backquote was cut at it.
#[test]
fn unknown_top_level_member_pointer_is_escaped_per_rfc_6901() {
    let (_, text) = corpus("request")
        .into_iter()
        .find(|(n, _)| n.starts_with("estimate-crane"))
        .expect("an estimate request in the corpus");
    let base: Value = serde_json::from_str(&text).unwrap();
    for (key, pointer) in [("~eed", "/~0eed"), ("a/b", "/a~1b"), ("a`b", "/a`b")] {
        let mut req = base.clone();
        req[key] = json!(1);
        let body = serde_json::to_vec(&req).unwrap();
        let p =
            tacit::job::estimate(&body, &Limits::default(), &Stop::never()).expect_err("refused");
        assert_eq!(p.status, 422, "{key}: {p}");
        let at: Vec<&str> = p.errors.iter().map(|e| e.pointer.as_str()).collect();
        assert_eq!(at, [pointer], "{key}: {p}");
    }
}
