//! The functions every request passes through before its handler: the key check, the
//! request metrics and the request's log line. Each reads the shared state; the state
//! depends on none of them.

mod access;
mod auth;
mod metrics;

pub(crate) use access::StreamStats;
pub(super) use auth::require_key;
pub(super) use metrics::track;
