//! The issue 15 bomb test: each hostile request of items 1, 2, 4, 5, 7, 9 and 11 against
//! the real binary with a small memory budget (64 MB) and a 3 s deadline. Every request
//! gets a clear refusal or a bounded answer, the process never aborts, its peak resident
//! memory stays below the budget plus a stated margin, `/healthz` answers throughout, and
//! no core is busy once the last answer is in.

use crate::http_memory::{batch, plant, Reaped};
use serde_json::{json, Value};
use std::time::Duration;
use tokio::io::{AsyncReadExt, AsyncWriteExt};

/// The per-request memory budget the server runs with, bytes.
const BUDGET: u64 = 64_000_000;
/// What the whole process may hold beyond one budget: the binary's pages, the runtime,
/// the lane threads and the sockets' buffers (stated, not measured).
const MARGIN: u64 = 64_000_000;

/// A field of `/proc/PID/status` in bytes (`VmHWM:   1234 kB`).
fn status_bytes(pid: u32, field: &str) -> u64 {
    let text = std::fs::read_to_string(format!("/proc/{pid}/status")).unwrap();
    let line = text
        .lines()
        .find(|l| l.starts_with(field))
        .unwrap_or_else(|| panic!("no {field} in {text}"));
    let kb: u64 = line.split_whitespace().nth(1).unwrap().parse().unwrap();
    kb * 1024
}

/// The process's CPU time so far, clock ticks (utime + stime, fields 14 and 15 of
/// `/proc/PID/stat`, proc(5)).
fn cpu_ticks(pid: u32) -> u64 {
    let text = std::fs::read_to_string(format!("/proc/{pid}/stat")).unwrap();
    // The command name may hold spaces; the fields after it start past the last ')'.
    let rest = &text[text.rfind(')').unwrap() + 2..];
    let f: Vec<&str> = rest.split_whitespace().collect();
    // `rest` starts at field 3 (state), so field k is f[k - 3].
    f[11].parse::<u64>().unwrap() + f[12].parse::<u64>().unwrap()
}

/// The request's status and body, read in full (bodies here are bounded by the budget).
async fn send(client: &reqwest::Client, url: String, ctype: &str, body: Vec<u8>) -> (u16, String) {
    let r = client
        .post(url)
        .header("content-type", ctype)
        .body(body)
        .send()
        .await
        .unwrap();
    let status = r.status().as_u16();
    (status, r.text().await.unwrap_or_default())
}

/// POST `len` spaces to `path` on a raw socket, writing the body while reading the
/// answer; the answer's status code.
async fn raw_post(addr: String, path: &'static str, len: usize) -> u16 {
    let sock = tokio::net::TcpStream::connect(&addr).await.unwrap();
    let (mut rd, mut wr) = sock.into_split();
    let head = format!(
        "POST {path} HTTP/1.1\r\nHost: x\r\nContent-Type: application/json\r\n\
         Content-Length: {len}\r\nConnection: close\r\n\r\n"
    );
    wr.write_all(head.as_bytes()).await.unwrap();
    let upload = tokio::spawn(async move {
        // A server that refused before reading closes the socket: the write fails.
        let _ = wr.write_all(&vec![b' '; len]).await;
        wr
    });
    let mut answer = Vec::new();
    let read = tokio::time::timeout(Duration::from_secs(20), rd.read_to_end(&mut answer)).await;
    assert!(read.is_ok(), "item 9: no answer within 20 s");
    upload.abort();
    let text = String::from_utf8_lossy(&answer);
    text.get(9..12)
        .and_then(|c| c.parse().ok())
        .unwrap_or_else(|| panic!("item 9: not an HTTP answer: {text}"))
}

/// `status` is one of `allowed`, else the test fails naming the case.
fn expect(case: &str, (status, text): &(u16, String), allowed: &[u16]) {
    let head: String = text.chars().take(400).collect();
    eprintln!("bomb: {case}: {status}");
    assert!(
        allowed.contains(status),
        "{case}: answered {status}, expected one of {allowed:?}: {head}"
    );
}

#[tokio::test]
async fn hostile_requests_on_a_small_budget_are_refused_or_bounded_with_healthz_up_and_no_core_left_busy(
) {
    use std::process::{Command, Stdio};
    let log = std::path::Path::new(env!("CARGO_TARGET_TMPDIR"))
        .join(format!("bomb-{}.log", std::process::id()));
    let child = Reaped(
        Command::new(env!("CARGO_BIN_EXE_tacit"))
            .args(["serve", "--addr", "127.0.0.1:0", "--deadline-secs", "3"])
            .args(["--max-request-bytes", &BUDGET.to_string()])
            .args(["--max-concurrency", "2", "--max-body-bytes", "8000000"])
            .args(["--stream-idle-secs", "1", "--socket-idle-secs", "1"])
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
    let pid = child.0.id();
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
    let url = |p: &str| format!("{base}{p}");
    let client = reqwest::Client::builder()
        .timeout(Duration::from_secs(30))
        .build()
        .unwrap();

    // /healthz polled every 50 ms on its own connection for the whole run.
    let done = std::sync::Arc::new(std::sync::atomic::AtomicBool::new(false));
    let health = {
        let (done, url) = (done.clone(), url("/healthz"));
        let c = reqwest::Client::builder()
            .timeout(Duration::from_secs(2))
            .build()
            .unwrap();
        tokio::spawn(async move {
            let (mut ok, mut failed) = (0u32, Vec::new());
            while !done.load(std::sync::atomic::Ordering::Relaxed) {
                match c.get(&url).send().await {
                    Ok(r) if r.status() == 200 => ok += 1,
                    Ok(r) => failed.push(format!("status {}", r.status())),
                    Err(e) => failed.push(e.to_string()),
                }
                tokio::time::sleep(Duration::from_millis(50)).await;
            }
            (ok, failed)
        })
    };

    // Item 1: smoothing 256 states over 16,000 empty lines, and estimating 4,000 lines:
    // refused before anything is reserved.
    let a = send(
        &client,
        url("/v1/smooth"),
        "application/json",
        batch(256, 16_000, 0),
    )
    .await;
    expect("item 1 smooth", &a, &[413]);
    let a = send(
        &client,
        url("/v1/estimate"),
        "application/json",
        batch(256, 4_000, 0),
    )
    .await;
    expect("item 1 estimate", &a, &[413]);

    // Item 4: a full-covariance answer of 128 states over 2,000 lines (~600 MB of JSON),
    // and simulate at 256 states × 1e6 times: over the budget, or stopped by the deadline.
    let mut big = plant(128);
    big["output"] = json!({"covariance": "full"});
    big["measurements"] = Value::Array(
        (1..=2000)
            .map(|k| json!({"t": k, "values": {"gauge": 0.1}}))
            .collect(),
    );
    let a = send(
        &client,
        url("/v1/estimate"),
        "application/json",
        serde_json::to_vec(&big).unwrap(),
    )
    .await;
    expect("item 4 estimate", &a, &[200, 413, 503]);
    let mut sim = plant(256);
    sim.as_object_mut().unwrap().remove("filter");
    sim["times"] = json!({"start": 0, "step": 1, "count": 1_000_000});
    sim["seed"] = json!(7);
    let a = send(
        &client,
        url("/v1/simulate"),
        "application/json",
        serde_json::to_vec(&sim).unwrap(),
    )
    .await;
    expect("item 4 simulate", &a, &[413, 422, 503]);

    // Item 2: a 1 ns grid over a 1e6 s gap (10¹⁵ steps), estimate, smooth and simulate;
    // check with a NaN sensor Jacobian.
    let belt = json!({
        "model": {"states": ["belt"],
                  "dynamics": {"linear": {"time": "discrete", "dt": 1e-9, "F": [[1.0]]}},
                  "process_noise": {"covariance": [[1e-12]]},
                  "sensors": {"encoder": {"measures": "belt", "std": 0.01}}},
        "filter": {"method": "ekf"},
        "prior": {"t": 0.0, "mean": {"belt": 0.0}, "std": {"belt": 1.0}},
        "measurements": [{"t": 1e-9, "values": {"encoder": 0.0}},
                         {"t": 1e6, "values": {"encoder": 0.0}}]
    });
    for path in ["/v1/estimate", "/v1/smooth"] {
        let a = send(
            &client,
            url(path),
            "application/json",
            serde_json::to_vec(&belt).unwrap(),
        )
        .await;
        expect(&format!("item 2 {path}"), &a, &[422]);
    }
    let mut belt_sim = belt.clone();
    belt_sim.as_object_mut().unwrap().remove("measurements");
    belt_sim.as_object_mut().unwrap().remove("filter");
    belt_sim["times"] = json!([1e-9, 1e6]);
    let a = send(
        &client,
        url("/v1/simulate"),
        "application/json",
        serde_json::to_vec(&belt_sim).unwrap(),
    )
    .await;
    expect("item 2 simulate", &a, &[422, 503]);
    let kiln = json!({
        "model": {"states": ["core", "wall", "draft"],
                  "dynamics": {"rates": {"core": "0.1*(wall - core)", "wall": "-0.2*wall + draft", "draft": "0"}},
                  "process_noise": {"density": {"core": 0.01, "wall": 0.01, "draft": 0.01}},
                  "sensors": {"couple": {"measures": "sqrt(wall) + core + draft", "std": 0.1}}},
        "prior": {"t": 0.0, "mean": {"core": 1.0, "wall": -1.0, "draft": 0.0},
                  "std": {"core": 1.0, "wall": 1.0, "draft": 1.0}}
    });
    let a = send(
        &client,
        url("/v1/check"),
        "application/json",
        serde_json::to_vec(&kiln).unwrap(),
    )
    .await;
    expect("item 2 check", &a, &[422]);
    // A stream integrating in 1 µs steps across a 1e12 s gap: ends with its error line.
    let tower = json!({"model": {"states": ["level"],
                     "dynamics": {"rates": {"level": "-0.01*sin(level)"}},
                     "process_noise": {"density": {"level": 0.01}},
                     "sensors": {"gauge": {"measures": "level", "std": 0.1}}},
           "filter": {"method": "ekf", "integration": {"fixed_step": 1e-6}},
           "prior": {"t": 0.0, "mean": {"level": 1.0}, "std": {"level": 1.0}}});
    let lines = format!("{tower}\n{}\n", r#"{"t": 1e12, "values": {"gauge": 0.9}}"#);
    let a = send(
        &client,
        url("/v1/estimate/stream"),
        "application/x-ndjson",
        lines.into_bytes(),
    )
    .await;
    expect("item 2 stream", &a, &[200]);
    assert!(a.1.contains("\"error\""), "item 2 stream: {}", a.1);

    // Item 7: an ensemble of 4,096 members × 256 states.
    let mut crowd = plant(256);
    crowd["filter"] = json!({"method": "enkf", "ensemble": {"members": 4096, "seed": 3}});
    crowd["measurements"] =
        json!([{"t": 1, "values": {"gauge": 0.1}}, {"t": 2, "values": {"gauge": 0.2}}]);
    let a = send(
        &client,
        url("/v1/estimate"),
        "application/json",
        serde_json::to_vec(&crowd).unwrap(),
    )
    .await;
    expect("item 7 ensemble", &a, &[413, 503]);

    // Item 5: a stream header, one line, then silence: ended after the idle time.
    let one = format!("{tower}\n{}\n", r#"{"t": 1, "values": {"gauge": 0.9}}"#);
    let (tx, rx) = tokio::sync::mpsc::channel::<Result<bytes::Bytes, std::io::Error>>(2);
    tx.send(Ok(one.into())).await.unwrap();
    let silent = client
        .post(url("/v1/estimate/stream"))
        .header("content-type", "application/x-ndjson")
        .body(reqwest::Body::wrap_stream(futures_util::stream::unfold(
            rx,
            |mut rx| async { rx.recv().await.map(|x| (x, rx)) },
        )))
        .send()
        .await
        .unwrap();
    let got = silent.text().await.unwrap();
    assert!(got.contains("/problems/stream-idle"), "item 5: {got}");
    drop(tx);

    // Item 9: eight bodies of 6 MB at once against two slots, on raw sockets (a request
    // shed before its body is read sees its upload cut): each is answered, shed with
    // 503 or refused as a bad request, and none aborts the server.
    let addr = base.trim_start_matches("http://").to_string();
    let many: Vec<_> = (0..8)
        .map(|_| tokio::spawn(raw_post(addr.clone(), "/v1/estimate", 6_000_000)))
        .collect();
    for h in many {
        let status = h.await.unwrap();
        expect("item 9", &(status, String::new()), &[400, 413, 422, 503]);
    }

    // Item 11: 40 sockets each sending half a request head are closed by the server.
    let mut socks = Vec::new();
    for _ in 0..40 {
        let mut s = tokio::net::TcpStream::connect(&addr).await.unwrap();
        s.write_all(b"POST /v1/estimate HTTP/1.1\r\nHost: x\r\n")
            .await
            .unwrap();
        socks.push(s);
    }
    for mut s in socks {
        let mut buf = Vec::new();
        let read = tokio::time::timeout(Duration::from_secs(20), s.read_to_end(&mut buf)).await;
        assert!(
            read.is_ok(),
            "item 11: a half-open request head was never closed"
        );
    }

    // Afterwards: still alive, memory within budget + margin, healthz answered all along,
    // and no core busy (CPU time grows by less than a fifth of a core over 1 s).
    done.store(true, std::sync::atomic::Ordering::Relaxed);
    let (ok, failed) = health.await.unwrap();
    let (hwm, rss) = (status_bytes(pid, "VmHWM:"), status_bytes(pid, "VmRSS:"));
    eprintln!("bomb: VmHWM {hwm} B, VmRSS {rss} B, healthz ok {ok}");
    assert!(failed.is_empty(), "/healthz failed: {failed:?}");
    assert!(ok > 0, "/healthz was never polled");
    assert!(
        hwm < BUDGET + MARGIN,
        "peak resident memory {hwm} B over budget {BUDGET} + margin {MARGIN}"
    );
    tokio::time::sleep(Duration::from_secs(1)).await;
    let before = cpu_ticks(pid);
    tokio::time::sleep(Duration::from_secs(1)).await;
    let after = cpu_ticks(pid);
    // sysconf(_SC_CLK_TCK) is 100 on Linux (common practice): 20 ticks is 0.2 core·s.
    assert!(
        after - before < 20,
        "a core stayed busy after the last answer: {} ticks in 1 s: {}",
        after - before,
        text()
    );
    let a = client.get(url("/healthz")).send().await.unwrap();
    assert_eq!(a.status(), 200);
}
