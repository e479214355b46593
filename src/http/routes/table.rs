//! The route table: every route group of the service, in one place.
//!
//! The router is built by walking [`ALL`], and the OpenAPI test walks the same list, so a
//! route cannot be served without being documented, nor documented without being served.

use super::route::Route;
use super::{
    calibrate, estimate, health, identify, info, metrics, model, openapi, page, problems, stream,
};

/// Every route group of the service.
pub const ALL: &[&[Route]] = &[
    health::ROUTES,
    metrics::ROUTES,
    openapi::ROUTES,
    problems::ROUTES,
    info::ROUTES,
    estimate::ROUTES,
    stream::ROUTES,
    calibrate::ROUTES,
    model::ROUTES,
    identify::ROUTES,
    page::ROUTES,
];

/// Every route, flattened.
pub fn all() -> impl Iterator<Item = &'static Route> {
    ALL.iter().flat_map(|g| g.iter())
}
