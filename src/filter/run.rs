//! The run loop shared by every endpoint that filters: one step per measurement line.
//!
//! For each line: refuse a time going backwards (or skip the line, `filter.late`) and a gap
//! longer than `filter.max_gap`; predict from the previous time with the inputs held since
//! then (no prediction for an equal time); apply the line's inputs (they act from this time
//! on, zero-order hold); update jointly with every sensor present, gating each reading on
//! its own NIS and taking back a sensor refused `filter.reacquire.after` times in a row;
//! count what happened (NIS over accepted and over all readings, the log-likelihood,
//! refusal streaks) and note what a person should know (`summary.warnings`).

use crate::diagnostics::chi2;
use crate::diagnostics::nis::{NisSummary, NisTally, Refusals};
use crate::diagnostics::warnings::{WarningKind, Warnings};
use crate::filter::bounds::{BoundsKeeper, BoundsTally};
use crate::filter::ekf::Ekf;
use crate::filter::enkf::Enkf;
use crate::filter::ukf::Ukf;
use crate::filter::{Estimator, FilterError};
use crate::model::Reading;
use crate::model::{
    Dynamics, FilterConfig, LateLines, LinearTime, Method, Model, Prior, ProcessNoise, Running,
};
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
    /// Of those, refused right after the same sensor's previous reading was refused.
    pub refused_again: u64,
    /// Sensor readings judged (accepted or refused).
    pub judged: u64,
    /// Lines skipped because their time went backwards (`filter.late: "skip"`).
    pub skipped: u64,
    /// NIS of the accepted readings.
    pub nis: NisTally,
    /// NIS of every judged reading, refused ones included (each refused sensor reading
    /// with its own NIS, the accepted ones with their joint NIS).
    pub all_nis: NisTally,
    /// Σ ln N(ν; 0, S) over the updates: −½ Σ (νᵀS⁻¹ν + ln det S + m ln 2π), the
    /// prediction-error decomposition of the readings' likelihood (Schweppe 1965, IEEE
    /// Trans. Information Theory 11(1)).
    pub log_likelihood: f64,
    /// What the parameters' bounds did (`summary.bounds`).
    pub bounds: BoundsTally,
}

/// A sensor refused this many times in a row gets a `refused_in_a_row` warning (a
/// consistent filter behind a 0.99 gate does so with probability 1e-20).
const STREAK_WARNING: u64 = 10;

/// ln 2π, for the Gaussian density's normalising term.
const LN_2PI: f64 = 1.837_877_066_409_345_5;

/// What one step did (for the smoother).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct StepDone {
    /// Whether time advanced (a prediction ran).
    pub predicted: bool,
    /// Whether any reading updated the state.
    pub updated: bool,
    /// Whether the line was skipped for coming late; it has no estimate.
    pub skipped: bool,
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
    /// Per sensor: refusals in a row so far, and the time of the first of them.
    streaks: Vec<(u64, Instant)>,
    /// Per sensor: whether it was read at the current time already (duplicate times).
    read_now: Vec<bool>,
    /// Per sensor: the states its readings inform (what `filter.reacquire` resets).
    measured: Vec<Vec<usize>>,
    /// The request's prior variances (what `filter.reacquire` resets to).
    prior_var: Vec<f64>,
    /// The gate thresholds of the current line, with a reacquired sensor's opened.
    gate_now: Vec<f64>,
    /// The chain's tallies: `prior.running`, with this run's added one by one in the same
    /// order as one long run would add them (so a chain of requests gives the same sums
    /// bit for bit).
    running: Running,
    bounds: BoundsKeeper,
    /// Most integration or grid steps one gap may need (`Limits::max_gap_steps`).
    max_gap_steps: Option<u64>,
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
        /// How far back the line is, seconds.
        back: f64,
    },
    /// A line comes longer after the one before than `filter.max_gap` allows.
    GapTooLong {
        /// JSON Pointer of the line (its `/t` is at fault), relative to the caller's base.
        pointer: String,
        /// The line's time, as the request writes times.
        at: String,
        /// The time already reached.
        current: String,
        /// The gap, seconds.
        gap: f64,
        /// `filter.max_gap`.
        max_gap: f64,
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
    /// A gap would need more fixed integration or grid steps than the server allows.
    TooManySteps {
        /// JSON Pointer of the time at fault, relative to the caller's base.
        pointer: String,
        /// The time the gap leads to, as the request writes times.
        at: String,
        /// Length of the gap, seconds.
        gap: f64,
        /// Steps the gap would need.
        steps: f64,
        /// The server's limit (`max_gap_steps`).
        limit: u64,
        /// What steps: `"integration.fixed_step"` or the model's `dt`.
        by: &'static str,
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
            RunError::TimeDecreasing {
                at, current, back, ..
            } => write!(
                f,
                "times must not decrease: this line's time {at} is {back} s before {current}, the last time the run reached; send lines in time order, or set filter.late to \"skip\" to skip late lines with a warning"
            ),
            RunError::GapTooLong {
                at,
                current,
                gap,
                max_gap,
                ..
            } => write!(
                f,
                "this line's time {at} is {gap} s after {current}, the last time the run reached, more than filter.max_gap = {max_gap} s allows; check the clock that stamped it"
            ),
            RunError::OffGrid { at, dt, .. } => write!(
                f,
                "time {at} is not on the model's grid prior.t + k·{dt} (the discrete model steps by dt)"
            ),
            RunError::TooManySteps {
                at,
                gap,
                steps,
                limit,
                by,
                ..
            } => write!(
                f,
                "the gap of {gap} s up to {at} would need {steps} steps of {by}, more than this server's limit of {limit} steps in one gap (max_gap_steps in /v1/info); send readings closer together, or use a longer step"
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

/// The states sensor `s`'s readings inform: those its formula reads, and every state that
/// drives one of those through the dynamics, directly or not (structurally: a formula
/// that reads it, or a non-zero entry off the diagonal of A or F). A position encoder on
/// a cart informs position and velocity; `filter.reacquire` resets them all, since
/// resetting only the position would leave a wrong, confident velocity to lock the
/// sensor out again.
fn informed_states(model: &Model, s: usize) -> Vec<usize> {
    let (n, nm) = (model.n(), model.n_model);
    let sensor = &model.sensors[s];
    let mut set: Vec<bool> = (0..n)
        .map(|i| (0..sensor.dim).any(|o| sensor.program.depends_on(o, i)))
        .collect();
    let drives = |i: usize, j: usize| -> bool {
        if i == j || i >= nm {
            return false;
        }
        match &model.dynamics {
            Dynamics::Rates(p) | Dynamics::Next(p) => p.depends_on(i, j),
            Dynamics::Linear { matrix, .. } => matrix[(i, j)] != 0.0,
        }
    };
    loop {
        let mut grew = false;
        for i in 0..n {
            if !set[i] {
                continue;
            }
            for j in 0..n {
                if !set[j] && drives(i, j) {
                    set[j] = true;
                    grew = true;
                }
            }
        }
        if !grew {
            break;
        }
    }
    (0..n).filter(|&i| set[i]).collect()
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
        let prior_var: Vec<f64> = (0..model.n()).map(|i| prior.cov[(i, i)]).collect();
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
        let measured = (0..model.sensors.len())
            .map(|s| informed_states(&model, s))
            .collect();
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
        // Room for every kind on a few sensors and states: recording one in the loop then
        // never allocates.
        let mut warnings = Warnings::with_capacity(32);
        if !has_process_noise(&model) {
            warnings.note(WarningKind::NoProcessNoise, None, None, prior.t, || {
                "the model has no process noise on its states, so the filter trusts the dynamics without limit and its spread can only shrink; add process_noise unless the dynamics are exact".into()
            });
        }
        let sensors = model.sensors.len();
        Ok(Self {
            model,
            cfg,
            mode: prior.mode,
            est,
            t: prior.t,
            origin: prior.t,
            inputs: prior.inputs,
            gate_now: thresholds.clone().unwrap_or_default(),
            thresholds,
            keep_cross,
            streaks: prior.in_a_row.iter().map(|&k| (k, prior.t)).collect(),
            read_now: vec![false; sensors],
            measured,
            prior_var,
            running: prior.running,
            bounds,
            max_gap_steps: None,
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
                format!("no reading updated the filter ({steps} lines, {rejected} readings refused): the estimates are predictions from the prior alone").into()
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

    /// Stop a prediction that is still running when `stop` fires (the request's compute
    /// deadline passed, or its client went away); the step then fails with a deadline
    /// problem.
    pub fn set_stop(&mut self, stop: &crate::model::Stop) {
        self.est.set_stop(stop);
    }

    /// Refuse, before stepping, a gap that would need more than `limit` fixed
    /// integration steps or grid steps of a discrete model.
    pub fn set_step_limit(&mut self, limit: u64) {
        self.max_gap_steps = Some(limit);
    }

    /// Steps a gap of `dt` seconds needs, for dynamics that step at a fixed size, and
    /// what sets that size (as the refusal names it).
    fn gap_steps(&self, dt: f64) -> Option<(f64, &'static str)> {
        match (&self.model.dynamics, self.cfg.integration.fixed_step) {
            (
                Dynamics::Linear {
                    time: LinearTime::Discrete { dt: grid },
                    ..
                },
                _,
            ) => Some((crate::linalg::round_half_away(dt / grid), "the model's dt")),
            (Dynamics::Rates(_), Some(h)) => Some(((dt / h).ceil(), "integration.fixed_step")),
            _ => None,
        }
    }

    /// Err when the gap `dt` up to `t` needs more steps than the limit allows; the
    /// error's pointer is `pointer` then `field` (joined only then: no allocation).
    fn check_steps(
        &self,
        dt: f64,
        t: &Instant,
        pointer: &str,
        field: &str,
    ) -> Result<(), RunError> {
        let (Some(limit), Some((steps, by))) = (self.max_gap_steps, self.gap_steps(dt)) else {
            return Ok(());
        };
        if steps > limit as f64 {
            return Err(RunError::TooManySteps {
                pointer: format!("{pointer}{field}"),
                at: fmt_time(t, self.mode),
                gap: dt,
                steps,
                limit,
                by,
            });
        }
        Ok(())
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
            return self.late_line(r, pointer);
        }
        self.check_grid(&r.t, pointer)?;
        let dt = self.t.until(&r.t, self.mode);
        if let Some(max_gap) = self.cfg.max_gap {
            if dt > max_gap {
                return Err(RunError::GapTooLong {
                    pointer: pointer.to_string(),
                    at: fmt_time(&r.t, self.mode),
                    current: fmt_time(&self.t, self.mode),
                    gap: dt,
                    max_gap,
                });
            }
        }
        self.check_steps(dt, &r.t, pointer, "/t")?;
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
            self.read_now.fill(false);
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
            self.note_duplicates(r);
            let gate = if self.reacquire(r) {
                Some(self.gate_now.as_slice())
            } else {
                self.thresholds.as_deref()
            };
            updated = self
                .est
                .update(&self.model, r, self.inputs.as_slice(), r.t.secs, gate)
                .map_err(|e| self.failure(e, &r.t))?;
            self.tally(updated, &r.t);
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
        Ok(StepDone {
            predicted,
            updated,
            skipped: false,
        })
    }

    /// A line whose time is before the run's: skipped with a warning under
    /// `filter.late: "skip"`, else the request's error.
    fn late_line(&mut self, r: &Reading, pointer: &str) -> Result<StepDone, RunError> {
        let (mode, now) = (self.mode, self.t);
        let back = r.t.until(&now, mode);
        if self.cfg.late == LateLines::Reject {
            return Err(RunError::TimeDecreasing {
                pointer: pointer.to_string(),
                at: fmt_time(&r.t, mode),
                current: fmt_time(&now, mode),
                back,
            });
        }
        self.counts.skipped += 1;
        // The texts are made only for the first late line: later ones add to its count.
        self.warnings
            .note(WarningKind::LateLineSkipped, None, None, r.t, || {
                let (at, current) = (fmt_time(&r.t, mode), fmt_time(&now, mode));
                format!("a line at {at} came {back} s after the run had reached {current} and was skipped (filter.late = \"skip\"); count says how many were").into()
            });
        Ok(StepDone {
            predicted: false,
            updated: false,
            skipped: true,
        })
    }

    /// Warn when a sensor is read twice at one time: both readings are applied, as two
    /// independent readings, which a repeated export line is not.
    fn note_duplicates(&mut self, r: &Reading) {
        for &(s, _) in &r.sensors {
            if std::mem::replace(&mut self.read_now[s], true) {
                let (name, mode) = (&self.model.sensors[s].name, self.mode);
                self.warnings
                    .note(WarningKind::DuplicateTime, Some(s), None, r.t, || {
                        let at = fmt_time(&r.t, mode);
                        format!("sensor '{name}' was read twice at {at}; both readings were applied as independent ones (a line repeated by an export would count twice)").into()
                    });
            }
        }
    }

    /// Whether this line's gate is `gate_now` rather than the plain thresholds. A sensor
    /// refused `filter.reacquire.after` times in a row is taken back: its threshold is
    /// opened for this line and the states its readings inform ([`informed_states`]) go
    /// back to the request's prior spread (correlations with them dropped), with a
    /// `reacquired` warning.
    fn reacquire(&mut self, r: &Reading) -> bool {
        let (Some(after), Some(base)) = (self.cfg.reacquire, self.thresholds.as_deref()) else {
            return false;
        };
        self.gate_now.copy_from_slice(base);
        for &(s, _) in &r.sensors {
            if self.streaks[s].0 < after {
                continue;
            }
            self.gate_now[s] = f64::INFINITY;
            self.est.reset_spread(&self.measured[s], &self.prior_var);
            let (name, mode, k) = (&self.model.sensors[s].name, self.mode, self.streaks[s].0);
            self.warnings
                .note(WarningKind::Reacquired, Some(s), None, r.t, || {
                    let at = fmt_time(&r.t, mode);
                    format!("sensor '{name}' was taken back at {at} after {k} refusals in a row; the states its readings inform were reset to their prior spread").into()
                });
        }
        true
    }

    /// Count the line's readings: judged, refused, NIS over accepted and over all, the
    /// log-likelihood, and each sensor's refusal streak.
    fn tally(&mut self, updated: bool, at: &Instant) {
        let obs = self.est.obs();
        let mut refused_nis = 0.0;
        let mut refused_dim = 0;
        for ck in &obs.checks {
            self.counts.judged += 1;
            self.running.judged += 1;
            let streak = &mut self.streaks[ck.sensor];
            if ck.accepted {
                streak.0 = 0;
                continue;
            }
            self.counts.rejected += 1;
            self.running.refused += 1;
            refused_nis += ck.nis;
            refused_dim += ck.dim;
            if streak.0 == 0 {
                streak.1 = *at;
            } else {
                self.counts.refused_again += 1;
                self.running.refused_again += 1;
            }
            streak.0 += 1;
            if streak.0 >= STREAK_WARNING {
                self.warnings.streak(
                    WarningKind::RefusedInARow,
                    Some(ck.sensor),
                    streak.1,
                    streak.0,
                    || "the gate refused this sensor's readings many times in a row (count is the longest run): the filter may have locked it out (process noise too small, a step change, or the sensor changed units); check the model, or set filter.reacquire",
                );
            }
        }
        if updated {
            self.counts.updates += 1;
            self.counts.nis.add(obs.joint_nis, obs.ma);
            let ll = -0.5 * (obs.joint_nis + obs.log_det_s + obs.ma as f64 * LN_2PI);
            self.counts.log_likelihood += ll;
            let r = &mut self.running;
            r.readings += 1;
            r.nis_sum += obs.joint_nis;
            r.dof_sum += obs.ma as u64;
            r.log_likelihood += ll;
        }
        let (acc_nis, acc_dim) = if updated {
            (obs.joint_nis, obs.ma)
        } else {
            (0.0, 0)
        };
        if acc_dim + refused_dim > 0 {
            self.counts
                .all_nis
                .add(acc_nis + refused_nis, acc_dim + refused_dim);
        }
    }

    /// Put back tallies saved after an earlier line (a stream that failed part-way
    /// answers with the summary of its last good line).
    pub fn restore_tallies(&mut self, counts: Counts, warnings: Warnings, running: Running) {
        self.counts = counts;
        self.warnings = warnings;
        self.running = running;
    }

    /// The tallies of the whole chain: the prior's `running` plus this run's.
    pub fn running(&self) -> Running {
        self.running
    }

    /// Per sensor, in model order: its latest readings refused in a row
    /// (`posterior.running.in_a_row`).
    pub fn in_a_row(&self) -> impl ExactSizeIterator<Item = u64> + '_ {
        self.streaks.iter().map(|s| s.0)
    }

    /// The summary's NIS object: this request's verdict (refusals counted) and the
    /// chain's.
    pub fn nis_summary(&self) -> NisSummary {
        let c = &self.counts;
        let refusals = |judged, again| self.cfg.gate.map(|p| Refusals { p, judged, again });
        let run = self.running();
        let chain = NisTally {
            count: run.readings,
            sum: run.nis_sum,
            dof: run.dof_sum,
        };
        let running_verdict = chain.verdict(refusals(run.judged, run.refused_again));
        c.nis.summary(
            &c.all_nis,
            refusals(c.judged, c.refused_again),
            running_verdict,
        )
    }

    /// A prediction-only estimate at `at` (not before the current time) that leaves the run
    /// untouched.
    pub fn predict_aside(&self, at: &Instant) -> Result<(DVector<f64>, DMatrix<f64>), RunError> {
        let dt = self.t.until(at, self.mode);
        if dt <= 0.0 {
            return Ok((self.est.mean().clone(), self.est.covariance().clone()));
        }
        self.check_steps(dt, at, "/output/at", "")?;
        let mut side = self.est.clone_box();
        side.predict(&self.model, self.inputs.as_slice(), self.t.secs, dt, false)
            .map_err(|e| self.failure(e, at))?;
        side.settle();
        Ok((side.mean().clone(), side.covariance().clone()))
    }
}
