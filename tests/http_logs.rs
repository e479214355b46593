//! The log an operator reads: the real binary serving on a loopback port with its
//! standard error going to a file, as under a service manager. No colour codes there, and
//! one info line per request with what happened to it.

use serde_json::{json, Value};
use std::fs::File;
use std::path::{Path, PathBuf};
use std::process::{Child, Command, Stdio};
use std::time::{Duration, Instant};

/// Longest wait for the server to start or a line to appear; polls are much shorter.
const WAIT: Duration = Duration::from_secs(20);

/// A running `tacit serve`, killed (and reaped) when dropped, whatever the test's path.
struct Served {
    child: Child,
    log: PathBuf,
    base: String,
}

impl Drop for Served {
    fn drop(&mut self) {
        let _ = self.child.kill();
        let _ = self.child.wait();
    }
}

impl Served {
    /// Start the binary on port 0 with `extra` flags and its standard error in a file,
    /// then read the address it chose from its "listening" line.
    fn start(name: &str, extra: &[&str]) -> Served {
        let log = Path::new(env!("CARGO_TARGET_TMPDIR"))
            .join(format!("{name}-{}.log", std::process::id()));
        let err = File::create(&log).unwrap();
        let child = Command::new(env!("CARGO_BIN_EXE_tacit"))
            .args(["serve", "--addr", "127.0.0.1:0"])
            .args(extra)
            // The defaults under test: no filter, no colour preference, no keys.
            .env_remove("RUST_LOG")
            .env_remove("NO_COLOR")
            .env_remove("TACIT_LOG_FORMAT")
            .env_remove("TACIT_API_KEYS")
            .env_remove("TACIT_API_KEYS_FILE")
            .stdin(Stdio::null())
            .stdout(Stdio::null())
            .stderr(err)
            .spawn()
            .unwrap();
        let mut s = Served {
            child,
            log,
            base: String::new(),
        };
        let line = s.wait_for_line(|l| l.contains("listening"));
        let at = line
            .find("127.0.0.1:")
            .expect("the address in the listening line");
        let port: String = line[at + "127.0.0.1:".len()..]
            .chars()
            .take_while(char::is_ascii_digit)
            .collect();
        s.base = format!("http://127.0.0.1:{port}");
        s
    }

    fn text(&self) -> String {
        let bytes = std::fs::read(&self.log).unwrap();
        String::from_utf8(bytes).expect("the log is UTF-8")
    }

    /// The first log line for which `want` holds, polling until [`WAIT`].
    fn wait_for_line(&mut self, want: impl Fn(&str) -> bool) -> String {
        let until = Instant::now() + WAIT;
        loop {
            if let Some(l) = self.text().lines().find(|l| want(l)) {
                return l.to_string();
            }
            if let Ok(Some(status)) = self.child.try_wait() {
                panic!("tacit exited ({status}); its log:\n{}", self.text());
            }
            assert!(
                Instant::now() < until,
                "no such line; the log:\n{}",
                self.text()
            );
            std::thread::sleep(Duration::from_millis(20));
        }
    }
}

/// A 1-axis bottling-conveyor carriage at constant speed, read by an encoder.
fn header() -> Value {
    json!({
        "model": {
            "states": ["pos", "vel"],
            "dynamics": {"rates": {"pos": "vel"}},
            "process_noise": {"density": {"vel": 0.1}},
            "sensors": {"encoder": {"measures": "pos", "std": 0.05}}
        },
        "filter": {"method": "ekf"},
        "prior": {"t": 0.0, "mean": {"pos": 0.0, "vel": 0.0}, "std": {"pos": 1.0, "vel": 5.0}}
    })
}

fn lines(n: usize) -> Vec<Value> {
    (1..=n)
        .map(|k| {
            let t = k as f64 * 0.1;
            json!({"t": t, "values": {"encoder": 0.25 * t}})
        })
        .collect()
}

/// Send `req` on a runtime of its own, check the 200, read the whole answer (a stream's
/// line is written when its body ends) and return the request id the service gave it.
fn send(req: impl FnOnce(reqwest::Client) -> reqwest::RequestBuilder) -> String {
    let rt = tokio::runtime::Builder::new_current_thread()
        .enable_all()
        .build()
        .unwrap();
    rt.block_on(async {
        let res = req(reqwest::Client::new())
            .timeout(WAIT)
            .send()
            .await
            .unwrap();
        assert_eq!(res.status(), 200);
        let id = res.headers()["x-request-id"].to_str().unwrap().to_string();
        res.bytes().await.unwrap();
        id
    })
}

/// Post `body` and return the request id the service answered with.
fn post(s: &Served, path: &str, media: &str, body: String) -> String {
    send(|c| {
        c.post(format!("{}{path}", s.base))
            .header("content-type", media)
            .body(body)
    })
}

fn estimate(s: &Served, n: usize) -> String {
    let mut body = header();
    body["measurements"] = Value::Array(lines(n));
    post(s, "/v1/estimate", "application/json", body.to_string())
}

fn get(s: &Served, path: &str) {
    send(|c| c.get(format!("{}{path}", s.base)));
}

#[test]
fn text_log_to_a_file_has_no_colour_and_one_info_line_per_request() {
    let mut s = Served::start("text-log", &[]);
    get(&s, "/healthz");
    let id = estimate(&s, 5);
    let mut stream = header().to_string();
    for l in lines(7) {
        stream.push('\n');
        stream.push_str(&l.to_string());
    }
    stream.push('\n');
    let stream_id = post(&s, "/v1/estimate/stream", "application/x-ndjson", stream);

    let line = s.wait_for_line(|l| l.contains(&id));
    let streamed = s.wait_for_line(|l| l.contains(&stream_id));
    // Standard error is a file here, not a terminal: no ESC byte (0x1b, which starts
    // every ANSI colour sequence; ECMA-48) anywhere in the log.
    let log = s.text();
    drop(s);
    assert!(!log.contains('\u{1b}'), "colour codes in a file:\n{log}");

    // One line for the request, at info, with the route template and the job's counters.
    assert_eq!(log.matches(id.as_str()).count(), 1, "{log}");
    for want in [
        " INFO ",
        "request finished",
        "method=POST",
        "route=/v1/estimate ",
        "status=200",
        &format!("request_id={id}"),
        "lines=5",
        "filter=ekf",
        "duration_ms=",
    ] {
        assert!(line.contains(want), "{want:?} in {line}");
    }
    // A stream is logged once its body has ended, with the lines it ran.
    assert_eq!(log.matches(stream_id.as_str()).count(), 1, "{log}");
    for want in [
        " INFO ",
        "route=/v1/estimate/stream ",
        "status=200",
        "lines=7",
        "filter=ekf",
    ] {
        assert!(streamed.contains(want), "{want:?} in {streamed}");
    }
    // Health probes log at debug only, so the default level shows none of them.
    assert!(!log.contains("route=/healthz"), "{log}");
}

#[test]
fn json_log_line_of_a_request_parses_with_its_fields() {
    let mut s = Served::start("json-log", &["--log-format", "json"]);
    let id = estimate(&s, 3);
    let line = s.wait_for_line(|l| l.contains(&id));
    let log = s.text();
    drop(s);
    assert!(
        !log.contains('\u{1b}'),
        "colour codes in JSON lines:\n{log}"
    );
    for l in log.lines() {
        serde_json::from_str::<Value>(l).unwrap_or_else(|e| panic!("{e}: {l}"));
    }
    let v: Value = serde_json::from_str(&line).unwrap();
    assert_eq!(v["level"], "INFO", "{line}");
    let f = &v["fields"];
    assert_eq!(f["message"], "request finished", "{line}");
    assert_eq!(f["method"], "POST", "{line}");
    assert_eq!(f["route"], "/v1/estimate", "{line}");
    assert_eq!(f["status"], 200, "{line}");
    assert_eq!(f["request_id"], id.as_str(), "{line}");
    assert_eq!(f["lines"], 3, "{line}");
    assert_eq!(f["filter"], "ekf", "{line}");
    assert!(f["duration_ms"].as_f64().unwrap() >= 0.0, "{line}");
}
