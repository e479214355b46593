//! Issue 13 bench over HTTP: Lorenz-96 written as one state family of n = 10⁵ elements
//! (F = 8), every second element read with std 1, 20 members, radius 5, one RK4 step of
//! 0.05 per line, posted as an NDJSON stream to a real server on loopback. Prints the
//! wall time per line (from one estimate line's arrival to the next, least and median)
//! and the size of the closing line, whose posterior carries the members. Run with
//! `cargo bench --bench large_stream` (`TACIT_STREAM_N`, `TACIT_STREAM_LINES` change the
//! size and the number of lines).

// A bench binary, not a library: no public items to document.
#![allow(missing_docs)]

use futures_util::StreamExt;
use serde_json::json;
use std::time::Instant;
use tacit::http::{serve, AppState, ServerConfig};

fn env(name: &str, default: usize) -> usize {
    std::env::var(name)
        .ok()
        .and_then(|s| s.parse().ok())
        .unwrap_or(default)
}

/// A cheap deterministic wiggle in [-1, 1) (the bench measures time, not accuracy).
fn wiggle(k: usize) -> f64 {
    ((k as f64) * 0.618_033_988_749_894_9).fract() * 2.0 - 1.0
}

fn main() {
    let n = env("TACIT_STREAM_N", 100_000);
    let lines = env("TACIT_STREAM_LINES", 12);
    let rt = tokio::runtime::Builder::new_multi_thread()
        .enable_all()
        .build()
        .unwrap();
    rt.block_on(run(n, lines));
}

async fn run(n: usize, lines: usize) {
    let mut config = ServerConfig::default();
    config.limits.max_line_bytes = 64 << 20;
    config.limits.max_body_bytes = 1 << 30;
    config.limits.deadline = None;
    config.stream_idle = std::time::Duration::from_secs(600);
    let listener = tokio::net::TcpListener::bind("127.0.0.1:0").await.unwrap();
    let addr = listener.local_addr().unwrap();
    let state = AppState::new(config);
    let (stop, rx) = tokio::sync::oneshot::channel::<()>();
    let server = tokio::spawn(serve(listener, state, async move {
        let _ = rx.await;
    }));

    let mean: Vec<f64> = (0..n).map(|k| 8.0 + wiggle(k)).collect();
    let header = json!({
        "model": {
            "families": {"x": {"size": n, "boundary": "periodic"}},
            "parameters": {"F": 8.0},
            "dynamics": {"rates": {"x[i]": "(x[i+1] - x[i-2])*x[i-1] - x[i] + F"}},
            "sensors": {"obs": {"measures": "x[i]", "every": 2, "std": 1.0}}
        },
        "filter": {"method": "enkf", "ensemble": {"members": 20, "seed": 1, "inflation": 1.02,
                   "update": "local", "radius": 5}, "integration": {"fixed_step": 0.05}},
        "prior": {"t": 0.0, "mean": {"x": mean}, "std": {"x": 1.0}}
    });
    let mut texts = vec![serde_json::to_string(&header).unwrap() + "\n"];
    for l in 1..=lines {
        let z: Vec<f64> = (0..n).step_by(2).map(|k| 8.0 + wiggle(k + 7 * l)).collect();
        let line = json!({"t": l as f64 * 0.05, "values": {"obs": z}});
        texts.push(serde_json::to_string(&line).unwrap() + "\n");
    }
    let line_bytes = texts[1].len();
    let body = reqwest::Body::wrap_stream(futures_util::stream::iter(
        texts.into_iter().map(Ok::<String, std::io::Error>),
    ));
    let client = reqwest::Client::new();
    let start = Instant::now();
    let res = client
        .post(format!("http://{addr}/v1/estimate/stream"))
        .header("content-type", "application/x-ndjson")
        .body(body)
        .send()
        .await
        .unwrap();
    assert_eq!(res.status(), 200);
    let mut stream = res.bytes_stream();
    let mut arrivals = Vec::new();
    let mut current = 0usize;
    let mut last_len = 0usize;
    while let Some(chunk) = stream.next().await {
        let chunk = chunk.unwrap();
        for &b in chunk.iter() {
            current += 1;
            if b == b'\n' {
                arrivals.push(start.elapsed().as_secs_f64());
                last_len = current;
                current = 0;
            }
        }
    }
    assert_eq!(
        arrivals.len(),
        lines + 1,
        "one line per reading and the closing line"
    );
    let mut per: Vec<f64> = arrivals[..lines].windows(2).map(|w| w[1] - w[0]).collect();
    per.sort_by(f64::total_cmp);
    println!(
        "stream n={n}, every 2nd read ({} values, {line_bytes} bytes per line), 20 members, radius 5, {} threads",
        n.div_ceil(2),
        rayon::current_num_threads()
    );
    println!(
        "first estimate after {:.3} s (header parse, members drawn, first cycle)",
        arrivals[0]
    );
    println!(
        "time per line: least {:.4} s, median {:.4} s over {} gaps",
        per[0],
        per[per.len() / 2],
        per.len()
    );
    println!(
        "closing line (posterior with members, summary): {last_len} bytes ({:.1} MB)",
        last_len as f64 / 1e6
    );
    let _ = stop.send(());
    let _ = server.await;
}
