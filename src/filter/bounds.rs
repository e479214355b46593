//! Bounds: estimated parameters kept inside their `min`/`max`, model states watched
//! against `model.bounds`, and the ensemble watched for a collapsed parameter spread.
//!
//! Why a published method rather than a clamp of the mean: a clamp leaves the covariance
//! claiming spread on the far side of the bound, and the next update pulls the mean out
//! again. The extended and unscented filters therefore truncate the Gaussian belief along
//! each bounded parameter after every update (density truncation, Simon & Simon 2010,
//! "Constrained Kalman filtering via density function truncation for turbofan engine
//! health estimation", Int. J. Systems Science 41(2); survey: Simon 2010, IET Control
//! Theory & Applications 4(8)). The ensemble filter clips its members' parameter values to
//! the bounds after each analysis (common practice; `enkf/relax.rs`), and this file only
//! counts what that did.
//!
//! Model states are not forced: a state that leaves its bounds says the model or the
//! settings are wrong, and hiding it would be worse. It gets an `out_of_bounds` warning.

use crate::diagnostics::warnings::{WarningKind, Warnings};
use crate::filter::{Estimator, FilterError};
use crate::model::{Bounds, Instant, Model};
use libm::erfc;
use serde::Serialize;
use std::f64::consts::{FRAC_1_SQRT_2, PI};

/// How the parameters were kept inside their bounds, as `summary.bounds.method` names it.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum BoundsMethod {
    /// Truncation of the Gaussian belief along the parameter (Simon & Simon 2010).
    DensityTruncation,
    /// Each ensemble member's value set to the nearest bound (common practice).
    MemberClipping,
}

/// What the bounds did over a run, for `summary.bounds` (absent when no parameter has
/// bounds).
#[derive(Debug, Clone, Copy, Default, PartialEq)]
pub struct BoundsTally {
    /// The method, when some parameter has bounds.
    pub method: Option<BoundsMethod>,
    /// How many times (line × parameter) a bound changed the estimate: a truncation with
    /// probability mass beyond the bound that is not negligible, or an analysis after
    /// which at least one member sits on the bound.
    pub applied: u64,
}

/// A truncation is skipped (changes nothing, bit for bit) while both bounds lie more than
/// this many standard deviations away: the Gaussian's mass beyond 8.5σ is below 1e-17, so
/// the mean and variance would move by less than a rounding error.
const NEGLIGIBLE_SIGMAS: f64 = 8.5;

/// The `collapsed_spread` criterion: an ensemble's variance in an estimated parameter below
/// this fraction of the parameter's prior variance (`std²` in the model), i.e. its spread
/// below 1/1000 of its prior std. For a parameter the readings inform linearly, the Kalman
/// posterior variance after `k` readings is `σ₀² / (1 + k σ₀² I)` (`I` the information one
/// reading carries; common practice), so reaching 1e-6 σ₀² needs the information of a
/// million readings each as informative as the whole prior: in plant data that is an
/// ensemble that lost its spread, not knowledge.
pub const COLLAPSE_FRACTION: f64 = 1e-6;

/// Keeps parameters inside their bounds after each update, counts it, and watches model
/// states and ensemble spread. Buffers are sized once, so a step allocates nothing.
#[derive(Debug, Clone)]
pub struct BoundsKeeper {
    method: Option<BoundsMethod>,
    /// Column `P e_i` of the covariance before a truncation (`n`).
    column: Vec<f64>,
    /// Whether any model state has bounds.
    watch_states: bool,
    /// Variance below which an ensemble parameter counts as collapsed (parameters only;
    /// empty unless the filter is an ensemble).
    collapse_floor: Vec<f64>,
}

impl BoundsKeeper {
    /// A keeper for `model`; `ensemble` tells which method applies.
    pub fn new(model: &Model, ensemble: bool) -> Self {
        let method = model.has_parameter_bounds().then_some(if ensemble {
            BoundsMethod::MemberClipping
        } else {
            BoundsMethod::DensityTruncation
        });
        let collapse_floor = if ensemble {
            model
                .estimated
                .iter()
                .map(|p| COLLAPSE_FRACTION * p.std * p.std)
                .collect()
        } else {
            Vec::new()
        };
        Self {
            method,
            column: vec![0.0; model.n()],
            watch_states: model.bounds[..model.n_model].iter().any(Bounds::any),
            collapse_floor,
        }
    }

    /// The tally a run starts from.
    pub fn tally(&self) -> BoundsTally {
        BoundsTally {
            method: self.method,
            applied: 0,
        }
    }

    /// After one line (its update done, the covariance settled): truncate the bounded
    /// parameters (extended and unscented filters, only when the line updated), count the
    /// ensemble's clipped parameters, and note out-of-bounds states and collapsed spreads.
    pub fn after_step(
        &mut self,
        est: &mut dyn Estimator,
        model: &Model,
        at: Instant,
        updated: bool,
        warnings: &mut Warnings,
        tally: &mut BoundsTally,
    ) -> Result<(), FilterError> {
        let nm = model.n_model;
        match self.method {
            Some(BoundsMethod::DensityTruncation) if updated => {
                let core = est.core_mut();
                for (i, b) in model.bounds.iter().enumerate().skip(nm) {
                    if b.any() && truncate(&mut core.mean, &mut core.cov, i, *b, &mut self.column) {
                        tally.applied += 1;
                    }
                }
                if !core
                    .mean
                    .iter()
                    .chain(core.cov.iter())
                    .all(|x| x.is_finite())
                {
                    return Err(FilterError::NonFinite("bounded parameter's truncation"));
                }
            }
            Some(BoundsMethod::MemberClipping) if updated => {
                if let Some(x) = est.members() {
                    for (i, b) in model.bounds.iter().enumerate().skip(nm) {
                        if b.any() && x.column(i).iter().any(|&v| v == b.min || v == b.max) {
                            tally.applied += 1;
                        }
                    }
                }
            }
            _ => {}
        }
        if self.watch_states {
            let mean = est.mean();
            for (i, b) in model.bounds[..nm].iter().enumerate() {
                let x = mean[i];
                if !b.contains(x) {
                    warnings.note(WarningKind::OutOfBounds, None, Some(i), at, || {
                        let (side, bound) = if x < b.min {
                            ("below its min", b.min)
                        } else {
                            ("above its max", b.max)
                        };
                        format!(
                            "the estimate of {} reached {x}, {side} {bound} (the bound is watched, not enforced: check the model and its noise settings)",
                            model.states[i]
                        )
                        .into()
                    });
                }
            }
        }
        if updated && !self.collapse_floor.is_empty() {
            let cov = est.covariance();
            for (k, &floor) in self.collapse_floor.iter().enumerate() {
                let i = nm + k;
                let var = cov[(i, i)];
                if var < floor {
                    let prior = model.estimated[k].std;
                    warnings.note(WarningKind::CollapsedSpread, None, Some(i), at, || {
                        format!(
                            "the ensemble's spread in {} fell to {}, below 1/1000 of its prior std {prior}: the members agree far more than the readings justify; raise filter.ensemble.parameter_relaxation, the members or its random_walk",
                            model.states[i],
                            var.max(0.0).sqrt()
                        )
                        .into()
                    });
                }
            }
        }
        Ok(())
    }
}

/// `φ(x)`, the standard normal density.
fn density(x: f64) -> f64 {
    if x.is_infinite() {
        return 0.0;
    }
    (-0.5 * x * x).exp() / (2.0 * PI).sqrt()
}

/// `Q(x) = 1 − Φ(x)`, the upper tail, from `erfc` (no `1 − Φ` cancellation).
fn upper_tail(x: f64) -> f64 {
    0.5 * erfc(x * FRAC_1_SQRT_2)
}

/// The tails `T_1, T_2` of the continued fraction of the Mills ratio
/// `R(x) = Q(x)/φ(x) = 1/(x + T_1)`, `T_k = k/(x + T_{k+1})` (Laplace's continued fraction;
/// Abramowitz & Stegun 26.2.14, from memory), evaluated from depth 80 up. For `x ≥ 6` it
/// has converged to rounding long before.
fn mills_tails(x: f64) -> (f64, f64) {
    let mut t = 0.0;
    for k in (3..=80).rev() {
        t = k as f64 / (x + t);
    }
    let t2 = 2.0 / (x + t);
    (1.0 / (x + t2), t2)
}

/// Below this the Mills ratio comes from `erfc` and `exp` directly (neither underflows);
/// above, from the continued fraction.
const MILLS_SWITCH: f64 = 6.0;

/// `R(x) = Q(x)/φ(x)` for `x ≥ 0`.
fn mills(x: f64) -> f64 {
    if x.is_infinite() {
        0.0
    } else if x < MILLS_SWITCH {
        upper_tail(x) / density(x)
    } else {
        1.0 / (x + mills_tails(x).0)
    }
}

/// Mean and variance of a standard normal truncated to `[a, b]`, `a < b` (either may be
/// infinite):
///
/// ```text
/// Z = Φ(b) − Φ(a),   m = (φ(a) − φ(b)) / Z,   v = 1 + (a φ(a) − b φ(b)) / Z − m²
/// ```
///
/// (Johnson, Kotz & Balakrishnan, Continuous Univariate Distributions vol. 1, ch. 13, from
/// memory). Far in a tail, `Z` underflows and `v` cancels, so for `a ≥ 0` the ratios are
/// taken through the Mills ratio `R = Q/φ`: `φ(a)/Z = 1/(R(a) − R(b) e)`, `e = φ(b)/φ(a)`;
/// with `b = ∞` and `a ≥ 6`, through the continued fraction's tails, `m = a + T_1` and
/// `v = T_1 (T_2 − T_1)`, which cancel nothing. An interval below zero is the mirror image.
pub fn truncated_standard_normal(a: f64, b: f64) -> (f64, f64) {
    debug_assert!(a < b);
    if b <= 0.0 {
        let (m, v) = truncated_standard_normal(-b, -a);
        return (-m, v);
    }
    let (m, v) = if a >= 0.0 {
        let e = if b.is_infinite() {
            0.0
        } else {
            (-0.5 * (b - a) * (b + a)).exp()
        };
        if e == 0.0 && a >= MILLS_SWITCH {
            let (t1, t2) = mills_tails(a);
            (a + t1, t1 * (t2 - t1))
        } else {
            let d = mills(a) - mills(b) * e;
            let m = (1.0 - e) / d;
            let be = if e == 0.0 { 0.0 } else { b * e };
            (m, 1.0 + (a - be) / d - m * m)
        }
    } else {
        let z = 1.0 - upper_tail(-a) - upper_tail(b);
        let (pa, pb) = (density(a), density(b));
        let apa = if a.is_infinite() { 0.0 } else { a * pa };
        let bpb = if b.is_infinite() { 0.0 } else { b * pb };
        let m = (pa - pb) / z;
        (m, 1.0 + (apa - bpb) / z - m * m)
    };
    // Rounding can only break these near degenerate cases: the mean lies in [a, b], the
    // variance is at most 1 (truncation never widens) and at most (b − a)²/4.
    let width = b - a;
    (m.clamp(a, b), v.clamp(0.0, (0.25 * width * width).min(1.0)))
}

/// Truncate the Gaussian `N(x, P)` to `min ≤ x_i ≤ max` along state `i` and replace it by
/// the Gaussian with the truncated density's mean and covariance (Simon & Simon 2010,
/// §3): with `μ = x_i`, `σ² = P_ii` and `μ̃`, `σ̃²` the truncated normal's moments,
///
/// ```text
/// x̃ = x + P e_i (μ̃ − μ) / σ²,     P̃ = P − P e_i e_iᵀ P (σ² − σ̃²) / σ⁴
/// ```
///
/// (the other states follow through their regression on `x_i`, which truncation does not
/// change). `P̃` stays symmetric (each entry is `P_jk − c P_ji P_ki`, the same product for
/// `(j, k)` and `(k, j)`) and PSD (`0 ≤ c ≤ 1/σ²`, and `P − P e_i e_iᵀ P / σ²` is a Schur
/// complement). With `σ² = 0` the mean is clamped. `column` is scratch of length `n`.
/// Returns whether anything changed; nothing does while both bounds lie beyond
/// `NEGLIGIBLE_SIGMAS` standard deviations.
pub fn truncate(
    x: &mut nalgebra::DVector<f64>,
    p: &mut nalgebra::DMatrix<f64>,
    i: usize,
    b: Bounds,
    column: &mut [f64],
) -> bool {
    let n = x.len();
    let (mu, var) = (x[i], p[(i, i)]);
    if !(var > 0.0) {
        let c = mu.clamp(b.min, b.max);
        let changed = c != mu;
        x[i] = c;
        return changed;
    }
    let sigma = var.sqrt();
    let (a, bb) = ((b.min - mu) / sigma, (b.max - mu) / sigma);
    if a < -NEGLIGIBLE_SIGMAS && bb > NEGLIGIBLE_SIGMAS {
        return false;
    }
    let (m, v) = truncated_standard_normal(a, bb);
    let shift = sigma * m;
    let c = (1.0 - v) / var;
    column[..n].copy_from_slice(p.column(i).as_slice());
    for j in 0..n {
        x[j] += column[j] * (shift / var);
    }
    for k in 0..n {
        for j in 0..n {
            p[(j, k)] -= c * column[j] * column[k];
        }
    }
    // The parameter's own entries exactly as the truncated normal gives them.
    x[i] = (mu + shift).clamp(b.min, b.max);
    p[(i, i)] = var * v;
    true
}

#[cfg(test)]
#[path = "bounds_tests.rs"]
mod tests;
