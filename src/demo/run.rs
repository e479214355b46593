//! Running the demo: start the service on a loopback port, post each scenario's readings
//! (as one batch and as a stream) with hyper's HTTP/1.1 client, and measure what came back
//! against the simulated truth.

use super::report::{NisReport, Report, StateReport, GLITCH_SIGMAS, SETTLING_SHARE};
use super::scenario::{parse, Delivery, Scenario, SCENARIOS};
use crate::http::{self, AppState, ServerConfig};
use axum::http::{header, Request};
use bytes::Bytes;
use http_body_util::{BodyExt, Full};
use hyper_util::client::legacy::Client;
use hyper_util::rt::TokioExecutor;
use serde_json::{json, Value};
use std::net::{Ipv4Addr, SocketAddr};

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
    let mut body = request_header(model, filter, prior);
    body["measurements"] = json!(meas);
    let body = serde_json::to_vec(&body).map_err(|e| e.to_string())?;
    let text = post(addr, "/v1/estimate", "application/json", &body).await?;
    let mut v: Value = serde_json::from_slice(&text)
        .map_err(|e| format!("the service answered something that is not JSON: {e}"))?;
    let states = strings(&v["states"]).ok_or("the answer has no states")?;
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
    let header = request_header(model, filter, prior);
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
    let mut states = strings(&model["states"]).unwrap_or_default();
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

/// The request's `{model, filter, prior, output}`: the stream's header line, and the batch
/// body once its measurements are added. Both ask for full covariances and innovations.
fn request_header(model: &Value, filter: &Value, prior: &Value) -> Value {
    json!({
        "model": model,
        "filter": filter,
        "prior": prior,
        "output": {"covariance": "full", "innovations": true}
    })
}

/// The strings of a JSON array (names of states), or `None` when `v` is not an array.
fn strings(v: &Value) -> Option<Vec<String>> {
    let a = v.as_array()?;
    Some(
        a.iter()
            .filter_map(|s| s.as_str().map(String::from))
            .collect(),
    )
}

/// POST `body` and return the response body of a 200; any other status is an error
/// carrying the problem's detail. The client is hyper's, over one plain HTTP/1.1
/// connection, as any outside client would talk to the service.
pub async fn post(
    addr: SocketAddr,
    path: &str,
    content_type: &str,
    body: &[u8],
) -> Result<Vec<u8>, String> {
    let fail = |e: &dyn std::fmt::Display| format!("http {path}: {e}");
    let client = Client::builder(TokioExecutor::new()).build_http::<Full<Bytes>>();
    let req = Request::post(format!("http://{addr}{path}"))
        .header(header::CONTENT_TYPE, content_type)
        .body(Full::new(Bytes::copy_from_slice(body)))
        .map_err(|e| fail(&e))?;
    let res = client.request(req).await.map_err(|e| fail(&e))?;
    let status = res.status().as_u16();
    let body = res
        .into_body()
        .collect()
        .await
        .map_err(|e| fail(&e))?
        .to_bytes()
        .to_vec();
    if status != 200 {
        let detail = serde_json::from_slice::<Value>(&body)
            .ok()
            .and_then(|v| v["detail"].as_str().map(String::from))
            .unwrap_or_else(|| String::from_utf8_lossy(&body).into_owned());
        return Err(format!("http {path} answered {status}: {detail}"));
    }
    Ok(body)
}
