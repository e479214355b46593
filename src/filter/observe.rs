//! What every filter's update shares: stacking the sensors present on a line, per-sensor
//! gating on NIS, and compaction to the accepted rows that the filters' square-root array
//! updates read ([`crate::linalg::array_update`]).
//!
//! Given the predicted reading ẑ, its covariance S = Cov(z) (with R) and the cross
//! covariance C = Cov(x, z), the update is K = C S⁻¹, x⁺ = x + K (z − ẑ) (Kalman 1960;
//! in this cross-covariance form it covers the extended, unscented and ensemble filters,
//! e.g. Särkkä 2013, *Bayesian Filtering and Smoothing*, §5.5, §5.6); each filter makes it
//! in array form from its own factor. Each sensor reading j is judged by
//! NIS_j = ν_j' S_jj⁻¹ ν_j against χ²_p(dim_j) (Bar-Shalom et al. 2001, §5.4); the update
//! sets the joint NIS and ln det S of the accepted rows (`joint_nis`, `log_det_s`).

use crate::filter::predict::load_points;
use crate::filter::FilterError;
use crate::linalg::{cholesky, mahalanobis};
use crate::model::Model;
use crate::model::Reading;

/// One sensor's innovation on a line.
#[derive(Debug, Clone, Copy, Default, PartialEq)]
pub struct SensorCheck {
    /// Sensor index in the model.
    pub sensor: usize,
    /// First row of this sensor in the stacked reading.
    pub row: usize,
    /// Components.
    pub dim: usize,
    /// NIS of this reading alone against the predicted state.
    pub nis: f64,
    /// Whether it passed the gate and went into the update.
    pub accepted: bool,
}

/// Preallocated buffers for one update; sized for every sensor at once.
#[derive(Debug, Clone)]
pub struct ObsSpace {
    /// Stacked rows on the current line.
    pub m: usize,
    /// Rows accepted by the gate.
    pub ma: usize,
    /// Whether R on the current line is diagonal (uncorrelated rows).
    pub r_diagonal: bool,
    /// Whether each model sensor's own R is diagonal.
    sensor_diagonal: Vec<bool>,
    /// Sensors present on the line.
    pub checks: Vec<SensorCheck>,
    /// Stacked reading.
    pub z: Vec<f64>,
    /// Predicted reading ẑ (filled by the filter).
    pub zhat: Vec<f64>,
    /// Innovation z − ẑ.
    pub nu: Vec<f64>,
    /// Innovation covariance S, `m × m` (filled by the filter without R; R is added here).
    pub s: Vec<f64>,
    /// Reading noise R, `m × m`.
    pub r: Vec<f64>,
    /// Cross covariance C = Cov(x, z), `n × m` (filled by the filter).
    pub c: Vec<f64>,
    /// Accepted row indices into the stacked reading.
    pub keep: Vec<usize>,
    /// The innovation over the accepted rows.
    pub nu_acc: Vec<f64>,
    /// The reading noise over the accepted rows (`ma × ma`).
    pub r_acc: Vec<f64>,
    /// NIS of all accepted rows jointly.
    pub joint_nis: f64,
    /// ln det S over the accepted rows (S with R), set beside `joint_nis` by every update
    /// that accepts a reading (0 on a line with none). With NIS it gives the line's
    /// Gaussian log-likelihood −½(NIS + ln det S + m ln 2π) (e.g. Särkkä 2013, *Bayesian
    /// Filtering and Smoothing*, §12.2, from memory).
    pub log_det_s: f64,
    tmp: Vec<f64>,
    block: Vec<f64>,
    block_l: Vec<f64>,
}

impl ObsSpace {
    /// Buffers for `model`.
    pub fn new(model: &Model) -> Self {
        let n = model.n();
        let mm: usize = model.sensors.iter().map(|s| s.dim).sum();
        let bm = model.sensors.iter().map(|s| s.dim).max().unwrap_or(1);
        Self {
            m: 0,
            ma: 0,
            r_diagonal: true,
            sensor_diagonal: model
                .sensors
                .iter()
                .map(|s| {
                    let d = s.dim;
                    (0..d).all(|b| (0..d).all(|a| a == b || s.r[(a, b)] == 0.0))
                })
                .collect(),
            checks: Vec::with_capacity(model.sensors.len()),
            z: vec![0.0; mm],
            zhat: vec![0.0; mm],
            nu: vec![0.0; mm],
            s: vec![0.0; mm * mm],
            r: vec![0.0; mm * mm],
            c: vec![0.0; n * mm],
            keep: Vec::with_capacity(mm),
            nu_acc: vec![0.0; mm],
            r_acc: vec![0.0; mm * mm],
            joint_nis: 0.0,
            log_det_s: 0.0,
            tmp: vec![0.0; mm.max(n)],
            block: vec![0.0; bm * bm],
            block_l: vec![0.0; bm * bm],
        }
    }

    /// Stack the sensors present on `reading` and their noise (per-reading overrides win).
    pub fn begin(&mut self, model: &Model, reading: &Reading) {
        self.checks.clear();
        self.log_det_s = 0.0;
        let mut row = 0;
        for &(si, off) in &reading.sensors {
            let dim = model.sensors[si].dim;
            self.z[row..row + dim].copy_from_slice(&reading.z[off..off + dim]);
            self.checks.push(SensorCheck {
                sensor: si,
                row,
                dim,
                nis: 0.0,
                accepted: true,
            });
            row += dim;
        }
        self.m = row;
        let m = row;
        self.r[..m * m].fill(0.0);
        self.r_diagonal = true;
        for ck in &self.checks {
            let over = reading.std_overrides.iter().find(|(s, _)| *s == ck.sensor);
            let rs = &model.sensors[ck.sensor].r;
            let at = |a: usize, b: usize| (ck.row + a) + (ck.row + b) * m;
            match over {
                // A per-reading std: independent components.
                Some(&(_, o)) => {
                    for a in 0..ck.dim {
                        self.r[at(a, a)] = reading.std[o + a] * reading.std[o + a];
                    }
                }
                None if self.sensor_diagonal[ck.sensor] => {
                    for a in 0..ck.dim {
                        self.r[at(a, a)] = rs[(a, a)];
                    }
                }
                None => {
                    self.r_diagonal = false;
                    for b in 0..ck.dim {
                        for a in 0..ck.dim {
                            self.r[at(a, b)] = rs[(a, b)];
                        }
                    }
                }
            }
        }
    }

    /// Add R to S, form ν = z − ẑ, judge each sensor against `thresholds` (per model sensor),
    /// and compact the accepted rows. Returns whether anything was accepted.
    pub fn gate(&mut self, thresholds: Option<&[f64]>) -> Result<bool, FilterError> {
        let m = self.m;
        for i in 0..m * m {
            self.s[i] += self.r[i];
        }
        self.innovations()?;
        if let Some(i) = self.s[..m * m].iter().position(|x| !x.is_finite()) {
            return Err(self.row_error(i % m, "predicted reading's covariance"));
        }
        self.judge(thresholds)?;
        self.compact();
        Ok(self.ma > 0)
    }

    /// [`ObsSpace::gate`] when the filter filled only each sensor's diagonal block of S
    /// (what the per-sensor NIS needs) and will set the joint NIS itself with
    /// [`ObsSpace::set_joint_nis`]; only ν and R are compacted. With no gate and one sensor
    /// on the line, that sensor's NIS is the joint NIS, so the filter need fill only the
    /// diagonal of S (each row's predicted variance, which the answer reports) and the
    /// sensor's NIS is set with the joint one.
    pub fn gate_blocks(&mut self, thresholds: Option<&[f64]>) -> Result<bool, FilterError> {
        let m = self.m;
        self.innovations()?;
        if self.joint_is_only_check(thresholds) {
            for a in 0..m {
                let v = self.s[a + a * m] + self.r[a + a * m];
                if !v.is_finite() {
                    return Err(self.row_error(a, "predicted reading's covariance"));
                }
                self.s[a + a * m] = v;
            }
            self.checks[0].accepted = true;
        } else {
            for ck in &self.checks {
                for b in ck.row..ck.row + ck.dim {
                    for a in ck.row..ck.row + ck.dim {
                        let v = self.s[a + b * m] + self.r[a + b * m];
                        if !v.is_finite() {
                            return Err(FilterError::SensorNonFinite {
                                sensor: ck.sensor,
                                what: "predicted reading's covariance",
                            });
                        }
                        self.s[a + b * m] = v;
                    }
                }
            }
            self.judge(thresholds)?;
        }
        self.compact();
        Ok(self.ma > 0)
    }

    /// Whether the joint NIS alone settles the line: no gate and one sensor on it.
    pub fn joint_is_only_check(&self, thresholds: Option<&[f64]>) -> bool {
        thresholds.is_none() && self.checks.len() == 1
    }

    /// The joint NIS of the accepted rows, computed by the filter after
    /// [`ObsSpace::gate_blocks`]; when one sensor holds every accepted row its own NIS
    /// (judged from the same block) is kept as the joint value, and a sensor whose NIS was
    /// left to the joint value takes it.
    pub fn set_joint_nis(&mut self, nis: f64, only_check: bool) {
        if only_check {
            self.checks[0].nis = nis;
        }
        let mut accepted = self.checks.iter().filter(|c| c.accepted);
        self.joint_nis = match (accepted.next(), accepted.next()) {
            (Some(ck), None) if !only_check => ck.nis,
            _ => nis,
        };
    }

    /// ν = z − ẑ over the stacked rows; an error if it is not finite.
    fn innovations(&mut self) -> Result<(), FilterError> {
        let m = self.m;
        for i in 0..m {
            self.nu[i] = self.z[i] - self.zhat[i];
        }
        if let Some(r) = self.nu[..m].iter().position(|x| !x.is_finite()) {
            return Err(self.row_error(r, "predicted reading"));
        }
        Ok(())
    }

    /// The error for a non-finite `what` on stacked row `row`, naming its sensor.
    pub fn row_error(&self, row: usize, what: &'static str) -> FilterError {
        match self
            .checks
            .iter()
            .find(|c| (c.row..c.row + c.dim).contains(&row))
        {
            Some(ck) => FilterError::SensorNonFinite {
                sensor: ck.sensor,
                what,
            },
            None => FilterError::NonFinite(what),
        }
    }

    /// Each sensor's NIS from its diagonal block of S (R included), and whether it passes
    /// `thresholds`.
    fn judge(&mut self, thresholds: Option<&[f64]>) -> Result<(), FilterError> {
        let m = self.m;
        for ck in self.checks.iter_mut() {
            let d = ck.dim;
            for a in 0..d {
                for b in 0..d {
                    self.block[a + b * d] = self.s[(ck.row + a) + (ck.row + b) * m];
                }
            }
            if d == 1 {
                // A scalar reading (the common case): NIS = ν² / s.
                let (s, nu) = (self.block[0], self.nu[ck.row]);
                if !(s > 0.0) {
                    return Err(FilterError::NotPositive("innovation covariance"));
                }
                self.block_l[0] = s.sqrt();
                ck.nis = nu * nu / s;
                ck.accepted = thresholds.is_none_or(|t| ck.nis <= t[ck.sensor]);
                continue;
            }
            cholesky(&self.block[..d * d], &mut self.block_l[..d * d], d)
                .map_err(|_| FilterError::NotPositive("innovation covariance"))?;
            ck.nis = mahalanobis(
                &self.block_l[..d * d],
                d,
                &self.nu[ck.row..ck.row + d],
                &mut self.tmp,
            );
            ck.accepted = thresholds.is_none_or(|t| ck.nis <= t[ck.sensor]);
        }
        Ok(())
    }

    /// Gather the accepted rows of ν and R (what the array updates read).
    fn compact(&mut self) {
        let m = self.m;
        self.keep.clear();
        for ck in &self.checks {
            if ck.accepted {
                self.keep.extend(ck.row..ck.row + ck.dim);
            }
        }
        let ma = self.keep.len();
        self.ma = ma;
        for (a, &ra) in self.keep.iter().enumerate() {
            self.nu_acc[a] = self.nu[ra];
            for (b, &rb) in self.keep.iter().enumerate() {
                self.r_acc[a + b * ma] = self.r[ra + rb * m];
            }
        }
    }
}

/// Evaluates sensors at many points at once (sigma points or members).
#[derive(Debug, Clone)]
pub struct PointObserver {
    points: usize,
    bvars: Vec<f64>,
    sws: Vec<crate::formula::BatchWorkspace>,
    /// Predicted readings, stacked rows × points: `zs[row * points + j]`.
    pub zs: Vec<f64>,
}

impl PointObserver {
    /// Buffers for `model` over `points` points.
    pub fn new(model: &Model, points: usize) -> Self {
        let mm: usize = model.sensors.iter().map(|s| s.dim).sum();
        Self {
            points,
            bvars: vec![0.0; (model.n() + model.nu() + 1) * points],
            sws: model
                .sensors
                .iter()
                .map(|s| s.program.batch_workspace(points))
                .collect(),
            zs: vec![0.0; mm * points],
        }
    }

    /// Evaluate the sensors in `checks` at the rows of `x` (`points × n`) with inputs `u` at
    /// time `t`, filling `zs` in stacked order.
    pub fn eval(
        &mut self,
        model: &Model,
        checks: &[SensorCheck],
        x: &nalgebra::DMatrix<f64>,
        u: &[f64],
        t: f64,
    ) {
        let (nu, mp) = (model.nu(), self.points);
        load_points(&mut self.bvars, x.as_slice(), u, t, (nu, mp));
        for ck in checks {
            let sensor = &model.sensors[ck.sensor];
            let slots = sensor.program.slots();
            sensor.program.eval_batch(
                &self.bvars[..slots * mp],
                mp,
                &mut self.sws[ck.sensor],
                &mut self.zs[ck.row * mp..(ck.row + ck.dim) * mp],
            );
        }
    }
}
