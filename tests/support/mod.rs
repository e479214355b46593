//! Starting real servers on ephemeral loopback ports, and small helpers shared by the
//! HTTP tests.

#![allow(dead_code)]

use std::net::SocketAddr;
use tacit::http::{self, AppState, ServerConfig};
use tokio::sync::oneshot;
use tokio::task::JoinHandle;

/// A server running in the test's runtime; stops when dropped.
pub(crate) struct Server {
    /// Where it listens.
    pub addr: SocketAddr,
    /// `http://127.0.0.1:PORT`.
    pub base: String,
    /// A client for it.
    pub client: reqwest::Client,
    /// The app's state (readiness, metrics).
    pub state: AppState,
    stop: Option<oneshot::Sender<()>>,
    task: Option<JoinHandle<std::io::Result<()>>>,
}

impl Server {
    /// The full URL of `path`.
    pub(crate) fn url(&self, path: &str) -> String {
        format!("{}{}", self.base, path)
    }

    /// Send the shutdown signal and wait for the server loop to return.
    pub(crate) async fn shutdown(mut self) -> std::io::Result<()> {
        if let Some(s) = self.stop.take() {
            let _ = s.send(());
        }
        match self.task.take() {
            Some(t) => t.await.expect("server task"),
            None => Ok(()),
        }
    }

    /// Send the shutdown signal without waiting.
    pub(crate) fn signal_shutdown(&mut self) {
        if let Some(s) = self.stop.take() {
            let _ = s.send(());
        }
    }
}

impl Drop for Server {
    fn drop(&mut self) {
        if let Some(t) = &self.task {
            t.abort();
        }
    }
}

/// Start the real server (same `serve` as `tacit serve`) with `config`.
pub(crate) async fn start(config: ServerConfig) -> Server {
    let listener = tokio::net::TcpListener::bind("127.0.0.1:0")
        .await
        .expect("bind loopback");
    let addr = listener.local_addr().expect("local addr");
    let state = AppState::new(config);
    let (stop, rx) = oneshot::channel::<()>();
    let task = tokio::spawn(http::serve(listener, state.clone(), async move {
        let _ = rx.await;
    }));
    Server {
        addr,
        base: format!("http://{addr}"),
        client: reqwest::Client::new(),
        state,
        stop: Some(stop),
        task: Some(task),
    }
}

/// Start with the default configuration.
pub(crate) async fn start_default() -> Server {
    start(ServerConfig::default()).await
}

/// Serve an arbitrary router on an ephemeral port (for routers built in tests).
pub(crate) async fn serve_router(router: axum::Router) -> String {
    let listener = tokio::net::TcpListener::bind("127.0.0.1:0")
        .await
        .expect("bind loopback");
    let addr = listener.local_addr().expect("local addr");
    tokio::spawn(async move { axum::serve(listener, router).await });
    format!("http://{addr}")
}

/// The parts of a problem answer every test looks at.
#[derive(Debug)]
pub(crate) struct Answer {
    pub status: u16,
    pub content_type: String,
    pub headers: reqwest::header::HeaderMap,
    pub body: serde_json::Value,
    pub text: String,
}

/// Read a response whole, parsing JSON when it is JSON.
pub(crate) async fn answer(res: reqwest::Response) -> Answer {
    let status = res.status().as_u16();
    let headers = res.headers().clone();
    let content_type = headers
        .get(reqwest::header::CONTENT_TYPE)
        .and_then(|v| v.to_str().ok())
        .unwrap_or("")
        .to_string();
    let text = res.text().await.expect("body");
    let body = serde_json::from_str(&text).unwrap_or(serde_json::Value::Null);
    Answer {
        status,
        content_type,
        headers,
        body,
        text,
    }
}

/// POST `body` to `path` with the given content type and read the answer whole.
pub(crate) async fn post(
    s: &Server,
    path: &str,
    content_type: &str,
    body: impl Into<reqwest::Body>,
) -> Answer {
    answer(
        s.client
            .post(s.url(path))
            .header("content-type", content_type)
            .body(body)
            .send()
            .await
            .unwrap(),
    )
    .await
}

/// Assert an RFC 9457 answer with `status`, checking the shape every problem has.
pub(crate) fn assert_problem(a: &Answer, status: u16) {
    assert_eq!(a.status, status, "status of {}", a.text);
    assert_eq!(a.content_type, "application/problem+json", "{}", a.text);
    assert_eq!(a.body["status"], status, "{}", a.text);
    // The v2 contract (openapi/openapi.yaml): a relative reference the service serves as
    // a page (RFC 9457 §3.1.1).
    assert!(
        a.body["type"]
            .as_str()
            .is_some_and(|t| t.starts_with("/problems/")),
        "{}",
        a.text
    );
    assert!(a.body["title"].as_str().is_some_and(|t| !t.is_empty()));
    let detail = a.body["detail"].as_str().unwrap_or("");
    assert!(!detail.is_empty(), "problem without detail: {}", a.text);
    // Clear lower-case messages (RULES): the detail does not start with a capital.
    assert!(
        !detail.starts_with(|c: char| c.is_ascii_uppercase()),
        "detail should be lower case: {detail}"
    );
    assert!(a.headers.contains_key("x-request-id"));
}

/// Assert that the problem lists an error at exactly `pointer`.
pub(crate) fn assert_pointer(a: &Answer, pointer: &str) {
    let errors = a.body["errors"].as_array().cloned().unwrap_or_default();
    assert!(
        errors.iter().any(|e| e["pointer"] == pointer),
        "expected an error at {pointer:?}, got {}",
        a.text
    );
}

/// POST a JSON value to `path` and read the answer whole.
pub(crate) async fn post_json(s: &Server, path: &str, body: &serde_json::Value) -> Answer {
    post(
        s,
        path,
        "application/json",
        serde_json::to_vec(body).unwrap(),
    )
    .await
}

/// POST raw bytes as `application/json` (for bodies that are not JSON).
pub(crate) async fn post_raw(s: &Server, path: &str, body: impl Into<reqwest::Body>) -> Answer {
    post(s, path, "application/json", body).await
}

/// A calibration request on a simulated cart whose velocity is a random walk (our own
/// plant): position read every `dt` = 0.1 s with std `r`, velocity density `q`; the data
/// are drawn exactly from the discretised model (Q = q[[dt³/3, dt²/2], [dt²/2, dt]],
/// common practice) with a seeded ChaCha stream. `free` fits both noise settings,
/// starting from twice and half the truth.
pub(crate) fn cart_request(seed: u64, n: usize, q: f64, r: f64) -> serde_json::Value {
    use rand::SeedableRng;
    use rand_distr::{Distribution, StandardNormal};
    let mut rng = rand_chacha::ChaCha20Rng::seed_from_u64(seed);
    let mut z = || -> f64 { StandardNormal.sample(&mut rng) };
    let dt: f64 = 0.1;
    let (q11, q12, q22) = (q * dt.powi(3) / 3.0, q * dt * dt / 2.0, q * dt);
    // Cholesky factor of Q.
    let l11 = q11.sqrt();
    let l21 = q12 / l11;
    let l22 = (q22 - l21 * l21).sqrt();
    let (mut pos, mut vel) = (0.0, 1.0);
    let mut lines = Vec::with_capacity(n);
    for k in 1..=n {
        let (a, b) = (z(), z());
        pos += vel * dt + l11 * a;
        vel += l21 * a + l22 * b;
        let t = k as f64 * dt;
        lines.push(serde_json::json!({"t": t, "values": {"encoder": pos + r * z()}}));
    }
    serde_json::json!({
        "model": {"states": ["pos", "vel"],
                  "dynamics": {"rates": {"pos": "vel", "vel": "0"}},
                  "process_noise": {"density": {"vel": 2.0 * q}},
                  "sensors": {"encoder": {"measures": "pos", "std": 0.5 * r}}},
        "filter": {"method": "ekf"},
        "prior": {"t": 0, "mean": {"pos": 0.0, "vel": 1.0}, "std": {"pos": 1e-3, "vel": 1e-3}},
        "measurements": lines,
        "free": {"/model/process_noise/density/vel": {}, "/model/sensors/encoder/std": {}}
    })
}
