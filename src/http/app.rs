//! The router: every route of the table, the key check on `/v1/*`, problem+json for
//! unknown routes and methods, and the layers every request passes through.
//!
//! Kept apart from `main` so tests can build the same app and drive it on a real port.

use super::jobs::panic_message;
use super::middleware::{require_key, track};
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
use tower_http::request_id::{
    MakeRequestId, PropagateRequestIdLayer, RequestId, SetRequestIdLayer,
};
use tower_http::trace::{DefaultOnResponse, TraceLayer};

/// The header carrying each request's id (taken from the client or generated).
pub(super) const REQUEST_ID: &str = "x-request-id";

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
        .layer(SetRequestIdLayer::new(request_id, RandomUuid))
        .with_state(state)
}

/// Generates request ids: random (version 4) UUIDs, as `MakeRequestUuid` makes, but with
/// the 122 random bits drawn from the thread's cryptographic generator (seeded once from
/// the OS) instead of one `getrandom` system call per request.
///
/// Version 4 rather than the time-ordered version 7: an id is only a key to find a
/// request's log lines, the log already orders them by time, and a random id says nothing
/// about when or how often the server was called.
#[derive(Debug, Clone, Copy)]
struct RandomUuid;

impl MakeRequestId for RandomUuid {
    fn make_request_id<B>(&mut self, _: &axum::http::Request<B>) -> Option<RequestId> {
        let mut text = [0u8; uuid::fmt::Hyphenated::LENGTH];
        let id = uuid_v4(rand::random::<[u8; 16]>());
        let text = id.hyphenated().encode_lower(&mut text);
        HeaderValue::from_str(text).ok().map(RequestId::new)
    }
}

/// `bytes` as a version-4, variant-1 UUID (RFC 9562 section 5.4): the crate sets the six
/// fixed bits.
fn uuid_v4(bytes: [u8; 16]) -> uuid::Uuid {
    uuid::Builder::from_random_bytes(bytes).into_uuid()
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

#[cfg(test)]
mod tests {
    use super::uuid_v4;

    #[test]
    fn generated_ids_are_version_4_uuids() {
        // RFC 9562 section 5.4: version nibble 4 (13th hex digit), variant bits 10 (17th
        // hex digit one of 8, 9, a, b), 8-4-4-4-12 hex digits.
        for bytes in [[0u8; 16], [0xff; 16], [0x5a; 16]] {
            let id = uuid_v4(bytes).hyphenated().to_string();
            let parts: Vec<&str> = id.split('-').collect();
            let lens: Vec<usize> = parts.iter().map(|p| p.len()).collect();
            assert_eq!(lens, [8, 4, 4, 4, 12], "{id}");
            assert!(
                id.chars().all(|c| c == '-' || c.is_ascii_hexdigit()),
                "{id}"
            );
            assert_eq!(&parts[2][..1], "4", "{id}");
            assert!("89ab".contains(&parts[3][..1]), "{id}");
        }
        assert_eq!(
            uuid_v4([0; 16]).hyphenated().to_string(),
            "00000000-0000-4000-8000-000000000000"
        );
        assert_eq!(
            uuid_v4([0xff; 16]).hyphenated().to_string(),
            "ffffffff-ffff-4fff-bfff-ffffffffffff"
        );
    }
}
