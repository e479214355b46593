//! Memory and slots under hostile sizes (issue 15, items 1, 4 and 9): a request is
//! refused with a plain 413 before it reserves what it asks for, the estimate behind that
//! refusal bounds what a request really allocates, and a request finding no free job slot
//! is answered 503 before its body is read.

use crate::support::{assert_problem, post, start};
use serde_json::{json, Value};
use std::sync::atomic::AtomicBool;
use std::time::Duration;
use tacit::config::Limits;
use tacit::http::ServerConfig;

fn config_with(f: impl FnOnce(&mut ServerConfig)) -> ServerConfig {
    let mut c = ServerConfig::default();
    f(&mut c);
    c
}

/// A plant of `n` states (each decaying on its own, with process noise), one gauge on
/// the first state: the smallest valid model of that size.
fn plant(n: usize) -> Value {
    let names: Vec<String> = (0..n).map(|i| format!("x{i}")).collect();
    let rates: serde_json::Map<String, Value> = names
        .iter()
        .map(|k| (k.clone(), json!(format!("-0.1*{k}"))))
        .collect();
    let each = |v: f64| -> serde_json::Map<String, Value> {
        names.iter().map(|k| (k.clone(), json!(v))).collect()
    };
    json!({
        "model": {
            "states": names,
            "dynamics": {"rates": rates},
            "process_noise": {"density": each(0.01)},
            "sensors": {"gauge": {"measures": "x0", "std": 0.1}}
        },
        "filter": {"method": "ekf"},
        "prior": {"t": 0, "mean": each(0.0), "std": each(1.0)}
    })
}

/// The request body: `plant(n)` with `lines` lines, every `every`th carrying a reading
/// (0: none, the "empty lines").
fn batch(n: usize, lines: usize, every: usize) -> Vec<u8> {
    let mut v = plant(n);
    let list: Vec<Value> = (1..=lines)
        .map(|k| {
            if every > 0 && k % every == 0 {
                json!({"t": k, "values": {"gauge": 0.01 * (k % 17) as f64}})
            } else {
                json!({"t": k})
            }
        })
        .collect();
    v["measurements"] = Value::Array(list);
    serde_json::to_vec(&v).unwrap()
}

/// The number of bytes in a detail's "needs about 25 GB" (powers of 1000).
fn needed_bytes(detail: &str) -> f64 {
    let rest = &detail[detail.find("needs about ").expect(detail) + "needs about ".len()..];
    let mut words = rest.split_whitespace();
    let x: f64 = words.next().unwrap().parse().unwrap();
    let unit = match words.next().unwrap() {
        "TB" => 1e12,
        "GB" => 1e9,
        "MB" => 1e6,
        "kB" => 1e3,
        _ => 1.0,
    };
    x * unit
}

#[tokio::test]
async fn a_smooth_of_256_states_and_16000_empty_lines_is_refused_before_it_allocates() {
    // The request: 187 kB of body, which reserved 25,431,808,256 bytes and
    // aborted the process. Now a plain 413, and the server goes on answering.
    let s = start(ServerConfig::default()).await;
    let body = batch(256, 16_000, 0);
    assert!(body.len() < 2 << 20, "{} bytes", body.len());
    let a = post(&s, "/v1/smooth", "application/json", body).await;
    assert_problem(&a, 413);
    assert_eq!(a.body["type"], "/problems/over-memory-budget");
    let detail = a.body["detail"].as_str().unwrap();
    assert!(detail.contains("the limit is 1.1 GB"), "{detail}");
    // What smoothing must keep whatever the code: per line the predicted and filtered
    // covariances and the cross covariance, 3·n² doubles (the backward pass of R5, Rauch,
    // Tung, Striebel 1965, reads all three at every step).
    let kept = 16_000.0 * 3.0 * 256.0 * 256.0 * 8.0;
    assert!(needed_bytes(detail) >= kept, "{detail} < {kept}");
    let res = s.client.get(s.url("/healthz")).send().await.unwrap();
    assert_eq!(res.status(), 200);
}

#[tokio::test]
async fn an_estimate_of_256_states_and_4000_lines_is_refused_on_a_small_budget() {
    // The second case: on a 4 GB host (a quarter is 1 GB) the full-covariance
    // answer alone is 4000 · 256² numbers, at least 4000 · 256² · 2 bytes ("0,").
    let s = start(ServerConfig::default()).await;
    let a = post(&s, "/v1/estimate", "application/json", batch(256, 4_000, 0)).await;
    assert_problem(&a, 413);
    assert_eq!(a.body["type"], "/problems/over-memory-budget");
    let floor = 4_000.0 * 256.0 * 256.0 * 2.0;
    let detail = a.body["detail"].as_str().unwrap();
    assert!(needed_bytes(detail) >= floor, "{detail} < {floor}");
}

#[tokio::test]
async fn simulate_over_the_memory_budget_is_refused_before_it_runs() {
    // 256 states × 1e6 times: the truth alone is 1e6 lines of 256 numbers, at least
    // 1e6 · 256 · 2 bytes.
    let s = start(ServerConfig::default()).await;
    let mut v = plant(256);
    v.as_object_mut().unwrap().remove("filter");
    v["times"] = json!({"start": 0, "step": 1, "count": 1_000_000});
    v["seed"] = json!(7);
    let a = post(
        &s,
        "/v1/simulate",
        "application/json",
        serde_json::to_vec(&v).unwrap(),
    )
    .await;
    assert_problem(&a, 413);
    assert_eq!(a.body["type"], "/problems/over-memory-budget");
    let floor = 1e6 * 256.0 * 2.0;
    let detail = a.body["detail"].as_str().unwrap();
    assert!(needed_bytes(detail) >= floor, "{detail} < {floor}");
}

#[tokio::test]
async fn simulate_stops_at_the_compute_deadline() {
    // Within budget but past the deadline: stopped with the deadline's 503 instead of
    // running on without one.
    let s = start(config_with(|c| {
        c.limits.max_request_bytes = 64 << 30;
        c.limits.deadline = Some(Duration::from_millis(1));
    }))
    .await;
    let mut v = plant(8);
    v.as_object_mut().unwrap().remove("filter");
    v["times"] = json!({"start": 0, "step": 1, "count": 1_000_000});
    let a = post(
        &s,
        "/v1/simulate",
        "application/json",
        serde_json::to_vec(&v).unwrap(),
    )
    .await;
    assert_problem(&a, 503);
    assert_eq!(a.body["type"], "/problems/deadline-exceeded");
    assert!(
        a.body["detail"].as_str().unwrap().contains("deadline"),
        "{}",
        a.text
    );
}

/// Peak bytes allocated on this thread while `f` runs.
fn peak(f: impl FnOnce()) -> f64 {
    allocation_counter::measure(f).bytes_max as f64
}

#[test]
fn the_memory_estimate_bounds_what_a_request_allocates() {
    // The estimate is an upper bound within a factor of 5 of the peak a counting
    // allocator measures (single-threaded paths: below 4096 lines, and smoothing), for
    // a few shapes; the body is held by the caller and counted by the estimate.
    let limits = Limits {
        max_request_bytes: u64::MAX,
        ..Limits::default()
    };
    let no = AtomicBool::new(false);
    for (n, lines, every) in [(2, 3000, 1), (16, 1000, 3), (48, 300, 2)] {
        let body = batch(n, lines, every);
        for smooth in [false, true] {
            let need = tacit::job::batch_memory(&body, &limits, smooth).unwrap() as f64;
            let used = body.len() as f64
                + peak(|| {
                    let r = if smooth {
                        tacit::job::smooth_pieces(&body, &limits, &no)
                    } else {
                        tacit::job::estimate_pieces(&body, &limits, &no)
                    };
                    assert!(r.is_ok(), "n={n}");
                });
            let ratio = need / used;
            eprintln!("n={n} lines={lines} smooth={smooth}: estimate {need}, measured {used}, ratio {ratio:.2}");
            assert!(
                (1.0..=5.0).contains(&ratio),
                "n={n} lines={lines} smooth={smooth}: estimate {need}, measured {used}, ratio {ratio}"
            );
        }
    }
}
