//! The checked run settings: which filter and how it is tuned, the prior, and what the
//! answer carries. Validated once by [`crate::request`], like the plant model.

use crate::model::time::{Instant, TimeMode};
use nalgebra::{DMatrix, DVector};

/// Which filter runs.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Method {
    /// Extended Kalman filter.
    Ekf,
    /// Unscented Kalman filter.
    Ukf,
    /// Ensemble Kalman filter.
    Enkf,
}

impl Method {
    /// The name used in requests and metrics.
    pub fn name(self) -> &'static str {
        match self {
            Method::Ekf => "ekf",
            Method::Ukf => "ukf",
            Method::Enkf => "enkf",
        }
    }
}

/// Scaled unscented transform parameters.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Unscented {
    /// Spread of the sigma points.
    pub alpha: f64,
    /// Prior-knowledge weight on the centre point's covariance (2 is optimal for Gaussians).
    pub beta: f64,
    /// Secondary scaling.
    pub kappa: f64,
}

/// Ensemble analysis variants.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum EnsembleUpdate {
    /// Stochastic update with perturbed observations.
    Perturbed,
    /// Deterministic ensemble transform (ETKF).
    Deterministic,
}

/// Ensemble settings.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Ensemble {
    /// Number of members.
    pub members: usize,
    /// Seed of every random draw.
    pub seed: u64,
    /// Multiplicative inflation of forecast anomalies.
    pub inflation: f64,
    /// Analysis variant.
    pub update: EnsembleUpdate,
    /// Relaxation of each estimated parameter's analysis spread towards its forecast
    /// spread, `α` of RTPS in [0, 1] (`filter::enkf::relax`); 0 turns it off.
    pub parameter_relaxation: f64,
}

/// Integration settings for continuous nonlinear models.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Integration {
    /// Largest step of the adaptive integrator.
    pub max_step: f64,
    /// Relative tolerance of the adaptive integrator.
    pub rtol: f64,
    /// Absolute tolerance of the adaptive integrator.
    pub atol: f64,
    /// When set, classic fixed-step RK4 with at most this step instead of adaptive steps.
    pub fixed_step: Option<f64>,
}

/// Every filter setting of a request.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct FilterConfig {
    /// Which filter.
    pub method: Method,
    /// UKF parameters.
    pub unscented: Unscented,
    /// EnKF parameters.
    pub ensemble: Ensemble,
    /// Integrator settings.
    pub integration: Integration,
    /// Gate probability (`None` when every reading is used).
    pub gate: Option<f64>,
    /// After this many consecutive refusals of one sensor its next reading is taken and
    /// the states it measures go back to their prior spread (`None`: never).
    pub reacquire: Option<u64>,
    /// What a line whose time goes backwards does.
    pub late: LateLines,
    /// Longest gap between lines, in seconds (`None`: no limit).
    pub max_gap: Option<f64>,
}

/// What a line whose time goes backwards does (`filter.late`).
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum LateLines {
    /// The request fails with a 422 at the line (the default).
    Reject,
    /// The line is skipped with a `late_line_skipped` warning and the run goes on.
    Skip,
}

/// The starting point of a run: a Gaussian (and for the ensemble, optionally its members).
#[derive(Debug, Clone)]
pub struct Prior {
    /// Time of the prior.
    pub t: Instant,
    /// Whether times are seconds or timestamps.
    pub mode: TimeMode,
    /// Mean over all states.
    pub mean: DVector<f64>,
    /// Covariance over all states (symmetric PSD).
    pub cov: DMatrix<f64>,
    /// Ensemble members as rows (`members × n`), when resuming an ensemble run.
    pub members: Option<DMatrix<f64>>,
    /// Ensemble step counter (random streams are derived from seed and step).
    pub step: u64,
    /// Inputs held at the prior's time.
    pub inputs: DVector<f64>,
    /// Tallies of the requests before this one in a chain (`prior.running`; zero when
    /// absent).
    pub running: Running,
    /// Per sensor, in model order: how many of its latest readings in the chain were
    /// refused in a row (`prior.running.in_a_row`; zeros when absent), so a streak that
    /// spans two requests counts as one.
    pub in_a_row: Vec<u64>,
}

/// What a chain of requests has seen so far (`posterior.running`), so a verdict can cover
/// the whole history rather than one request.
#[derive(Debug, Clone, Copy, Default, PartialEq)]
pub struct Running {
    /// Updates whose NIS is in `nis_sum`.
    pub readings: u64,
    /// Sum of their NIS values.
    pub nis_sum: f64,
    /// Sum of their degrees of freedom.
    pub dof_sum: u64,
    /// Sum of their log-likelihood terms.
    pub log_likelihood: f64,
    /// Sensor readings the gate judged.
    pub judged: u64,
    /// Of those, refused.
    pub refused: u64,
    /// Of those, refused right after the same sensor's previous reading was refused (the
    /// count the verdict tests; `diagnostics::nis`).
    pub refused_again: u64,
}

/// How much covariance each estimate carries.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum CovarianceOutput {
    /// `std` and the full `covariance`.
    Full,
    /// `std` only.
    Std,
    /// Neither.
    None,
}

/// Response options.
#[derive(Debug, Clone, PartialEq)]
pub struct OutputConfig {
    /// Covariance detail.
    pub covariance: CovarianceOutput,
    /// Whether innovations are reported.
    pub innovations: bool,
    /// Extra prediction-only times.
    pub at: Vec<Instant>,
}

impl Default for OutputConfig {
    fn default() -> Self {
        Self {
            covariance: CovarianceOutput::Full,
            innovations: true,
            at: Vec::new(),
        }
    }
}
