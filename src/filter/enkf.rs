//! Ensemble Kalman filter: members (rows of an `N × n` matrix) move through the dynamics,
//! the interval's process noise is sampled onto them, forecast anomalies are inflated, and
//! the analysis is either
//! - `perturbed`: each member is updated with its own perturbed reading z + εⱼ, εⱼ ~ N(0, R),
//!   with K = C S⁻¹, C = X'Y'ᵀ/(N−1), S = Y'Y'ᵀ/(N−1) + R (Burgers, van Leeuwen & Evensen
//!   1998, MWR 126), or
//! - `deterministic`: the ensemble transform (ETKF) in the ensemble space, with
//!   Ỹ = L_R⁻¹ Y', P̃ = [(N−1) I + ỸᵀỸ]⁻¹, w̄ = P̃ Ỹᵀ L_R⁻¹ (z − ȳ),
//!   W = [(N−1) P̃]^{1/2} (symmetric square root), Xₐ = x̄ + X'(w̄ + W)
//!   (Bishop, Etherton & Majumdar 2001, MWR 129; Hunt, Kostelich & Szunyogh 2007,
//!   Physica D 230, §2.3).
//!
//! Every random draw comes from a ChaCha20 stream selected by (seed, step, purpose), so a run
//! split into requests that carry `members` and `step` continues bit for bit.

use crate::filter::observe::{ObsSpace, PointObserver};
use crate::filter::predict::Predictor;
use crate::filter::{Estimator, FilterError};
use crate::linalg::{
    all_finite, cholesky, cholesky_psd, dot4, gemm_nn, gemm_nt_upper, solve_lower, symmetric_eigen,
    symmetrize,
};
use crate::spec::model::{Ensemble, EnsembleUpdate, Integration, Model};
use crate::spec::reading::Reading;
use nalgebra::{DMatrix, DVector};
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha20Rng;
use rand_distr::StandardNormal;

/// Which draw a random stream serves.
#[derive(Clone, Copy)]
enum Purpose {
    ProcessNoise = 0,
    Perturbation = 1,
    Initial = 2,
    SidePrediction = 3,
}

fn stream(seed: u64, step: u64, purpose: Purpose) -> ChaCha20Rng {
    let mut r = ChaCha20Rng::seed_from_u64(seed);
    r.set_stream(step.wrapping_mul(4).wrapping_add(purpose as u64));
    r
}

/// The ensemble filter's members and buffers.
#[derive(Debug, Clone)]
pub struct Enkf {
    x: DMatrix<f64>,
    mean: DVector<f64>,
    cov: DMatrix<f64>,
    /// Whether the members changed since `cov` was computed.
    cov_stale: bool,
    cfg: Ensemble,
    step: u64,
    side: bool,
    always_full: bool,
    pred: Predictor,
    obs: ObsSpace,
    pobs: PointObserver,
    w: Vec<f64>,
    q: DMatrix<f64>,
    lq: Vec<f64>,
    lr: Vec<f64>,
    /// Whether the accepted readings' noise (and so `lr`) is diagonal: independent
    /// sensors, the usual case, where whitening is one multiplication per entry.
    lr_diagonal: bool,
    /// 1/√R_aa of the accepted readings when `lr_diagonal`.
    inv_sd: Vec<f64>,
    ybar: Vec<f64>,
    eps: Vec<f64>,
    prev: DMatrix<f64>,
    prev_mean: DVector<f64>,
    cross: DMatrix<f64>,
    // ETKF buffers.
    yt: DMatrix<f64>,
    big: DMatrix<f64>,
    wbar: DVector<f64>,
    gvec: DVector<f64>,
    dtil: Vec<f64>,
    trans: DMatrix<f64>,
    xa: DMatrix<f64>,
    /// Eigenvectors scaled by 1/√λ, `N × N`.
    scaled: Vec<f64>,
    /// Member anomalies, member-major (`N × n`, like the members).
    xanom: Vec<f64>,
    // Contiguous scratch so that sums over members run with the output index innermost
    // (vectorised, no long chain of dependent additions); each output still adds its terms
    // in member order, so results are the same bit for bit as plain dot products.
    /// Member anomalies, state-major: `anom[i + k n] = x_ki − x̄_i`.
    anom: Vec<f64>,
    /// Predicted-reading anomalies, row-major per member: `za[r + k m] = y_rk − ȳ_r`.
    za: Vec<f64>,
    /// Ỹ transposed: `ytt[j + a N] = Ỹ_aj`.
    ytt: Vec<f64>,
    /// √λ of the transform's eigenvalues.
    sq: Vec<f64>,
    /// Running sums, one per output of the innermost loop.
    acc: Vec<f64>,
    /// Eigenvalues of the transform's symmetric matrix, and the solver's scratch (3 per row).
    lam: Vec<f64>,
    escr: Vec<f64>,
    /// G = Ỹ Ỹᵀ of the low-rank form, then its eigenvectors.
    gbuf: Vec<f64>,
}

/// `L_R⁻¹ v` in place for the `ma × ma` lower factor `lr`; a diagonal factor multiplies
/// entry by entry by `inv_sd`, the reciprocals of its diagonal (the triangular solve's
/// values to rounding, without its O(ma²) loop or a division per entry).
fn whiten(lr: &[f64], inv_sd: &[f64], diagonal: bool, ma: usize, v: &mut [f64]) {
    if diagonal {
        for (x, &w) in v.iter_mut().zip(&inv_sd[..ma]) {
            *x *= w;
        }
    } else {
        solve_lower(&lr[..ma * ma], ma, v);
    }
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
            x,
            mean: DVector::zeros(n),
            cov: DMatrix::zeros(n, n),
            cov_stale: true,
            cfg,
            step,
            side: false,
            always_full: false,
            pred: Predictor::new(model, integration, nn),
            obs: ObsSpace::new(model),
            pobs: PointObserver::new(model, nn),
            w: vec![1.0 / nn as f64; nn],
            q: DMatrix::zeros(n, n),
            lq: vec![0.0; n * n],
            lr: vec![0.0; mm * mm],
            lr_diagonal: false,
            inv_sd: vec![0.0; mm],
            ybar: vec![0.0; mm],
            eps: vec![0.0; mm.max(n)],
            prev: DMatrix::zeros(nn, n),
            prev_mean: DVector::zeros(n),
            cross: DMatrix::zeros(n, n),
            yt: DMatrix::zeros(mm, nn),
            big: DMatrix::zeros(nn, nn),
            wbar: DVector::zeros(nn),
            gvec: DVector::zeros(nn),
            dtil: vec![0.0; mm],
            trans: DMatrix::zeros(nn, nn),
            xa: DMatrix::zeros(nn, n),
            scaled: vec![0.0; nn * nn],
            xanom: vec![0.0; nn * n],
            anom: vec![0.0; n * nn],
            za: vec![0.0; mm * nn],
            ytt: vec![0.0; nn * mm],
            sq: vec![0.0; nn],
            acc: vec![0.0; n.max(mm).max(nn)],
            lam: vec![0.0; nn.max(mm)],
            escr: vec![0.0; 3 * nn.max(mm)],
            gbuf: vec![0.0; mm * mm],
        };
        f.refresh_moments();
        Ok(f)
    }

    /// Ensemble mean from the members; the covariance is left stale until
    /// [`Estimator::settle`] (the analysis needs only the mean and the members, so one
    /// covariance per line is enough, not one after every change of the members).
    fn refresh_mean(&mut self) {
        let (nn, n) = (self.x.nrows(), self.x.ncols());
        // Four columns at a time: four independent chains of additions, each still adding
        // its members in order from −0.0 (as `Iterator::sum` does).
        let xs = self.x.as_slice();
        let mut i = 0;
        while i + 4 <= n {
            let mut acc = [-0.0; 4];
            for k in 0..nn {
                for (q, a) in acc.iter_mut().enumerate() {
                    *a += xs[k + (i + q) * nn];
                }
            }
            for (q, a) in acc.iter().enumerate() {
                self.mean[i + q] = a / nn as f64;
            }
            i += 4;
        }
        for i in i..n {
            self.mean[i] = self.x.column(i).iter().sum::<f64>() / nn as f64;
        }
        self.cov_stale = true;
    }

    /// Ensemble mean and covariance (divisor N − 1) from the members.
    fn refresh_moments(&mut self) {
        self.refresh_mean();
        self.refresh_covariance();
    }

    /// Ensemble covariance (divisor N − 1) about the current mean.
    fn refresh_covariance(&mut self) {
        let (nn, n) = (self.x.nrows(), self.x.ncols());
        self.cov_stale = false;
        self.fill_anomalies();
        // Σₖ (x_ki − x̄_i)(x_kj − x̄_j) for i ≤ j, mirrored.
        gemm_nt_upper(&self.anom, &self.anom, self.cov.as_mut_slice(), (n, nn, n));
        for j in 0..n {
            for i in 0..=j {
                let s = self.cov[(i, j)] / (nn as f64 - 1.0);
                self.cov[(i, j)] = s;
                self.cov[(j, i)] = s;
            }
        }
    }

    /// `anom[i + k n] = x_ki − x̄_i` from the current members and mean.
    fn fill_anomalies(&mut self) {
        let (nn, n) = (self.x.nrows(), self.x.ncols());
        let xs = self.x.as_slice();
        for i in 0..n {
            let m = self.mean[i];
            for (k, &v) in xs[i * nn..(i + 1) * nn].iter().enumerate() {
                self.anom[i + k * n] = v - m;
            }
        }
        debug_assert_eq!(self.anom.len(), n * nn);
    }

    fn perturbed(&mut self) {
        let (nn, n, ma) = (self.x.nrows(), self.x.ncols(), self.obs.ma);
        let mut rng = stream(self.cfg.seed, self.step, Purpose::Perturbation);
        let zs = &self.pobs.zs;
        for j in 0..nn {
            // dⱼ = z + L_R εⱼ − h(xⱼ) over accepted rows.
            for a in 0..ma {
                self.eps[a] = rng.sample(StandardNormal);
            }
            for a in (0..ma).rev() {
                let lre: f64 = (0..=a).map(|b| self.lr[a + b * ma] * self.eps[b]).sum();
                let row = self.obs.keep[a];
                self.dtil[a] = self.obs.z[row] + lre - zs[row * nn + j];
            }
            for i in 0..n {
                let inc: f64 = (0..ma)
                    .map(|a| self.obs.kt[a + i * ma] * self.dtil[a])
                    .sum();
                self.x[(j, i)] += inc;
            }
        }
    }

    fn transform(&mut self) -> Result<(), FilterError> {
        let (nn, n, ma) = (self.x.nrows(), self.x.ncols(), self.obs.ma);
        let mm = self.yt.nrows();
        let zs = &self.pobs.zs;
        let nf = nn as f64;
        // Ỹ = L_R⁻¹ Y' (ma × N) and d̃ = L_R⁻¹ (z − ȳ).
        if self.lr_diagonal {
            // Row a of Ỹ is the contiguous row of predicted readings over the members,
            // scaled: build Ỹᵀ (`ytt`) in that order, then Ỹ from it.
            for a in 0..ma {
                let row = self.obs.keep[a];
                let (yb, w) = (self.ybar[row], self.inv_sd[a]);
                let src = &zs[row * nn..(row + 1) * nn];
                for (t, &z) in self.ytt[a * nn..(a + 1) * nn].iter_mut().zip(src) {
                    *t = (z - yb) * w;
                }
            }
            let (ytt, yt) = (&self.ytt, self.yt.as_mut_slice());
            for j in 0..nn {
                for a in 0..ma {
                    yt[a + j * mm] = ytt[j + a * nn];
                }
            }
        } else {
            for j in 0..nn {
                for a in 0..ma {
                    let row = self.obs.keep[a];
                    self.eps[a] = zs[row * nn + j] - self.ybar[row];
                }
                solve_lower(&self.lr[..ma * ma], ma, &mut self.eps[..ma]);
                for a in 0..ma {
                    self.yt[(a, j)] = self.eps[a];
                }
            }
            for a in 0..ma {
                for j in 0..nn {
                    self.ytt[j + a * nn] = self.yt[(a, j)];
                }
            }
        }
        for a in 0..ma {
            self.dtil[a] = self.obs.nu_acc[a];
        }
        whiten(
            &self.lr,
            &self.inv_sd,
            self.lr_diagonal,
            ma,
            &mut self.dtil[..ma],
        );
        if ma < nn && !self.always_full {
            return self.transform_low_rank();
        }
        // A = (N−1) I + ỸᵀỸ, column j for all i ≤ j at once from Ỹ transposed.
        gemm_nt_upper(&self.ytt, &self.ytt, self.big.as_mut_slice(), (nn, ma, nn));
        for j in 0..nn {
            self.big[(j, j)] += nf - 1.0;
            for i in 0..j {
                self.big[(j, i)] = self.big[(i, j)];
            }
        }
        // Eigenvectors overwrite `big`.
        if !symmetric_eigen(self.big.as_mut_slice(), &mut self.lam, &mut self.escr, nn)
            || self.lam[..nn].iter().any(|l| !(*l > 0.0))
        {
            return Err(FilterError::NotPositive("ensemble transform matrix"));
        }
        // w̄ = V Λ⁻¹ Vᵀ Ỹᵀ d̃ ; W = √(N−1) V Λ^{-1/2} Vᵀ.
        let v = self.big.as_slice();
        // Each sum below runs over its index in order from −0.0, with the outputs as
        // independent running sums (the inner loops are over outputs, so they vectorise).
        // Ỹᵀ d̃ once (it does not depend on k), kept in `sq` until the square roots below.
        let sq = &mut self.sq[..nn];
        sq.fill(-0.0);
        for a in 0..ma {
            let d = self.dtil[a];
            for (s, &y) in sq.iter_mut().zip(&self.ytt[a * nn..(a + 1) * nn]) {
                *s += y * d;
            }
        }
        // g = Λ⁻¹ Vᵀ (Ỹᵀ d̃).
        let g = &mut self.gvec.as_mut_slice()[..nn];
        g.fill(-0.0);
        for j in 0..nn {
            let sj = sq[j];
            for (gk, vk) in g.iter_mut().zip(v[j..].iter().step_by(nn)) {
                *gk += vk * sj;
            }
        }
        for (gk, &l) in g.iter_mut().zip(&self.lam[..nn]) {
            *gk /= l;
        }
        // w̄ = V g.
        let wbar = &mut self.wbar.as_mut_slice()[..nn];
        wbar.fill(-0.0);
        for k in 0..nn {
            let gk = g[k];
            for (w, &vjk) in wbar.iter_mut().zip(&v[k * nn..(k + 1) * nn]) {
                *w += vjk * gk;
            }
        }
        let v = &self.big;
        // T(i, j) = c Σₗ vᵢₗ vⱼₗ / √λₗ + w̄ᵢ, stored transposed (`trans[(j, i)] = T(i, j)`)
        // so that the next product runs down contiguous columns.
        let c = (nf - 1.0).sqrt();
        for l in 0..nn {
            self.sq[l] = self.lam[l].sqrt();
        }
        // Σₗ (vᵢₗ/√λₗ) vⱼₗ for i ≤ j (the sum is symmetric), one division per l.
        for l in 0..nn {
            let inv = 1.0 / self.sq[l];
            for i in 0..nn {
                self.scaled[i + l * nn] = v[(i, l)] * inv;
            }
        }
        gemm_nt_upper(
            &self.scaled,
            v.as_slice(),
            self.trans.as_mut_slice(),
            (nn, nn, nn),
        );
        for j in 0..nn {
            for i in 0..=j {
                let sum = self.trans[(i, j)];
                self.trans[(j, i)] = c * sum + self.wbar[i];
                self.trans[(i, j)] = c * sum + self.wbar[j];
            }
        }
        // Xₐ(j, :) = x̄ + Σ_k X'(k, :) T(k, j): with `trans` = Tᵀ, Xₐ − x̄ = Tᵀ X'.
        let xs = self.x.as_slice();
        for i in 0..n {
            let m = self.mean[i];
            let col = &xs[i * nn..(i + 1) * nn];
            for (d, &x) in self.xanom[i * nn..(i + 1) * nn].iter_mut().zip(col) {
                *d = x - m;
            }
        }
        gemm_nn(
            self.trans.as_slice(),
            &self.xanom,
            self.xa.as_mut_slice(),
            (nn, nn, n),
            false,
        );
        let (xs, xa) = (self.x.as_mut_slice(), self.xa.as_slice());
        for i in 0..n {
            let m = self.mean[i];
            let col = &xa[i * nn..(i + 1) * nn];
            for (x, &d) in xs[i * nn..(i + 1) * nn].iter_mut().zip(col) {
                *x = m + d;
            }
        }
        Ok(())
    }
}

impl Enkf {
    /// The same transform through the eigenpairs of the small `ma × ma` matrix G = Ỹ Ỹᵀ when
    /// there are fewer readings than members. With G = U Σ² Uᵀ and vₖ = Ỹᵀ uₖ / σₖ,
    /// (N−1)I + ỸᵀỸ has eigenvalues N−1+σₖ² on vₖ and N−1 elsewhere, so
    ///   w̄ = Σₖ vₖ σₖ (uₖᵀ d̃) / (N−1+σₖ²),  W = I + Σₖ (cₖ − 1) vₖ vₖᵀ,
    ///   cₖ = √((N−1)/(N−1+σₖ²)),
    /// exactly as the full form, at O(N n m) cost instead of O(N³).
    fn transform_low_rank(&mut self) -> Result<(), FilterError> {
        let (nn, n, ma) = (self.x.nrows(), self.x.ncols(), self.obs.ma);
        let nf = nn as f64;
        let g = &mut self.gbuf[..ma * ma];
        for b in 0..ma {
            for a in 0..=b {
                let v: f64 = (0..nn).map(|j| self.yt[(a, j)] * self.yt[(b, j)]).sum();
                g[a + b * ma] = v;
                g[b + a * ma] = v;
            }
        }
        // Eigenvectors overwrite `gbuf`.
        if !symmetric_eigen(g, &mut self.lam, &mut self.escr, ma) {
            return Err(FilterError::NonFinite("ensemble transform matrix"));
        }
        let scale = self.lam[..ma].iter().cloned().fold(0.0, f64::max);
        // Anomaly of each member: X'ⱼ = xⱼ − x̄, kept in `xa`.
        for i in 0..n {
            for j in 0..nn {
                self.xa[(j, i)] = self.x[(j, i)] - self.mean[i];
            }
        }
        self.wbar.fill(0.0);
        for k in 0..ma {
            let s2 = self.lam[k];
            if !(s2 > 1e-14 * scale) {
                continue;
            }
            let sigma = s2.sqrt();
            let u = &self.gbuf[k * ma..(k + 1) * ma];
            for j in 0..nn {
                self.gvec[j] = (0..ma).map(|a| self.yt[(a, j)] * u[a]).sum::<f64>() / sigma;
            }
            let ud: f64 = (0..ma).map(|a| u[a] * self.dtil[a]).sum();
            let wk = sigma * ud / (nf - 1.0 + s2);
            let ck = ((nf - 1.0) / (nf - 1.0 + s2)).sqrt();
            for j in 0..nn {
                self.wbar[j] += self.gvec[j] * wk;
            }
            // Aₖ = Σᵢ X'ᵢ vₖᵢ, then xⱼ += (cₖ − 1) vₖⱼ Aₖ.
            for i in 0..n {
                let a: f64 = (0..nn).map(|j| self.xa[(j, i)] * self.gvec[j]).sum();
                for j in 0..nn {
                    self.x[(j, i)] += (ck - 1.0) * self.gvec[j] * a;
                }
            }
        }
        // + X' w̄ on every member.
        for i in 0..n {
            let b: f64 = (0..nn).map(|j| self.xa[(j, i)] * self.wbar[j]).sum();
            for j in 0..nn {
                self.x[(j, i)] += b;
            }
        }
        Ok(())
    }
}

impl Enkf {
    /// The joint NIS νᵀS⁻¹ν of the accepted rows from the transform's own quantities,
    /// without forming S: with M = I + ỸỸᵀ/(N−1) (so S = L_R M L_Rᵀ), Woodbury's identity
    /// gives M⁻¹d̃ = d̃ − Ỹ [(N−1)I + ỸᵀỸ]⁻¹ Ỹᵀd̃ = d̃ − Ỹw̄ =: r, and
    /// NIS = d̃ᵀM⁻¹d̃ = rᵀMr = rᵀr + |Ỹᵀr|²/(N−1), a sum of squares (never negative).
    /// (Woodbury: Golub & Van Loan 2013, *Matrix Computations*, §2.1.4.)
    fn transform_nis(&mut self) -> f64 {
        let (nn, ma) = (self.x.nrows(), self.obs.ma);
        let mm = self.yt.nrows();
        let yt = self.yt.as_slice();
        let r = &mut self.eps[..ma];
        r.copy_from_slice(&self.dtil[..ma]);
        for j in 0..nn {
            let wj = self.wbar[j];
            for (ra, &y) in r.iter_mut().zip(&yt[j * mm..j * mm + ma]) {
                *ra -= y * wj;
            }
        }
        let rr = dot4(r, r);
        let yr: f64 = (0..nn)
            .map(|j| {
                let t = dot4(&yt[j * mm..j * mm + ma], r);
                t * t
            })
            .sum();
        rr + yr / (nn as f64 - 1.0)
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
            self.prev.copy_from(&self.x);
            self.prev_mean.copy_from(&self.mean);
        }
        let noisy =
            self.pred
                .predict_points(model, &mut self.x, &self.w, u, t0, dt, &mut self.q)?;
        if noisy {
            let n = self.x.ncols();
            symmetrize(&mut self.q);
            cholesky_psd(self.q.as_slice(), &mut self.lq, n)
                .map_err(|_| FilterError::NotPositive("process noise covariance"))?;
            let purpose = if self.side {
                Purpose::SidePrediction
            } else {
                Purpose::ProcessNoise
            };
            let mut rng = stream(self.cfg.seed, self.step, purpose);
            for j in 0..self.x.nrows() {
                for k in 0..n {
                    self.eps[k] = rng.sample(StandardNormal);
                }
                for i in 0..n {
                    let add: f64 = (0..=i).map(|k| self.lq[i + k * n] * self.eps[k]).sum();
                    self.x[(j, i)] += add;
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
            let (nn, n) = (self.x.nrows(), self.x.ncols());
            for j in 0..n {
                for i in 0..n {
                    self.cross[(i, j)] = (0..nn)
                        .map(|k| {
                            (self.prev[(k, i)] - self.prev_mean[i])
                                * (self.x[(k, j)] - self.mean[j])
                        })
                        .sum::<f64>()
                        / (nn as f64 - 1.0);
                }
            }
        }
        if !all_finite(self.x.as_slice()) {
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
        let (nn, n) = (self.x.nrows(), self.x.ncols());
        // Multiplicative inflation of the forecast anomalies.
        if self.cfg.inflation != 1.0 {
            let (xs, infl) = (self.x.as_mut_slice(), self.cfg.inflation);
            for i in 0..n {
                let m = self.mean[i];
                for x in &mut xs[i * nn..(i + 1) * nn] {
                    *x = m + infl * (*x - m);
                }
            }
            self.refresh_mean();
        }
        self.obs.begin(model, reading);
        self.pobs.eval(model, &self.obs.checks, &self.x, u, t);
        let m = self.obs.m;
        let zs = &self.pobs.zs;
        let nf = nn as f64;
        // ȳ_r = Σₖ y_rk / N with the rows as independent running sums (members still
        // added in order, from −0.0 as `Iterator::sum` starts).
        let acc = &mut self.acc[..m];
        acc.fill(-0.0);
        for k in 0..nn {
            for (r, s) in acc.iter_mut().enumerate() {
                *s += zs[r * nn + k];
            }
        }
        for r in 0..m {
            self.ybar[r] = acc[r] / nf;
            self.obs.zhat[r] = self.ybar[r];
        }
        for r in 0..m {
            for k in 0..nn {
                self.za[r + k * m] = zs[r * nn + k] - self.ybar[r];
            }
        }
        // The perturbed update needs all of S and C = Cov(x, y) for K. The transform needs
        // only each sensor's diagonal block of S for its own NIS (only the diagonal, for
        // the answer, when the joint NIS, which it computes itself, settles the line).
        let need_c = self.cfg.update == EnsembleUpdate::Perturbed;
        let only_check = !need_c && self.obs.joint_is_only_check(gate);
        if need_c {
            self.fill_anomalies();
        }
        let za = &self.za[..m * nn];
        if only_check {
            // Only the predicted variance of each row (the answer reports it), all rows'
            // sums at once over each member's contiguous anomalies.
            let acc = &mut self.acc[..m];
            acc.fill(-0.0);
            for zk in za.chunks_exact(m) {
                for (s, &z) in acc.iter_mut().zip(zk) {
                    *s += z * z;
                }
            }
            for r in 0..m {
                self.obs.s[r + r * m] = acc[r] / (nf - 1.0);
            }
        }
        let spans = match (need_c, only_check) {
            (true, _) => 1,
            (false, true) => 0,
            (false, false) => self.obs.checks.len(),
        };
        for span in 0..spans {
            let (lo, hi) = if need_c {
                (0, m)
            } else {
                let ck = &self.obs.checks[span];
                (ck.row, ck.row + ck.dim)
            };
            for c in lo..hi {
                // Rows lo ≤ r ≤ c; the sum is symmetric, so it fills (c, r) as well.
                let acc = &mut self.acc[..=c - lo];
                acc.fill(-0.0);
                for k in 0..nn {
                    let w = za[c + k * m];
                    for (s, &zr) in acc.iter_mut().zip(&za[k * m + lo..k * m + c + 1]) {
                        *s += zr * w;
                    }
                }
                for (d, &sum) in acc.iter().enumerate() {
                    let r = lo + d;
                    self.obs.s[r + c * m] = sum / (nf - 1.0);
                    self.obs.s[c + r * m] = sum / (nf - 1.0);
                }
                if need_c {
                    let acc = &mut self.acc[..n];
                    acc.fill(-0.0);
                    for k in 0..nn {
                        let w = za[c + k * m];
                        for (s, &ai) in acc.iter_mut().zip(&self.anom[k * n..(k + 1) * n]) {
                            *s += ai * w;
                        }
                    }
                    for i in 0..n {
                        self.obs.c[i + c * n] = acc[i] / (nf - 1.0);
                    }
                }
            }
        }
        let any = if need_c {
            self.obs.gate(gate)?
        } else {
            self.obs.gate_blocks(gate)?
        };
        if !any {
            return Ok(false);
        }
        if need_c {
            self.obs.gain()?;
        }
        let ma = self.obs.ma;
        let r = &self.obs.r_acc[..ma * ma];
        // The accepted rows of a diagonal R.
        self.lr_diagonal = self.obs.r_diagonal;
        if self.lr_diagonal {
            // Cholesky of a diagonal matrix: square roots of the diagonal.
            let lr = &mut self.lr[..ma * ma];
            lr.fill(0.0);
            for a in 0..ma {
                let d = r[a + a * ma];
                if !(d > 0.0) || !d.is_finite() {
                    return Err(FilterError::NotPositive("reading noise"));
                }
                let sd = d.sqrt();
                lr[a + a * ma] = sd;
                self.inv_sd[a] = 1.0 / sd;
            }
        } else {
            cholesky(r, &mut self.lr[..ma * ma], ma)
                .map_err(|_| FilterError::NotPositive("reading noise"))?;
        }
        match self.cfg.update {
            EnsembleUpdate::Perturbed => self.perturbed(),
            EnsembleUpdate::Deterministic => {
                self.transform()?;
                let nis = self.transform_nis();
                self.obs.set_joint_nis(nis, only_check);
            }
        }
        self.refresh_mean();
        if !all_finite(self.x.as_slice()) {
            return Err(FilterError::NonFinite("analysis members"));
        }
        Ok(true)
    }

    fn obs(&self) -> &ObsSpace {
        &self.obs
    }

    fn mean(&self) -> &DVector<f64> {
        &self.mean
    }

    fn covariance(&self) -> &DMatrix<f64> {
        debug_assert!(!self.cov_stale, "ensemble covariance read before settle");
        &self.cov
    }

    fn settle(&mut self) {
        if self.cov_stale {
            self.refresh_covariance();
        }
    }

    fn cross(&self) -> &DMatrix<f64> {
        &self.cross
    }

    fn members(&self) -> Option<&DMatrix<f64>> {
        Some(&self.x)
    }

    fn advance_step(&mut self) {
        self.step += 1;
    }

    fn step(&self) -> u64 {
        self.step
    }

    fn set_deadline(&mut self, deadline: Option<std::time::Instant>) {
        self.pred.set_deadline(deadline);
    }

    fn clone_box(&self) -> Box<dyn Estimator> {
        let mut c = self.clone();
        c.side = true;
        Box::new(c)
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::filter::test_fixtures::{etkf, integration, prior, three_states, two_sensors};
    use crate::spec::time::Instant;
    use serde_json::json;

    #[test]
    fn low_rank_transform_equals_full_transform() {
        // Two forms of the same ETKF analysis (Hunt et al. 2007, §2.3) must agree to
        // rounding: the small-eigenproblem form is an identity of linear algebra.
        let model = three_states(json!({"s": {"measures": ["a + c", "b*b"], "std": [0.3, 0.5]}}));
        let cfg = etkf(4);
        let ((mean, cov), integ) = (prior(), integration());
        let mut fast = Enkf::new(&model, integ, cfg, &mean, &cov, None, 0).unwrap();
        let mut full = fast.clone();
        full.always_full = true;
        let reading = Reading {
            t: Instant::seconds(0.0),
            sensors: vec![(0, 0)],
            z: vec![1.3, 0.1],
            ..Default::default()
        };
        assert!(fast.update(&model, &reading, &[], 0.0, None).unwrap());
        assert!(full.update(&model, &reading, &[], 0.0, None).unwrap());
        for (a, b) in fast.x.iter().zip(full.x.iter()) {
            assert!((a - b).abs() < 1e-12 * (1.0 + b.abs()), "{a} vs {b}");
        }
    }

    #[test]
    fn transform_nis_equals_the_direct_innovation_form() {
        // NIS = νᵀS⁻¹ν with S = Y'Y'ᵀ/(N−1) + R formed from the members and solved by
        // nalgebra's Cholesky (the textbook definition, Bar-Shalom et al. 2001, §5.4) must
        // equal the value the transform derives through Woodbury's identity, for the
        // low-rank and the full form, and for a gated line whose NIS comes from the block.
        let model = three_states(two_sensors());
        let cfg = etkf(9);
        let ((mean, cov), integ) = (prior(), integration());
        let base = Enkf::new(&model, integ, cfg, &mean, &cov, None, 0).unwrap();
        let reading = Reading {
            t: Instant::seconds(0.0),
            sensors: vec![(0, 0), (1, 1)],
            z: vec![0.6, 0.4, 1.3],
            ..Default::default()
        };
        // The direct form from the members before the update.
        let nn = 25;
        let h = |x: &DMatrix<f64>, j: usize| {
            DVector::from_vec(vec![
                x[(j, 0)] + x[(j, 2)],
                x[(j, 1)] * x[(j, 1)],
                x[(j, 0)],
            ])
        };
        let ys: Vec<DVector<f64>> = (0..nn).map(|j| h(&base.x, j)).collect();
        let ybar = ys.iter().fold(DVector::zeros(3), |a, y| a + y) / nn as f64;
        let mut s = DMatrix::from_diagonal(&DVector::from_vec(vec![0.09, 0.25, 0.04]));
        for y in &ys {
            s += (y - &ybar) * (y - &ybar).transpose() / (nn as f64 - 1.0);
        }
        let nu = DVector::from_vec(reading.z.clone()) - &ybar;
        let direct = nu.dot(&s.clone().cholesky().unwrap().solve(&nu));
        for full in [false, true] {
            let mut f = base.clone();
            f.always_full = full;
            assert!(f.update(&model, &reading, &[], 0.0, None).unwrap());
            let got = f.obs.joint_nis;
            assert!(
                (got - direct).abs() < 1e-10 * direct,
                "{got} vs {direct} (full {full})"
            );
            // Each row's predicted variance (reported with its innovation).
            for r in 0..3 {
                let got = f.obs.s[r + r * 3];
                assert!((got - s[(r, r)]).abs() < 1e-12 * s[(r, r)], "S_rr {got}");
            }
        }
        // One sensor, gated: its NIS comes from its block, and the joint NIS is that value.
        let one = Reading {
            sensors: vec![(1, 0)],
            z: vec![0.4, 1.3],
            ..reading.clone()
        };
        let s2 = s.view((1, 1), (2, 2)).into_owned();
        let nu2 = nu.rows(1, 2).into_owned();
        let direct2 = nu2.dot(&s2.clone().cholesky().unwrap().solve(&nu2));
        let mut ungated = base.clone();
        assert!(ungated.update(&model, &one, &[], 0.0, None).unwrap());
        let mut gated = base.clone();
        assert!(gated
            .update(&model, &one, &[], 0.0, Some(&[1e9, 1e9]))
            .unwrap());
        for f in [&ungated, &gated] {
            assert_eq!(f.obs.checks[0].nis, f.obs.joint_nis);
            for r in 0..2 {
                let got = f.obs.s[r + r * 2];
                assert!((got - s2[(r, r)]).abs() < 1e-12 * s2[(r, r)], "S_rr {got}");
            }
            let got = f.obs.joint_nis;
            assert!(
                (got - direct2).abs() < 1e-10 * direct2,
                "{got} vs {direct2}"
            );
        }
    }
}
