//! `tacit demo`: three invented plants run end to end against the real service.
//!
//! Each scenario in `demo-data/` (embedded in [`SCENARIOS`], so the command needs no files)
//! holds a model, filter settings, a prior and simulate settings with a committed seed,
//! plus the truth and readings tacit's own simulator made from them. The demo starts the
//! HTTP service in-process on a free loopback port, posts the readings over plain HTTP/1.1
//! with hyper's client, as any client would ([`run`]), and compares what came back with
//! the simulated truth ([`Report`]): this shows a new user what the service recovers, and
//! shows us the whole path (parse, filter, write, HTTP) still works. [`regenerate`]
//! rebuilds the generated files from the seeds.

mod report;
mod run;
mod scenario;

pub use report::{render, to_json, NisReport, Report, StateReport, GLITCH_SIGMAS, SETTLING_SHARE};
pub use run::{post, run, run_scenario};
pub use scenario::{
    generate, regenerate, simulate_request, Delivery, Generated, Scenario, SCENARIOS,
};
