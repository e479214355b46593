//! Memory, slots and shutdown under hostile loads (issue 15, items 1, 4, 9 and 10): a
//! request is refused with a plain 413 before it reserves what it asks for, the estimate
//! behind that refusal bounds what a request really allocates, a request finding no free
//! job slot is answered 503 before its body is read, and a SIGTERM with a batch computing
//! and a stream waiting for input ends the stream with its last posterior, keeps
//! answering `/readyz` 503 through the drain, then exits at the end of the grace time
//! naming the job it abandoned.

use crate::support::{assert_problem, post, start, Server};
use futures_util::StreamExt;
use serde_json::{json, Value};
use std::time::Duration;
use tacit::config::Limits;
use tacit::http::ServerConfig;
use tacit::job::Stop;
use tokio::io::{AsyncReadExt, AsyncWriteExt};

fn config_with(f: impl FnOnce(&mut ServerConfig)) -> ServerConfig {
    let mut c = ServerConfig::default();
    f(&mut c);
    c
}

/// A plant of `n` states (each decaying on its own, with process noise), one gauge on
/// the first state: the smallest valid model of that size.
pub(crate) fn plant(n: usize) -> Value {
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
/// (0: none, the issue's "empty lines").
pub(crate) fn batch(n: usize, lines: usize, every: usize) -> Vec<u8> {
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
pub(crate) fn needed_bytes(detail: &str) -> f64 {
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
    // The issue's request: 187 kB of body, which reserved 25,431,808,256 bytes and
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
    // The issue's second case: on a 4 GB host (a quarter is 1 GB) the full-covariance
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
    let no = Stop::never();
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

/// Start an estimate that computes until its client goes (no deadline, no step limit:
/// see [`endless_batch`]), so it holds a job slot. (An idle stream holds none.)
fn held_job(s: &Server) -> tokio::task::JoinHandle<reqwest::Result<reqwest::Response>> {
    let req = s
        .client
        .post(s.url("/v1/estimate"))
        .header("content-type", "application/json")
        .body(endless_batch());
    tokio::spawn(req.send())
}

/// Send `head` on a fresh connection to `addr` and read until the answer's head ends,
/// giving up after 20 s (a server waiting for a body never sent would hang the test).
async fn head_answer(addr: std::net::SocketAddr, head: &str) -> String {
    let mut c = tokio::net::TcpStream::connect(addr).await.unwrap();
    c.write_all(head.as_bytes()).await.unwrap();
    let mut got = Vec::new();
    let read = async {
        let mut buf = [0u8; 4096];
        while !got.windows(4).any(|w| w == b"\r\n\r\n") {
            match c.read(&mut buf).await {
                Ok(0) | Err(_) => break,
                Ok(k) => got.extend_from_slice(&buf[..k]),
            }
        }
    };
    tokio::time::timeout(Duration::from_secs(20), read)
        .await
        .expect("no answer while the body was still unsent");
    String::from_utf8_lossy(&got).into_owned()
}

#[tokio::test]
async fn a_request_finding_no_free_slot_is_refused_before_its_body_is_read() {
    // The issue: 250 MB bodies against --max-concurrency 1 were uploaded whole before
    // their 503. Here the body is announced and never sent: the 503 must come anyway.
    let s = start(config_with(|c| {
        c.limits.max_concurrency = 1;
        c.limits.deadline = None;
        c.limits.max_gap_steps = u64::MAX;
    }))
    .await;
    let pending = held_job(&s);
    let mut saturated = false;
    for _ in 0..200 {
        if s.state.jobs_running() == 1 {
            saturated = true;
            break;
        }
        tokio::time::sleep(Duration::from_millis(10)).await;
    }
    assert!(saturated, "the held job never took the only slot");
    for path in ["/v1/estimate", "/v1/smooth", "/v1/simulate", "/v1/check"] {
        let head = format!(
            "POST {path} HTTP/1.1\r\nhost: tacit\r\ncontent-type: application/json\r\n\
             content-length: 250000000\r\n\r\n"
        );
        let answer = head_answer(s.addr, &head).await;
        assert!(answer.starts_with("HTTP/1.1 503"), "{path}: {answer}");
        assert!(
            answer.to_ascii_lowercase().contains("retry-after"),
            "{answer}"
        );
    }
    // The client leaves; the job notices and frees the slot.
    pending.abort();
    for _ in 0..200 {
        if s.state.jobs_running() == 0 {
            break;
        }
        tokio::time::sleep(Duration::from_millis(10)).await;
    }
    // With the slot free again the same announced body is read (and found short).
    let a = post(&s, "/v1/check", "application/json", "{}").await;
    assert_ne!(a.status, 503, "{}", a.text);
}

/// A child process killed and reaped when dropped, whatever the test's path.
pub(crate) struct Reaped(pub(crate) std::process::Child);

impl Drop for Reaped {
    fn drop(&mut self) {
        let _ = self.0.kill();
        let _ = self.0.wait();
    }
}

/// A kiln's temperature relaxing towards its setpoint, integrated with a fixed step so
/// small that one line's gap takes longer than any test: a batch that computes until it
/// is abandoned (with no compute deadline and no limit on one gap's steps).
fn endless_batch() -> Vec<u8> {
    serde_json::to_vec(&json!({
        "model": {
            "states": ["temp"],
            "dynamics": {"rates": {"temp": "-0.01*(temp - 900) + 0.001*sin(temp)"}},
            "process_noise": {"density": {"temp": 0.1}},
            "sensors": {"thermocouple": {"measures": "temp", "std": 2}}
        },
        "filter": {"method": "ekf", "integration": {"fixed_step": 1e-7}},
        "prior": {"t": 0, "mean": {"temp": 850}, "std": {"temp": 20}},
        "measurements": [{"t": 1e9, "values": {"thermocouple": 900}}]
    }))
    .unwrap()
}

#[tokio::test]
async fn sigterm_ends_a_waiting_stream_with_its_last_posterior_drains_with_readyz_503_and_exits_at_the_grace_time_naming_the_abandoned_job(
) {
    use std::process::{Command, Stdio};
    let log = std::path::Path::new(env!("CARGO_TARGET_TMPDIR"))
        .join(format!("drain-{}.log", std::process::id()));
    let mut child = Reaped(
        Command::new(env!("CARGO_BIN_EXE_tacit"))
            .args(["serve", "--addr", "127.0.0.1:0", "--deadline-secs", "0"])
            .args(["--shutdown-grace-secs", "2", "--max-concurrency", "1"])
            .args(["--max-gap-steps", "18446744073709551615"])
            .env_remove("RUST_LOG")
            .env_remove("TACIT_LOG_FORMAT")
            .env_remove("TACIT_API_KEYS")
            .env_remove("TACIT_API_KEYS_FILE")
            .stdin(Stdio::null())
            .stdout(Stdio::null())
            .stderr(std::fs::File::create(&log).unwrap())
            .spawn()
            .unwrap(),
    );
    let text = || std::fs::read_to_string(&log).unwrap_or_default();
    let mut base = None;
    for _ in 0..1000 {
        if let Some(l) = text().lines().find(|l| l.contains("listening")) {
            let at = l.find("127.0.0.1:").unwrap() + "127.0.0.1:".len();
            let port: String = l[at..].chars().take_while(char::is_ascii_digit).collect();
            base = Some(format!("http://127.0.0.1:{port}"));
            break;
        }
        tokio::time::sleep(Duration::from_millis(20)).await;
    }
    let Some(base) = base else {
        panic!("the server did not start: {}", text());
    };
    let client = reqwest::Client::new();
    // A stream (a kiln read once) that then waits for its next line, holding no slot.
    let (tx, rx) = tokio::sync::mpsc::channel::<Result<bytes::Bytes, std::io::Error>>(4);
    let stream_body =
        reqwest::Body::wrap_stream(futures_util::stream::unfold(rx, |mut rx| async {
            rx.recv().await.map(|x| (x, rx))
        }));
    let header = json!({
        "model": {
            "states": ["temp"],
            "dynamics": {"rates": {"temp": "-0.01*(temp - 900)"}},
            "process_noise": {"density": {"temp": 0.1}},
            "sensors": {"thermocouple": {"measures": "temp", "std": 2}}
        },
        "filter": {"method": "ekf"},
        "prior": {"t": 0, "mean": {"temp": 850}, "std": {"temp": 20}}
    });
    tx.send(Ok(format!(
        "{header}\n{}\n",
        r#"{"t": 1, "values": {"thermocouple": 880}}"#
    )
    .into()))
        .await
        .unwrap();
    let res = client
        .post(format!("{base}/v1/estimate/stream"))
        .header("content-type", "application/x-ndjson")
        .body(stream_body)
        .send()
        .await
        .unwrap();
    assert_eq!(res.status(), 200, "{}", text());
    let mut chunks = res.bytes_stream();
    let mut streamed = Vec::new();
    while !streamed.contains(&b'\n') {
        let chunk = tokio::time::timeout(Duration::from_secs(20), chunks.next())
            .await
            .expect("the stream's first estimate never came")
            .expect("the stream ended before its first estimate")
            .unwrap();
        streamed.extend_from_slice(&chunk);
    }
    let send = || {
        tokio::spawn(
            client
                .post(format!("{base}/v1/estimate"))
                .header("content-type", "application/json")
                .body(endless_batch())
                .send(),
        )
    };
    let mut running = send();
    // The batch holds the only slot once a cheap request is shed; a probe that took the
    // slot first had the batch shed instead, which is then sent again.
    let mut busy = false;
    for _ in 0..500 {
        tokio::time::sleep(Duration::from_millis(20)).await;
        if running.is_finished() {
            running = send();
            continue;
        }
        let r = client
            .post(format!("{base}/v1/check"))
            .header("content-type", "application/json")
            .body("{}")
            .send()
            .await
            .unwrap();
        if r.status() == 503 {
            busy = true;
            break;
        }
    }
    assert!(busy, "the batch never took the slot: {}", text());
    let term = Command::new("kill")
        .args(["-TERM", &child.0.id().to_string()])
        .status()
        .unwrap();
    assert!(term.success());
    // The waiting stream ends at once with the posterior of its last line and the reason.
    let rest = tokio::time::timeout(Duration::from_secs(20), async {
        while let Some(chunk) = chunks.next().await {
            streamed.extend_from_slice(&chunk.unwrap());
        }
    })
    .await;
    assert!(
        rest.is_ok(),
        "the stream did not end on the shutdown: {}",
        text()
    );
    let streamed = String::from_utf8(streamed).unwrap();
    let lines: Vec<Value> = streamed
        .lines()
        .map(|l| serde_json::from_str(l).unwrap())
        .collect();
    assert_eq!(lines.len(), 3, "{streamed}");
    assert_eq!(lines[0]["t"], 1.0, "{streamed}");
    assert_eq!(lines[1]["posterior"]["t"], 1.0, "{streamed}");
    assert_eq!(
        lines[1]["posterior"]["mean"], lines[0]["mean"],
        "{streamed}"
    );
    assert_eq!(lines[1]["summary"]["steps"], 1, "{streamed}");
    assert_eq!(
        lines[2]["error"]["type"], "/problems/shutting-down",
        "{streamed}"
    );
    drop(tx);
    // During the drain the probe answers 503 (the listener is still open).
    let mut saw_503 = false;
    for _ in 0..200 {
        if let Ok(r) = client.get(format!("{base}/readyz")).send().await {
            if r.status() == 503 {
                saw_503 = true;
                break;
            }
        }
        tokio::time::sleep(Duration::from_millis(5)).await;
    }
    // The process ends after its 2 s grace although the batch computes on; 60 s is only
    // the point where the test stops waiting (the batch alone would take hours).
    let mut status = None;
    for _ in 0..3000 {
        if let Some(st) = child.0.try_wait().unwrap() {
            status = Some(st);
            break;
        }
        tokio::time::sleep(Duration::from_millis(20)).await;
    }
    let log_text = text();
    assert!(
        saw_503,
        "/readyz never answered 503 during the drain: {log_text}"
    );
    assert!(
        status.is_some(),
        "still running after the grace time: {log_text}"
    );
    let line = log_text
        .lines()
        .find(|l| l.contains("abandoning"))
        .unwrap_or_else(|| panic!("no line naming the abandoned work: {log_text}"));
    assert!(line.contains("/v1/estimate request "), "{line}");
    running.abort();
}

#[tokio::test]
async fn a_large_batch_answer_streams_with_the_same_bytes_and_a_late_failure_ends_in_an_error_member(
) {
    // From 4096 lines, an answer at or over `stream_answer_bytes` (0 here, 64 MiB by
    // default) leaves as it is written: chunked, no Content-Length, the same bytes as the
    // answer held whole.
    let s = start(config_with(|c| c.stream_answer_bytes = 0)).await;
    let body = batch(4, 6000, 2);
    assert!(
        body.len() > 64 << 10,
        "a body on the compute lane is not streamed"
    );
    let a = post(&s, "/v1/estimate", "application/json", body.clone()).await;
    assert_eq!(a.status, 200, "{}", a.text);
    assert!(!a.headers.contains_key("content-length"), "{:?}", a.headers);
    let whole = tacit::job::estimate(&body, &Limits::default(), &Stop::never()).unwrap();
    assert!(a.text.as_bytes() == whole.body, "the streamed bytes differ");
    // A line going back in time at 5000: the head has gone, so the answer ends with an
    // `error` member carrying the line's problem instead of posterior and summary.
    let mut v: Value = serde_json::from_slice(&body).unwrap();
    v["measurements"][5000]["t"] = json!(0);
    let bad = serde_json::to_vec(&v).unwrap();
    let a = post(&s, "/v1/estimate", "application/json", bad.clone()).await;
    assert_eq!(a.status, 200, "{}", a.text);
    let e = &a.body["error"];
    assert_eq!(e["status"], 422, "{}", a.text);
    assert_eq!(e["errors"][0]["pointer"], "/measurements/5000/t");
    assert!(a.body.get("posterior").is_none() && a.body.get("summary").is_none());
    let sent = a.body["estimates"].as_array().unwrap();
    assert!(!sent.is_empty() && sent.len() <= 5000, "{}", sent.len());
    // What was sent before the failure is what the whole run gave for those lines.
    let full: Value = serde_json::from_slice(&whole.body).unwrap();
    assert!(sent[..] == full["estimates"].as_array().unwrap()[..sent.len()]);
    // A failure before the first piece is an ordinary problem answer.
    let mut v: Value = serde_json::from_slice(&body).unwrap();
    v["measurements"][3]["t"] = json!(0);
    let a = post(
        &s,
        "/v1/estimate",
        "application/json",
        serde_json::to_vec(&v).unwrap(),
    )
    .await;
    assert_problem(&a, 422);
    // Held whole below the threshold: the default server declares the length.
    let d = start(ServerConfig::default()).await;
    let a = post(&d, "/v1/estimate", "application/json", body).await;
    assert_eq!(a.status, 200);
    assert!(a.headers.contains_key("content-length"));
}
