//! Prometheus metrics of one app: requests by route and status, request durations, filter
//! steps by filter (label `filter`: `method` is the HTTP method on the http series),
//! rejected readings, shed requests.
//!
//! Each app owns its recorder and records through `metrics::with_local_recorder`, so
//! several apps in one process (the integration tests start many) never fight over the
//! process-wide recorder, and each `/metrics` shows only its own app. The timing of each
//! request is [`super::middleware::metrics`].

use crate::job::RunStats;
use axum::http::Method;
use metrics::{Counter, Histogram};
use metrics_exporter_prometheus::{PrometheusBuilder, PrometheusHandle, PrometheusRecorder};
use std::collections::HashMap;
use std::sync::{Arc, Mutex};

/// Bucket bounds of the duration histogram, seconds: from sub-millisecond single steps to
/// the default one-minute deadline.
const DURATION_BUCKETS: &[f64] = &[
    0.0005, 0.001, 0.0025, 0.005, 0.01, 0.025, 0.05, 0.1, 0.25, 0.5, 1.0, 2.5, 5.0, 10.0, 30.0,
    60.0,
];

/// One app's recorder and the handle that renders it.
#[derive(Clone)]
pub struct Metrics {
    recorder: Arc<PrometheusRecorder>,
    handle: PrometheusHandle,
    /// Handles of the per-request series, registered on first use: registering builds the
    /// labels and looks the series up each time, which cost more than the increment.
    requests: Arc<Mutex<HashMap<String, Vec<RequestSeries>>>>,
    runs: Arc<Mutex<Vec<RunSeries>>>,
}

/// The `method` label of a request: the nine methods of RFC 9110 §9 and RFC 5789 by
/// name, every other method `other`. Method names are whatever a client sends (any
/// token, up to the header limit), so taking them as label values would let anyone,
/// without a key, add series without bound (issue 15: 1,000 random 60 KB methods grew the
/// process from 6 to 195 MB and one scrape to 1.2 GB).
pub(super) fn method_label(method: &Method) -> &'static str {
    match *method {
        Method::GET => "GET",
        Method::POST => "POST",
        Method::PUT => "PUT",
        Method::DELETE => "DELETE",
        Method::HEAD => "HEAD",
        Method::OPTIONS => "OPTIONS",
        Method::PATCH => "PATCH",
        Method::CONNECT => "CONNECT",
        Method::TRACE => "TRACE",
        _ => "other",
    }
}

/// The request counter and duration histogram of one route, method and status.
struct RequestSeries {
    method: &'static str,
    status: u16,
    count: Counter,
    duration: Histogram,
}

/// The filter counters of one filter.
struct RunSeries {
    filter: &'static str,
    steps: Counter,
    updates: Counter,
    rejected: Counter,
}

impl Default for Metrics {
    fn default() -> Self {
        Self::new()
    }
}

impl Metrics {
    /// A recorder of its own, not installed globally.
    pub fn new() -> Self {
        let recorder = PrometheusBuilder::new()
            .set_buckets(DURATION_BUCKETS)
            .map(PrometheusBuilder::build_recorder)
            // The bucket list above is non-empty, so this branch is not taken; a plain
            // recorder (summaries instead of buckets) is still better than none.
            .unwrap_or_else(|_| PrometheusBuilder::new().build_recorder());
        let handle = recorder.handle();
        Self {
            recorder: Arc::new(recorder),
            handle,
            requests: Arc::default(),
            runs: Arc::default(),
        }
    }

    fn with<T>(&self, f: impl FnOnce() -> T) -> T {
        metrics::with_local_recorder(&*self.recorder, f)
    }

    /// Count one finished request and its duration.
    pub fn record_request(&self, route: &str, method: &Method, status: u16, secs: f64) {
        let mut cache = self.requests.lock().unwrap_or_else(|p| p.into_inner());
        let series = match cache.get_mut(route) {
            Some(list) => list,
            None => cache.entry(route.to_string()).or_default(),
        };
        let method = method_label(method);
        let found = series
            .iter()
            .position(|s| s.status == status && s.method == method);
        let s = match found {
            Some(i) => &series[i],
            None => {
                let (r, m) = (route.to_string(), method);
                let (count, duration) = self.with(|| {
                    (
                        metrics::counter!("tacit_http_requests_total",
                            "route" => r.clone(), "method" => m, "status" => status.to_string()),
                        metrics::histogram!("tacit_http_request_duration_seconds",
                            "route" => r, "method" => m),
                    )
                });
                series.push(RequestSeries {
                    method,
                    status,
                    count,
                    duration,
                });
                &series[series.len() - 1]
            }
        };
        s.count.increment(1);
        s.duration.record(secs);
    }

    /// Count a request refused for lack of a job slot.
    pub fn record_shed(&self, route: &str) {
        let route = route.to_string();
        self.with(|| metrics::counter!("tacit_http_shed_total", "route" => route).increment(1));
    }

    /// Add one job's filter work.
    pub fn record_run(&self, stats: &RunStats) {
        if stats.filter.is_empty() {
            return;
        }
        let m = stats.filter;
        let mut runs = self.runs.lock().unwrap_or_else(|p| p.into_inner());
        let i = match runs.iter().position(|r| r.filter == m) {
            Some(i) => i,
            None => {
                let series = self.with(|| RunSeries {
                    filter: m,
                    steps: metrics::counter!("tacit_filter_steps_total", "filter" => m),
                    updates: metrics::counter!("tacit_filter_updates_total", "filter" => m),
                    rejected: metrics::counter!("tacit_filter_rejected_readings_total", "filter" => m),
                });
                runs.push(series);
                runs.len() - 1
            }
        };
        let r = &runs[i];
        r.steps.increment(stats.steps);
        r.updates.increment(stats.updates);
        r.rejected.increment(stats.rejected);
    }

    /// Count a panic caught in a handler or a job.
    pub fn record_panic(&self) {
        self.with(|| metrics::counter!("tacit_panics_total").increment(1));
    }

    /// The Prometheus text exposition of everything recorded so far.
    pub fn render(&self) -> String {
        self.handle.render()
    }
}
