//! The run loop shared by every endpoint that filters: one step per measurement line.
//!
//! For each line: refuse a time going backwards; predict from the previous time with the
//! inputs held since then (no prediction for an equal time); apply the line's inputs (they
//! act from this time on, zero-order hold); update jointly with every sensor present,
//! gating each reading on its own NIS; count what happened.

use crate::diagnostics::warnings::{WarningKind, Warnings};
use crate::diagnostics::{chi2, nis::NisTally};
use crate::filter::bounds::{BoundsKeeper, BoundsTally};
use crate::filter::ekf::Ekf;
use crate::filter::enkf::Enkf;
use crate::filter::ukf::Ukf;
use crate::filter::{Estimator, FilterError};
use crate::model::Reading;
use crate::model::{Dynamics, FilterConfig, LinearTime, Method, Model, Prior, ProcessNoise};
use crate::model::{Instant, TimeMode};
use nalgebra::{DMatrix, DVector};
use std::sync::Arc;

/// Counters of a run so far.
#[derive(Debug, Clone, Copy, Default, PartialEq)]
pub struct Counts {
    /// Lines processed.
    pub steps: u64,
    /// Lines whose update used at least one reading.
    pub updates: u64,
    /// Readings refused by the gate.
    pub rejected: u64,
    /// NIS of the accepted readings.
    pub nis: NisTally,
    /// What the parameters' bounds did (`summary.bounds`).
    pub bounds: BoundsTally,
}

/// What one step did (for the smoother).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct StepDone {
    /// Whether time advanced (a prediction ran).
    pub predicted: bool,
    /// Whether any reading updated the state.
    pub updated: bool,
}

/// A filter run in progress.
pub struct Run {
    model: Arc<Model>,
    cfg: FilterConfig,
    mode: TimeMode,
    est: Box<dyn Estimator>,
    t: Instant,
    origin: Instant,
    inputs: DVector<f64>,
    thresholds: Option<Vec<f64>>,
    keep_cross: bool,
    bounds: BoundsKeeper,
    /// Counters.
    pub counts: Counts,
    /// What the run noticed (`summary.warnings`).
    pub warnings: Warnings,
}

/// Why a run could not start or go on, with everything its message needs. The job layer
/// turns it into the answer's problem document (`job::failure`); the filter layer knows
/// nothing of HTTP.
#[derive(Debug, Clone, PartialEq)]
#[non_exhaustive]
pub enum RunError {
    /// The unscented filter's settings (`/filter/unscented`) cannot be used, for the stated
    /// reason.
    Unscented(String),
    /// The ensemble could not be drawn from the prior (`/prior`).
    Ensemble(FilterError),
    /// A line's time comes before the time already reached.
    TimeDecreasing {
        /// JSON Pointer of the line (its `/t` is at fault), relative to the caller's base.
        pointer: String,
        /// The line's time, as the request writes times.
        at: String,
        /// The time already reached.
        current: String,
    },
    /// A line's time is not a whole number of steps of a discrete model after the prior.
    OffGrid {
        /// JSON Pointer of the line (its `/t` is at fault), relative to the caller's base.
        pointer: String,
        /// The line's time, as the request writes times.
        at: String,
        /// The model's step.
        dt: f64,
    },
    /// A filter step failed on line `line` (counted from 1) at time `at`.
    Step {
        /// Line number, counted from 1.
        line: u64,
        /// The line's time, as the request writes times.
        at: String,
        /// What went wrong ([`FilterError::Deadline`] when the compute budget ran out).
        cause: FilterError,
    },
}

impl std::fmt::Display for RunError {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        match self {
            RunError::Unscented(why) => f.write_str(why),
            RunError::Ensemble(e) => write!(f, "cannot draw the ensemble: {e}"),
            RunError::TimeDecreasing { at, current, .. } => {
                write!(f, "times must not decrease: {at} comes after {current}")
            }
            RunError::OffGrid { at, dt, .. } => write!(
                f,
                "time {at} is not on the model's grid prior.t + k·{dt} (the discrete model steps by dt)"
            ),
            RunError::Step {
                line,
                at,
                cause: FilterError::Deadline,
            } => write!(
                f,
                "the request needed more than the compute deadline; it stopped inside the prediction to line {line} (t = {at})"
            ),
            RunError::Step { line, at, cause } => {
                write!(f, "the filter stopped at step {line} (t = {at}): {cause}")
            }
        }
    }
}

impl std::error::Error for RunError {}

/// Whether any model state (estimated parameters aside: a constant parameter is the usual
/// case) has process noise.
fn has_process_noise(model: &Model) -> bool {
    let nm = model.n_model;
    let q = match &model.noise {
        ProcessNoise::Density(q) => q,
        ProcessNoise::PerStep { q, .. } => q,
    };
    (0..nm).any(|i| (0..nm).any(|j| q[(i, j)] != 0.0))
}

/// Time of a failing step in messages.
fn fmt_time(t: &Instant, mode: TimeMode) -> String {
    match mode {
        TimeMode::Seconds => format!("{}", t.secs),
        TimeMode::Stamp => t.to_rfc3339(),
    }
}

impl Run {
    /// Start from `prior`. `keep_cross` keeps what the smoother needs.
    pub fn new(
        model: Arc<Model>,
        cfg: FilterConfig,
        prior: Prior,
        keep_cross: bool,
    ) -> Result<Self, RunError> {
        let est: Box<dyn Estimator> = match cfg.method {
            Method::Ekf => Box::new(Ekf::new(&model, cfg.integration, prior.mean, prior.cov)),
            Method::Ukf => Box::new(
                Ukf::new(
                    &model,
                    cfg.integration,
                    &cfg.unscented,
                    prior.mean,
                    prior.cov,
                )
                .map_err(RunError::Unscented)?,
            ),
            Method::Enkf => Box::new(
                Enkf::new(
                    &model,
                    cfg.integration,
                    cfg.ensemble,
                    &prior.mean,
                    &prior.cov,
                    prior.members,
                    prior.step,
                )
                .map_err(RunError::Ensemble)?,
            ),
        };
        let thresholds = cfg.gate.map(|p| {
            model
                .sensors
                .iter()
                .map(|s| chi2::quantile(p, s.dim as f64))
                .collect()
        });
        let bounds = BoundsKeeper::new(&model, cfg.method == Method::Enkf);
        let counts = Counts {
            bounds: bounds.tally(),
            ..Counts::default()
        };
        let mut warnings = Warnings::default();
        if !has_process_noise(&model) {
            warnings.note(WarningKind::NoProcessNoise, None, None, prior.t, || {
                "the model has no process noise on its states, so the filter trusts the dynamics without limit and its spread can only shrink; add process_noise unless the dynamics are exact".into()
            });
        }
        Ok(Self {
            model,
            cfg,
            mode: prior.mode,
            est,
            t: prior.t,
            origin: prior.t,
            inputs: prior.inputs,
            thresholds,
            keep_cross,
            bounds,
            counts,
            warnings,
        })
    }

    /// The run's warnings as the summary reports them: those noticed on the way, plus
    /// `no_updates` when no reading updated the filter.
    pub fn final_warnings(&self) -> Warnings {
        let mut w = self.warnings.clone();
        if self.counts.updates == 0 {
            let (steps, rejected) = (self.counts.steps, self.counts.rejected);
            w.note(WarningKind::NoUpdates, None, None, self.t, || {
                format!("no reading updated the filter ({steps} lines, {rejected} readings refused): the estimates are predictions from the prior alone")
            });
        }
        w
    }

    /// The filter.
    pub fn estimator(&self) -> &dyn Estimator {
        self.est.as_ref()
    }

    /// Time of the current belief.
    pub fn time(&self) -> Instant {
        self.t
    }

    /// Inputs currently held.
    pub fn inputs(&self) -> &DVector<f64> {
        &self.inputs
    }

    /// The model.
    pub fn model(&self) -> &Model {
        &self.model
    }

    /// The filter settings.
    pub fn config(&self) -> &FilterConfig {
        &self.cfg
    }

    /// Check that `t` lies on the grid of a discrete linear model.
    fn check_grid(&self, t: &Instant, pointer: &str) -> Result<(), RunError> {
        if let Dynamics::Linear {
            time: LinearTime::Discrete { dt },
            ..
        } = &self.model.dynamics
        {
            let k = self.origin.until(t, self.mode) / dt;
            if (k - crate::linalg::round_half_away(k)).abs() > 1e-6 {
                return Err(RunError::OffGrid {
                    pointer: pointer.to_string(),
                    at: fmt_time(t, self.mode),
                    dt: *dt,
                });
            }
        }
        Ok(())
    }

    /// Stop a prediction that is still integrating after `deadline` (the request's
    /// compute budget); the step then fails with a deadline problem.
    pub fn set_deadline(&mut self, deadline: Option<std::time::Instant>) {
        self.est.set_deadline(deadline);
    }

    /// The error of a step that failed with `cause` on the line at `t` (the next line).
    fn failure(&self, cause: FilterError, t: &Instant) -> RunError {
        RunError::Step {
            line: self.counts.steps + 1,
            at: fmt_time(t, self.mode),
            cause,
        }
    }

    /// Apply one measurement line; `pointer` locates it in the request for errors.
    pub fn step(&mut self, r: &Reading, pointer: &str) -> Result<StepDone, RunError> {
        self.step_capturing(r, pointer, None)
    }

    /// Whether times are seconds or timestamps.
    pub fn mode(&self) -> TimeMode {
        self.mode
    }

    /// Like [`Run::step`], also handing out the predicted mean and covariance (before the
    /// update) when a prediction ran; the smoother needs them.
    pub fn step_capturing(
        &mut self,
        r: &Reading,
        pointer: &str,
        capture: Option<&mut Option<(DVector<f64>, DMatrix<f64>)>>,
    ) -> Result<StepDone, RunError> {
        if self.t.is_after(&r.t, self.mode) {
            return Err(RunError::TimeDecreasing {
                pointer: pointer.to_string(),
                at: fmt_time(&r.t, self.mode),
                current: fmt_time(&self.t, self.mode),
            });
        }
        self.check_grid(&r.t, pointer)?;
        let dt = self.t.until(&r.t, self.mode);
        let predicted = dt > 0.0;
        if predicted {
            self.est
                .predict(
                    &self.model,
                    self.inputs.as_slice(),
                    self.t.secs,
                    dt,
                    self.keep_cross,
                )
                .map_err(|e| self.failure(e, &r.t))?;
        }
        if let (Some(c), true) = (capture, predicted) {
            self.est.settle();
            *c = Some((self.est.mean().clone(), self.est.covariance().clone()));
        }
        self.t = r.t;
        for &(i, v) in &r.inputs {
            self.inputs[i] = v;
        }
        let mut updated = false;
        if !r.sensors.is_empty() {
            updated = self
                .est
                .update(
                    &self.model,
                    r,
                    self.inputs.as_slice(),
                    r.t.secs,
                    self.thresholds.as_deref(),
                )
                .map_err(|e| self.failure(e, &r.t))?;
            let obs = self.est.obs();
            self.counts.rejected += obs.checks.iter().filter(|c| !c.accepted).count() as u64;
            if updated {
                self.counts.updates += 1;
                self.counts.nis.add(obs.joint_nis, obs.ma);
            }
        }
        self.est.settle();
        self.bounds
            .after_step(
                self.est.as_mut(),
                &self.model,
                r.t,
                updated,
                &mut self.warnings,
                &mut self.counts.bounds,
            )
            .map_err(|e| self.failure(e, &r.t))?;
        self.est.advance_step();
        self.counts.steps += 1;
        Ok(StepDone { predicted, updated })
    }

    /// A prediction-only estimate at `at` (not before the current time) that leaves the run
    /// untouched.
    pub fn predict_aside(&self, at: &Instant) -> Result<(DVector<f64>, DMatrix<f64>), RunError> {
        let dt = self.t.until(at, self.mode);
        if dt <= 0.0 {
            return Ok((self.est.mean().clone(), self.est.covariance().clone()));
        }
        let mut side = self.est.clone_box();
        side.predict(&self.model, self.inputs.as_slice(), self.t.secs, dt, false)
            .map_err(|e| self.failure(e, at))?;
        side.settle();
        Ok((side.mean().clone(), side.covariance().clone()))
    }
}
