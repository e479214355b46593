//! `GET /v1/info`: version, methods and the limits in force, as the job layer reports them,
//! and how long this server waits on silent streams and sockets.

use super::route::{mount, Route};
use crate::http::state::AppState;
use crate::job;
use axum::extract::State;
use axum::routing::get;
use axum::{Json, Router};

/// `GET /v1/info`.
pub(super) const ROUTES: &[Route] = &[Route {
    method: "GET",
    path: "/v1/info",
    keyed: true,
    handler: || get(info),
}];

/// This group's router.
pub fn router() -> Router<AppState> {
    mount(ROUTES)
}

async fn info(State(state): State<AppState>) -> Json<serde_json::Value> {
    let mut v = job::info(state.limits());
    let c = state.config();
    v["timeouts"] = serde_json::json!({
        "stream_idle_secs": c.stream_idle.as_secs_f64(),
        "socket_idle_secs": c.socket_idle.as_secs_f64(),
    });
    Json(v)
}
