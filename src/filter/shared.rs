//! What every filter holds in the same form: its belief (mean, covariance, and the cross
//! covariance the smoother reads), the reading-space buffers of its update, and its
//! propagator. [`crate::filter::Estimator`]'s accessors (`mean`, `covariance`, `cross`,
//! `obs`, `set_stop`) read it through `core`, so each filter writes them once.

use crate::filter::observe::ObsSpace;
use crate::filter::predict::Predictor;
use crate::filter::{check_resolution, ensure_finite, FilterError};
use crate::linalg::symmetrize;
use crate::model::{Integration, Model};
use nalgebra::{DMatrix, DVector};

/// The parts of a filter that every filter has.
#[derive(Debug, Clone)]
pub struct FilterCore {
    /// Current mean over all states (`n`).
    pub mean: DVector<f64>,
    /// Current covariance over all states (`n × n`).
    pub cov: DMatrix<f64>,
    /// Cov(x_prev, x_pred) of the last prediction, for the smoother (`n × n`).
    pub cross: DMatrix<f64>,
    /// Propagation between readings.
    pub pred: Predictor,
    /// The update's reading-space buffers (innovations, S, NIS, gate decisions).
    pub obs: ObsSpace,
}

impl FilterCore {
    /// The core of a filter for `model` from `(mean, cov)`, propagating `points` points
    /// (sigma points or members; 0 for the mean alone).
    pub fn new(
        model: &Model,
        integration: Integration,
        points: usize,
        mean: DVector<f64>,
        cov: DMatrix<f64>,
    ) -> Self {
        let n = model.n();
        Self {
            mean,
            cov,
            cross: DMatrix::zeros(n, n),
            pred: Predictor::new(model, integration, points),
            obs: ObsSpace::new(model),
        }
    }

    /// The end of every update: make the covariance symmetric, `(P + Pᵀ)/2` (the array
    /// updates' `L Lᵀ` already is, so this changes nothing there), and refuse a non-finite
    /// mean or covariance.
    ///
    /// `dx` is the change the update made to the mean: it must stay resolvable at the
    /// posterior spread ([`check_resolution`]).
    pub fn finish_update(&mut self, dx: &[f64]) -> Result<(), FilterError> {
        symmetrize(&mut self.cov);
        ensure_finite(self.mean.as_slice(), self.cov.as_slice(), "updated state")?;
        check_resolution(
            self.mean.len(),
            |i| dx[i],
            |i, bound| (self.cov[(i, i)] < bound).then_some(self.cov[(i, i)]),
        )
    }
}
