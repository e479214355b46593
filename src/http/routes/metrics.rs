//! `GET /metrics`: Prometheus text exposition of this app's counters. Open without a key,
//! as scrapers expect; it reveals counts, never request content.

use super::route::{mount, Route};
use crate::http::state::AppState;
use axum::extract::State;
use axum::http::{header, HeaderValue};
use axum::response::{IntoResponse, Response};
use axum::routing::get;
use axum::Router;

/// `GET /metrics`.
pub(super) const ROUTES: &[Route] = &[Route {
    method: "GET",
    path: "/metrics",
    keyed: false,
    handler: || get(metrics),
}];

/// This group's router.
pub fn router() -> Router<AppState> {
    mount(ROUTES)
}

async fn metrics(State(state): State<AppState>) -> Response {
    let mut res = state.metrics().render().into_response();
    res.headers_mut().insert(
        header::CONTENT_TYPE,
        HeaderValue::from_static("text/plain; version=0.0.4; charset=utf-8"),
    );
    res
}
