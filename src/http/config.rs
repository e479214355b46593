//! Settings of one server that are not limits on a request: keys, CORS, shutdown, and
//! how long idle sockets and streams are kept.
//!
//! Kept apart from [`crate::config::Limits`] because the core reads limits while the
//! web layer alone reads these; the CLI fills both from flags and environment variables.

use crate::config::Limits;
use std::time::Duration;

/// Everything one server needs besides its listener.
#[derive(Debug, Clone)]
pub struct ServerConfig {
    /// Limits passed to every job and reported by `/v1/info`.
    pub limits: Limits,
    /// Accepted API keys; empty means `/v1/*` is open.
    pub api_keys: Vec<String>,
    /// Origins allowed by CORS (`*` for any); empty means no CORS headers at all.
    pub cors_origins: Vec<String>,
    /// How long running requests may continue after a shutdown signal.
    pub shutdown_grace: Duration,
    /// Seconds a shed client is told to wait (`Retry-After`).
    pub retry_after_secs: u64,
    /// Longest silence of a stream between two lines before it is ended.
    pub stream_idle: Duration,
    /// Longest a socket may wait for, or take to send, a request head: a new connection
    /// that sends its head slowly (or never) and a kept-alive one that sits idle between
    /// requests are both closed after this.
    pub socket_idle: Duration,
    /// A batch estimate of 4096 lines or more whose answer is estimated at this many
    /// bytes or more is sent as it is written (chunked, no `Content-Length`) instead of
    /// being held whole; smaller answers keep their declared length.
    pub stream_answer_bytes: u64,
}

impl Default for ServerConfig {
    fn default() -> Self {
        Self {
            limits: Limits::default(),
            api_keys: Vec::new(),
            cors_origins: Vec::new(),
            shutdown_grace: Duration::from_secs(30),
            retry_after_secs: 1,
            stream_idle: Duration::from_secs(60),
            socket_idle: Duration::from_secs(10),
            stream_answer_bytes: 64 << 20,
        }
    }
}
