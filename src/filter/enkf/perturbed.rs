//! The perturbed-observations update (Burgers, van Leeuwen & Evensen 1998, MWR 126): each
//! member is updated with its own perturbed reading, so the analysis ensemble has the
//! Kalman filter's analysis covariance in expectation:
//!
//! ```text
//! x_j ← x_j + K (z + ε_j − h(x_j)),    ε_j = L_R e_j,  e_j ~ N(0, I),  L_R L_Rᵀ = R
//! K = C S⁻¹,  C = X' Y'ᵀ / (N − 1),  S = Y' Y'ᵀ / (N − 1) + R
//! ```
//!
//! The gain comes from the square-root array form ([`crate::linalg::array_update`];
//! Kailath, Sayed & Hassibi 2000, *Linear Estimation*, ch. 12) with the scaled anomalies
//! as the factor of the sample covariance: Givens rotations take
//! `[L_R, Y'/√(N−1); 0, X'/√(N−1)]` to `[S^{1/2}, 0; K̄, ·]`, and `K = K̄ S^{-1/2}`. S is
//! never formed, so its factor stays accurate when the members' predicted readings spread
//! far wider than the reading noise (after a long gap), where the Cholesky factor of the
//! formed S fails on rounding. The draws come from the line's `Perturbation` stream,
//! member by member.

use super::members::{stream, Enkf, Purpose};
use crate::filter::FilterError;
use crate::linalg::{triangularize_rows, ArrayError};
use rand::Rng;
use rand_distr::StandardNormal;

/// `v ← T⁻¹ v` for the lower `m × m` block `t` stored with leading dimension `ld`.
fn solve_lower_strided(t: &[f64], ld: usize, m: usize, v: &mut [f64]) {
    for i in 0..m {
        let mut x = v[i];
        for k in 0..i {
            x -= t[i + k * ld] * v[k];
        }
        v[i] = x / t[i + i * ld];
    }
}

impl Enkf {
    /// Leading dimension of the gain array (`m + n + 1` over all sensors' rows).
    pub(super) fn gain_ld(&self) -> usize {
        self.ws.whitened.nrows() + self.ensemble.ncols() + 1
    }

    /// Build the gain array `[L_R, Y'/√(N−1); 0, X'/√(N−1); 0, 1ᵀ]` over the accepted rows
    /// from the forecast anomalies (`fill_anomalies`), the reading anomalies and `L_R`
    /// (`noise_factor`), and rotate its first rows to `[S^{1/2}, 0]`. The last row carries
    /// `Θᵀ [0; 1]` along (for [`Enkf::keep_spread`]); it changes nothing above it.
    pub(super) fn rotate_gain_array(&mut self) -> Result<(), FilterError> {
        let (nn, n, ma, m) = (
            self.ensemble.nrows(),
            self.ensemble.ncols(),
            self.core.obs.ma,
            self.core.obs.m,
        );
        let ld = self.gain_ld();
        let (rows, cols) = (ma + n + 1, ma + nn);
        let sc = 1.0 / (nn as f64 - 1.0).sqrt();
        let a = &mut self.ws.gain_array;
        for j in 0..cols {
            a[j * ld..j * ld + rows].fill(0.0);
        }
        for b in 0..ma {
            for r in b..ma {
                a[r + b * ld] = self.ws.noise_factor[r + b * ma];
            }
        }
        for k in 0..nn {
            let col = &mut a[(ma + k) * ld..(ma + k) * ld + rows];
            for (r, &row) in self.core.obs.keep.iter().enumerate() {
                col[r] = self.ws.reading_anomalies[row + k * m] * sc;
            }
            for i in 0..n {
                col[ma + i] = self.ws.state_anomalies[i + k * n] * sc;
            }
            col[ma + n] = 1.0;
        }
        triangularize_rows(a, ld, ma, rows, cols).map_err(|e| match e {
            ArrayError::NonFinite => FilterError::NonFinite("predicted reading"),
            _ => FilterError::NotPositive("innovation covariance"),
        })
    }

    /// [`Enkf::rotate_gain_array`], then the joint NIS νᵀS⁻¹ν = |S^{-1/2} ν|² and
    /// ln det S = 2 Σ ln (S^{1/2})_aa.
    pub(super) fn perturbed_gain(&mut self) -> Result<(), FilterError> {
        self.rotate_gain_array()?;
        let (ma, ld) = (self.core.obs.ma, self.gain_ld());
        let a = &self.ws.gain_array;
        let w = &mut self.ws.innovation[..ma];
        w.copy_from_slice(&self.core.obs.nu_acc[..ma]);
        solve_lower_strided(a, ld, ma, w);
        self.core.obs.joint_nis = w.iter().map(|x| x * x).sum();
        self.core.obs.log_det_s = (0..ma).map(|i| 2.0 * a[i + i * ld].ln()).sum();
        Ok(())
    }

    /// Add `K (z + L_R ε_j − h(x_j))` to every member `j` over the accepted rows, with
    /// `K = K̄ S^{-1/2}` from [`Enkf::perturbed_gain`].
    pub(super) fn perturbed_update(&mut self) {
        let (nn, n, ma) = (
            self.ensemble.nrows(),
            self.ensemble.ncols(),
            self.core.obs.ma,
        );
        let ld = self.gain_ld();
        let a = &self.ws.gain_array;
        let mut rng = stream(self.cfg.seed, self.step, Purpose::Perturbation);
        let zs = &self.pobs.zs;
        for j in 0..nn {
            // dⱼ = z + L_R εⱼ − h(xⱼ) over accepted rows.
            for a in 0..ma {
                self.ws.draws[a] = rng.sample(StandardNormal);
            }
            for a in (0..ma).rev() {
                let lre: f64 = (0..=a)
                    .map(|b| self.ws.noise_factor[a + b * ma] * self.ws.draws[b])
                    .sum();
                let row = self.core.obs.keep[a];
                self.ws.innovation[a] = self.core.obs.z[row] + lre - zs[row * nn + j];
            }
            solve_lower_strided(a, ld, ma, &mut self.ws.innovation[..ma]);
            for i in 0..n {
                let inc: f64 = (0..ma)
                    .map(|b| a[(ma + i) + b * ld] * self.ws.innovation[b])
                    .sum();
                self.ensemble[(j, i)] += inc;
            }
        }
    }
}
