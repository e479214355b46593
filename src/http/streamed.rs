//! A batch estimate whose answer leaves while it is being written: the job hands its
//! pieces over a bounded channel, the `200` head goes out with the first piece, and the
//! body follows piece by piece (chunked), so a large answer holds a few blocks in memory
//! rather than all of it. A job that ends before its first piece (a problem, or an answer
//! small enough to be sent whole) is answered as any other job. A failure after the head
//! has gone ends the JSON document with an `"error"` member, written by the job.

use super::jobs::{finish, panic_message, CancelOnDrop};
use super::state::{AppState, JobSlot};
use crate::config::Limits;
use crate::job::{BatchAnswer, PieceSink, Pieces, Stop};
use crate::problem::Problem;
use axum::body::Body;
use axum::http::{header, HeaderValue};
use axum::response::{IntoResponse, Response};

/// Pieces in flight between the job and the socket: with the writer's own blocks, what a
/// slow client makes the job wait for rather than pile up.
const PIECES_IN_FLIGHT: usize = 2;

/// Hands pieces to the response body; refused once the client has gone.
struct ChannelSink(tokio::sync::mpsc::Sender<Vec<u8>>);

impl PieceSink for ChannelSink {
    fn send(&mut self, piece: Vec<u8>) -> bool {
        self.0.blocking_send(piece).is_ok()
    }
}

/// Run a batch job that may stream its answer (see the file's doc), under `slot`.
pub async fn run_streaming_job<F>(state: &AppState, slot: JobSlot, work: F) -> Response
where
    F: FnOnce(&Limits, &Stop, &mut dyn PieceSink) -> Result<BatchAnswer, Problem> + Send + 'static,
{
    let guard = CancelOnDrop::new();
    let arrived = slot.arrived();
    let stop = Stop::new(guard.flag(), state.limits().deadline.map(|d| arrived + d));
    let st = state.clone();
    let span = tracing::Span::current();
    let (tx, mut rx) = tokio::sync::mpsc::channel::<Vec<u8>>(PIECES_IN_FLIGHT);
    let handle = tokio::task::spawn_blocking(move || {
        let _entered = span.enter();
        let _slot = slot;
        let mut sink = ChannelSink(tx);
        work(st.limits(), &stop, &mut sink)
    });
    // The first piece, or the end of the job (the sink, and with it the sender, is
    // dropped when the job returns or panics).
    let Some(first) = rx.recv().await else {
        let joined: Result<Result<Pieces, Problem>, String> = match handle.await {
            Ok(Ok(BatchAnswer::Pieces(p))) => Ok(Ok(p)),
            Ok(Ok(BatchAnswer::Sent { .. })) => Err("a streamed job sent nothing".to_string()),
            Ok(Err(p)) => Ok(Err(p)),
            Err(e) if e.is_panic() => Err(panic_message(&*e.into_panic())),
            Err(_) => Err("the job was cancelled".to_string()),
        };
        drop(guard);
        return finish(state, joined);
    };
    // The head goes now. The job's end is recorded when it comes.
    let st = state.clone();
    let span = tracing::Span::current();
    tokio::spawn(async move {
        let _entered = span.enter();
        match handle.await {
            Ok(Ok(BatchAnswer::Sent { stats, failed })) => {
                st.metrics().record_run(&stats);
                if let Some(p) = failed {
                    tracing::warn!(status = p.status, detail = %p.detail, "streamed answer ended with an error member");
                }
            }
            Ok(Ok(BatchAnswer::Pieces(_))) | Ok(Err(_)) => {}
            Err(e) if e.is_panic() => {
                st.metrics().record_panic();
                tracing::error!(panic = %panic_message(&*e.into_panic()), "streamed job panicked; the answer was cut short");
            }
            Err(_) => {}
        }
    });
    // The guard rides with the body: a client that goes away drops it and stops the job;
    // a body read to its end disarms it.
    let body = futures_util::stream::unfold(
        (Some(first), rx, Some(guard)),
        |(first, mut rx, mut guard)| async move {
            let next = match first {
                Some(p) => Some(p),
                None => rx.recv().await,
            };
            match next {
                Some(p) => Some((
                    Ok::<_, std::convert::Infallible>(bytes::Bytes::from(p)),
                    (None, rx, guard),
                )),
                None => {
                    if let Some(g) = guard.take() {
                        g.disarm();
                    }
                    None
                }
            }
        },
    );
    let mut res = Body::from_stream(body).into_response();
    res.headers_mut().insert(
        header::CONTENT_TYPE,
        HeaderValue::from_static("application/json"),
    );
    res
}
