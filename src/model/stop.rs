//! When long work must give up: the request's compute deadline (a wall-clock instant fixed
//! when the request arrived) and its cancel flag (set when the client goes away).
//!
//! It lives at the bottom layer so that every loop that can run long (integrators,
//! discrete stepping, the matrix exponential's squarings, the smoother's backward pass,
//! the simulator, the model check) can look at it without knowing of jobs or HTTP. A
//! look is one relaxed atomic load and, on every `k`-th call, one read of the monotonic
//! clock; it never allocates, so the per-step loops keep their no-allocation rule.

use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::Arc;
use std::time::{Duration, Instant};

/// Why work was stopped.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Halt {
    /// The client went away (or the caller withdrew the work).
    Cancelled,
    /// The compute deadline passed.
    Deadline,
}

/// A request's deadline and cancel flag; cheap to clone (one `Arc`), shared by every
/// loop of the request.
#[derive(Debug, Clone, Default)]
pub struct Stop {
    cancel: Option<Arc<AtomicBool>>,
    deadline: Option<Instant>,
}

impl Stop {
    /// Never stops: no deadline, no cancel flag.
    pub const fn never() -> Self {
        Self {
            cancel: None,
            deadline: None,
        }
    }

    /// Stops when `cancel` is set or once `deadline` (if any) has passed.
    pub fn new(cancel: Arc<AtomicBool>, deadline: Option<Instant>) -> Self {
        Self {
            cancel: Some(cancel),
            deadline,
        }
    }

    /// Stops once `budget` (if any) has run out, counted from now; never cancelled.
    pub fn within(budget: Option<Duration>) -> Self {
        Self {
            cancel: None,
            deadline: budget.map(|b| Instant::now() + b),
        }
    }

    /// The same cancel flag with another deadline.
    pub fn with_deadline(&self, deadline: Option<Instant>) -> Self {
        Self {
            cancel: self.cancel.clone(),
            deadline,
        }
    }

    /// When the work must give up, if ever.
    pub fn deadline(&self) -> Option<Instant> {
        self.deadline
    }

    /// Whether the cancel flag is set (no clock read).
    #[inline]
    pub fn cancelled(&self) -> bool {
        self.cancel
            .as_ref()
            .is_some_and(|c| c.load(Ordering::Relaxed))
    }

    /// Why the work must stop now, if it must (reads the clock when there is a deadline).
    #[inline]
    pub fn halted(&self) -> Option<Halt> {
        if self.cancelled() {
            return Some(Halt::Cancelled);
        }
        if self.deadline.is_some_and(|d| Instant::now() >= d) {
            return Some(Halt::Deadline);
        }
        None
    }

    /// [`Stop::halted`] with the clock read only when `i` is a multiple of `every` (the
    /// cancel flag, one relaxed load, is looked at on every call): for loops whose single
    /// step is too short for a clock read each time.
    #[inline]
    pub fn every(&self, i: usize, every: usize) -> Option<Halt> {
        if self.cancelled() {
            return Some(Halt::Cancelled);
        }
        if i % every.max(1) != 0 {
            return None;
        }
        self.deadline
            .is_some_and(|d| Instant::now() >= d)
            .then_some(Halt::Deadline)
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn a_stop_halts_on_its_flag_or_its_deadline_and_never_stops_without_either() {
        assert_eq!(Stop::never().halted(), None);
        let flag = Arc::new(AtomicBool::new(false));
        let s = Stop::new(flag.clone(), None);
        assert_eq!(s.halted(), None);
        flag.store(true, Ordering::Relaxed);
        assert_eq!(s.halted(), Some(Halt::Cancelled));
        assert_eq!(
            s.every(3, 2),
            Some(Halt::Cancelled),
            "the flag on every call"
        );
        let past = Stop::new(Arc::new(AtomicBool::new(false)), Some(Instant::now()));
        assert_eq!(past.halted(), Some(Halt::Deadline));
        assert_eq!(past.every(3, 2), None, "the clock only on multiples");
        assert_eq!(past.every(4, 2), Some(Halt::Deadline));
        assert_eq!(
            Stop::within(Some(Duration::ZERO)).halted(),
            Some(Halt::Deadline)
        );
        assert_eq!(Stop::within(None).halted(), None);
    }
}
