//! What every handler shares: the configuration, the job slots, the metrics and the
//! readiness flag. Cheap to clone (one `Arc`); nothing here remembers a request.

use super::config::ServerConfig;
use super::keys::ApiKeys;
use super::lane::Lane;
use super::metrics::Metrics;
use crate::config::Limits;
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::Arc;
use tokio::sync::{OwnedSemaphorePermit, Semaphore};

/// Shared state of one app; several apps may live in one process (tests do).
#[derive(Clone)]
pub struct AppState {
    inner: Arc<Inner>,
}

struct Inner {
    config: ServerConfig,
    keys: ApiKeys,
    slots: Arc<Semaphore>,
    metrics: Metrics,
    ready: AtomicBool,
    lane: Lane,
}

impl AppState {
    /// A fresh state: ready, all job slots free, metrics at zero.
    pub fn new(config: ServerConfig) -> Self {
        let keys = ApiKeys::new(config.api_keys.iter().cloned());
        let slots = Arc::new(Semaphore::new(config.limits.max_concurrency));
        Self {
            inner: Arc::new(Inner {
                keys,
                slots,
                metrics: Metrics::new(),
                ready: AtomicBool::new(true),
                lane: Lane::new(lane_threads()),
                config,
            }),
        }
    }

    /// The server's configuration.
    pub fn config(&self) -> &ServerConfig {
        &self.inner.config
    }

    /// The limits passed to every job.
    pub fn limits(&self) -> &Limits {
        &self.inner.config.limits
    }

    /// The accepted API keys.
    pub fn keys(&self) -> &ApiKeys {
        &self.inner.keys
    }

    /// This app's metrics.
    pub fn metrics(&self) -> &Metrics {
        &self.inner.metrics
    }

    /// A job slot if one is free now; `None` means the caller sheds the request with 503
    /// rather than queue it (a queue would only grow under sustained overload).
    pub fn try_slot(&self) -> Option<OwnedSemaphorePermit> {
        self.inner.slots.clone().try_acquire_owned().ok()
    }

    /// Whether every job slot is taken now (a request that would need one is shed).
    pub fn is_full(&self) -> bool {
        self.inner.slots.available_permits() == 0
    }

    /// A job slot, waiting for one to come free: for work already promised an answer
    /// (a stream whose 200 head has gone), which cannot be shed any more.
    /// `None` only if the slots were closed, which they never are.
    pub async fn slot(&self) -> Option<OwnedSemaphorePermit> {
        self.inner.slots.clone().acquire_owned().await.ok()
    }

    /// The compute threads for small jobs.
    pub fn lane(&self) -> &Lane {
        &self.inner.lane
    }

    /// Whether the server takes new work (`/readyz`).
    pub fn is_ready(&self) -> bool {
        self.inner.ready.load(Ordering::Relaxed)
    }

    /// Flip readiness; called once a shutdown signal arrives.
    pub fn set_ready(&self, ready: bool) {
        self.inner.ready.store(ready, Ordering::Relaxed);
    }
}

/// One lane thread per core: more would only take turns on the same cores.
fn lane_threads() -> usize {
    std::thread::available_parallelism().map_or(2, usize::from)
}

impl std::fmt::Debug for AppState {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("AppState")
            .field("limits", self.limits())
            .field("api_keys", &self.inner.keys.len())
            .field("ready", &self.is_ready())
            .finish()
    }
}
