//! The web layer: an axum router over the [`crate::job`] boundary, plus the server loop.
//!
//! Everything here is about HTTP (routes, media types, keys, limits, metrics, shutdown);
//! nothing here knows about filters. `mod.rs` holds only module lines and re-exports.

mod app;
mod config;
mod extract;
mod jobs;
mod keys;
mod lane;
mod metrics;
mod middleware;
mod ndjson;
mod openapi;
mod problem;
pub mod routes;
mod serve;
mod state;
mod streamed;

pub use app::{app, layered};
pub use config::ServerConfig;
pub use extract::JsonBody;
pub use jobs::{run_job, run_job_in, run_job_sized, Answer, CancelOnDrop};
pub use keys::ApiKeys;
pub use metrics::Metrics;
pub use ndjson::{LineError, LineSplitter};
pub use openapi::{openapi_json, OPENAPI_YAML};
pub use problem::{problem_response, ProblemResponse, PROBLEM_JSON};
pub use serve::{serve, shutdown_signal};
pub use state::{AppState, JobSlot};
pub use streamed::run_streaming_job;
