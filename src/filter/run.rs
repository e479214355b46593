//! The run loop shared by every endpoint that filters: one step per measurement line.
//!
//! For each line: refuse a time going backwards; predict from the previous time with the
//! inputs held since then (no prediction for an equal time); apply the line's inputs (they
//! act from this time on, zero-order hold); update jointly with every sensor present,
//! gating each reading on its own NIS; count what happened.

use crate::diagnostics::{chi2, nis::NisTally};
use crate::filter::ekf::Ekf;
use crate::filter::enkf::Enkf;
use crate::filter::ukf::Ukf;
use crate::filter::{Estimator, FilterError};
use crate::problem::{Problem, ProblemKind};
use crate::spec::model::{Dynamics, FilterConfig, LinearTime, Method, Model, Prior};
use crate::spec::reading::Reading;
use crate::spec::time::{Instant, TimeMode};
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
    /// Counters.
    pub counts: Counts,
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
    ) -> Result<Self, Problem> {
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
                .map_err(|e| Problem::field("/filter/unscented", e))?,
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
                .map_err(|e| Problem::field("/prior", format!("cannot draw the ensemble: {e}")))?,
            ),
        };
        let thresholds = cfg.gate.map(|p| {
            model
                .sensors
                .iter()
                .map(|s| chi2::quantile(p, s.dim as f64))
                .collect()
        });
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
            counts: Counts::default(),
        })
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
    fn check_grid(&self, t: &Instant, pointer: &str) -> Result<(), Problem> {
        if let Dynamics::Linear {
            time: LinearTime::Discrete { dt },
            ..
        } = &self.model.dynamics
        {
            let k = self.origin.until(t, self.mode) / dt;
            if (k - crate::linalg::round_half_away(k)).abs() > 1e-6 {
                return Err(Problem::field(
                    format!("{pointer}/t"),
                    format!("time {} is not on the model's grid prior.t + k·{dt} (the discrete model steps by dt)", fmt_time(t, self.mode)),
                ));
            }
        }
        Ok(())
    }

    /// Stop a prediction that is still integrating after `deadline` (the request's
    /// compute budget); the step then fails with a deadline problem.
    pub fn set_deadline(&mut self, deadline: Option<std::time::Instant>) {
        self.est.set_deadline(deadline);
    }

    fn failure(&self, e: FilterError, t: &Instant) -> Problem {
        if matches!(e, FilterError::Deadline) {
            return Problem::new(
                ProblemKind::DeadlineExceeded,
                format!(
                    "the request needed more than the compute deadline; it stopped inside the prediction to line {} (t = {})",
                    self.counts.steps + 1,
                    fmt_time(t, self.mode)
                ),
            );
        }
        Problem::new(
            ProblemKind::NumericalFailure,
            format!(
                "the filter stopped at step {} (t = {}): {e}",
                self.counts.steps + 1,
                fmt_time(t, self.mode)
            ),
        )
    }

    /// Apply one measurement line; `pointer` locates it in the request for errors.
    pub fn step(&mut self, r: &Reading, pointer: &str) -> Result<StepDone, Problem> {
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
    ) -> Result<StepDone, Problem> {
        if self.t.is_after(&r.t, self.mode) {
            return Err(Problem::field(
                format!("{pointer}/t"),
                format!(
                    "times must not decrease: {} comes after {}",
                    fmt_time(&r.t, self.mode),
                    fmt_time(&self.t, self.mode)
                ),
            ));
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
        self.est.advance_step();
        self.counts.steps += 1;
        Ok(StepDone { predicted, updated })
    }

    /// A prediction-only estimate at `at` (not before the current time) that leaves the run
    /// untouched.
    pub fn predict_aside(&self, at: &Instant) -> Result<(DVector<f64>, DMatrix<f64>), Problem> {
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
