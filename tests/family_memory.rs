//! Family models with the local ensemble update in the memory budget: the estimate bounds
//! what a whole request allocates, and a request over the budget (batch or a stream's
//! header) is a plain 413 before any member is drawn, the server answering on.
//!
//! Scenario (our own): a long cooling channel cut into cells, each cell's temperature
//! drifting with its neighbours; probes read every second cell.

use crate::http_memory::needed_bytes;
use crate::support::{answer, assert_problem, post_json, start};
use serde_json::{json, Value};
use tacit::config::Limits;
use tacit::http::ServerConfig;
use tacit::job::Stop;

/// A family of `n` cells read every second cell, `members` members, `lines` lines each
/// with its readings (`empty`: lines with a time only).
fn request(n: usize, members: usize, lines: usize, empty: bool) -> Value {
    let read = n.div_ceil(2);
    let measurements: Vec<Value> = (1..=lines)
        .map(|k| {
            if empty {
                return json!({"t": k as f64 * 0.05});
            }
            let z: Vec<f64> = (0..read)
                .map(|i| 20.0 + ((i * 7 + k * 3) % 11) as f64 * 0.1)
                .collect();
            json!({"t": k as f64 * 0.05, "values": {"probe": z}})
        })
        .collect();
    json!({
        "model": {
            "families": {"cell": {"size": n, "boundary": "periodic"}},
            "parameters": {"k": 0.3},
            "dynamics": {"rates": {"cell[i]": "k*(cell[i+1] - 2*cell[i] + cell[i-1])"}},
            "sensors": {"probe": {"measures": "cell[i]", "every": 2, "std": 0.5}}
        },
        "filter": {"method": "enkf",
                   "ensemble": {"members": members, "seed": 7, "inflation": 1.03,
                                "update": "local", "radius": 5},
                   "integration": {"fixed_step": 0.05}},
        "prior": {"t": 0, "mean": {"cell": 20.0}, "std": {"cell": 1.0}},
        "measurements": measurements
    })
}

#[test]
fn the_family_memory_estimate_bounds_what_it_allocates() {
    // The estimate is an upper bound within a factor of 2 of the peak a counting
    // allocator measures over the whole request (the body, held by the caller, added):
    // an answer of many lines, many members over few lines, and empty lines whose
    // answer is all the request holds.
    let limits = Limits {
        max_request_bytes: u64::MAX,
        ..Limits::default()
    };
    for (n, members, lines, empty) in [
        (4_000, 20, 20, false),
        (2_000, 60, 4, false),
        (20_000, 10, 10, true),
    ] {
        let body = serde_json::to_vec(&request(n, members, lines, empty)).unwrap();
        let need = tacit::job::batch_memory(&body, &limits, false).unwrap() as f64;
        let no = Stop::never();
        let used = body.len() as f64
            + allocation_counter::measure(|| {
                let r = tacit::job::estimate(&body, &limits, &no);
                assert!(r.is_ok(), "{n}×{members}: {:?}", r.err());
            })
            .bytes_max as f64;
        let ratio = need / used;
        eprintln!(
            "family n {n}, {members} members, {lines} lines: estimate {need}, measured {used}, ratio {ratio:.2}"
        );
        assert!(
            (1.0..=2.0).contains(&ratio),
            "n {n}, {members} members: estimate {need}, measured {used}, ratio {ratio}"
        );
    }
}

#[tokio::test]
async fn a_family_run_over_the_memory_budget_is_a_413_and_the_server_goes_on() {
    // What any local run of 20 members over 100,000 states must hold whatever the code:
    // the members as binary64 (8 bytes a number) and, in the posterior that carries them,
    // at least a digit and a separator per number: 10 bytes × 20 × 100,000 = 20 MB,
    // over a budget of 16 MB.
    let (n, members) = (100_000, 20);
    let floor = (10 * members * n) as f64;
    let mut c = ServerConfig::default();
    c.limits.max_request_bytes = 16_000_000;
    assert!(floor > c.limits.max_request_bytes as f64);
    let s = start(c).await;

    let a = post_json(&s, "/v1/estimate", &request(n, members, 1, true)).await;
    assert_problem(&a, 413);
    assert_eq!(a.body["type"], "/problems/over-memory-budget");
    let detail = a.body["detail"].as_str().unwrap();
    assert!(needed_bytes(detail) >= floor, "{detail} < {floor}");

    // The same run as a stream: its header is refused the same way.
    let mut header = request(n, members, 0, true);
    header.as_object_mut().unwrap().remove("measurements");
    let res = s
        .client
        .post(s.url("/v1/estimate/stream"))
        .header("content-type", "application/x-ndjson")
        .body(format!("{header}\n{{\"t\":0.05}}\n"))
        .send()
        .await
        .unwrap();
    let streamed = answer(res).await;
    let text = &streamed.text;
    assert!(
        text.contains("over-memory-budget") && needed_bytes(text) >= floor,
        "{}: {text}",
        streamed.status
    );

    let small = post_json(&s, "/v1/estimate", &request(40, 8, 3, false)).await;
    assert_eq!(small.status, 200, "{}", small.text);
    let health = s.client.get(s.url("/healthz")).send().await.unwrap();
    assert_eq!(health.status(), 200);
    s.shutdown().await.unwrap();
}
