//! A small fixed set of compute threads for small jobs (a single-step estimate, a check).
//!
//! `spawn_blocking` costs a lock on the shared pool, a thread wake-up and, under many
//! concurrent requests, a crowd of pool threads taking turns on two cores; for a job of
//! some tens of microseconds that hand-off costs about as much as the work. The lane's
//! threads take job after job from one queue without sleeping while there is work, so
//! under load most small jobs start without any wake-up at all.
//!
//! Small bodies do not make for bounded work (a stiff model can keep the integrator busy
//! until the deadline), so the lane must not let one slow job hold the others up: when
//! every lane thread has been on its current job longer than [`STUCK_AFTER`], new jobs go
//! to `spawn_blocking` as before. Work never runs on the async executor either way.

use std::panic::{catch_unwind, AssertUnwindSafe};
use std::sync::atomic::{AtomicU64, Ordering};
use std::sync::mpsc;
use std::sync::{Arc, Mutex};
use std::time::{Duration, Instant};

/// A job is sent to the lane only if its request body is at most this many bytes.
pub(super) const SMALL_BODY: usize = 64 * 1024;

/// A lane thread on one job for longer than this counts as stuck.
pub(super) const STUCK_AFTER: Duration = Duration::from_millis(5);

type Task = Box<dyn FnOnce() + Send + 'static>;

/// What a lane job hands back: its value, or the text of its panic.
pub(super) type Outcome<T> = Result<T, Box<dyn std::any::Any + Send + 'static>>;

/// The lane: a queue and the threads that drain it. Dropping it (with the app state)
/// closes the queue, and the threads end once they have run what was queued.
pub struct Lane {
    tx: mpsc::Sender<Task>,
    started: usize,
    /// Per thread: when its current job started, as microseconds since `epoch` plus one;
    /// 0 while idle.
    busy: Arc<Vec<AtomicU64>>,
    epoch: Instant,
}

impl Lane {
    /// A lane of `threads` threads (at least one).
    pub fn new(threads: usize) -> Self {
        let (tx, rx) = mpsc::channel::<Task>();
        let rx = Arc::new(Mutex::new(rx));
        let epoch = Instant::now();
        let busy: Arc<Vec<AtomicU64>> =
            Arc::new((0..threads.max(1)).map(|_| AtomicU64::new(0)).collect());
        let mut started = 0;
        for i in 0..busy.len() {
            let rx = rx.clone();
            let busy = busy.clone();
            let spawned = std::thread::Builder::new()
                .name(format!("tacit-lane-{i}"))
                .spawn(move || loop {
                    // The lock is held only while waiting for the next task; a poisoned
                    // lock cannot happen (tasks run outside it) but is not fatal either.
                    let next = match rx.lock() {
                        Ok(r) => r.recv(),
                        Err(p) => p.into_inner().recv(),
                    };
                    let Ok(task) = next else { return };
                    busy[i].store(micros(epoch) + 1, Ordering::Relaxed);
                    task();
                    busy[i].store(0, Ordering::Relaxed);
                });
            match spawned {
                Ok(_) => started += 1,
                Err(e) => tracing::warn!(error = %e, "could not start a lane thread"),
            }
        }
        Self {
            tx,
            started,
            busy,
            epoch,
        }
    }

    /// Whether a job sent now would start soon: some lane thread is running, and not every
    /// one has been on its current job for longer than [`STUCK_AFTER`].
    pub fn open(&self) -> bool {
        self.started > 0 && !self.stuck()
    }

    fn stuck(&self) -> bool {
        let now = micros(self.epoch);
        let limit = STUCK_AFTER.as_micros() as u64;
        self.busy.iter().all(|b| {
            let since = b.load(Ordering::Relaxed);
            since != 0 && now.saturating_sub(since - 1) > limit
        })
    }

    /// Run `f` on a lane thread and wait for it without blocking the executor. `None` if
    /// the task was lost, which does not happen while the lane is alive: every task is run
    /// (a panic is caught and handed back) before the threads end.
    pub async fn run<T, F>(&self, f: F) -> Option<Outcome<T>>
    where
        T: Send + 'static,
        F: FnOnce() -> T + Send + 'static,
    {
        let (done_tx, done_rx) = tokio::sync::oneshot::channel();
        let task: Task = Box::new(move || {
            let _ = done_tx.send(catch_unwind(AssertUnwindSafe(f)));
        });
        self.tx.send(task).ok()?;
        done_rx.await.ok()
    }
}

fn micros(epoch: Instant) -> u64 {
    epoch.elapsed().as_micros() as u64
}

#[cfg(test)]
mod tests {
    use super::*;

    #[tokio::test]
    async fn a_job_runs_and_hands_back_its_value_or_its_panic() {
        // One thread, so the job after the panic runs on the thread that caught it.
        let lane = Lane::new(1);
        assert!(lane.open());
        let v = lane.run(|| 6 * 7).await;
        assert!(matches!(v, Some(Ok(42))));
        let p = lane.run(|| -> u32 { panic!("boom") }).await;
        let Some(Err(payload)) = p else {
            panic!("the panic was not handed back")
        };
        assert_eq!(payload.downcast_ref::<&str>(), Some(&"boom"));
        // A caught panic does not cost the lane a thread.
        assert!(matches!(lane.run(|| 1).await, Some(Ok(1))));
    }

    #[tokio::test]
    async fn the_lane_closes_while_every_thread_is_on_a_slow_job() {
        let lane = Arc::new(Lane::new(1));
        let (go_tx, go_rx) = std::sync::mpsc::channel::<()>();
        let l = lane.clone();
        let slow = tokio::spawn(async move {
            l.run(move || {
                let _ = go_rx.recv();
            })
            .await
        });
        // Wait until the job has been running for longer than STUCK_AFTER.
        let t0 = Instant::now();
        while lane.open() {
            assert!(t0.elapsed() < Duration::from_secs(10), "never closed");
            tokio::time::sleep(Duration::from_millis(1)).await;
        }
        go_tx.send(()).unwrap();
        assert!(matches!(slow.await.unwrap(), Some(Ok(()))));
        // Open again once the thread is free (it marks itself idle just after answering).
        let t0 = Instant::now();
        while !lane.open() {
            assert!(t0.elapsed() < Duration::from_secs(10), "never reopened");
            tokio::time::sleep(Duration::from_millis(1)).await;
        }
    }
}
