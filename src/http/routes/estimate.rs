//! `POST /v1/estimate` and `POST /v1/smooth`: one whole batch in, one JSON answer out.

use super::route::{mount, Route};
use crate::http::extract::{BatchBody, Posted};
use crate::http::jobs::run_job_in;
use crate::http::lane::SMALL_BODY;
use crate::http::state::AppState;
use crate::http::streamed::run_streaming_job;
use crate::job;
use axum::extract::State;
use axum::response::Response;
use axum::routing::post;
use axum::Router;

/// `POST /v1/estimate`, `POST /v1/smooth`.
pub(super) const ROUTES: &[Route] = &[
    Route {
        method: "POST",
        path: "/v1/estimate",
        keyed: true,
        handler: || post(estimate),
    },
    Route {
        method: "POST",
        path: "/v1/smooth",
        keyed: true,
        handler: || post(smooth),
    },
];

/// This group's router.
pub fn router() -> Router<AppState> {
    mount(ROUTES)
}

async fn estimate(State(state): State<AppState>, BatchBody(posted, slot): BatchBody) -> Response {
    let body = match posted {
        Posted::Json(body) => body,
        Posted::Csv { request, readings } => {
            return csv(&state, slot, request, readings, false).await
        }
    };
    // A body on the compute lane is too small to need streaming (and the budget has
    // counted its whole answer); a larger one may send its answer as it is written.
    if body.len() <= SMALL_BODY {
        return run_job_in(&state, slot, body.len(), move |limits, stop| {
            job::estimate_pieces(&body, limits, stop)
        })
        .await;
    }
    let from = state.config().stream_answer_bytes;
    run_streaming_job(&state, slot, move |limits, stop, sink| {
        job::estimate_streaming(&body, limits, stop, from, sink)
    })
    .await
}

/// A CSV upload: converted and run as one batch (its answer is not streamed).
async fn csv(
    state: &AppState,
    slot: crate::http::state::JobSlot,
    request: bytes::Bytes,
    readings: bytes::Bytes,
    smooth: bool,
) -> Response {
    let len = request.len() + readings.len();
    run_job_in(state, slot, len, move |limits, stop| {
        job::batch_csv(&request, &readings, limits, stop, smooth)
    })
    .await
}

async fn smooth(State(state): State<AppState>, BatchBody(posted, slot): BatchBody) -> Response {
    let body = match posted {
        Posted::Json(body) => body,
        Posted::Csv { request, readings } => {
            return csv(&state, slot, request, readings, true).await
        }
    };
    run_job_in(&state, slot, body.len(), move |limits, stop| {
        job::smooth_pieces(&body, limits, stop)
    })
    .await
}
