//! Unscented Kalman filter with the scaled unscented transform.
//!
//! Sigma points from a square-root factor L of P (P = L Lᵀ, in `states` order):
//!   λ = α²(n + κ) − n,  γ = √(n+λ),  X₀ = m,  X_j± = m ± γ L_j,
//!   W₀ᵐ = λ/(n+λ),  W₀ᶜ = λ/(n+λ) + 1 − α² + β,  W_jᵐ = W_jᶜ = 1/(2(n+λ))
//! (Julier & Uhlmann 2004, Proc. IEEE 92(3); scaled weights: Wan & van der Merwe 2000).
//! Prediction moves every point through the dynamics and adds the interval's process noise
//! (factor: the semi-definite Cholesky factor of P).
//!
//! Update (Särkkä 2013, *Bayesian Filtering and Smoothing*, §5.6), in the square-root
//! array form of [`crate::linalg::array_update`]. The points are drawn from the factor L
//! the array update uses (Cholesky, or the clipped eigen root when P is only
//! semi-definite); with Z the sensors at the points and ẑ = Σ Wᵐ Z, the statistical
//! linear regression of z on x (Lefebvre, Bruyninckx & De Schutter 2002, IEEE TAC 47(8))
//! has, in whitened coordinates, the slope G (m × n) with columns
//!   G_j = (Z_j+ − Z_j−) / (2γ),  so that  C = Cov(x, z) = L Gᵀ
//! exactly (X_j± − m = ±γ L_j), with no inversion of L. Splitting each pair's outer
//! products, a aᵀ + b bᵀ = ½(a − b)(a − b)ᵀ + ½(a + b)(a + b)ᵀ, gives
//!   P_zz = G Gᵀ + E,  E = W₀ᶜ (Z₀ − ẑ)(Z₀ − ẑ)ᵀ + Σ_j (Z_j+ + Z_j− − 2ẑ)(…)ᵀ / (4γ²),
//! the remainder E formed directly (second-order terms only, so nothing cancels against
//! the huge first-order G Gᵀ). R_eff = R + E is the effective reading noise and the
//! update is the array update with H L replaced by G:
//!   [R_eff^{1/2}, G; 0, L] Θ = [S^{1/2}, 0; K̄, L⁺],  x⁺ = x + K̄ S^{-1/2} ν,  P⁺ = L⁺ L⁺ᵀ.
//! E is positive semi-definite when W₀ᶜ ≥ 0 (the defaults α = 1, β = 2, κ = 0 give
//! W₀ᶜ = 2); with a negative W₀ᶜ (small α) it may not be, and is then clipped to its
//! positive semi-definite part (negative eigenvalues set to zero) before R is added, so
//! S and P⁺ stay positive definite; that case is slightly more conservative than the
//! plain form.
//! Fails with a typed error if P is indefinite beyond rounding or a value is non-finite.

use crate::filter::observe::PointObserver;
use crate::filter::shared::FilterCore;
use crate::filter::{Estimator, FilterError};
use crate::linalg::{cholesky_psd, noise_factor, symmetric_eigen, ArrayError, ArrayUpdate};
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
    /// The factor of P and the buffers of the array update.
    arr: ArrayUpdate,
    /// The regression slope G (`m × n`) over all rows, then over the accepted rows.
    g: Vec<f64>,
    g_acc: Vec<f64>,
    /// The remainder E (`m × m`), and R + E over the accepted rows with its factor.
    e: Vec<f64>,
    r_eff: Vec<f64>,
    lr: Vec<f64>,
    /// The mean's change (`n`).
    dx: Vec<f64>,
    /// Eigen buffers for clipping E (`m × m`, `m`, `3m`).
    e_vec: Vec<f64>,
    e_val: Vec<f64>,
    e_scratch: Vec<f64>,
}

/// Sigma points X₀ = m, X_j± = m ± γ L_j as rows of `sigma`, from the `n × n` factor `l`
/// (column-major, any square root of P, triangular or not).
fn fill_sigma(sigma: &mut DMatrix<f64>, mean: &DVector<f64>, l: &[f64], scale: f64) {
    let n = mean.len();
    for i in 0..n {
        let m = mean[i];
        sigma[(0, i)] = m;
        for k in 0..n {
            let d = scale * l[i + k * n];
            sigma[(1 + k, i)] = m + d;
            sigma[(1 + n + k, i)] = m - d;
        }
    }
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
        let mm: usize = model.sensors.iter().map(|s| s.dim).sum();
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
            arr: ArrayUpdate::new(n, mm),
            g: vec![0.0; mm * n],
            g_acc: vec![0.0; mm * n],
            e: vec![0.0; mm * mm],
            r_eff: vec![0.0; mm * mm],
            lr: vec![0.0; mm * mm],
            dx: vec![0.0; n],
            e_vec: vec![0.0; mm * mm],
            e_val: vec![0.0; mm],
            e_scratch: vec![0.0; 3 * mm],
        })
    }

    /// Draw sigma points (rows of `sigma`) from the current mean and covariance, for the
    /// prediction: the semi-definite Cholesky factor (its tolerance zeroes a pivot below
    /// 1e-10 of the largest variance; the update draws from the array factor instead).
    fn draw(&mut self) -> Result<(), FilterError> {
        let n = self.core.mean.len();
        cholesky_psd(self.core.cov.as_slice(), &mut self.l, n)
            .map_err(|_| FilterError::NotPositive("state covariance"))?;
        fill_sigma(&mut self.sigma, &self.core.mean, &self.l, self.scale);
        Ok(())
    }

    /// From the sensors at the points (`pobs.zs`): ẑ into the update buffers, the slope G
    /// and the remainder E of the module doc over all `m` rows.
    fn regression(&mut self, m: usize) {
        let (n, pts) = (self.core.mean.len(), self.sigma.nrows());
        let zs = &self.pobs.zs;
        for r in 0..m {
            self.core.obs.zhat[r] = (0..pts).map(|k| self.wm[k] * zs[r * pts + k]).sum();
        }
        let (g2, inv4) = (2.0 * self.scale, 0.25 / (self.scale * self.scale));
        let zhat = &self.core.obs.zhat;
        for j in 0..n {
            for r in 0..m {
                self.g[r + j * m] = (zs[r * pts + 1 + j] - zs[r * pts + 1 + n + j]) / g2;
            }
        }
        // Second differences Z_j+ + Z_j− − 2ẑ (each pair's sum) and Z₀ − ẑ.
        let second = |r: usize, j: usize| {
            (zs[r * pts + 1 + j] - zhat[r]) + (zs[r * pts + 1 + n + j] - zhat[r])
        };
        for c in 0..m {
            for r in 0..=c {
                let centre = self.wc[0] * (zs[r * pts] - zhat[r]) * (zs[c * pts] - zhat[c]);
                let pairs: f64 = (0..n).map(|j| second(r, j) * second(c, j)).sum();
                let v = centre + pairs * inv4;
                self.e[r + c * m] = v;
                self.e[c + r * m] = v;
            }
        }
    }

    /// E with a negative centre weight may be indefinite: replace it by its positive
    /// semi-definite part V Λ₊ Vᵀ (negative eigenvalues set to zero).
    fn clip_remainder(&mut self, m: usize) -> Result<(), FilterError> {
        if m == 1 {
            self.e[0] = self.e[0].max(0.0);
            return Ok(());
        }
        self.e_vec[..m * m].copy_from_slice(&self.e[..m * m]);
        if !symmetric_eigen(
            &mut self.e_vec[..m * m],
            &mut self.e_val[..m],
            &mut self.e_scratch[..3 * m],
            m,
        ) {
            return Err(FilterError::NonFinite("predicted reading"));
        }
        if self.e_val[..m].iter().all(|&v| v >= 0.0) {
            return Ok(());
        }
        let (v, d) = (&self.e_vec, &self.e_val);
        for c in 0..m {
            for r in 0..m {
                self.e[r + c * m] = (0..m)
                    .map(|k| v[r + k * m] * d[k].max(0.0) * v[c + k * m])
                    .sum();
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
        // A negative centre weight can leave a negative variance (issue 15: −9.5e69).
        crate::filter::predict::ensure_variances(&self.core.cov, "predicted covariance")
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
        self.arr
            .factor(self.core.cov.as_slice())
            .map_err(|e| match e {
                ArrayError::NonFinite => FilterError::NonFinite("predicted covariance"),
                _ => FilterError::NotPositive("state covariance"),
            })?;
        fill_sigma(
            &mut self.sigma,
            &self.core.mean,
            self.arr.factor_l(),
            self.scale,
        );
        self.pobs
            .eval(model, &self.core.obs.checks, &self.sigma, u, t);
        let (n, m, pts) = (self.core.mean.len(), self.core.obs.m, self.sigma.nrows());
        self.regression(m);
        if self.wc[0] < 0.0 {
            self.clip_remainder(m)?;
        }
        // S = G Gᵀ + E (the gate adds R), C = L Gᵀ (the module doc).
        let (g, l) = (&self.g, self.arr.factor_l());
        for c in 0..m {
            for r in 0..m {
                let gg: f64 = (0..n).map(|j| g[r + j * m] * g[c + j * m]).sum();
                self.core.obs.s[r + c * m] = gg + self.e[r + c * m];
            }
            for i in 0..n {
                self.core.obs.c[i + c * n] = (0..n).map(|j| l[i + j * n] * g[c + j * m]).sum();
            }
        }
        debug_assert_eq!(pts, 2 * n + 1);
        if !self.core.obs.gate(gate)? {
            return Ok(false);
        }
        let ma = self.core.obs.ma;
        let obs = &self.core.obs;
        for (a, &ra) in obs.keep.iter().enumerate() {
            for j in 0..n {
                self.g_acc[a + j * ma] = self.g[ra + j * m];
            }
            for (b, &rb) in obs.keep.iter().enumerate() {
                self.r_eff[a + b * ma] = obs.r_acc[a + b * ma] + self.e[ra + rb * m];
            }
        }
        noise_factor(&self.r_eff[..ma * ma], &mut self.lr, ma)
            .map_err(|_| FilterError::NotPositive("innovation covariance"))?;
        let (nis, log_det) = self
            .arr
            .block(
                &self.lr[..ma * ma],
                &self.g_acc[..ma * n],
                &self.core.obs.nu_acc[..ma],
                ma,
                &mut self.dx,
            )
            .map_err(|e| match e {
                ArrayError::NonFinite => FilterError::NonFinite("predicted reading"),
                _ => FilterError::NotPositive("innovation covariance"),
            })?;
        for (x, d) in self.core.mean.iter_mut().zip(&self.dx) {
            *x += d;
        }
        self.arr.covariance(self.core.cov.as_mut_slice());
        self.core.obs.joint_nis = nis;
        self.core.obs.log_det_s = log_det;
        self.core.finish_update(&self.dx)?;
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

#[cfg(test)]
mod tests {
    use super::*;
    use crate::filter::test_fixtures::{integration, three_states, two_sensors};
    use crate::model::Instant;

    /// The plain unscented update (Särkkä 2013, §5.6): points from nalgebra's Cholesky
    /// factor, P_zz and C as weighted sums, K = C S⁻¹, P⁺ = P − K S Kᵀ. Returns
    /// (x⁺, P⁺, S).
    fn plain_update(
        mean: &DVector<f64>,
        p: &DMatrix<f64>,
        z: &DVector<f64>,
        r: &DMatrix<f64>,
        alpha: f64,
    ) -> (DVector<f64>, DMatrix<f64>, DMatrix<f64>) {
        let (n, beta) = (3usize, 2.0);
        let lambda = alpha * alpha * n as f64 - n as f64;
        let c = n as f64 + lambda;
        let l = p.clone().cholesky().unwrap().l();
        let h = |x: &DVector<f64>| DVector::from_vec(vec![x[0] + x[2], x[1] * x[1], x[0]]);
        let mut xs = vec![mean.clone()];
        for sign in [1.0, -1.0] {
            for k in 0..n {
                xs.push(mean + l.column(k) * (sign * c.sqrt()));
            }
        }
        let wm: Vec<f64> = (0..=2 * n)
            .map(|k| if k == 0 { lambda / c } else { 0.5 / c })
            .collect();
        let mut wc = wm.clone();
        wc[0] += 1.0 - alpha * alpha + beta;
        let zs: Vec<DVector<f64>> = xs.iter().map(h).collect();
        let zhat = zs
            .iter()
            .zip(&wm)
            .fold(DVector::zeros(3), |a, (z, w)| a + z * *w);
        let mut s = r.clone();
        let mut cxz = DMatrix::zeros(n, 3);
        for k in 0..=2 * n {
            let dz = &zs[k] - &zhat;
            s += &dz * dz.transpose() * wc[k];
            cxz += (&xs[k] - mean) * dz.transpose() * wc[k];
        }
        let k = &cxz * s.clone().try_inverse().unwrap();
        (mean + &k * (z - zhat), p - &k * &s * k.transpose(), s)
    }

    #[test]
    fn array_update_equals_the_plain_unscented_update() {
        // The regression split P_zz = G Gᵀ + E and C = L Gᵀ are identities (module doc):
        // on a well-conditioned case with W₀ᶜ = 2 ≥ 0 the array update must give the plain
        // form's mean and covariance to rounding, and ln det S must equal the determinant
        // of the plain S (nalgebra's LU, an independent computation).
        let model = three_states(two_sensors());
        let mean = DVector::from_vec(vec![1.0, 0.5, -0.2]);
        let p = DMatrix::from_row_slice(3, 3, &[0.4, 0.1, 0.0, 0.1, 0.3, 0.05, 0.0, 0.05, 0.2]);
        let params = Unscented {
            alpha: 1.0,
            beta: 2.0,
            kappa: 0.0,
        };
        let mut f = Ukf::new(&model, integration(), &params, mean.clone(), p.clone()).unwrap();
        let reading = Reading {
            t: Instant::seconds(0.0),
            sensors: vec![(0, 0), (1, 1)],
            z: vec![0.6, 0.4, 1.3],
            ..Default::default()
        };
        assert!(f.update(&model, &reading, &[], 0.0, None).unwrap());
        let r = DMatrix::from_diagonal(&DVector::from_vec(vec![0.09, 0.25, 0.04]));
        let z = DVector::from_vec(reading.z.clone());
        let (xm, pm, s) = plain_update(&mean, &p, &z, &r, 1.0);
        for (a, b) in f.core.mean.iter().zip(xm.iter()) {
            assert!((a - b).abs() < 1e-12 * (1.0 + b.abs()), "mean {a} vs {b}");
        }
        for (a, b) in f.core.cov.iter().zip(pm.iter()) {
            assert!((a - b).abs() < 1e-12 * (1.0 + b.abs()), "cov {a} vs {b}");
        }
        let want = s.determinant().ln();
        assert!((f.core.obs.log_det_s - want).abs() < 1e-12, "{want}");
    }

    #[test]
    fn negative_centre_weight_keeps_the_posterior_positive_definite() {
        // α = 0.5 gives W₀ᶜ = −0.25 (scaled weights, Wan & van der Merwe 2000): E is
        // clipped, so S and P⁺ stay positive definite (Cholesky succeeds) and P⁺ is no
        // larger than the prior on the read state a.
        let model = three_states(two_sensors());
        let mean = DVector::from_vec(vec![1.0, 0.5, -0.2]);
        let p = DMatrix::from_row_slice(3, 3, &[0.4, 0.1, 0.0, 0.1, 0.3, 0.05, 0.0, 0.05, 0.2]);
        let params = Unscented {
            alpha: 0.5,
            beta: 2.0,
            kappa: 0.0,
        };
        let mut f = Ukf::new(&model, integration(), &params, mean, p.clone()).unwrap();
        assert!(f.wc[0] < 0.0);
        let reading = Reading {
            t: Instant::seconds(0.0),
            sensors: vec![(1, 0)],
            z: vec![0.4, 1.3],
            ..Default::default()
        };
        assert!(f.update(&model, &reading, &[], 0.0, None).unwrap());
        assert!(f.core.cov.clone().cholesky().is_some(), "{}", f.core.cov);
        assert!(f.core.cov[(0, 0)] <= p[(0, 0)]);
        assert!(f.core.obs.log_det_s.is_finite());
    }
}
