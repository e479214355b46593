//! Noise figures of a fitted model, from the spread of its window residuals.
//!
//! A window residual e = x(t_{k+w}) − x(t_k) − ∫ f̂ dt of a continuous model holds the
//! process noise integrated over the window (variance q·T for a window of T seconds and
//! white noise of spectral density q) and the reading errors at its two ends (variance
//! 2σ²). With residual variances v₁ and v₂ over windows of mean lengths T₁ and T₂ = 2T₁
//! the two separate: q = (v₂ − v₁)/(T₂ − T₁), σ² = (v₁ − q T₁)/2, each clamped at zero
//! (the variance of increments at two lags; common practice). What the fit leaves
//! unexplained counts as noise, so both figures err on the large side when the terms
//! miss part of the dynamics.

/// Spread of the residuals of one state over windows of two lengths.
#[derive(Debug, Clone, Copy)]
pub struct Spread {
    /// Mean square residual over windows of `w` intervals.
    pub v1: f64,
    /// Mean window length, seconds.
    pub t1: f64,
    /// Mean square residual over windows of `2w` intervals.
    pub v2: f64,
    /// Mean window length, seconds.
    pub t2: f64,
}

/// Process noise density q and reading variance σ² of one state from its [`Spread`].
pub fn split(s: Spread) -> (f64, f64) {
    let q = if s.t2 > s.t1 && s.v2.is_finite() {
        ((s.v2 - s.v1) / (s.t2 - s.t1)).max(0.0)
    } else {
        s.v1 / s.t1.max(f64::MIN_POSITIVE)
    };
    let r = ((s.v1 - q * s.t1) / 2.0).max(0.0);
    let finite = |x: f64| if x.is_finite() { x } else { 0.0 };
    (finite(q), finite(r))
}

/// Mean of the squares.
pub fn mean_square(r: &[f64]) -> f64 {
    if r.is_empty() {
        return 0.0;
    }
    r.iter().map(|v| v * v).sum::<f64>() / r.len() as f64
}

/// Mean of a list (zero when empty).
pub fn mean(r: &[f64]) -> f64 {
    if r.is_empty() {
        return 0.0;
    }
    r.iter().sum::<f64>() / r.len() as f64
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn two_lags_separate_process_and_reading_noise() {
        // v = q T + 2 σ² with q = 0.5, σ² = 0.01 (the model of the module doc).
        let (q, r) = split(Spread {
            v1: 0.5 * 1.0 + 0.02,
            t1: 1.0,
            v2: 0.5 * 2.0 + 0.02,
            t2: 2.0,
        });
        assert!((q - 0.5).abs() < 1e-12 && (r - 0.01).abs() < 1e-12);
    }
}
