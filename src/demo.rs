//! `tacit demo`: three invented plants run end to end against the real service.
//!
//! Each scenario in `demo-data/` (embedded here, so the command needs no files) holds a
//! model, filter settings, a prior and simulate settings with a committed seed, plus the
//! truth and readings tacit's own simulator made from them. The demo starts the HTTP
//! service in-process on a free loopback port, posts the readings over plain HTTP/1.1 as
//! any client would, and compares what came back with the simulated truth: this shows a
//! new user what the service recovers, and shows us the whole path (parse, filter, write,
//! HTTP) still works. [`regenerate`] rebuilds the generated files from the seeds.

use crate::config::Limits;
use crate::http::{self, AppState, ServerConfig};
use serde::Serialize;
use serde_json::{json, Map, Value};
use std::fmt::Write as _;
use std::net::{Ipv4Addr, SocketAddr};
use std::sync::atomic::AtomicBool;
use tokio::io::{AsyncReadExt, AsyncWriteExt};
use tokio::net::TcpStream;

/// One scenario's files as text: the inputs a person writes and the two generated files.
#[derive(Debug, Clone, Copy)]
pub struct Scenario {
    /// Folder name under `demo-data/`.
    pub name: &'static str,
    /// One line on what it shows.
    pub title: &'static str,
    /// `model.json`: the model the filter is given.
    pub model: &'static str,
    /// `filter.json`: the request's `filter` block.
    pub filter: &'static str,
    /// `prior.json`: the request's `prior`.
    pub prior: &'static str,
    /// `simulate.json`: times, input changes, seed and reading schedule.
    pub simulate: &'static str,
    /// `truth-model.json`, when the truth moves differently from what the filter assumes.
    pub truth_model: Option<&'static str>,
    /// `truth-prior.json`, the prior of the truth model (needed with `truth_model`).
    pub truth_prior: Option<&'static str>,
    /// `truth.json` (generated): the simulated states, one line per time.
    pub truth: &'static str,
    /// `measurements.json` (generated): the simulated readings, one line per time.
    pub measurements: &'static str,
    /// How the readings are posted.
    pub delivery: Delivery,
    /// Units of each state, for the printout (JSON models carry no units).
    pub units: &'static [(&'static str, &'static str)],
}

/// How a scenario's readings reach the service.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Delivery {
    /// One `POST /v1/estimate` with every reading.
    Batch,
    /// One batch, then the same readings again in this many requests, each request's
    /// `posterior` sent as the next one's `prior`, to show the estimates are identical.
    BatchAndResumed(usize),
    /// One `POST /v1/estimate/stream`, NDJSON in and out.
    Stream,
}

macro_rules! scenario_file {
    ($dir:literal, $file:literal) => {
        include_str!(concat!("../demo-data/", $dir, "/", $file))
    };
}

/// The embedded scenarios, in the order the demo runs them.
pub const SCENARIOS: [Scenario; 3] = [
    Scenario {
        name: "crane",
        title: "overhead crane trolley: encoder reads position only, with dropouts and glitches",
        model: scenario_file!("crane", "model.json"),
        filter: scenario_file!("crane", "filter.json"),
        prior: scenario_file!("crane", "prior.json"),
        simulate: scenario_file!("crane", "simulate.json"),
        truth_model: None,
        truth_prior: None,
        truth: scenario_file!("crane", "truth.json"),
        measurements: scenario_file!("crane", "measurements.json"),
        delivery: Delivery::Batch,
        units: &[("position", "m"), ("velocity", "m/s")],
    },
    Scenario {
        name: "water-tower",
        title: "water tower: level gauge only, draw-off flow unknown (a disturbance state)",
        model: scenario_file!("water-tower", "model.json"),
        filter: scenario_file!("water-tower", "filter.json"),
        prior: scenario_file!("water-tower", "prior.json"),
        simulate: scenario_file!("water-tower", "simulate.json"),
        truth_model: None,
        truth_prior: None,
        truth: scenario_file!("water-tower", "truth.json"),
        measurements: scenario_file!("water-tower", "measurements.json"),
        delivery: Delivery::BatchAndResumed(4),
        units: &[("level", "m"), ("draw_off", "L/s")],
    },
    Scenario {
        name: "kiln",
        title: "kiln: thermocouple only, heat-loss coefficient drifting (a parameter)",
        model: scenario_file!("kiln", "model.json"),
        filter: scenario_file!("kiln", "filter.json"),
        prior: scenario_file!("kiln", "prior.json"),
        simulate: scenario_file!("kiln", "simulate.json"),
        truth_model: Some(scenario_file!("kiln", "truth-model.json")),
        truth_prior: Some(scenario_file!("kiln", "truth-prior.json")),
        truth: scenario_file!("kiln", "truth.json"),
        measurements: scenario_file!("kiln", "measurements.json"),
        delivery: Delivery::Stream,
        units: &[("temperature", "°C"), ("loss", "kW/K")],
    },
];

/// The files the simulator produces for one scenario.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Generated {
    /// `truth.json`.
    pub truth: String,
    /// `measurements.json`.
    pub measurements: String,
}

/// The simulate request of a scenario: its truth model and prior (or the filter's, when the
/// truth follows the filter's own model) with the simulate settings.
pub fn simulate_request(model: &str, prior: &str, simulate: &str) -> Result<Value, String> {
    let mut req = parse(simulate, "simulate.json")?;
    let obj = req
        .as_object_mut()
        .ok_or("simulate.json is not a JSON object")?;
    obj.insert("model".into(), parse(model, "the model")?);
    obj.insert("prior".into(), parse(prior, "the prior")?);
    Ok(req)
}

/// Run tacit's simulator on a scenario's settings and lay out the two generated files,
/// one array element per line so that changes show up line by line in a diff.
pub fn generate(model: &str, prior: &str, simulate: &str) -> Result<Generated, String> {
    let req = simulate_request(model, prior, simulate)?;
    let body = serde_json::to_vec(&req).map_err(|e| e.to_string())?;
    let cancel = AtomicBool::new(false);
    let done = crate::job::simulate(&body, &Limits::default(), &cancel)
        .map_err(|p| format!("the simulator refused the scenario: {p}"))?;
    let out: Value = serde_json::from_slice(&done.body).map_err(|e| e.to_string())?;
    let lines = |key: &str| -> Result<String, String> {
        let items = out[key]
            .as_array()
            .ok_or_else(|| format!("the simulator's answer has no {key}"))?;
        let mut s = String::from("[\n");
        for (i, it) in items.iter().enumerate() {
            if i > 0 {
                s.push_str(",\n");
            }
            s.push_str(&serde_json::to_string(it).map_err(|e| e.to_string())?);
        }
        s.push_str("\n]\n");
        Ok(s)
    };
    Ok(Generated {
        truth: lines("truth")?,
        measurements: lines("measurements")?,
    })
}

impl Scenario {
    /// Regenerate this scenario's files from its embedded settings.
    pub fn generate(&self) -> Result<Generated, String> {
        generate(
            self.truth_model.unwrap_or(self.model),
            self.truth_prior.unwrap_or(self.prior),
            self.simulate,
        )
    }
}

/// Rebuild `truth.json` and `measurements.json` of every scenario under `dir` (normally
/// `demo-data`) from the settings on disk there; returns the files written.
pub fn regenerate(dir: &std::path::Path) -> Result<Vec<std::path::PathBuf>, String> {
    let mut written = Vec::new();
    for s in &SCENARIOS {
        let folder = dir.join(s.name);
        let read = |file: &str| {
            let p = folder.join(file);
            std::fs::read_to_string(&p).map_err(|e| format!("cannot read {}: {e}", p.display()))
        };
        let optional = |file: &str| -> Result<Option<String>, String> {
            let p = folder.join(file);
            if p.exists() {
                read(file).map(Some)
            } else {
                Ok(None)
            }
        };
        let model = match optional("truth-model.json")? {
            Some(m) => m,
            None => read("model.json")?,
        };
        let prior = match optional("truth-prior.json")? {
            Some(p) => p,
            None => read("prior.json")?,
        };
        let g = generate(&model, &prior, &read("simulate.json")?)
            .map_err(|e| format!("{}: {e}", s.name))?;
        for (file, text) in [
            ("truth.json", &g.truth),
            ("measurements.json", &g.measurements),
        ] {
            let p = folder.join(file);
            std::fs::write(&p, text).map_err(|e| format!("cannot write {}: {e}", p.display()))?;
            written.push(p);
        }
    }
    Ok(written)
}

/// How well one state was recovered.
#[derive(Debug, Clone, Serialize)]
pub struct StateReport {
    /// The state's name.
    pub name: String,
    /// Whether a sensor reads this state directly.
    pub measured: bool,
    /// Whether it is an estimated parameter of the model.
    pub parameter: bool,
    /// Root-mean-square error of the filtered mean against the truth, after start-up.
    pub rmse: f64,
    /// Mean reported standard deviation over the same span (what the filter claims).
    pub mean_std: f64,
    /// The final estimate.
    pub final_estimate: f64,
    /// Its standard deviation.
    pub final_std: f64,
    /// The true value at the last time.
    pub final_truth: f64,
    /// The true value at the first time (differs from the last for a drifting parameter).
    pub initial_truth: f64,
}

/// The NIS figures of a run, as the service's summary reports them.
#[derive(Debug, Clone, Serialize)]
pub struct NisReport {
    /// Mean NIS over the updates.
    pub mean: f64,
    /// Expected mean (degrees of freedom per update).
    pub dof: f64,
    /// Lower and upper 95 % bounds of the mean.
    pub bounds_95: [f64; 2],
    /// `consistent`, `overconfident` or `underconfident`.
    pub verdict: String,
}

/// What the demo found for one scenario.
#[derive(Debug, Clone, Serialize)]
pub struct Report {
    /// Scenario folder name.
    pub scenario: String,
    /// Filter method used.
    pub method: String,
    /// How the readings were posted.
    pub delivery: String,
    /// Measurement lines posted.
    pub lines: usize,
    /// Sensor readings among them (dropped readings are absent lines' values).
    pub readings: usize,
    /// Updates applied by the filter.
    pub updates: u64,
    /// The gate's probability, when the filter has a gate.
    pub gate: Option<f64>,
    /// Readings the gate refused.
    pub rejected: u64,
    /// Readings further than [`GLITCH_SIGMAS`] reading std from the truth: the glitches
    /// the simulator injected, as far as they can be told from the noise.
    pub glitches: usize,
    /// Glitches among the rejected readings.
    pub glitches_rejected: usize,
    /// Estimates that started from the prior's spread and are left out of the RMSE.
    pub settling_lines: usize,
    /// Per state, in the response's `states` order.
    pub states: Vec<StateReport>,
    /// Consistency of the innovations.
    pub nis: NisReport,
    /// For resumed delivery: whether the resumed estimates equal the single batch's
    /// bit for bit.
    pub resumed_identical: Option<bool>,
    /// Wall-clock time of the scenario's requests, seconds.
    pub seconds: f64,
}

/// A reading this many of its std away from the truth counts as a glitch. Ordinary noise
/// gets there with probability 2·10⁻⁹ (normal tail, common practice), so every flagged
/// reading was injected; an injected glitch that happens to land closer is not told apart.
pub const GLITCH_SIGMAS: f64 = 6.0;

/// The share of each run left out of the RMSE while the filter forgets its prior.
pub const SETTLING_SHARE: f64 = 0.1;

/// Start the service in-process on a free loopback port, run every embedded scenario
/// against it over HTTP, stop it, and return the reports.
pub fn run() -> Result<Vec<Report>, String> {
    let rt = tokio::runtime::Builder::new_multi_thread()
        .worker_threads(2)
        .enable_all()
        .build()
        .map_err(|e| format!("cannot start the runtime: {e}"))?;
    rt.block_on(async {
        let listener = tokio::net::TcpListener::bind((Ipv4Addr::LOCALHOST, 0))
            .await
            .map_err(|e| format!("cannot bind a loopback port: {e}"))?;
        let addr = listener
            .local_addr()
            .map_err(|e| format!("no local address: {e}"))?;
        let state = AppState::new(ServerConfig::default());
        let (stop, stopped) = tokio::sync::oneshot::channel::<()>();
        let server = tokio::spawn(http::serve(listener, state, async move {
            let _ = stopped.await;
        }));
        let mut reports = Vec::with_capacity(SCENARIOS.len());
        let mut failure = None;
        for s in &SCENARIOS {
            match run_scenario(addr, s).await {
                Ok(r) => reports.push(r),
                Err(e) => {
                    failure = Some(format!("{}: {e}", s.name));
                    break;
                }
            }
        }
        let _ = stop.send(());
        match server.await {
            Ok(Ok(())) => {}
            Ok(Err(e)) => return Err(format!("the server stopped with an error: {e}")),
            Err(e) => return Err(format!("the server task failed: {e}")),
        }
        match failure {
            Some(e) => Err(e),
            None => Ok(reports),
        }
    })
}

fn parse(text: &str, what: &str) -> Result<Value, String> {
    serde_json::from_str(text).map_err(|e| format!("{what} is not valid JSON: {e}"))
}

fn num(v: &Value, what: &str) -> Result<f64, String> {
    v.as_f64()
        .ok_or_else(|| format!("expected a number for {what}, got {v}"))
}

/// The answer of one estimate run, whichever way it was posted.
struct Answer {
    states: Vec<String>,
    estimates: Vec<Value>,
    posterior: Value,
    summary: Value,
}

/// Run one scenario against the service at `addr`.
pub async fn run_scenario(addr: SocketAddr, s: &Scenario) -> Result<Report, String> {
    let started = std::time::Instant::now();
    let model = parse(s.model, "model.json")?;
    let filter = parse(s.filter, "filter.json")?;
    let prior = parse(s.prior, "prior.json")?;
    let truth = parse(s.truth, "truth.json")?;
    let meas = parse(s.measurements, "measurements.json")?;
    let truth = truth.as_array().ok_or("truth.json is not a list")?;
    let meas = meas.as_array().ok_or("measurements.json is not a list")?;
    if truth.len() != meas.len() {
        return Err("truth.json and measurements.json differ in length".into());
    }
    let method = filter["method"].as_str().unwrap_or("?").to_string();

    let (answer, resumed_identical) = match s.delivery {
        Delivery::Batch => (batch(addr, &model, &filter, &prior, meas).await?, None),
        Delivery::BatchAndResumed(parts) => {
            let whole = batch(addr, &model, &filter, &prior, meas).await?;
            let size = meas.len().div_ceil(parts.max(1));
            let mut prior_k = prior.clone();
            let mut same = true;
            let mut at = 0;
            for chunk in meas.chunks(size) {
                let part = batch(addr, &model, &filter, &prior_k, chunk).await?;
                same &= part.estimates[..] == whole.estimates[at..at + chunk.len()];
                at += chunk.len();
                prior_k = part.posterior;
            }
            same &= prior_k == whole.posterior;
            (whole, Some(same))
        }
        Delivery::Stream => (stream(addr, &model, &filter, &prior, meas).await?, None),
    };
    if answer.estimates.len() != meas.len() {
        return Err(format!(
            "{} estimates for {} measurement lines",
            answer.estimates.len(),
            meas.len()
        ));
    }

    // Which state each sensor reads directly, for the measured flag and the glitch count.
    let mut direct: Vec<(String, String, f64)> = Vec::new();
    if let Some(sensors) = model["sensors"].as_object() {
        for (name, sv) in sensors {
            if let (Some(m), Some(sd)) = (sv["measures"].as_str(), sv["std"].as_f64()) {
                if answer.states.iter().any(|x| x == m.trim()) {
                    direct.push((name.clone(), m.trim().to_string(), sd));
                }
            }
        }
    }
    let parameters: Vec<String> = model["parameters"]
        .as_object()
        .map(|p| {
            p.iter()
                .filter(|(_, v)| v.is_object())
                .map(|(k, _)| k.clone())
                .collect()
        })
        .unwrap_or_default();

    let mut readings = 0;
    let mut glitches = 0;
    let mut glitches_rejected = 0;
    for ((m, t), e) in meas.iter().zip(truth).zip(&answer.estimates) {
        let Some(values) = m["values"].as_object() else {
            continue;
        };
        readings += values.values().filter(|v| !v.is_null()).count();
        for (sensor, state, sd) in &direct {
            let Some(z) = values.get(sensor).and_then(Value::as_f64) else {
                continue;
            };
            let x = num(&t["state"][state], "a true state")?;
            if (z - x).abs() > GLITCH_SIGMAS * sd {
                glitches += 1;
                if e["innovations"][sensor]["accepted"] == Value::Bool(false) {
                    glitches_rejected += 1;
                }
            }
        }
    }

    let settle = ((meas.len() as f64) * SETTLING_SHARE).ceil() as usize;
    let n = answer.estimates.len();
    let last = n.checked_sub(1).ok_or("no estimates")?;
    let mut states = Vec::with_capacity(answer.states.len());
    for (i, name) in answer.states.iter().enumerate() {
        let mut sq = 0.0;
        let mut sd = 0.0;
        for (e, t) in answer.estimates.iter().zip(truth).skip(settle) {
            let d = num(&e["mean"][name], "an estimate")? - num(&t["state"][name], "a truth")?;
            sq += d * d;
            sd += num(&e["std"][name], "a std")?;
        }
        let count = (n - settle).max(1) as f64;
        let post = &answer.posterior;
        let var = num(&post["covariance"][i][i], "a posterior variance")?;
        states.push(StateReport {
            name: name.clone(),
            measured: direct.iter().any(|d| &d.1 == name),
            parameter: parameters.contains(name),
            rmse: (sq / count).sqrt(),
            mean_std: sd / count,
            final_estimate: num(&post["mean"][name], "a posterior mean")?,
            final_std: var.max(0.0).sqrt(),
            final_truth: num(&truth[last]["state"][name], "a truth")?,
            initial_truth: num(&truth[0]["state"][name], "a truth")?,
        });
    }

    let sm = &answer.summary;
    let nis = &sm["nis"];
    Ok(Report {
        scenario: s.name.to_string(),
        method,
        delivery: match s.delivery {
            Delivery::Batch => "POST /v1/estimate".into(),
            Delivery::BatchAndResumed(k) => {
                format!("POST /v1/estimate, then again in {k} requests (posterior -> prior)")
            }
            Delivery::Stream => "POST /v1/estimate/stream (NDJSON)".into(),
        },
        lines: meas.len(),
        readings,
        updates: sm["updates"].as_u64().unwrap_or(0),
        gate: filter["gate"]["probability"].as_f64(),
        rejected: sm["rejected"].as_u64().unwrap_or(0),
        glitches,
        glitches_rejected,
        settling_lines: settle,
        states,
        nis: NisReport {
            mean: num(&nis["mean"], "the mean NIS")?,
            dof: num(&nis["dof"], "the NIS dof")?,
            bounds_95: [
                num(&nis["lower_95"], "the NIS bound")?,
                num(&nis["upper_95"], "the NIS bound")?,
            ],
            verdict: nis["verdict"].as_str().unwrap_or("?").to_string(),
        },
        resumed_identical,
        seconds: started.elapsed().as_secs_f64(),
    })
}

async fn batch(
    addr: SocketAddr,
    model: &Value,
    filter: &Value,
    prior: &Value,
    meas: &[Value],
) -> Result<Answer, String> {
    let body = json!({
        "model": model,
        "filter": filter,
        "prior": prior,
        "measurements": meas,
        "output": {"covariance": "full", "innovations": true}
    });
    let body = serde_json::to_vec(&body).map_err(|e| e.to_string())?;
    let text = post(addr, "/v1/estimate", "application/json", &body).await?;
    let mut v: Value = serde_json::from_slice(&text)
        .map_err(|e| format!("the service answered something that is not JSON: {e}"))?;
    let states = v["states"]
        .as_array()
        .ok_or("the answer has no states")?
        .iter()
        .filter_map(|s| s.as_str().map(String::from))
        .collect();
    let estimates = match v["estimates"].take() {
        Value::Array(a) => a,
        _ => return Err("the answer has no estimates".into()),
    };
    Ok(Answer {
        states,
        estimates,
        posterior: v["posterior"].take(),
        summary: v["summary"].take(),
    })
}

async fn stream(
    addr: SocketAddr,
    model: &Value,
    filter: &Value,
    prior: &Value,
    meas: &[Value],
) -> Result<Answer, String> {
    let header = json!({
        "model": model,
        "filter": filter,
        "prior": prior,
        "output": {"covariance": "full", "innovations": true}
    });
    let mut body = serde_json::to_vec(&header).map_err(|e| e.to_string())?;
    for m in meas {
        body.push(b'\n');
        body.extend_from_slice(&serde_json::to_vec(m).map_err(|e| e.to_string())?);
    }
    body.push(b'\n');
    let text = post(addr, "/v1/estimate/stream", "application/x-ndjson", &body).await?;
    let mut estimates = Vec::with_capacity(meas.len());
    let mut tail = None;
    for line in text.split(|b| *b == b'\n').filter(|l| !l.is_empty()) {
        let v: Value = serde_json::from_slice(line)
            .map_err(|e| format!("the stream answered a line that is not JSON: {e}"))?;
        if let Some(p) = v.get("error") {
            return Err(format!("the stream failed: {p}"));
        }
        if v.get("posterior").is_some() {
            tail = Some(v);
        } else {
            estimates.push(v);
        }
    }
    let mut tail = tail.ok_or("the stream ended without its posterior line")?;
    // The stream's lines carry no `states`; a posterior's covariance rows follow the
    // model's states and then its estimated parameters, as the contract says.
    let mut states: Vec<String> = model["states"]
        .as_array()
        .map(|a| {
            a.iter()
                .filter_map(|s| s.as_str().map(String::from))
                .collect()
        })
        .unwrap_or_default();
    if let Some(p) = model["parameters"].as_object() {
        states.extend(
            p.iter()
                .filter(|(_, v)| v.is_object())
                .map(|(k, _)| k.clone()),
        );
    }
    Ok(Answer {
        states,
        estimates,
        posterior: tail["posterior"].take(),
        summary: tail["summary"].take(),
    })
}

/// POST `body` and return the response body of a 200; any other status is an error
/// carrying the problem's detail. A minimal HTTP/1.1 client: one request per connection
/// (`Connection: close`), answers read to the end and de-chunked when chunked.
pub async fn post(
    addr: SocketAddr,
    path: &str,
    content_type: &str,
    body: &[u8],
) -> Result<Vec<u8>, String> {
    let io = |e: std::io::Error| format!("http {path}: {e}");
    let mut conn = TcpStream::connect(addr).await.map_err(io)?;
    let head = format!(
        "POST {path} HTTP/1.1\r\nHost: {addr}\r\nContent-Type: {content_type}\r\nContent-Length: {}\r\nConnection: close\r\n\r\n",
        body.len()
    );
    conn.write_all(head.as_bytes()).await.map_err(io)?;
    conn.write_all(body).await.map_err(io)?;
    conn.flush().await.map_err(io)?;
    let mut raw = Vec::new();
    conn.read_to_end(&mut raw).await.map_err(io)?;
    let (status, body) = parse_response(&raw).map_err(|e| format!("http {path}: {e}"))?;
    if status != 200 {
        let detail = serde_json::from_slice::<Value>(&body)
            .ok()
            .and_then(|v| v["detail"].as_str().map(String::from))
            .unwrap_or_else(|| String::from_utf8_lossy(&body).into_owned());
        return Err(format!("http {path} answered {status}: {detail}"));
    }
    Ok(body)
}

/// Split a whole HTTP/1.1 response into its status and body (de-chunked if chunked).
pub fn parse_response(raw: &[u8]) -> Result<(u16, Vec<u8>), String> {
    let end = memchr::memmem::find(raw, b"\r\n\r\n").ok_or("the response has no header end")?;
    let head = std::str::from_utf8(&raw[..end]).map_err(|_| "the response head is not text")?;
    let mut lines = head.split("\r\n");
    let status = lines
        .next()
        .and_then(|l| l.split_whitespace().nth(1))
        .and_then(|s| s.parse::<u16>().ok())
        .ok_or("the response has no status line")?;
    let mut chunked = false;
    let mut length = None;
    for l in lines {
        let Some((k, v)) = l.split_once(':') else {
            continue;
        };
        let (k, v) = (k.trim(), v.trim());
        if k.eq_ignore_ascii_case("transfer-encoding") && v.eq_ignore_ascii_case("chunked") {
            chunked = true;
        } else if k.eq_ignore_ascii_case("content-length") {
            length = v.parse::<usize>().ok();
        }
    }
    let rest = &raw[end + 4..];
    if chunked {
        return dechunk(rest).map(|b| (status, b));
    }
    match length {
        Some(n) if n <= rest.len() => Ok((status, rest[..n].to_vec())),
        Some(_) => Err("the response body is shorter than its content-length".into()),
        None => Ok((status, rest.to_vec())),
    }
}

fn dechunk(mut rest: &[u8]) -> Result<Vec<u8>, String> {
    let mut out = Vec::with_capacity(rest.len());
    loop {
        let eol = memchr::memmem::find(rest, b"\r\n").ok_or("a chunk has no size line")?;
        let size_text = std::str::from_utf8(&rest[..eol]).map_err(|_| "bad chunk size")?;
        let size_text = size_text.split(';').next().unwrap_or("").trim();
        let size = usize::from_str_radix(size_text, 16).map_err(|_| "bad chunk size")?;
        rest = &rest[eol + 2..];
        if size == 0 {
            return Ok(out);
        }
        if rest.len() < size + 2 {
            return Err("the chunked body ends early".into());
        }
        out.extend_from_slice(&rest[..size]);
        rest = &rest[size + 2..];
    }
}

fn sig(x: f64) -> String {
    // Four significant figures, in plain or exponent notation as the size asks.
    if x == 0.0 || (1e-3..1e5).contains(&x.abs()) {
        let digits = (3 - x.abs().log10().floor() as i32).clamp(0, 7) as usize;
        format!("{x:.digits$}")
    } else {
        format!("{x:.3e}")
    }
}

/// The reports as text for people.
pub fn render(reports: &[Report]) -> String {
    let mut o = String::new();
    let _ = writeln!(
        o,
        "tacit demo: {} invented plants, readings simulated by tacit from committed seeds,",
        reports.len()
    );
    let _ = writeln!(
        o,
        "posted over HTTP to the service running in this process. RMSE is against the"
    );
    let _ = writeln!(
        o,
        "simulated truth, leaving out the first {:.0} % of each run (start-up from the prior).",
        SETTLING_SHARE * 100.0
    );
    for (r, s) in reports.iter().zip(SCENARIOS.iter()) {
        let _ = writeln!(o);
        let _ = writeln!(o, "== {} — {}", r.scenario, s.title);
        let _ = writeln!(
            o,
            "   {} via {}; {} lines, {} readings, {} updates, {:.2} s",
            r.method, r.delivery, r.lines, r.readings, r.updates, r.seconds
        );
        for st in &r.states {
            let unit = s.units.iter().find(|u| u.0 == st.name).map_or("", |u| u.1);
            let kind = match (st.measured, st.parameter) {
                (true, _) => "measured",
                (false, true) => "UNMEASURED parameter",
                (false, false) => "UNMEASURED",
            };
            let _ = writeln!(
                o,
                "   {:<12} {:<5} {:<21} RMSE {:>9}  (filter's mean std {:>9})  final {} ± {} vs truth {}",
                st.name,
                unit,
                kind,
                sig(st.rmse),
                sig(st.mean_std),
                sig(st.final_estimate),
                sig(st.final_std),
                sig(st.final_truth)
            );
            if st.parameter {
                let _ = writeln!(
                    o,
                    "   {:<18} the true {} drifted from {} to {} {unit} over the run",
                    "",
                    st.name,
                    sig(st.initial_truth),
                    sig(st.final_truth)
                );
            }
        }
        let _ = writeln!(
            o,
            "   NIS: mean {} (expected {}, 95 % bounds {} .. {}) -> {}",
            sig(r.nis.mean),
            sig(r.nis.dof),
            sig(r.nis.bounds_95[0]),
            sig(r.nis.bounds_95[1]),
            r.nis.verdict
        );
        match r.gate {
            Some(p) => {
                let _ = writeln!(
                    o,
                    "   gate (probability {p}): {} readings rejected; glitches injected (> {GLITCH_SIGMAS} std off the truth): {}, of them rejected: {}",
                    r.rejected, r.glitches, r.glitches_rejected
                );
            }
            None => {
                let _ = writeln!(
                    o,
                    "   no gate; glitches (> {GLITCH_SIGMAS} std off the truth): {}",
                    r.glitches
                );
            }
        }
        if let Some(same) = r.resumed_identical {
            let _ = writeln!(
                o,
                "   resumed across requests: estimates {} the single request's",
                if same {
                    "identical to"
                } else {
                    "DIFFERENT from"
                }
            );
        }
    }
    o
}

/// The reports as one JSON document.
pub fn to_json(reports: &[Report]) -> Value {
    let mut m = Map::new();
    m.insert("glitch_sigmas".into(), json!(GLITCH_SIGMAS));
    m.insert("settling_share".into(), json!(SETTLING_SHARE));
    m.insert(
        "scenarios".into(),
        serde_json::to_value(reports).unwrap_or(Value::Null),
    );
    Value::Object(m)
}
