//! Keeping the analysis members' spread when rounding takes it away.
//!
//! Every member update (`x_j + K d_j`, or `x̄ + X' (w̄ + W)`) subtracts: when the forecast
//! spread along a read direction is more than ~1/eps times the reading's std (a reading
//! after a long gap), the members' new values along it are rounding (often the same
//! number for every member), and their covariance is singular. The square-root array
//! keeps the answer: rotating `[L_R, Y'/√(N−1); 0, X'/√(N−1)]` to `[S^{1/2}, 0; K̄, X̃]`
//! gives `X̃ X̃ᵀ = X' X'ᵀ/(N−1) − K̄ K̄ᵀ`, the Kalman analysis covariance of the forecast
//! sample, with no subtraction (Kailath, Sayed & Hassibi 2000, *Linear Estimation*,
//! ch. 12, array algorithms). The same rotations carry `1ᵀ` to `u₂ᵀ`, a null vector of
//! `X̃` (the forecast anomalies sum to zero), so with the Householder reflection
//! `H = I − 2 v vᵀ / vᵀv`, `v = u₂ − 1` (it swaps `u₂` and `1`, both of norm √N;
//! Golub & Van Loan, *Matrix Computations*, 4th ed., §5.1.2, from memory), the anomalies
//! `√(N−1) X̃ H` sum to zero and have covariance `X̃ X̃ᵀ`.
//!
//! Only when the analysis members' covariance fails its Cholesky factorisation while the
//! forecast members' passed it (so the update, not the forecast, lost the spread) are the
//! members rebuilt as `x̄⁺ + √(N−1) X̃ H`; otherwise they are left exactly as the update
//! made them. An ensemble with no more members than states (`N − 1 < n`), or a forecast
//! without spread in some direction (a state the prior holds fixed), is singular by
//! construction and left alone. The rebuilt members are a square root of the right
//! covariance but no longer each the update of its own forecast member.

use super::members::Enkf;
use crate::filter::FilterError;
use crate::linalg::cholesky;

impl Enkf {
    /// Whether the members' covariance about the current mean is positive definite (its
    /// Cholesky factor exists); computed in the spread check's own buffers, so the
    /// covariance the run reports (`refresh_covariance`) is untouched.
    fn spread_is_definite(&mut self) -> bool {
        let (nn, n) = (self.ensemble.nrows(), self.ensemble.ncols());
        let xs = self.ensemble.as_slice();
        let p = &mut self.ws.check_cov;
        for j in 0..n {
            for i in 0..=j {
                let (mi, mj) = (self.core.mean[i], self.core.mean[j]);
                let s: f64 = (0..nn)
                    .map(|k| (xs[k + i * nn] - mi) * (xs[k + j * nn] - mj))
                    .sum();
                p[i + j * n] = s / (nn as f64 - 1.0);
                p[j + i * n] = p[i + j * n];
            }
        }
        cholesky(p, &mut self.ws.check_factor, n).is_ok()
    }

    /// Whether the forecast anomalies (`state_anomalies`, filled before the analysis) have
    /// a positive definite covariance.
    fn forecast_is_definite(&mut self) -> bool {
        let (nn, n) = (self.ensemble.nrows(), self.ensemble.ncols());
        let a = &self.ws.state_anomalies;
        let p = &mut self.ws.check_cov;
        for j in 0..n {
            for i in 0..=j {
                let s: f64 = (0..nn).map(|k| a[i + k * n] * a[j + k * n]).sum();
                p[i + j * n] = s / (nn as f64 - 1.0);
                p[j + i * n] = p[i + j * n];
            }
        }
        cholesky(p, &mut self.ws.check_factor, n).is_ok()
    }

    /// After an analysis: if the members lost their spread (module doc), rebuild them from
    /// the rotated array (`rotated`: whether [`Enkf::rotate_gain_array`] already ran on this
    /// line's forecast). Fails when even the rebuilt members are not positive definite.
    pub(super) fn keep_spread(&mut self, rotated: bool) -> Result<(), FilterError> {
        let (nn, n) = (self.ensemble.nrows(), self.ensemble.ncols());
        if nn <= n || self.spread_is_definite() || !self.forecast_is_definite() {
            return Ok(());
        }
        if !rotated {
            self.rotate_gain_array()?;
        }
        let ma = self.core.obs.ma;
        let ld = self.gain_ld();
        let a = &self.ws.gain_array;
        let v = &mut self.ws.reflector;
        for k in 0..nn {
            v[k] = a[(ma + n) + (ma + k) * ld] - 1.0;
        }
        let vv: f64 = v.iter().map(|x| x * x).sum();
        let root = (nn as f64 - 1.0).sqrt();
        for i in 0..n {
            let row = |k: usize| a[(ma + i) + (ma + k) * ld];
            let f = if vv > 0.0 {
                2.0 * (0..nn).map(|k| row(k) * v[k]).sum::<f64>() / vv
            } else {
                0.0
            };
            let m = self.core.mean[i];
            for k in 0..nn {
                self.ensemble[(k, i)] = m + root * (row(k) - f * v[k]);
            }
        }
        self.refresh_mean();
        if self.spread_is_definite() {
            Ok(())
        } else {
            Err(FilterError::NotPositive("analysis ensemble covariance"))
        }
    }
}
