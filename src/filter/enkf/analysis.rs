//! The analysis step shared by both update forms: inflate the forecast anomalies, predict
//! each member's reading, form the sample statistics in reading space, gate, factor the
//! accepted readings' noise, then hand over to the perturbed or the transform update.
//!
//! With predicted readings `y_j = h(x_j)`, `ȳ = Σ y_j / N` and anomalies `Y' = [y_j − ȳ]`:
//!
//! ```text
//! S = Y' Y'ᵀ / (N − 1) + R,    C = X' Y'ᵀ / (N − 1)
//! ```
//!
//! (Evensen 2003, Ocean Dynamics 53, §4, from memory). Multiplicative inflation
//! `x_j ← x̄ + ρ (x_j − x̄)` widens the forecast first (Anderson & Anderson 1999, MWR 127).
//! The perturbed update forms all of `S` (and `C`, kept in the shared buffers) for the
//! gate, and takes its gain from the square-root array of `perturbed.rs`; the transform
//! needs each sensor's block of `S` for its own NIS. After either, `spread.rs` makes sure
//! the members kept a positive definite spread.

use super::members::Enkf;
use crate::filter::{check_resolution, FilterError};
use crate::linalg::{all_finite, cholesky};
use crate::model::Reading;
use crate::model::{EnsembleUpdate, Model};

impl Enkf {
    /// Update with the sensors present on `reading` at time `t`, gating each against
    /// `gate`; returns whether any reading was used (see [`crate::filter::Estimator::update`]).
    pub(super) fn analyse(
        &mut self,
        model: &Model,
        reading: &Reading,
        u: &[f64],
        t: f64,
        gate: Option<&[f64]>,
    ) -> Result<bool, FilterError> {
        let (nn, n) = (self.ensemble.nrows(), self.ensemble.ncols());
        // Multiplicative inflation of the forecast anomalies.
        if self.cfg.inflation != 1.0 {
            let (xs, infl) = (self.ensemble.as_mut_slice(), self.cfg.inflation);
            for i in 0..n {
                let m = self.core.mean[i];
                for x in &mut xs[i * nn..(i + 1) * nn] {
                    *x = m + infl * (*x - m);
                }
            }
            self.refresh_mean();
        }
        self.note_forecast_spread(model);
        self.ws
            .forecast_mean
            .copy_from_slice(self.core.mean.as_slice());
        self.core.obs.begin(model, reading);
        self.pobs
            .eval(model, &self.core.obs.checks, &self.ensemble, u, t);
        let m = self.core.obs.m;
        let zs = &self.pobs.zs;
        let nf = nn as f64;
        // ȳ_r = Σₖ y_rk / N with the rows as independent running sums (members still
        // added in order, from −0.0 as `Iterator::sum` starts).
        let acc = &mut self.ws.sums[..m];
        acc.fill(-0.0);
        for k in 0..nn {
            for (r, s) in acc.iter_mut().enumerate() {
                *s += zs[r * nn + k];
            }
        }
        for r in 0..m {
            self.ws.reading_mean[r] = acc[r] / nf;
            self.core.obs.zhat[r] = self.ws.reading_mean[r];
        }
        for r in 0..m {
            for k in 0..nn {
                self.ws.reading_anomalies[r + k * m] = zs[r * nn + k] - self.ws.reading_mean[r];
            }
        }
        // The perturbed update needs all of S and C = Cov(x, y) for K. The transform needs
        // only each sensor's diagonal block of S for its own NIS (only the diagonal, for
        // the answer, when the joint NIS, which it computes itself, settles the line).
        let need_c = self.cfg.update == EnsembleUpdate::Perturbed;
        let only_check = !need_c && self.core.obs.joint_is_only_check(gate);
        if need_c {
            self.fill_anomalies();
        }
        let za = &self.ws.reading_anomalies[..m * nn];
        if only_check {
            // Only the predicted variance of each row (the answer reports it), all rows'
            // sums at once over each member's contiguous anomalies.
            let acc = &mut self.ws.sums[..m];
            acc.fill(-0.0);
            for zk in za.chunks_exact(m) {
                for (s, &z) in acc.iter_mut().zip(zk) {
                    *s += z * z;
                }
            }
            for r in 0..m {
                self.core.obs.s[r + r * m] = acc[r] / (nf - 1.0);
            }
        }
        let spans = match (need_c, only_check) {
            (true, _) => 1,
            (false, true) => 0,
            (false, false) => self.core.obs.checks.len(),
        };
        for span in 0..spans {
            let (lo, hi) = if need_c {
                (0, m)
            } else {
                let ck = &self.core.obs.checks[span];
                (ck.row, ck.row + ck.dim)
            };
            for c in lo..hi {
                // Rows lo ≤ r ≤ c; the sum is symmetric, so it fills (c, r) as well.
                let acc = &mut self.ws.sums[..=c - lo];
                acc.fill(-0.0);
                for k in 0..nn {
                    let w = za[c + k * m];
                    for (s, &zr) in acc.iter_mut().zip(&za[k * m + lo..k * m + c + 1]) {
                        *s += zr * w;
                    }
                }
                for (d, &sum) in acc.iter().enumerate() {
                    let r = lo + d;
                    self.core.obs.s[r + c * m] = sum / (nf - 1.0);
                    self.core.obs.s[c + r * m] = sum / (nf - 1.0);
                }
                if need_c {
                    let acc = &mut self.ws.sums[..n];
                    acc.fill(-0.0);
                    for k in 0..nn {
                        let w = za[c + k * m];
                        for (s, &ai) in acc
                            .iter_mut()
                            .zip(&self.ws.state_anomalies[k * n..(k + 1) * n])
                        {
                            *s += ai * w;
                        }
                    }
                    for i in 0..n {
                        self.core.obs.c[i + c * n] = acc[i] / (nf - 1.0);
                    }
                }
            }
        }
        let any = if need_c {
            self.core.obs.gate(gate)?
        } else {
            self.core.obs.gate_blocks(gate)?
        };
        if !any {
            return Ok(false);
        }
        let ma = self.core.obs.ma;
        let r = &self.core.obs.r_acc[..ma * ma];
        // The accepted rows of a diagonal R.
        self.ws.noise_is_diagonal = self.core.obs.r_diagonal;
        if self.ws.noise_is_diagonal {
            // Cholesky of a diagonal matrix: square roots of the diagonal.
            let lr = &mut self.ws.noise_factor[..ma * ma];
            lr.fill(0.0);
            for a in 0..ma {
                let d = r[a + a * ma];
                if !(d > 0.0) || !d.is_finite() {
                    return Err(FilterError::NotPositive("reading noise"));
                }
                let sd = d.sqrt();
                lr[a + a * ma] = sd;
                self.ws.inv_noise_sd[a] = 1.0 / sd;
            }
        } else {
            cholesky(r, &mut self.ws.noise_factor[..ma * ma], ma)
                .map_err(|_| FilterError::NotPositive("reading noise"))?;
        }
        match self.cfg.update {
            EnsembleUpdate::Perturbed => {
                self.perturbed_gain()?;
                self.perturbed_update();
            }
            EnsembleUpdate::Deterministic => {
                // The forecast anomalies, kept for `keep_spread`'s array should it be needed.
                self.fill_anomalies();
                self.transform_update()?;
                let nis = self.transform_nis();
                self.core.obs.set_joint_nis(nis, only_check);
                // S = L_R M L_Rᵀ: ln det S = 2 Σ ln (L_R)_aa + ln det M.
                let lr = &self.ws.noise_factor[..ma * ma];
                let log_det_r: f64 = (0..ma).map(|a| 2.0 * lr[a + a * ma].ln()).sum();
                self.core.obs.log_det_s = log_det_r + self.ws.log_det_m;
            }
        }
        self.refresh_mean();
        self.relax_and_bound(model);
        if !all_finite(self.ensemble.as_slice()) {
            return Err(FilterError::NonFinite("analysis members"));
        }
        self.keep_spread(self.cfg.update == EnsembleUpdate::Perturbed)?;
        self.check_mean_resolution()?;
        Ok(true)
    }

    /// [`check_resolution`] of the analysis: the change of the ensemble mean against the
    /// members' sample variance (divisor N − 1), summed only until it reaches the bound.
    fn check_mean_resolution(&self) -> Result<(), FilterError> {
        let nn = self.ensemble.nrows();
        let (xs, mean, before) = (
            self.ensemble.as_slice(),
            self.core.mean.as_slice(),
            &self.ws.forecast_mean,
        );
        check_resolution(
            mean.len(),
            |i| mean[i] - before[i],
            |i, bound| {
                let reach = bound * (nn as f64 - 1.0);
                let mut sum = 0.0;
                for x in &xs[i * nn..(i + 1) * nn] {
                    sum += (x - mean[i]) * (x - mean[i]);
                    if sum >= reach {
                        return None;
                    }
                }
                Some(sum / (nn as f64 - 1.0))
            },
        )
    }
}
