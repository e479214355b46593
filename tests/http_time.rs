//! Times as users write them, over a real HTTP server: each timestamp is answered in the
//! offset and form it came in; offset-less historian times are read in the request's
//! `time_zone` (IANA tz rules across daylight-saving changes) or refused with what to
//! add; a stream that fails mid-way first sends its last good `{posterior, summary}` so
//! the client resumes exactly. Contract: openapi/openapi.yaml and ../shared/API-v2.md
//! ("Robustness options").

use crate::support::{assert_pointer, assert_problem, post, post_json, start_default, Server};
use serde_json::{json, Value};

/// A bottling conveyor: belt position (m) and speed (m/s), read by a position encoder.
fn conveyor(process_noise: bool) -> Value {
    let mut m = json!({
      "states": ["pos", "speed"],
      "dynamics": {"rates": {"pos": "speed"}},
      "sensors": {"encoder": {"measures": "pos", "std": 0.05}}
    });
    if process_noise {
        m["process_noise"] = json!({"density": {"speed": 0.01}});
    }
    m
}

fn prior_at(t: Value) -> Value {
    json!({"t": t, "mean": {"pos": 0.0, "speed": 0.5}, "std": {"pos": 0.2, "speed": 0.1}})
}

fn texts(list: &Value, key: &str) -> Vec<String> {
    list.as_array()
        .unwrap_or_else(|| panic!("not a list: {list}"))
        .iter()
        .map(|e| e[key].as_str().unwrap_or("").to_string())
        .collect()
}

#[tokio::test]
async fn estimate_echoes_each_time_in_the_offset_it_came_in() {
    let s = start_default().await;
    // Five instants one second apart from 05:00:00 UTC (RFC 3339 §5.6: local time minus
    // offset is UTC), each written its own way.
    let times = [
        "2026-03-01T05:00:01Z",
        "2026-02-28T23:30:02-05:30",
        "2026-03-01T06:00:03.25+01:00",
        "2026-03-01 05:00:04.125Z",
    ];
    let lines: Vec<Value> = times
        .iter()
        .enumerate()
        .map(|(k, t)| json!({"t": t, "values": {"encoder": 0.5 * (k + 1) as f64}}))
        .collect();
    // No process noise: the run warns (`no_process_noise`), at the prior's time.
    let body = json!({
        "model": conveyor(false), "filter": {"method": "ekf"},
        "prior": prior_at(json!("2026-03-01T06:00:00+01:00")),
        "measurements": lines,
        "output": {"at": ["2026-03-01T07:00:05.5+02:00"]}
    });
    let a = post_json(&s, "/v1/estimate", &body).await;
    assert_eq!(a.status, 200, "{}", a.text);
    assert_eq!(texts(&a.body["estimates"], "t"), times);
    assert_eq!(a.body["posterior"]["t"], "2026-03-01 05:00:04.125Z");
    assert_eq!(
        texts(&a.body["predictions"], "t"),
        ["2026-03-01T07:00:05.5+02:00"]
    );
    let warnings = &a.body["summary"]["warnings"];
    let np = warnings
        .as_array()
        .unwrap()
        .iter()
        .find(|w| w["kind"] == "no_process_noise")
        .unwrap_or_else(|| panic!("no no_process_noise warning: {warnings}"));
    assert_eq!(np["at_t"], "2026-03-01T06:00:00+01:00");

    // The same run written all in UTC gives the same numbers: only the text differs.
    let mut utc = body.clone();
    utc["prior"]["t"] = json!("2026-03-01T05:00:00Z");
    for (k, t) in [
        "2026-03-01T05:00:01Z",
        "2026-03-01T05:00:02Z",
        "2026-03-01T05:00:03.25Z",
        "2026-03-01T05:00:04.125Z",
    ]
    .iter()
    .enumerate()
    {
        utc["measurements"][k]["t"] = json!(t);
    }
    utc["output"]["at"] = json!(["2026-03-01T05:00:05.5Z"]);
    let b = post_json(&s, "/v1/estimate", &utc).await;
    assert_eq!(b.status, 200, "{}", b.text);
    for (x, y) in a.body["estimates"]
        .as_array()
        .unwrap()
        .iter()
        .zip(b.body["estimates"].as_array().unwrap())
    {
        assert_eq!(x["mean"], y["mean"]);
        assert_eq!(x["covariance"], y["covariance"]);
    }
    assert_eq!(a.body["posterior"]["mean"], b.body["posterior"]["mean"]);
}

/// The four local times around the spring change in Berlin and the same instants in UTC:
/// on Sunday 2026-03-29 clocks jump from 02:00 to 03:00 local, 01:00 UTC (EU rule,
/// Directive 2000/84/EC; IANA tz Europe/Berlin; common practice).
const LOCAL: [&str; 4] = [
    "2026-03-29 00:30:00",
    "2026-03-29 01:30:00",
    "2026-03-29 03:30:00",
    "2026-03-29 04:30:00",
];
const SAME_IN_UTC: [&str; 4] = [
    "2026-03-28T23:30:00Z",
    "2026-03-29T00:30:00Z",
    "2026-03-29T01:30:00Z",
    "2026-03-29T02:30:00Z",
];

fn local_body(times: &[&str], prior_t: &str, zone: Option<&str>) -> Value {
    // Prediction-only lines (no readings): the position moves by speed × filter time.
    let lines: Vec<Value> = times.iter().map(|t| json!({"t": t})).collect();
    let mut b = json!({"model": conveyor(true), "filter": {"method": "ekf"},
                       "prior": prior_at(json!(prior_t)), "measurements": lines});
    if let Some(z) = zone {
        b["time_zone"] = json!(z);
    }
    b
}

#[tokio::test]
async fn offset_less_times_are_read_in_the_time_zone_across_the_spring_change() {
    let s = start_default().await;
    let a = post_json(
        &s,
        "/v1/estimate",
        &local_body(&LOCAL, "2026-03-29 00:00:00", Some("Europe/Berlin")),
    )
    .await;
    assert_eq!(a.status, 200, "{}", a.text);
    // Echoed offset-less, as they came.
    assert_eq!(texts(&a.body["estimates"], "t"), LOCAL);
    assert_eq!(a.body["posterior"]["t"], "2026-03-29 04:30:00");
    // 00:30 → 03:30 local is 2 h of filter time: at 0.5 m/s the belt moves 3600 m, not
    // 5400 (the prior speed is kept: no readings, zero-mean process noise).
    let pos = |k: usize| a.body["estimates"][k]["mean"]["pos"].as_f64().unwrap();
    assert_eq!(pos(0), 900.0);
    assert_eq!(pos(2) - pos(0), 3600.0);
    // The same instants written in UTC give the same numbers.
    let b = post_json(
        &s,
        "/v1/estimate",
        &local_body(&SAME_IN_UTC, "2026-03-28T23:00:00Z", None),
    )
    .await;
    assert_eq!(b.status, 200, "{}", b.text);
    for k in 0..4 {
        assert_eq!(
            a.body["estimates"][k]["mean"], b.body["estimates"][k]["mean"],
            "{k}"
        );
        assert_eq!(
            a.body["estimates"][k]["covariance"], b.body["estimates"][k]["covariance"],
            "{k}"
        );
    }
}

#[tokio::test]
async fn an_offset_less_time_without_time_zone_says_what_to_add() {
    let s = start_default().await;
    let a = post_json(
        &s,
        "/v1/estimate",
        &local_body(&LOCAL, "2026-03-28T23:00:00Z", None),
    )
    .await;
    assert_problem(&a, 422);
    assert_pointer(&a, "/measurements/0/t");
    let err = &a.body["errors"][0];
    assert_eq!(err["pointer"], "/measurements/0/t");
    assert_eq!(
        err["detail"],
        "\"2026-03-29 00:30:00\" has no UTC offset: add one to the time, such as \"Z\" (UTC) \
         or \"+01:00\" (\"2026-03-01T06:00:10+01:00\"), or give the request a top-level \
         \"time_zone\" such as \"Europe/Berlin\" to read times without an offset in that zone"
    );
    // In the prior too, and in the output times.
    let a = post_json(
        &s,
        "/v1/estimate",
        &local_body(&SAME_IN_UTC, "2026-03-29T00:00:00", None),
    )
    .await;
    assert_problem(&a, 422);
    assert_pointer(&a, "/prior/t");
    let mut b = local_body(&SAME_IN_UTC, "2026-03-28T23:00:00Z", None);
    b["output"] = json!({"at": ["2026-03-29 06:00:00"]});
    let a = post_json(&s, "/v1/estimate", &b).await;
    assert_problem(&a, 422);
    assert_pointer(&a, "/output/at/0");
}

#[tokio::test]
async fn an_unknown_or_malformed_time_zone_is_422_at_time_zone() {
    let s = start_default().await;
    for (zone, says) in [
        (json!("Europe/Berln"), "unknown time zone 'Europe/Berln'"),
        (json!("+01:00"), "unknown time zone '+01:00'"),
        (json!(1), "time_zone is an IANA time zone name"),
    ] {
        let mut b = local_body(&LOCAL, "2026-03-29 00:00:00", None);
        b["time_zone"] = zone.clone();
        let a = post_json(&s, "/v1/estimate", &b).await;
        assert_problem(&a, 422);
        assert_eq!(a.body["errors"][0]["pointer"], "/time_zone", "{}", a.text);
        let detail = a.body["errors"][0]["detail"].as_str().unwrap();
        assert!(detail.contains(says), "{zone}: {detail}");
    }
}

#[tokio::test]
async fn a_local_time_in_the_spring_gap_is_422_at_its_line() {
    let s = start_default().await;
    let times = ["2026-03-29 01:30:00", "2026-03-29 02:30:00"];
    let a = post_json(
        &s,
        "/v1/estimate",
        &local_body(&times, "2026-03-29 00:00:00", Some("Europe/Berlin")),
    )
    .await;
    assert_problem(&a, 422);
    assert_eq!(a.body["errors"][0]["pointer"], "/measurements/1/t");
    let detail = a.body["errors"][0]["detail"].as_str().unwrap();
    assert!(
        detail
            .starts_with("the local time \"2026-03-29 02:30:00\" does not exist in Europe/Berlin"),
        "{detail}"
    );
}

#[tokio::test]
async fn every_endpoint_that_reads_times_takes_the_time_zone() {
    let s = start_default().await;
    let zone = "Europe/Berlin";
    // Smooth: echoed like the estimate.
    let a = post_json(
        &s,
        "/v1/smooth",
        &local_body(&LOCAL, "2026-03-29 00:00:00", Some(zone)),
    )
    .await;
    assert_eq!(a.status, 200, "{}", a.text);
    assert_eq!(texts(&a.body["estimates"], "t"), LOCAL);
    // Simulate: an hourly grid from local midnight follows the wall clock across the
    // change (01:00 → 03:00), and its readings go straight back into an estimate.
    let sim = json!({"model": conveyor(true), "prior": prior_at(json!("2026-03-29 00:00:00")),
                     "times": {"start": "2026-03-29 01:00:00", "step": 3600, "count": 3},
                     "seed": 3, "time_zone": zone});
    let a = post_json(&s, "/v1/simulate", &sim).await;
    assert_eq!(a.status, 200, "{}", a.text);
    assert_eq!(
        texts(&a.body["truth"], "t"),
        [
            "2026-03-29 01:00:00",
            "2026-03-29 03:00:00",
            "2026-03-29 04:00:00"
        ]
    );
    let mut est = local_body(&[], "2026-03-29 00:00:00", Some(zone));
    est["measurements"] = a.body["measurements"].clone();
    let e = post_json(&s, "/v1/estimate", &est).await;
    assert_eq!(e.status, 200, "{}", e.text);
    assert_eq!(
        texts(&e.body["estimates"], "t"),
        texts(&a.body["truth"], "t")
    );
    // Check: the prior's offset-less time needs the zone too.
    let mut chk = json!({"model": conveyor(true), "prior": prior_at(json!("2026-03-29 00:00:00"))});
    let a = post_json(&s, "/v1/check", &chk).await;
    assert_problem(&a, 422);
    assert_pointer(&a, "/prior/t");
    chk["time_zone"] = json!(zone);
    let a = post_json(&s, "/v1/check", &chk).await;
    assert_eq!(a.status, 200, "{}", a.text);
    // Stream: the header's time_zone reads the lines.
    let mut header = local_body(&[], "2026-03-29 00:00:00", Some(zone));
    header.as_object_mut().unwrap().remove("measurements");
    let lines: Vec<Value> = LOCAL.iter().map(|t| json!({"t": t})).collect();
    let out = stream(&s, &header, &lines).await;
    assert_eq!(out.len(), 5, "{out:?}");
    let got: Vec<&str> = out[..4].iter().map(|e| e["t"].as_str().unwrap()).collect();
    assert_eq!(got, LOCAL);
    assert_eq!(out[4]["posterior"]["t"], "2026-03-29 04:30:00");
}

fn ndjson(header: &Value, lines: &[Value]) -> String {
    let mut s = serde_json::to_string(header).unwrap();
    s.push('\n');
    for l in lines {
        s.push_str(&serde_json::to_string(l).unwrap());
        s.push('\n');
    }
    s
}

async fn stream(s: &Server, header: &Value, lines: &[Value]) -> Vec<Value> {
    let a = post(
        s,
        "/v1/estimate/stream",
        "application/x-ndjson",
        ndjson(header, lines),
    )
    .await;
    assert_eq!(a.status, 200, "{}", a.text);
    a.text
        .lines()
        .map(|l| serde_json::from_str(l).unwrap_or_else(|e| panic!("{e}: {l}")))
        .collect()
}

/// Encoder readings of the conveyor at 0.5 m/s, one per second from t = 1, with a fixed
/// wobble (not random: the test must be reproducible).
fn belt_lines(n: usize) -> Vec<Value> {
    (1..=n)
        .map(|k| {
            let t = k as f64;
            json!({"t": t, "values": {"encoder": 0.5 * t + 0.03 * (1.7 * t).sin()}})
        })
        .collect()
}

fn header(method: &str) -> Value {
    json!({"model": conveyor(true),
           "filter": {"method": method, "ensemble": {"members": 16, "seed": 4}},
           "prior": prior_at(json!(0.0))})
}

#[tokio::test]
async fn a_stream_failing_on_a_bad_line_sends_posterior_and_summary_then_the_error() {
    let s = start_default().await;
    for method in ["ekf", "ukf", "enkf"] {
        let good = belt_lines(12);
        // Line 7 goes back in time, line 8 is not JSON: either ends the stream there.
        for bad in [
            json!({"t": 2.5, "values": {"encoder": 1.0}}),
            json!("{\"t\": 7,"),
        ] {
            let mut lines = good[..6].to_vec();
            lines.push(bad.clone());
            lines.extend_from_slice(&good[6..]);
            let body = match bad.as_str() {
                Some(raw) => ndjson(&header(method), &lines).replace(&bad.to_string(), raw),
                None => ndjson(&header(method), &lines),
            };
            let a = post(&s, "/v1/estimate/stream", "application/x-ndjson", body).await;
            assert_eq!(a.status, 200, "{}", a.text);
            let out: Vec<Value> = a
                .text
                .lines()
                .map(|l| serde_json::from_str(l).unwrap())
                .collect();
            assert_eq!(
                out.len(),
                8,
                "6 estimates, the last good, the error: {out:?}"
            );
            assert_eq!(out[6]["posterior"]["t"], 6.0, "{method} {bad}");
            assert_eq!(out[6]["summary"]["steps"], 6);
            assert!(out[7]["error"]["status"].as_u64().is_some(), "{:?}", out[7]);
            // Exactly the posterior and summary of a run that stopped after line 6.
            let six = stream(&s, &header(method), &good[..6]).await;
            assert_eq!(out[6], six[6], "{method} {bad}");

            // Resume from it with the lines after the bad one: the same estimates as an
            // unbroken run, bit for bit (the batch resume contract).
            let mut resumed = header(method);
            resumed["prior"] = out[6]["posterior"].clone();
            let rest = stream(&s, &resumed, &good[6..]).await;
            let whole = stream(&s, &header(method), &good).await;
            assert_eq!(rest[..6], whole[6..12], "{method} {bad}");
            assert_eq!(rest[6]["posterior"], whole[12]["posterior"], "{method}");
        }
    }
}

#[tokio::test]
async fn a_stream_failing_in_the_filter_sends_the_state_before_that_line() {
    // Line 5 reads the gauge, sqrt(pos - 1000), below its domain: the update fails after
    // the prediction to that line has already run. The answer must still be the belief
    // after line 4, not a half-done step.
    let s = start_default().await;
    for method in ["ekf", "ukf", "enkf"] {
        let mut h = header(method);
        h["model"]["sensors"]["gauge"] = json!({"measures": "sqrt(pos - 1000)", "std": 0.05});
        let good = belt_lines(8);
        let mut lines = good[..4].to_vec();
        lines.push(json!({"t": 5.0, "values": {"gauge": 1.0}}));
        lines.extend_from_slice(&good[5..]);
        let out = stream(&s, &h, &lines).await;
        assert_eq!(out.len(), 6, "{method}: {out:?}");
        let e = &out[5]["error"];
        assert!(e["status"].as_u64().is_some(), "{method}: {e}");
        assert_eq!(e["type"], "/problems/numerical-failure", "{method}: {e}");
        let four = stream(&s, &h, &good[..4]).await;
        assert_eq!(out[4], four[4], "{method}");
        assert_eq!(out[4]["posterior"]["t"], 4.0);
    }
}
