//! The one log line each finished request leaves: method, route template, status,
//! duration, request id and, for filter requests, the lines run and the filter.
//!
//! Written by [`super::track`], which already times every request for the metrics, so
//! the log and `/metrics` agree on route and status. The filter counters reach it the way
//! they reach the metrics: a job's [`RunStats`] rides on the response
//! (`crate::http::jobs`); a stream's are only known when its body ends, so the stream
//! handler leaves a [`StreamStats`] slot instead and the line is written when the body is
//! done (or dropped because the client left).

use crate::job::RunStats;
use axum::body::Body;
use axum::extract::MatchedPath;
use axum::http::{HeaderValue, Method};
use axum::response::Response;
use futures_util::StreamExt;
use std::sync::{Arc, OnceLock};
use std::time::Instant;
use tracing::field::display;

/// Target of the request lines, so an operator can tune them alone
/// (`RUST_LOG=info,tacit::request=warn`).
const TARGET: &str = "tacit::request";

/// Routes polled by probes and scrapers: logged at debug, so a health check every few
/// seconds does not bury the requests that matter.
const QUIET_ROUTES: &[&str] = &["/healthz", "/readyz", "/metrics"];

/// A stream's filter counters, set by its worker when the session finishes.
#[derive(Debug, Clone, Default)]
pub(crate) struct StreamStats(Arc<OnceLock<RunStats>>);

impl StreamStats {
    /// Record the finished session's counters (only the first call counts).
    pub(crate) fn set(&self, stats: RunStats) {
        let _ = self.0.set(stats);
    }
}

/// What the line says, gathered before the request runs.
pub(super) struct RequestLine {
    pub(super) method: Method,
    pub(super) route: Option<MatchedPath>,
    pub(super) request_id: Option<HeaderValue>,
    pub(super) start: Instant,
}

impl RequestLine {
    /// Write the line now, or for a stream, when its body ends.
    pub(super) fn finish(self, res: Response) -> Response {
        let status = res.status().as_u16();
        if let Some(slot) = res.extensions().get::<StreamStats>().cloned() {
            let (parts, body) = res.into_parts();
            let pending = Pending {
                line: Some(self),
                status,
                slot,
            };
            // The guard travels with the body: when the stream ends, or is dropped
            // because the client went away, its drop writes the line.
            let body = futures_util::stream::unfold(
                (body.into_data_stream(), pending),
                |(mut s, p)| async move { s.next().await.map(|item| (item, (s, p))) },
            );
            return Response::from_parts(parts, Body::from_stream(body));
        }
        let stats = res.extensions().get::<RunStats>().copied();
        self.emit(status, stats);
        res
    }

    fn emit(self, status: u16, stats: Option<RunStats>) {
        let route = self.route.as_ref().map_or("unmatched", MatchedPath::as_str);
        let request_id = self
            .request_id
            .as_ref()
            .and_then(|v| v.to_str().ok())
            .unwrap_or("");
        // Milliseconds to the microsecond: finer is noise, coarser hides single steps.
        let duration_ms = self.start.elapsed().as_micros() as f64 / 1000.0;
        let stats = stats.filter(|s| !s.filter.is_empty());
        let lines = stats.map(|s| s.steps);
        let filter = stats.map(|s| display(s.filter));
        // `parent: None`: the fields say everything, and outside the request's span the
        // text line does not repeat its method and id in a prefix.
        if QUIET_ROUTES.contains(&route) {
            tracing::debug!(target: TARGET, parent: None, method = %crate::http::metrics::method_label(&self.method), route = %route,
                status, duration_ms, request_id = %request_id, lines, filter, "request finished");
        } else {
            tracing::info!(target: TARGET, parent: None, method = %crate::http::metrics::method_label(&self.method), route = %route,
                status, duration_ms, request_id = %request_id, lines, filter, "request finished");
        }
    }
}

/// A stream's line, written when dropped.
struct Pending {
    line: Option<RequestLine>,
    status: u16,
    slot: StreamStats,
}

impl Drop for Pending {
    fn drop(&mut self) {
        if let Some(line) = self.line.take() {
            line.emit(self.status, self.slot.0.get().copied());
        }
    }
}
