//! The `subspace` and `reduced` forms of `POST /v1/identify`: the request's series as the
//! kernels' matrices, the kernels' refusals at the request's own fields, and the answer
//! `{model, prior, terms, fit, order, singular_values, detail}` (plus `basis` for
//! `reduced`, the map from the mode amplitudes back to the states).
//!
//! Both kernels fit on the training part of the series (all but the `holdout` tail); the
//! fit figures are one-step prediction errors over the whole series, reported for the
//! training part and the held-out tail separately (root mean square per output or state):
//! - `subspace`: the innovation-form predictor x̂ₖ₊₁ = A x̂ₖ + B uₖ + K eₖ with
//!   eₖ = yₖ − C x̂ₖ − D uₖ, from the fitted x0 (the steady-state Kalman predictor of the
//!   innovation form; Van Overschee & De Moor 1994, Automatica 30(1), §2);
//! - `reduced`: x̂ₖ₊₁ = U_r (Ã U_rᵀ xₖ + B̃ uₖ), each step from the recorded state
//!   (Tu et al. 2014, J. Comput. Dyn. 1(2): the projected one-step map).
//!
//! The answer's `prior` starts the model at the first sample: the fitted x0 (subspace) or
//! the first snapshot's amplitudes U_rᵀ x₀ (reduced), each with a std equal to the RMS of
//! that state over the training part (a deliberately wide start; the filter narrows it).

use super::parse::{Order, Request};
use super::{Done, RunStats};
use crate::identify::reduced::{reduced, reduced_model, ReducedFit};
use crate::identify::subspace::{subspace, subspace_model, SubspaceFit};
use crate::identify::{overall, IdentifyRefusal, KernelError};
use crate::job::setup::cancelled;
use crate::model::{Halt, Stop};
use crate::problem::{Problem, ProblemKind};
use nalgebra::{DMatrix, DVector};
use serde_json::{json, Map, Value};

/// Relative tolerance on the sample spacing: both forms fit a discrete map at one step.
const EVEN: f64 = 1e-6;

/// The `subspace` form's answer.
pub(super) fn answer_subspace(req: &Request, stop: &Stop) -> Result<Done, Problem> {
    let s = &req.series;
    let dt = step(req)?;
    let (m, l, p) = (s.len(), req.outputs.len(), req.inputs.len());
    let cut = train_len(req);
    let y = DMatrix::from_fn(cut, l, |k, o| s.slot(o)[k]);
    let u = DMatrix::from_fn(cut, p, |k, c| s.slot(l + c)[k]);
    let fit = subspace(&u, &y, fixed(req.order), stop).map_err(kernel_problem)?;
    // One-step prediction over the whole series, from x0.
    let n = fit.order;
    let mut x = fit.x0.clone();
    let mut err = vec![Vec::with_capacity(m); l];
    let mut state_sq = vec![0.0; n];
    for k in 0..m {
        if k % 4096 == 0 {
            halt(stop)?;
        }
        let uk = DVector::from_fn(p, |c, _| s.slot(l + c)[k]);
        let yk = DVector::from_fn(l, |o, _| s.slot(o)[k]);
        let e = &yk - &fit.c * &x - &fit.d * &uk;
        for o in 0..l {
            err[o].push(e[o]);
        }
        if k < cut {
            for (sq, v) in state_sq.iter_mut().zip(x.iter()) {
                *sq += v * v;
            }
        }
        x = &fit.a * &x + &fit.b * &uk + &fit.k * &e;
    }
    let model = subspace_model(&fit, dt, &req.inputs, &req.outputs);
    let states: Vec<String> = (1..=n).map(|k| format!("s{k}")).collect();
    let prior = prior(s.t[0], &states, fit.x0.as_slice(), &state_sq, cut);
    Ok(done(common(
        model,
        prior,
        fit_figures(&req.outputs, &err, cut),
        n,
        &fit.singular_values,
        subspace_detail(&fit, req, cut),
    )))
}

/// The `reduced` form's answer.
pub(super) fn answer_reduced(req: &Request, stop: &Stop) -> Result<Done, Problem> {
    let s = &req.series;
    let dt = step(req)?;
    let (m, n, p) = (s.len(), req.states.len(), req.inputs.len());
    let cut = train_len(req);
    let x = DMatrix::from_fn(n, cut, |i, k| s.slot(i)[k]);
    let u = (p > 0).then(|| DMatrix::from_fn(p, cut, |c, k| s.slot(n + c)[k]));
    let fit = reduced(&x, u.as_ref(), dt, fixed(req.order), stop).map_err(kernel_problem)?;
    let r = fit.rank;
    // One-step prediction from each recorded state; errors land on the later sample.
    let mut err = vec![Vec::with_capacity(m.saturating_sub(1)); n];
    let mut amp_sq = vec![0.0; r];
    let mut xk = DVector::zeros(n);
    for k in 0..m {
        if k % 256 == 0 {
            halt(stop)?;
        }
        for i in 0..n {
            xk[i] = s.slot(i)[k];
        }
        let z = fit.basis.tr_mul(&xk);
        if k < cut {
            for (sq, v) in amp_sq.iter_mut().zip(z.iter()) {
                *sq += v * v;
            }
        }
        if k + 1 == m {
            break;
        }
        let mut next = &fit.a * &z;
        if let Some(b) = &fit.b {
            next += b * DVector::from_fn(p, |c, _| s.slot(n + c)[k]);
        }
        let pred = &fit.basis * next;
        for i in 0..n {
            err[i].push(s.slot(i)[k + 1] - pred[i]);
        }
    }
    let sensors = sensor_states(req);
    let model = reduced_model(&fit, dt, &req.inputs, &sensors);
    let modes: Vec<String> = (1..=r).map(|k| format!("mode{k}")).collect();
    let z0 = fit.basis.tr_mul(&DVector::from_fn(n, |i, _| s.slot(i)[0]));
    let prior = prior(s.t[0], &modes, z0.as_slice(), &amp_sq, cut);
    // The errors of the first cut − 1 steps are the training part.
    let mut answer = common(
        model,
        prior,
        fit_figures(&req.states, &err, cut.saturating_sub(1)),
        r,
        &fit.singular_values,
        reduced_detail(&fit, req, cut),
    );
    if let Value::Object(o) = &mut answer {
        let rows: Vec<Value> = (0..n)
            .map(|i| Value::from((0..r).map(|k| fit.basis[(i, k)]).collect::<Vec<f64>>()))
            .collect();
        o.insert(
            "basis".into(),
            json!({"states": req.states, "modes": modes, "matrix": rows}),
        );
        o.insert(
            "eigenvalues".into(),
            Value::from(
                fit.eigenvalues
                    .iter()
                    .map(|&(re, im)| json!([re, im]))
                    .collect::<Vec<_>>(),
            ),
        );
    }
    Ok(done(answer))
}

/// The sensors the reduced model carries: the `outputs` named (states of the plant that
/// are read), or every state when none are named; each reads its state through the basis.
fn sensor_states(req: &Request) -> Vec<(String, usize)> {
    if req.outputs.is_empty() {
        return req
            .states
            .iter()
            .enumerate()
            .map(|(i, s)| (format!("{s}_reading"), i))
            .collect();
    }
    req.outputs
        .iter()
        .filter_map(|o| {
            let i = req.states.iter().position(|s| s == o)?;
            Some((format!("{o}_reading"), i))
        })
        .collect()
}

/// Both forms fit a discrete map: the samples must be equally spaced.
fn step(req: &Request) -> Result<f64, Problem> {
    req.series.uniform_step(EVEN).ok_or_else(|| {
        Problem::field(
            "/series",
            "the subspace and reduced forms fit a discrete map and need equally spaced \
             samples (resample the series onto one step first)",
        )
    })
}

/// Samples in the training part: all but the `holdout` tail, at least 3.
fn train_len(req: &Request) -> usize {
    let m = req.series.len();
    let cut = ((m as f64) * (1.0 - req.holdout)).round() as usize;
    cut.clamp(3.min(m), m)
}

fn fixed(order: Order) -> Option<usize> {
    match order {
        Order::Auto => None,
        Order::Fixed(n) => Some(n),
    }
}

fn halt(stop: &Stop) -> Result<(), Problem> {
    match stop.halted() {
        None => Ok(()),
        Some(h) => Err(halt_problem(h)),
    }
}

fn halt_problem(h: Halt) -> Problem {
    match h {
        Halt::Cancelled => cancelled(),
        Halt::Deadline => Problem::new(
            ProblemKind::DeadlineExceeded,
            "the request needed more than the compute deadline (counted from its arrival)",
        ),
    }
}

/// A kernel refusal at the request's field: the kernels name `/rank` for what the request
/// calls `order`, and `/dt` for the spacing the request's `series` gives.
fn kernel_problem(e: KernelError) -> Problem {
    match e {
        KernelError::Halted(h) => halt_problem(h),
        KernelError::Refused(IdentifyRefusal { field, detail }) => {
            let field = match field {
                "/rank" => "/order",
                "/dt" => "/series",
                other => other,
            };
            Problem::field(field, detail)
        }
    }
}

/// `{t, mean, std}` by name: the mean given, the std the RMS of `sq` over `count` samples
/// (at least 1e-9 of the largest, since a std must be positive).
fn prior(t: f64, names: &[String], mean: &[f64], sq: &[f64], count: usize) -> Value {
    let rms: Vec<f64> = sq
        .iter()
        .map(|v| (v / count.max(1) as f64).sqrt())
        .collect();
    let top = rms.iter().copied().fold(0.0, f64::max);
    let floor = (1e-9 * top).max(1e-12);
    let mut m = Map::new();
    let mut s = Map::new();
    for (i, name) in names.iter().enumerate() {
        m.insert(name.clone(), Value::from(mean[i]));
        s.insert(name.clone(), Value::from(rms[i].max(floor)));
    }
    json!({"t": t, "mean": m, "std": s})
}

/// `{rmse_train, rmse_holdout, per_state}` from per-name error series whose first
/// `train` entries are the training part.
fn fit_figures(names: &[String], err: &[Vec<f64>], train: usize) -> Value {
    let rms = |v: &[f64]| -> Option<f64> {
        (!v.is_empty()).then(|| (v.iter().map(|x| x * x).sum::<f64>() / v.len() as f64).sqrt())
    };
    let mut per = Map::new();
    let (mut tr, mut ho) = (Vec::new(), Vec::new());
    for (name, e) in names.iter().zip(err) {
        let cut = train.min(e.len());
        let (a, b) = (rms(&e[..cut]).unwrap_or(0.0), rms(&e[cut..]));
        tr.push(a);
        if let Some(b) = b {
            ho.push(b);
        }
        per.insert(name.clone(), json!({"rmse_train": a, "rmse_holdout": b}));
    }
    let holdout = (ho.len() == tr.len() && !ho.is_empty()).then(|| overall(&ho));
    json!({"rmse_train": overall(&tr), "rmse_holdout": holdout, "per_state": per})
}

fn common(
    model: Value,
    prior: Value,
    fit: Value,
    order: usize,
    singular_values: &[f64],
    detail: String,
) -> Value {
    json!({
        "model": model,
        "prior": prior,
        "terms": [],
        "fit": fit,
        "order": order,
        "singular_values": singular_values,
        "detail": detail,
    })
}

fn done(answer: Value) -> Done {
    Done {
        body: serde_json::to_vec(&answer).unwrap_or_default(),
        stats: RunStats::default(),
    }
}

fn subspace_detail(fit: &SubspaceFit, req: &Request, cut: usize) -> String {
    format!(
        "N4SID subspace identification (Van Overschee & De Moor 1994) of order {} ({}), \
         horizon {} block rows, from {cut} samples ({} held out); fit is the RMS one-step \
         prediction error per output; the section keeps the process and sensor noise \
         covariances of the innovation form but not their cross-covariance; the model \
         holds only over the range the data covered",
        fit.order,
        if matches!(req.order, Order::Auto) {
            "chosen at the largest gap of the singular values"
        } else {
            "as given"
        },
        fit.horizon,
        req.series.len() - cut
    )
}

fn reduced_detail(fit: &ReducedFit, req: &Request, cut: usize) -> String {
    format!(
        "exact dynamic mode decomposition (Schmid 2010; Tu et al. 2014) of rank {} ({}) over \
         {} states, from {cut} snapshots ({} held out); the model's states are the mode \
         amplitudes, `basis` maps them back to the plant's states; fit is the RMS one-step \
         prediction error per state; the model holds only over the range the data covered",
        fit.rank,
        if matches!(req.order, Order::Auto) {
            "chosen from the singular values"
        } else {
            "as given"
        },
        req.states.len(),
        req.series.len() - cut
    )
}
