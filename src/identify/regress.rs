//! Regression rows and the thresholded least-squares fit.
//!
//! Rows of the integral form (module doc of [`crate::identify`]): window r covers sample
//! intervals k..k+w, with Φ[r, j] = Σ_{i=k}^{k+w−1} (t_{i+1} − t_i)/2 · (θ_j(t_i) + θ_j(t_{i+1}))
//! and Y[r, s] = x_s(t_{k+w}) − x_s(t_k) − ∫ known_s dt. Windows do not overlap, so rows
//! share at most an end reading. Rows of a discrete map: Φ[k, j] = θ_j(t_k),
//! Y[k, s] = x_s(t_{k+1}).
//!
//! The fit is sequentially thresholded least squares (Brunton, Proctor & Kutz 2016, PNAS
//! 113(15), "sparse identification", their Code 1): solve least squares, set every
//! coefficient smaller in magnitude than the threshold to zero, solve again on the terms
//! left, until the set of terms stops changing. Each least-squares solve is a Cholesky
//! factor of the normal equations over columns scaled to unit norm (Golub & Van Loan 2013,
//! §5.3 and §5.3.8 on scaling; common practice). Standard errors are the usual
//! se_j = √(s² [(ΦᵀΦ)⁻¹]_jj) with s² = RSS / (rows − kept terms) (common practice).

use super::library::halt;
use super::{Coefficients, IdentifyError, Series};
use crate::model::Stop;
use nalgebra::{DMatrix, DVector};

/// Regression rows: `phi[j * rows + r]` (term-major), `y[s * rows + r]` (state-major) and
/// the time span of each row.
#[derive(Debug, Clone, Default)]
pub struct Design {
    /// Number of rows.
    pub rows: usize,
    /// Term-major regressors.
    pub phi: Vec<f64>,
    /// State-major targets.
    pub y: Vec<f64>,
    /// Seconds covered by each row.
    pub span: Vec<f64>,
}

/// Columns of terms (or known rates) over the samples: `at[j * m + i]` at sample i, and
/// `held[j * (m − 1) + i]` at the states of sample i + 1 with the inputs of sample i (the
/// right end of interval i under inputs held from one sample to the next; empty when
/// there are no inputs, as it then equals `at` at sample i + 1).
#[derive(Debug, Clone, Default)]
pub struct Columns {
    /// At each sample.
    pub at: Vec<f64>,
    /// At the end of each interval, inputs held.
    pub held: Vec<f64>,
}

/// Rows of the integral form over samples `a..b` in windows of `w` intervals. `cols` are
/// the library columns (term-major, `series.len()` each), `known` the known rates
/// (state-major) or empty.
pub fn integral(
    series: &Series,
    cols: &Columns,
    known: &Columns,
    (a, b): (usize, usize),
    w: usize,
    stop: &Stop,
) -> Result<Design, IdentifyError> {
    let m = series.len();
    let terms = cols.at.len() / m.max(1);
    let n = series.states;
    let starts: Vec<usize> = (a..b).step_by(w.max(1)).filter(|&k| k + w < b).collect();
    let rows = starts.len();
    let mut d = Design {
        rows,
        phi: vec![0.0; terms * rows],
        y: vec![0.0; n * rows],
        span: starts
            .iter()
            .map(|&k| series.t[k + w] - series.t[k])
            .collect(),
    };
    // The right end of interval i is the term at (x(t_{i+1}), u(t_i)): inputs hold.
    let trapezoid = |c: &Columns, j: usize, k: usize| -> f64 {
        let col = &c.at[j * m..(j + 1) * m];
        let mut acc = 0.0;
        for i in k..k + w {
            let right = if c.held.is_empty() {
                col[i + 1]
            } else {
                c.held[j * (m - 1) + i]
            };
            acc += 0.5 * (series.t[i + 1] - series.t[i]) * (col[i] + right);
        }
        acc
    };
    for j in 0..terms {
        halt(stop)?;
        for (r, &k) in starts.iter().enumerate() {
            d.phi[j * rows + r] = trapezoid(cols, j, k);
        }
    }
    for s in 0..n {
        halt(stop)?;
        let x = series.slot(s);
        for (r, &k) in starts.iter().enumerate() {
            let mut v = x[k + w] - x[k];
            if !known.at.is_empty() {
                v -= trapezoid(known, s, k);
            }
            d.y[s * rows + r] = v;
        }
    }
    Ok(d)
}

/// Rows of a discrete map over samples `a..b`: each sample's terms against the next
/// sample's states.
pub fn discrete(series: &Series, cols: &Columns, (a, b): (usize, usize)) -> Design {
    let cols = &cols.at[..];
    let m = series.len();
    let terms = cols.len() / m.max(1);
    let n = series.states;
    let rows = b.saturating_sub(a + 1);
    let mut d = Design {
        rows,
        phi: vec![0.0; terms * rows],
        y: vec![0.0; n * rows],
        span: (a..a + rows)
            .map(|k| series.t[k + 1] - series.t[k])
            .collect(),
    };
    for j in 0..terms {
        d.phi[j * rows..(j + 1) * rows].copy_from_slice(&cols[j * m + a..j * m + a + rows]);
    }
    for s in 0..n {
        d.y[s * rows..(s + 1) * rows].copy_from_slice(&series.slot(s)[a + 1..a + 1 + rows]);
    }
    d
}

/// Smallest ratio of eigenvalues of the scaled Gram matrix (λ_min / λ_max) taken as full
/// rank: past it, coefficients carry fewer than about four significant digits.
const RANK_RATIO: f64 = 1e-12;

/// Sequentially thresholded least squares on `d`: every state's coefficients over the
/// terms `names`, dropping those below `threshold` in magnitude (`0` keeps every term).
/// Refuses fewer than two rows per term and terms that collide over the data.
pub fn stlsq(
    d: &Design,
    names: &[String],
    threshold: f64,
    stop: &Stop,
) -> Result<Coefficients, IdentifyError> {
    let k = names.len();
    let rows = d.rows;
    let n = d.y.len() / rows.max(1);
    if rows < 2 * k || rows == 0 {
        return Err(IdentifyError::TooFewSamples {
            need: 2 * k.max(1),
            have: rows,
        });
    }
    let col = |j: usize| &d.phi[j * rows..(j + 1) * rows];
    let scale: Vec<f64> = (0..k)
        .map(|j| col(j).iter().map(|v| v * v).sum::<f64>().sqrt())
        .collect();
    if let Some(j) = scale.iter().position(|&s| s == 0.0 || !s.is_finite()) {
        return Err(IdentifyError::RankDeficient {
            terms: vec![names[j].clone()],
        });
    }
    let mut gram = DMatrix::zeros(k, k);
    for i in 0..k {
        halt(stop)?;
        for j in 0..=i {
            let g = dot(col(i), col(j)) / (scale[i] * scale[j]);
            gram[(i, j)] = g;
            gram[(j, i)] = g;
        }
    }
    collisions(&gram, names)?;
    let mut out = Coefficients {
        terms: names.to_vec(),
        coef: vec![0.0; n * k],
        std_error: vec![0.0; n * k],
        kept: vec![false; n * k],
    };
    for s in 0..n {
        halt(stop)?;
        let y = &d.y[s * rows..(s + 1) * rows];
        let rhs: Vec<f64> = (0..k).map(|j| dot(col(j), y) / scale[j]).collect();
        let mut active: Vec<usize> = (0..k).collect();
        let mut beta = vec![0.0; k];
        // Each pass drops at least one term or stops, so k + 1 passes always suffice.
        for _ in 0..=k {
            beta = solve(&gram, &rhs, &active, names)?;
            for (b, &j) in beta.iter_mut().zip(&active) {
                *b /= scale[j];
            }
            let next: Vec<usize> = active
                .iter()
                .zip(&beta)
                .filter(|(_, b)| b.abs() >= threshold)
                .map(|(&j, _)| j)
                .collect();
            if next.len() == active.len() || next.is_empty() {
                if next.is_empty() {
                    active.clear();
                    beta.clear();
                }
                break;
            }
            active = next;
        }
        let mut res = y.to_vec();
        for (&j, &b) in active.iter().zip(&beta) {
            for (r, &p) in res.iter_mut().zip(col(j)) {
                *r -= b * p;
            }
        }
        let dof = rows.saturating_sub(active.len()).max(1);
        let s2 = dot(&res, &res) / dof as f64;
        let inv = inverse_diagonal(&gram, &active, names)?;
        for ((&j, &b), &iv) in active.iter().zip(&beta).zip(&inv) {
            out.coef[s * k + j] = b;
            out.std_error[s * k + j] = (s2 * iv).sqrt() / scale[j];
            out.kept[s * k + j] = true;
        }
    }
    Ok(out)
}

/// Σ a_i b_i.
fn dot(a: &[f64], b: &[f64]) -> f64 {
    a.iter().zip(b).map(|(x, y)| x * y).sum()
}

/// Refuse a Gram matrix whose smallest eigenvalue is below [`RANK_RATIO`] of its largest,
/// naming the terms that weigh in the eigenvector of the smallest.
fn collisions(gram: &DMatrix<f64>, names: &[String]) -> Result<(), IdentifyError> {
    let eig = gram.clone().symmetric_eigen();
    let (lo, hi) = eig.eigenvalues.iter().enumerate().fold(
        ((0, f64::INFINITY), f64::NEG_INFINITY),
        |((i0, v0), h), (i, &v)| (if v < v0 { (i, v) } else { (i0, v0) }, h.max(v)),
    );
    if lo.1 > RANK_RATIO * hi && lo.1.is_finite() {
        return Ok(());
    }
    let v = eig.eigenvectors.column(lo.0);
    let top = v.iter().fold(0.0f64, |a, x| a.max(x.abs()));
    let terms = v
        .iter()
        .zip(names)
        .filter(|(x, _)| x.abs() >= 0.2 * top)
        .map(|(_, n)| n.clone())
        .collect();
    Err(IdentifyError::RankDeficient { terms })
}

/// The sub-matrix of `gram` over `active`.
fn sub(gram: &DMatrix<f64>, active: &[usize]) -> DMatrix<f64> {
    DMatrix::from_fn(active.len(), active.len(), |a, b| {
        gram[(active[a], active[b])]
    })
}

/// Solve the normal equations over the `active` terms (scaled units).
fn solve(
    gram: &DMatrix<f64>,
    rhs: &[f64],
    active: &[usize],
    names: &[String],
) -> Result<Vec<f64>, IdentifyError> {
    let b = DVector::from_iterator(active.len(), active.iter().map(|&j| rhs[j]));
    let ch = sub(gram, active)
        .cholesky()
        .ok_or_else(|| rank(active, names))?;
    Ok(ch.solve(&b).iter().copied().collect())
}

/// Diagonal of the inverse of `gram` over the `active` terms.
fn inverse_diagonal(
    gram: &DMatrix<f64>,
    active: &[usize],
    names: &[String],
) -> Result<Vec<f64>, IdentifyError> {
    if active.is_empty() {
        return Ok(Vec::new());
    }
    let ch = sub(gram, active)
        .cholesky()
        .ok_or_else(|| rank(active, names))?;
    Ok(ch.inverse().diagonal().iter().copied().collect())
}

fn rank(active: &[usize], names: &[String]) -> IdentifyError {
    IdentifyError::RankDeficient {
        terms: active.iter().map(|&j| names[j].clone()).collect(),
    }
}

/// Root mean square of each state's residual Y − Φ ξ over the rows of `d` (empty when `d`
/// has no row).
pub fn residual_rms(d: &Design, c: &Coefficients) -> Vec<f64> {
    residuals(d, c)
        .iter()
        .map(|r| (dot(r, r) / r.len() as f64).sqrt())
        .collect()
}

/// Each state's residual Y − Φ ξ over the rows of `d`.
pub fn residuals(d: &Design, c: &Coefficients) -> Vec<Vec<f64>> {
    let k = c.terms.len();
    let rows = d.rows;
    if rows == 0 {
        return Vec::new();
    }
    let n = d.y.len() / rows;
    (0..n)
        .map(|s| {
            let mut r = d.y[s * rows..(s + 1) * rows].to_vec();
            for j in 0..k {
                let b = c.coef[s * k + j];
                if c.kept[s * k + j] {
                    for (v, &p) in r.iter_mut().zip(&d.phi[j * rows..(j + 1) * rows]) {
                        *v -= b * p;
                    }
                }
            }
            r
        })
        .collect()
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn thresholding_drops_a_term_the_data_do_not_need() {
        // y = 3 a exactly; b is unrelated, so its coefficient is tiny and dropped.
        let rows = 50;
        let a: Vec<f64> = (0..rows).map(|i| (i as f64 * 0.37).sin()).collect();
        let b: Vec<f64> = (0..rows).map(|i| (i as f64 * 0.11).cos()).collect();
        let d = Design {
            rows,
            phi: [a.clone(), b].concat(),
            y: a.iter().map(|v| 3.0 * v).collect(),
            span: vec![1.0; rows],
        };
        let names = vec!["a".to_string(), "b".to_string()];
        let c = stlsq(&d, &names, 0.1, &Stop::never()).unwrap();
        assert!((c.coef[0] - 3.0).abs() < 1e-12);
        assert_eq!(c.kept, [true, false]);
    }

    #[test]
    fn two_equal_columns_are_named_as_colliding() {
        let rows = 20;
        let a: Vec<f64> = (0..rows).map(|i| i as f64).collect();
        let d = Design {
            rows,
            phi: [a.clone(), a.clone()].concat(),
            y: a,
            span: vec![1.0; rows],
        };
        let names = vec!["p".to_string(), "q".to_string()];
        match stlsq(&d, &names, 0.0, &Stop::never()) {
            Err(IdentifyError::RankDeficient { terms }) => assert_eq!(terms, names),
            other => panic!("expected a rank refusal, got {other:?}"),
        }
    }
}
