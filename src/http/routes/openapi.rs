//! `GET /openapi.json`: the contract, machine-readable, converted once from the YAML file
//! compiled into the binary.

use super::route::{mount, Route};
use crate::http::jobs::json_response;
use crate::http::openapi::openapi_json;
use crate::http::problem::{internal, problem_response};
use crate::http::state::AppState;
use axum::response::Response;
use axum::routing::get;
use axum::Router;

/// `GET /openapi.json`.
pub(super) const ROUTES: &[Route] = &[Route {
    method: "GET",
    path: "/openapi.json",
    keyed: false,
    handler: || get(openapi),
}];

/// This group's router.
pub fn router() -> Router<AppState> {
    mount(ROUTES)
}

async fn openapi() -> Response {
    match openapi_json() {
        Ok(bytes) => json_response(bytes.to_vec()),
        Err(e) => {
            tracing::error!(error = %e, "the embedded OpenAPI file does not convert");
            problem_response(&internal())
        }
    }
}
