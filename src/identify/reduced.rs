//! Reduced linear models of many-state plants by dynamic mode decomposition (Schmid 2010,
//! J. Fluid Mech. 656, 5–28; the exact form of Tu, Rowley, Luchtenburg, Brunton & Kutz
//! 2014, J. Comput. Dyn. 1(2), 391–421, Algorithm 2), with inputs as in DMD with control
//! (Proctor, Brunton & Kutz 2016, SIAM J. Appl. Dyn. Syst. 15(1), §3.3, the reduced form).
//!
//! From snapshots `x₀ … x_M` (columns of `X`, each the plant's states at one time, `dt`
//! apart) and, optionally, inputs `u₀ … u_M` (the input held from snapshot k to k+1):
//!
//! 1. `X₁ = [x₀ … x_{M−1}]`, `X₂ = [x₁ … x_M]`; the thin SVD `X₁ = U Σ Vᵀ` (faer's
//!    blocked SVD; only `Σ` and `V` are formed, `U_r = X₁ V_r Σ_r⁻¹` for the kept `r`).
//! 2. Rank `r` (given, or the rule below); the amplitudes are `z = U_rᵀ x`.
//! 3. Without inputs `Ã = U_rᵀ X₂ V_r Σ_r⁻¹` (Tu et al. 2014, Alg. 2 step 3). With inputs
//!    `[Ã B̃] = Z₂ [Z₁; U₁]⁺` with `Z₁ = Σ_r V_rᵀ`, `Z₂ = U_rᵀ X₂` (least squares).
//! 4. The eigenvalues `λ` of `Ã` are the DMD eigenvalues (Tu et al. 2014, Alg. 2 step 4),
//!    sorted by modulus, largest (slowest) first; the rates are `ln λ / dt` (principal
//!    complex logarithm, so a rate's imaginary part is within ±π/dt).
//!
//! The model is `z⁺ = Ã z (+ B̃ u)` over the amplitudes, with `x ≈ U_r z`: a real model
//! with the same eigenvalues as the exact DMD modes `X₂ V_r Σ_r⁻¹ w` (Tu et al. 2014,
//! Thm. 1), whose map back to the states is the orthonormal `U_r` (`basis`).
//!
//! **Rank rule.** Without a given rank, `r` counts the singular values above
//! `max(ω(β)·median(σ), RANK_FLOOR·σ₁)`, where `ω(β) ≈ 0.56β³ − 0.95β² + 1.82β + 1.43`
//! (β the aspect ratio `min/max` of `X₁`) is the optimal hard threshold for an unknown
//! noise level (Gavish & Donoho 2014, IEEE Trans. Inf. Theory 60(8), eq. (5); constants
//! from memory), capped at `MAX_AUTO_RANK`. With noise-free data it is the numerical rank.

use super::refusal::{all_finite, check, check_every, IdentifyRefusal, KernelError};
use super::section::{linear_formula, numbered, rows};
use crate::model::Stop;
use faer::dyn_stack::{MemBuffer, MemStack};
use faer::linalg::svd::{svd, svd_scratch, ComputeSvdVectors};
use faer::{MatMut, MatRef, Par, Spec};
use nalgebra::DMatrix;
use serde_json::{json, Map, Value};

/// Singular values below this fraction of the largest count as zero.
pub const RANK_FLOOR: f64 = 1e-10;
/// The largest rank the automatic rule picks (a larger one must be asked for).
pub const MAX_AUTO_RANK: usize = 50;

/// A fitted reduced model (see the module doc for the equations).
#[derive(Debug, Clone)]
pub struct ReducedFit {
    /// The number of modes `r`.
    pub rank: usize,
    /// Singular values of `X₁`, largest first; the rank was read from them.
    pub singular_values: Vec<f64>,
    /// `n_states × r`: the states are `basis · amplitudes` (orthonormal columns `U_r`).
    pub basis: DMatrix<f64>,
    /// `r × r` real transition of the amplitudes.
    pub a: DMatrix<f64>,
    /// `r × m` input matrix of the amplitudes, when inputs were given.
    pub b: Option<DMatrix<f64>>,
    /// The discrete eigenvalues `(re, im)` of `a`, largest modulus first.
    pub eigenvalues: Vec<(f64, f64)>,
    /// The continuous rates `ln(λ)/dt` `(re, im)`, in the order of `eigenvalues`.
    pub rates: Vec<(f64, f64)>,
    /// `r × r` covariance of the amplitudes' one-step residual `z⁺ − Ã z − B̃ u`.
    pub amplitude_cov: DMatrix<f64>,
    /// Per state, the root mean square of `x − U_r U_rᵀ x` over the snapshots of `X₁`
    /// (what the `r` modes miss).
    pub residual_std: Vec<f64>,
}

/// Fit a rank-`rank` (or automatic) reduced model to the snapshots `x` (states × snapshots,
/// `dt` apart) with optional inputs `u` (inputs × snapshots). Refusals name `/series`,
/// `/inputs`, `/dt` or `/rank`. The SVD itself is one call that the `stop` cannot
/// interrupt; it is looked at before and after it and in every loop around it.
pub fn reduced(
    x: &DMatrix<f64>,
    u: Option<&DMatrix<f64>>,
    dt: f64,
    rank: Option<usize>,
    stop: &Stop,
) -> Result<ReducedFit, KernelError> {
    check_input(x, u, dt, rank)?;
    let (n, m) = (x.nrows(), x.ncols() - 1);
    check(stop)?;
    let (sigma, v) = thin_svd(x, m)?;
    check(stop)?;
    let r = pick_rank(&sigma, n.min(m), rank)?;

    // U_r = X₁ V_r Σ_r⁻¹ (n × r), column by column with the stop looked at.
    let x1 = x.columns(0, m);
    let x2 = x.columns(1, m);
    let mut basis = DMatrix::zeros(n, r);
    for c in 0..r {
        check_every(stop, c, 1)?;
        let col = x1 * v.column(c) / sigma[c];
        basis.column_mut(c).copy_from(&col);
    }
    // Z₂ = U_rᵀ X₂ (r × m).
    let mut z2 = DMatrix::zeros(r, m);
    for k in 0..m {
        check_every(stop, k, 256)?;
        z2.column_mut(k).copy_from(&(basis.tr_mul(&x2.column(k))));
    }
    // Z₁ = Σ_r V_rᵀ.
    let mut z1 = DMatrix::zeros(r, m);
    for c in 0..r {
        for k in 0..m {
            z1[(c, k)] = sigma[c] * v[(k, c)];
        }
    }
    let (a, b) = match u {
        None => {
            let mut vs = v.columns(0, r).clone_owned();
            for c in 0..r {
                vs.column_mut(c).scale_mut(1.0 / sigma[c]);
            }
            (&z2 * vs, None)
        }
        Some(u) => {
            let q = u.nrows();
            let mut omega = DMatrix::zeros(r + q, m);
            omega.rows_mut(0, r).copy_from(&z1);
            omega.rows_mut(r, q).copy_from(&u.columns(0, m));
            let svd = omega.transpose().svd(true, true);
            let s = &svd.singular_values;
            if !(s.min() > 1e-12 * s.max()) {
                return Err(IdentifyRefusal::new(
                    "/inputs",
                    "the inputs are linearly dependent on the mode amplitudes (or on each \
                     other), so their effect cannot be told apart; give inputs that vary \
                     independently of the states, or a smaller rank",
                )
                .into());
            }
            let ab = svd
                .solve(&z2.transpose(), 0.0)
                .map_err(|e| IdentifyRefusal::new("/inputs", e.to_string()))?
                .transpose();
            (
                ab.columns(0, r).clone_owned(),
                Some(ab.columns(r, q).clone_owned()),
            )
        }
    };
    check(stop)?;
    let mut resid = &z2 - &a * &z1;
    if let (Some(b), Some(u)) = (&b, u) {
        resid -= b * u.columns(0, m);
    }
    let mut amplitude_cov = &resid * resid.transpose() / m as f64;
    amplitude_cov = (&amplitude_cov + amplitude_cov.transpose()) * 0.5;
    let residual_std = state_residuals(x, &basis, &z1, stop)?;
    let (eigenvalues, rates) = spectrum(&a, dt)?;
    let fit = ReducedFit {
        rank: r,
        singular_values: sigma,
        basis,
        a,
        b,
        eigenvalues,
        rates,
        amplitude_cov,
        residual_std,
    };
    finite_fit(&fit)?;
    Ok(fit)
}

/// Shapes, finite numbers, a positive step, inputs that move, a rank of at least 1.
fn check_input(
    x: &DMatrix<f64>,
    u: Option<&DMatrix<f64>>,
    dt: f64,
    rank: Option<usize>,
) -> Result<(), IdentifyRefusal> {
    if !(dt > 0.0 && dt.is_finite()) {
        return Err(IdentifyRefusal::new(
            "/dt",
            format!("the step must be a positive number of seconds, not {dt}"),
        ));
    }
    if x.nrows() == 0 || x.ncols() < 3 {
        return Err(IdentifyRefusal::new(
            "/series",
            format!(
                "{} states over {} snapshots are too few: at least one state and three \
                 snapshots are needed",
                x.nrows(),
                x.ncols()
            ),
        ));
    }
    all_finite(x, "/series", "a state series")?;
    if rank == Some(0) {
        return Err(IdentifyRefusal::new("/rank", "the rank must be at least 1"));
    }
    if let Some(u) = u {
        if u.ncols() != x.ncols() {
            return Err(IdentifyRefusal::new(
                "/inputs",
                format!(
                    "the inputs have {} snapshots and the states {}; they must match",
                    u.ncols(),
                    x.ncols()
                ),
            ));
        }
        all_finite(u, "/inputs", "an input series")?;
        for c in 0..u.nrows() {
            let row = u.row(c);
            if row.iter().take(x.ncols() - 1).all(|&v| v == row[0]) {
                return Err(IdentifyRefusal::new(
                    "/inputs",
                    format!(
                        "input {} never moves: its effect cannot be told from the \
                         states'; leave it out",
                        c + 1
                    ),
                ));
            }
        }
    }
    Ok(())
}

/// Singular values (largest first) and the right singular vectors (m × k) of `X₁`, the
/// first `m` columns of `x`, by faer's thin SVD without forming `U`.
fn thin_svd(x: &DMatrix<f64>, m: usize) -> Result<(Vec<f64>, DMatrix<f64>), IdentifyRefusal> {
    let n = x.nrows();
    let k = n.min(m);
    let a = MatRef::from_column_major_slice(&x.as_slice()[..n * m], n, m);
    let mut s = vec![0.0; k];
    let mut v = DMatrix::<f64>::zeros(m, k);
    let par = Par::Seq;
    let params: Spec<_, f64> = Default::default();
    let mut buf = MemBuffer::new(svd_scratch::<f64>(
        n,
        m,
        ComputeSvdVectors::No,
        ComputeSvdVectors::Thin,
        par,
        params,
    ));
    let stack = MemStack::new(&mut buf);
    svd(
        a,
        faer::diag::DiagMut::from_slice_mut(&mut s),
        None,
        Some(MatMut::from_column_major_slice_mut(v.as_mut_slice(), m, k)),
        par,
        stack,
        params,
    )
    .map_err(|e| {
        IdentifyRefusal::new(
            "/series",
            format!("the singular value decomposition did not converge ({e:?})"),
        )
    })?;
    // faer gives them in non-increasing order; sort anyway so the rule can rely on it.
    let mut idx: Vec<usize> = (0..k).collect();
    idx.sort_by(|&p, &q| s[q].total_cmp(&s[p]));
    let mut vs = DMatrix::zeros(m, k);
    for (to, &from) in idx.iter().enumerate() {
        vs.column_mut(to).copy_from(&v.column(from));
    }
    Ok((idx.iter().map(|&i| s[i]).collect(), vs))
}

/// The rank: `given` if the data carry that many modes, else the rule of the module doc.
pub fn pick_rank(sv: &[f64], k: usize, given: Option<usize>) -> Result<usize, IdentifyRefusal> {
    let top = sv.first().copied().unwrap_or(0.0);
    if !(top > 0.0) {
        return Err(IdentifyRefusal::new(
            "/series",
            "every snapshot is zero: nothing to identify",
        ));
    }
    let floor = RANK_FLOOR * top;
    let above = sv.iter().filter(|&&s| s > floor).count();
    if let Some(r) = given {
        if r > above {
            return Err(IdentifyRefusal::new(
                "/rank",
                format!(
                    "the snapshots carry at most {above} modes (singular values above \
                     {RANK_FLOOR:e} of the largest; rank-deficient data); rank {r} cannot \
                     be fitted"
                ),
            ));
        }
        return Ok(r);
    }
    let (rows, cols) = (sv.len().max(k), k.max(1));
    let beta = (cols.min(rows) as f64) / (cols.max(rows) as f64);
    let omega = 0.56 * beta.powi(3) - 0.95 * beta * beta + 1.82 * beta + 1.43;
    let mut sorted = sv.to_vec();
    sorted.sort_by(f64::total_cmp);
    let median = sorted[sorted.len() / 2];
    let threshold = (omega * median).max(floor);
    let r = sv.iter().filter(|&&s| s > threshold).count();
    Ok(r.clamp(1, MAX_AUTO_RANK))
}

/// Per state, the RMS over `X₁`'s snapshots of `x − U_r z` with `z = Σ_r V_rᵀ` columns.
fn state_residuals(
    x: &DMatrix<f64>,
    basis: &DMatrix<f64>,
    z1: &DMatrix<f64>,
    stop: &Stop,
) -> Result<Vec<f64>, KernelError> {
    let (n, m) = (x.nrows(), z1.ncols());
    let mut ss = vec![0.0; n];
    let mut col = nalgebra::DVector::zeros(n);
    for k in 0..m {
        check_every(stop, k, 256)?;
        col.gemv(1.0, basis, &z1.column(k), 0.0);
        for (i, s) in ss.iter_mut().enumerate() {
            let d = x[(i, k)] - col[i];
            *s += d * d;
        }
    }
    Ok(ss.into_iter().map(|s| (s / m as f64).sqrt()).collect())
}

/// A complex number as `(re, im)`.
type Pair = (f64, f64);

/// Eigenvalues of `a` (largest modulus first) and their rates `ln λ / dt`; a zero
/// eigenvalue has no rate and is refused.
fn spectrum(a: &DMatrix<f64>, dt: f64) -> Result<(Vec<Pair>, Vec<Pair>), IdentifyRefusal> {
    let mut eig: Vec<(f64, f64)> = a
        .complex_eigenvalues()
        .iter()
        .map(|c| (c.re, c.im))
        .collect();
    eig.sort_by(|p, q| {
        q.0.hypot(q.1)
            .total_cmp(&p.0.hypot(p.1))
            .then(q.1.total_cmp(&p.1))
    });
    let mut rates = Vec::with_capacity(eig.len());
    for (k, &(re, im)) in eig.iter().enumerate() {
        let modulus = re.hypot(im);
        if !(modulus > 0.0) || !modulus.is_finite() {
            return Err(IdentifyRefusal::new(
                "/rank",
                format!(
                    "mode {} has eigenvalue {re} + {im}i, which has no rate (it vanishes \
                     within one step); ask for a smaller rank",
                    k + 1
                ),
            ));
        }
        rates.push((modulus.ln() / dt, im.atan2(re) / dt));
    }
    Ok((eig, rates))
}

/// Refuse a fit with a number that is not finite (never NaN out).
fn finite_fit(f: &ReducedFit) -> Result<(), IdentifyRefusal> {
    let ok = f.a.iter().chain(f.basis.iter()).all(|v| v.is_finite())
        && f.b.as_ref().is_none_or(|b| b.iter().all(|v| v.is_finite()))
        && f.amplitude_cov.iter().all(|v| v.is_finite())
        && f.residual_std.iter().all(|v| v.is_finite())
        && f.rates.iter().all(|r| r.0.is_finite() && r.1.is_finite());
    if ok {
        Ok(())
    } else {
        Err(IdentifyRefusal::new(
            "/series",
            "the fit came out with numbers that are not finite: the snapshots are too \
             badly scaled",
        ))
    }
}

/// The fit as a v1 model section over the amplitudes `mode1 … moder`: discrete `linear`
/// dynamics (`F = Ã`, `B = B̃` with the given `inputs` when the fit has inputs, `dt`),
/// `process_noise.covariance` the amplitudes' residual covariance, and one scalar sensor
/// per entry of `sensors` (`(name, state index)`: the sensor reads that state of the
/// plant), measuring `Σ basis[state, k]·mode_k` with `std` the state's residual RMS
/// (what the modes miss; floored at `1e-9` times the largest, or at the smallest
/// positive number, since a `std` must be positive). A state index past the basis is
/// left out.
pub fn reduced_model(
    fit: &ReducedFit,
    dt: f64,
    inputs: &[String],
    sensors: &[(String, usize)],
) -> Value {
    let r = fit.rank;
    let modes = numbered("mode", r);
    let mut model = Map::new();
    model.insert("states".into(), json!(modes));
    let mut linear = Map::new();
    linear.insert("time".into(), json!("discrete"));
    linear.insert("F".into(), rows(&fit.a));
    if let Some(b) = &fit.b {
        model.insert("inputs".into(), json!(inputs[..b.ncols()]));
        linear.insert("B".into(), rows(b));
    }
    linear.insert("dt".into(), json!(dt));
    model.insert("dynamics".into(), json!({ "linear": linear }));
    model.insert(
        "process_noise".into(),
        json!({ "covariance": rows(&fit.amplitude_cov) }),
    );
    let top = fit.residual_std.iter().copied().fold(0.0, f64::max);
    let floor = (1e-9 * top).max(f64::MIN_POSITIVE);
    let mut out = Map::new();
    for (name, state) in sensors {
        if *state >= fit.basis.nrows() {
            continue;
        }
        let terms = (0..r).map(|k| (fit.basis[(*state, k)], modes[k].as_str()));
        let std = fit.residual_std[*state].max(floor);
        out.insert(
            name.clone(),
            json!({ "measures": linear_formula(terms), "std": std }),
        );
    }
    model.insert("sensors".into(), Value::Object(out));
    Value::Object(model)
}

#[cfg(test)]
#[path = "reduced_tests.rs"]
mod tests;
