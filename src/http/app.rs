//! The router: every route of the table, the key check on `/v1/*`, problem+json for
//! unknown routes and methods, and the layers every request passes through.
//!
//! Kept apart from `main` so tests can build the same app and drive it on a real port.

use super::auth::require_key;
use super::jobs::panic_message;
use super::metrics::track;
use super::problem::{internal, problem_response};
use super::routes;
use super::state::AppState;
use crate::problem::{Problem, ProblemKind};
use axum::extract::Request;
use axum::http::{header, HeaderName, HeaderValue, Method};
use axum::middleware::from_fn_with_state;
use axum::response::Response;
use axum::Router;
use std::any::Any;
use tower_http::catch_panic::CatchPanicLayer;
use tower_http::cors::{AllowOrigin, CorsLayer};
use tower_http::request_id::{MakeRequestUuid, PropagateRequestIdLayer, SetRequestIdLayer};
use tower_http::trace::{DefaultOnResponse, TraceLayer};

/// The header carrying each request's id (taken from the client or generated).
pub const REQUEST_ID: &str = "x-request-id";

/// The whole service: routes from [`routes::ALL`] with keys on `/v1/*`, then [`layered`].
pub fn app(state: AppState) -> Router {
    let (mut open, mut keyed) = (Router::new(), Router::new());
    for r in routes::all() {
        if r.keyed {
            keyed = keyed.merge(routes::mount(std::slice::from_ref(r)));
        } else {
            open = open.merge(routes::mount(std::slice::from_ref(r)));
        }
    }
    let keyed = keyed.route_layer(from_fn_with_state(state.clone(), require_key));
    layered(open.merge(keyed), state)
}

/// Wrap any router in the service's fallbacks and layers: problem+json 404 and 405,
/// metrics, panics caught as a logged 500, CORS, request ids and tracing spans.
pub fn layered(router: Router<AppState>, state: AppState) -> Router {
    let request_id = HeaderName::from_static(REQUEST_ID);
    let cors = cors_layer(&state.config().cors_origins);
    router
        .fallback(not_found)
        .method_not_allowed_fallback(method_not_allowed)
        .layer(CatchPanicLayer::custom(on_panic))
        .layer(from_fn_with_state(state.clone(), track))
        .layer(tower::util::option_layer(cors))
        .layer(PropagateRequestIdLayer::new(request_id.clone()))
        .layer(
            TraceLayer::new_for_http()
                .make_span_with(|req: &Request| {
                    let id = req
                        .headers()
                        .get(REQUEST_ID)
                        .and_then(|v| v.to_str().ok())
                        .unwrap_or("");
                    // At error level so the span (and so the request id) is on every
                    // error line even when the log filter is `warn` or `error`.
                    tracing::error_span!("request", method = %req.method(), path = %req.uri().path(), request_id = %id)
                })
                // Every request at debug: at tens of thousands per second a line each
                // would cost more than the work. Failures still log at error.
                .on_response(DefaultOnResponse::new().level(tracing::Level::DEBUG)),
        )
        .layer(SetRequestIdLayer::new(request_id, MakeRequestUuid))
        .with_state(state)
}

fn cors_layer(origins: &[String]) -> Option<CorsLayer> {
    if origins.is_empty() {
        return None;
    }
    let allow = if origins.iter().any(|o| o == "*") {
        AllowOrigin::any()
    } else {
        AllowOrigin::list(
            origins
                .iter()
                .filter_map(|o| HeaderValue::from_str(o.trim()).ok()),
        )
    };
    Some(
        CorsLayer::new()
            .allow_origin(allow)
            .allow_methods([Method::GET, Method::POST])
            .allow_headers([
                header::CONTENT_TYPE,
                header::AUTHORIZATION,
                HeaderName::from_static(REQUEST_ID),
            ])
            .expose_headers([HeaderName::from_static(REQUEST_ID), header::RETRY_AFTER]),
    )
}

async fn not_found(req: Request) -> Response {
    problem_response(&Problem::new(
        ProblemKind::NotFound,
        format!("no route for {}", req.uri().path()),
    ))
}

async fn method_not_allowed(req: Request) -> Response {
    problem_response(&Problem::new(
        ProblemKind::MethodNotAllowed,
        format!(
            "method {} is not allowed on {}",
            req.method(),
            req.uri().path()
        ),
    ))
}

/// Runs inside the request's span, so the log line carries the request id.
fn on_panic(payload: Box<dyn Any + Send + 'static>) -> Response {
    tracing::error!(panic = %panic_message(&*payload), "handler panicked; answering 500");
    problem_response(&internal())
}
