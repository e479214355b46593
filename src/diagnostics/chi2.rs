//! Chi-square distribution: CDF through the regularised incomplete gamma function and
//! quantiles by safeguarded Newton iteration. Used for gate thresholds and for the two-sided
//! NIS consistency bounds (Bar-Shalom, Li, Kirubarajan 2001, §5.4).
//!
//! Methods: series and continued fraction for P(a, x) (Press et al., *Numerical Recipes*,
//! 3rd ed., §6.2), Lanczos ln Γ (same, §6.1), Wilson–Hilferty start (1931, PNAS 17).

/// ln Γ(x) for x > 0 (Lanczos, g = 7, n = 9; relative error below 1e-15).
pub fn ln_gamma(x: f64) -> f64 {
    const G: f64 = 7.0;
    const C: [f64; 9] = [
        0.999_999_999_999_809_9,
        676.520_368_121_885_1,
        -1_259.139_216_722_402_8,
        771.323_428_777_653_1,
        -176.615_029_162_140_6,
        12.507_343_278_686_905,
        -0.138_571_095_265_720_12,
        9.984_369_578_019_572e-6,
        1.505_632_735_149_311_6e-7,
    ];
    if x < 0.5 {
        // Reflection: Γ(x)Γ(1−x) = π / sin(πx).
        return (std::f64::consts::PI / (std::f64::consts::PI * x).sin()).ln() - ln_gamma(1.0 - x);
    }
    let x = x - 1.0;
    let mut a = C[0];
    let t = x + G + 0.5;
    for (i, c) in C.iter().enumerate().skip(1) {
        a += c / (x + i as f64);
    }
    0.5 * (2.0 * std::f64::consts::PI).ln() + (x + 0.5) * t.ln() - t + a.ln()
}

/// Regularised lower incomplete gamma P(a, x) = γ(a, x) / Γ(a), for a > 0, x ≥ 0.
pub fn gamma_p(a: f64, x: f64) -> f64 {
    let (p, q) = gamma_pq(a, x);
    if x < a + 1.0 {
        p
    } else {
        1.0 - q
    }
}

/// Regularised upper incomplete gamma Q(a, x) = 1 − P(a, x), accurate when it is tiny.
pub fn gamma_q(a: f64, x: f64) -> f64 {
    let (p, q) = gamma_pq(a, x);
    if x < a + 1.0 {
        1.0 - p
    } else {
        q
    }
}

/// The directly computed tail: P by the series when x < a + 1, else Q by the continued
/// fraction (the other entry is then unused).
fn gamma_pq(a: f64, x: f64) -> (f64, f64) {
    if x <= 0.0 {
        return (0.0, 1.0);
    }
    let ln_pre = a * x.ln() - x - ln_gamma(a);
    if x < a + 1.0 {
        // Series: γ(a,x) = e^{-x} x^a Σ x^n / (a (a+1) … (a+n)).
        let mut ap = a;
        let mut term = 1.0 / a;
        let mut sum = term;
        for _ in 0..100_000 {
            ap += 1.0;
            term *= x / ap;
            sum += term;
            if term.abs() < sum.abs() * 1e-17 {
                break;
            }
        }
        ((sum.ln() + ln_pre).exp().min(1.0), f64::NAN)
    } else {
        // Continued fraction for Q(a, x) by the modified Lentz method.
        let tiny = 1e-300;
        let mut b = x + 1.0 - a;
        let mut c = 1.0 / tiny;
        let mut d = 1.0 / b;
        let mut h = d;
        for i in 1..100_000 {
            let an = -(i as f64) * (i as f64 - a);
            b += 2.0;
            d = an * d + b;
            if d.abs() < tiny {
                d = tiny;
            }
            c = b + an / c;
            if c.abs() < tiny {
                c = tiny;
            }
            d = 1.0 / d;
            let del = d * c;
            h *= del;
            if (del - 1.0).abs() < 1e-16 {
                break;
            }
        }
        (f64::NAN, (ln_pre.exp() * h).clamp(0.0, 1.0))
    }
}

/// Chi-square CDF with `k` degrees of freedom.
pub fn cdf(x: f64, k: f64) -> f64 {
    gamma_p(0.5 * k, 0.5 * x)
}

#[allow(clippy::excessive_precision)]
/// Standard normal quantile (Acklam's rational approximation, relative error < 1.2e-9),
/// enough for a starting point.
fn normal_quantile(p: f64) -> f64 {
    const A: [f64; 6] = [
        -3.969683028665376e1,
        2.209460984245205e2,
        -2.759285104469687e2,
        1.383577518672690e2,
        -3.066479806614716e1,
        2.506628277459239,
    ];
    const B: [f64; 5] = [
        -5.447609879822406e1,
        1.615858368580409e2,
        -1.556989798598866e2,
        6.680131188771972e1,
        -1.328068155288572e1,
    ];
    const C: [f64; 6] = [
        -7.784894002430293e-3,
        -3.223964580411365e-1,
        -2.400758277161838,
        -2.549732539343734,
        4.374664141464968,
        2.938163982698783,
    ];
    const D: [f64; 4] = [
        7.784695709041462e-3,
        3.224671290700398e-1,
        2.445134137142996,
        3.754408661907416,
    ];
    let pl = 0.02425;
    if p < pl {
        let q = (-2.0 * p.ln()).sqrt();
        (((((C[0] * q + C[1]) * q + C[2]) * q + C[3]) * q + C[4]) * q + C[5])
            / ((((D[0] * q + D[1]) * q + D[2]) * q + D[3]) * q + 1.0)
    } else if p <= 1.0 - pl {
        let q = p - 0.5;
        let r = q * q;
        (((((A[0] * r + A[1]) * r + A[2]) * r + A[3]) * r + A[4]) * r + A[5]) * q
            / (((((B[0] * r + B[1]) * r + B[2]) * r + B[3]) * r + B[4]) * r + 1.0)
    } else {
        -normal_quantile(1.0 - p)
    }
}

/// Chi-square quantile: the `x` with `cdf(x, k) = p`, for `0 < p < 1`, `k > 0`.
pub fn quantile(p: f64, k: f64) -> f64 {
    assert!(
        p > 0.0 && p < 1.0 && k > 0.0,
        "chi-square quantile needs 0 < p < 1 and k > 0"
    );
    // Wilson–Hilferty start.
    let z = normal_quantile(p);
    let h = 2.0 / (9.0 * k);
    let mut x = (k * (1.0 - h + z * h.sqrt()).powi(3)).max(1e-12);
    if k > 2.0e6 {
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
            q_target - gamma_q(0.5 * k, 0.5 * x)
        } else {
            cdf(x, k) - p
        };
        if f > 0.0 {
            hi = hi.min(x);
        } else {
            lo = lo.max(x);
        }
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
