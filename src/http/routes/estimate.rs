//! `POST /v1/estimate` and `POST /v1/smooth`: one whole batch in, one JSON answer out.

use super::route::{mount, Route};
use crate::http::extract::JsonBody;
use crate::http::jobs::run_job_sized;
use crate::http::state::AppState;
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

async fn estimate(State(state): State<AppState>, JsonBody(body): JsonBody) -> Response {
    run_job_sized(&state, "/v1/estimate", body.len(), move |limits, stop| {
        job::estimate_pieces(&body, limits, stop)
    })
    .await
}

async fn smooth(State(state): State<AppState>, JsonBody(body): JsonBody) -> Response {
    run_job_sized(&state, "/v1/smooth", body.len(), move |limits, stop| {
        job::smooth_pieces(&body, limits, stop)
    })
    .await
}
