//! Building a model from recorded history: the numerics behind `POST /v1/identify`.
//!
//! Every form here fits the rates of a continuous model, or the map of a discrete one, to
//! state series by least squares over a library of candidate terms:
//!
//! - `linear`: x' = A x + B u (terms: the states and inputs), or x⁺ = F x + G u;
//! - `sparse`: each rate a sparse combination of polynomial and user terms, by sequentially
//!   thresholded least squares (Brunton, Proctor & Kutz 2016, PNAS 113(15));
//! - `known`: the rates physics gives are subtracted first and only the remainder is fitted.
//!
//! Rates are never taken from finite differences of the data. The regression uses the
//! integral form of the model over windows of `w` sample intervals,
//! x(t_{k+w}) − x(t_k) = ∫ f(x, u) dt ≈ Σ (Δt/2)(θ(t_i) + θ(t_{i+1})) ξ (trapezoid rule),
//! where an input keeps its value from its sample to the next (as `/v1/estimate` holds
//! a line's inputs), so the right end of an interval reads the new states with the old
//! inputs. The integral form handles irregular sampling and does not amplify reading
//! noise: the noise of the two end readings enters the left side once, with the same weight whatever `w`, while
//! the signal grows with the window (the integral or "weak" formulation, Schaeffer &
//! McCalla 2017, Phys. Rev. E 96; common practice). Its limits: the trapezoid rule is
//! exact only to O(Δt²) per interval, so sampling must resolve the fastest dynamics
//! (about 20 samples per time constant or period for 1 % accuracy); a reading error is
//! also fed into the terms (errors in variables), a bias of the order of the noise
//! variance over the state variance.
//!
//! Two more forms need no state series, only plain matrices:
//!
//! - [`subspace`]: a linear state-space model in innovation form from input and output
//!   series (N4SID oblique projection, Van Overschee & De Moor 1994);
//! - [`reduced`]: a rank-r linear model over a few mode amplitudes from many-state
//!   snapshots (dynamic mode decomposition, Schmid 2010; Tu et al. 2014).
//!
//! Those two kernels take a [`Stop`](crate::model::Stop) for the deadline and cancel flag
//! and answer a fit or a [`KernelError`]: a refusal that names the request field at fault,
//! or the halt that stopped it; [`section`] writes their fits as v1 model sections.
//!
//! `library.rs` builds and evaluates the candidate terms, `regress.rs` the windows and
//! the thresholded least squares, `noise.rs` the noise figures of the fitted model.
//! Nothing here knows request bytes.

pub mod library;
pub mod noise;
pub mod reduced;
pub mod refusal;
pub mod regress;
pub mod section;
pub mod subspace;

pub use refusal::{IdentifyRefusal, KernelError};

use crate::model::Halt;

/// Recorded history: sample times and, per sample, every state then every input.
#[derive(Debug, Clone)]
pub struct Series {
    /// Sample times, seconds, strictly increasing.
    pub t: Vec<f64>,
    /// Slot-major values: slot `s` (states first, then inputs) of sample `j` at
    /// `s * m + j`, where `m = t.len()`.
    pub values: Vec<f64>,
    /// Number of states (the first slots).
    pub states: usize,
    /// Number of inputs (the slots after the states).
    pub inputs: usize,
}

impl Series {
    /// Number of samples.
    pub fn len(&self) -> usize {
        self.t.len()
    }

    /// True when there is no sample.
    pub fn is_empty(&self) -> bool {
        self.t.is_empty()
    }

    /// The values of slot `s` (a state or, past the states, an input) at every sample.
    pub fn slot(&self, s: usize) -> &[f64] {
        let m = self.len();
        &self.values[s * m..(s + 1) * m]
    }

    /// The series seen from the end of each interval with the inputs held: states of
    /// samples 1..m, inputs of samples 0..m−1 (`None` without inputs).
    pub fn held(&self) -> Option<Series> {
        let m = self.len();
        if self.inputs == 0 || m < 2 {
            return None;
        }
        let mut values = Vec::with_capacity((self.states + self.inputs) * (m - 1));
        for s in 0..self.states {
            values.extend_from_slice(&self.slot(s)[1..]);
        }
        for s in self.states..self.states + self.inputs {
            values.extend_from_slice(&self.slot(s)[..m - 1]);
        }
        Some(Series {
            t: self.t[1..].to_vec(),
            values,
            states: self.states,
            inputs: self.inputs,
        })
    }

    /// Whether every gap between samples equals the first within `rel` (relative).
    pub fn uniform_step(&self, rel: f64) -> Option<f64> {
        let h = *self.t.get(1)? - self.t[0];
        let even = self
            .t
            .windows(2)
            .all(|w| ((w[1] - w[0]) - h).abs() <= rel * h);
        even.then_some(h)
    }
}

/// Why an identification could not be made; the job layer names the request's field.
#[derive(Debug, Clone, PartialEq)]
pub enum IdentifyError {
    /// Fewer regression rows (windows) than the library needs.
    TooFewSamples {
        /// Rows the fit needs (twice the number of terms).
        need: usize,
        /// Rows the training part of the series gives.
        have: usize,
    },
    /// Some terms are (nearly) linear combinations of each other over the data.
    RankDeficient {
        /// The terms that collide.
        terms: Vec<String>,
    },
    /// An input that has the same value at every sample: its effect cannot be fitted.
    StillInput {
        /// Index of the input (0-based among the inputs).
        input: usize,
    },
    /// A library term or a known rate is not finite at some sample.
    NotFinite {
        /// The term (or `known rate of <state>`).
        what: String,
        /// Sample index.
        sample: usize,
    },
    /// A discrete map needs equally spaced samples.
    Uneven,
    /// The client left or the deadline passed.
    Stopped(Halt),
}

/// Fitted coefficients of one form: `coef[s * terms + j]` is term `j`'s coefficient in
/// state `s`'s rate (zero where the term was dropped), with its standard error.
#[derive(Debug, Clone)]
pub struct Coefficients {
    /// Names of the terms, in library order.
    pub terms: Vec<String>,
    /// State-major coefficients.
    pub coef: Vec<f64>,
    /// Standard errors, same layout (zero for dropped terms).
    pub std_error: Vec<f64>,
    /// Whether each coefficient was kept, same layout.
    pub kept: Vec<bool>,
}

/// Fit on the training windows and on the held-out tail: root mean square of the window
/// residual x(t_{k+w}) − x(t_k) − ∫ f̂ dt per state, in state units.
#[derive(Debug, Clone, Default)]
pub struct Fit {
    /// Per state, training windows.
    pub train: Vec<f64>,
    /// Per state, held-out windows (empty when nothing was held out).
    pub holdout: Vec<f64>,
}

/// Root mean square of per-state figures (the answer's overall `rmse_*`).
pub fn overall(per_state: &[f64]) -> f64 {
    if per_state.is_empty() {
        return 0.0;
    }
    (per_state.iter().map(|x| x * x).sum::<f64>() / per_state.len() as f64).sqrt()
}

/// Check for inputs that never move: each would be one more constant column.
pub fn moving_inputs(series: &Series) -> Result<(), IdentifyError> {
    for i in 0..series.inputs {
        let col = series.slot(series.states + i);
        if col.iter().all(|&v| v == col[0]) {
            return Err(IdentifyError::StillInput { input: i });
        }
    }
    Ok(())
}
