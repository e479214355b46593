//! `POST /v1/identify`: build a model section from recorded history.

use super::route::{mount, Route};
use crate::http::extract::JsonBody;
use crate::http::jobs::run_job_in;
use crate::http::state::AppState;
use crate::job;
use axum::extract::State;
use axum::response::Response;
use axum::routing::post;
use axum::Router;

/// `POST /v1/identify`.
pub(super) const ROUTES: &[Route] = &[Route {
    method: "POST",
    path: "/v1/identify",
    keyed: true,
    handler: || post(identify),
}];

/// This group's router.
pub fn router() -> Router<AppState> {
    mount(ROUTES)
}

async fn identify(State(state): State<AppState>, JsonBody(body, slot): JsonBody) -> Response {
    run_job_in(&state, slot, body.len(), move |limits, stop| {
        job::identify(&body, limits, stop)
    })
    .await
}
