//! Truth trajectories and noisy readings from a model, seeded, for integration tests and
//! demos.
//!
//! The truth starts from a draw of the prior and moves like one ensemble member: the
//! deterministic flow over each gap plus a draw of the interval's process noise
//! N(0, Q(Δ)). Inputs follow their own schedule and are held between changes (zero-order
//! hold): every gap is split at each input change inside it, so a change acts from its own
//! time whatever the sampling times. Each sensor reads h(x) + L_R ε on its own schedule (`every`
//! k-th time), with optional dropout and gross outliers (`scale` times the noise) for
//! exercising the gate; each sample says which of its readings were made outliers and
//! which were dropped, so a test can tell injected faults from ordinary noise.
//!
//! Nothing here knows about requests or JSON: [`run`] hands each time's truth and readings
//! to a [`Sink`]; `POST /v1/simulate` ([`crate::job`]) parses the request and writes them.

use crate::filter::predict::Predictor;
use crate::filter::FilterError;
use crate::linalg::cholesky_psd;
use crate::model::{Halt, Instant, Stop, TimeMode};
use crate::model::{Integration, Model, Prior};
use nalgebra::DMatrix;
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha20Rng;
use rand_distr::StandardNormal;

/// How one sensor is sampled.
#[derive(Debug, Clone, Copy)]
pub struct Schedule {
    /// Read at every `every`-th time (1: at each).
    pub every: u64,
    /// Probability that a due reading is left out.
    pub dropout: f64,
    /// Probability that a reading is a gross outlier.
    pub outlier_probability: f64,
    /// An outlier's noise is this many times the sensor's.
    pub outlier_scale: f64,
}

impl Default for Schedule {
    fn default() -> Self {
        Self {
            every: 1,
            dropout: 0.0,
            outlier_probability: 0.0,
            outlier_scale: 20.0,
        }
    }
}

/// What to simulate: a checked model from a starting belief over a list of times.
#[derive(Debug, Clone, Copy)]
pub struct Plan<'a> {
    /// The model that moves the truth and makes the readings.
    pub model: &'a Model,
    /// The truth's first state is drawn from this belief, at its time; its inputs are the
    /// ones in force until the first change.
    pub prior: &'a Prior,
    /// The sampling times of the readings, not decreasing, none before the prior's.
    pub times: &'a [Instant],
    /// Input changes `(time, [(input index, value)])`, their times strictly increasing and
    /// none before the prior's. Each acts from its own time; changes after the last
    /// sampling time have no effect.
    pub inputs: &'a [(Instant, Vec<(usize, f64)>)],
    /// One schedule per sensor, in model order.
    pub schedules: &'a [Schedule],
    /// Seed of the one random stream every draw comes from.
    pub seed: u64,
}

/// The truth and readings at one time.
#[derive(Debug)]
pub struct Sample<'a> {
    /// Index into the plan's sampling times, or `None` for an input change that falls
    /// between them (such a sample has no readings, only the change).
    pub index: Option<usize>,
    /// The time.
    pub t: &'a Instant,
    /// The true state, in model order.
    pub state: &'a [f64],
    /// The readings taken, in sensor order: sensor index and its values.
    pub readings: &'a [(usize, Vec<f64>)],
    /// Sensors (indices, in sensor order) whose reading here was made a gross outlier.
    pub outliers: &'a [usize],
    /// Sensors (indices, in sensor order) that were due here but left out (dropout).
    pub dropped: &'a [usize],
    /// Inputs that changed at this time `(input index, value)`.
    pub changed: &'a [(usize, f64)],
}

/// Receives each time's [`Sample`], in order.
pub trait Sink {
    /// One time's truth and readings.
    fn sample(&mut self, s: &Sample<'_>);
}

/// Why a simulation stopped.
#[derive(Debug, Clone, PartialEq)]
#[non_exhaustive]
pub enum SimulateError {
    /// The request's stop fired: its client went away or its deadline passed.
    Stopped(Halt),
    /// The prior covariance has no square root.
    PriorNotPsd,
    /// Propagating the truth to time `at` failed.
    Propagation {
        /// The end of the interval that failed.
        at: Instant,
        /// What went wrong.
        reason: String,
    },
    /// An interval's process noise covariance has no square root.
    ProcessNoiseNotPsd,
    /// A sensor's noise covariance has no square root (the model check rules this out).
    SensorNoiseNotPsd,
    /// A sensor's formula gave a value that is not finite.
    NonFiniteReading {
        /// The sensor's name.
        sensor: String,
        /// The sampling time.
        at: Instant,
    },
}

/// The true state and what moves it from one time to the next.
struct Truth<'m> {
    model: &'m Model,
    pred: Predictor,
    mode: TimeMode,
    /// The state, as the single row of a point matrix (what the predictor moves).
    x: DMatrix<f64>,
    /// The time of `x`.
    t: Instant,
    /// Process noise covariance of the last interval and its lower Cholesky factor.
    q: DMatrix<f64>,
    l: Vec<f64>,
    /// Standard normal draws of one noise vector.
    z: Vec<f64>,
}

impl Truth<'_> {
    /// Move the state from its time to `to` with the inputs `u` held over the whole
    /// interval: the deterministic flow, then one draw of the interval's process noise
    /// N(0, Q(Δ)) as L z with Q(Δ) = L Lᵀ (common practice). Callers split a gap at every
    /// input change, so `u` is truly constant here. For a time-invariant continuous model
    /// the noise of the pieces adds up to the noise of the whole gap (independent
    /// increments); a discrete map adds its per-step noise on each piece, as estimate does
    /// for the line a change gets.
    fn advance(
        &mut self,
        to: &Instant,
        u: &[f64],
        rng: &mut ChaCha20Rng,
    ) -> Result<(), SimulateError> {
        let n = self.model.n();
        let dt = self.t.until(to, self.mode);
        if dt > 0.0 {
            let noisy = self
                .pred
                .predict_points(
                    self.model,
                    &mut self.x,
                    &[1.0],
                    u,
                    self.t.secs,
                    dt,
                    &mut self.q,
                )
                .map_err(|e| match e {
                    FilterError::Deadline => SimulateError::Stopped(Halt::Deadline),
                    e => SimulateError::Propagation {
                        at: *to,
                        reason: e.to_string(),
                    },
                })?;
            if noisy {
                cholesky_psd(self.q.as_slice(), &mut self.l, n)
                    .map_err(|_| SimulateError::ProcessNoiseNotPsd)?;
                for z in self.z.iter_mut() {
                    *z = rng.sample(StandardNormal);
                }
                let (l, z) = (&self.l, &self.z);
                for i in 0..n {
                    self.x[(0, i)] += (0..=i).map(|c| l[i + c * n] * z[c]).sum::<f64>();
                }
            }
        }
        self.t = *to;
        Ok(())
    }
}

/// Simulate `plan`, handing each time's sample to `sink`: one per sampling time, plus one
/// per input change that falls strictly between sampling times (or between the prior's
/// time and the first), in time order. `stop` is looked at on every sampling time and
/// inside each long gap.
/// Every draw comes from one ChaCha20 stream seeded with `plan.seed`, in a fixed order,
/// so the same plan gives the same samples on every platform.
pub fn run(plan: &Plan<'_>, stop: &Stop, sink: &mut impl Sink) -> Result<(), SimulateError> {
    let Plan {
        model,
        prior,
        times,
        inputs,
        schedules: sched,
        seed,
    } = *plan;
    let mode = prior.mode;
    let (n, nu) = (model.n(), model.nu());
    let mut rng = ChaCha20Rng::seed_from_u64(seed);
    let mut l = vec![0.0; n * n];
    cholesky_psd(prior.cov.as_slice(), &mut l, n).map_err(|_| SimulateError::PriorNotPsd)?;
    let mut x = DMatrix::zeros(1, n);
    let z: Vec<f64> = (0..n).map(|_| rng.sample(StandardNormal)).collect();
    for i in 0..n {
        x[(0, i)] = prior.mean[i] + (0..=i).map(|k| l[i + k * n] * z[k]).sum::<f64>();
    }
    let integration = Integration {
        max_step: f64::INFINITY,
        rtol: 1e-9,
        atol: 1e-12,
        fixed_step: None,
    };
    let mut pred = Predictor::new(model, integration, 1);
    pred.set_stop(stop);
    let mut truth = Truth {
        model,
        pred,
        mode,
        x,
        t: prior.t,
        q: DMatrix::zeros(n, n),
        l,
        z,
    };
    let mut u = prior.inputs.clone();
    let mut next_input = 0;
    let mut vars = vec![0.0; model.slot_count()];
    let mut ws: Vec<_> = model
        .sensors
        .iter()
        .map(|s| s.program.workspace())
        .collect();
    let mut zbuf = vec![0.0; model.sensors.iter().map(|s| s.dim).max().unwrap_or(1)];
    let mut lr = vec![0.0; zbuf.len() * zbuf.len()];
    let mut readings: Vec<(usize, Vec<f64>)> = Vec::with_capacity(model.sensors.len());
    let mut outliers: Vec<usize> = Vec::with_capacity(model.sensors.len());
    let mut dropped: Vec<usize> = Vec::with_capacity(model.sensors.len());
    let mut changed: Vec<(usize, f64)> = Vec::with_capacity(nu);
    for (k, tk) in times.iter().enumerate() {
        if let Some(why) = stop.every(k, 16) {
            return Err(SimulateError::Stopped(why));
        }
        // Changes strictly before this sampling time: move the truth to each change's own
        // time, switch the inputs there and report that time as a sample of its own, so
        // the measurements carry the change at the time it acted.
        while let Some((tc, vals)) = inputs.get(next_input).filter(|c| tk.is_after(&c.0, mode)) {
            truth.advance(tc, u.as_slice(), &mut rng)?;
            changed.clear();
            for &(i, v) in vals {
                u[i] = v;
                changed.push((i, v));
            }
            next_input += 1;
            sink.sample(&Sample {
                index: None,
                t: tc,
                state: truth.x.as_slice(),
                readings: &[],
                outliers: &[],
                dropped: &[],
                changed: &changed,
            });
        }
        truth.advance(tk, u.as_slice(), &mut rng)?;
        // A change at exactly this time acts from now: the readings below already see it.
        changed.clear();
        while let Some((_, vals)) = inputs.get(next_input).filter(|c| !c.0.is_after(tk, mode)) {
            for &(i, v) in vals {
                u[i] = v;
                changed.retain(|c| c.0 != i);
                changed.push((i, v));
            }
            next_input += 1;
        }
        vars[..n].copy_from_slice(truth.x.as_slice());
        vars[n..n + nu].copy_from_slice(u.as_slice());
        vars[n + nu] = tk.secs;
        readings.clear();
        outliers.clear();
        dropped.clear();
        for (si, s) in model.sensors.iter().enumerate() {
            let sc = sched[si];
            if k as u64 % sc.every != 0 {
                continue;
            }
            // Draw every random number whatever the branch, so one sensor's settings do not
            // shift another's noise.
            let drop = rng.gen::<f64>() < sc.dropout;
            let outlier = rng.gen::<f64>() < sc.outlier_probability;
            let eps: Vec<f64> = (0..s.dim).map(|_| rng.sample(StandardNormal)).collect();
            if drop {
                dropped.push(si);
                continue;
            }
            let slots = s.program.slots();
            s.program
                .eval(&vars[..slots], &mut ws[si], &mut zbuf[..s.dim]);
            cholesky_psd(s.r.as_slice(), &mut lr[..s.dim * s.dim], s.dim)
                .map_err(|_| SimulateError::SensorNoiseNotPsd)?;
            let mult = if outlier { sc.outlier_scale } else { 1.0 };
            let mut values = Vec::with_capacity(s.dim);
            for a in 0..s.dim {
                let noise: f64 = (0..=a).map(|b| lr[a + b * s.dim] * eps[b]).sum();
                let v = zbuf[a] + mult * noise;
                if !v.is_finite() {
                    return Err(SimulateError::NonFiniteReading {
                        sensor: s.name.clone(),
                        at: *tk,
                    });
                }
                values.push(v);
            }
            if outlier {
                outliers.push(si);
            }
            readings.push((si, values));
        }
        sink.sample(&Sample {
            index: Some(k),
            t: tk,
            state: truth.x.as_slice(),
            readings: &readings,
            outliers: &outliers,
            dropped: &dropped,
            changed: &changed,
        });
    }
    Ok(())
}
