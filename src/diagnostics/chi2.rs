//! Chi-square quantiles, for the per-sensor gate thresholds and for the two-sided NIS
//! consistency bounds of a run's summary (Bar-Shalom, Li, Kirubarajan 2001, §5.4).
//!
//! If the filter is consistent, the NIS of an `m`-dimensional reading is χ² with `m`
//! degrees of freedom, and a sum of them is χ² with the summed degrees. The threshold
//! `x_p` solves `F_k(x_p) = p` with `F_k(x) = P(k/2, x/2)`, the regularised lower
//! incomplete gamma function, and `1 − F_k(x) = Q(k/2, x/2)`, the upper one. The special
//! functions are the `statrs` crate's (`gamma_lr`, `gamma_ur`, `ln_gamma`, `erfc_inv`).
//!
//! The root finding stays here: statrs 0.18's `ChiSquared::inverse_cdf` stops after eight
//! bisections and four Newton steps and is off by 0.4 % at 305 degrees of freedom (its
//! 0.19 fixes that but needs Rust 1.89), and above the median it solves `F = p`, losing
//! the relative accuracy of `1 − p`. Safeguarded Newton (Press et al., *Numerical
//! Recipes*, 3rd ed., §9.4, `rtsafe`, from memory) from the Wilson–Hilferty start
//! (Wilson & Hilferty 1931, PNAS 17) on whichever tail is small does both.

use statrs::function::erf::erfc_inv;
use statrs::function::gamma::{gamma_lr, gamma_ur, ln_gamma};

/// Chi-square CDF with `k` degrees of freedom.
pub fn cdf(x: f64, k: f64) -> f64 {
    if x <= 0.0 {
        return 0.0;
    }
    gamma_lr(0.5 * k, 0.5 * x)
}

/// Chi-square quantile: the `x` with `cdf(x, k) = p`, for `0 < p < 1`, `k > 0`.
pub fn quantile(p: f64, k: f64) -> f64 {
    assert!(
        p > 0.0 && p < 1.0 && k > 0.0,
        "chi-square quantile needs 0 < p < 1 and k > 0"
    );
    // Wilson–Hilferty: (x/k)^{1/3} is nearly normal with mean 1 − h and variance h,
    // h = 2/(9k); z_p = −√2 erfc⁻¹(2p) is the standard normal quantile.
    let z = -std::f64::consts::SQRT_2 * erfc_inv(2.0 * p);
    let h = 2.0 / (9.0 * k);
    let mut x = (k * (1.0 - h + z * h.sqrt()).powi(3)).max(1e-12);
    if k > 2.0e6 {
        // The approximation's error falls like k^{-3/2}; here it is below 1e-9 of x.
        return x;
    }
    let (mut lo, mut hi) = (0.0_f64, f64::INFINITY);
    let ln_norm = 0.5 * k * std::f64::consts::LN_2 + ln_gamma(0.5 * k);
    // Solve in the tail that is small: F(x) − p below the median, (1 − p) − Q(x) above it,
    // so quantiles near 1 keep their relative accuracy (1 − p is exact there, Sterbenz).
    let upper = p > 0.5;
    let q_target = 1.0 - p;
    for _ in 0..200 {
        let f = if upper {
            q_target - gamma_ur(0.5 * k, 0.5 * x)
        } else {
            cdf(x, k) - p
        };
        if f > 0.0 {
            hi = hi.min(x);
        } else {
            lo = lo.max(x);
        }
        // Newton on the density f_k(x) = x^{k/2−1} e^{−x/2} / (2^{k/2} Γ(k/2)); a step
        // that leaves the bracket [lo, hi] bisects (or doubles while hi is unknown).
        let ln_pdf = (0.5 * k - 1.0) * x.ln() - 0.5 * x - ln_norm;
        let step = f / ln_pdf.exp();
        let mut next = x - step;
        if !next.is_finite() || next <= lo || next >= hi {
            next = if hi.is_finite() {
                0.5 * (lo + hi)
            } else {
                2.0 * x.max(1.0)
            };
        }
        if (next - x).abs() <= 1e-14 * x.max(1e-300) {
            return next;
        }
        x = next;
    }
    x
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn quantiles_match_the_nist_table() {
        // NIST/SEMATECH e-Handbook of Statistical Methods, §1.3.6.7.4 (upper critical values
        // of the chi-square distribution), values as printed to three decimals.
        let cases = [
            (0.95, 1.0, 3.841),
            (0.99, 1.0, 6.635),
            (0.99, 2.0, 9.210),
            (0.99, 3.0, 11.345),
            (0.95, 10.0, 18.307),
            (0.05, 10.0, 3.940),
        ];
        for (p, k, want) in cases {
            let got = quantile(p, k);
            assert!(
                (got - want).abs() < 6e-4,
                "chi2 quantile p={p} k={k}: {got} vs {want}"
            );
        }
    }

    #[test]
    fn two_degrees_of_freedom_has_a_closed_form() {
        // χ²(2) is exponential with mean 2: F(x) = 1 − e^{−x/2}, so x_p = −2 ln(1 − p)
        // (common practice).
        for p in [1e-6, 0.025, 0.5, 0.9, 0.975, 0.9999, 1.0 - 1e-9] {
            let want = -2.0 * (1.0_f64 - p).ln();
            let got = quantile(p, 2.0);
            assert!(
                (got - want).abs() <= 1e-9 * want.max(1.0),
                "p={p}: {got} vs {want}"
            );
        }
    }

    #[test]
    fn large_degrees_of_freedom_are_near_normal() {
        // For large k, χ²(k) ≈ N(k, 2k) (central limit theorem; common practice): the 97.5 %
        // point lies near k + 1.96·√(2k), within a few percent of the spread.
        let k = 40_000.0;
        let got = quantile(0.975, k);
        let approx = k + 1.959_964 * (2.0 * k).sqrt();
        assert!(
            (got - approx).abs() < 0.03 * (2.0 * k).sqrt(),
            "{got} vs {approx}"
        );
        assert!((cdf(got, k) - 0.975).abs() < 1e-9);
    }
}
