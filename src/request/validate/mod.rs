//! The validation step: raw sections (`request::raw`) in, the checked [`Model`],
//! [`FilterConfig`], [`Prior`] and [`OutputConfig`] out, or every fault found, each at
//! its JSON Pointer. One file per section; shared checks in `common`.
//!
//! [`Model`]: crate::model::Model
//! [`FilterConfig`]: crate::model::FilterConfig
//! [`Prior`]: crate::model::Prior
//! [`OutputConfig`]: crate::model::OutputConfig

mod common;
mod dynamics;
mod families;
mod filter;
mod lower;
mod model;
mod output;
mod prior;
mod sensors;

pub use common::time_value;
pub use families::{check_families, has_families};
pub use filter::{check_filter, filter};
pub use lower::{lower_model, lower_prior};
pub use model::{check_model, model};
pub use output::{check_output, output};
pub use prior::{check_prior, check_prior_in, prior, prior_in};
