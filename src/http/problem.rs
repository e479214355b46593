//! How a [`Problem`] leaves the server: its status, `application/problem+json`, and for
//! the overload and auth kinds the header the RFC asks for.

use crate::problem::{Problem, ProblemKind};
use axum::http::{header, HeaderValue, StatusCode};
use axum::response::{IntoResponse, Response};

/// Media type of every error body (RFC 9457 section 3).
pub const PROBLEM_JSON: &str = "application/problem+json";

/// A [`Problem`] as an axum response.
#[derive(Debug, Clone)]
pub struct ProblemResponse(pub Problem);

impl From<Problem> for ProblemResponse {
    fn from(p: Problem) -> Self {
        Self(p)
    }
}

impl IntoResponse for ProblemResponse {
    fn into_response(self) -> Response {
        problem_response(&self.0)
    }
}

/// Render a problem with its own status (a status outside 400..=599 is a bug and leaves
/// as 500, so a mistaken kind can never pass as success).
pub fn problem_response(p: &Problem) -> Response {
    let status = StatusCode::from_u16(p.status)
        .ok()
        .filter(|s| s.is_client_error() || s.is_server_error())
        .unwrap_or(StatusCode::INTERNAL_SERVER_ERROR);
    let mut res = (status, p.to_json()).into_response();
    let h = res.headers_mut();
    h.insert(header::CONTENT_TYPE, HeaderValue::from_static(PROBLEM_JSON));
    if status == StatusCode::UNAUTHORIZED {
        h.insert(header::WWW_AUTHENTICATE, HeaderValue::from_static("Bearer"));
    }
    res
}

/// The 503 for a full server, with `Retry-After`.
pub(super) fn overloaded(retry_after_secs: u64) -> Response {
    let p = Problem::new(
        ProblemKind::Overloaded,
        "too many requests are running; retry later",
    );
    let mut res = problem_response(&p);
    res.headers_mut()
        .insert(header::RETRY_AFTER, HeaderValue::from(retry_after_secs));
    res
}

/// The generic 500: the client learns nothing about internals, the log has the rest.
pub(super) fn internal() -> Problem {
    Problem::new(
        ProblemKind::Internal,
        "an internal error occurred; it has been logged with this request's id",
    )
}

/// The problem as the client may see it: a 500 from the core is a bug whose words go to
/// the log (inside the request's span, so with its id), replaced by the generic detail.
pub(super) fn public(p: Problem) -> Problem {
    if p.status == 500 {
        tracing::error!(detail = %p.detail, "internal error");
        internal()
    } else {
        p
    }
}
