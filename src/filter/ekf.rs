//! Extended Kalman filter.
//!
//! Prediction: see [`crate::filter::predict`] (exact Jacobians of the dynamics).
//! Update over the stacked sensors present on a line, with H = ∂h/∂x exact at the predicted
//! mean (Jazwinski 1970, §8.3; Bar-Shalom et al. 2001, §10.3):
//!   S = H P Hᵀ + R,  K = P Hᵀ S⁻¹,  x⁺ = x + K (z − h(x)),
//!   P⁺ = (I − K H) P (I − K H)ᵀ + K R Kᵀ  (Joseph form, Bucy & Joseph 1968),
//! which stays symmetric positive semi-definite under rounding, then symmetrised.
//! Fails (typed error, no NaN) when S is not positive definite or a value is non-finite.

use crate::filter::linalg::{gemm_nn, gemm_nt, mul_ab, mul_abt, symmetrize};
use crate::filter::observe::ObsSpace;
use crate::filter::predict::Predictor;
use crate::filter::{ensure_finite, Estimator, FilterError};
use crate::formula::Workspace;
use crate::spec::model::{Integration, Model};
use crate::spec::reading::Reading;
use nalgebra::{DMatrix, DVector};

/// The extended Kalman filter's state and buffers.
#[derive(Debug, Clone)]
pub struct Ekf {
    mean: DVector<f64>,
    cov: DMatrix<f64>,
    pred: Predictor,
    obs: ObsSpace,
    sws: Vec<Workspace>,
    vars: Vec<f64>,
    zbuf: Vec<f64>,
    jbuf: Vec<f64>,
    h: Vec<f64>,
    prev_cov: DMatrix<f64>,
    phi: DMatrix<f64>,
    cross: DMatrix<f64>,
    a: DMatrix<f64>,
    t1: DMatrix<f64>,
    kr: Vec<f64>,
    /// The gain `K`, `n × ma`, column-major.
    k: Vec<f64>,
    /// The rows of `H` of the accepted readings, `ma × n`.
    h_acc: Vec<f64>,
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
            mean,
            cov,
            pred: Predictor::new(model, integration, 0),
            obs: ObsSpace::new(model),
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
            cross: DMatrix::zeros(n, n),
            a: DMatrix::zeros(n, n),
            t1: DMatrix::zeros(n, n),
            kr: vec![0.0; n * mm],
            k: vec![0.0; n * mm],
            h_acc: vec![0.0; mm * n],
        }
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
            self.prev_cov.copy_from(&self.cov);
            self.pred.predict_gaussian(
                model,
                &mut self.mean,
                &mut self.cov,
                u,
                t0,
                dt,
                Some(&mut self.phi),
            )?;
            // Cov(x_k, x_{k+1}) = P_k Φᵀ.
            mul_abt(&self.prev_cov, &self.phi, &mut self.cross);
            Ok(())
        } else {
            self.pred
                .predict_gaussian(model, &mut self.mean, &mut self.cov, u, t0, dt, None)
        }
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
        self.obs.begin(model, reading);
        let m = self.obs.m;
        self.vars[..n].copy_from_slice(self.mean.as_slice());
        self.vars[n..n + nu].copy_from_slice(u);
        self.vars[n + nu] = t;
        for ck in &self.obs.checks {
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
                    self.obs.zhat[ck.row + a] = z;
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
                self.obs.zhat[ck.row + a] = self.zbuf[a];
                for j in 0..n {
                    self.h[(ck.row + a) + j * m] = self.jbuf[a * n + j];
                }
            }
        }
        if !self.h[..m * n].iter().all(|x| x.is_finite()) {
            return Err(FilterError::NonFinite("sensor Jacobian"));
        }
        // C = P Hᵀ (n × m), S = H C (m × m).
        gemm_nt(
            self.cov.as_slice(),
            &self.h,
            &mut self.obs.c,
            (n, n, m),
            false,
        );
        gemm_nn(&self.h, &self.obs.c, &mut self.obs.s, (m, n, m), false);
        if !self.obs.gate(gate)? {
            return Ok(false);
        }
        self.obs.gain()?;
        self.obs.apply_gain(self.mean.as_mut_slice());
        // Joseph form: A = I − K H_acc, P ← A P Aᵀ + K R Kᵀ.
        let ma = self.obs.ma;
        let kt = &self.obs.kt;
        for i in 0..n {
            for a in 0..ma {
                self.k[i + a * n] = kt[a + i * ma];
            }
        }
        for j in 0..n {
            for (a, &row) in self.obs.keep.iter().enumerate() {
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
        mul_ab(&self.a, &self.cov, &mut self.t1);
        mul_abt(&self.t1, &self.a, &mut self.cov);
        gemm_nn(&self.k, &self.obs.r_acc, &mut self.kr, (n, ma, ma), false);
        gemm_nt(&self.kr, &self.k, self.cov.as_mut_slice(), (n, ma, n), true);
        symmetrize(&mut self.cov);
        ensure_finite(self.mean.as_slice(), self.cov.as_slice(), "updated state")?;
        Ok(true)
    }

    fn obs(&self) -> &ObsSpace {
        &self.obs
    }

    fn mean(&self) -> &DVector<f64> {
        &self.mean
    }

    fn covariance(&self) -> &DMatrix<f64> {
        &self.cov
    }

    fn cross(&self) -> &DMatrix<f64> {
        &self.cross
    }

    fn set_deadline(&mut self, deadline: Option<std::time::Instant>) {
        self.pred.set_deadline(deadline);
    }

    fn clone_box(&self) -> Box<dyn Estimator> {
        Box::new(self.clone())
    }
}
