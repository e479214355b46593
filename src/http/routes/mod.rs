//! One module per route group, each exporting its `ROUTES` and `router()`; [`ALL`] is the
//! single list the app is built from and the OpenAPI test checks against.

mod calibrate;
mod estimate;
mod health;
mod identify;
mod info;
mod metrics;
mod model;
mod openapi;
mod page;
mod problems;
mod route;
mod stream;
mod table;

pub use route::{mount, Route};
pub use table::{all, ALL};

/// The route groups by name, for callers that want one group's router alone.
pub mod groups {
    pub use super::calibrate::router as calibrate;
    pub use super::estimate::router as estimate;
    pub use super::health::router as health;
    pub use super::identify::router as identify;
    pub use super::info::router as info;
    pub use super::metrics::router as metrics;
    pub use super::model::router as model;
    pub use super::openapi::router as openapi;
    pub use super::page::router as page;
    pub use super::problems::router as problems;
    pub use super::stream::router as stream;
}
