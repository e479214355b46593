//! Rauch–Tung–Striebel smoothing over a finished forward run, in the cross-covariance form
//! that serves the extended, unscented and ensemble filters alike:
//!   G_k = C_{k,k+1} (P⁻_{k+1})⁻¹,
//!   mˢ_k = m_k + G_k (mˢ_{k+1} − m⁻_{k+1}),
//!   Pˢ_k = P_k + G_k (Pˢ_{k+1} − P⁻_{k+1}) G_kᵀ,
//! where C_{k,k+1} = Cov(x_k, x_{k+1} | y_{1:k}): P_k Φᵀ for the linear/extended filter
//! (Rauch, Tung & Striebel 1965, AIAA J. 3(8)), the sigma-point cross covariance for the
//! unscented form (Särkkä 2008, IEEE TAC 53(3)), the member cross covariance for the ensemble.
//! Lines with equal times have no prediction between them (G = I).

use crate::linalg::{cholesky, cholesky_solve, symmetrize};
use crate::model::{Halt, Stop};
use nalgebra::{DMatrix, DVector};

/// What the forward pass leaves for one line.
#[derive(Debug, Clone)]
pub struct Stored {
    /// Predicted mean and covariance at this line (before its update), with the cross
    /// covariance from the previous line; `None` when no prediction ran.
    pub predicted: Option<(DVector<f64>, DMatrix<f64>, DMatrix<f64>)>,
    /// Filtered mean after the update.
    pub mean: DVector<f64>,
    /// Filtered covariance after the update.
    pub cov: DMatrix<f64>,
}

/// Why smoothing failed at a line.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct SmoothError {
    /// 0-based line index.
    pub line: usize,
    /// Set when the pass gave up because `stop` fired (deadline or client gone), not
    /// because the numbers failed.
    pub stopped: Option<Halt>,
}

/// Lines of the backward pass between two looks at the clock (the cancel flag is looked
/// at on every line); one line is a few `n × n` products and a Cholesky factor.
const STOP_EVERY: usize = 64;

/// Smooth in place: on return `steps[k].mean`/`cov` hold the smoothed moments. Gives up
/// when `stop` fires.
pub fn rts(steps: &mut [Stored], stop: &Stop) -> Result<(), SmoothError> {
    let Some(n) = steps.first().map(|s| s.mean.len()) else {
        return Ok(());
    };
    let mut l = vec![0.0; n * n];
    let mut gt = vec![0.0; n * n];
    let mut g = DMatrix::zeros(n, n);
    let mut dp = DMatrix::zeros(n, n);
    let mut tmp = DMatrix::zeros(n, n);
    for k in (0..steps.len().saturating_sub(1)).rev() {
        if let Some(why) = stop.every(k, STOP_EVERY) {
            return Err(SmoothError {
                line: k,
                stopped: Some(why),
            });
        }
        let (head, tail) = steps.split_at_mut(k + 1);
        let cur = &mut head[k];
        let next = &tail[0];
        let Some((m_pred, p_pred, cross)) = &next.predicted else {
            cur.mean.copy_from(&next.mean);
            cur.cov.copy_from(&next.cov);
            continue;
        };
        // Gᵀ = P⁻⁻¹ Cᵀ.
        cholesky(p_pred.as_slice(), &mut l, n).map_err(|_| SmoothError {
            line: k + 1,
            stopped: None,
        })?;
        for i in 0..n {
            for j in 0..n {
                gt[j + i * n] = cross[(i, j)];
            }
        }
        cholesky_solve(&l, n, &mut gt, n);
        for i in 0..n {
            for j in 0..n {
                g[(i, j)] = gt[j + i * n];
            }
        }
        let dm = &next.mean - m_pred;
        cur.mean += &g * dm;
        dp.copy_from(&next.cov);
        dp -= p_pred;
        g.mul_to(&dp, &mut tmp);
        crate::linalg::mul_abt(&tmp, &g, &mut dp);
        cur.cov += &dp;
        symmetrize(&mut cur.cov);
        if !cur.mean.iter().chain(cur.cov.iter()).all(|x| x.is_finite()) {
            return Err(SmoothError {
                line: k,
                stopped: None,
            });
        }
    }
    Ok(())
}
