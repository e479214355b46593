//! The page at `/` in a real browser: headless Chromium driven over WebDriver (Debian's
//! `chromium` and `chromium-driver`, installed by `.ci/run`). Ignored in a plain
//! `cargo test` because it needs them; `.ci/run` runs it with
//! `cargo test --locked --test main -- --ignored page_`, and there it fails (it does not
//! skip) when either program is missing.
//!
//! The crane demo is clicked as a person would; the checks compare what the page drew with
//! values found without the page: the number of reading lines in
//! `demo-data/crane/measurements.json`, and the readings the gate refused in the answer of
//! the same request posted straight to `/v1/estimate`. Screenshots go to a temporary
//! folder (its path is printed); `TACIT_PAGE_SHOTS=dir` writes them there instead, which
//! is how `docs/page-crane-zoom.png` was made. Click-to-plot times are printed, never asserted.

use crate::support;
use fantoccini::{Client, ClientBuilder, Locator};
use serde_json::{json, Value};
use std::path::{Path, PathBuf};
use std::process::{Child, Command, Stdio};
use std::time::{Duration, Instant};

const CHROMIUM: &str = "/usr/bin/chromium";
const DRIVER: &str = "/usr/bin/chromedriver";
const KEY: &str = "page-test-key";

/// chromedriver on a free loopback port, stopped when dropped.
struct Driver {
    child: Child,
    url: String,
    _profile: TempDir,
}

impl Drop for Driver {
    fn drop(&mut self) {
        let _ = self.child.kill();
        let _ = self.child.wait();
    }
}

/// A folder removed when dropped.
struct TempDir(PathBuf);

impl TempDir {
    /// A fresh folder: each browser needs its own profile, and the tests run in parallel.
    fn new(tag: &str) -> TempDir {
        static NEXT: std::sync::atomic::AtomicUsize = std::sync::atomic::AtomicUsize::new(0);
        let n = NEXT.fetch_add(1, std::sync::atomic::Ordering::Relaxed);
        let p = std::env::temp_dir().join(format!("tacit-{tag}-{}-{n}", std::process::id()));
        let _ = std::fs::remove_dir_all(&p);
        std::fs::create_dir_all(&p).expect("temp dir");
        TempDir(p)
    }
}

impl Drop for TempDir {
    fn drop(&mut self) {
        let _ = std::fs::remove_dir_all(&self.0);
    }
}

fn require(path: &str) {
    assert!(
        Path::new(path).exists(),
        "{path} is missing: the page test needs Debian's chromium and chromium-driver \
         (apt-get install -y --no-install-recommends chromium chromium-driver; .ci/run does this)"
    );
}

async fn start_driver() -> Driver {
    require(CHROMIUM);
    require(DRIVER);
    let port = std::net::TcpListener::bind("127.0.0.1:0")
        .and_then(|l| l.local_addr())
        .expect("free port")
        .port();
    let child = Command::new(DRIVER)
        .arg(format!("--port={port}"))
        .stdout(Stdio::null())
        .stderr(Stdio::null())
        .spawn()
        .expect("start chromedriver");
    let url = format!("http://127.0.0.1:{port}");
    let driver = Driver {
        child,
        url,
        _profile: TempDir::new("page-profile"),
    };
    let deadline = Instant::now() + Duration::from_secs(20);
    while tokio::net::TcpStream::connect(("127.0.0.1", port))
        .await
        .is_err()
    {
        assert!(Instant::now() < deadline, "chromedriver did not start");
        tokio::time::sleep(Duration::from_millis(100)).await;
    }
    driver
}

async fn browser(driver: &Driver) -> Client {
    let profile = driver._profile.0.display().to_string();
    let caps = json!({
        "browserName": "chrome",
        "goog:chromeOptions": {
            "binary": CHROMIUM,
            "args": [
                "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic",
                "--no-first-run", "--disable-background-networking",
                "--disable-component-update", "--disable-sync",
                "--disable-dev-shm-usage", "--window-size=1200,1400",
                format!("--user-data-dir={profile}"),
            ]
        }
    });
    let caps = caps.as_object().cloned().expect("an object");
    let connector = hyper_util::client::legacy::connect::HttpConnector::new();
    ClientBuilder::new(connector)
        .capabilities(caps)
        .connect(&driver.url)
        .await
        .expect("a Chromium session")
}

/// Run `script` (a function body) until it returns something other than null or false.
async fn wait_for(c: &Client, script: &str, secs: u64) -> Value {
    let deadline = Instant::now() + Duration::from_secs(secs);
    loop {
        let v = c.execute(script, vec![]).await.expect("script");
        if !(v.is_null() || v == Value::Bool(false)) {
            return v;
        }
        assert!(Instant::now() < deadline, "gave up waiting for: {script}");
        tokio::time::sleep(Duration::from_millis(50)).await;
    }
}

/// Where screenshots go: `TACIT_PAGE_SHOTS`, else a temporary folder that is kept, since
/// the screenshots are for people to look at after the run.
fn shots_dir() -> PathBuf {
    let d = match std::env::var_os("TACIT_PAGE_SHOTS") {
        Some(d) => PathBuf::from(d),
        None => std::env::temp_dir().join(format!("tacit-page-shots-{}", std::process::id())),
    };
    std::fs::create_dir_all(&d).expect("shots dir");
    d
}

/// The service's own answer to `body` at `path`, posted with the key (not through the page).
async fn post_direct(server: &support::Server, path: &str, body: &Value) -> Value {
    server
        .client
        .post(server.url(path))
        .bearer_auth(KEY)
        .json(body)
        .send()
        .await
        .expect("post")
        .json()
        .await
        .expect("answer")
}

fn demo_file(name: &str) -> Value {
    let p = Path::new(env!("CARGO_MANIFEST_DIR"))
        .join("demo-data/crane")
        .join(name);
    serde_json::from_str(&std::fs::read_to_string(&p).expect("demo file")).expect("JSON")
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
#[ignore = "needs Chromium: run by .ci/run"]
async fn page_crane_demo_plots_every_state_marks_refusals_and_shows_a_bad_pointer() {
    let server = support::start(tacit::http::ServerConfig {
        api_keys: vec![KEY.into()],
        ..Default::default()
    })
    .await;
    let driver = start_driver().await;
    let c = browser(&driver).await;
    let shots = shots_dir();

    // Independent expectations: the committed readings, and the service's own answer.
    let lines = demo_file("measurements.json");
    let lines = lines.as_array().expect("lines");
    let with_encoder = lines
        .iter()
        .filter(|l| l["values"].get("encoder").is_some())
        .count();
    let request = json!({
        "model": demo_file("model.json"), "filter": demo_file("filter.json"),
        "prior": demo_file("prior.json"), "measurements": lines,
    });
    let direct: Value = post_direct(&server, "/v1/estimate", &request).await;
    let refused = direct["estimates"]
        .as_array()
        .expect("estimates")
        .iter()
        .filter(|e| e["innovations"]["encoder"]["accepted"] == json!(false))
        .count();
    assert!(refused > 0, "the crane demo's glitches should be refused");

    c.goto(&server.url("/")).await.expect("open the page");
    wait_for(&c, "return window.tacitPage && window.tacitPage.ready", 20).await;
    // The service wants a key: type it, as a person would.
    c.find(Locator::Id("api-key"))
        .await
        .expect("key field")
        .send_keys(KEY)
        .await
        .expect("type key");
    c.find(Locator::Id("demo-crane"))
        .await
        .expect("crane button")
        .click()
        .await
        .expect("click");
    let timing = wait_for(&c, "return window.tacitPage.timings[0] || null", 60).await;
    let figures = c
        .execute(
            "return [...document.querySelectorAll('#state-plots figure')].map(f => ({...f.dataset}))",
            vec![],
        )
        .await
        .expect("figures");
    let figures = figures.as_array().expect("array");
    let states: Vec<&str> = figures
        .iter()
        .map(|f| f["state"].as_str().unwrap_or(""))
        .collect();
    assert_eq!(
        states,
        ["position", "velocity"],
        "one plot per state of the model"
    );
    for f in figures {
        assert_eq!(f["points"], json!(lines.len().to_string()), "{f}");
    }
    // The encoder reads position: its readings go on that plot, none on velocity's.
    assert_eq!(figures[0]["readings"], json!(with_encoder.to_string()));
    assert_eq!(figures[0]["refused"], json!(refused.to_string()));
    assert_eq!(figures[1]["readings"], json!("0"));
    let innovation = c
        .execute(
            "const f = document.querySelector('#plot-innovation-encoder'); return f ? {...f.dataset} : null",
            vec![],
        )
        .await
        .expect("innovation plot");
    assert_eq!(innovation["refused"], json!(refused.to_string()));
    assert!(c.find(Locator::Id("plot-nis")).await.is_ok(), "a NIS plot");
    let shot = shots.join("page-crane.png");
    std::fs::write(&shot, c.screenshot().await.expect("screenshot")).expect("write shot");
    // The first seconds, where the velocity's band is wide enough to see at a glance.
    c.execute(
        "document.getElementById('zoom-from').value = 0; document.getElementById('zoom-to').value = 8;\
         document.getElementById('zoom-apply').click();",
        vec![],
    )
    .await
    .expect("zoom");
    std::fs::write(
        shots.join("page-crane-zoom.png"),
        c.screenshot().await.expect("screenshot"),
    )
    .expect("write shot");
    c.execute("document.getElementById('zoom-reset').click()", vec![])
        .await
        .expect("reset zoom");
    println!(
        "crane demo: click to plotted answer {:.0} ms (service and transfer {:.0} ms); screenshot {}",
        timing["ms"].as_f64().unwrap_or(f64::NAN),
        timing["fetch_ms"].as_f64().unwrap_or(f64::NAN),
        shot.display()
    );

    // An invalid edit: a negative sensor std. The service names the field, and the page
    // marks that field's value in the editor.
    let edited = c
        .execute(
            "const e = document.getElementById('editor');\
             const before = e.value;\
             e.value = before.replace('\"std\": 0.002', '\"std\": -0.002');\
             e.dispatchEvent(new Event('input'));\
             return e.value !== before;",
            vec![],
        )
        .await
        .expect("edit");
    assert_eq!(
        edited,
        json!(true),
        "the crane model's encoder std is in the editor"
    );
    c.find(Locator::Id("run-estimate"))
        .await
        .expect("estimate button")
        .click()
        .await
        .expect("click");
    let mark = wait_for(
        &c,
        "const m = document.getElementById('pointer-mark');\
         return m && !document.getElementById('problem').hidden ? {pointer: m.dataset.pointer, text: m.textContent} : null",
        30,
    )
    .await;
    assert_eq!(mark["pointer"], json!("/model/sensors/encoder/std"));
    assert_eq!(mark["text"], json!("-0.002"));
    std::fs::write(
        shots.join("page-crane-error.png"),
        c.screenshot().await.expect("screenshot"),
    )
    .expect("write shot");

    // Identify from the page: a kiln's temperature under a switched heater, sampled from
    // the exact solution of T' = −0.02 T + 0.4 h with h held between samples
    // (T(t+Δ) = 20h + (T − 20h)·e^(−0.02Δ); common practice for a linear ODE).
    let series: Vec<Value> = {
        let (mut temp, mut out) = (20.0f64, Vec::new());
        for k in 0..200 {
            let heater = if (k / 25) % 2 == 0 { 1.5 } else { 0.5 };
            out.push(json!({"t": k as f64 * 5.0, "values": {"temperature": temp},
                            "inputs": {"heater": heater}}));
            temp = 20.0 * heater + (temp - 20.0 * heater) * (-0.02f64 * 5.0).exp();
        }
        out
    };
    let identify = json!({"form": "linear", "states": ["temperature"], "inputs": ["heater"],
                          "series": series});
    let direct: Value = post_direct(&server, "/v1/identify", &identify).await;
    let a_direct = direct["model"]["dynamics"]["linear"]["A"][0][0]
        .as_f64()
        .expect("A");
    // The integral form's trapezoid rule is O(Δt²): within 1 % of the true −0.02.
    assert!((a_direct + 0.02).abs() < 2e-4, "{direct}");
    c.execute(
        "const e = document.getElementById('editor'); e.value = arguments[0];\
         e.dispatchEvent(new Event('input'));",
        vec![Value::String(identify.to_string())],
    )
    .await
    .expect("put the identify request in the editor");
    c.find(Locator::Id("run-identify"))
        .await
        .expect("identify button")
        .click()
        .await
        .expect("click");
    wait_for(
        &c,
        "return !document.getElementById('use-identified').disabled",
        30,
    )
    .await;
    c.find(Locator::Id("use-identified"))
        .await
        .expect("use button")
        .click()
        .await
        .expect("click");
    let edited = c
        .execute(
            "return JSON.parse(document.getElementById('editor').value)",
            vec![],
        )
        .await
        .expect("editor");
    assert_eq!(
        edited["model"], direct["model"],
        "the page's model is the service's"
    );
    assert_eq!(edited["filter"]["method"], json!("ekf"));
    assert_eq!(
        edited["prior"]["t"].as_f64(),
        Some(0.0),
        "the first sample's time"
    );

    let errors = c
        .execute("return window.tacitPage.errors", vec![])
        .await
        .expect("errors");
    assert_eq!(errors, json!([]), "no console errors");
    println!("screenshots in {}", shots.display());
    c.close().await.expect("close");
    drop(driver);
}

/// A wide CSV of `n` encoder readings every 0.05 s around 2 m, one glitch of 40 σ every
/// 5000 lines; its own small generator (xorshift, Box–Muller), so no file is committed.
fn million_csv(n: usize) -> String {
    let mut s = String::with_capacity(n * 20 + 16);
    s.push_str("time,encoder\n");
    let mut state = 0x2545_f491_4f6c_dd1d_u64;
    let mut uniform = || {
        state ^= state << 13;
        state ^= state >> 7;
        state ^= state << 17;
        ((state >> 11) as f64 + 0.5) / (1u64 << 53) as f64
    };
    for i in 1..=n {
        let (u, v) = (uniform(), uniform());
        let noise = (-2.0 * u.ln()).sqrt() * (std::f64::consts::TAU * v).cos();
        let glitch = if i % 5000 == 0 { 0.08 } else { 0.0 };
        s.push_str(&format!(
            "{:.2},{:.6}\n",
            i as f64 * 0.05,
            2.0 + 0.002 * noise + glitch
        ));
    }
    s
}

/// The page with 1,000,000 readings from a CSV (crane model, readings converted in the
/// page): prints the time from click to plotted answer and the cost of a redraw. Not run
/// by CI (it is a measurement; the answer is 300 MB of JSON): run it by hand with
/// `cargo test --release --test main -- --ignored million_readings --nocapture`.
#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
#[ignore = "a measurement: run by hand"]
async fn million_readings_from_csv_are_plotted_whole() {
    let n = 1_000_000;
    // A debug build needs more than the default minute for a million lines.
    let limits = tacit::config::Limits {
        deadline: Some(Duration::from_secs(900)),
        ..Default::default()
    };
    let server = support::start(tacit::http::ServerConfig {
        limits,
        ..Default::default()
    })
    .await;
    let driver = start_driver().await;
    let c = browser(&driver).await;
    c.goto(&server.url("/")).await.expect("open the page");
    wait_for(&c, "return window.tacitPage && window.tacitPage.ready", 20).await;
    c.execute("document.getElementById('demo-crane').click()", vec![])
        .await
        .expect("click");
    wait_for(&c, "return window.tacitPage.timings[0] || null", 60).await;
    c.execute(
        "return window.tacitPage.loadCsvText(arguments[0], 'million.csv')",
        vec![Value::String(million_csv(n))],
    )
    .await
    .expect("load CSV");
    c.execute("document.getElementById('run-estimate').click()", vec![])
        .await
        .expect("click");
    let timing = wait_for(&c, "return window.tacitPage.timings[1] || null", 900).await;
    let figures = c
        .execute(
            "return [...document.querySelectorAll('#state-plots figure')].map(f => ({...f.dataset}))",
            vec![],
        )
        .await
        .expect("figures");
    for f in figures.as_array().expect("array") {
        assert_eq!(f["points"], json!(n.to_string()), "{f}");
    }
    let redraw = c
        .execute(
            "const t = performance.now(); document.getElementById('zoom-reset').click();\
             const whole = performance.now() - t;\
             document.getElementById('zoom-from').value = 1000; document.getElementById('zoom-to').value = 2000;\
             const t2 = performance.now(); document.getElementById('zoom-apply').click();\
             return [whole, performance.now() - t2];",
            vec![],
        )
        .await
        .expect("redraw");
    println!(
        "{n} readings: click to plotted answer {:.0} ms (service and transfer {:.0} ms, answer {} bytes); \
         redraw of every plot, whole run {:.0} ms, 1000 s of it {:.0} ms",
        timing["ms"].as_f64().unwrap_or(f64::NAN),
        timing["fetch_ms"].as_f64().unwrap_or(f64::NAN),
        timing["bytes"],
        redraw[0].as_f64().unwrap_or(f64::NAN),
        redraw[1].as_f64().unwrap_or(f64::NAN),
    );
    let errors = c
        .execute("return window.tacitPage.errors", vec![])
        .await
        .expect("errors");
    assert_eq!(errors, json!([]), "no console errors");
    c.close().await.expect("close");
}
