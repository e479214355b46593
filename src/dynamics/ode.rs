//! Adaptive Dormand–Prince 5(4) integration with a preallocated workspace.
//!
//! Nonlinear rate models (formulas) are propagated between readings by this integrator.
//! It controls its own error, so the prediction error stays far below the reported
//! standard deviations, and it allocates nothing once built.

use crate::linalg::all_finite;
use crate::model::Stop;

/// Why an integration stopped early.
#[derive(Debug, Clone, PartialEq)]
pub enum OdeError {
    /// The right-hand side produced a non-finite value at time `t`.
    NonFinite {
        /// Time of the failed evaluation.
        t: f64,
        /// The first non-finite component of the rate or state vector (`None` when the
        /// time itself was not finite), so callers can name the formula behind it.
        component: Option<usize>,
    },
    /// The step size fell below what floating point can resolve at time `t`.
    StepTooSmall {
        /// Time where the step collapsed.
        t: f64,
    },
    /// More than the allowed number of steps were needed.
    TooManySteps {
        /// Time reached.
        t: f64,
    },
    /// The caller's [`Stop`] fired: its deadline passed or it was cancelled (looked at
    /// every [`DEADLINE_EVERY`] steps).
    Deadline {
        /// Time reached.
        t: f64,
    },
}

/// Steps between two looks at the clock (the cancel flag is looked at every step): a
/// long integration inside one gap stops within this many steps of its deadline. One
/// step of the smallest system costs several formula evaluations, so a clock read (tens
/// of nanoseconds) every 16 steps stays below 1 %; a large system's step costs
/// milliseconds, so a coarser stride would let it overshoot by seconds.
pub const DEADLINE_EVERY: usize = 16;

/// Whether `stop` has fired, looked at only on every [`DEADLINE_EVERY`]-th step.
#[inline]
pub fn past_deadline(stop: &Stop, step: usize) -> bool {
    stop.every(step, DEADLINE_EVERY).is_some()
}

impl std::fmt::Display for OdeError {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        match self {
            Self::NonFinite { t, .. } => {
                write!(f, "the rate model gave a non-finite value at t = {t}")
            }
            Self::StepTooSmall { t } => {
                write!(
                    f,
                    "the integration step collapsed at t = {t} (the model may blow up there)"
                )
            }
            Self::TooManySteps { t } => {
                write!(f, "the integration needed too many steps and stopped at t = {t} (the model may be stiff)")
            }
            Self::Deadline { t } => {
                write!(
                    f,
                    "the compute deadline passed during the integration, at t = {t}"
                )
            }
        }
    }
}

impl std::error::Error for OdeError {}

/// Counters of one integration.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq)]
pub struct OdeStats {
    /// Accepted steps.
    pub accepted: usize,
    /// Rejected steps.
    pub rejected: usize,
    /// Right-hand-side evaluations.
    pub evaluations: usize,
}

// Dormand & Prince (1980), "A family of embedded Runge–Kutta formulae",
// J. Comput. Appl. Math. 6(1), the RK5(4)7M pair; also Hairer, Nørsett & Wanner,
// Solving Ordinary Differential Equations I, 2nd ed., §II.5. Digits from memory; the
// order-condition test checks every one of them.
const C2: f64 = 1.0 / 5.0;
const C3: f64 = 3.0 / 10.0;
const C4: f64 = 4.0 / 5.0;
const C5: f64 = 8.0 / 9.0;
const A21: f64 = 1.0 / 5.0;
const A31: f64 = 3.0 / 40.0;
const A32: f64 = 9.0 / 40.0;
const A41: f64 = 44.0 / 45.0;
const A42: f64 = -56.0 / 15.0;
const A43: f64 = 32.0 / 9.0;
const A51: f64 = 19372.0 / 6561.0;
const A52: f64 = -25360.0 / 2187.0;
const A53: f64 = 64448.0 / 6561.0;
const A54: f64 = -212.0 / 729.0;
const A61: f64 = 9017.0 / 3168.0;
const A62: f64 = -355.0 / 33.0;
const A63: f64 = 46732.0 / 5247.0;
const A64: f64 = 49.0 / 176.0;
const A65: f64 = -5103.0 / 18656.0;
// The fifth-order weights double as the last stage (first same as last): k7 = f(t+h, y⁺).
const A71: f64 = 35.0 / 384.0;
const A73: f64 = 500.0 / 1113.0;
const A74: f64 = 125.0 / 192.0;
const A75: f64 = -2187.0 / 6784.0;
const A76: f64 = 11.0 / 84.0;
// Fifth- minus fourth-order weights: the local error estimate.
const E1: f64 = 71.0 / 57600.0;
const E3: f64 = -71.0 / 16695.0;
const E4: f64 = 71.0 / 1920.0;
const E5: f64 = -17253.0 / 339200.0;
const E6: f64 = 22.0 / 525.0;
const E7: f64 = -1.0 / 40.0;

/// Step-size controller: `h_new = h · clamp(SAFETY · err^(−1/5), SHRINK, GROW)`.
const SAFETY: f64 = 0.9;
const SHRINK: f64 = 0.2;
const GROW: f64 = 5.0;

/// Dormand–Prince 5(4) integrator for systems of a fixed dimension.
///
/// # Method
///
/// The 7-stage embedded pair of Dormand & Prince (1980, J. Comput. Appl. Math. 6(1)),
/// advancing with the fifth-order solution and using its last stage as the next step's
/// first (FSAL, six evaluations per step). The local error estimate is measured as
/// `‖err‖ = sqrt(mean_i (err_i / (atol + rtol · max(|y_i|, |y⁺_i|)))²)` and a step is
/// accepted when `‖err‖ ≤ 1`; the next step is `h · clamp(0.9 ‖err‖^(−1/5), 0.2, 5)`,
/// never growing right after a rejection (Hairer, Nørsett & Wanner, *Solving ODEs I*,
/// §II.4). The first step comes from the same section's starting-step algorithm. Steps
/// are capped at `max_step`, and the last one is stretched or clipped to land exactly
/// on `t1`.
///
/// The result depends only on the arguments and the public fields: the workspace
/// carries no state between calls, so repeated runs are bit-identical.
///
/// # Failure
///
/// A non-finite value inside a step fails that step like a huge error estimate, so an
/// overlong trial step (an overflowing exponential, a square root of a negative
/// overshoot) shrinks and recovers. The call ends with [`OdeError::NonFinite`] (time of
/// the failing evaluation) when the initial state or `f(t0, y0)` is non-finite, or when
/// steps keep failing that way until they cannot shrink further; with
/// [`OdeError::StepTooSmall`] when the step falls below the resolution of `t` for error
/// control alone (a solution blowing up); with [`OdeError::TooManySteps`] after
/// `max_steps` attempted steps (typically a stiff model). On error `y` holds the last
/// accepted state.
#[derive(Debug, Clone)]
pub struct Dopri5 {
    dim: usize,
    /// Relative tolerance (default 1e-6).
    pub rtol: f64,
    /// Absolute tolerance (default 1e-9).
    pub atol: f64,
    /// Largest step allowed (`f64::INFINITY` for none; a value that is not positive is
    /// treated as none).
    pub max_step: f64,
    /// Most steps in one call before giving up.
    pub max_steps: usize,
    /// The deadline and cancel flag after which a call gives up with
    /// [`OdeError::Deadline`].
    pub stop: Stop,
    /// Stages k1..k7.
    k: [Vec<f64>; 7],
    /// Argument of the intermediate stages.
    y_stage: Vec<f64>,
    /// Candidate fifth-order solution.
    y_new: Vec<f64>,
}

impl Dopri5 {
    /// Workspace for systems of dimension `dim`.
    pub fn new(dim: usize) -> Self {
        Self {
            dim,
            rtol: 1e-6,
            atol: 1e-9,
            max_step: f64::INFINITY,
            max_steps: 1_000_000,
            stop: Stop::never(),
            k: std::array::from_fn(|_| vec![0.0; dim]),
            y_stage: vec![0.0; dim],
            y_new: vec![0.0; dim],
        }
    }

    /// The system dimension this workspace was built for.
    pub fn dim(&self) -> usize {
        self.dim
    }

    /// Integrate `y' = f(t, y)` from `t0` to `t1` (`t1 >= t0`), updating `y` in place.
    /// `f(t, y, dy)` must fill `dy`; a non-finite `dy` fails the current step, and ends the
    /// integration with [`OdeError::NonFinite`] once no shorter step avoids it (see the
    /// type's doc).
    ///
    /// `t1 == t0` returns at once without calling `f`. (`t1 < t0` integrates backwards.)
    ///
    /// # Panics
    ///
    /// If `y.len()` differs from [`Dopri5::dim`] (a programming error, not bad input).
    pub fn integrate<F>(
        &mut self,
        mut f: F,
        t0: f64,
        t1: f64,
        y: &mut [f64],
    ) -> Result<OdeStats, OdeError>
    where
        F: FnMut(f64, &[f64], &mut [f64]),
    {
        assert_eq!(y.len(), self.dim, "dopri5: state has the wrong length");
        let mut stats = OdeStats::default();
        if !t0.is_finite() {
            return Err(OdeError::NonFinite {
                t: t0,
                component: None,
            });
        }
        if !t1.is_finite() {
            return Err(OdeError::NonFinite {
                t: t1,
                component: None,
            });
        }
        if t1 == t0 || self.dim == 0 {
            return Ok(stats);
        }
        if !all_finite(y) {
            return Err(OdeError::NonFinite {
                t: t0,
                component: first_non_finite(y),
            });
        }
        let (rtol, atol, max_steps) = (self.rtol, self.atol, self.max_steps);
        let max_step = if self.max_step > 0.0 {
            self.max_step
        } else {
            f64::INFINITY
        };
        let dir = if t1 > t0 { 1.0 } else { -1.0 };
        let n = self.dim;
        let Self {
            k,
            y_stage,
            y_new,
            stop: self_stop,
            ..
        } = self;
        let [k1, k2, k3, k4, k5, k6, k7] = k;

        eval(&mut f, t0, y, k1, &mut stats)?;
        let mut h = dir
            * initial_step(
                &mut f, t0, t1, y, k1, y_stage, k2, rtol, atol, max_step, &mut stats,
            );
        let mut t = t0;
        let mut steps = 0usize;
        let mut just_rejected = false;
        // Why the latest attempt failed, if a stage was non-finite.
        let mut failure: Option<OdeError> = None;
        loop {
            if steps >= max_steps {
                return Err(failure.unwrap_or(OdeError::TooManySteps { t }));
            }
            if steps > 0 && past_deadline(self_stop, steps) {
                return Err(OdeError::Deadline { t });
            }
            steps += 1;
            // Stretch a step that would leave a sliver behind, clip one that overshoots.
            let last = dir * (t + 1.01 * h - t1) >= 0.0;
            if last {
                h = t1 - t;
            } else if h.abs() <= 4.0 * f64::EPSILON * t.abs().max(t1.abs()) {
                // t + h would barely differ from t: the solution is changing faster than
                // floating-point time can follow, or the model breaks down just ahead.
                return Err(failure.unwrap_or(OdeError::StepTooSmall { t }));
            }
            let t_new = if last { t1 } else { t + h };

            // A non-finite stage value fails the step like a huge error: a step that was
            // too long (an exponential overflowing) recovers by shrinking. Only when the
            // step has shrunk to nothing is the non-finite value reported.
            let err = 'step: {
                for i in 0..n {
                    y_stage[i] = y[i] + h * (A21 * k1[i]);
                }
                if let Err(e) = eval(&mut f, t + C2 * h, y_stage, k2, &mut stats) {
                    break 'step Err(e);
                }
                for i in 0..n {
                    y_stage[i] = y[i] + h * (A31 * k1[i] + A32 * k2[i]);
                }
                if let Err(e) = eval(&mut f, t + C3 * h, y_stage, k3, &mut stats) {
                    break 'step Err(e);
                }
                for i in 0..n {
                    y_stage[i] = y[i] + h * (A41 * k1[i] + A42 * k2[i] + A43 * k3[i]);
                }
                if let Err(e) = eval(&mut f, t + C4 * h, y_stage, k4, &mut stats) {
                    break 'step Err(e);
                }
                for i in 0..n {
                    y_stage[i] = y[i] + h * (A51 * k1[i] + A52 * k2[i] + A53 * k3[i] + A54 * k4[i]);
                }
                if let Err(e) = eval(&mut f, t + C5 * h, y_stage, k5, &mut stats) {
                    break 'step Err(e);
                }
                for i in 0..n {
                    y_stage[i] = y[i]
                        + h * (A61 * k1[i] + A62 * k2[i] + A63 * k3[i] + A64 * k4[i] + A65 * k5[i]);
                }
                if let Err(e) = eval(&mut f, t_new, y_stage, k6, &mut stats) {
                    break 'step Err(e);
                }
                for i in 0..n {
                    y_new[i] = y[i]
                        + h * (A71 * k1[i] + A73 * k3[i] + A74 * k4[i] + A75 * k5[i] + A76 * k6[i]);
                }
                if !all_finite(y_new) {
                    break 'step Err(OdeError::NonFinite {
                        t: t_new,
                        component: first_non_finite(y_new),
                    });
                }
                if let Err(e) = eval(&mut f, t_new, y_new, k7, &mut stats) {
                    break 'step Err(e);
                }
                let mut sum = 0.0;
                for i in 0..n {
                    let e = h
                        * (E1 * k1[i]
                            + E3 * k3[i]
                            + E4 * k4[i]
                            + E5 * k5[i]
                            + E6 * k6[i]
                            + E7 * k7[i]);
                    let scale =
                        (atol + rtol * y[i].abs().max(y_new[i].abs())).max(f64::MIN_POSITIVE);
                    sum += (e / scale) * (e / scale);
                }
                Ok((sum / n as f64).sqrt())
            };
            let err = match err {
                Ok(err) => {
                    failure = None;
                    err
                }
                Err(e) => {
                    failure = Some(e);
                    f64::INFINITY
                }
            };

            if err <= 1.0 {
                stats.accepted += 1;
                y.copy_from_slice(y_new);
                std::mem::swap(k1, k7);
                if last {
                    return Ok(stats);
                }
                t = t_new;
                let mut factor = (SAFETY * err.powf(-0.2)).clamp(SHRINK, GROW);
                if just_rejected {
                    factor = factor.min(1.0);
                }
                h = dir * (h.abs() * factor).min(max_step);
                just_rejected = false;
            } else {
                stats.rejected += 1;
                // NaN-free: err > 1 (possibly infinite) gives a factor in [0.2, 0.9).
                h *= (SAFETY * err.powf(-0.2)).max(SHRINK);
                just_rejected = true;
            }
        }
    }
}

/// One right-hand-side evaluation, counted and checked.
fn eval<F>(
    f: &mut F,
    t: f64,
    y: &[f64],
    dy: &mut [f64],
    stats: &mut OdeStats,
) -> Result<(), OdeError>
where
    F: FnMut(f64, &[f64], &mut [f64]),
{
    f(t, y, dy);
    stats.evaluations += 1;
    if all_finite(dy) {
        Ok(())
    } else {
        Err(OdeError::NonFinite {
            t,
            component: first_non_finite(dy),
        })
    }
}

/// The index of the first entry of `v` that is not finite.
pub fn first_non_finite(v: &[f64]) -> Option<usize> {
    v.iter().position(|x| !x.is_finite())
}

/// Weighted RMS norm `sqrt(mean (v_i / sc_i)²)`, `sc_i = atol + rtol |y_i|`.
fn weighted_rms(v: impl Iterator<Item = f64>, y: &[f64], rtol: f64, atol: f64) -> f64 {
    let mut sum = 0.0;
    for (vi, yi) in v.zip(y) {
        let r = vi / (atol + rtol * yi.abs()).max(f64::MIN_POSITIVE);
        sum += r * r;
    }
    (sum / y.len() as f64).sqrt()
}

/// Size (positive) of the first step: Hairer, Nørsett & Wanner, *Solving ODEs I*,
/// §II.4, "Starting step size", with order 5. Uses one extra evaluation; `f0` holds
/// `f(t0, y0)`, and `y1`, `f1` are scratch.
#[allow(clippy::too_many_arguments)]
fn initial_step<F>(
    f: &mut F,
    t0: f64,
    t1: f64,
    y0: &[f64],
    f0: &[f64],
    y1: &mut [f64],
    f1: &mut [f64],
    rtol: f64,
    atol: f64,
    max_step: f64,
    stats: &mut OdeStats,
) -> f64
where
    F: FnMut(f64, &[f64], &mut [f64]),
{
    let span = (t1 - t0).abs();
    let dir = if t1 > t0 { 1.0 } else { -1.0 };
    let d0 = weighted_rms(y0.iter().copied(), y0, rtol, atol);
    let d1 = weighted_rms(f0.iter().copied(), y0, rtol, atol);
    // A first guess making the explicit Euler increment about 1 % of the state.
    let mut h0 = if d0 < 1e-5 || d1 < 1e-5 {
        1e-6
    } else {
        0.01 * d0 / d1
    };
    h0 = h0.min(max_step).min(span);
    for i in 0..y0.len() {
        y1[i] = y0[i] + dir * h0 * f0[i];
    }
    // A non-finite trial only says h0 is already too long; the step control shrinks it.
    if !all_finite(y1) || eval(f, t0 + dir * h0, y1, f1, stats).is_err() {
        return h0;
    }
    let d2 = weighted_rms(f1.iter().zip(f0).map(|(a, b)| a - b), y0, rtol, atol) / h0;
    // Choose h1 so that h1⁵ · max(d1, d2) = 0.01, the local error of the next order.
    let dmax = d1.max(d2);
    let h1 = if dmax <= 1e-15 {
        (h0 * 1e-3).max(1e-6)
    } else {
        (0.01 / dmax).powf(0.2)
    };
    let h = (100.0 * h0).min(h1).min(max_step).min(span);
    // Overflow in d2 can drive the guess to zero; the error control recovers from a
    // guess that is too large, never from one that is zero.
    if h > 0.0 {
        h
    } else if h0 > 0.0 {
        h0
    } else {
        span.min(max_step)
    }
}

#[cfg(test)]
#[path = "ode_tests.rs"]
mod tests;
