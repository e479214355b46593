//! Adaptive Dormand–Prince 5(4) integration with a preallocated workspace.

// INTERFACE (skeleton): the implementation replaces the bodies below.

/// Why an integration stopped early.
#[derive(Debug, Clone, PartialEq)]
pub enum OdeError {
    /// The right-hand side produced a non-finite value at time `t`.
    NonFinite {
        /// Time of the failed evaluation.
        t: f64,
    },
    /// The step size fell below what floating point can resolve at time `t`.
    StepTooSmall {
        /// Time where the step collapsed.
        t: f64,
    },
    /// More than the allowed number of steps were needed.
    TooManySteps {
        /// Time reached.
        t: f64,
    },
}

/// Counters of one integration.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq)]
pub struct OdeStats {
    /// Accepted steps.
    pub accepted: usize,
    /// Rejected steps.
    pub rejected: usize,
    /// Right-hand-side evaluations.
    pub evaluations: usize,
}

/// Dormand–Prince 5(4) integrator for systems of a fixed dimension.
#[derive(Debug, Clone)]
pub struct Dopri5 {
    dim: usize,
    /// Relative tolerance (default 1e-6).
    pub rtol: f64,
    /// Absolute tolerance (default 1e-9).
    pub atol: f64,
    /// Largest step allowed (`f64::INFINITY` for none).
    pub max_step: f64,
    /// Most steps in one call before giving up.
    pub max_steps: usize,
}

impl Dopri5 {
    /// Workspace for systems of dimension `dim`.
    pub fn new(dim: usize) -> Self {
        Self {
            dim,
            rtol: 1e-6,
            atol: 1e-9,
            max_step: f64::INFINITY,
            max_steps: 1_000_000,
        }
    }

    /// Integrate `y' = f(t, y)` from `t0` to `t1` (`t1 >= t0`), updating `y` in place.
    /// `f(t, y, dy)` must fill `dy`; a non-finite `dy` ends the integration.
    pub fn integrate<F>(
        &mut self,
        f: F,
        t0: f64,
        t1: f64,
        y: &mut [f64],
    ) -> Result<OdeStats, OdeError>
    where
        F: FnMut(f64, &[f64], &mut [f64]),
    {
        let _ = (f, t0, t1, y, self.dim);
        todo!()
    }
}
