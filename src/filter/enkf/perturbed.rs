//! The perturbed-observations update (Burgers, van Leeuwen & Evensen 1998, MWR 126): each
//! member is updated with its own perturbed reading, so the analysis ensemble has the
//! Kalman filter's analysis covariance in expectation:
//!
//! ```text
//! x_j ← x_j + K (z + ε_j − h(x_j)),    ε_j = L_R e_j,  e_j ~ N(0, I),  L_R L_Rᵀ = R
//! K = C S⁻¹  (C, S the sample statistics of `analysis.rs`)
//! ```
//!
//! The gain comes from the shared update machinery (`ObsSpace::gain`, stored as `Kᵀ`);
//! the draws from the line's `Perturbation` stream, member by member.

use super::members::{stream, Enkf, Purpose};
use rand::Rng;
use rand_distr::StandardNormal;

impl Enkf {
    /// Add `K (z + L_R ε_j − h(x_j))` to every member `j` over the accepted rows.
    pub(super) fn perturbed_update(&mut self) {
        let (nn, n, ma) = (
            self.ensemble.nrows(),
            self.ensemble.ncols(),
            self.core.obs.ma,
        );
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
            for i in 0..n {
                let inc: f64 = (0..ma)
                    .map(|a| self.core.obs.kt[a + i * ma] * self.ws.innovation[a])
                    .sum();
                self.ensemble[(j, i)] += inc;
            }
        }
    }
}
