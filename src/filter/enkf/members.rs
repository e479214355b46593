//! The ensemble's members (rows of an `N × n` matrix), their moments, and the forecast.
//!
//! Forecast: each member moves through the dynamics, then the interval's process noise is
//! sampled onto it, `x_j ← f(x_j) + L_Q ε_j`, `ε_j ~ N(0, I)`, `L_Q L_Qᵀ = Q` (Evensen
//! 2003, Ocean Dynamics 53, §3, from memory). The moments are the sample mean and the
//! sample covariance with divisor `N − 1`.
//!
//! Every random draw comes from a ChaCha20 stream selected by (seed, step, purpose), so a
//! run split into requests that carry `members` and `step` continues bit for bit.

use super::workspace::Workspace;
use crate::filter::observe::PointObserver;
use crate::filter::shared::FilterCore;
use crate::filter::{Estimator, FilterError};
use crate::linalg::{all_finite, cholesky, cholesky_psd, gemm_nt_upper, symmetrize};
use crate::model::Reading;
use crate::model::{Ensemble, Integration, Model};
use nalgebra::{DMatrix, DVector};
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha20Rng;
use rand_distr::StandardNormal;

/// Which draw a random stream serves.
#[derive(Clone, Copy)]
pub(super) enum Purpose {
    ProcessNoise = 0,
    Perturbation = 1,
    Initial = 2,
    SidePrediction = 3,
}

/// The random stream for `purpose` on line `step` of a run seeded with `seed`.
pub(super) fn stream(seed: u64, step: u64, purpose: Purpose) -> ChaCha20Rng {
    let mut r = ChaCha20Rng::seed_from_u64(seed);
    r.set_stream(step.wrapping_mul(4).wrapping_add(purpose as u64));
    r
}

/// The ensemble Kalman filter: its members, their moments and its buffers.
#[derive(Debug, Clone)]
pub struct Enkf {
    /// The members, one per row (`N × n`).
    pub(super) ensemble: DMatrix<f64>,
    /// Their mean and covariance (divisor `N − 1`; valid when `cov_stale` is false), the
    /// smoother's cross covariance, the update's reading-space buffers and the propagator.
    pub(super) core: FilterCore,
    /// Whether the members changed since `core.cov` was computed.
    pub(super) cov_stale: bool,
    /// Members, seed, inflation and update form, as requested.
    pub(super) cfg: Ensemble,
    /// Lines processed so far (selects the random streams).
    pub(super) step: u64,
    /// Whether this is a copy for a side prediction (its own random stream).
    pub(super) side: bool,
    /// Always use the full `N × N` transform (tests compare it with the small form).
    pub(super) always_full: bool,
    /// Predicted readings of every member.
    pub(super) pobs: PointObserver,
    /// Scratch and per-step buffers.
    pub(super) ws: Workspace,
}

impl Enkf {
    /// A filter for `model` from given members (rows) or drawn from `(mean, cov)`.
    pub fn new(
        model: &Model,
        integration: Integration,
        cfg: Ensemble,
        mean: &DVector<f64>,
        cov: &DMatrix<f64>,
        members: Option<DMatrix<f64>>,
        step: u64,
    ) -> Result<Self, FilterError> {
        let (n, nn) = (model.n(), cfg.members);
        let mm: usize = model.sensors.iter().map(|s| s.dim).sum();
        let x = match members {
            Some(x) => x,
            None => {
                let mut l = vec![0.0; n * n];
                cholesky_psd(cov.as_slice(), &mut l, n)
                    .map_err(|_| FilterError::NotPositive("prior covariance"))?;
                let mut rng = stream(cfg.seed, step, Purpose::Initial);
                let mut z = vec![0.0; n];
                let mut x = DMatrix::zeros(nn, n);
                for j in 0..nn {
                    z.iter_mut().for_each(|v| *v = rng.sample(StandardNormal));
                    for i in 0..n {
                        x[(j, i)] = mean[i] + (0..=i).map(|k| l[i + k * n] * z[k]).sum::<f64>();
                    }
                }
                x
            }
        };
        let mut f = Self {
            ensemble: x,
            core: FilterCore::new(
                model,
                integration,
                nn,
                DVector::zeros(n),
                DMatrix::zeros(n, n),
            ),
            cov_stale: true,
            cfg,
            step,
            side: false,
            always_full: false,
            pobs: PointObserver::new(model, nn),
            ws: Workspace::new(nn, n, mm, model.estimated.len()),
        };
        f.refresh_moments();
        Ok(f)
    }

    /// Ensemble mean from the members; the covariance is left stale until
    /// [`Estimator::settle`] (the analysis needs only the mean and the members, so one
    /// covariance per line is enough, not one after every change of the members).
    pub(super) fn refresh_mean(&mut self) {
        let (nn, n) = (self.ensemble.nrows(), self.ensemble.ncols());
        // Four columns at a time: four independent chains of additions, each still adding
        // its members in order from −0.0 (as `Iterator::sum` does).
        let xs = self.ensemble.as_slice();
        let mut i = 0;
        while i + 4 <= n {
            let mut acc = [-0.0; 4];
            for k in 0..nn {
                for (q, a) in acc.iter_mut().enumerate() {
                    *a += xs[k + (i + q) * nn];
                }
            }
            for (q, a) in acc.iter().enumerate() {
                self.core.mean[i + q] = a / nn as f64;
            }
            i += 4;
        }
        for i in i..n {
            self.core.mean[i] = self.ensemble.column(i).iter().sum::<f64>() / nn as f64;
        }
        self.cov_stale = true;
    }

    /// Ensemble mean and covariance (divisor N − 1) from the members.
    pub(super) fn refresh_moments(&mut self) {
        self.refresh_mean();
        self.refresh_covariance();
    }

    /// Ensemble covariance (divisor N − 1) about the current mean.
    pub(super) fn refresh_covariance(&mut self) {
        let (nn, n) = (self.ensemble.nrows(), self.ensemble.ncols());
        self.cov_stale = false;
        self.fill_anomalies();
        // Σₖ (x_ki − x̄_i)(x_kj − x̄_j) for i ≤ j, mirrored.
        gemm_nt_upper(
            &self.ws.state_anomalies,
            &self.ws.state_anomalies,
            self.core.cov.as_mut_slice(),
            (n, nn, n),
        );
        for j in 0..n {
            for i in 0..=j {
                let s = self.core.cov[(i, j)] / (nn as f64 - 1.0);
                self.core.cov[(i, j)] = s;
                self.core.cov[(j, i)] = s;
            }
        }
    }

    /// `anom[i + k n] = x_ki − x̄_i` from the current members and mean.
    pub(super) fn fill_anomalies(&mut self) {
        let (nn, n) = (self.ensemble.nrows(), self.ensemble.ncols());
        let xs = self.ensemble.as_slice();
        for i in 0..n {
            let m = self.core.mean[i];
            for (k, &v) in xs[i * nn..(i + 1) * nn].iter().enumerate() {
                self.ws.state_anomalies[i + k * n] = v - m;
            }
        }
        debug_assert_eq!(self.ws.state_anomalies.len(), n * nn);
    }
}

impl Estimator for Enkf {
    fn predict(
        &mut self,
        model: &Model,
        u: &[f64],
        t0: f64,
        dt: f64,
        keep_cross: bool,
    ) -> Result<(), FilterError> {
        if keep_cross {
            self.ws.previous_members.copy_from(&self.ensemble);
            self.ws.previous_mean.copy_from(&self.core.mean);
        }
        let noisy = self.core.pred.predict_points(
            model,
            &mut self.ensemble,
            &self.ws.member_weights,
            u,
            t0,
            dt,
            &mut self.ws.process_noise,
        )?;
        if noisy {
            let n = self.ensemble.ncols();
            symmetrize(&mut self.ws.process_noise);
            // The definite factor first: the semi-definite one zeroes every pivot below
            // 1e-10 of the largest variance, which after a long gap (Q's entries growing
            // like T, T³, T⁵, …) drops all but one direction of the noise and leaves the
            // members on a line, their covariance singular (R15). A Q that is only
            // semi-definite (states without noise) still takes the semi-definite factor.
            let (q, lq) = (
                self.ws.process_noise.as_slice(),
                &mut self.ws.process_noise_factor,
            );
            if cholesky(q, lq, n).is_err() {
                cholesky_psd(q, lq, n)
                    .map_err(|_| FilterError::NotPositive("process noise covariance"))?;
            }
            let purpose = if self.side {
                Purpose::SidePrediction
            } else {
                Purpose::ProcessNoise
            };
            let mut rng = stream(self.cfg.seed, self.step, purpose);
            for j in 0..self.ensemble.nrows() {
                for k in 0..n {
                    self.ws.draws[k] = rng.sample(StandardNormal);
                }
                for i in 0..n {
                    let add: f64 = (0..=i)
                        .map(|k| self.ws.process_noise_factor[i + k * n] * self.ws.draws[k])
                        .sum();
                    self.ensemble[(j, i)] += add;
                }
            }
        }
        if keep_cross {
            // The smoother reads the predicted covariance.
            self.refresh_moments();
        } else {
            self.refresh_mean();
        }
        if keep_cross {
            let (nn, n) = (self.ensemble.nrows(), self.ensemble.ncols());
            for j in 0..n {
                for i in 0..n {
                    self.core.cross[(i, j)] = (0..nn)
                        .map(|k| {
                            (self.ws.previous_members[(k, i)] - self.ws.previous_mean[i])
                                * (self.ensemble[(k, j)] - self.core.mean[j])
                        })
                        .sum::<f64>()
                        / (nn as f64 - 1.0);
                }
            }
        }
        if !all_finite(self.ensemble.as_slice()) {
            return Err(FilterError::NonFinite("forecast members"));
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
        self.analyse(model, reading, u, t, gate)
    }

    fn core(&self) -> &FilterCore {
        &self.core
    }

    fn core_mut(&mut self) -> &mut FilterCore {
        &mut self.core
    }

    fn covariance(&self) -> &DMatrix<f64> {
        debug_assert!(!self.cov_stale, "ensemble covariance read before settle");
        &self.core.cov
    }

    fn settle(&mut self) {
        if self.cov_stale {
            self.refresh_covariance();
        }
    }

    fn members(&self) -> Option<&DMatrix<f64>> {
        Some(&self.ensemble)
    }

    /// The members' deviations in each state of `states` scaled so that its spread is
    /// `variances[i]` (a collapsed state, all members equal, is left alone: there is no
    /// direction to scale). Correlations with other states keep their sign and scale with
    /// the spread; redrawing members would need random draws outside the step's stream.
    fn reset_spread(&mut self, states: &[usize], variances: &[f64]) {
        let nn = self.ensemble.nrows();
        for &i in states {
            let col = self.ensemble.column(i);
            let mean = col.iter().sum::<f64>() / nn as f64;
            let var = col.iter().map(|x| (x - mean) * (x - mean)).sum::<f64>() / (nn as f64 - 1.0);
            if var > 0.0 && variances[i] > 0.0 {
                let f = (variances[i] / var).sqrt();
                for x in self.ensemble.column_mut(i).iter_mut() {
                    *x = mean + (*x - mean) * f;
                }
            }
        }
        self.refresh_mean();
        self.cov_stale = true;
    }

    fn advance_step(&mut self) {
        self.step += 1;
    }

    fn step(&self) -> u64 {
        self.step
    }

    fn clone_box(&self) -> Box<dyn Estimator> {
        let mut c = self.clone();
        c.side = true;
        Box::new(c)
    }
}
