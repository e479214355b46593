//! `POST /v1/estimate/stream`: NDJSON in, NDJSON out, both at once.
//!
//! Three parts joined by bounded channels, so memory stays flat however long the stream:
//! an async reader splits the request body into lines; a blocking worker feeds them to a
//! [`StreamSession`] and writes answer lines; the response body drains the worker's
//! output. Each estimate leaves as soon as it is computed (output is batched only while
//! more input is already waiting), so the first answer reaches the client before it has
//! finished sending. Back-pressure runs both ways: a slow reader of answers stalls the
//! worker, which stalls the reading of the request.
//!
//! The header line is checked before the response head is sent, so a bad header is an
//! ordinary problem response with its own status; after that the status is 200 and a
//! failure (a bad line, a filter failure, a line over the size limit) ends the stream
//! with two lines: the `{posterior, summary}` of the last line that went through, so the
//! client can resume exactly from there, then `{"error": problem}`.

use super::route::{mount, Route};
use crate::http::extract::require_media_type;
use crate::http::jobs::{panic_message, CancelOnDrop};
use crate::http::middleware::StreamStats;
use crate::http::ndjson::{LineError, LineSplitter};
use crate::http::problem::{internal, overloaded, problem_response, public};
use crate::http::state::AppState;
use crate::job::{Stop, StreamSession};
use crate::problem::{Problem, ProblemKind};
use axum::body::{Body, BodyDataStream};
use axum::extract::{Request, State};
use axum::http::{header, HeaderValue};
use axum::response::{IntoResponse, Response};
use axum::routing::post;
use axum::Router;
use bytes::Bytes;
use futures_util::StreamExt;
use std::collections::VecDeque;
use std::convert::Infallible;
use std::panic::AssertUnwindSafe;
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::Arc;
use std::time::Duration;
use tokio::sync::mpsc;
use tokio::sync::mpsc::error::TryRecvError;
use tokio::sync::OwnedSemaphorePermit;

/// `POST /v1/estimate/stream`.
pub(super) const ROUTES: &[Route] = &[Route {
    method: "POST",
    path: "/v1/estimate/stream",
    keyed: true,
    handler: || post(stream),
}];

/// This group's router.
pub fn router() -> Router<AppState> {
    mount(ROUTES)
}

/// Media types accepted for the request. `application/json` is refused on purpose: a
/// stream of lines is not one JSON document, and a client that says so has likely sent
/// the batch body to the wrong endpoint.
pub(super) const NDJSON_TYPES: &[&str] = &["application/x-ndjson", "application/jsonl"];

/// Messages from the chunk reader to the worker; each carries the lines of one chunk.
enum Input {
    Lines(Vec<(u64, Bytes)>),
    /// The body ended cleanly; without this the worker treats a closed channel as a
    /// client that went away, and writes no last line.
    End,
    /// The request itself went wrong (a line over the limit).
    Fail(Problem),
}

/// Input messages in flight; each holds one chunk's lines.
const INPUT_DEPTH: usize = 16;
/// Output chunks in flight towards the socket.
const OUTPUT_DEPTH: usize = 16;
/// How long the header line may take to arrive once the request has begun.
const HEADER_WAIT: std::time::Duration = std::time::Duration::from_secs(30);
/// Output is sent once this much has gathered, even while more input is waiting.
const FLUSH_BYTES: usize = 32 * 1024;

async fn stream(State(state): State<AppState>, req: Request) -> Response {
    if let Err(p) = require_media_type(req.headers(), NDJSON_TYPES, "application/x-ndjson") {
        return problem_response(&p);
    }
    // Shed at once when every slot is busy, but hold none while the header is awaited:
    // a slot is held only while the header or a batch of lines is being computed.
    if state.is_full() {
        state.metrics().record_shed("/v1/estimate/stream");
        return overloaded(state.config().retry_after_secs);
    }
    let mut body = req.into_body().into_data_stream();
    let mut splitter = LineSplitter::new(StreamSession::header_limit(state.limits()));
    let mut pending: Vec<(u64, Bytes)> = Vec::new();

    // Read up to the first non-blank line: the header.
    let mut ended = false;
    let read_header = async {
        while pending.is_empty() && !ended {
            match body.next().await {
                Some(Ok(chunk)) => splitter.push(chunk, &mut pending).map_err(line_too_long)?,
                Some(Err(_)) => return Err(unreadable()),
                None => {
                    let _ = splitter.finish(&mut pending);
                    ended = true;
                }
            }
        }
        Ok(())
    };
    match tokio::time::timeout(HEADER_WAIT, read_header).await {
        Ok(Ok(())) => {}
        Ok(Err(p)) => return problem_response(&p),
        Err(_) => return problem_response(&header_timeout()),
    }
    let mut pending: VecDeque<_> = pending.into();
    let Some((_, header_line)) = pending.pop_front() else {
        return problem_response(&Problem::new(
            ProblemKind::MalformedJson,
            "the stream is empty: its first line must be the header {model, filter, prior}",
        ));
    };
    let Some(slot) = state.try_slot() else {
        state.metrics().record_shed("/v1/estimate/stream");
        return overloaded(state.config().retry_after_secs);
    };

    // Set when the request body breaks off and when the response body is dropped
    // (client gone): either way the worker stops, even inside one long gap.
    let guard = CancelOnDrop::new();
    let cancel = guard.flag();
    let hangup = SetOnDrop(cancel.clone());
    let stop = Stop::new(cancel.clone(), None);
    let span = tracing::Span::current();
    let st = state.clone();
    let started = tokio::task::spawn_blocking(move || {
        let _enter = span.enter();
        let _slot = slot;
        StreamSession::start(&header_line, st.limits(), &stop)
    })
    .await;
    let session = match started {
        Ok(Ok(s)) => s,
        Ok(Err(p)) => return problem_response(&public(p)),
        Err(e) => {
            state.metrics().record_panic();
            let what = if e.is_panic() {
                panic_message(&*e.into_panic())
            } else {
                "cancelled".to_string()
            };
            tracing::error!(panic = %what, "stream header panicked; answering 500");
            return problem_response(&internal());
        }
    };

    let (in_tx, in_rx) = mpsc::channel::<Input>(INPUT_DEPTH);
    let (out_tx, out_rx) = mpsc::channel::<Bytes>(OUTPUT_DEPTH);

    splitter.set_max(session.line_limit(state.limits()));
    let leftover: Vec<_> = pending.into_iter().collect();
    let idle = state.config().stream_idle;
    let waits = Waits {
        idle,
        draining: state.draining(),
    };
    tokio::spawn(read_lines(
        body, splitter, leftover, ended, in_tx, guard, waits,
    ));
    let span = tracing::Span::current();
    let st = state.clone();
    // Filled in by the worker at the end, read by the request's log line.
    let stats = StreamStats::default();
    let seen = stats.clone();
    let rt = tokio::runtime::Handle::current();
    tokio::task::spawn_blocking(move || {
        let _enter = span.enter();
        work(session, in_rx, out_tx, cancel, &rt, &st, &seen);
    });

    let out = futures_util::stream::unfold((out_rx, hangup), |(mut rx, h)| async move {
        rx.recv().await.map(|b| (Ok::<_, Infallible>(b), (rx, h)))
    });
    let mut res = Body::from_stream(out).into_response();
    res.extensions_mut().insert(stats);
    res.headers_mut().insert(
        header::CONTENT_TYPE,
        HeaderValue::from_static("application/x-ndjson"),
    );
    res
}

/// Sets its flag when dropped; rides in the response body, so a client that goes away
/// stops the worker even while it computes and writes nothing.
struct SetOnDrop(Arc<AtomicBool>);

impl Drop for SetOnDrop {
    fn drop(&mut self) {
        self.0.store(true, Ordering::Relaxed);
    }
}

/// The async half: split the request body into lines and pass them on in chunk-sized
/// batches. It owns the cancel guard, so when it stops for any reason other than a
/// clean end or a silence longer than `idle`, the worker sees the flag. A silence ends
/// the stream with the last good posterior and a `stream-idle` error line; so does a
/// shutdown that begins while the stream waits for input (`shutting-down`).
async fn read_lines(
    mut body: BodyDataStream,
    mut splitter: LineSplitter,
    leftover: Vec<(u64, Bytes)>,
    already_ended: bool,
    tx: mpsc::Sender<Input>,
    guard: CancelOnDrop,
    waits: Waits,
) {
    let Waits { idle, mut draining } = waits;
    if !leftover.is_empty() && tx.send(Input::Lines(leftover)).await.is_err() {
        return;
    }
    if !already_ended {
        loop {
            let mut lines = Vec::new();
            let waited = tokio::select! {
                waited = tokio::time::timeout(idle, body.next()) => waited,
                () = shutdown_begins(&mut draining) => {
                    // The server is going away: end with the last good posterior now,
                    // before the grace time cuts the connection.
                    if tx.send(Input::Fail(shutting_down())).await.is_ok() {
                        guard.disarm();
                    }
                    return;
                }
            };
            let Ok(next) = waited else {
                // The worker owes the client a last good posterior and the reason.
                if tx.send(Input::Fail(stream_idle(idle))).await.is_ok() {
                    guard.disarm();
                }
                return;
            };
            match next {
                Some(Ok(chunk)) => {
                    if let Err(e) = splitter.push(chunk, &mut lines) {
                        let _ = tx.send(Input::Fail(line_too_long(e))).await;
                        return;
                    }
                }
                // The client went away or broke the framing: no last line is owed to
                // anyone, so just stop (dropping the guard stops the worker too).
                Some(Err(e)) => {
                    tracing::debug!(error = %e, "stream request body ended abruptly");
                    return;
                }
                None => {
                    let _ = splitter.finish(&mut lines);
                    if !lines.is_empty() && tx.send(Input::Lines(lines)).await.is_err() {
                        return;
                    }
                    break;
                }
            }
            if !lines.is_empty() && tx.send(Input::Lines(lines)).await.is_err() {
                return;
            }
        }
    }
    let _ = tx.send(Input::End).await;
    // A clean end: the worker must finish, so the guard may not fire now.
    guard.disarm();
}

/// Resolves when a shutdown begins (never, should the server's state be gone first).
async fn shutdown_begins(draining: &mut tokio::sync::watch::Receiver<bool>) {
    if draining.wait_for(|d| *d).await.is_err() {
        std::future::pending::<()>().await;
    }
}

/// What the reader waits for besides the next bytes: the silence that ends a stream, and
/// the start of a shutdown.
struct Waits {
    idle: Duration,
    draining: tokio::sync::watch::Receiver<bool>,
}

/// The blocking half: run the session over the lines and send answers out.
fn work(
    session: StreamSession,
    rx: mpsc::Receiver<Input>,
    tx: mpsc::Sender<Bytes>,
    cancel: Arc<AtomicBool>,
    rt: &tokio::runtime::Handle,
    state: &AppState,
    stats: &StreamStats,
) {
    let mut out = Vec::with_capacity(FLUSH_BYTES * 2);
    let slots = Slots {
        rt,
        state,
        held: None,
        holding: false,
    };
    let result = std::panic::catch_unwind(AssertUnwindSafe(|| {
        run_session(session, rx, &tx, &cancel, &mut out, slots, stats)
    }));
    match result {
        Ok(Flow::Done) | Ok(Flow::Gone) => {}
        Err(payload) => {
            state.metrics().record_panic();
            tracing::error!(panic = %panic_message(&*payload), "stream worker panicked");
            out.clear();
            error_line(&internal(), &mut out);
            let _ = tx.blocking_send(Bytes::from(out));
        }
    }
}

enum Flow {
    /// The stream was answered to its last line.
    Done,
    /// The client is gone; nothing more to write.
    Gone,
}

/// The worker's hold on a job slot: taken while lines are computed, given back while
/// it waits for the next ones, so an idle stream does not count against the limit.
struct Slots<'a> {
    rt: &'a tokio::runtime::Handle,
    state: &'a AppState,
    held: Option<OwnedSemaphorePermit>,
    holding: bool,
}

impl Slots<'_> {
    /// Hold a slot, waiting for one if all are busy (a stream already answered 200
    /// cannot be shed any more; it waits its turn instead).
    fn take(&mut self) {
        if !self.holding {
            self.held = self.rt.block_on(self.state.slot());
            self.holding = true;
        }
    }

    /// Give the slot back.
    fn release(&mut self) {
        self.held = None;
        self.holding = false;
    }
}

fn run_session(
    mut session: StreamSession,
    mut rx: mpsc::Receiver<Input>,
    tx: &mpsc::Sender<Bytes>,
    cancel: &AtomicBool,
    out: &mut Vec<u8>,
    mut slots: Slots<'_>,
    stats: &StreamStats,
) -> Flow {
    let state = slots.state;
    loop {
        let msg = match rx.try_recv() {
            Ok(m) => m,
            Err(TryRecvError::Empty) => {
                // Nothing waiting: send what we have now, then wait for more without
                // holding a slot.
                slots.release();
                if !flush(tx, out) {
                    return Flow::Gone;
                }
                match rx.blocking_recv() {
                    Some(m) => m,
                    None => return Flow::Gone,
                }
            }
            Err(TryRecvError::Disconnected) => return Flow::Gone,
        };
        if cancel.load(Ordering::Relaxed) {
            return Flow::Gone;
        }
        // Ending with the last good posterior needs no slot (a draining server may have
        // none to give until its grace time ends).
        if !matches!(msg, Input::Fail(_)) {
            slots.take();
        }
        match msg {
            Input::Lines(lines) => {
                for (line_no, line) in lines {
                    let mark = out.len();
                    if let Err(p) = session.push(&line, line_no, out) {
                        out.truncate(mark);
                        session.last_good(out);
                        error_line(&p, out);
                        return finish_flow(tx, out);
                    }
                    if out.len() >= FLUSH_BYTES && !flush(tx, out) {
                        return Flow::Gone;
                    }
                }
            }
            Input::End => {
                let mark = out.len();
                match session.finish(out) {
                    Ok(run) => {
                        state.metrics().record_run(&run);
                        stats.set(run);
                    }
                    Err(p) => {
                        out.truncate(mark);
                        error_line(&p, out);
                    }
                }
                return finish_flow(tx, out);
            }
            Input::Fail(p) => {
                session.last_good(out);
                error_line(&p, out);
                return finish_flow(tx, out);
            }
        }
    }
}

fn finish_flow(tx: &mpsc::Sender<Bytes>, out: &mut Vec<u8>) -> Flow {
    if flush(tx, out) {
        Flow::Done
    } else {
        Flow::Gone
    }
}

/// Send the gathered output; false when the response body is gone (client left).
fn flush(tx: &mpsc::Sender<Bytes>, out: &mut Vec<u8>) -> bool {
    if out.is_empty() {
        return true;
    }
    let chunk = Bytes::copy_from_slice(out);
    out.clear();
    tx.blocking_send(chunk).is_ok()
}

/// Append `{"error": problem}` and a newline.
fn error_line(p: &Problem, out: &mut Vec<u8>) {
    out.extend_from_slice(b"{\"error\":");
    out.extend_from_slice(&public(p.clone()).to_json());
    out.extend_from_slice(b"}\n");
}

fn line_too_long(e: LineError) -> Problem {
    let mut p = Problem::new(ProblemKind::TooLarge, e.to_string());
    p.errors.push(crate::problem::FieldError::new(
        "",
        format!("line {}: longer than {} bytes", e.line_no, e.limit),
    ));
    p
}

fn header_timeout() -> Problem {
    Problem::new(
        ProblemKind::HeaderTimeout,
        format!(
            "no header line arrived within {} s of the request's start",
            HEADER_WAIT.as_secs()
        ),
    )
}

fn stream_idle(idle: Duration) -> Problem {
    Problem::new(
        ProblemKind::StreamIdle,
        format!(
            "no byte of the stream arrived for {} s after the last line; the stream ends here",
            idle.as_secs_f64()
        ),
    )
}

fn shutting_down() -> Problem {
    Problem::new(
        ProblemKind::ShuttingDown,
        "the server is shutting down; the stream ends with its last good posterior",
    )
}

fn unreadable() -> Problem {
    Problem::new(
        ProblemKind::MalformedJson,
        "the request body could not be read",
    )
}
