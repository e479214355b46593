//! End-to-end behaviour that needs the estimation core: happy paths of every job route,
//! streaming before the request ends, chunked = single. Bad requests with their statuses
//! and pointers are in `http_errors.rs`. Bodies follow openapi/openapi.yaml exactly.

use crate::support::{
    answer, assert_pointer, assert_problem, post, post_json, start, start_default,
};
use serde_json::{json, Value};
use std::time::Duration;
use tacit::http::ServerConfig;

/// The crane trolley model of openapi/openapi.yaml, word for word.
fn trolley_model() -> Value {
    json!({
      "states": ["pos", "vel"],
      "inputs": ["force"],
      "parameters": {"mass": 12.0, "drag": {"initial": 0.4, "std": 0.2, "random_walk": 1e-4}},
      "dynamics": {"rates": {"pos": "vel", "vel": "(force - drag*vel*abs(vel))/mass"}},
      "process_noise": {"density": {"vel": 0.05}},
      "sensors": {
        "encoder": {"measures": "pos", "std": 0.002},
        "range":   {"measures": "sqrt(pos^2 + 4)", "std": 0.05},
        "pair":    {"measures": ["pos", "vel"], "covariance": [[1e-4, 0], [0, 1e-2]]}
      }
    })
}

/// A 1-axis constant-velocity trolley with an encoder.
fn cv_model() -> Value {
    json!({
      "states": ["pos", "vel"],
      "dynamics": {"rates": {"pos": "vel"}},
      "process_noise": {"density": {"vel": 0.1}},
      "sensors": {"encoder": {"measures": "pos", "std": 0.05}}
    })
}

fn prior() -> Value {
    json!({"t": 0.0, "mean": {"pos": 0.0, "vel": 0.0}, "std": {"pos": 1.0, "vel": 5.0}})
}

/// Deterministic readings of a trolley moving at 0.3 m/s, with noise from a fixed LCG
/// (not random: the test must be reproducible).
fn readings(n: usize) -> Vec<Value> {
    let mut s: u64 = 0x5eed;
    (1..=n)
        .map(|k| {
            s = s
                .wrapping_mul(6364136223846793005)
                .wrapping_add(1442695040888963407);
            let noise = ((s >> 33) as f64 / (1u64 << 31) as f64 - 0.5) * 0.1;
            let t = k as f64 * 0.1;
            if k % 7 == 0 {
                // A line without readings: its estimate is a prediction.
                json!({"t": t})
            } else {
                json!({"t": t, "values": {"encoder": 0.3 * t + noise}})
            }
        })
        .collect()
}

fn filter(method: &str) -> Value {
    match method {
        "enkf" => json!({"method": "enkf", "ensemble": {"members": 32, "seed": 7}}),
        m => json!({"method": m}),
    }
}

fn estimate_body(method: &str, n: usize) -> Value {
    json!({"model": cv_model(), "filter": filter(method), "prior": prior(), "measurements": readings(n)})
}

#[tokio::test]
async fn estimate_answers_one_estimate_per_line_with_posterior_and_summary() {
    let s = start_default().await;
    let body = json!({
        "model": trolley_model(),
        "filter": {"method": "ukf", "gate": {"probability": 0.9999}},
        "prior": {"t": 0.0, "mean": {"pos": 0.0, "vel": 0.0}, "std": {"pos": 1.0, "vel": 5.0}},
        "measurements": [
            {"t": 0.10, "values": {"encoder": 0.0123}, "inputs": {"force": 2.5}},
            {"t": 0.15, "values": {"encoder": 0.0131, "pair": [0.013, 0.2]}, "noise_std": {"encoder": 0.01}},
            {"t": 0.20, "inputs": {"force": 0.0}}
        ],
        "output": {"covariance": "full", "innovations": true}
    });
    let a = post_json(&s, "/v1/estimate", &body).await;
    assert_eq!(a.status, 200, "{}", a.text);
    assert_eq!(a.content_type, "application/json");
    // Estimated parameters are appended after the model's states (openapi/openapi.yaml).
    assert_eq!(a.body["states"], json!(["pos", "vel", "drag"]));
    let est = a.body["estimates"].as_array().unwrap();
    assert_eq!(est.len(), 3, "one estimate per measurement line");
    for e in est {
        assert_eq!(e["covariance"].as_array().unwrap().len(), 3);
        for name in ["pos", "vel", "drag"] {
            assert!(e["std"][name].as_f64().unwrap() > 0.0);
        }
    }
    assert_eq!(est[0]["innovations"]["encoder"]["accepted"], true);
    // The v2 contract (openapi/openapi.yaml) renames: the pre-update innovation and
    // sqrt(S) carry their own names.
    let keys: Vec<&str> = est[1]["innovations"]["pair"]
        .as_object()
        .unwrap()
        .keys()
        .map(String::as_str)
        .collect();
    assert_eq!(keys, ["innovation", "innovation_std", "nis", "accepted"]);
    assert_eq!(
        est[1]["innovations"]["pair"]["innovation"]
            .as_array()
            .unwrap()
            .len(),
        2
    );
    assert!(
        est[0]["innovations"]["encoder"]["innovation_std"]
            .as_f64()
            .unwrap()
            > 0.0
    );
    assert_eq!(a.body["summary"]["steps"], 3);
    for k in ["mean", "dof", "lower_95", "upper_95", "verdict"] {
        assert!(a.body["summary"]["nis"].get(k).is_some(), "nis.{k}");
    }
    assert_eq!(a.body["posterior"]["t"], 0.2);
}

#[tokio::test]
async fn one_reading_of_a_constant_matches_the_scalar_kalman_closed_form() {
    // x constant, prior N(0, 1), reading z = 1 with variance 1: posterior mean 1/2 and
    // variance 1/2 (the scalar Kalman update, common practice). The EKF and the UKF are
    // exact for a linear model.
    let s = start_default().await;
    for method in ["ekf", "ukf"] {
        let body = json!({
            "model": {"states": ["x"], "dynamics": {"rates": {}}, "sensors": {"gauge": {"measures": "x", "std": 1.0}}},
            "filter": {"method": method},
            "prior": {"t": 0, "mean": {"x": 0.0}, "std": {"x": 1.0}},
            "measurements": [{"t": 1, "values": {"gauge": 1.0}}]
        });
        let a = post_json(&s, "/v1/estimate", &body).await;
        assert_eq!(a.status, 200, "{}", a.text);
        let e = &a.body["estimates"][0];
        let tol = 8.0 * f64::EPSILON;
        assert!(
            (e["mean"]["x"].as_f64().unwrap() - 0.5).abs() < tol,
            "{method}: {e}"
        );
        assert!(
            (e["std"]["x"].as_f64().unwrap() - 0.5f64.sqrt()).abs() < tol,
            "{method}: {e}"
        );
        // Time echoes the form it was given (a number here).
        assert!(e["t"].is_number());
    }
}

#[tokio::test]
async fn chunked_requests_give_bit_identical_estimates() {
    let s = start_default().await;
    let all = readings(40);
    for method in ["ekf", "ukf", "enkf"] {
        let single = post_json(&s, "/v1/estimate", &estimate_body(method, 40)).await;
        assert_eq!(single.status, 200, "{method}: {}", single.text);
        let mut chained = Vec::new();
        let mut p = prior();
        for chunk in all.chunks(10) {
            let body = json!({"model": cv_model(), "filter": filter(method), "prior": p, "measurements": chunk});
            let a = post_json(&s, "/v1/estimate", &body).await;
            assert_eq!(a.status, 200, "{method}: {}", a.text);
            chained.extend(a.body["estimates"].as_array().unwrap().iter().cloned());
            p = a.body["posterior"].clone();
        }
        assert_eq!(
            Value::Array(chained),
            single.body["estimates"],
            "{method}: 4 chained requests differ from one"
        );
        assert_eq!(p, single.body["posterior"], "{method}");
    }
}

#[tokio::test]
async fn a_batch_written_in_pieces_declares_its_length_and_chains_bit_identically() {
    // 6000 lines: past the size from which the answer is written by a second thread and
    // sent in pieces; the two halves alone are written on one thread. Splitting a run
    // must give the same estimates bit for bit (openapi/openapi.yaml), so both ways must agree.
    let s = start_default().await;
    let all = readings(6000);
    let single = post_json(&s, "/v1/estimate", &estimate_body("ekf", 6000)).await;
    assert_eq!(single.status, 200, "{}", single.text);
    let declared: usize = single.headers["content-length"]
        .to_str()
        .unwrap()
        .parse()
        .unwrap();
    assert_eq!(declared, single.text.len());
    let mut chained = Vec::new();
    let mut p = prior();
    for half in all.chunks(3000) {
        let body =
            json!({"model": cv_model(), "filter": filter("ekf"), "prior": p, "measurements": half});
        let a = post_json(&s, "/v1/estimate", &body).await;
        assert_eq!(a.status, 200, "{}", a.text);
        chained.extend(a.body["estimates"].as_array().unwrap().iter().cloned());
        p = a.body["posterior"].clone();
    }
    assert!(Value::Array(chained) == single.body["estimates"]);
    assert_eq!(p, single.body["posterior"]);
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

fn parse_lines(text: &str) -> Vec<Value> {
    text.lines()
        .map(|l| serde_json::from_str(l).unwrap_or_else(|e| panic!("{e}: {l}")))
        .collect()
}

#[tokio::test]
async fn stream_answers_like_the_batch_line_by_line() {
    let s = start_default().await;
    let header = json!({"model": cv_model(), "filter": {"method": "ekf"}, "prior": prior()});
    let lines = readings(25);
    let res = s
        .client
        .post(s.url("/v1/estimate/stream"))
        .header("content-type", "application/x-ndjson")
        .body(ndjson(&header, &lines).replace("\n{\"t\":0.5", "\n\n{\"t\":0.5"))
        .send()
        .await
        .unwrap();
    assert_eq!(res.status(), 200);
    assert_eq!(res.headers()["content-type"], "application/x-ndjson");
    let out = parse_lines(&res.text().await.unwrap());
    assert_eq!(out.len(), 26, "one line per reading plus the last");
    let batch = post_json(&s, "/v1/estimate", &estimate_body("ekf", 25)).await;
    assert_eq!(Value::Array(out[..25].to_vec()), batch.body["estimates"]);
    assert_eq!(out[25]["posterior"], batch.body["posterior"]);
    assert_eq!(out[25]["summary"]["steps"], 25);
}

#[tokio::test]
async fn the_first_estimate_arrives_before_the_request_ends() {
    use futures_util::StreamExt;
    let s = start_default().await;
    let (tx, rx) = tokio::sync::mpsc::channel::<Result<String, std::io::Error>>(4);
    let body = reqwest::Body::wrap_stream(futures_util::stream::unfold(rx, |mut rx| async {
        rx.recv().await.map(|x| (x, rx))
    }));
    let header = json!({"model": cv_model(), "filter": {"method": "ekf"}, "prior": prior()});
    let r = readings(3);
    tx.send(Ok(ndjson(&header, &r[..1]))).await.unwrap();
    let res = tokio::time::timeout(
        Duration::from_secs(10),
        s.client
            .post(s.url("/v1/estimate/stream"))
            .header("content-type", "application/x-ndjson")
            .body(body)
            .send(),
    )
    .await
    .expect("response head before the body ends")
    .unwrap();
    assert_eq!(res.status(), 200);
    let mut stream = res.bytes_stream();
    let mut got = Vec::new();
    while !got.contains(&b'\n') {
        let chunk = tokio::time::timeout(Duration::from_secs(10), stream.next())
            .await
            .expect("first estimate while the request is still open")
            .expect("more body")
            .unwrap();
        got.extend_from_slice(&chunk);
    }
    let first: Value =
        serde_json::from_slice(&got[..got.iter().position(|&b| b == b'\n').unwrap()]).unwrap();
    assert_eq!(first["t"], r[0]["t"]);
    // Now finish the request and read the rest.
    for l in &r[1..] {
        tx.send(Ok(format!("{l}\n"))).await.unwrap();
    }
    drop(tx);
    while let Some(chunk) = stream.next().await {
        got.extend_from_slice(&chunk.unwrap());
    }
    let all = parse_lines(std::str::from_utf8(&got).unwrap());
    assert_eq!(all.len(), 4);
    assert!(all[3].get("summary").is_some());
}

#[tokio::test]
async fn a_bad_stream_header_is_a_plain_problem_status() {
    let s = start_default().await;
    let header = json!({"model": cv_model(), "filter": {"method": "particle"}, "prior": prior()});
    let a = answer(
        s.client
            .post(s.url("/v1/estimate/stream"))
            .header("content-type", "application/x-ndjson")
            .body(ndjson(&header, &readings(2)))
            .send()
            .await
            .unwrap(),
    )
    .await;
    assert_problem(&a, 422);
    assert_pointer(&a, "/filter/method");
    let a = post(
        &s,
        "/v1/estimate/stream",
        "application/x-ndjson",
        "{\"model\": \n",
    )
    .await;
    assert_problem(&a, 400);
}

#[tokio::test]
async fn a_failure_mid_stream_ends_with_the_last_good_posterior_then_the_error() {
    let s = start_default().await;
    let header = json!({"model": cv_model(), "filter": {"method": "ekf"}, "prior": prior()});
    let lines = vec![
        json!({"t": 1.0, "values": {"encoder": 0.3}}),
        json!({"t": 0.5, "values": {"encoder": 0.2}}),
        json!({"t": 2.0, "values": {"encoder": 0.6}}),
    ];
    let res = s
        .client
        .post(s.url("/v1/estimate/stream"))
        .header("content-type", "application/x-ndjson")
        .body(ndjson(&header, &lines))
        .send()
        .await
        .unwrap();
    assert_eq!(res.status(), 200);
    let out = parse_lines(&res.text().await.unwrap());
    // The estimate, the last good {posterior, summary} (API-v2 "Robustness options"),
    // then the error.
    assert_eq!(out.len(), 3, "{out:?}");
    assert_eq!(out[1]["posterior"]["t"], 1.0);
    assert_eq!(out[2]["error"]["status"], 422);
    assert!(out[2]["error"]["errors"][0]["pointer"]
        .as_str()
        .unwrap()
        .ends_with("/t"));
}

#[tokio::test]
async fn a_client_that_leaves_a_stream_frees_its_slot() {
    let mut c = ServerConfig::default();
    c.limits.max_concurrency = 1;
    let s = start(c).await;
    let (tx, rx) = tokio::sync::mpsc::channel::<Result<String, std::io::Error>>(4);
    let body = reqwest::Body::wrap_stream(futures_util::stream::unfold(rx, |mut rx| async {
        rx.recv().await.map(|x| (x, rx))
    }));
    let header = json!({"model": cv_model(), "filter": {"method": "ekf"}, "prior": prior()});
    tx.send(Ok(ndjson(&header, &readings(1)))).await.unwrap();
    let res = s
        .client
        .post(s.url("/v1/estimate/stream"))
        .header("content-type", "application/x-ndjson")
        .body(body)
        .send()
        .await
        .unwrap();
    assert_eq!(res.status(), 200);
    drop(res);
    drop(tx);
    for _ in 0..200 {
        let a = post_json(&s, "/v1/check", &json!({"model": cv_model()})).await;
        if a.status == 200 {
            return;
        }
        tokio::time::sleep(Duration::from_millis(10)).await;
    }
    panic!("the abandoned stream kept its job slot");
}

#[tokio::test]
async fn smoothing_never_widens_the_filtered_spread() {
    // The RTS smoother's covariance is at most the filter's at every time, and equal at
    // the last (common practice).
    let s = start_default().await;
    let body = estimate_body("ekf", 30);
    let f = post_json(&s, "/v1/estimate", &body).await;
    let sm = post_json(&s, "/v1/smooth", &body).await;
    assert_eq!(sm.status, 200, "{}", sm.text);
    let fe = f.body["estimates"].as_array().unwrap();
    let se = sm.body["estimates"].as_array().unwrap();
    assert_eq!(fe.len(), se.len());
    for (a, b) in fe.iter().zip(se) {
        for n in ["pos", "vel"] {
            let (fs, ss) = (a["std"][n].as_f64().unwrap(), b["std"][n].as_f64().unwrap());
            assert!(ss <= fs * (1.0 + 1e-9), "{n} at {}: {ss} > {fs}", a["t"]);
        }
    }
    assert_eq!(fe.last(), se.last());
    assert_eq!(sm.body["posterior"], f.body["posterior"]);
}

#[tokio::test]
async fn simulated_measurements_are_accepted_by_estimate() {
    let s = start_default().await;
    let body = json!({"model": cv_model(), "prior": prior(), "times": {"start": 0.1, "step": 0.1, "count": 20}, "seed": 11});
    let a = post_json(&s, "/v1/simulate", &body).await;
    assert_eq!(a.status, 200, "{}", a.text);
    assert_eq!(a.body["truth"].as_array().unwrap().len(), 20);
    assert_eq!(a.body["measurements"].as_array().unwrap().len(), 20);
    // Same seed, same answer.
    let again = post_json(&s, "/v1/simulate", &body).await;
    assert_eq!(a.body, again.body);
    let est = json!({"model": cv_model(), "filter": {"method": "ukf"}, "prior": prior(), "measurements": a.body["measurements"]});
    let e = post_json(&s, "/v1/estimate", &est).await;
    assert_eq!(e.status, 200, "{}", e.text);
}

#[tokio::test]
async fn simulate_takes_its_schedule_as_sampling_and_refuses_the_v1_name() {
    let s = start_default().await;
    let mut body = json!({"model": cv_model(), "prior": prior(),
        "times": {"start": 0.1, "step": 0.1, "count": 6}, "seed": 5,
        "sampling": {"encoder": {"every": 2}}});
    let a = post_json(&s, "/v1/simulate", &body).await;
    assert_eq!(a.status, 200, "{}", a.text);
    let read: Vec<bool> = a.body["measurements"]
        .as_array()
        .unwrap()
        .iter()
        .map(|m| m["values"].get("encoder").is_some())
        .collect();
    assert_eq!(read, [true, false, true, false, true, false]);
    // The v2 contract (openapi/openapi.yaml) renames `readings` to `sampling`; the old
    // name is refused, naming the new.
    body["readings"] = body["sampling"].take();
    body.as_object_mut().unwrap().remove("sampling");
    let a = post_json(&s, "/v1/simulate", &body).await;
    assert_problem(&a, 422);
    assert_pointer(&a, "/readings");
    assert!(
        a.body["detail"].as_str().unwrap().contains("'sampling'"),
        "{}",
        a.text
    );
}

#[tokio::test]
async fn check_reports_observability_by_sensor() {
    // Position readings of a constant-velocity trolley recover both states; speed
    // readings alone leave the position unobservable (rank of [H; HF], common practice).
    let s = start_default().await;
    let model = json!({
        "states": ["pos", "vel"],
        "dynamics": {"rates": {"pos": "vel"}},
        "sensors": {"encoder": {"measures": "pos", "std": 0.002}, "tachometer": {"measures": "vel", "std": 0.01}}
    });
    let a = post_json(&s, "/v1/check", &json!({"model": model})).await;
    assert_eq!(a.status, 200, "{}", a.text);
    // The v2 contract (openapi/openapi.yaml): the length of the stacked measurement
    // vector is `measurement_size`.
    assert_eq!(
        a.body["dimensions"],
        json!({"states": 2, "inputs": 0, "measurement_size": 2})
    );
    let o = &a.body["observability"];
    assert_eq!(o["rank"], 2);
    assert_eq!(o["dimension"], 2);
    assert_eq!(o["by_sensor"]["encoder"]["rank"], 2);
    assert_eq!(o["by_sensor"]["tachometer"]["rank"], 1);
    assert_eq!(o["by_sensor"]["tachometer"]["unobservable"], json!(["pos"]));
}

#[tokio::test]
async fn filter_metrics_count_steps_by_method() {
    let s = start_default().await;
    let a = post_json(&s, "/v1/estimate", &estimate_body("ukf", 12)).await;
    assert_eq!(a.status, 200);
    let text = s
        .client
        .get(s.url("/metrics"))
        .send()
        .await
        .unwrap()
        .text()
        .await
        .unwrap();
    assert!(
        text.contains(r#"tacit_filter_steps_total{filter="ukf"} 12"#),
        "{text}"
    );
}
