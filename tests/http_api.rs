//! The operational endpoints on a real server: health, readiness, info, metrics, the
//! contract, request ids, CORS, keys, load shedding and graceful shutdown.

use crate::support::{answer, assert_problem, post, start, start_default};
use std::time::Duration;
use tacit::config::Limits;
use tacit::http::ServerConfig;

fn config_with(f: impl FnOnce(&mut ServerConfig)) -> ServerConfig {
    let mut c = ServerConfig::default();
    f(&mut c);
    c
}

#[tokio::test]
async fn every_problem_type_resolves_to_a_page_on_the_service() {
    // RFC 9457 §3.1.1: a relative `type` resolves against the request's URI; the service
    // serves a page there for each kind (openapi/openapi.yaml, the v2 contract).
    let s = start_default().await;
    let a = post(&s, "/v1/check", "application/json", "{\"model\": 1}").await;
    assert_problem(&a, 422);
    assert_eq!(a.body["type"], "/problems/invalid-request");
    let res = s
        .client
        .get(s.url("/problems/invalid-request"))
        .send()
        .await
        .unwrap();
    assert_eq!(res.status(), 200);
    assert_eq!(res.headers()["content-type"], "text/html; charset=utf-8");
    let page = res.text().await.unwrap();
    assert!(page.contains("<h1>invalid request</h1>"), "{page}");
    assert!(page.contains("HTTP status 422"), "{page}");
    for slug in ["shutting-down", "header-timeout", "overloaded", "internal"] {
        let res = s
            .client
            .get(s.url(&format!("/problems/{slug}")))
            .send()
            .await
            .unwrap();
        assert_eq!(res.status(), 200, "{slug}");
    }
    let a = answer(
        s.client
            .get(s.url("/problems/no-such-kind"))
            .send()
            .await
            .unwrap(),
    )
    .await;
    assert_problem(&a, 404);
}

#[tokio::test]
async fn healthz_and_readyz_answer_200() {
    let s = start_default().await;
    let a = answer(s.client.get(s.url("/healthz")).send().await.unwrap()).await;
    assert_eq!(a.status, 200);
    assert_eq!(a.body, serde_json::json!({"status": "ok"}));
    let a = answer(s.client.get(s.url("/readyz")).send().await.unwrap()).await;
    assert_eq!(a.status, 200);
    assert_eq!(a.body["status"], "ready");
}

#[tokio::test]
async fn info_reports_the_limits_in_force() {
    let s = start(config_with(|c| {
        c.limits.max_states = 17;
        c.limits.deadline = None;
    }))
    .await;
    let a = answer(s.client.get(s.url("/v1/info")).send().await.unwrap()).await;
    assert_eq!(a.status, 200);
    assert_eq!(a.content_type, "application/json");
    assert_eq!(a.body["limits"]["max_states"], 17);
    assert_eq!(a.body["limits"]["deadline_secs"], serde_json::Value::Null);
    assert_eq!(
        a.body["limits"]["max_members"],
        Limits::default().max_members
    );
    assert_eq!(a.body["version"], env!("CARGO_PKG_VERSION"));
}

#[tokio::test]
async fn request_ids_are_echoed_or_generated() {
    let s = start_default().await;
    let res = s
        .client
        .get(s.url("/healthz"))
        .header("x-request-id", "trolley-42")
        .send()
        .await
        .unwrap();
    assert_eq!(res.headers()["x-request-id"], "trolley-42");
    let res = s.client.get(s.url("/healthz")).send().await.unwrap();
    let id = res.headers()["x-request-id"].to_str().unwrap().to_string();
    assert_eq!(id.len(), 36, "a generated UUID: {id}");
    // Errors carry it too.
    let res = s.client.get(s.url("/nowhere")).send().await.unwrap();
    assert!(res.headers().contains_key("x-request-id"));
}

/// Issue 15, item 6: every new HTTP method name used to add about 20 permanent series
/// (1,000 random 60 KB method names grew the server from 6 to 195 MB). Methods outside
/// the nine standard ones (RFC 9110 §9, RFC 5789) now share the label value `other`, so
/// 200 random 4 KB method names, with and without a key, add one route's series, not 200.
#[tokio::test]
async fn unknown_http_methods_share_one_metric_label() {
    let s = start_default().await;
    let before = s
        .client
        .get(s.url("/metrics"))
        .send()
        .await
        .unwrap()
        .text()
        .await
        .unwrap();
    for k in 0..200u32 {
        let name: String = (0..4096)
            .map(|i| (b'A' + ((k * 31 + i * 7) % 26) as u8) as char)
            .collect();
        let method = reqwest::Method::from_bytes(name.as_bytes()).unwrap();
        let path = if k % 2 == 0 {
            "/v1/estimate"
        } else {
            "/healthz"
        };
        let res = s.client.request(method, s.url(path)).send().await.unwrap();
        assert!(res.status().is_client_error(), "{}", res.status());
    }
    let text = s
        .client
        .get(s.url("/metrics"))
        .send()
        .await
        .unwrap()
        .text()
        .await
        .unwrap();
    let series = text
        .lines()
        .filter(|l| l.starts_with("tacit_http_requests_total{"))
        .count();
    // At most one series per route and status for all 200 methods together.
    assert!(series <= 4, "{series} request series:\n{text}");
    assert!(
        text.contains(r#"method="other""#),
        "the unknown methods are not under `other`:\n{text}"
    );
    assert!(
        text.lines().all(|l| l.len() < 1000),
        "a 4 KB method name leaked into a label"
    );
    // The exposition stays about as small as before (a few series more, not 200 × 4 KB).
    assert!(
        text.len() < before.len() + 20_000,
        "{} -> {} bytes",
        before.len(),
        text.len()
    );
}

#[tokio::test]
async fn metrics_count_requests_by_route_and_status_per_app() {
    let a = start_default().await;
    let b = start_default().await;
    for _ in 0..3 {
        a.client.get(a.url("/healthz")).send().await.unwrap();
    }
    a.client.get(a.url("/nowhere")).send().await.unwrap();
    let res = a.client.get(a.url("/metrics")).send().await.unwrap();
    assert_eq!(res.status(), 200);
    assert!(res.headers()["content-type"]
        .to_str()
        .unwrap()
        .starts_with("text/plain"));
    let text = res.text().await.unwrap();
    assert!(
        text.contains(r#"tacit_http_requests_total{route="/healthz",method="GET",status="200"} 3"#),
        "{text}"
    );
    assert!(
        text.contains(
            r#"tacit_http_requests_total{route="unmatched",method="GET",status="404"} 1"#
        ),
        "{text}"
    );
    assert!(text.contains("tacit_http_request_duration_seconds_bucket"));
    // HTTP series are labelled by the HTTP method; `filter` labels only the filter series
    // (API-v2 renames: the v2 rename applies to filter series alone).
    assert!(
        text.contains(
            r#"tacit_http_request_duration_seconds_count{route="/healthz",method="GET"} 3"#
        ),
        "{text}"
    );
    assert!(!text.contains(r#"filter="GET""#), "{text}");
    // The second app in this process saw none of it.
    let text_b = b
        .client
        .get(b.url("/metrics"))
        .send()
        .await
        .unwrap()
        .text()
        .await
        .unwrap();
    assert!(!text_b.contains(r#"route="/healthz""#), "{text_b}");
}

#[tokio::test]
async fn openapi_json_is_served_from_the_yaml() {
    let s = start_default().await;
    let a = answer(s.client.get(s.url("/openapi.json")).send().await.unwrap()).await;
    assert_eq!(a.status, 200);
    assert_eq!(a.content_type, "application/json");
    let from_yaml: serde_json::Value = serde_norway::from_str(tacit::http::OPENAPI_YAML).unwrap();
    assert_eq!(a.body, from_yaml);
    assert_eq!(a.body["openapi"], "3.1.0");
}

#[tokio::test]
async fn keys_guard_v1_but_not_probes_or_metrics() {
    let s = start(config_with(|c| {
        c.api_keys = vec!["crane-key-1".into(), "crane-key-2".into()];
    }))
    .await;
    let a = answer(s.client.get(s.url("/v1/info")).send().await.unwrap()).await;
    assert_problem(&a, 401);
    assert_eq!(a.headers["www-authenticate"], "Bearer");
    let a = answer(
        s.client
            .get(s.url("/v1/info"))
            .bearer_auth("crane-key-3")
            .send()
            .await
            .unwrap(),
    )
    .await;
    assert_problem(&a, 401);
    // A right key in the wrong scheme is still refused.
    let a = answer(
        s.client
            .get(s.url("/v1/info"))
            .header("authorization", "Basic crane-key-1")
            .send()
            .await
            .unwrap(),
    )
    .await;
    assert_problem(&a, 401);
    for key in ["crane-key-1", "crane-key-2"] {
        let a = answer(
            s.client
                .get(s.url("/v1/info"))
                .bearer_auth(key)
                .send()
                .await
                .unwrap(),
        )
        .await;
        assert_eq!(a.status, 200, "{}", a.text);
    }
    // Job routes are guarded before their body is looked at.
    let a = post(&s, "/v1/estimate", "application/json", "{}").await;
    assert_problem(&a, 401);
    for open in ["/healthz", "/readyz", "/metrics", "/openapi.json"] {
        let res = s.client.get(s.url(open)).send().await.unwrap();
        assert_eq!(res.status(), 200, "{open} should stay open");
    }
}

#[tokio::test]
async fn cors_is_off_by_default_and_allows_configured_origins() {
    let s = start_default().await;
    let res = s
        .client
        .get(s.url("/healthz"))
        .header("origin", "https://dashboard.example")
        .send()
        .await
        .unwrap();
    assert!(!res.headers().contains_key("access-control-allow-origin"));

    let s = start(config_with(|c| {
        c.cors_origins = vec!["https://dashboard.example".into()];
    }))
    .await;
    let res = s
        .client
        .request(reqwest::Method::OPTIONS, s.url("/v1/estimate"))
        .header("origin", "https://dashboard.example")
        .header("access-control-request-method", "POST")
        .header(
            "access-control-request-headers",
            "content-type,authorization",
        )
        .send()
        .await
        .unwrap();
    assert_eq!(
        res.headers()["access-control-allow-origin"],
        "https://dashboard.example"
    );
    let res = s
        .client
        .get(s.url("/healthz"))
        .header("origin", "https://elsewhere.example")
        .send()
        .await
        .unwrap();
    assert!(!res.headers().contains_key("access-control-allow-origin"));
}

#[tokio::test]
async fn no_job_slots_means_503_with_retry_after() {
    let s = start(config_with(|c| c.limits.max_concurrency = 0)).await;
    for path in ["/v1/estimate", "/v1/smooth", "/v1/simulate", "/v1/check"] {
        let a = post(&s, path, "application/json", "{}").await;
        assert_problem(&a, 503);
        assert_eq!(a.headers["retry-after"], "1", "{path}");
    }
    let a = post(&s, "/v1/estimate/stream", "application/x-ndjson", "{}\n").await;
    assert_problem(&a, 503);
    // Probes do no job work and are never shed.
    let res = s.client.get(s.url("/healthz")).send().await.unwrap();
    assert_eq!(res.status(), 200);
    let text = s
        .client
        .get(s.url("/metrics"))
        .send()
        .await
        .unwrap()
        .text()
        .await
        .unwrap();
    assert!(text.contains("tacit_http_shed_total"), "{text}");
}

/// Server settings under which [`held_job`] holds the only job slot for about two
/// seconds: one slot, a 2 s deadline and no limit on the steps of one gap.
fn holding(c: &mut ServerConfig) {
    c.limits.max_concurrency = 1;
    c.limits.deadline = Some(Duration::from_secs(2));
    c.limits.max_gap_steps = u64::MAX;
}

/// Start an estimate that computes until its deadline (under [`holding`]): fixed steps of
/// 1 µs over a gap of 10⁶ s, 10¹² steps. (An idle stream no longer holds a slot, so a
/// computing request is what fills the server.) Its answer is a 503 deadline problem.
fn held_job(
    s: &crate::support::Server,
) -> tokio::task::JoinHandle<reqwest::Result<reqwest::Response>> {
    let body = serde_json::json!({
        "model": {"states": ["level"],
                  "dynamics": {"rates": {"level": "-0.01*sin(level)"}},
                  "process_noise": {"density": {"level": 0.01}},
                  "sensors": {"gauge": {"measures": "level", "std": 0.1}}},
        "filter": {"method": "ekf", "integration": {"fixed_step": 1e-6}},
        "prior": {"t": 0.0, "mean": {"level": 1.0}, "std": {"level": 1.0}},
        "measurements": [{"t": 1e6, "values": {"gauge": 0.5}}]
    });
    let req = s
        .client
        .post(s.url("/v1/estimate"))
        .header("content-type", "application/json")
        .body(serde_json::to_vec(&body).unwrap());
    tokio::spawn(req.send())
}

/// Poll until `/v1/check` is shed with 503 (the held request owns the only slot),
/// failing after two seconds instead of hanging.
async fn wait_until_saturated(s: &crate::support::Server) {
    for _ in 0..200 {
        let res = s
            .client
            .post(s.url("/v1/check"))
            .header("content-type", "application/json")
            .body("{}")
            .send()
            .await
            .unwrap();
        if res.status() == 503 {
            return;
        }
        tokio::time::sleep(Duration::from_millis(10)).await;
    }
    panic!("the held job never took the only job slot");
}

#[tokio::test]
async fn a_full_server_sheds_instead_of_queueing() {
    let s = start(config_with(holding)).await;
    let pending = held_job(&s);
    wait_until_saturated(&s).await;
    let a = post(&s, "/v1/estimate", "application/json", "{}").await;
    assert_problem(&a, 503);
    assert!(a.headers.contains_key("retry-after"));
    // Health is not delayed by the held request.
    let res = s.client.get(s.url("/healthz")).send().await.unwrap();
    assert_eq!(res.status(), 200);
    // The held job ends at its deadline, and that frees the slot.
    let held = answer(pending.await.unwrap().unwrap()).await;
    assert_problem(&held, 503);
    assert_eq!(held.body["type"], "/problems/deadline-exceeded");
    let res = s
        .client
        .post(s.url("/v1/check"))
        .header("content-type", "application/json")
        .body("{}")
        .send()
        .await
        .unwrap();
    assert_ne!(res.status(), 503);
}

#[tokio::test]
async fn shutdown_flips_readiness_and_lets_running_requests_finish() {
    let mut s = start(config_with(|c| {
        holding(c);
        c.shutdown_grace = Duration::from_secs(10);
    }))
    .await;
    let pending = held_job(&s);
    wait_until_saturated(&s).await;
    s.signal_shutdown();
    // Readiness flips as soon as the signal is seen.
    for _ in 0..200 {
        if !s.state.is_ready() {
            break;
        }
        tokio::time::sleep(Duration::from_millis(10)).await;
    }
    assert!(!s.state.is_ready());
    let ready = tower::ServiceExt::oneshot(
        tacit::http::app(s.state.clone()),
        axum::http::Request::get("/readyz")
            .body(axum::body::Body::empty())
            .unwrap(),
    )
    .await
    .unwrap();
    assert_eq!(ready.status(), 503);
    // The running request still gets its answer after the signal.
    let held = answer(pending.await.unwrap().unwrap()).await;
    assert_problem(&held, 503);
    assert_eq!(held.body["type"], "/problems/deadline-exceeded");
    tokio::time::timeout(Duration::from_secs(5), s.shutdown())
        .await
        .expect("server stops once the running request is done")
        .unwrap();
}

#[tokio::test]
async fn shutdown_cuts_off_requests_past_the_grace_time() {
    let mut s = start(config_with(|c| {
        holding(c);
        c.shutdown_grace = Duration::from_millis(200);
    }))
    .await;
    let _pending = held_job(&s);
    wait_until_saturated(&s).await;
    s.signal_shutdown();
    let t0 = std::time::Instant::now();
    tokio::time::timeout(Duration::from_secs(5), s.shutdown())
        .await
        .expect("server stops after the grace time")
        .unwrap();
    assert!(t0.elapsed() >= Duration::from_millis(150));
}
