//! Checks of the truncated-normal moments and the joint truncation against numeric
//! quadrature computed here independently (composite Simpson rule, common practice).

use super::*;
use nalgebra::{DMatrix, DVector};

/// `∫ g(x) w(x) dx` over `[lo, hi]` by Simpson's rule on `2k` intervals.
fn simpson(lo: f64, hi: f64, k: usize, f: impl Fn(f64) -> f64) -> f64 {
    let h = (hi - lo) / (2 * k) as f64;
    let mut s = f(lo) + f(hi);
    for j in 1..2 * k {
        let w = if j % 2 == 1 { 4.0 } else { 2.0 };
        s += w * f(lo + j as f64 * h);
    }
    s * h / 3.0
}

/// Mean and variance of `N(0, 1)` restricted to `[a, b]`, by quadrature of the density
/// scaled by `exp(c²/2)` (`c` the end nearest zero), so far tails do not underflow.
fn quadrature_moments(a: f64, b: f64) -> (f64, f64) {
    let lo = a.max(-14.0);
    let hi = b.min(14.0).max(lo + 1e-300);
    let (lo, hi) = if a > 10.0 { (a, a + 20.0) } else { (lo, hi) };
    let c = if lo > 0.0 {
        lo
    } else if hi < 0.0 {
        hi
    } else {
        0.0
    };
    let w = |x: f64| (-0.5 * (x - c) * (x + c)).exp();
    let k = 20_000;
    let z = simpson(lo, hi, k, w);
    let m = simpson(lo, hi, k, |x| x * w(x)) / z;
    let v = simpson(lo, hi, k, |x| (x - m) * (x - m) * w(x)) / z;
    (m, v)
}

#[test]
fn truncated_moments_match_quadrature() {
    for (a, b) in [
        (-1.0, 2.0),
        (0.5, f64::INFINITY),
        (f64::NEG_INFINITY, -0.3),
        (3.0, 3.5),
        (-0.1, 0.1),
        (-2.5, -1.0),
        (1.0, 5.0),
        (5.5, 7.0),
        (7.0, f64::INFINITY),
        (12.0, f64::INFINITY),
        (f64::NEG_INFINITY, 1.5),
    ] {
        let (m, v) = truncated_standard_normal(a, b);
        let (qm, qv) = quadrature_moments(a, b);
        assert!(
            (m - qm).abs() <= 1e-9 * (1.0 + qm.abs()),
            "[{a}, {b}]: mean {m} vs {qm}"
        );
        assert!(
            (v - qv).abs() <= 1e-8 * qv,
            "[{a}, {b}]: variance {v} vs {qv}"
        );
    }
}

#[test]
fn far_tails_keep_their_digits() {
    // Deep in the upper tail, 1 − Φ underflows at a ≈ 38; the moments follow the
    // asymptotic series m = a + 1/a − 2/a³ + 10/a⁵ − 74/a⁷, v = 1/a² − 6/a⁴ + 50/a⁶ (from
    // the Mills ratio expansion R(a) = (1 − 1/a² + 3/a⁴ − 15/a⁶ + …)/a, Abramowitz & Stegun
    // 26.2.12, from memory; the series for m and v derived from it here). Left-out terms
    // are below 1e-13 (m) and 2e-7 (v) relative at a = 40.
    for a in [40.0, 100.0, 1e4] {
        let (m, v) = truncated_standard_normal(a, f64::INFINITY);
        let a2 = a * a;
        let em = a + 1.0 / a - 2.0 / (a * a2) + 10.0 / (a * a2 * a2) - 74.0 / (a * a2 * a2 * a2);
        let ev = 1.0 / a2 - 6.0 / (a2 * a2) + 50.0 / (a2 * a2 * a2);
        assert!((m - em).abs() <= 1e-12 * em, "{a}: {m} vs {em}");
        assert!((v - ev).abs() <= 1e-6 * ev, "{a}: {v} vs {ev}");
        // The mirror image gives the lower tail.
        let (ml, vl) = truncated_standard_normal(f64::NEG_INFINITY, -a);
        assert_eq!((ml, vl), (-m, v));
    }
}

#[test]
fn the_joint_truncation_matches_two_dimensional_quadrature() {
    // A kiln's wall temperature (state 0) and its heat-transfer coefficient (state 1),
    // correlated; the coefficient must stay at or above 0.3 while its mean is 0. The
    // truncated density's moments are integrated over the plane directly.
    let mu = [5.0, 0.0];
    let p = [[4.0, 1.2], [1.2, 1.0]];
    let det = p[0][0] * p[1][1] - p[0][1] * p[1][0];
    let inv = [
        [p[1][1] / det, -p[0][1] / det],
        [-p[1][0] / det, p[0][0] / det],
    ];
    let pdf = |x: f64, y: f64| {
        let (dx, dy) = (x - mu[0], y - mu[1]);
        (-0.5 * (dx * dx * inv[0][0] + 2.0 * dx * dy * inv[0][1] + dy * dy * inv[1][1])).exp()
    };
    let k = 400;
    let (x0, x1, y0, y1) = (mu[0] - 14.0, mu[0] + 14.0, 0.3, 8.0);
    let moment = |g: &dyn Fn(f64, f64) -> f64| {
        simpson(y0, y1, k, |y| simpson(x0, x1, k, |x| g(x, y) * pdf(x, y)))
    };
    let z = moment(&|_, _| 1.0);
    let ex = moment(&|x, _| x) / z;
    let ey = moment(&|_, y| y) / z;
    let vxx = moment(&|x, _| (x - ex) * (x - ex)) / z;
    let vxy = moment(&|x, y| (x - ex) * (y - ey)) / z;
    let vyy = moment(&|_, y| (y - ey) * (y - ey)) / z;

    let mut x = DVector::from_row_slice(&mu);
    let mut cov = DMatrix::from_row_slice(2, 2, &[4.0, 1.2, 1.2, 1.0]);
    let b = Bounds {
        min: 0.3,
        max: f64::INFINITY,
    };
    assert!(truncate(&mut x, &mut cov, 1, b, &mut [0.0; 2]));
    for (got, want) in [
        (x[0], ex),
        (x[1], ey),
        (cov[(0, 0)], vxx),
        (cov[(0, 1)], vxy),
        (cov[(1, 1)], vyy),
    ] {
        assert!((got - want).abs() <= 1e-7 * want.abs(), "{got} vs {want}");
    }
    assert_eq!(cov[(0, 1)], cov[(1, 0)]);
}

#[test]
fn far_bounds_change_nothing_and_a_point_mass_is_clamped() {
    let mut x = DVector::from_row_slice(&[1.0, 2.0]);
    let mut cov = DMatrix::from_row_slice(2, 2, &[1.0, 0.1, 0.1, 0.01]);
    let (x0, c0) = (x.clone(), cov.clone());
    // 0.1 std away from 2.0 puts both bounds 9σ out.
    let b = Bounds { min: 1.1, max: 2.9 };
    assert!(!truncate(&mut x, &mut cov, 1, b, &mut [0.0; 2]));
    assert_eq!((x.clone(), cov.clone()), (x0, c0));
    // Zero variance: only the mean is brought back inside.
    cov[(1, 1)] = 0.0;
    let b = Bounds {
        min: 2.5,
        max: f64::INFINITY,
    };
    assert!(truncate(&mut x, &mut cov, 1, b, &mut [0.0; 2]));
    assert_eq!(x[1], 2.5);
}

#[test]
fn a_mean_far_outside_lands_inside_with_a_small_spread() {
    // A coefficient estimated at −3 ± 0.1 that must stay positive: the truncated normal
    // sits just above 0 with spread about σ²/|a| (the Mills-ratio limit above).
    let mut x = DVector::from_row_slice(&[10.0, -3.0]);
    let mut cov = DMatrix::from_row_slice(2, 2, &[2.0, 0.05, 0.05, 0.01]);
    let b = Bounds {
        min: 0.0,
        max: f64::INFINITY,
    };
    assert!(truncate(&mut x, &mut cov, 1, b, &mut [0.0; 2]));
    assert!(x[1] > 0.0 && x[1] < 0.01, "{}", x[1]);
    assert!(cov[(1, 1)] > 0.0 && cov[(1, 1)] < 1e-4, "{}", cov[(1, 1)]);
    let eig = cov.clone().symmetric_eigen().eigenvalues;
    assert!(eig.iter().all(|&l| l >= 0.0), "{eig}");
    assert!(x.iter().chain(cov.iter()).all(|v| v.is_finite()));
}
