//! Liveness and readiness. Both stay open when API keys are configured, so orchestrators'
//! probes need no secret; neither does any work.

use super::route::{mount, Route};
use crate::http::problem::problem_response;
use crate::http::state::AppState;
use crate::problem::{Problem, ProblemKind};
use axum::extract::State;
use axum::response::{IntoResponse, Response};
use axum::routing::get;
use axum::{Json, Router};

/// `GET /healthz`, `GET /readyz`.
pub(super) const ROUTES: &[Route] = &[
    Route {
        method: "GET",
        path: "/healthz",
        keyed: false,
        handler: || get(healthz),
    },
    Route {
        method: "GET",
        path: "/readyz",
        keyed: false,
        handler: || get(readyz),
    },
];

/// This group's router.
pub fn router() -> Router<AppState> {
    mount(ROUTES)
}

/// The process is alive and serving: always 200.
async fn healthz() -> Response {
    Json(serde_json::json!({"status": "ok"})).into_response()
}

/// 200 while new work is taken; 503 once shutdown has begun, so a load balancer stops
/// sending before the listener closes.
async fn readyz(State(state): State<AppState>) -> Response {
    if state.is_ready() {
        Json(serde_json::json!({"status": "ready"})).into_response()
    } else {
        problem_response(&shutting_down())
    }
}

fn shutting_down() -> Problem {
    Problem::new(
        ProblemKind::ShuttingDown,
        "the server is shutting down and takes no new work",
    )
}
