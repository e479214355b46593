//! Which states the sensors can recover: the rank of the observability matrix of the model
//! linearised at a point, O = [H; H F; H F²; …; H F^{n−1}] (Kalman 1960; for the local,
//! linearised test see e.g. Simon 2006, *Optimal State Estimation*, §1.7), for all sensors
//! together and for each alone. State i is unrecoverable when the unit vector eᵢ has a
//! component in the null space of O (it is not in O's row space).
//! F is ∂f/∂x for rates and A for linear continuous models, ∂g/∂x or F for discrete ones.
//!
//! The analysis alone; the `POST /v1/check` answer built on it is [`crate::job::check`].

use crate::model::{Dynamics, Model};
use nalgebra::{DMatrix, DVector};
use serde::Serialize;

/// Rank and unrecoverable states for one set of sensors.
#[derive(Debug, Clone, Serialize, PartialEq)]
pub struct Observability {
    /// Rank of the observability matrix.
    pub rank: usize,
    /// Number of states.
    pub dimension: usize,
    /// States the sensors cannot recover.
    pub unobservable: Vec<String>,
}

/// Dynamics Jacobian (n × n) and each sensor's Jacobian at `x`, inputs `u`, time `t`.
pub fn jacobians(
    model: &Model,
    x: &DVector<f64>,
    u: &DVector<f64>,
    t: f64,
) -> (DMatrix<f64>, Vec<DMatrix<f64>>) {
    let (n, nu) = (model.n(), model.nu());
    let mut vars = vec![0.0; model.slot_count()];
    vars[..n].copy_from_slice(x.as_slice());
    vars[n..n + nu].copy_from_slice(u.as_slice());
    vars[n + nu] = t;
    vars[n + nu + 1] = 1.0;
    let mut f = DMatrix::zeros(n, n);
    match &model.dynamics {
        Dynamics::Linear { matrix, .. } => f.copy_from(matrix),
        Dynamics::Rates(p) | Dynamics::Next(p) => {
            let mut ws = p.workspace();
            let mut out = vec![0.0; p.outputs()];
            let mut jac = vec![0.0; p.outputs() * n];
            p.eval_jacobian(&vars[..p.slots()], n, &mut ws, &mut out, &mut jac);
            for k in 0..p.outputs() {
                for j in 0..n {
                    f[(k, j)] = jac[k * n + j];
                }
            }
            if matches!(model.dynamics, Dynamics::Next(_)) {
                for k in model.n_model..n {
                    f[(k, k)] = 1.0;
                }
            }
        }
    }
    let hs = model
        .sensors
        .iter()
        .map(|s| {
            let mut ws = s.program.workspace();
            let mut out = vec![0.0; s.dim];
            let mut jac = vec![0.0; s.dim * n];
            s.program
                .eval_jacobian(&vars[..s.program.slots()], n, &mut ws, &mut out, &mut jac);
            DMatrix::from_row_slice(s.dim, n, &jac)
        })
        .collect();
    (f, hs)
}

/// The observability matrix overflowed: some entry of H Fᵏ (k < n) is not finite, so the
/// rank test cannot be made at this point.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct Overflow {
    /// The first power k of F at which a block H Fᵏ has a non-finite entry.
    pub power: usize,
}

/// Observability of the pair (F, H) over the named states.
///
/// F and H must be finite (the caller refuses them otherwise, naming the formula); the
/// blocks H Fᵏ are checked here before the SVD, since the decomposition does not terminate
/// or panics on non-finite input, and powers of a finite F can still overflow.
pub fn analyse(
    f: &DMatrix<f64>,
    h: &DMatrix<f64>,
    states: &[String],
) -> Result<Observability, Overflow> {
    let n = f.nrows();
    let m = h.nrows();
    let mut o = DMatrix::zeros(m * n, n);
    let mut block = h.clone();
    for k in 0..n {
        if !block.iter().all(|v| v.is_finite()) {
            return Err(Overflow { power: k });
        }
        o.view_mut((k * m, 0), (m, n)).copy_from(&block);
        if k + 1 < n {
            block = &block * f;
        }
    }
    // Scale each block row to unit size so that powers of F with large entries do not hide
    // the other rows from the rank tolerance.
    for mut row in o.row_iter_mut() {
        let mut norm = row.norm();
        if norm.is_infinite() {
            // The sum of squares overflowed although every entry is finite: bring the
            // row to its largest entry first.
            let big = row.amax();
            row /= big;
            norm = row.norm();
        }
        if norm > 0.0 {
            row /= norm;
        }
    }
    let svd = o.svd(false, true);
    let smax = svd.singular_values.iter().cloned().fold(0.0, f64::max);
    let tol = smax * 1e-9 * (n as f64);
    let rank = svd.singular_values.iter().filter(|s| **s > tol).count();
    let vt = svd.v_t.expect("requested V");
    // Rows of Vᵀ with singular value ≤ tol span the null space (SVD lists values sorted).
    let mut unobservable = Vec::new();
    for (i, name) in states.iter().enumerate() {
        let mut weight = 0.0;
        for (r, s) in svd.singular_values.iter().enumerate() {
            if *s <= tol {
                weight += vt[(r, i)] * vt[(r, i)];
            }
        }
        // Rows beyond the number of singular values (when m·n < n) are null directions too.
        if vt.nrows() < n {
            weight += 0.0;
        }
        if weight > 1e-8 {
            unobservable.push(name.clone());
        }
    }
    Ok(Observability {
        rank,
        dimension: n,
        unobservable,
    })
}
