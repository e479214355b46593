//! `POST /v1/identify`: a model section built from recorded history, which
//! `/v1/estimate` accepts as it is.
//!
//! `parse.rs` reads the request into checked types; this file runs the form over
//! [`crate::identify`] and turns its refusals into problems at the request's fields;
//! `answer.rs` writes the model, the terms and the fit; `modal.rs` runs and answers the
//! `subspace` and `reduced` forms.

mod answer;
mod modal;
mod parse;

use super::budget::{self, IdentifyShape, IdentifyWork};
use super::setup::cancelled;
use super::{Done, RunStats};
use crate::config::Limits;
use crate::formula::Program;
use crate::identify::library::{evaluate, monomial_count, Library};
use crate::identify::noise::{mean, mean_square, split, Spread};
use crate::identify::regress::{discrete, integral, residual_rms, residuals, stlsq, Columns};
use crate::identify::subspace::DEFAULT_HORIZON;
use crate::identify::{moving_inputs, Coefficients, Fit, IdentifyError, Series};
use crate::model::{Halt, Stop};
use crate::problem::{Problem, ProblemKind};
use parse::{Form, Request};

/// Parse, fit and answer one identify request.
pub(crate) fn identify(body: &[u8], limits: &Limits, stop: &Stop) -> Result<Done, Problem> {
    let req = parse::request(body, limits)?;
    budget::within(need(&req, body.len()), limits)?;
    let body = match req.form {
        Form::Subspace => return modal::answer_subspace(&req, stop),
        Form::Reduced => return modal::answer_reduced(&req, stop),
        Form::Linear { .. } | Form::Sparse | Form::Known => {
            let fitted = fit(&req, stop).map_err(|e| problem(e, &req))?;
            answer::write(&req, &fitted)
        }
    };
    Ok(Done {
        body,
        stats: RunStats::default(),
    })
}

/// The memory estimate of a request, bytes (parsed first; for tests and sizing).
pub(crate) fn memory(body: &[u8], limits: &Limits) -> Result<u64, Problem> {
    Ok(need(&parse::request(body, limits)?, body.len()))
}

/// [`budget::identify_bytes`] of a parsed request.
fn need(req: &Request, body: usize) -> u64 {
    let s = &req.series;
    let slots = s.states + s.inputs;
    let (work, terms) = match req.form {
        Form::Subspace => {
            let order = match req.order {
                parse::Order::Fixed(n) => n,
                parse::Order::Auto => 0,
            };
            let horizon = DEFAULT_HORIZON.max(order / s.states.max(1) + 1);
            (IdentifyWork::Subspace { horizon }, 0)
        }
        Form::Reduced => (IdentifyWork::Reduced, 0),
        Form::Linear { .. } => (IdentifyWork::Regression, slots + 1),
        Form::Sparse | Form::Known => (
            IdentifyWork::Regression,
            monomial_count(slots, 0, req.degree).saturating_add(req.terms.len()),
        ),
    };
    budget::identify_bytes(&IdentifyShape {
        work,
        samples: s.len(),
        slots,
        states: s.states,
        terms,
        body,
    })
}

/// What a fitted form gives the answer.
pub(crate) struct Fitted {
    /// Coefficients over the library's terms.
    pub(crate) coef: Coefficients,
    /// Window residual RMS per state.
    pub(crate) fit: Fit,
    /// Per state: process noise density (continuous) and reading variance.
    pub(crate) noise: Vec<(f64, f64)>,
    /// Residual covariance per step (discrete maps), row-major n × n.
    pub(crate) step_covariance: Vec<f64>,
    /// Grid step of a discrete map.
    pub(crate) dt: f64,
}

/// Run a `linear`, `sparse` or `known` fit.
fn fit(req: &Request, stop: &Stop) -> Result<Fitted, IdentifyError> {
    let s = &req.series;
    let (m, n) = (s.len(), s.states);
    moving_inputs(s)?;
    let mut slot_names: Vec<&str> = req.states.iter().map(String::as_str).collect();
    slot_names.extend(req.inputs.iter().map(String::as_str));
    let (lib, threshold) = match req.form {
        Form::Linear { .. } => (Library::new(&slot_names, 1, 1, None, &[]), 0.0),
        _ => (
            Library::new(
                &slot_names,
                0,
                req.degree,
                req.term_program.clone(),
                &req.terms,
            ),
            req.sparsity,
        ),
    };
    let held = s.held();
    let cols = Columns {
        at: lib.columns(s, stop)?,
        held: match &held {
            Some(h) => lib.columns(h, stop)?,
            None => Vec::new(),
        },
    };
    let mut known = Columns::default();
    if let Some((prog, _)) = &req.known {
        known.at = known_rates(prog, s, &req.states, stop)?;
        if let Some(h) = &held {
            known.held = known_rates(prog, h, &req.states, stop)?;
        }
    }
    let cut = ((m as f64) * (1.0 - req.holdout)).round() as usize;
    let cut = cut.clamp(2.min(m), m);
    let hold = (cut.saturating_sub(1), m);
    if let Form::Linear { discrete: true } = req.form {
        let dt = s.uniform_step(1e-6).ok_or(IdentifyError::Uneven)?;
        let train = discrete(s, &cols, (0, cut));
        let coef = stlsq(&train, &lib.names, threshold, stop)?;
        let res = residuals(&train, &coef);
        let rows = train.rows.max(1) as f64;
        let mut cov = vec![0.0; n * n];
        for a in 0..n {
            for b in 0..n {
                cov[a * n + b] = res[a].iter().zip(&res[b]).map(|(x, y)| x * y).sum::<f64>() / rows;
            }
        }
        let noise = (0..n).map(|a| (0.0, cov[a * n + a] / 2.0)).collect();
        let fit = Fit {
            train: residual_rms(&train, &coef),
            holdout: residual_rms(&discrete(s, &cols, hold), &coef),
        };
        return Ok(Fitted {
            coef,
            fit,
            noise,
            step_covariance: cov,
            dt,
        });
    }
    let w = req.window;
    let train = integral(s, &cols, &known, (0, cut), w, stop)?;
    let coef = stlsq(&train, &lib.names, threshold, stop)?;
    let wide = integral(s, &cols, &known, (0, cut), 2 * w, stop)?;
    let (r1, r2) = (residuals(&train, &coef), residuals(&wide, &coef));
    let (t1, t2) = (mean(&train.span), mean(&wide.span));
    let noise = (0..n)
        .map(|a| {
            split(Spread {
                v1: mean_square(&r1[a]),
                t1,
                v2: r2.get(a).map_or(f64::NAN, |r| mean_square(r)),
                t2,
            })
        })
        .collect();
    let fit = Fit {
        train: residual_rms(&train, &coef),
        holdout: residual_rms(&integral(s, &cols, &known, hold, w, stop)?, &coef),
    };
    Ok(Fitted {
        coef,
        fit,
        noise,
        step_covariance: Vec::new(),
        dt: 0.0,
    })
}

/// The known rates (one program output per state) at every sample of `s`, state-major.
fn known_rates(
    prog: &Program,
    s: &Series,
    states: &[String],
    stop: &Stop,
) -> Result<Vec<f64>, IdentifyError> {
    let m = s.len();
    let mut out = vec![0.0; states.len() * m];
    evaluate(prog, s, stop, &mut out)?;
    if let Some(i) = out.iter().position(|v| !v.is_finite()) {
        return Err(IdentifyError::NotFinite {
            what: format!("the known rate of {}", states[i / m]),
            sample: i % m,
        });
    }
    Ok(out)
}

/// A refusal of the core as a problem at the field it concerns.
fn problem(e: IdentifyError, req: &Request) -> Problem {
    let library = if matches!(req.form, Form::Linear { .. }) {
        "/series"
    } else {
        "/library"
    };
    match e {
        IdentifyError::TooFewSamples { need, have } => Problem::field(
            "/series",
            format!(
                "the training part of the series gives {have} regression windows and the \
                 library needs at least {need} (two per term): send more samples, lower \
                 library.degree, or hold out less"
            ),
        ),
        IdentifyError::RankDeficient { terms } => Problem::field(
            library,
            format!(
                "the terms {} cannot be told apart over these data (one is, or nearly is, a \
                 combination of the others): drop one, or record data where they differ",
                terms.join(", ")
            ),
        ),
        IdentifyError::StillInput { input } => Problem::field(
            format!("/inputs/{input}"),
            format!(
                "input '{}' has the same value at every sample, so its effect cannot be \
                 fitted: record data where it moves, or leave it out",
                req.inputs[input]
            ),
        ),
        IdentifyError::NotFinite { what, sample } => Problem::field(
            format!("/series/{sample}"),
            format!("{what} is not a finite number at this sample"),
        ),
        IdentifyError::Uneven => Problem::field(
            "/series",
            "a discrete map (time: \"discrete\") needs equally spaced samples",
        ),
        IdentifyError::Stopped(Halt::Cancelled) => cancelled(),
        IdentifyError::Stopped(Halt::Deadline) => Problem::new(
            ProblemKind::DeadlineExceeded,
            "the request needed more than the compute deadline (counted from its arrival)",
        ),
    }
}
