//! Middleware: optional bearer keys on `/v1/*`. Health, readiness and metrics stay open so
//! probes and scrapers need no secret. It reads the keys from the state; the state knows
//! nothing of this function.

use crate::http::problem::problem_response;
use crate::http::state::AppState;
use crate::problem::{Problem, ProblemKind};
use axum::extract::{Request, State};
use axum::http::header;
use axum::middleware::Next;
use axum::response::Response;

/// Middleware: 401 problem+json unless the request carries an accepted bearer key.
pub(crate) async fn require_key(
    State(state): State<AppState>,
    req: Request,
    next: Next,
) -> Response {
    let keys = state.keys();
    if keys.is_empty() {
        return next.run(req).await;
    }
    let presented = req
        .headers()
        .get(header::AUTHORIZATION)
        .and_then(|v| v.to_str().ok())
        .and_then(|v| {
            let (scheme, rest) = v.trim().split_once(' ')?;
            scheme.eq_ignore_ascii_case("bearer").then(|| rest.trim())
        });
    match presented {
        Some(k) if keys.accepts(k.as_bytes()) => next.run(req).await,
        Some(_) => problem_response(&Problem::new(
            ProblemKind::Unauthorized,
            "the API key is not valid",
        )),
        None => problem_response(&Problem::new(
            ProblemKind::Unauthorized,
            "an API key is required: send Authorization: Bearer <key>",
        )),
    }
}
