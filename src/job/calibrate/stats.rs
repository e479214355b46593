//! Standard errors, 95 % intervals and correlations of the fitted values from the observed
//! information: the curvature H of −ln L at the optimum in search coordinates u, whose
//! inverse is the asymptotic covariance of û (Harvey 1989, *Forecasting, Structural Time
//! Series Models and the Kalman Filter*, §3.4; common practice). A value's standard error
//! is |dx/du|·√(H⁻¹)ᵢᵢ (the delta method); its interval is the image of
//! ûᵢ ± 1.96·√(H⁻¹)ᵢᵢ, which stays inside the bounds (a standard deviation's interval
//! never reaches below 0).
//!
//! Identifiability: H is scaled to unit diagonal, C = D H D with D = diag(Hᵢᵢ^−½), and
//! eigenvalues of C below [`FLAT`] mark directions along which the readings hardly
//! change the likelihood (two noise terms that the readings cannot tell apart). The
//! quantities that make up such a direction get a warning and no standard error; the
//! others get theirs from the inverse on the remaining directions.

use super::objective::{Objective, Stop};
use super::search::{costs, curve_step};
use super::spec::Map;
use nalgebra::{DMatrix, SymmetricEigen};

/// Eigenvalue of the unit-diagonal curvature below which a direction counts as flat
/// (a correlation of the estimates beyond about 0.9999).
const FLAT: f64 = 1e-4;
/// The standard normal's 0.975 quantile.
const Z95: f64 = 1.959_963_984_540_054;

/// The curvature of −ln L at `u` by second differences (common practice):
/// Hᵢᵢ = (f(u+hᵢ) − 2f(u) + f(u−hᵢ))/hᵢ², Hᵢⱼ = (f(++) − f(+−) − f(−+) + f(−−))/(4hᵢhⱼ).
pub(crate) fn curvature(
    obj: &Objective<'_>,
    maps: &[Map],
    u: &[f64],
    f0: f64,
) -> Result<DMatrix<f64>, Stop> {
    let n = u.len();
    let h: Vec<f64> = (0..n).map(|i| curve_step(maps[i], u[i])).collect();
    let shifted = |moves: &[(usize, f64)]| {
        let mut p = u.to_vec();
        for &(i, s) in moves {
            p[i] += s * h[i];
        }
        p
    };
    let mut pts = Vec::new();
    for i in 0..n {
        pts.push(shifted(&[(i, 1.0)]));
        pts.push(shifted(&[(i, -1.0)]));
    }
    for i in 0..n {
        for j in 0..i {
            for (si, sj) in [(1.0, 1.0), (1.0, -1.0), (-1.0, 1.0), (-1.0, -1.0)] {
                pts.push(shifted(&[(i, si), (j, sj)]));
            }
        }
    }
    let f = costs(obj, maps, &pts, false)?;
    let mut hm = DMatrix::zeros(n, n);
    for i in 0..n {
        hm[(i, i)] = (f[2 * i] - 2.0 * f0 + f[2 * i + 1]) / (h[i] * h[i]);
    }
    let mut k = 2 * n;
    for i in 0..n {
        for j in 0..i {
            let v = (f[k] - f[k + 1] - f[k + 2] + f[k + 3]) / (4.0 * h[i] * h[j]);
            hm[(i, j)] = v;
            hm[(j, i)] = v;
            k += 4;
        }
    }
    Ok(hm)
}

/// One fitted value's uncertainty.
#[derive(Debug, Clone, Copy, PartialEq)]
pub(crate) struct Spread {
    /// Asymptotic standard error.
    pub std_error: f64,
    /// 95 % interval.
    pub lower: f64,
    /// 95 % interval.
    pub upper: f64,
}

/// Standard errors, intervals, correlations and the flat sets.
#[derive(Debug, Clone)]
pub(crate) struct Errors {
    /// Per value; None for one in a flat direction (or when the curvature is unusable).
    pub spread: Vec<Option<Spread>>,
    /// Correlation matrix; None for entries of values in a flat direction.
    pub correlation: Vec<Vec<Option<f64>>>,
    /// Indices of the values that the readings cannot pin down.
    pub flat: Vec<usize>,
}

/// Errors from the curvature `h` of −ln L at `u`.
pub(crate) fn errors(h: &DMatrix<f64>, maps: &[Map], u: &[f64]) -> Errors {
    let n = u.len();
    let finite = h.iter().all(|v| v.is_finite());
    let top = (0..n).map(|i| h[(i, i)]).fold(0.0_f64, f64::max);
    // A value whose own curvature is nil (or negative) is flat by itself.
    let mut flat: Vec<bool> = (0..n)
        .map(|i| !finite || !(h[(i, i)] > 1e-12 * top) || top <= 0.0)
        .collect();
    let live: Vec<usize> = (0..n).filter(|&i| !flat[i]).collect();
    let m = live.len();
    let mut cov_u = DMatrix::<f64>::zeros(n, n);
    if m > 0 {
        let d: Vec<f64> = live.iter().map(|&i| 1.0 / h[(i, i)].sqrt()).collect();
        let c = DMatrix::from_fn(m, m, |a, b| d[a] * h[(live[a], live[b])] * d[b]);
        let eig = SymmetricEigen::new(c);
        for k in 0..m {
            let lam = eig.eigenvalues[k];
            let v = eig.eigenvectors.column(k);
            if lam < FLAT {
                for a in 0..m {
                    if v[a].abs() > 0.2 {
                        flat[live[a]] = true;
                    }
                }
                continue;
            }
            for a in 0..m {
                for b in 0..m {
                    cov_u[(live[a], live[b])] += d[a] * v[a] * v[b] * d[b] / lam;
                }
            }
        }
    }
    // The sums above run in different orders for (a, b) and (b, a): make it symmetric.
    for a in 0..n {
        for b in 0..a {
            cov_u[(a, b)] = cov_u[(b, a)];
        }
    }
    let spread = (0..n)
        .map(|i| {
            if flat[i] || !(cov_u[(i, i)] > 0.0) {
                return None;
            }
            let se_u = cov_u[(i, i)].sqrt();
            let (a, b) = (maps[i].x(u[i] - Z95 * se_u), maps[i].x(u[i] + Z95 * se_u));
            Some(Spread {
                std_error: maps[i].slope(u[i]).abs() * se_u,
                lower: a.min(b),
                upper: a.max(b),
            })
        })
        .collect::<Vec<_>>();
    let correlation = (0..n)
        .map(|i| {
            (0..n)
                .map(|j| {
                    if spread[i].is_none() || spread[j].is_none() {
                        return None;
                    }
                    if i == j {
                        return Some(1.0);
                    }
                    let r = cov_u[(i, j)] / (cov_u[(i, i)] * cov_u[(j, j)]).sqrt();
                    // The sign of dx/du turns a correlation over for a value bounded above.
                    let sign = (maps[i].slope(u[i]) * maps[j].slope(u[j])).signum();
                    Some((sign * r).clamp(-1.0, 1.0))
                })
                .collect()
        })
        .collect();
    Errors {
        spread,
        correlation,
        flat: (0..n).filter(|&i| flat[i]).collect(),
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn a_quadratic_gives_back_its_inverse_and_a_flat_pair_is_named() {
        // −ln L = ½ uᵀ H u with a known H: the covariance is H⁻¹ (exact for a quadratic).
        let h = DMatrix::from_row_slice(2, 2, &[4.0, 1.0, 1.0, 2.0]);
        let maps = [Map::Plain, Map::Plain];
        let e = errors(&h, &maps, &[0.0, 0.0]);
        let inv = h.clone().try_inverse().unwrap();
        let se0 = e.spread[0].unwrap().std_error;
        assert!((se0 - inv[(0, 0)].sqrt()).abs() < 1e-12);
        let r = e.correlation[0][1].unwrap();
        assert!((r - inv[(0, 1)] / (inv[(0, 0)] * inv[(1, 1)]).sqrt()).abs() < 1e-12);
        assert!(e.flat.is_empty());
        // Rank one: only u0 + u1 is determined, plus an unrelated third value.
        let h = DMatrix::from_row_slice(3, 3, &[1.0, 1.0, 0.0, 1.0, 1.0, 0.0, 0.0, 0.0, 5.0]);
        let e = errors(&h, &[Map::Plain; 3], &[0.0; 3]);
        assert_eq!(e.flat, vec![0, 1]);
        assert!(e.spread[0].is_none() && e.spread[1].is_none());
        assert!((e.spread[2].unwrap().std_error - (0.2_f64).sqrt()).abs() < 1e-12);
    }
}
