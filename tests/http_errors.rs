//! Failures, each as problem+json with its status: those the web layer answers by itself
//! (unknown routes and methods, media types, sizes, empty streams, caught panics) and bad
//! requests with their pointers.

use crate::support::{
    answer, assert_pointer, assert_problem, post, post_json, post_raw, serve_router, start,
    start_default,
};
use axum::routing::get;
use serde_json::{json, Value};
use tacit::http::{layered, run_job, AppState, ServerConfig};

const JOB_ROUTES: &[&str] = &["/v1/estimate", "/v1/smooth", "/v1/simulate", "/v1/check"];

#[tokio::test]
async fn unknown_route_is_404_problem() {
    let s = start_default().await;
    // `/` is the page now; what it does not serve is still a problem.
    for path in [
        "/index.html",
        "/page/missing.js",
        "/page/demo/boiler",
        "/v1",
        "/v1/estimates",
        "/v2/estimate",
        "/healthz/extra",
    ] {
        let a = answer(s.client.get(s.url(path)).send().await.unwrap()).await;
        assert_problem(&a, 404);
    }
}

#[tokio::test]
async fn wrong_method_is_405_problem_with_allow() {
    let s = start_default().await;
    for path in JOB_ROUTES.iter().chain(&["/v1/estimate/stream"]) {
        let a = answer(s.client.get(s.url(path)).send().await.unwrap()).await;
        assert_problem(&a, 405);
        assert!(a.headers["allow"].to_str().unwrap().contains("POST"));
    }
    for path in [
        "/healthz",
        "/readyz",
        "/metrics",
        "/openapi.json",
        "/v1/info",
    ] {
        let a = answer(s.client.delete(s.url(path)).send().await.unwrap()).await;
        assert_problem(&a, 405);
    }
}

#[tokio::test]
async fn wrong_or_missing_content_type_is_415() {
    let s = start_default().await;
    for path in JOB_ROUTES {
        for ct in [Some("text/plain"), Some("application/x-ndjson"), None] {
            let mut req = s.client.post(s.url(path)).body("{}");
            if let Some(ct) = ct {
                req = req.header("content-type", ct);
            }
            let a = answer(req.send().await.unwrap()).await;
            assert_problem(&a, 415);
            assert!(a.body["detail"]
                .as_str()
                .unwrap()
                .contains("application/json"));
        }
    }
    // The stream reads NDJSON, not one JSON document.
    for ct in [Some("application/json"), Some("text/plain"), None] {
        let mut req = s.client.post(s.url("/v1/estimate/stream")).body("{}\n");
        if let Some(ct) = ct {
            req = req.header("content-type", ct);
        }
        let a = answer(req.send().await.unwrap()).await;
        assert_problem(&a, 415);
        assert!(a.body["detail"]
            .as_str()
            .unwrap()
            .contains("application/x-ndjson"));
    }
}

#[tokio::test]
async fn media_type_parameters_and_case_are_accepted() {
    // With no job slots the answer is 503, which proves the media type was accepted.
    let mut c = ServerConfig::default();
    c.limits.max_concurrency = 0;
    let s = start(c).await;
    for ct in ["application/json; charset=utf-8", "Application/JSON"] {
        let a = post(&s, "/v1/estimate", ct, "{}").await;
        assert_problem(&a, 503);
    }
}

fn small_body_server_config() -> ServerConfig {
    let mut c = ServerConfig::default();
    c.limits.max_body_bytes = 64;
    c.limits.max_line_bytes = 32;
    c
}

#[tokio::test]
async fn oversized_body_is_413_declared_or_chunked() {
    let s = start(small_body_server_config()).await;
    let big = format!("{{\"pad\": \"{}\"}}", "x".repeat(200));
    for path in JOB_ROUTES {
        let a = post(&s, path, "application/json", big.clone()).await;
        assert_problem(&a, 413);
    }
    // Without a Content-Length the limit is enforced while reading.
    let chunks: Vec<Result<String, std::io::Error>> = (0..10).map(|_| Ok("x".repeat(20))).collect();
    let a = answer(
        s.client
            .post(s.url("/v1/estimate"))
            .header("content-type", "application/json")
            .body(reqwest::Body::wrap_stream(futures_util::stream::iter(
                chunks,
            )))
            .send()
            .await
            .unwrap(),
    )
    .await;
    assert_problem(&a, 413);
}

#[tokio::test]
async fn a_stream_line_over_the_limit_is_413_before_the_stream_starts() {
    let s = start(small_body_server_config()).await;
    let a = answer(
        s.client
            .post(s.url("/v1/estimate/stream"))
            .header("content-type", "application/x-ndjson")
            .body(format!("\n{{\"model\": \"{}\"}}\n", "y".repeat(100)))
            .send()
            .await
            .unwrap(),
    )
    .await;
    assert_problem(&a, 413);
    assert!(
        a.body["detail"].as_str().unwrap().contains("line 2"),
        "{}",
        a.text
    );
    assert_pointer(&a, "");
}

#[tokio::test]
async fn an_empty_stream_is_400() {
    let s = start_default().await;
    for body in ["", "\n\n  \r\n"] {
        let a = post(&s, "/v1/estimate/stream", "application/x-ndjson", body).await;
        assert_problem(&a, 400);
    }
}

#[tokio::test]
async fn a_panicking_handler_is_a_generic_500_with_a_request_id() {
    let state = AppState::new(ServerConfig::default());
    let router = axum::Router::new().route(
        "/boom",
        get(|| async {
            if true {
                panic!("secret internal path /srv/tacit/boom.rs");
            }
            ""
        }),
    );
    let base = serve_router(layered(router, state.clone())).await;
    let res = reqwest::get(format!("{base}/boom")).await.unwrap();
    let a = answer(res).await;
    assert_problem(&a, 500);
    assert!(!a.text.contains("secret"), "no internals leak: {}", a.text);
}

#[tokio::test]
async fn a_panicking_job_is_a_generic_500_and_frees_its_slot() {
    let mut config = ServerConfig::default();
    config.limits.max_concurrency = 1;
    let state = AppState::new(config);
    let router = axum::Router::new().route(
        "/job",
        get(
            |axum::extract::State(s): axum::extract::State<AppState>| async move {
                run_job(
                    &s,
                    "/job",
                    |_limits, _cancel| -> Result<tacit::job::Done, _> {
                        panic!("secret: the job fell over")
                    },
                )
                .await
            },
        ),
    );
    let base = serve_router(layered(router, state.clone())).await;
    for _ in 0..2 {
        // Twice: the second would be 503 if the panic had kept the only slot.
        let a = answer(reqwest::get(format!("{base}/job")).await.unwrap()).await;
        assert_problem(&a, 500);
        assert!(!a.text.contains("secret"), "{}", a.text);
    }
    assert!(state.metrics().render().contains("tacit_panics_total 2"));
}

/// How a bad request's pointer is checked.
enum Ptr {
    /// Exactly this pointer among `errors`.
    Is(&'static str),
    /// Some pointer starting with this (where openapi/openapi.yaml leaves the depth open).
    Under(&'static str),
}

fn base() -> Value {
    json!({
        "model": {
            "states": ["pos", "vel"],
            "inputs": ["force"],
            "parameters": {"mass": 12.0},
            "dynamics": {"rates": {"pos": "vel", "vel": "force/mass"}},
            "process_noise": {"density": {"vel": 0.05}},
            "sensors": {
                "encoder": {"measures": "pos", "std": 0.002},
                "pair": {"measures": ["pos", "vel"], "covariance": [[1e-4, 0], [0, 1e-2]]}
            }
        },
        "filter": {"method": "ekf"},
        "prior": {"t": 0.0, "mean": {"pos": 0.0, "vel": 0.0}, "std": {"pos": 1.0, "vel": 5.0}},
        "measurements": [
            {"t": 0.1, "values": {"encoder": 0.01}, "inputs": {"force": 2.5}},
            {"t": 0.2, "values": {"encoder": 0.02}}
        ]
    })
}

fn with(f: impl FnOnce(&mut Value)) -> Value {
    let mut b = base();
    f(&mut b);
    b
}

fn bad_requests() -> Vec<(&'static str, Value, u16, Ptr)> {
    let long = format!("vel{}", " + vel".repeat(2000));
    let deep = format!("{}vel{}", "(".repeat(500), ")".repeat(500));
    vec![
        (
            "method missing",
            with(|b| {
                b["filter"] = json!({});
            }),
            422,
            Ptr::Is("/filter/method"),
        ),
        (
            "method unknown",
            with(|b| b["filter"]["method"] = json!("particle")),
            422,
            Ptr::Is("/filter/method"),
        ),
        (
            "method wrong type",
            with(|b| b["filter"]["method"] = json!(3)),
            422,
            Ptr::Is("/filter/method"),
        ),
        (
            "model missing",
            with(|b| {
                b.as_object_mut().unwrap().remove("model");
            }),
            422,
            Ptr::Is("/model"),
        ),
        (
            "states wrong type",
            with(|b| b["model"]["states"] = json!("pos")),
            422,
            Ptr::Is("/model/states"),
        ),
        (
            "measurements not a list",
            with(|b| b["measurements"] = json!({"t": 1})),
            422,
            Ptr::Is("/measurements"),
        ),
        (
            "values not an object",
            with(|b| b["measurements"][0]["values"] = json!([1])),
            422,
            Ptr::Is("/measurements/0/values"),
        ),
        (
            "unknown sensor",
            with(|b| b["measurements"][0]["values"] = json!({"lidar": 1.0})),
            422,
            Ptr::Is("/measurements/0/values/lidar"),
        ),
        (
            "unknown input",
            with(|b| b["measurements"][0]["inputs"] = json!({"torque": 1.0})),
            422,
            Ptr::Is("/measurements/0/inputs/torque"),
        ),
        (
            "reading wrong type",
            with(|b| b["measurements"][1]["values"]["encoder"] = json!("high")),
            422,
            Ptr::Is("/measurements/1/values/encoder"),
        ),
        (
            "vector reading wrong length",
            with(|b| b["measurements"][0]["values"] = json!({"pair": [0.1, 0.2, 0.3]})),
            422,
            Ptr::Is("/measurements/0/values/pair"),
        ),
        (
            "formula syntax error",
            with(|b| b["model"]["dynamics"]["rates"]["vel"] = json!("force +* mass")),
            422,
            Ptr::Is("/model/dynamics/rates/vel"),
        ),
        (
            "formula unknown name",
            with(|b| b["model"]["dynamics"]["rates"]["vel"] = json!("force/mas")),
            422,
            Ptr::Is("/model/dynamics/rates/vel"),
        ),
        (
            "formula unknown function",
            with(|b| b["model"]["dynamics"]["rates"]["vel"] = json!("cbrt(force)")),
            422,
            Ptr::Is("/model/dynamics/rates/vel"),
        ),
        (
            "formula unbalanced",
            with(|b| b["model"]["dynamics"]["rates"]["vel"] = json!("(force/mass")),
            422,
            Ptr::Is("/model/dynamics/rates/vel"),
        ),
        (
            "rate of an unknown state",
            with(|b| b["model"]["dynamics"]["rates"]["height"] = json!("vel")),
            422,
            Ptr::Is("/model/dynamics/rates/height"),
        ),
        (
            "two kinds of dynamics",
            with(|b| b["model"]["dynamics"]["next"] = json!({"pos": "pos"})),
            422,
            Ptr::Under("/model/dynamics"),
        ),
        (
            "huge formula",
            with(|b| b["model"]["dynamics"]["rates"]["vel"] = json!(long)),
            422,
            Ptr::Is("/model/dynamics/rates/vel"),
        ),
        (
            "deeply nested formula",
            with(|b| b["model"]["dynamics"]["rates"]["vel"] = json!(deep)),
            422,
            Ptr::Is("/model/dynamics/rates/vel"),
        ),
        (
            "sensor measures an unknown name",
            with(|b| b["model"]["sensors"]["encoder"]["measures"] = json!("position")),
            422,
            Ptr::Is("/model/sensors/encoder/measures"),
        ),
        (
            "negative sensor std",
            with(|b| b["model"]["sensors"]["encoder"]["std"] = json!(-0.002)),
            422,
            Ptr::Is("/model/sensors/encoder/std"),
        ),
        (
            "sensor covariance wrong size",
            with(|b| b["model"]["sensors"]["pair"]["covariance"] = json!([[1e-4]])),
            422,
            Ptr::Is("/model/sensors/pair/covariance"),
        ),
        (
            "sensor covariance not PSD",
            with(|b| b["model"]["sensors"]["pair"]["covariance"] = json!([[1.0, 2.0], [2.0, 1.0]])),
            422,
            Ptr::Is("/model/sensors/pair/covariance"),
        ),
        (
            "negative noise density",
            with(|b| b["model"]["process_noise"]["density"]["vel"] = json!(-1.0)),
            422,
            Ptr::Is("/model/process_noise/density/vel"),
        ),
        (
            "noise for an unknown state",
            with(|b| b["model"]["process_noise"]["density"]["acc"] = json!(1.0)),
            422,
            Ptr::Is("/model/process_noise/density/acc"),
        ),
        (
            "negative prior std",
            with(|b| b["prior"]["std"]["pos"] = json!(-1.0)),
            422,
            Ptr::Is("/prior/std/pos"),
        ),
        (
            "prior names an unknown state",
            with(|b| b["prior"]["mean"]["height"] = json!(1.0)),
            422,
            Ptr::Is("/prior/mean/height"),
        ),
        (
            "prior mean incomplete",
            with(|b| {
                b["prior"]["mean"].as_object_mut().unwrap().remove("vel");
            }),
            422,
            Ptr::Under("/prior/mean"),
        ),
        (
            "prior covariance not symmetric",
            with(|b| {
                b["prior"].as_object_mut().unwrap().remove("std");
                b["prior"]["covariance"] = json!([[1.0, 0.5], [0.0, 1.0]]);
            }),
            422,
            Ptr::Is("/prior/covariance"),
        ),
        (
            "prior covariance not PSD",
            with(|b| {
                b["prior"].as_object_mut().unwrap().remove("std");
                b["prior"]["covariance"] = json!([[1.0, 2.0], [2.0, 1.0]]);
            }),
            422,
            Ptr::Is("/prior/covariance"),
        ),
        (
            "prior covariance wrong size",
            with(|b| {
                b["prior"].as_object_mut().unwrap().remove("std");
                b["prior"]["covariance"] = json!([[1.0]]);
            }),
            422,
            Ptr::Is("/prior/covariance"),
        ),
        (
            "times going backwards",
            with(|b| b["measurements"][1]["t"] = json!(0.05)),
            422,
            Ptr::Is("/measurements/1/t"),
        ),
        (
            "reading before the prior",
            with(|b| b["measurements"][0]["t"] = json!(-1.0)),
            422,
            Ptr::Is("/measurements/0/t"),
        ),
        (
            "time forms mixed",
            with(|b| b["measurements"][1]["t"] = json!("2026-03-01T06:00:00Z")),
            422,
            Ptr::Is("/measurements/1/t"),
        ),
        (
            "timestamp not RFC 3339",
            with(|b| {
                b["prior"]["t"] = json!("2026-03-01T06:00:00Z");
                b["measurements"][0]["t"] = json!("yesterday");
                b["measurements"][1]["t"] = json!("2026-03-01T06:00:02Z");
            }),
            422,
            Ptr::Is("/measurements/0/t"),
        ),
        (
            "members zero",
            with(|b| {
                b["filter"] = json!({"method": "enkf", "ensemble": {"members": 0, "seed": 1}})
            }),
            422,
            Ptr::Is("/filter/ensemble/members"),
        ),
        (
            "members absurd",
            with(|b| {
                b["filter"] =
                    json!({"method": "enkf", "ensemble": {"members": 1_000_000_000u64, "seed": 1}})
            }),
            422,
            Ptr::Is("/filter/ensemble/members"),
        ),
        (
            "ensemble update unknown",
            with(|b| b["filter"] = json!({"method": "enkf", "ensemble": {"update": "magic"}})),
            422,
            Ptr::Is("/filter/ensemble/update"),
        ),
        (
            "gate probability above one",
            with(|b| b["filter"]["gate"] = json!({"probability": 1.5})),
            422,
            Ptr::Is("/filter/gate/probability"),
        ),
        (
            "max_step not positive",
            with(|b| b["filter"]["integration"] = json!({"max_step": 0.0})),
            422,
            Ptr::Is("/filter/integration/max_step"),
        ),
        (
            "output covariance unknown",
            with(|b| b["output"] = json!({"covariance": "some"})),
            422,
            Ptr::Is("/output/covariance"),
        ),
    ]
}

#[tokio::test]
async fn bad_requests_name_their_status_and_pointer() {
    let s = start_default().await;
    let cases = bad_requests();
    assert!(cases.len() >= 30);
    for (name, body, status, ptr) in cases {
        let a = post_json(&s, "/v1/estimate", &body).await;
        assert_eq!(a.status, status, "{name}: {}", a.text);
        assert_problem(&a, status);
        match ptr {
            Ptr::Is(p) => assert_pointer(&a, p),
            Ptr::Under(p) => assert!(
                a.body["errors"].as_array().is_some_and(|es| es
                    .iter()
                    .any(|e| e["pointer"].as_str().is_some_and(|q| q.starts_with(p)))),
                "{name}: expected a pointer under {p}: {}",
                a.text
            ),
        }
    }
}

#[tokio::test]
async fn formula_errors_carry_their_column() {
    let s = start_default().await;
    // "force/mas": the unknown name starts at column 7 (1-based).
    let body = with(|b| b["model"]["dynamics"]["rates"]["vel"] = json!("force/mas"));
    let a = post_json(&s, "/v1/estimate", &body).await;
    assert_problem(&a, 422);
    let e = &a.body["errors"][0];
    assert_eq!(e["pointer"], "/model/dynamics/rates/vel");
    assert_eq!(e["column"], 7);
}

#[tokio::test]
async fn syntax_errors_are_400() {
    let s = start_default().await;
    for body in [
        "",
        "{",
        "{\"model\": }",
        "[1, 2",
        "{\"filter\": {\"method\": \"ekf\"}} trailing",
        "nul",
    ] {
        let a = post_raw(&s, "/v1/estimate", body).await;
        assert_problem(&a, 400);
    }
}

#[tokio::test]
async fn every_job_route_refuses_bad_input_without_500() {
    let s = start_default().await;
    for path in ["/v1/estimate", "/v1/smooth", "/v1/simulate", "/v1/check"] {
        for body in [
            json!(null),
            json!([]),
            json!({}),
            json!({"model": 1}),
            json!({"model": {"states": []}}),
        ] {
            let a = post_json(&s, path, &body).await;
            assert!((400..500).contains(&a.status), "{path} {body}: {}", a.text);
            assert_problem(&a, a.status);
        }
    }
}
