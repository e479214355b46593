//! The identify answer: `{model, terms, fit, detail}`, numbers by zmij (shortest
//! round-trip), so every coefficient written into a rate formula reads back exactly.
//!
//! The model's noise (a decision, documented in the OpenAPI file): for rates, each state
//! gets the process noise density and each state a sensor `<state>_reading` with the
//! reading std that the two-lag split of [`crate::identify::noise`] gives; for a discrete
//! map, the per-step covariance is the covariance of the one-step residuals and each
//! sensor's variance half a residual's. A zero reading spread (noise-free data) becomes a
//! floor of 1e-6 times the state's RMS value, as a sensor std must be positive.

use super::parse::{Form, Request};
use super::Fitted;
use crate::identify::overall;
use crate::job::write::num;

fn key(out: &mut Vec<u8>, k: &str) {
    out.extend_from_slice(serde_json::to_string(k).unwrap_or_default().as_bytes());
    out.push(b':');
}

fn string(out: &mut Vec<u8>, s: &str) {
    out.extend_from_slice(serde_json::to_string(s).unwrap_or_default().as_bytes());
}

fn names(out: &mut Vec<u8>, list: &[String]) {
    out.push(b'[');
    for (i, n) in list.iter().enumerate() {
        if i > 0 {
            out.push(b',');
        }
        string(out, n);
    }
    out.push(b']');
}

/// A number as the formula language reads it back exactly.
fn number_text(x: f64) -> String {
    let mut b = Vec::new();
    num(&mut b, x);
    String::from_utf8(b).unwrap_or_default()
}

/// The fitted sum of one state: `c1*term1 - c2*term2 + c3` (a user term in parentheses);
/// `None` when no term was kept.
fn fitted_sum(req: &Request, f: &Fitted, s: usize) -> Option<String> {
    let c = &f.coef;
    let k = c.terms.len();
    let mut out = String::new();
    let monomials = k - req.terms.len();
    for j in 0..k {
        if !c.kept[s * k + j] {
            continue;
        }
        let v = c.coef[s * k + j];
        let body = if c.terms[j] == "1" {
            number_text(v.abs())
        } else if j >= monomials {
            format!("{}*({})", number_text(v.abs()), c.terms[j])
        } else {
            format!("{}*{}", number_text(v.abs()), c.terms[j])
        };
        let neg = v.is_sign_negative();
        match (out.is_empty(), neg) {
            (true, false) => out.push_str(&body),
            (true, true) => {
                out.push('-');
                out.push_str(&body);
            }
            (false, false) => {
                out.push_str(" + ");
                out.push_str(&body);
            }
            (false, true) => {
                out.push_str(" - ");
                out.push_str(&body);
            }
        }
    }
    (!out.is_empty()).then_some(out)
}

fn matrix(out: &mut Vec<u8>, rows: usize, cols: usize, at: impl Fn(usize, usize) -> f64) {
    out.push(b'[');
    for r in 0..rows {
        if r > 0 {
            out.push(b',');
        }
        out.push(b'[');
        for c in 0..cols {
            if c > 0 {
                out.push(b',');
            }
            num(out, at(r, c));
        }
        out.push(b']');
    }
    out.push(b']');
}

/// The answer's bytes.
pub(super) fn write(req: &Request, f: &Fitted) -> Vec<u8> {
    let n = req.states.len();
    let p = req.inputs.len();
    let k = f.coef.terms.len();
    let mut out = Vec::with_capacity(1024);
    out.extend_from_slice(b"{\"model\":{\"states\":");
    names(&mut out, &req.states);
    if p > 0 {
        out.extend_from_slice(b",\"inputs\":");
        names(&mut out, &req.inputs);
    }
    out.extend_from_slice(b",\"dynamics\":{");
    match req.form {
        Form::Linear { discrete } => {
            out.extend_from_slice(b"\"linear\":{\"time\":");
            out.extend_from_slice(if discrete {
                b"\"discrete\",\"F\":"
            } else {
                b"\"continuous\",\"A\":"
            });
            matrix(&mut out, n, n, |r, c| f.coef.coef[r * k + c]);
            if p > 0 {
                out.extend_from_slice(b",\"B\":");
                matrix(&mut out, n, p, |r, c| f.coef.coef[r * k + n + c]);
            }
            if discrete {
                out.extend_from_slice(b",\"dt\":");
                num(&mut out, f.dt);
            }
            out.push(b'}');
        }
        _ => {
            out.extend_from_slice(b"\"rates\":{");
            for s in 0..n {
                if s > 0 {
                    out.push(b',');
                }
                key(&mut out, &req.states[s]);
                let fitted = fitted_sum(req, f, s);
                let known = req.known.as_ref().and_then(|(_, g)| g[s].clone());
                let rate = match (known, fitted) {
                    (Some(kn), Some(fi)) => format!("{kn} + ({fi})"),
                    (Some(kn), None) => kn,
                    (None, Some(fi)) => fi,
                    (None, None) => "0".to_string(),
                };
                string(&mut out, &rate);
            }
            out.push(b'}');
        }
    }
    out.extend_from_slice(b"},\"process_noise\":{");
    if matches!(req.form, Form::Linear { discrete: true }) {
        out.extend_from_slice(b"\"covariance\":");
        matrix(&mut out, n, n, |r, c| f.step_covariance[r * n + c]);
    } else {
        out.extend_from_slice(b"\"density\":{");
        for s in 0..n {
            if s > 0 {
                out.push(b',');
            }
            key(&mut out, &req.states[s]);
            num(&mut out, f.noise[s].0);
        }
        out.push(b'}');
    }
    out.extend_from_slice(b"},\"sensors\":{");
    for s in 0..n {
        if s > 0 {
            out.push(b',');
        }
        key(&mut out, &format!("{}_reading", req.states[s]));
        out.extend_from_slice(b"{\"measures\":");
        string(&mut out, &req.states[s]);
        out.extend_from_slice(b",\"std\":");
        let x = req.series.slot(s);
        let rms = (x.iter().map(|v| v * v).sum::<f64>() / x.len().max(1) as f64).sqrt();
        let floor = (1e-6 * rms).max(1e-12);
        num(&mut out, f.noise[s].1.sqrt().max(floor));
        out.push(b'}');
    }
    out.extend_from_slice(b"}},\"terms\":[");
    let mut first = true;
    for s in 0..n {
        for j in 0..k {
            if !f.coef.kept[s * k + j] {
                continue;
            }
            if !first {
                out.push(b',');
            }
            first = false;
            out.extend_from_slice(b"{\"state\":");
            string(&mut out, &req.states[s]);
            out.extend_from_slice(b",\"term\":");
            string(&mut out, &f.coef.terms[j]);
            out.extend_from_slice(b",\"coefficient\":");
            num(&mut out, f.coef.coef[s * k + j]);
            out.extend_from_slice(b",\"std_error\":");
            num(&mut out, f.coef.std_error[s * k + j]);
            out.push(b'}');
        }
    }
    out.extend_from_slice(b"],\"fit\":{\"rmse_train\":");
    num(&mut out, overall(&f.fit.train));
    out.extend_from_slice(b",\"rmse_holdout\":");
    if f.fit.holdout.is_empty() {
        out.extend_from_slice(b"null");
    } else {
        num(&mut out, overall(&f.fit.holdout));
    }
    out.extend_from_slice(b",\"per_state\":{");
    for s in 0..n {
        if s > 0 {
            out.push(b',');
        }
        key(&mut out, &req.states[s]);
        out.extend_from_slice(b"{\"rmse_train\":");
        num(&mut out, f.fit.train.get(s).copied().unwrap_or(0.0));
        out.extend_from_slice(b",\"rmse_holdout\":");
        match f.fit.holdout.get(s) {
            Some(&v) => num(&mut out, v),
            None => out.extend_from_slice(b"null"),
        }
        out.push(b'}');
    }
    out.extend_from_slice(b"}},\"detail\":");
    string(&mut out, &detail(req, f));
    out.push(b'}');
    out
}

fn detail(req: &Request, f: &Fitted) -> String {
    let kept = f.coef.kept.iter().filter(|&&b| b).count();
    let how = match req.form {
        Form::Linear { discrete: true } => "one-step least squares of a discrete linear map",
        Form::Linear { discrete: false } => {
            "least squares of linear rates in the integral form (trapezoid rule)"
        }
        Form::Known => {
            "known rates plus a remainder by sequentially thresholded least squares in the \
             integral form (trapezoid rule)"
        }
        _ => "sequentially thresholded least squares in the integral form (trapezoid rule)",
    };
    format!(
        "{how}: {kept} of {} coefficients kept from {} samples ({} held out); fit is the \
         RMS window residual per state; the model holds only over the range the data covered",
        f.coef.terms.len() * req.states.len(),
        req.series.len(),
        ((req.series.len() as f64) * req.holdout).round() as usize
    )
}
