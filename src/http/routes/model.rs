//! `POST /v1/check` and `POST /v1/simulate`: questions about a model rather than a filter
//! run over readings.

use super::route::{mount, Route};
use crate::http::extract::JsonBody;
use crate::http::jobs::run_job_in;
use crate::http::state::AppState;
use crate::job;
use axum::extract::State;
use axum::response::Response;
use axum::routing::post;
use axum::Router;

/// `POST /v1/check`, `POST /v1/simulate`.
pub(super) const ROUTES: &[Route] = &[
    Route {
        method: "POST",
        path: "/v1/check",
        keyed: true,
        handler: || post(check),
    },
    Route {
        method: "POST",
        path: "/v1/simulate",
        keyed: true,
        handler: || post(simulate),
    },
];

/// This group's router.
pub fn router() -> Router<AppState> {
    mount(ROUTES)
}

async fn check(State(state): State<AppState>, JsonBody(body, slot): JsonBody) -> Response {
    // Checking compiles formulas and ranks a matrix: small but not free, so it too runs
    // off the executor and under a job slot.
    run_job_in(&state, slot, body.len(), move |limits, stop| {
        job::check(&body, limits, stop)
    })
    .await
}

async fn simulate(State(state): State<AppState>, JsonBody(body, slot): JsonBody) -> Response {
    run_job_in(&state, slot, body.len(), move |limits, stop| {
        job::simulate_pieces(&body, limits, stop)
    })
    .await
}
