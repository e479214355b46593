//! The route table: method, path and handler of every route, in one place.
//!
//! The router is built by walking [`ALL`], and the OpenAPI test walks the same list, so a
//! route cannot be served without being documented, nor documented without being served.

use crate::http::state::AppState;
use axum::routing::MethodRouter;
use axum::Router;

/// One route: what the OpenAPI file must document and how to serve it.
#[derive(Clone, Copy)]
pub struct Route {
    /// HTTP method, upper case.
    pub method: &'static str,
    /// Path template as axum and OpenAPI both write it (no parameters are used).
    pub path: &'static str,
    /// Whether the route sits behind the API keys (every `/v1/*` route does).
    pub keyed: bool,
    pub(crate) handler: fn() -> MethodRouter<AppState>,
}

impl std::fmt::Debug for Route {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        write!(f, "{} {}", self.method, self.path)
    }
}

/// Every route group of the service.
pub const ALL: &[&[Route]] = &[
    super::health::ROUTES,
    super::metrics::ROUTES,
    super::openapi::ROUTES,
    super::info::ROUTES,
    super::estimate::ROUTES,
    super::stream::ROUTES,
    super::model::ROUTES,
];

/// Every route, flattened.
pub fn all() -> impl Iterator<Item = &'static Route> {
    ALL.iter().flat_map(|g| g.iter())
}

/// A router serving `routes` (without layers or state).
pub fn mount(routes: &[Route]) -> Router<AppState> {
    routes.iter().fold(Router::new(), |r, route| {
        r.route(route.path, (route.handler)())
    })
}
