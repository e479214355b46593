//! The checked plant model: states, inputs, dynamics, process noise, sensors and estimated
//! parameters. Everything here has been validated once (dimensions agree, covariances are
//! symmetric PSD, names resolve, formulas compiled), so the filters never re-check.

use crate::formula::Program;
use nalgebra::{DMatrix, DVector};

/// A parameter estimated jointly with the state (an extra, random-walk state).
#[derive(Debug, Clone)]
pub struct EstimatedParameter {
    /// Name, as reported among the states.
    pub name: String,
    /// Prior mean.
    pub initial: f64,
    /// Prior standard deviation.
    pub std: f64,
    /// Random-walk spectral density (variance per unit time), `random_walk` in requests.
    pub random_walk: f64,
}

/// The interval a state should stay in: `min`/`max` of an estimated parameter (kept
/// inside by the filter, see `crate::filter::bounds`) or of a model state (`model.bounds`,
/// only watched: leaving it gives an `out_of_bounds` warning). A side not given is
/// infinite.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Bounds {
    /// Lower bound, `-inf` when none.
    pub min: f64,
    /// Upper bound, `+inf` when none.
    pub max: f64,
}

impl Bounds {
    /// No bound on either side.
    pub const NONE: Bounds = Bounds {
        min: f64::NEG_INFINITY,
        max: f64::INFINITY,
    };

    /// Whether either side is finite.
    pub fn any(&self) -> bool {
        self.min > f64::NEG_INFINITY || self.max < f64::INFINITY
    }

    /// Whether `x` lies inside (bounds included).
    pub fn contains(&self, x: f64) -> bool {
        self.min <= x && x <= self.max
    }
}

/// Whether a linear model is continuous or discrete in time.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum LinearTime {
    /// `x' = A x + B u`.
    Continuous,
    /// `x_{k+1} = F x_k + B u_k` on a fixed grid of step `dt`.
    Discrete {
        /// Grid step.
        dt: f64,
    },
}

/// How the state moves between readings.
#[derive(Debug, Clone)]
pub enum Dynamics {
    /// Continuous rates `x' = f(x, u, t)`: one output per model state; slots `[x, u, t]`.
    Rates(Program),
    /// Discrete map `x⁺ = g(x, u, t, dt)`: one output per model state; slots `[x, u, t, dt]`.
    Next(Program),
    /// Linear dynamics over all states (estimated parameters have zero rate / identity map).
    /// `rates` whose formulas are affine in states and inputs with constant coefficients
    /// are turned into this form at validation, so they are discretised exactly.
    Linear {
        /// Continuous or discrete.
        time: LinearTime,
        /// `A` (continuous) or `F` (discrete), `n × n`.
        matrix: DMatrix<f64>,
        /// Input matrix, `n × nu`.
        b: DMatrix<f64>,
        /// Constant term `c` of `x' = A x + B u + c`, length `n`: zero for models given
        /// as matrices; set when `rates` formulas turn out to be affine (continuous only).
        offset: DVector<f64>,
    },
}

impl Dynamics {
    /// Whether time is continuous (densities apply) rather than discrete.
    pub fn is_continuous(&self) -> bool {
        matches!(
            self,
            Dynamics::Rates(_)
                | Dynamics::Linear {
                    time: LinearTime::Continuous,
                    ..
                }
        )
    }
}

/// Process noise over all `n` states.
#[derive(Debug, Clone)]
pub enum ProcessNoise {
    /// Continuous white noise with spectral density matrix `Qc` (variance per unit time);
    /// estimated parameters' random-walk densities sit on their diagonal.
    Density(DMatrix<f64>),
    /// Discrete noise: `q` per application of the map (model states), plus `random_walk · dt`
    /// on each estimated parameter's diagonal.
    PerStep {
        /// Covariance added per step, `n × n` (zero rows/columns for parameters).
        q: DMatrix<f64>,
        /// Random-walk density per state (zero for model states).
        random_walk: DVector<f64>,
    },
}

/// One sensor: a (vector) formula of the state and its noise.
#[derive(Debug, Clone)]
pub struct Sensor {
    /// Name, as used in readings.
    pub name: String,
    /// Compiled formulas, one output per component; slots `[x, u, t]`.
    pub program: Program,
    /// Number of components.
    pub dim: usize,
    /// Noise covariance, `dim × dim`, positive definite.
    pub r: DMatrix<f64>,
    /// The formulas as `z = H x + D u + c` (columns: states, then inputs) when they are
    /// affine with constant coefficients, as `measures: "pos"` is; the extended filter
    /// then reads `H` instead of differentiating the tape every update.
    pub affine: Option<crate::formula::AffineForm>,
}

/// The model a filter runs on.
#[derive(Debug, Clone)]
pub struct Model {
    /// Every state name: the model's states, then estimated parameters.
    pub states: Vec<String>,
    /// How many of `states` are the model's own (the rest are parameters).
    pub n_model: usize,
    /// Input names.
    pub inputs: Vec<String>,
    /// Parameters estimated as states, in order.
    pub estimated: Vec<EstimatedParameter>,
    /// Dynamics.
    pub dynamics: Dynamics,
    /// Process noise.
    pub noise: ProcessNoise,
    /// Sensors in the order given.
    pub sensors: Vec<Sensor>,
    /// Bounds per state, over all `n` states (model states from `model.bounds`, then the
    /// parameters' `min`/`max`); [`Bounds::NONE`] where none were given.
    pub bounds: Vec<Bounds>,
}

impl Model {
    /// Total number of states `n`.
    pub fn n(&self) -> usize {
        self.states.len()
    }

    /// Number of inputs.
    pub fn nu(&self) -> usize {
        self.inputs.len()
    }

    /// Length of the variable vector `[x, u, t, dt]` that programs read from.
    pub fn slot_count(&self) -> usize {
        self.n() + self.nu() + 2
    }

    /// Index of the `t` slot.
    pub fn t_slot(&self) -> usize {
        self.n() + self.nu()
    }

    /// Index of the sensor called `name`.
    pub fn sensor_index(&self, name: &str) -> Option<usize> {
        self.sensors.iter().position(|s| s.name == name)
    }

    /// Whether any estimated parameter carries a bound the filter must keep.
    pub fn has_parameter_bounds(&self) -> bool {
        self.bounds[self.n_model..].iter().any(Bounds::any)
    }

    /// Index of the input called `name`.
    pub fn input_index(&self, name: &str) -> Option<usize> {
        self.inputs.iter().position(|s| s == name)
    }
}
