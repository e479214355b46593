//! The search for the values that maximise the log-likelihood, over the transformed
//! coordinates of `spec` (so bounds are never crossed), with the argmin crate's solvers:
//! L-BFGS with a More–Thuente line search (Nocedal & Wright 2006, *Numerical
//! Optimization*, 2nd ed., §7.2 and §3.5), falling back to Nelder–Mead (Nelder & Mead
//! 1965, Computer Journal 7(4)) from the best point so far when a gradient is unusable (a
//! run failed near the point) or the line search gives up. Optional further starts begin
//! at seeded random offsets from the request's values; the best run of all wins.
//!
//! Gradients are central differences of the scalar objective, ∂f/∂uᵢ ≈ (f(u + hᵢeᵢ) −
//! f(u − hᵢeᵢ))/(2hᵢ), and the curvature for the standard errors is the matrix of second
//! differences (common practice); the runs of one gradient or one curvature go in
//! parallel on all cores.

use super::objective::{cores, Objective, Stop};
use super::spec::Map;
use crate::problem::Problem;
use argmin::core::{CostFunction, Error, Executor, Gradient, State, TerminationReason};
use argmin::solver::linesearch::MoreThuenteLineSearch;
use argmin::solver::neldermead::NelderMead;
use argmin::solver::quasinewton::LBFGS;
use rand::{Rng, SeedableRng};
use std::sync::atomic::{AtomicUsize, Ordering};
use std::sync::Mutex;

/// How the search ended.
#[derive(Debug, Clone)]
pub(crate) struct Ended {
    /// Whether a stopping rule of the solver was met (not the run budget, not a failure).
    pub converged: bool,
    /// Why it stopped, in words.
    pub detail: String,
}

/// Step of a central difference for the gradient in coordinate `u` (a log or logistic
/// coordinate moves by relative amounts, a plain one by its own scale).
fn grad_step(map: Map, u: f64) -> f64 {
    if map.scaled() {
        1e-5
    } else {
        1e-6 * u.abs().max(1.0)
    }
}

/// Step of the second differences for the curvature: larger than the gradient's, since
/// rounding in f is divided by h² (h = 1e-2 in a log coordinate is a 1 % change).
pub(crate) fn curve_step(map: Map, u: f64) -> f64 {
    if map.scaled() {
        1e-2
    } else {
        1e-3 * u.abs().max(1.0)
    }
}

/// The values at search coordinates `u`.
pub(crate) fn to_x(maps: &[Map], u: &[f64]) -> Vec<f64> {
    maps.iter().zip(u).map(|(m, &u)| m.x(u)).collect()
}

/// Run the objective at every point of `us` (search coordinates), in parallel on all
/// cores; each result is −ln L (+∞ for a failed run).
pub(crate) fn costs(
    obj: &Objective<'_>,
    maps: &[Map],
    us: &[Vec<f64>],
    budgeted: bool,
) -> Result<Vec<f64>, Stop> {
    let threads = cores().min(us.len()).max(1);
    let next = AtomicUsize::new(0);
    let out = Mutex::new(vec![f64::INFINITY; us.len()]);
    let stop: Mutex<Option<Stop>> = Mutex::new(None);
    std::thread::scope(|s| {
        for _ in 0..threads {
            s.spawn(|| loop {
                let i = next.fetch_add(1, Ordering::Relaxed);
                if i >= us.len() {
                    break;
                }
                match obj.eval(&to_x(maps, &us[i]), budgeted) {
                    Ok(v) => {
                        if let Ok(mut o) = out.lock() {
                            o[i] = v.ll.map_or(f64::INFINITY, |l| -l);
                        }
                    }
                    Err(e) => {
                        if let Ok(mut st) = stop.lock() {
                            // A fatal stop outranks a spent budget.
                            if !matches!(*st, Some(Stop::Fatal(_))) {
                                *st = Some(e);
                            }
                        }
                        break;
                    }
                }
            });
        }
    });
    if let Some(e) = stop.into_inner().unwrap_or(None) {
        return Err(e);
    }
    Ok(out.into_inner().unwrap_or_default())
}

/// The problem argmin sees: −ln L over search coordinates. A stop (budget, deadline) is
/// kept here and ends the solver with an error; so does a failed run under L-BFGS (its
/// line search cannot use +∞), while Nelder–Mead takes +∞ as a bad point.
struct Cost<'o, 'a> {
    obj: &'o Objective<'a>,
    maps: &'o [Map],
    derivative_free: bool,
    stop: Mutex<Option<Stop>>,
    /// The norm of the last gradient.
    grad_norm: Mutex<f64>,
}

impl Cost<'_, '_> {
    fn keep(&self, e: Stop) -> Error {
        let msg = match &e {
            Stop::Budget => "run budget spent",
            Stop::Fatal(_) => "stopped",
        };
        if let Ok(mut st) = self.stop.lock() {
            *st = Some(e);
        }
        Error::msg(msg)
    }
}

impl CostFunction for &Cost<'_, '_> {
    type Param = Vec<f64>;
    type Output = f64;

    fn cost(&self, u: &Vec<f64>) -> Result<f64, Error> {
        match self.obj.eval(&to_x(self.maps, u), true) {
            Ok(v) => match v.ll {
                Some(ll) => Ok(-ll),
                None if self.derivative_free => Ok(f64::INFINITY),
                None => Err(Error::msg("a run failed")),
            },
            Err(e) => Err(self.keep(e)),
        }
    }
}

impl Gradient for &Cost<'_, '_> {
    type Param = Vec<f64>;
    type Gradient = Vec<f64>;

    fn gradient(&self, u: &Vec<f64>) -> Result<Vec<f64>, Error> {
        let n = u.len();
        let h: Vec<f64> = (0..n).map(|i| grad_step(self.maps[i], u[i])).collect();
        let mut pts = Vec::with_capacity(2 * n);
        for i in 0..n {
            for s in [1.0, -1.0] {
                let mut p = u.clone();
                p[i] += s * h[i];
                pts.push(p);
            }
        }
        let f = costs(self.obj, self.maps, &pts, true).map_err(|e| self.keep(e))?;
        let g: Vec<f64> = (0..n)
            .map(|i| (f[2 * i] - f[2 * i + 1]) / (2.0 * h[i]))
            .collect();
        if g.iter().any(|x| !x.is_finite()) {
            return Err(Error::msg("the gradient is unusable"));
        }
        if let Ok(mut gn) = self.grad_norm.lock() {
            *gn = g.iter().map(|x| x * x).sum::<f64>().sqrt();
        }
        Ok(g)
    }
}

/// What one solver ended with, before the fallback is decided.
enum Outcome {
    Converged(String),
    Stopped(Stop),
    Unusable(String),
}

fn finish(cost: &Cost<'_, '_>, reason: Option<TerminationReason>, tol_grad: f64) -> Outcome {
    if let Some(st) = cost.stop.lock().ok().and_then(|mut s| s.take()) {
        return Outcome::Stopped(st);
    }
    match reason {
        Some(TerminationReason::SolverConverged) => {
            let gn = cost.grad_norm.lock().map_or(f64::NAN, |g| *g);
            if cost.derivative_free {
                Outcome::Converged("the simplex shrank below the tolerance".into())
            } else if gn < tol_grad {
                Outcome::Converged("gradient norm below tolerance".into())
            } else {
                Outcome::Converged(
                    "the log-likelihood stopped changing (change below tolerance)".into(),
                )
            }
        }
        Some(TerminationReason::MaxItersReached) => {
            Outcome::Unusable("the iteration limit was reached".into())
        }
        Some(TerminationReason::SolverExit(why)) => Outcome::Unusable(why),
        other => Outcome::Unusable(format!("{other:?}")),
    }
}

/// Most iterations of one solver (the run budget usually ends a search first).
const MAX_ITERS: u64 = 10_000;

/// L-BFGS from `u0`, then Nelder–Mead from the best point if needed.
fn one_start(
    obj: &Objective<'_>,
    maps: &[Map],
    u0: Vec<f64>,
    tol_grad: f64,
    tol_cost: f64,
) -> Result<Ended, Problem> {
    let cost = Cost {
        obj,
        maps,
        derivative_free: false,
        stop: Mutex::new(None),
        grad_norm: Mutex::new(f64::INFINITY),
    };
    let solver = LBFGS::new(MoreThuenteLineSearch::new(), 7)
        .with_tolerance_grad(tol_grad)
        .and_then(|s| s.with_tolerance_cost(tol_cost));
    let reason = match solver {
        Ok(solver) => {
            let res = Executor::new(&cost, solver)
                .configure(|c| c.param(u0.clone()).max_iters(MAX_ITERS))
                .run();
            match res {
                Ok(r) => r.state().get_termination_reason().cloned(),
                Err(e) => Some(TerminationReason::SolverExit(e.to_string())),
            }
        }
        Err(e) => Some(TerminationReason::SolverExit(e.to_string())),
    };
    let why = match finish(&cost, reason, tol_grad) {
        Outcome::Converged(d) => {
            return Ok(Ended {
                converged: true,
                detail: d,
            })
        }
        Outcome::Stopped(s) => return stopped(s),
        Outcome::Unusable(why) => why,
    };
    // Derivative-free from the best point so far.
    let start = obj
        .best()
        .map(|(_, x)| maps.iter().zip(&x).map(|(m, &x)| m.u(x)).collect())
        .unwrap_or(u0);
    let mut simplex = vec![start.clone()];
    for i in 0..start.len() {
        let mut p = start.clone();
        p[i] += if maps[i].scaled() {
            0.5
        } else {
            0.1 * p[i].abs().max(1.0)
        };
        simplex.push(p);
    }
    let nm_cost = Cost {
        derivative_free: true,
        stop: Mutex::new(None),
        grad_norm: Mutex::new(f64::NAN),
        ..cost
    };
    let reason = match NelderMead::new(simplex).with_sd_tolerance(tol_cost) {
        Ok(nm) => match Executor::new(&nm_cost, nm)
            .configure(|c| c.max_iters(MAX_ITERS))
            .run()
        {
            Ok(r) => r.state().get_termination_reason().cloned(),
            Err(e) => Some(TerminationReason::SolverExit(e.to_string())),
        },
        Err(e) => Some(TerminationReason::SolverExit(e.to_string())),
    };
    match finish(&nm_cost, reason, tol_grad) {
        Outcome::Converged(d) => Ok(Ended {
            converged: true,
            detail: format!("{d} (Nelder-Mead, after the quasi-Newton search stopped: {why})"),
        }),
        Outcome::Stopped(s) => stopped(s),
        Outcome::Unusable(w) => Ok(Ended {
            converged: false,
            detail: format!("the search stopped without converging: {w}"),
        }),
    }
}

fn stopped(s: Stop) -> Result<Ended, Problem> {
    match s {
        Stop::Fatal(p) => Err(p),
        Stop::Budget => Ok(Ended {
            converged: false,
            detail: "the run budget (search.max_runs) was spent before convergence".into(),
        }),
    }
}

/// Search from `u0` and from `starts − 1` seeded offsets of it; the starting
/// log-likelihood `ll0` sets the scale of the tolerances. Returns how the search that
/// found the best run ended.
pub(crate) fn search(
    obj: &Objective<'_>,
    maps: &[Map],
    u0: &[f64],
    ll0: f64,
    tolerance: f64,
    starts: u64,
) -> Result<Ended, Problem> {
    let scale = ll0.abs().max(1.0);
    let (tol_grad, tol_cost) = (tolerance * scale, tolerance * scale * 1e-2);
    let mut rng = rand_chacha::ChaCha20Rng::seed_from_u64(0x7ac1_7ca1);
    let mut best: Option<(f64, Ended)> = None;
    for k in 0..starts {
        let u: Vec<f64> = if k == 0 {
            u0.to_vec()
        } else {
            u0.iter()
                .zip(maps)
                .map(|(&u, m)| {
                    let spread = if m.scaled() {
                        1.0
                    } else {
                        0.5 * u.abs().max(1.0)
                    };
                    u + spread * (2.0 * rng.gen::<f64>() - 1.0)
                })
                .collect()
        };
        let before = obj.best().map_or(f64::NEG_INFINITY, |b| b.0);
        let ended = one_start(obj, maps, u, tol_grad, tol_cost)?;
        let after = obj.best().map_or(f64::NEG_INFINITY, |b| b.0);
        let budget_spent = !ended.converged && ended.detail.contains("max_runs");
        if best.is_none() || after > before {
            best = Some((after, ended));
        }
        if budget_spent {
            break;
        }
    }
    Ok(best.map(|b| b.1).unwrap_or(Ended {
        converged: false,
        detail: "no search ran".into(),
    }))
}
