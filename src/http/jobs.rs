//! Running one job off the async executor: take a job slot or shed with 503, run the work
//! in `spawn_blocking` (or, for a small body, on the compute lane) inside the request's
//! tracing span, stop it when the client goes away, and turn a panic into a logged 500
//! instead of a dropped connection.

use super::lane::SMALL_BODY;
use super::problem::{internal, overloaded, problem_response, public};
use super::state::{AppState, JobSlot};
use crate::config::Limits;
use crate::job::{Done, Pieces, RunStats, Stop};
use crate::problem::{Problem, ProblemKind};
use axum::body::Body;
use axum::http::{header, HeaderValue};
use axum::response::{IntoResponse, Response};
use std::any::Any;
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::Arc;

/// Sets its flag when dropped. A handler holds one while its job runs: if the client
/// disconnects, axum drops the handler's future, the flag is set, and the job, which
/// polls the flag between steps, stops instead of computing an answer nobody reads.
#[derive(Debug)]
pub struct CancelOnDrop {
    flag: Arc<AtomicBool>,
    armed: bool,
}

impl CancelOnDrop {
    /// A guard over a fresh, unset flag.
    pub fn new() -> Self {
        Self {
            flag: Arc::new(AtomicBool::new(false)),
            armed: true,
        }
    }

    /// The flag the job polls.
    pub fn flag(&self) -> Arc<AtomicBool> {
        self.flag.clone()
    }

    /// Drop without setting the flag: the work is to run to its end.
    pub fn disarm(mut self) {
        self.armed = false;
    }
}

impl Default for CancelOnDrop {
    fn default() -> Self {
        Self::new()
    }
}

impl Drop for CancelOnDrop {
    fn drop(&mut self) {
        if self.armed {
            self.flag.store(true, Ordering::Relaxed);
        }
    }
}

/// What a job hands back on success: a JSON body (whole or in pieces) and its counters.
pub trait Answer: Send + 'static {
    /// The work counters, for metrics and the request's log line.
    fn stats(&self) -> &RunStats;
    /// The `200 application/json` response.
    fn into_json_response(self) -> Response;
}

impl Answer for Done {
    fn stats(&self) -> &RunStats {
        &self.stats
    }
    fn into_json_response(self) -> Response {
        json_response(self.body)
    }
}

impl Answer for Pieces {
    fn stats(&self) -> &RunStats {
        &self.stats
    }
    fn into_json_response(self) -> Response {
        pieces_response(self)
    }
}

/// Run `work` on the blocking pool under a job slot and answer with its JSON, its
/// problem, a 503 when no slot is free, or a generic 500 when it panicked.
pub async fn run_job<T, F>(state: &AppState, route: &str, work: F) -> Response
where
    T: Answer,
    F: FnOnce(&Limits, &Stop) -> Result<T, Problem> + Send + 'static,
{
    run_job_sized(state, route, usize::MAX, work).await
}

/// Like [`run_job`], for a request of `body_len` bytes: a small one runs on the app's
/// compute lane (cheaper to hand over than `spawn_blocking`) unless the lane is stuck on
/// slow jobs. Either way the work runs off the executor, under the same slot, cancel flag
/// and deadline. The deadline counts from the slot being taken (the request's arrival,
/// before its body is read), not from when a compute thread picks the job up, so a job
/// that waited in the lane's queue past its deadline stops at its first look.
pub async fn run_job_sized<T, F>(
    state: &AppState,
    route: &str,
    body_len: usize,
    work: F,
) -> Response
where
    T: Answer,
    F: FnOnce(&Limits, &Stop) -> Result<T, Problem> + Send + 'static,
{
    match take_slot(state, route, None) {
        Ok(slot) => run_job_in(state, slot, body_len, work).await,
        Err(res) => *res,
    }
}

/// A job slot for a request to `route` (with its request id, for the log of a shutdown
/// that abandons it), or the answer to give instead: 503 shutting-down once a shutdown
/// has begun, 503 overloaded with Retry-After when every slot is busy. Taken before the
/// body is read, so a request that would be turned away is not uploaded first.
pub(super) fn take_slot(
    state: &AppState,
    route: &str,
    request_id: Option<&str>,
) -> Result<JobSlot, Box<Response>> {
    if !state.is_ready() {
        state.metrics().record_shed(route);
        return Err(Box::new(problem_response(&Problem::new(
            ProblemKind::ShuttingDown,
            "the server is shutting down and takes no new work",
        ))));
    }
    let what = match request_id {
        Some(id) => format!("{route} request {id}"),
        None => route.to_string(),
    };
    state.try_job_slot(what).ok_or_else(|| {
        state.metrics().record_shed(route);
        Box::new(overloaded(state.config().retry_after_secs))
    })
}

/// [`run_job_sized`] under a slot already taken (by [`super::JsonBody`], before reading
/// the body).
pub async fn run_job_in<T, F>(state: &AppState, slot: JobSlot, body_len: usize, work: F) -> Response
where
    T: Answer,
    F: FnOnce(&Limits, &Stop) -> Result<T, Problem> + Send + 'static,
{
    let guard = CancelOnDrop::new();
    let arrived = slot.arrived();
    let stop = Stop::new(guard.flag(), state.limits().deadline.map(|d| arrived + d));
    let st = state.clone();
    // The request's span goes with the work to its thread, so a log line written there
    // carries the request id, as the stream's worker does.
    let span = tracing::Span::current();
    let job = move || {
        let _entered = span.enter();
        // The slot is released only when the work really stops, so a disconnected
        // client's job still counts against the limit until it has noticed the flag.
        let _slot = slot;
        work(st.limits(), &stop)
    };
    let joined: Result<Result<T, Problem>, String> =
        if body_len <= SMALL_BODY && state.lane().open() {
            match state.lane().run(job).await {
                Some(Ok(r)) => Ok(r),
                Some(Err(payload)) => Err(panic_message(&*payload)),
                None => Err("the compute lane lost the job".to_string()),
            }
        } else {
            match tokio::task::spawn_blocking(job).await {
                Ok(r) => Ok(r),
                Err(e) if e.is_panic() => Err(panic_message(&*e.into_panic())),
                Err(_) => Err("the job was cancelled".to_string()),
            }
        };
    drop(guard);
    finish(state, joined)
}

/// The response to a job's end: its answer, its problem, or a logged 500 for a panic.
pub(super) fn finish<T: Answer>(
    state: &AppState,
    joined: Result<Result<T, Problem>, String>,
) -> Response {
    match joined {
        Ok(Ok(done)) => {
            let stats = *done.stats();
            state.metrics().record_run(&stats);
            let mut res = done.into_json_response();
            // For the request's log line (`middleware::access`).
            res.extensions_mut().insert(stats);
            res
        }
        Ok(Err(problem)) => problem_response(&public(problem)),
        Err(what) => {
            state.metrics().record_panic();
            tracing::error!(panic = %what, "job panicked; answering 500");
            problem_response(&internal())
        }
    }
}

/// A `200 application/json` response around bytes the job wrote.
pub(super) fn json_response(body: Vec<u8>) -> Response {
    let mut res = body.into_response();
    res.headers_mut().insert(
        header::CONTENT_TYPE,
        HeaderValue::from_static("application/json"),
    );
    res
}

/// A `200 application/json` response sending the pieces one after the other, with their
/// total length declared (the run has finished: nothing here can fail any more).
pub(super) fn pieces_response(pieces: Pieces) -> Response {
    if pieces.parts.len() == 1 {
        return json_response(pieces.into_done().body);
    }
    let len = pieces.len();
    let parts = pieces
        .parts
        .into_iter()
        .map(|p| Ok::<_, std::convert::Infallible>(bytes::Bytes::from(p)));
    let mut res = Body::from_stream(futures_util::stream::iter(parts)).into_response();
    let h = res.headers_mut();
    h.insert(
        header::CONTENT_TYPE,
        HeaderValue::from_static("application/json"),
    );
    h.insert(header::CONTENT_LENGTH, HeaderValue::from(len));
    res
}

/// The text of a panic payload, for the log only.
pub(super) fn panic_message(payload: &(dyn Any + Send)) -> String {
    if let Some(s) = payload.downcast_ref::<&str>() {
        (*s).to_string()
    } else if let Some(s) = payload.downcast_ref::<String>() {
        s.clone()
    } else {
        "(non-text panic payload)".to_string()
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::http::ServerConfig;
    use std::sync::Mutex;
    use tracing::Instrument;
    use tracing_subscriber::layer::{Context, SubscriberExt};
    use tracing_subscriber::registry::LookupSpan;
    use tracing_subscriber::Layer;

    /// The span each probe event was emitted in, by name.
    static SEEN: Mutex<Vec<Option<String>>> = Mutex::new(Vec::new());

    /// Records the current span of every event with the probe's target.
    struct Spans;

    impl<S: tracing::Subscriber + for<'a> LookupSpan<'a>> Layer<S> for Spans {
        fn on_event(&self, e: &tracing::Event<'_>, ctx: Context<'_, S>) {
            if e.metadata().target() == "tacit_job_span_probe" {
                let name = ctx.lookup_current().map(|s| s.name().to_string());
                SEEN.lock().unwrap_or_else(|p| p.into_inner()).push(name);
            }
        }
    }

    #[tokio::test]
    async fn a_job_logs_inside_the_requests_span_on_either_path() {
        // A log line written by the job must carry the request's span (and so its id)
        // whether the job ran on the compute lane or on the blocking pool. Other lib
        // tests install no subscriber, so this one may take the process-wide slot.
        let _ = tracing::subscriber::set_global_default(tracing_subscriber::registry().with(Spans));
        let state = AppState::new(ServerConfig::default());
        // A body of 0 bytes goes to the lane, one of usize::MAX to spawn_blocking.
        for body_len in [0, usize::MAX] {
            let res = run_job_sized(&state, "/probe", body_len, |_, _| {
                tracing::info!(target: "tacit_job_span_probe", "inside the job");
                Ok(Done {
                    body: b"{}".to_vec(),
                    stats: RunStats::default(),
                })
            })
            .instrument(tracing::info_span!("probe_request"))
            .await;
            assert_eq!(res.status(), 200);
        }
        let seen = SEEN.lock().unwrap_or_else(|p| p.into_inner()).clone();
        assert_eq!(
            seen,
            [
                Some("probe_request".to_string()),
                Some("probe_request".to_string())
            ]
        );
    }
}
