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
#[derive(Debug, Clone, Copy, PartialEq)]
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
    /// An update moved the mean of state `state` (an index among all states, estimated
    /// parameters included; the job layer names it)
    /// by `change`, so far that rounding the move to double precision (about
    /// `f64::EPSILON · |change|`) exceeds the posterior spread `spread` it ended with: the
    /// estimate would be noise of the arithmetic ([`check_resolution`]).
    LostPrecision {
        /// Index of the state among all states.
        state: usize,
        /// The update's change of the state's mean.
        change: f64,
        /// The state's posterior standard deviation.
        spread: f64,
    },
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
            FilterError::LostPrecision {
                state,
                change,
                spread,
            } => write!(
                f,
                "the update moved state #{state} by {change:e} to a spread of {spread:e}; rounding a move that large to double precision costs about {:e}, more than the spread, so the estimate would be noise of the arithmetic (the forecast ran far from the readings: a long gap on growing dynamics, or a prior far from the readings; shorten the gap, start from a prior near the readings, or shift the state's origin)",
                f64::EPSILON * change.abs()
            ),
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

/// Refuse an update that moved the mean further than double precision can resolve at its
/// result: for each state i, `ε·|Δxᵢ| > σᵢ⁺` fails with [`FilterError::LostPrecision`],
/// where Δxᵢ is the update's change of the mean (`change(i)`), σᵢ⁺ the posterior standard
/// deviation (`variance_below(i, b)` gives the variance when it is below `b = (ε·|Δxᵢ|)²`,
/// else `None`, so a filter may stop summing as soon as the spread is clearly wide enough)
/// and ε = 2⁻⁵² the machine epsilon of IEEE 754 binary64 (common practice). Adding Δx to the forecast and forming Δx from an innovation
/// of the same size each round at about ε·|Δx| (Higham 2002, *Accuracy and Stability of
/// Numerical Algorithms*, §2.2, from memory), so past this point the mean is off by more than
/// the spread the answer states. A state the update did not move (Δxᵢ = 0) always passes, so
/// a collapsed spread alone never fails here.
pub fn check_resolution(
    n: usize,
    change: impl Fn(usize) -> f64,
    variance_below: impl Fn(usize, f64) -> Option<f64>,
) -> Result<(), FilterError> {
    for i in 0..n {
        let rounding = f64::EPSILON * change(i).abs();
        if rounding == 0.0 {
            continue;
        }
        if let Some(variance) = variance_below(i, rounding * rounding) {
            return Err(FilterError::LostPrecision {
                state: i,
                change: change(i),
                spread: variance.max(0.0).sqrt(),
            });
        }
    }
    Ok(())
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

#[cfg(test)]
mod resolution_tests {
    use super::*;

    #[test]
    fn a_move_is_refused_exactly_when_its_rounding_exceeds_the_spread() {
        // ε = 2⁻⁵² (IEEE 754 binary64, common practice): a move of 2⁵³ rounds at about 2,
        // a move of 2⁵¹ at about 0.5, against a posterior spread of 1.
        let var = |v: f64| move |_: usize, b: f64| (v < b).then_some(v);
        assert_eq!(f64::EPSILON, 2f64.powi(-52));
        let e = check_resolution(1, |_| -(2f64.powi(53)), var(1.0)).unwrap_err();
        assert_eq!(
            e,
            FilterError::LostPrecision {
                state: 0,
                change: -(2f64.powi(53)),
                spread: 1.0
            }
        );
        assert!(check_resolution(1, |_| 2f64.powi(51), var(1.0)).is_ok());
        // A state the update did not move passes whatever its spread (a collapsed spread
        // is a warning elsewhere, not a refusal); a moved state with no spread fails.
        assert!(check_resolution(1, |_| 0.0, var(0.0)).is_ok());
        assert!(check_resolution(1, |_| 1.0, var(0.0)).is_err());
        // The first offending state is named.
        let moves = [0.0, 1.0, 2f64.powi(60)];
        let e = check_resolution(3, |i| moves[i], var(1.0)).unwrap_err();
        assert!(matches!(e, FilterError::LostPrecision { state: 2, .. }));
    }
}
