//! Unscented Kalman filter with the scaled unscented transform.
//!
//! Sigma points from the lower Cholesky factor L of P (in `states` order):
//!   λ = α²(n + κ) − n,  X₀ = m,  X_i = m + √(n+λ) L_i,  X_{n+i} = m − √(n+λ) L_i,
//!   W₀ᵐ = λ/(n+λ),  W₀ᶜ = λ/(n+λ) + 1 − α² + β,  W_iᵐ = W_iᶜ = 1/(2(n+λ))
//! (Julier & Uhlmann 2004, Proc. IEEE 92(3); scaled weights: Wan & van der Merwe 2000).
//! Prediction moves every point through the dynamics and adds the interval's process noise;
//! the update redraws points from the predicted Gaussian, forms ẑ, S, C as weighted sums and
//! applies K = C S⁻¹, P⁺ = P − K S Kᵀ (= P − K Cᵀ), symmetrised.
//! Fails with a typed error if P loses positive semi-definiteness (its factor fails).

use crate::filter::observe::PointObserver;
use crate::filter::shared::FilterCore;
use crate::filter::{Estimator, FilterError};
use crate::linalg::cholesky_psd;
use crate::model::Reading;
use crate::model::{Integration, Model, Unscented};
use nalgebra::{DMatrix, DVector};

/// The unscented filter's state and buffers.
#[derive(Debug, Clone)]
pub struct Ukf {
    /// Mean, covariance, cross covariance, update buffers and propagator.
    core: FilterCore,
    pobs: PointObserver,
    wm: Vec<f64>,
    wc: Vec<f64>,
    scale: f64,
    sigma: DMatrix<f64>,
    sigma0: DMatrix<f64>,
    mean0: DVector<f64>,
    l: Vec<f64>,
    q: DMatrix<f64>,
}

/// Weights and spread of the scaled unscented transform for `n` states, or why they are unusable.
pub fn weights(n: usize, p: &Unscented) -> Result<(Vec<f64>, Vec<f64>, f64), String> {
    let nf = n as f64;
    let lambda = p.alpha * p.alpha * (nf + p.kappa) - nf;
    let c = nf + lambda;
    if !(c > 0.0) {
        return Err(format!(
            "alpha²(n + kappa) must be positive; with n = {n} it is {c}"
        ));
    }
    let mut wm = vec![0.5 / c; 2 * n + 1];
    let mut wc = wm.clone();
    wm[0] = lambda / c;
    wc[0] = lambda / c + 1.0 - p.alpha * p.alpha + p.beta;
    Ok((wm, wc, c.sqrt()))
}

impl Ukf {
    /// A filter for `model` from `(mean, cov)`; the weights come from [`weights`].
    pub fn new(
        model: &Model,
        integration: Integration,
        params: &Unscented,
        mean: DVector<f64>,
        cov: DMatrix<f64>,
    ) -> Result<Self, String> {
        let n = model.n();
        let (wm, wc, scale) = weights(n, params)?;
        let pts = 2 * n + 1;
        Ok(Self {
            core: FilterCore::new(model, integration, pts, mean, cov),
            pobs: PointObserver::new(model, pts),
            wm,
            wc,
            scale,
            sigma: DMatrix::zeros(pts, n),
            sigma0: DMatrix::zeros(pts, n),
            mean0: DVector::zeros(n),
            l: vec![0.0; n * n],
            q: DMatrix::zeros(n, n),
        })
    }

    /// Draw sigma points (rows of `sigma`) from the current mean and covariance.
    fn draw(&mut self) -> Result<(), FilterError> {
        let n = self.core.mean.len();
        cholesky_psd(self.core.cov.as_slice(), &mut self.l, n)
            .map_err(|_| FilterError::NotPositive("state covariance"))?;
        for i in 0..n {
            let m = self.core.mean[i];
            self.sigma[(0, i)] = m;
            for k in 0..n {
                let d = self.scale * self.l[i + k * n];
                self.sigma[(1 + k, i)] = m + d;
                self.sigma[(1 + n + k, i)] = m - d;
            }
        }
        Ok(())
    }

    /// Weighted mean of the sigma points into `self.core.mean`.
    fn mean_of_points(&mut self) {
        let pts = self.sigma.nrows();
        for i in 0..self.core.mean.len() {
            self.core.mean[i] = (0..pts).map(|j| self.wm[j] * self.sigma[(j, i)]).sum();
        }
    }
}

impl Estimator for Ukf {
    fn predict(
        &mut self,
        model: &Model,
        u: &[f64],
        t0: f64,
        dt: f64,
        keep_cross: bool,
    ) -> Result<(), FilterError> {
        self.draw()?;
        if keep_cross {
            self.sigma0.copy_from(&self.sigma);
            self.mean0.copy_from(&self.core.mean);
        }
        self.core
            .pred
            .predict_points(model, &mut self.sigma, &self.wm, u, t0, dt, &mut self.q)?;
        self.mean_of_points();
        let (n, pts) = (self.core.mean.len(), self.sigma.nrows());
        for j in 0..n {
            for i in 0..=j {
                let mut s = 0.0;
                for k in 0..pts {
                    s += self.wc[k]
                        * (self.sigma[(k, i)] - self.core.mean[i])
                        * (self.sigma[(k, j)] - self.core.mean[j]);
                }
                let v = s + self.q[(i, j)];
                self.core.cov[(i, j)] = v;
                self.core.cov[(j, i)] = v;
            }
        }
        if keep_cross {
            // Cov(x_k, x_{k+1}) = Σ Wᶜ (X⁰ − m⁰)(X − m)ᵀ (Särkkä 2008, IEEE TAC 53(3)).
            for j in 0..n {
                for i in 0..n {
                    self.core.cross[(i, j)] = (0..pts)
                        .map(|k| {
                            self.wc[k]
                                * (self.sigma0[(k, i)] - self.mean0[i])
                                * (self.sigma[(k, j)] - self.core.mean[j])
                        })
                        .sum();
                }
            }
        }
        if !self.core.cov.iter().all(|x| x.is_finite()) {
            return Err(FilterError::NonFinite("predicted covariance"));
        }
        Ok(())
    }

    fn update(
        &mut self,
        model: &Model,
        reading: &Reading,
        u: &[f64],
        t: f64,
        gate: Option<&[f64]>,
    ) -> Result<bool, FilterError> {
        self.core.obs.begin(model, reading);
        self.draw()?;
        self.pobs
            .eval(model, &self.core.obs.checks, &self.sigma, u, t);
        let (n, m, pts) = (self.core.mean.len(), self.core.obs.m, self.sigma.nrows());
        let zs = &self.pobs.zs;
        for r in 0..m {
            self.core.obs.zhat[r] = (0..pts).map(|k| self.wm[k] * zs[r * pts + k]).sum();
        }
        for c in 0..m {
            for r in 0..m {
                self.core.obs.s[r + c * m] = (0..pts)
                    .map(|k| {
                        self.wc[k]
                            * (zs[r * pts + k] - self.core.obs.zhat[r])
                            * (zs[c * pts + k] - self.core.obs.zhat[c])
                    })
                    .sum();
            }
            for i in 0..n {
                self.core.obs.c[i + c * n] = (0..pts)
                    .map(|k| {
                        self.wc[k]
                            * (self.sigma[(k, i)] - self.core.mean[i])
                            * (zs[c * pts + k] - self.core.obs.zhat[c])
                    })
                    .sum();
            }
        }
        if !self.core.obs.gate(gate)? {
            return Ok(false);
        }
        self.core.obs.gain()?;
        self.core.obs.apply_gain(self.core.mean.as_mut_slice());
        self.core
            .obs
            .subtract_gain_cross(self.core.cov.as_mut_slice());
        self.core.finish_update()?;
        Ok(true)
    }

    fn core(&self) -> &FilterCore {
        &self.core
    }

    fn core_mut(&mut self) -> &mut FilterCore {
        &mut self.core
    }

    fn clone_box(&self) -> Box<dyn Estimator> {
        Box::new(self.clone())
    }
}
