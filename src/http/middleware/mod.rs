//! The functions every request passes through before its handler: the key check and the
//! request metrics. Each reads the shared state; the state depends on neither.

mod auth;
mod metrics;

pub(super) use auth::require_key;
pub(super) use metrics::track;
