//! Failures the web layer answers by itself, each as problem+json with its status:
//! unknown routes and methods, media types, sizes, empty streams, and caught panics.

use crate::support::{
    answer, assert_pointer, assert_problem, post, serve_router, start, start_default,
};
use axum::routing::get;
use tacit::http::{layered, run_job, AppState, ServerConfig};

const JOB_ROUTES: &[&str] = &["/v1/estimate", "/v1/smooth", "/v1/simulate", "/v1/check"];

#[tokio::test]
async fn unknown_route_is_404_problem() {
    let s = start_default().await;
    for path in [
        "/",
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
