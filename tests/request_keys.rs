//! Hardening of request reading (issue 15, items 13 and 8): a key given twice in one
//! object is refused everywhere in a request, at the pointer of its second occurrence,
//! rather than the last value silently winning; and a model over the state-count limit is
//! refused for its count before its names are checked one by one.
//!
//! Bodies are written as text: a JSON tree in memory cannot hold a repeated key. The
//! scenario is a water tower whose level `p` is filled by a pump and read by a gauge.

use tacit::config::Limits;
use tacit::job::Stop;
use tacit::job::{self, StreamSession};
use tacit::problem::Problem;

static NOT_CANCELLED: Stop = Stop::never();

const MODEL: &str = r#"{"states": ["p"], "inputs": ["pump"], "parameters": {"area": 2.0},
    "dynamics": {"rates": {"p": "pump/area"}},
    "process_noise": {"density": {"p": 0.01}},
    "sensors": {"gauge": {"measures": "p", "std": 0.05}}}"#;
const FILTER: &str = r#"{"method": "ekf"}"#;
const PRIOR: &str = r#"{"t": 0, "mean": {"p": 0}, "std": {"p": 0.5}}"#;
const LINE: &str = r#"{"t": 1, "values": {"gauge": 0.1}, "inputs": {"pump": 0.2}}"#;

/// An estimate body from its sections' texts.
fn body(model: &str, filter: &str, prior: &str, line: &str) -> String {
    format!(
        r#"{{"model": {model}, "filter": {filter}, "prior": {prior}, "measurements": [{line}]}}"#
    )
}

/// The problem's status and its (pointer, detail) pairs.
fn refused(r: Result<job::Done, Problem>) -> (u16, Vec<(String, String)>) {
    let p = r.expect_err("the request should be refused");
    let errors = p
        .errors
        .into_iter()
        .map(|e| (e.pointer, e.detail))
        .collect();
    (p.status, errors)
}

fn estimate(body: &str) -> (u16, Vec<(String, String)>) {
    refused(job::estimate(
        body.as_bytes(),
        &Limits::default(),
        &NOT_CANCELLED,
    ))
}

/// A 422 with exactly one error, at `pointer`, naming `key` as repeated.
fn assert_repeated(got: (u16, Vec<(String, String)>), pointer: &str, key: &str) {
    assert_eq!(
        got,
        (
            422,
            vec![(
                pointer.to_string(),
                format!("'{key}' appears twice in this object")
            )]
        )
    );
}

#[test]
fn the_base_request_is_accepted() {
    // Without this the refusals below could come from something else in the body.
    let b = body(MODEL, FILTER, PRIOR, LINE);
    job::estimate(b.as_bytes(), &Limits::default(), &NOT_CANCELLED)
        .unwrap_or_else(|p| panic!("{p}"));
}

#[test]
fn a_repeated_prior_mean_key_is_refused_not_the_last_taken() {
    // The issue's input: prior.mean {"p": 0, "p": 5}.
    let prior = r#"{"t": 0, "mean": {"p": 0, "p": 5}, "std": {"p": 0.5}}"#;
    assert_repeated(
        estimate(&body(MODEL, FILTER, prior, LINE)),
        "/prior/mean/p",
        "p",
    );
    let smooth = body(MODEL, FILTER, prior, LINE);
    assert_repeated(
        refused(job::smooth(
            smooth.as_bytes(),
            &Limits::default(),
            &NOT_CANCELLED,
        )),
        "/prior/mean/p",
        "p",
    );
    // /v1/check reads the prior as an optional section.
    let check = format!(r#"{{"model": {MODEL}, "prior": {prior}}}"#);
    assert_repeated(
        refused(job::check(
            check.as_bytes(),
            &Limits::default(),
            &NOT_CANCELLED,
        )),
        "/prior/mean/p",
        "p",
    );
}

#[test]
fn a_repeated_filter_method_is_refused_not_the_last_taken() {
    // The issue's input: filter.method given twice.
    let filter = r#"{"method": "ekf", "method": "ukf"}"#;
    assert_repeated(
        estimate(&body(MODEL, filter, PRIOR, LINE)),
        "/filter/method",
        "method",
    );
}

#[test]
fn repeated_keys_are_refused_in_every_object_of_the_model_and_output() {
    let cases = [
        (
            MODEL.replace(r#""area": 2.0"#, r#""area": 2.0, "area": 3.0"#),
            "/model/parameters/area",
            "area",
        ),
        (
            MODEL.replace(r#""p": "pump/area""#, r#""p": "pump/area", "p": "0""#),
            "/model/dynamics/rates/p",
            "p",
        ),
        (
            MODEL.replace(r#""std": 0.05"#, r#""std": 0.05, "std": 5"#),
            "/model/sensors/gauge/std",
            "std",
        ),
        (
            MODEL.replace(
                r#""states": ["p"],"#,
                r#""states": ["p"], "states": ["q"],"#,
            ),
            "/model/states",
            "states",
        ),
    ];
    for (model, pointer, key) in cases {
        assert_repeated(estimate(&body(&model, FILTER, PRIOR, LINE)), pointer, key);
    }
    // The optional output section, and a key whose pointer needs escaping (RFC 6901 §3).
    let b = body(MODEL, FILTER, PRIOR, LINE).replace(
        r#""measurements""#,
        r#""output": {"covariance": "std", "a/b": 1, "a/b": 2}, "measurements""#,
    );
    assert_repeated(estimate(&b), "/output/a~1b", "a/b");
}

#[test]
fn a_repeated_top_level_section_is_refused() {
    let b = body(MODEL, FILTER, PRIOR, LINE)
        .replace(r#""prior""#, r#""filter": {"method": "ukf"}, "prior""#);
    assert_repeated(estimate(&b), "/filter", "filter");
}

#[test]
fn repeated_keys_are_refused_in_measurement_lines() {
    let cases = [
        (
            r#"{"t": 1, "t": 2, "values": {"gauge": 0.1}}"#,
            "/measurements/0/t",
            "t",
        ),
        (
            r#"{"t": 1, "values": {"gauge": 0.1, "gauge": 0.3}}"#,
            "/measurements/0/values/gauge",
            "gauge",
        ),
        (
            r#"{"t": 1, "values": {"gauge": 0.1}, "inputs": {"pump": 0.2, "pump": 0.9}}"#,
            "/measurements/0/inputs/pump",
            "pump",
        ),
        (
            r#"{"t": 1, "values": {"gauge": 0.1}, "noise_std": {"gauge": 0.1, "gauge": 9}}"#,
            "/measurements/0/noise_std/gauge",
            "gauge",
        ),
    ];
    for (line, pointer, key) in cases {
        assert_repeated(estimate(&body(MODEL, FILTER, PRIOR, line)), pointer, key);
    }
    // Many inputs on one line: found through a set, at the second occurrence.
    let many: Vec<String> = (0..40).map(|i| format!(r#""u{i}": 1"#)).collect();
    let line = format!(
        r#"{{"t": 1, "inputs": {{{}, "pump": 1, "u7": 2}}}}"#,
        many.join(", ")
    );
    let (status, errors) = estimate(&body(MODEL, FILTER, PRIOR, &line));
    assert_eq!(status, 422);
    assert!(
        errors.contains(&(
            "/measurements/0/inputs/u7".to_string(),
            "'u7' appears twice in this object".to_string()
        )),
        "{errors:?}"
    );
}

#[test]
fn repeated_keys_are_refused_in_a_simulation() {
    let sim = |prior: &str, extra: &str| {
        let b = format!(r#"{{"model": {MODEL}, "prior": {prior}, "times": [1, 2]{extra}}}"#);
        refused(job::simulate(
            b.as_bytes(),
            &Limits::default(),
            &NOT_CANCELLED,
        ))
    };
    let prior = r#"{"t": 0, "mean": {"p": 0}, "std": {"p": 0.5}, "inputs": {"pump": 0}}"#;
    assert_repeated(
        sim(
            r#"{"t": 0, "mean": {"p": 0, "p": 5}, "std": {"p": 0.5}}"#,
            "",
        ),
        "/prior/mean/p",
        "p",
    );
    assert_repeated(
        sim(
            prior,
            r#", "inputs": [{"t": 1, "inputs": {"pump": 1, "pump": 2}}]"#,
        ),
        "/inputs/0/inputs/pump",
        "pump",
    );
    assert_repeated(
        sim(prior, r#", "sampling": {"gauge": [1], "gauge": [2]}"#),
        "/sampling/gauge",
        "gauge",
    );
}

#[test]
fn repeated_keys_are_refused_in_the_stream_header_and_lines() {
    let header =
        |filter: &str| format!(r#"{{"model": {MODEL}, "filter": {filter}, "prior": {PRIOR}}}"#);
    let p = StreamSession::start(
        header(r#"{"method": "ekf", "method": "ukf"}"#).as_bytes(),
        &Limits::default(),
        &NOT_CANCELLED,
    )
    .err()
    .expect("a header with a repeated key should be refused");
    assert_eq!(p.status, 422);
    assert_eq!(
        (p.errors[0].pointer.as_str(), p.errors[0].detail.as_str()),
        ("/filter/method", "'method' appears twice in this object")
    );
    let mut s = StreamSession::start(
        header(FILTER).as_bytes(),
        &Limits::default(),
        &NOT_CANCELLED,
    )
    .unwrap_or_else(|p| panic!("{p}"));
    let mut out = Vec::new();
    let p = s
        .push(
            br#"{"t": 1, "values": {"gauge": 0.1, "gauge": 0.3}}"#,
            1,
            &mut out,
        )
        .expect_err("a line with a repeated key should be refused");
    assert_eq!(p.status, 422);
    assert!(
        p.errors[0].pointer.ends_with("/values/gauge")
            && p.errors[0].detail == "'gauge' appears twice in this object",
        "{p}"
    );
}

#[test]
fn two_hundred_thousand_state_names_are_refused_for_their_count_first() {
    // The issue's input: 200,000 state names (about 2.1 MB). Refusing them for the limit
    // and nothing else shows the count is checked before the names; a duplicate and a
    // reserved name among them would otherwise be reported too.
    let mut names: Vec<String> = (0..200_000).map(|i| format!("\"s{i:06}\"")).collect();
    names[7] = "\"s000003\"".to_string();
    names[9] = "\"dt\"".to_string();
    let model = format!(
        r#"{{"states": [{}], "dynamics": {{"rates": {{}}}}, "sensors": {{"gauge": {{"measures": "s000000", "std": 1}}}}}}"#,
        names.join(", ")
    );
    assert!(model.len() > 2_000_000, "{}", model.len());
    let got = estimate(&body(&model, FILTER, r#"{"t": 0}"#, LINE));
    assert_eq!(
        got,
        (
            422,
            vec![(
                "/model/states".to_string(),
                "200000 states (with estimated parameters) exceed the limit of 256".to_string()
            )]
        )
    );
}
