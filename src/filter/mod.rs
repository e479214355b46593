//! The filters: extended, unscented and ensemble Kalman filters behind one [`Estimator`]
//! trait, with their shared propagation ([`predict`]), update machinery ([`observe`]),
//! what every filter holds ([`shared`]), the run loop ([`run`]) and the RTS smoother
//! ([`smoother`]); their dense kernels live in [`crate::linalg`].

pub mod bounds;
pub mod ekf;
pub mod enkf;
pub mod observe;
pub mod predict;
pub mod run;
pub mod shared;
pub mod smoother;
#[cfg(test)]
mod test_fixtures;
pub mod ukf;

use crate::linalg::all_finite;
use crate::model::Model;
use crate::model::Reading;
use nalgebra::{DMatrix, DVector};
use observe::ObsSpace;
use shared::FilterCore;

/// Why a filter step could not go on. The run loop adds the step and time.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
#[non_exhaustive]
pub enum FilterError {
    /// A non-finite value appeared in the named quantity.
    NonFinite(&'static str),
    /// A non-finite value appeared in the named quantity of one sensor (its index in the
    /// model; the job layer, which has the model, names it: `job::failure`).
    SensorNonFinite {
        /// Index of the sensor in the model.
        sensor: usize,
        /// What turned non-finite (its Jacobian, its predicted reading, …).
        what: &'static str,
    },
    /// A non-finite value appeared while integrating the rate formula of model state
    /// `state` (an index; the job layer names it).
    RateNonFinite {
        /// Index of the state among the model's states.
        state: usize,
    },
    /// The named covariance lost positive (semi-)definiteness.
    NotPositive(&'static str),
    /// The integrator gave up, for the stated reason.
    Integration(&'static str),
    /// The request's compute deadline passed (or its client went away) inside one
    /// prediction.
    Deadline,
}

impl std::fmt::Display for FilterError {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        match self {
            FilterError::NonFinite(what) => write!(f, "a non-finite value appeared in the {what}"),
            FilterError::RateNonFinite { state } => write!(
                f,
                "a non-finite value appeared in the rate of state #{state} during integration"
            ),
            FilterError::SensorNonFinite { sensor, what } => write!(
                f,
                "a non-finite value appeared in the {what} of sensor number {sensor} (from 0)"
            ),
            FilterError::NotPositive(what) => {
                write!(f, "the {what} is no longer positive definite")
            }
            FilterError::Integration(why) => write!(f, "integration failed: {why}"),
            FilterError::Deadline => write!(f, "the compute deadline passed during a prediction"),
        }
    }
}

/// `Ok` when every entry of `a` and `b` is finite, else `NonFinite(what)`: the check that
/// keeps NaN and infinities out of every answer.
pub fn ensure_finite(a: &[f64], b: &[f64], what: &'static str) -> Result<(), FilterError> {
    if all_finite(a) && all_finite(b) {
        Ok(())
    } else {
        Err(FilterError::NonFinite(what))
    }
}

/// One filter's belief and its two steps. Implementations preallocate everything in their
/// constructor: `predict` and `update` allocate nothing.
pub trait Estimator: Send {
    /// Propagate over `dt > 0` from time `t0` with held inputs `u`. With `keep_cross`, the
    /// cross covariance between the previous and the predicted state is kept (for smoothing).
    fn predict(
        &mut self,
        model: &Model,
        u: &[f64],
        t0: f64,
        dt: f64,
        keep_cross: bool,
    ) -> Result<(), FilterError>;

    /// Update with the sensors present on `reading` (its time is `t`), judging each against
    /// `gate` (per-sensor NIS thresholds). Returns whether any reading was used.
    fn update(
        &mut self,
        model: &Model,
        reading: &Reading,
        u: &[f64],
        t: f64,
        gate: Option<&[f64]>,
    ) -> Result<bool, FilterError>;

    /// The belief, update buffers and propagator the filter holds.
    fn core(&self) -> &FilterCore;

    /// [`Estimator::core`], to change.
    fn core_mut(&mut self) -> &mut FilterCore;

    /// The update buffers of the last update (innovations, NIS, acceptance).
    fn obs(&self) -> &ObsSpace {
        &self.core().obs
    }

    /// Current mean over all states.
    fn mean(&self) -> &DVector<f64> {
        &self.core().mean
    }

    /// Current covariance over all states.
    fn covariance(&self) -> &DMatrix<f64> {
        &self.core().cov
    }

    /// Cov(x_prev, x_pred) of the last prediction (valid after `predict(.., true)`).
    fn cross(&self) -> &DMatrix<f64> {
        &self.core().cross
    }

    /// Ensemble members (rows), for the ensemble filter.
    fn members(&self) -> Option<&DMatrix<f64>> {
        None
    }

    /// Bring the covariance up to date after `predict` or `update`. Filters that derive it
    /// from something else (the ensemble's members) may defer that work until a step is
    /// done; [`crate::filter::run::Run`] calls this before anything reads the covariance.
    fn settle(&mut self) {}

    /// Give up any prediction still running when `stop` fires (deadline passed or client
    /// gone) with [`FilterError::Deadline`], so one long gap cannot outlast the request.
    fn set_stop(&mut self, stop: &crate::model::Stop) {
        self.core_mut().pred.set_stop(stop);
    }

    /// Put the states `states` back to the spread `variances[i]` (indexed by state), with
    /// their correlations to every other state dropped (`filter.reacquire`).
    fn reset_spread(&mut self, states: &[usize], variances: &[f64]) {
        let cov = &mut self.core_mut().cov;
        for &i in states {
            cov.row_mut(i).fill(0.0);
            cov.column_mut(i).fill(0.0);
            cov[(i, i)] = variances[i];
        }
    }

    /// Note that one more measurement line was processed (random streams derive from it).
    fn advance_step(&mut self) {}

    /// The step counter carried in the posterior.
    fn step(&self) -> u64 {
        0
    }

    /// A copy for side predictions (`output.at`), which must not disturb the main run.
    fn clone_box(&self) -> Box<dyn Estimator>;
}
