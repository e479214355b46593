//! Extended Kalman filter.
//!
//! Prediction: see [`crate::filter::predict`] (exact Jacobians of the dynamics).
//! Update over the stacked sensors present on a line, with H = ∂h/∂x exact at the predicted
//! mean (Jazwinski 1970, §8.3; Bar-Shalom et al. 2001, §10.3):
//!   S = H P Hᵀ + R,  K = P Hᵀ S⁻¹,  x⁺ = x + K (z − h(x)),  P⁺ = P − K S Kᵀ,
//! computed in square-root array form ([`crate::linalg::array_update`]; Kailath, Sayed &
//! Hassibi 2000, *Linear Estimation*, ch. 12; Kaminski, Bryson & Schmidt 1971, IEEE TAC
//! 16(6)): with P = L Lᵀ, orthogonal rotations take [R^{1/2}, H L; 0, L] to
//! [S^{1/2}, 0; K̄, L⁺], so K = K̄ S^{-1/2} and P⁺ = L⁺ L⁺ᵀ, symmetric and positive
//! semi-definite by construction. Unlike P − K S Kᵀ or the Joseph form it subtracts
//! nothing, so the posterior stays right when H P Hᵀ dwarfs R (a reading after a long gap,
//! where the subtraction cancels every digit; REFERENCES R15).
//! When the accepted readings' noise is uncorrelated (R diagonal, the usual case of
//! independent gauges) the rows go one at a time (sequential processing, e.g. Simon 2006,
//! *Optimal State Estimation*, §6.1, from memory), each a scalar array update of n Givens
//! rotations, O(n²) per row; see `Ekf::sequential_update`. Otherwise the block form.
//! Fails (typed error, no NaN) when S is not positive definite or a value is non-finite.

use crate::filter::shared::FilterCore;
use crate::filter::{Estimator, FilterError};
use crate::formula::Workspace;
use crate::linalg::{gemm_nn, gemm_nt, mul_abt, noise_factor, ArrayError, ArrayUpdate};
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
    /// The factor of P and the buffers of the array update.
    arr: ArrayUpdate,
    /// The rows of `H` of the accepted readings, `ma × n`.
    h_acc: Vec<f64>,
    /// `H_acc L`, `ma × n` (the block form's pre-array entry).
    hl: Vec<f64>,
    /// `R^{1/2}` of the accepted readings, `ma × ma`.
    lr: Vec<f64>,
    /// One row of `H`, and the mean's change so far, for the row-at-a-time update.
    hrow: Vec<f64>,
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
            arr: ArrayUpdate::new(n, mm),
            h_acc: vec![0.0; mm * n],
            hl: vec![0.0; mm * n],
            lr: vec![0.0; mm * mm],
            hrow: vec![0.0; n],
            dx: vec![0.0; n],
            always_stacked: false,
        }
    }

    /// The update one accepted row a at a time, for uncorrelated reading noise, with the
    /// rows of H taken at the predicted mean (so the result is the stacked EKF update's,
    /// up to rounding). With P = L Lᵀ factored once, for row h with noise r:
    ///   [√r, h L; 0, L] Θ = [√s, 0; k̄, L⁺],  ν = (z − ẑ)ₐ − h Δx,  x ← x + k̄ ν / √s,
    ///   L ← L⁺
    /// (the scalar array update, module doc), where Δx is the change of the mean made by
    /// the earlier rows; P⁺ = L Lᵀ at the end. The joint NIS νᵀS⁻¹ν of the stacked form
    /// is Σ ν²/s over the rows and ln det S is Σ ln s (the rows' innovations are the
    /// stacked innovation whitened by the Cholesky factor of S, whose squared diagonal is
    /// the rows' s). Returns (NIS, ln det S).
    fn sequential_update(&mut self) -> Result<(f64, f64), FilterError> {
        let (n, m, ma) = (self.core.mean.len(), self.core.obs.m, self.core.obs.ma);
        self.arr
            .factor(self.core.cov.as_slice())
            .map_err(|e| array_error(e, "predicted covariance"))?;
        self.dx.fill(0.0);
        let (mut nis, mut log_det) = (0.0, 0.0);
        for a in 0..ma {
            let row = self.core.obs.keep[a];
            for j in 0..n {
                self.hrow[j] = self.h[row + j * m];
            }
            let (nu0, r) = (self.core.obs.nu_acc[a], self.core.obs.r_acc[a + a * ma]);
            let out = self
                .arr
                .row(&self.hrow, r)
                .map_err(|e| array_error(e, "innovation covariance"))?;
            let hdx: f64 = self.hrow.iter().zip(&self.dx).map(|(h, d)| h * d).sum();
            let e = (nu0 - hdx) / out.s.sqrt();
            let mean = self.core.mean.as_mut_slice();
            for ((x, d), &k) in mean.iter_mut().zip(self.dx.iter_mut()).zip(self.arr.kbar()) {
                let step = k * e;
                *x += step;
                *d += step;
            }
            nis += e * e;
            log_det += out.s.ln();
        }
        self.arr.covariance(self.core.cov.as_mut_slice());
        self.core.finish_update(&self.dx)?;
        Ok((nis, log_det))
    }

    /// The block array update over the accepted rows (correlated reading noise, or
    /// `always_stacked`): [R^{1/2}, H L; 0, L] Θ = [S^{1/2}, 0; K̄, L⁺],
    /// x⁺ = x + K̄ S^{-1/2} ν, P⁺ = L⁺ L⁺ᵀ. Returns (NIS, ln det S).
    fn block_update(&mut self) -> Result<(f64, f64), FilterError> {
        let (n, m, ma) = (self.core.mean.len(), self.core.obs.m, self.core.obs.ma);
        for j in 0..n {
            for (a, &row) in self.core.obs.keep.iter().enumerate() {
                self.h_acc[a + j * ma] = self.h[row + j * m];
            }
        }
        self.arr
            .factor(self.core.cov.as_slice())
            .map_err(|e| array_error(e, "predicted covariance"))?;
        noise_factor(&self.core.obs.r_acc[..ma * ma], &mut self.lr, ma)
            .map_err(|_| FilterError::NotPositive("reading noise"))?;
        self.arr
            .mul_rows_factor(&self.h_acc[..ma * n], ma, &mut self.hl[..ma * n]);
        let (nis, log_det) = self
            .arr
            .block(
                &self.lr[..ma * ma],
                &self.hl[..ma * n],
                &self.core.obs.nu_acc[..ma],
                ma,
                &mut self.dx,
            )
            .map_err(|e| array_error(e, "innovation covariance"))?;
        for (x, d) in self.core.mean.iter_mut().zip(&self.dx) {
            *x += d;
        }
        self.arr.covariance(self.core.cov.as_mut_slice());
        self.core.finish_update(&self.dx)?;
        Ok((nis, log_det))
    }
}

/// The filter's error for an array-update failure while forming `what`.
fn array_error(e: ArrayError, what: &'static str) -> FilterError {
    match e {
        ArrayError::NonFinite => FilterError::NonFinite(what),
        ArrayError::Indefinite(_) => FilterError::NotPositive("predicted covariance"),
        ArrayError::NoisePositive => FilterError::NotPositive(what),
    }
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
        if let Some(i) = self.h[..m * n].iter().position(|x| !x.is_finite()) {
            return Err(self.core.obs.row_error(i % m, "Jacobian"));
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
            let (nis, log_det) = self.sequential_update()?;
            self.core.obs.set_joint_nis(nis, only_check);
            self.core.obs.log_det_s = log_det;
            return Ok(true);
        }
        if !self.core.obs.gate(gate)? {
            return Ok(false);
        }
        let (nis, log_det) = self.block_update()?;
        self.core.obs.joint_nis = nis;
        self.core.obs.log_det_s = log_det;
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
    use serde_json::json;

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
            // ln det S against nalgebra's determinant of S = H P Hᵀ + R over the accepted
            // rows, H = ∂h/∂x at the mean (1, 0.5, −0.2) written out by hand.
            let h_all =
                DMatrix::from_row_slice(3, 3, &[1.0, 0.0, 1.0, 0.0, 1.0, 0.0, 1.0, 0.0, 0.0]);
            let r_all = [0.09, 0.25, 0.04];
            let rows_used: Vec<usize> = match (reading.sensors.len(), gate.is_some()) {
                (2, false) => vec![0, 1, 2],
                _ => vec![1, 2],
            };
            let h = DMatrix::from_fn(rows_used.len(), 3, |a, j| h_all[(rows_used[a], j)]);
            let r = DMatrix::from_fn(rows_used.len(), rows_used.len(), |a, b| {
                if a == b {
                    r_all[rows_used[a]]
                } else {
                    0.0
                }
            });
            let s = &h * &base.core.cov * h.transpose() + r;
            let want = s.determinant().ln();
            for f in [&rows, &stacked] {
                let got = f.core.obs.log_det_s;
                assert!((got - want).abs() < 1e-12, "ln det S {got} vs {want}");
            }
        }
    }

    #[test]
    fn a_non_finite_jacobian_names_its_sensor() {
        // √a at a < 0 has no derivative: the error carries the index of the sensor whose
        // Jacobian failed (the second one here), for the job layer to name it.
        let model = three_states(json!({"s1": {"measures": "a + c", "std": 0.3},
                                        "level": {"measures": "sqrt(a)", "std": 0.2}}));
        let (_, cov) = prior();
        let mean = DVector::from_vec(vec![-1.0, 0.5, -0.2]);
        let mut f = Ekf::new(&model, integration(), mean, cov);
        let reading = Reading {
            t: Instant::seconds(0.0),
            sensors: vec![(0, 0), (1, 1)],
            z: vec![0.6, 0.4],
            ..Default::default()
        };
        assert_eq!(
            f.update(&model, &reading, &[], 0.0, None),
            Err(FilterError::SensorNonFinite {
                sensor: 1,
                what: "Jacobian"
            })
        );
    }
}
