//! `POST /v1/calibrate`: fit noise settings and parameters to a history. The work runs on
//! the blocking pool (it is many filter runs, never a small job for the compute lane).
//! With `Accept: application/x-ndjson` the answer streams one progress line per run,
//! `{"run": k, "log_likelihood": ...}`, and the answer as its last line (a failure after
//! the head has gone is a last line `{"error": problem}`). Either way the compute
//! deadline applies and the work stops when the client goes away.

use super::route::{mount, Route};
use crate::http::extract::{BatchBody, Posted};
use crate::http::jobs::{run_job_in, CancelOnDrop};
use crate::http::problem::public;
use crate::http::state::AppState;
use crate::job::{self, Stop};
use axum::body::Body;
use axum::extract::State;
use axum::http::{header, HeaderMap, HeaderValue};
use axum::response::{IntoResponse, Response};
use axum::routing::post;
use axum::Router;
use bytes::Bytes;

/// `POST /v1/calibrate`.
pub(super) const ROUTES: &[Route] = &[Route {
    method: "POST",
    path: "/v1/calibrate",
    keyed: true,
    handler: || post(calibrate),
}];

/// This group's router.
pub fn router() -> Router<AppState> {
    mount(ROUTES)
}

/// Whether the client asked for the NDJSON progress stream.
fn wants_progress(headers: &HeaderMap) -> bool {
    headers
        .get_all(header::ACCEPT)
        .iter()
        .filter_map(|v| v.to_str().ok())
        .any(|v| v.contains("application/x-ndjson"))
}

/// One progress line.
fn progress_line(run: u64, ll: Option<f64>) -> Vec<u8> {
    let mut line = format!("{{\"run\":{run},\"log_likelihood\":").into_bytes();
    match ll {
        Some(x) if x.is_finite() => crate::job::write::num(&mut line, x),
        _ => line.extend_from_slice(b"null"),
    }
    line.extend_from_slice(b"}\n");
    line
}

/// The calibration of a JSON request or of a CSV upload.
fn fit(
    posted: &Posted,
    limits: &crate::config::Limits,
    stop: &Stop,
    progress: &(dyn Fn(u64, Option<f64>) + Sync),
) -> Result<job::Done, crate::problem::Problem> {
    match posted {
        Posted::Json(body) => job::calibrate(body, limits, stop, progress),
        Posted::Csv { request, readings } => {
            job::calibrate_csv(request, readings, limits, stop, progress)
        }
    }
}

async fn calibrate(
    State(state): State<AppState>,
    headers: HeaderMap,
    BatchBody(posted, slot): BatchBody,
) -> Response {
    if !wants_progress(&headers) {
        return run_job_in(&state, slot, usize::MAX, move |limits, stop| {
            fit(&posted, limits, stop, &|_, _| {})
        })
        .await;
    }
    let guard = CancelOnDrop::new();
    let arrived = slot.arrived();
    let stop = Stop::new(guard.flag(), state.limits().deadline.map(|d| arrived + d));
    let (tx, rx) = tokio::sync::mpsc::unbounded_channel::<Bytes>();
    let st = state.clone();
    let span = tracing::Span::current();
    tokio::task::spawn_blocking(move || {
        let _entered = span.enter();
        let _slot = slot;
        let progress = {
            let tx = tx.clone();
            move |k: u64, ll: Option<f64>| {
                let _ = tx.send(Bytes::from(progress_line(k, ll)));
            }
        };
        let progress = std::sync::Mutex::new(progress);
        let report = |k: u64, ll: Option<f64>| {
            if let Ok(p) = progress.lock() {
                p(k, ll);
            }
        };
        let last = match fit(&posted, st.limits(), &stop, &report) {
            Ok(done) => {
                st.metrics().record_run(&done.stats);
                let mut b = done.body;
                b.push(b'\n');
                b
            }
            Err(p) => {
                let mut b = b"{\"error\":".to_vec();
                b.extend_from_slice(&public(p).to_json());
                b.extend_from_slice(b"}\n");
                b
            }
        };
        let _ = tx.send(Bytes::from(last));
    });
    // The guard travels with the body: when the client goes, the body is dropped and
    // the flag stops the runs.
    let stream = futures_util::stream::unfold((rx, guard), |(mut rx, guard)| async move {
        rx.recv()
            .await
            .map(|b| (Ok::<_, std::convert::Infallible>(b), (rx, guard)))
    });
    let mut res = Body::from_stream(stream).into_response();
    res.headers_mut().insert(
        header::CONTENT_TYPE,
        HeaderValue::from_static("application/x-ndjson"),
    );
    res
}
