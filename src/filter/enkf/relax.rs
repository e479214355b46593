//! The estimated parameters' spread after each analysis: relaxed back towards the forecast
//! spread, then kept inside the parameters' bounds.
//!
//! Why: a static parameter gets no process noise between readings, so nothing restores the
//! spread each analysis takes away, and the sampling error of a finite ensemble makes each
//! analysis take away too much (spurious correlations, an underestimated gain's error). The
//! ensemble then agrees on a wrong value and stops listening to the readings. Relaxation to
//! prior spread (RTPS, Whitaker & Hamill 2012, "Evaluating methods to account for system
//! errors in ensemble data assimilation", Monthly Weather Review 140(9)) scales each
//! member's analysis anomaly so that the spread moves a fraction `α` of the way back to
//! the forecast spread:
//!
//! ```text
//! x_j ← x̄ + (x_j − x̄) (1 + α (σ_b − σ_a) / σ_a)
//! ```
//!
//! with `σ_b`, `σ_a` the forecast and analysis sample std of that parameter and `α` =
//! `filter.ensemble.parameter_relaxation`. It is applied to estimated parameters only:
//! model states get their spread back from process noise at every forecast. Each analysis
//! keeps only the fraction `1 − α` of the spread it took away, which offsets the excess
//! shrinkage that sampling error adds at every line of a long run (the default 0.8 brings
//! a 64-member ensemble on a 36 000-line run from 0.6 % of the extended filter's spread to
//! about that spread; `tests/estimation/bounds.rs`). The price: one analysis can shrink a
//! spread to no less than `α` times the forecast's, so a few very informative readings
//! leave a wider spread than a Kalman filter would; 0 turns the relaxation off.
//!
//! Bounds: each member's parameter value is then set to the nearest bound when outside
//! (clipping the members; common practice for ensembles), so every member, and so the mean,
//! stays inside. The ensemble mean and spread are the clipped members' own.

use super::members::Enkf;
use crate::model::Model;

impl Enkf {
    /// Record `σ_b`, each estimated parameter's forecast spread, before the analysis.
    pub(super) fn note_forecast_spread(&mut self, model: &Model) {
        if self.ws.forecast_spread.is_empty() || self.cfg.parameter_relaxation == 0.0 {
            return;
        }
        let nm = model.n_model;
        for k in 0..self.ws.forecast_spread.len() {
            self.ws.forecast_spread[k] = self.spread(nm + k);
        }
    }

    /// Sample std (divisor `N − 1`) of state `i` about the current mean.
    fn spread(&self, i: usize) -> f64 {
        let nn = self.ensemble.nrows();
        let m = self.core.mean[i];
        let ss: f64 = self
            .ensemble
            .column(i)
            .iter()
            .map(|x| (x - m) * (x - m))
            .sum();
        (ss / (nn as f64 - 1.0)).sqrt()
    }

    /// After the analysis (the mean up to date): relax each estimated parameter's spread
    /// towards its forecast spread, clip the members to the parameter's bounds, and bring
    /// the mean up to date again if anything moved. Nothing happens for a model without
    /// estimated parameters.
    pub(super) fn relax_and_bound(&mut self, model: &Model) {
        let np = self.ws.forecast_spread.len();
        if np == 0 {
            return;
        }
        let (nm, alpha) = (model.n_model, self.cfg.parameter_relaxation);
        let mut moved = false;
        for k in 0..np {
            let i = nm + k;
            if alpha > 0.0 {
                let (sb, sa) = (self.ws.forecast_spread[k], self.spread(i));
                if sa > 0.0 && sb.is_finite() {
                    let f = 1.0 + alpha * (sb - sa) / sa;
                    let m = self.core.mean[i];
                    for x in self.ensemble.column_mut(i).iter_mut() {
                        *x = m + f * (*x - m);
                    }
                    moved = true;
                }
            }
            let b = model.bounds[i];
            if b.any() {
                for x in self.ensemble.column_mut(i).iter_mut() {
                    let c = x.clamp(b.min, b.max);
                    if c != *x {
                        *x = c;
                        moved = true;
                    }
                }
            }
        }
        if moved {
            self.refresh_mean();
        }
    }
}
