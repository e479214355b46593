//! Middleware: time and count every request into the app's [`crate::http::Metrics`], and
//! write its log line ([`super::access`]).

use super::access::RequestLine;
use crate::http::app::REQUEST_ID;
use crate::http::state::AppState;
use axum::extract::{MatchedPath, Request, State};
use axum::middleware::Next;
use axum::response::Response;
use std::time::Instant;

/// Middleware: time each request and count it under its route template (not its raw
/// path, which would let clients create unbounded label values), then log it.
pub(crate) async fn track(State(state): State<AppState>, req: Request, next: Next) -> Response {
    let route = req.extensions().get::<MatchedPath>().cloned();
    let method = req.method().clone();
    // Set by the request-id layer outside this one, so every request has it.
    let request_id = req.headers().get(REQUEST_ID).cloned();
    let start = Instant::now();
    let res = next.run(req).await;
    state.metrics().record_request(
        route.as_ref().map_or("unmatched", MatchedPath::as_str),
        &method,
        res.status().as_u16(),
        start.elapsed().as_secs_f64(),
    );
    RequestLine {
        method,
        route,
        request_id,
        start,
    }
    .finish(res)
}
