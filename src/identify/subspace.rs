//! Subspace identification: a linear state-space model in innovation form,
//!
//! ```text
//! x[k+1] = A x[k] + B u[k] + K e[k]        e[k] white, covariance Σ
//! y[k]   = C x[k] + D u[k] + e[k]
//! ```
//!
//! from equally spaced input and output series alone, by the N4SID oblique projection
//! (Van Overschee & De Moor 1994, Automatica 30(1), 75–93, §3–4; weights W1 = W2 = I).
//!
//! 1. Block Hankel matrices of the past and future inputs and outputs with `i` block rows
//!    (the horizon) and `j = N − 2i + 1` columns; `H = [U_f; U_p; Y_p; Y_f]`.
//! 2. `Hᵀ = Q R` (Householder QR), so `H = L Qᵀ` with `L = Rᵀ` lower triangular; every
//!    projection below works on the small `L` (Van Overschee & De Moor 1996, *Subspace
//!    Identification for Linear Systems*, §6.1; from memory).
//! 3. The oblique projection of the future outputs along the future inputs onto the past
//!    `W_p = [U_p; Y_p]`: `O_i = Γ W_p` with `Γ = L₃₂ L₂₂⁺` (L₂₂⁺ a pseudo-inverse, for
//!    noise-free data make `W_p` rank-deficient). Its singular values (those of
//!    `Γ [L₂₁ L₂₂]`, divided by √j) are returned and pick the order (rule below).
//! 4. With the first `n` left singular vectors `U₁` and values `S₁`, the state sequence is
//!    `X̂ = S₁^{-½} U₁ᵀ O_i`; its columns are the states at samples `i, i+1, …`.
//! 5. Least squares over consecutive columns (the state-sequence regression of the same
//!    paper's §4.2, with the shifted sequence taken from the next column, as canonical
//!    variate analysis does; common practice): `[x̂ₖ₊₁; yₖ] = [A B; C D] [x̂ₖ; uₖ] + [ρₖ; eₖ]`.
//! 6. `Σ = mean(e eᵀ)` and `K = mean(ρ eᵀ) Σ⁻¹` (the state residual of the innovation form
//!    is `K e`; common practice). Noise-free data (`Σ` at rounding level) give `K = 0`.
//! 7. `x0` (the state at the first sample) by least squares of the model's one-step
//!    predictor `x⁺ = (A − KC) x + (B − KD) u + K y` over the first samples.
//!
//! **Order rule.** Without a given order, `n` is the place of the largest gap between
//! consecutive singular values on a log scale, `n = argmaxₖ ln(σₖ / σₖ₊₁)` for
//! `k = 1 … l·i − 1`, with every σ first raised to at least `RANK_FLOOR · σ₁` so that
//! rounding-level values make no gaps of their own (ties go to the smaller order). For
//! noise-free data this is the true order; with noise it is the step from the system's
//! values down to the noise floor, which holds while the weakest mode stands clear of the
//! noise. A given order above the number of values over the floor is refused.
//!
//! **Horizon.** `i = max(DEFAULT_HORIZON, n/l + 1)` block rows (so `l·i > n`), lowered
//! down to `n/l + 1` when the series is short; every horizon needs at least
//! `j ≥ 4 i (m + l)` columns (twice the rows of `H`), otherwise the series is refused
//! as too short.

use super::refusal::{all_finite, check, check_every, IdentifyRefusal, KernelError};
use super::section::{linear_formula, numbered, rows};
use crate::model::Stop;
use nalgebra::{DMatrix, DVector};
use serde_json::{json, Map, Value};

/// Block rows of the past and future Hankel matrices when the series is long enough.
pub const DEFAULT_HORIZON: usize = 10;
/// Singular values below this fraction of the largest count as zero (rank decisions).
pub const RANK_FLOOR: f64 = 1e-10;
/// Samples at the start over which `x0` is fitted.
const X0_SAMPLES: usize = 200;

/// A fitted innovation-form model (see the module doc for the equations).
#[derive(Debug, Clone)]
pub struct SubspaceFit {
    /// The number of states `n`.
    pub order: usize,
    /// Singular values of the oblique projection, largest first (`l·i` of them), divided
    /// by √j; the order was read from them.
    pub singular_values: Vec<f64>,
    /// `n × n` state transition.
    pub a: DMatrix<f64>,
    /// `n × m` input matrix (`m = 0` columns without inputs).
    pub b: DMatrix<f64>,
    /// `l × n` output matrix.
    pub c: DMatrix<f64>,
    /// `l × m` feedthrough.
    pub d: DMatrix<f64>,
    /// `n × l` innovation-form (steady Kalman) gain.
    pub k: DMatrix<f64>,
    /// `l × l` covariance of the innovations `e`.
    pub innovation_cov: DMatrix<f64>,
    /// The state at the first sample (the mean of a prior at the first sample's time).
    pub x0: DVector<f64>,
    /// The horizon `i` (block rows) used.
    pub horizon: usize,
    /// Standard deviation of each output series (the floor of a sensor's noise in
    /// [`subspace_model`] when the data were noise-free).
    pub output_std: Vec<f64>,
}

/// Fit an innovation-form model of order `order` (or the order the singular values
/// show) to inputs `u` (`N × m`, `m` may be 0) and outputs `y` (`N × l`), rows being
/// samples at a fixed step. See the module doc for the method, the order rule and the
/// horizon; refusals name `/series` (the data) or `/order`.
pub fn subspace(
    u: &DMatrix<f64>,
    y: &DMatrix<f64>,
    order: Option<usize>,
    stop: &Stop,
) -> Result<SubspaceFit, KernelError> {
    check_series(u, y)?;
    if order == Some(0) {
        return Err(IdentifyRefusal::new("/order", "the order must be at least 1").into());
    }
    let (n_samples, m, l) = (y.nrows(), u.ncols(), y.ncols());
    let i = horizon(n_samples, m, l, order)?;
    let j = n_samples + 1 - 2 * i;
    check(stop)?;

    let (mi, pi, li) = (m * i, (m + l) * i, l * i);
    let ht = hankel_transposed(u, y, i, j, stop)?;
    check(stop)?;
    let lower = ht.clone().qr().r().transpose();
    check(stop)?;
    if m > 0 {
        excitation(&lower.view((0, 0), (mi, mi)).clone_owned())?;
    }
    let l21 = lower.view((mi, 0), (pi, mi));
    let l22 = lower.view((mi, mi), (pi, pi)).clone_owned();
    let l32 = lower.view((mi + pi, mi), (li, pi));
    let gamma = l32 * pseudo_inverse(&l22);
    let mut oblique = DMatrix::zeros(li, mi + pi);
    oblique.columns_mut(0, mi).copy_from(&(&gamma * l21));
    oblique.columns_mut(mi, pi).copy_from(&(&gamma * &l22));
    let (left, sv) = sorted_svd(oblique);
    let scale = (j as f64).sqrt();
    let singular_values: Vec<f64> = sv.iter().map(|s| s / scale).collect();
    let n = pick_order(&singular_values, order)?;
    check(stop)?;

    // X̂ᵀ = W_pᵀ Γᵀ U₁ S₁^{-½}: j × n, row k the state at sample i + k.
    let mut weight = gamma.transpose() * left.columns(0, n);
    for c in 0..n {
        let w = 1.0 / sv[c].sqrt();
        weight.column_mut(c).scale_mut(w);
    }
    let states = ht.columns(mi, pi) * weight;
    drop(ht);
    check(stop)?;
    let fit = regress(u, y, &states, i, stop)?;
    let x0 = first_state(u, y, &fit, stop)?;
    let out = SubspaceFit {
        order: n,
        singular_values,
        a: fit.a,
        b: fit.b,
        c: fit.c,
        d: fit.d,
        k: fit.k,
        innovation_cov: fit.cov,
        x0,
        horizon: i,
        output_std: (0..l).map(|c| column_std(y, c)).collect(),
    };
    finite_fit(&out)?;
    Ok(out)
}

/// Same length, at least one output, finite numbers, and no series that never moves.
fn check_series(u: &DMatrix<f64>, y: &DMatrix<f64>) -> Result<(), IdentifyRefusal> {
    if y.ncols() == 0 {
        return Err(IdentifyRefusal::new(
            "/series",
            "no outputs: nothing to identify",
        ));
    }
    if u.nrows() != y.nrows() {
        return Err(IdentifyRefusal::new(
            "/series",
            format!(
                "the inputs have {} samples and the outputs {}; they must be the same rows",
                u.nrows(),
                y.nrows()
            ),
        ));
    }
    all_finite(u, "/series", "an input series")?;
    all_finite(y, "/series", "an output series")?;
    for (what, mat) in [("input", u), ("output", y)] {
        for c in 0..mat.ncols() {
            let col = mat.column(c);
            if col.iter().all(|&v| v == col[0]) {
                return Err(IdentifyRefusal::new(
                    "/series",
                    format!(
                        "{what} {} never moves (every sample is {}): a series that never \
                         moves carries nothing to identify from; leave it out",
                        c + 1,
                        col.get(0).copied().unwrap_or(0.0)
                    ),
                ));
            }
        }
    }
    Ok(())
}

/// The horizon for `n_samples` samples (module doc), or the too-short refusal.
fn horizon(
    n_samples: usize,
    m: usize,
    l: usize,
    order: Option<usize>,
) -> Result<usize, IdentifyRefusal> {
    let least = order.map_or(2, |n| n / l + 1);
    let wanted = DEFAULT_HORIZON.max(least);
    let need = |i: usize| 2 * i - 1 + 4 * i * (m + l);
    (least..=wanted)
        .rev()
        .find(|&i| n_samples >= need(i))
        .ok_or_else(|| {
            IdentifyRefusal::new(
                "/series",
                format!(
                    "{n_samples} samples are too few: with {m} inputs and {l} outputs{} at \
                     least {} are needed (a horizon of {least} block rows)",
                    order.map_or(String::new(), |n| format!(" and order {n}")),
                    need(least)
                ),
            )
        })
}

/// `Hᵀ` (j × 2i(m+l)): columns `[U_f | U_p | Y_p | Y_f]`, block row `p` of the past at
/// sample `k + p` and of the future at `k + i + p` for column `k`.
fn hankel_transposed(
    u: &DMatrix<f64>,
    y: &DMatrix<f64>,
    i: usize,
    j: usize,
    stop: &Stop,
) -> Result<DMatrix<f64>, KernelError> {
    let (m, l) = (u.ncols(), y.ncols());
    let mut ht = DMatrix::zeros(j, 2 * i * (m + l));
    let mut col = 0;
    let put = |src: &DMatrix<f64>, shift: usize, ht: &mut DMatrix<f64>, col: &mut usize| {
        for p in 0..i {
            for c in 0..src.ncols() {
                let from = src.column(c);
                ht.column_mut(*col).copy_from(&from.rows(shift + p, j));
                *col += 1;
            }
        }
    };
    put(u, i, &mut ht, &mut col);
    check_every(stop, 0, 1)?;
    put(u, 0, &mut ht, &mut col);
    put(y, 0, &mut ht, &mut col);
    check_every(stop, 0, 1)?;
    put(y, i, &mut ht, &mut col);
    Ok(ht)
}

/// Refuse inputs that are not persistently exciting: `U_f` (its factor `L₁₁`) must have
/// full row rank, or the future inputs cannot be told from the past.
fn excitation(l11: &DMatrix<f64>) -> Result<(), IdentifyRefusal> {
    let d: Vec<f64> = l11.diagonal().iter().map(|x| x.abs()).collect();
    let big = d.iter().copied().fold(0.0, f64::max);
    if d.iter().any(|&x| !(x > 1e-8 * big)) {
        return Err(IdentifyRefusal::new(
            "/series",
            "the inputs are not rich enough: over the horizon their shifted copies are \
             linearly dependent (an input that is constant, a single sine, or a copy of \
             another), so their effect cannot be told from the state's; use inputs that \
             vary more (steps at irregular times, noise)",
        ));
    }
    Ok(())
}

/// Pseudo-inverse with singular values under `RANK_FLOOR · σ₁` taken as zero.
fn pseudo_inverse(m: &DMatrix<f64>) -> DMatrix<f64> {
    let svd = m.clone().svd(true, true);
    let top = svd.singular_values.max();
    svd.pseudo_inverse(RANK_FLOOR * top)
        .unwrap_or_else(|_| DMatrix::zeros(m.ncols(), m.nrows()))
}

/// Left singular vectors and singular values, largest first.
fn sorted_svd(m: DMatrix<f64>) -> (DMatrix<f64>, Vec<f64>) {
    let svd = m.svd(true, false);
    let u = svd.u.unwrap_or_else(|| DMatrix::zeros(0, 0));
    let s = svd.singular_values;
    let mut idx: Vec<usize> = (0..s.len()).collect();
    idx.sort_by(|&a, &b| s[b].total_cmp(&s[a]));
    let mut left = DMatrix::zeros(u.nrows(), idx.len());
    for (to, &from) in idx.iter().enumerate() {
        left.column_mut(to).copy_from(&u.column(from));
    }
    (left, idx.iter().map(|&k| s[k]).collect())
}

/// The order: `given` if the values carry that many states, else the largest log gap
/// (module doc).
pub fn pick_order(sv: &[f64], given: Option<usize>) -> Result<usize, IdentifyRefusal> {
    let top = sv.first().copied().unwrap_or(0.0);
    if !(top > 0.0) {
        return Err(IdentifyRefusal::new(
            "/series",
            "the outputs show no dynamics that the past explains (every singular value \
             of the projection is zero)",
        ));
    }
    let floor = RANK_FLOOR * top;
    let above = sv.iter().filter(|&&s| s > floor).count();
    if let Some(n) = given {
        if n > above || n >= sv.len() {
            return Err(IdentifyRefusal::new(
                "/order",
                format!(
                    "the data carry at most {} states (singular values above {RANK_FLOOR:e} \
                     of the largest); order {n} cannot be fitted",
                    above.min(sv.len() - 1)
                ),
            ));
        }
        return Ok(n);
    }
    if sv.len() < 2 {
        return Ok(1);
    }
    let lifted: Vec<f64> = sv.iter().map(|&s| s.max(floor)).collect();
    let mut best = (1, f64::NEG_INFINITY);
    for k in 0..lifted.len() - 1 {
        let gap = (lifted[k] / lifted[k + 1]).ln();
        if gap > best.1 {
            best = (k + 1, gap);
        }
    }
    Ok(best.0)
}

/// The least-squares matrices and the noise of the innovation form.
struct Regressed {
    a: DMatrix<f64>,
    b: DMatrix<f64>,
    c: DMatrix<f64>,
    d: DMatrix<f64>,
    k: DMatrix<f64>,
    cov: DMatrix<f64>,
}

/// Step 5–6 of the module doc over the state sequence `states` (row k at sample i + k).
fn regress(
    u: &DMatrix<f64>,
    y: &DMatrix<f64>,
    states: &DMatrix<f64>,
    i: usize,
    stop: &Stop,
) -> Result<Regressed, KernelError> {
    let (n, m, l) = (states.ncols(), u.ncols(), y.ncols());
    let rows = states.nrows() - 1;
    let mut z = DMatrix::zeros(rows, n + m);
    let mut t = DMatrix::zeros(rows, n + l);
    z.columns_mut(0, n).copy_from(&states.rows(0, rows));
    z.columns_mut(n, m).copy_from(&u.rows(i, rows));
    t.columns_mut(0, n).copy_from(&states.rows(1, rows));
    t.columns_mut(n, l).copy_from(&y.rows(i, rows));
    check(stop)?;
    let svd = z.clone().svd(true, true);
    let s = &svd.singular_values;
    if !(s.min() > 1e-12 * s.max()) {
        return Err(IdentifyRefusal::new(
            "/series",
            "rank-deficient data: the estimated states and the inputs are linearly \
             dependent, so the model matrices are not determined; give a smaller order \
             or inputs that vary more",
        )
        .into());
    }
    let theta_t = svd
        .solve(&t, 0.0)
        .map_err(|e| IdentifyRefusal::new("/series", format!("least squares failed: {e}")))?;
    check(stop)?;
    let resid = &t - &z * &theta_t;
    let theta = theta_t.transpose();
    let count = rows as f64;
    let e = resid.columns(n, l);
    let rho = resid.columns(0, n);
    let mut cov = e.transpose() * e / count;
    cov = (&cov + cov.transpose()) * 0.5;
    let out_var: f64 = (0..l).map(|c| column_std(y, c).powi(2)).sum();
    let k = if cov.trace() > 1e-18 * out_var {
        let cross = rho.transpose() * e / count;
        cross * pseudo_inverse(&cov)
    } else {
        DMatrix::zeros(n, l)
    };
    Ok(Regressed {
        a: theta.view((0, 0), (n, n)).clone_owned(),
        b: theta.view((0, n), (n, m)).clone_owned(),
        c: theta.view((n, 0), (l, n)).clone_owned(),
        d: theta.view((n, n), (l, m)).clone_owned(),
        k,
        cov,
    })
}

/// Population standard deviation of column `c`.
fn column_std(y: &DMatrix<f64>, c: usize) -> f64 {
    let col = y.column(c);
    let mean = col.mean();
    (col.iter().map(|v| (v - mean) * (v - mean)).sum::<f64>() / y.nrows() as f64).sqrt()
}

/// Step 7 of the module doc: the first state by least squares of the one-step predictor,
/// `yₖ − ŷₖ(x0 = 0) = C (A − KC)ᵏ x0`, over the first `X0_SAMPLES` samples.
fn first_state(
    u: &DMatrix<f64>,
    y: &DMatrix<f64>,
    f: &Regressed,
    stop: &Stop,
) -> Result<DVector<f64>, KernelError> {
    let (n, l) = (f.a.ncols(), y.ncols());
    let steps = y.nrows().min(X0_SAMPLES);
    let a_bar = &f.a - &f.k * &f.c;
    let b_bar = &f.b - &f.k * &f.d;
    let mut x = DVector::zeros(n);
    let mut power = DMatrix::identity(n, n);
    let mut phi = DMatrix::zeros(steps * l, n);
    let mut r = DVector::zeros(steps * l);
    for k in 0..steps {
        check_every(stop, k, 64)?;
        let uk = u.row(k).transpose();
        let yk = y.row(k).transpose();
        let pred = &f.c * &x + &f.d * &uk;
        r.rows_mut(k * l, l).copy_from(&(&yk - pred));
        phi.rows_mut(k * l, l).copy_from(&(&f.c * &power));
        x = &a_bar * &x + &b_bar * &uk + &f.k * &yk;
        power = &a_bar * power;
        if power.iter().any(|v| !v.is_finite() || v.abs() > 1e150) {
            phi = phi.rows(0, (k + 1) * l).clone_owned();
            r = r.rows(0, (k + 1) * l).clone_owned();
            break;
        }
    }
    let svd = phi.svd(true, true);
    let top = svd.singular_values.max();
    Ok(svd
        .solve(&r, RANK_FLOOR * top)
        .unwrap_or_else(|_| DVector::zeros(n)))
}

/// Refuse a fit with a number that is not finite (never NaN out).
fn finite_fit(f: &SubspaceFit) -> Result<(), IdentifyRefusal> {
    let mats = [&f.a, &f.b, &f.c, &f.d, &f.k, &f.innovation_cov];
    if mats.iter().all(|m| m.iter().all(|v| v.is_finite()))
        && f.x0.iter().all(|v| v.is_finite())
        && f.singular_values.iter().all(|v| v.is_finite())
    {
        Ok(())
    } else {
        Err(IdentifyRefusal::new(
            "/series",
            "the fit came out with numbers that are not finite: the series are too badly \
             scaled or too nearly dependent",
        ))
    }
}

/// The fit as a v1 model section that `/v1/estimate` accepts: states `s1 … sn`, the given
/// `inputs` (as many as `B` has columns), discrete `linear` dynamics (`F = A`, `B`,
/// `dt`), `process_noise.covariance = K Σ Kᵀ`, and one scalar sensor per output, named
/// from `outputs`, measuring `Σ C·s + Σ D·u` (sensor formulas may read inputs) with
/// `std = √Σᵢᵢ`.
///
/// Limits of the section (the filters of v1 assume independent noises): the innovation
/// form's process and sensor noises are one and the same `e` (cross-covariance `K Σ`),
/// and outputs' innovations may be correlated (`Σ` off its diagonal); the section keeps
/// only the two covariances and `Σ`'s diagonal. A zero innovation variance (noise-free
/// data) is written as `std` `1e-9` times the output's standard deviation, since a
/// sensor's `std` must be positive.
pub fn subspace_model(fit: &SubspaceFit, dt: f64, inputs: &[String], outputs: &[String]) -> Value {
    let n = fit.order;
    let states = numbered("s", n);
    let mut model = Map::new();
    model.insert("states".into(), json!(states));
    let m = fit.b.ncols();
    if m > 0 {
        model.insert("inputs".into(), json!(inputs[..m]));
    }
    let mut linear = Map::new();
    linear.insert("time".into(), json!("discrete"));
    linear.insert("F".into(), rows(&fit.a));
    if m > 0 {
        linear.insert("B".into(), rows(&fit.b));
    }
    linear.insert("dt".into(), json!(dt));
    model.insert("dynamics".into(), json!({ "linear": linear }));
    let mut q = &fit.k * &fit.innovation_cov * fit.k.transpose();
    q = (&q + q.transpose()) * 0.5;
    model.insert("process_noise".into(), json!({ "covariance": rows(&q) }));
    let mut sensors = Map::new();
    for (o, name) in outputs.iter().enumerate().take(fit.c.nrows()) {
        let terms = (0..n)
            .map(|s| (fit.c[(o, s)], states[s].as_str()))
            .chain((0..m).map(|c| (fit.d[(o, c)], inputs[c].as_str())));
        let var = fit.innovation_cov[(o, o)];
        let floor = 1e-9 * fit.output_std.get(o).copied().unwrap_or(1.0);
        let std = var.sqrt().max(floor).max(f64::MIN_POSITIVE);
        sensors.insert(
            name.clone(),
            json!({ "measures": linear_formula(terms), "std": std }),
        );
    }
    model.insert("sensors".into(), Value::Object(sensors));
    Value::Object(model)
}

#[cfg(test)]
#[path = "subspace_tests.rs"]
mod tests;
