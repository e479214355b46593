//! What every handler shares: the configuration, the job slots, the metrics and the
//! readiness flag. Cheap to clone (one `Arc`); nothing here remembers a request.

use super::config::ServerConfig;
use super::keys::ApiKeys;
use super::lane::Lane;
use super::metrics::Metrics;
use crate::config::Limits;
use std::collections::BTreeMap;
use std::sync::atomic::{AtomicBool, AtomicU64, Ordering};
use std::sync::{Arc, Mutex};
use std::time::Instant;
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
    /// `true` once a shutdown has begun; streams waiting for input watch it.
    draining: tokio::sync::watch::Sender<bool>,
    lane: Lane,
    running: Arc<Running>,
}

/// The jobs holding a slot, so a shutdown that gives up on them can name them.
#[derive(Default)]
struct Running {
    next: AtomicU64,
    jobs: Mutex<BTreeMap<u64, (String, Instant)>>,
}

/// A job slot: while held, one job runs under the concurrency limit; dropping it frees
/// the slot and forgets the job.
pub struct JobSlot {
    _permit: OwnedSemaphorePermit,
    running: Arc<Running>,
    key: u64,
    arrived: std::time::Instant,
}

impl JobSlot {
    /// When the request took its slot (before its body was read): the compute deadline
    /// counts from here.
    pub fn arrived(&self) -> std::time::Instant {
        self.arrived
    }
}

impl Drop for JobSlot {
    fn drop(&mut self) {
        let mut jobs = self.running.jobs.lock().unwrap_or_else(|p| p.into_inner());
        jobs.remove(&self.key);
    }
}

impl std::fmt::Debug for JobSlot {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("JobSlot").field("key", &self.key).finish()
    }
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
                draining: tokio::sync::watch::Sender::new(false),
                lane: Lane::new(lane_threads()),
                running: Arc::new(Running::default()),
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
    /// None too once a shutdown has begun: a draining server takes no new work.
    pub fn try_slot(&self) -> Option<OwnedSemaphorePermit> {
        if !self.is_ready() {
            return None;
        }
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

    /// [`AppState::try_slot`], remembering the job as `what` (route and request id)
    /// until the slot is dropped.
    pub fn try_job_slot(&self, what: String) -> Option<JobSlot> {
        let permit = self.try_slot()?;
        let running = self.inner.running.clone();
        let key = running.next.fetch_add(1, Ordering::Relaxed);
        let mut jobs = running.jobs.lock().unwrap_or_else(|p| p.into_inner());
        jobs.insert(key, (what, Instant::now()));
        drop(jobs);
        Some(JobSlot {
            _permit: permit,
            running,
            key,
            arrived: std::time::Instant::now(),
        })
    }

    /// Jobs holding a slot now (the stream's included), whether named or not.
    pub fn jobs_running(&self) -> usize {
        self.inner.config.limits.max_concurrency - self.inner.slots.available_permits()
    }

    /// The named jobs still running, each as `what (running N s)`, oldest first.
    pub fn running_jobs(&self) -> Vec<String> {
        let jobs = self
            .inner
            .running
            .jobs
            .lock()
            .unwrap_or_else(|p| p.into_inner());
        jobs.values()
            .map(|(what, since)| format!("{what} (running {:.1} s)", since.elapsed().as_secs_f64()))
            .collect()
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
        self.inner.draining.send_replace(!ready);
    }

    /// A watch that turns `true` when a shutdown begins (readiness flipped off): a stream
    /// waiting for its next line ends then with its last good posterior.
    pub fn draining(&self) -> tokio::sync::watch::Receiver<bool> {
        self.inner.draining.subscribe()
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
