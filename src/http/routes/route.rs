//! What one route is (method, path, handler) and how a list of them becomes a router.
//! Every route module builds on this; the table of all of them is [`super::table`].

use crate::http::state::AppState;
use axum::routing::MethodRouter;
use axum::Router;

/// One route: what the OpenAPI file must document and how to serve it.
#[derive(Clone, Copy)]
pub struct Route {
    /// HTTP method, upper case.
    pub method: &'static str,
    /// Path template as axum 0.8 and OpenAPI both write it (`{name}` for a parameter).
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

/// A router serving `routes` (without layers or state).
pub fn mount(routes: &[Route]) -> Router<AppState> {
    routes.iter().fold(Router::new(), |r, route| {
        r.route(route.path, (route.handler)())
    })
}
