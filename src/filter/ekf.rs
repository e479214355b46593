//! Extended Kalman filter.
//!
//! Prediction: see [`crate::filter::predict`] (exact Jacobians of the dynamics).
//! Update over the stacked sensors present on a line, with H = ∂h/∂x exact at the predicted
//! mean (Jazwinski 1970, §8.3; Bar-Shalom et al. 2001, §10.3):
//!   S = H P Hᵀ + R,  K = P Hᵀ S⁻¹,  x⁺ = x + K (z − h(x)),
//!   P⁺ = (I − K H) P (I − K H)ᵀ + K R Kᵀ  (Joseph form, Bucy & Joseph 1968),
//! which stays symmetric positive semi-definite under rounding, then symmetrised.
//! When the accepted readings' noise is uncorrelated (R diagonal, the usual case of
//! independent gauges) the same update is made one row at a time (sequential processing,
//! e.g. Simon 2006, *Optimal State Estimation*, §6.1, from memory), which needs no
//! factorisation and only rank-one corrections; see `Ekf::sequential_update`.
//! Fails (typed error, no NaN) when S is not positive definite or a value is non-finite.

use crate::filter::shared::FilterCore;
use crate::filter::{Estimator, FilterError};
use crate::formula::Workspace;
use crate::linalg::{gemm_nn, gemm_nt, mul_ab, mul_abt};
use crate::model::Reading;
use crate::model::{Integration, Model};
use nalgebra::{DMatrix, DVector};

/// The extended Kalman filter's state and buffers.
#[derive(Debug, Clone)]
pub struct Ekf {
    /// Mean, covariance, cross covariance, update buffers and propagator.
    core: FilterCore,
    sws: Vec<Workspace>,
    vars: Vec<f64>,
    zbuf: Vec<f64>,
    jbuf: Vec<f64>,
    h: Vec<f64>,
    prev_cov: DMatrix<f64>,
    phi: DMatrix<f64>,
    a: DMatrix<f64>,
    t1: DMatrix<f64>,
    kr: Vec<f64>,
    /// The gain `K`, `n × ma`, column-major.
    k: Vec<f64>,
    /// The rows of `H` of the accepted readings, `ma × n`.
    h_acc: Vec<f64>,
    /// One row of `H`, its `P hᵀ`, and the mean's change so far, for the row-at-a-time
    /// update.
    hrow: Vec<f64>,
    ph: Vec<f64>,
    dx: Vec<f64>,
    /// Take the stacked update even when the rows could go one at a time (tests compare
    /// the two).
    always_stacked: bool,
}

impl Ekf {
    /// A filter for `model` starting from `(mean, cov)`.
    pub fn new(
        model: &Model,
        integration: Integration,
        mean: DVector<f64>,
        cov: DMatrix<f64>,
    ) -> Self {
        let n = model.n();
        let mm: usize = model.sensors.iter().map(|s| s.dim).sum();
        let dmax = model.sensors.iter().map(|s| s.dim).max().unwrap_or(1);
        Self {
            core: FilterCore::new(model, integration, 0, mean, cov),
            sws: model
                .sensors
                .iter()
                .map(|s| s.program.workspace())
                .collect(),
            vars: vec![0.0; model.slot_count()],
            zbuf: vec![0.0; dmax],
            jbuf: vec![0.0; dmax * n],
            h: vec![0.0; mm * n],
            prev_cov: DMatrix::zeros(n, n),
            phi: DMatrix::zeros(n, n),
            a: DMatrix::zeros(n, n),
            t1: DMatrix::zeros(n, n),
            kr: vec![0.0; n * mm],
            k: vec![0.0; n * mm],
            h_acc: vec![0.0; mm * n],
            hrow: vec![0.0; n],
            ph: vec![0.0; n],
            dx: vec![0.0; n],
            always_stacked: false,
        }
    }

    /// The update one accepted row a at a time, for uncorrelated reading noise, with the
    /// rows of H taken at the predicted mean (so the result is the stacked EKF update's,
    /// up to rounding). For row h with noise r, against the current mean and covariance:
    ///   c = P hᵀ,  s = h c + r,  k = c / s,  ν = (z − ẑ)ₐ − h Δx,  x ← x + k ν,
    ///   P ← (I − k h) P (I − k h)ᵀ + r k kᵀ = P − k cᵀ − c kᵀ + s k kᵀ
    /// (the Joseph form expanded for a rank-one I − k h), where Δx is the change of the
    /// mean made by the earlier rows. The joint NIS νᵀS⁻¹ν of the stacked form is Σ ν²/s
    /// over the rows (the rows' innovations are the stacked innovation whitened by the
    /// Cholesky factor of S). Returns that NIS.
    fn sequential_update(&mut self) -> Result<f64, FilterError> {
        let (n, m, ma) = (self.core.mean.len(), self.core.obs.m, self.core.obs.ma);
        self.dx.fill(0.0);
        let mut nis = 0.0;
        for a in 0..ma {
            let row = self.core.obs.keep[a];
            for j in 0..n {
                self.hrow[j] = self.h[row + j * m];
            }
            let bufs = RowBuffers {
                p: self.core.cov.as_mut_slice(),
                mean: self.core.mean.as_mut_slice(),
                h: &self.hrow,
                c: &mut self.ph,
                k: &mut self.k,
                dx: &mut self.dx,
            };
            let (nu, r) = (self.core.obs.nu_acc[a], self.core.obs.r_acc[a + a * ma]);
            // The size fixed at compile time for small models, so the loops unroll.
            nis += match n {
                1 => row_update::<1>(bufs, nu, r),
                2 => row_update::<2>(bufs, nu, r),
                3 => row_update::<3>(bufs, nu, r),
                4 => row_update::<4>(bufs, nu, r),
                5 => row_update::<5>(bufs, nu, r),
                6 => row_update::<6>(bufs, nu, r),
                _ => row_update::<0>(bufs, nu, r),
            }?;
        }
        self.core.finish_update()?;
        Ok(nis)
    }
}

/// What one row's update reads and changes (see [`Ekf::sequential_update`]).
struct RowBuffers<'a> {
    p: &'a mut [f64],
    mean: &'a mut [f64],
    h: &'a [f64],
    c: &'a mut [f64],
    /// The row's gain c / s.
    k: &'a mut [f64],
    dx: &'a mut [f64],
}

/// One row of [`Ekf::sequential_update`] with innovation `nu0` (against the predicted
/// mean) and noise variance `r`; returns the row's ν²/s. `N > 0` fixes the state count at
/// compile time; `N = 0` takes it from the buffers.
#[inline(always)]
fn row_update<const N: usize>(b: RowBuffers, nu0: f64, r: f64) -> Result<f64, FilterError> {
    let n = if N > 0 { N } else { b.mean.len() };
    let (p, mean, h, c, k, dx) = (
        &mut b.p[..n * n],
        &mut b.mean[..n],
        &b.h[..n],
        &mut b.c[..n],
        &mut b.k[..n],
        &mut b.dx[..n],
    );
    // c = P hᵀ, column by column (P is symmetric, so this is also h P).
    c.fill(0.0);
    for (j, &hj) in h.iter().enumerate() {
        for (ci, &pij) in c.iter_mut().zip(&p[j * n..(j + 1) * n]) {
            *ci += pij * hj;
        }
    }
    let hc: f64 = h.iter().zip(c.iter()).map(|(h, c)| h * c).sum();
    let s = hc + r;
    if !(s > 0.0) || !s.is_finite() {
        return Err(FilterError::NotPositive("innovation covariance"));
    }
    let hdx: f64 = h.iter().zip(dx.iter()).map(|(h, d)| h * d).sum();
    let nu = nu0 - hdx;
    let f = nu / s;
    for i in 0..n {
        let step = c[i] * f;
        mean[i] += step;
        dx[i] += step;
    }
    // P − k cᵀ − c kᵀ + s k kᵀ with k = c / s (formed once, not once per entry).
    for (ki, &ci) in k.iter_mut().zip(c.iter()) {
        *ki = ci / s;
    }
    for j in 0..n {
        let (kj, cj) = (k[j], c[j]);
        for i in 0..n {
            p[i + j * n] += -k[i] * cj - c[i] * kj + s * k[i] * kj;
        }
    }
    Ok(nu * f)
}

impl Estimator for Ekf {
    fn predict(
        &mut self,
        model: &Model,
        u: &[f64],
        t0: f64,
        dt: f64,
        keep_cross: bool,
    ) -> Result<(), FilterError> {
        if keep_cross {
            self.prev_cov.copy_from(&self.core.cov);
        }
        self.core.pred.predict_gaussian(
            model,
            &mut self.core.mean,
            &mut self.core.cov,
            u,
            t0,
            dt,
            keep_cross.then_some(&mut self.phi),
        )?;
        if keep_cross {
            // Cov(x_k, x_{k+1}) = P_k Φᵀ.
            mul_abt(&self.prev_cov, &self.phi, &mut self.core.cross);
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
        let n = model.n();
        let nu = model.nu();
        self.core.obs.begin(model, reading);
        let m = self.core.obs.m;
        self.vars[..n].copy_from_slice(self.core.mean.as_slice());
        self.vars[n..n + nu].copy_from_slice(u);
        self.vars[n + nu] = t;
        for ck in &self.core.obs.checks {
            let sensor = &model.sensors[ck.sensor];
            let d = ck.dim;
            if let Some(af) = &sensor.affine {
                // z = H x + D u + c with constant H (e.g. a position gauge).
                let cols = n + nu;
                for a in 0..d {
                    let row = &af.jacobian[a * cols..(a + 1) * cols];
                    let mut z = af.offset[a];
                    for (w, v) in row.iter().zip(&self.vars[..cols]) {
                        z += w * v;
                    }
                    self.core.obs.zhat[ck.row + a] = z;
                    for j in 0..n {
                        self.h[(ck.row + a) + j * m] = row[j];
                    }
                }
                continue;
            }
            let slots = sensor.program.slots();
            sensor.program.eval_jacobian(
                &self.vars[..slots],
                n,
                &mut self.sws[ck.sensor],
                &mut self.zbuf[..d],
                &mut self.jbuf[..d * n],
            );
            for a in 0..d {
                self.core.obs.zhat[ck.row + a] = self.zbuf[a];
                for j in 0..n {
                    self.h[(ck.row + a) + j * m] = self.jbuf[a * n + j];
                }
            }
        }
        if !self.h[..m * n].iter().all(|x| x.is_finite()) {
            return Err(FilterError::NonFinite("sensor Jacobian"));
        }
        let by_rows = self.core.obs.r_diagonal && !self.always_stacked;
        let only_check = by_rows && self.core.obs.joint_is_only_check(gate);
        if only_check {
            // Only the predicted variance h P hᵀ of each row (the answer reports it).
            let p = self.core.cov.as_slice();
            for r in 0..m {
                let mut v = 0.0;
                for j in 0..n {
                    let pj: f64 = (0..n).map(|i| p[i + j * n] * self.h[r + i * m]).sum();
                    v += self.h[r + j * m] * pj;
                }
                self.core.obs.s[r + r * m] = v;
            }
        } else {
            // C = P Hᵀ (n × m), S = H C (m × m): the stacked update, or each sensor's own
            // NIS for the gate.
            gemm_nt(
                self.core.cov.as_slice(),
                &self.h,
                &mut self.core.obs.c,
                (n, n, m),
                false,
            );
            gemm_nn(
                &self.h,
                &self.core.obs.c,
                &mut self.core.obs.s,
                (m, n, m),
                false,
            );
        }
        if by_rows {
            if !self.core.obs.gate_blocks(gate)? {
                return Ok(false);
            }
            let nis = self.sequential_update()?;
            self.core.obs.set_joint_nis(nis, only_check);
            return Ok(true);
        }
        if !self.core.obs.gate(gate)? {
            return Ok(false);
        }
        self.core.obs.gain()?;
        self.core.obs.apply_gain(self.core.mean.as_mut_slice());
        // Joseph form: A = I − K H_acc, P ← A P Aᵀ + K R Kᵀ.
        let ma = self.core.obs.ma;
        let kt = &self.core.obs.kt;
        for i in 0..n {
            for a in 0..ma {
                self.k[i + a * n] = kt[a + i * ma];
            }
        }
        for j in 0..n {
            for (a, &row) in self.core.obs.keep.iter().enumerate() {
                self.h_acc[a + j * ma] = self.h[row + j * m];
            }
        }
        let a = self.a.as_mut_slice();
        gemm_nn(&self.k, &self.h_acc, a, (n, ma, n), false);
        for v in a.iter_mut() {
            *v = -*v;
        }
        for i in 0..n {
            a[i + i * n] += 1.0;
        }
        mul_ab(&self.a, &self.core.cov, &mut self.t1);
        mul_abt(&self.t1, &self.a, &mut self.core.cov);
        gemm_nn(
            &self.k,
            &self.core.obs.r_acc,
            &mut self.kr,
            (n, ma, ma),
            false,
        );
        gemm_nt(
            &self.kr,
            &self.k,
            self.core.cov.as_mut_slice(),
            (n, ma, n),
            true,
        );
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

#[cfg(test)]
mod tests {
    use super::*;
    use crate::filter::test_fixtures::{integration, prior, three_states, two_sensors};
    use crate::model::Instant;

    #[test]
    fn row_at_a_time_update_equals_the_stacked_update() {
        // Sequential processing of uncorrelated readings is an identity of the Kalman
        // update (Simon 2006, §6.1, from memory): with H fixed at the predicted mean it must
        // give the stacked Joseph-form update's mean, covariance and NIS to rounding, with
        // and without a gate that turns one sensor away.
        let model = three_states(two_sensors());
        let integ = integration();
        let (mean, _) = prior();
        let cov = DMatrix::from_row_slice(3, 3, &[0.4, 0.1, 0.0, 0.1, 0.3, 0.05, 0.0, 0.05, 0.2]);
        let base = Ekf::new(&model, integ, mean, cov);
        let reading = Reading {
            t: Instant::seconds(0.0),
            sensors: vec![(0, 0), (1, 1)],
            z: vec![2.6, 0.4, 1.3],
            ..Default::default()
        };
        let one = Reading {
            sensors: vec![(1, 0)],
            z: vec![0.4, 1.3],
            ..reading.clone()
        };
        // No gate; a gate that rejects s1 (its NIS is far above 0.5) and keeps s2; one
        // sensor alone (whose NIS the row pass gives).
        for (reading, gate) in [
            (&reading, None),
            (&reading, Some(&[0.5, 1e9][..])),
            (&one, None),
        ] {
            let mut rows = base.clone();
            let mut stacked = base.clone();
            stacked.always_stacked = true;
            assert!(rows.update(&model, reading, &[], 0.0, gate).unwrap());
            assert!(stacked.update(&model, reading, &[], 0.0, gate).unwrap());
            let close = |a: f64, b: f64| (a - b).abs() <= 1e-12 * (1.0 + b.abs());
            for (a, b) in rows.core.mean.iter().zip(stacked.core.mean.iter()) {
                assert!(close(*a, *b), "mean {a} vs {b}");
            }
            for (a, b) in rows.core.cov.iter().zip(stacked.core.cov.iter()) {
                assert!(close(*a, *b), "covariance {a} vs {b}");
            }
            assert!(close(rows.core.obs.joint_nis, stacked.core.obs.joint_nis));
            for (a, b) in rows.core.obs.checks.iter().zip(&stacked.core.obs.checks) {
                assert_eq!(a.accepted, b.accepted);
                assert!(close(a.nis, b.nis), "sensor NIS {} vs {}", a.nis, b.nis);
            }
            // Each row's predicted variance (reported with its innovation).
            let m = rows.core.obs.m;
            for r in 0..m {
                let (a, b) = (rows.core.obs.s[r + r * m], stacked.core.obs.s[r + r * m]);
                assert!(close(a, b), "S diagonal {a} vs {b}");
            }
            assert_eq!(rows.core.obs.ma, if gate.is_some() { 2 } else { m });
        }
    }
}
