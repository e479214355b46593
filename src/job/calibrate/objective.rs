//! The objective of a calibration: the exact log-likelihood of the readings under the
//! filter at given values of the free numbers, by the prediction-error decomposition
//! ln L = −½ Σₜ (νₜᵀSₜ⁻¹νₜ + ln det Sₜ + mₜ ln 2π) over the readings after the first `skip`
//! (Schweppe 1965, IEEE Trans. Information Theory 11(1); Harvey 1989, *Forecasting,
//! Structural Time Series Models and the Kalman Filter*, ch. 3). It is the very sum
//! `summary.log_likelihood` of /v1/estimate adds up (`Run::tally`), from the same filter
//! code, so a fitted request posted there reports it again.
//!
//! The request is parsed once: the readings into a list that every run reuses, the rest
//! kept as a JSON tree. A run substitutes the values at their pointers in the small
//! `model`/`filter`/`prior` part, checks it as /v1/estimate would, and filters every
//! reading keeping only the tallies (no per-reading JSON). The gate is taken off
//! (`filter.gate`, `filter.reacquire`), so every reading counts: a gated likelihood would
//! leave out exactly the readings that argue against the current values. The ensemble
//! filter keeps its seed (0 when not given), so every run draws the same numbers (common
//! random numbers) and the objective is a deterministic function of the values, though
//! still a noisy estimate of the true likelihood.

use super::spec::Free;
use crate::config::Limits;
use crate::filter::run::Run;
use crate::job::budget::{self, CalibrateShape};
use crate::job::failure::step_problem;
use crate::job::filtering::measurement_list;
use crate::job::plain::{line_pointer, line_problem, problem_under};
use crate::job::setup::{setup, Guard, Setup};
use crate::job::write::Writer;
use crate::model::Reading;
use crate::model::Stop as RequestStop;
use crate::problem::{Problem, ProblemKind};
use crate::request::envelope::{self, Envelope};
use crate::request::reading::ReadingParser;
use serde_json::value::RawValue;
use serde_json::Value;
use std::sync::atomic::{AtomicU64, Ordering};
use std::sync::Mutex;

/// Cores to run on: the most runs of the objective going at once.
pub(crate) fn cores() -> usize {
    std::thread::available_parallelism().map_or(1, |n| n.get())
}

/// An envelope holding only `measurements`, for [`measurement_list`].
pub(crate) fn readings_only(measurements: Option<&RawValue>) -> Envelope<'_> {
    Envelope {
        measurements,
        ..Envelope::default()
    }
}

/// The request without its measurements (`head`) parsed and checked, each line's text,
/// and the bytes the whole request will need at its peak with a body of `body` bytes.
pub(crate) fn checked<'m>(
    head: &Value,
    measurements: Option<&'m RawValue>,
    body: usize,
    limits: &Limits,
) -> Result<(Setup, Vec<&'m str>, u64), Problem> {
    let bytes = serde_json::to_vec(head).map_err(|e| Problem::field("", e.to_string()))?;
    let env = envelope::envelope(&bytes)?;
    let s = setup(&env, limits)?;
    let lines = measurement_list(&readings_only(measurements), limits)?;
    let text = measurements.map_or("", RawValue::get);
    let need = budget::calibrate_bytes(&CalibrateShape {
        model: &s.model,
        cfg: &s.cfg,
        lines: lines.len(),
        body,
        head: bytes.len(),
        echo: budget::echo_bytes(text),
        // A `noise_std` key, or keys with escapes that could spell it.
        overrides: text.contains("noise_std") || text.contains('\\'),
        threads: cores(),
    });
    Ok((s, lines, need))
}

/// Why the search must stop now.
#[derive(Debug)]
pub(crate) enum Stop {
    /// `search.max_runs` runs were made.
    Budget,
    /// The compute deadline passed or the client went away: the request fails.
    Fatal(Problem),
}

/// One run's result, for the search.
#[derive(Debug, Clone, Copy)]
pub(crate) struct Value1 {
    /// The log-likelihood, or None when the filter could not run at these values (a
    /// numerical failure, or values the request's checks refuse).
    pub ll: Option<f64>,
}

/// Called after every run with its number (from 1) and log-likelihood (None: failed).
pub(crate) type Progress<'a> = &'a (dyn Fn(u64, Option<f64>) + Sync);

/// The parsed request and the state of the search's run budget.
pub(crate) struct Objective<'a> {
    head: Value,
    frees: &'a [Free],
    readings: Vec<Reading>,
    skip: u64,
    limits: &'a Limits,
    guard: Guard<'a>,
    runs: AtomicU64,
    max_runs: u64,
    progress: Progress<'a>,
    /// The best run so far: (log-likelihood, values).
    best: Mutex<Option<(f64, Vec<f64>)>>,
}

/// What a run at the fitted or the starting values reports besides its likelihood.
pub(crate) struct Outcome {
    /// The log-likelihood after `skip`.
    pub ll: f64,
    /// Readings (lines with an update) counted in `ll`.
    pub readings: u64,
    /// The `"summary":{...}` of the run, as /v1/estimate writes it.
    pub summary: Vec<u8>,
}

impl<'a> Objective<'a> {
    /// Parse and check `head` (an estimate request without its measurements) and the
    /// `measurements` once; refuse the request over the memory budget (counting a body
    /// of `body` bytes) before its readings are parsed.
    #[allow(clippy::too_many_arguments)]
    pub(crate) fn new(
        head: Value,
        measurements: Option<&RawValue>,
        body: usize,
        frees: &'a [Free],
        skip: u64,
        max_runs: u64,
        limits: &'a Limits,
        stop: &'a RequestStop,
        progress: Progress<'a>,
    ) -> Result<Self, Problem> {
        let (s, lines, need) = checked(&head, measurements, body, limits)?;
        budget::within(need, limits)?;
        let guard = Guard::new(stop);
        let parser = ReadingParser::new(&s.model, s.prior.mode, &s.zone);
        let mut readings = Vec::with_capacity(lines.len());
        for (i, text) in lines.iter().enumerate() {
            guard.check(i)?;
            let mut r = Reading::default();
            parser
                .parse(text, &mut r)
                .map_err(|e| line_problem(e.under(&line_pointer(i))))?;
            // Held for every run: no spare capacity.
            r.sensors.shrink_to_fit();
            r.z.shrink_to_fit();
            r.std_overrides.shrink_to_fit();
            r.std.shrink_to_fit();
            r.inputs.shrink_to_fit();
            readings.push(r);
        }
        Ok(Self {
            head,
            frees,
            readings,
            skip,
            limits,
            guard,
            runs: AtomicU64::new(0),
            max_runs,
            progress,
            best: Mutex::new(None),
        })
    }

    /// The request without its measurements, as sent.
    pub(crate) fn head(&self) -> &Value {
        &self.head
    }

    /// The request's `model`, `filter`, `prior` (and `time_zone`, `output`) with `x` at
    /// the free pointers, and the gate taken off unless `gated`.
    pub(crate) fn substituted(&self, base: &Value, x: &[f64], gated: bool) -> Option<Value> {
        let mut v = base.clone();
        for (f, &xi) in self.frees.iter().zip(x) {
            let n = Value::from(serde_json::Number::from_f64(xi)?);
            if let Some(m) = &f.mirror {
                if let Some(slot) = v.pointer_mut(m) {
                    *slot = n.clone();
                }
            }
            *v.pointer_mut(&f.pointer)? = n;
        }
        if !gated {
            if let Some(filter) = v.get_mut("filter").and_then(Value::as_object_mut) {
                filter.remove("gate");
                filter.remove("reacquire");
            }
        }
        Some(v)
    }

    /// Runs made so far.
    pub(crate) fn runs(&self) -> u64 {
        self.runs.load(Ordering::Relaxed)
    }

    /// The best run so far.
    pub(crate) fn best(&self) -> Option<(f64, Vec<f64>)> {
        self.best.lock().ok().and_then(|b| b.clone())
    }

    /// One run of the search at `x`, counted; the search's runs (`budgeted`) stop at
    /// `search.max_runs`, the curvature's after it do not.
    pub(crate) fn eval(&self, x: &[f64], budgeted: bool) -> Result<Value1, Stop> {
        let k = self.runs.fetch_add(1, Ordering::Relaxed) + 1;
        if budgeted && k > self.max_runs {
            self.runs.fetch_sub(1, Ordering::Relaxed);
            return Err(Stop::Budget);
        }
        let ll = match self.run(x, false, false) {
            Ok(o) if o.ll.is_finite() => Some(o.ll),
            Ok(_) => None,
            Err(p) if p.type_uri == Problem::new(ProblemKind::DeadlineExceeded, "").type_uri => {
                return Err(Stop::Fatal(p))
            }
            Err(_) => None,
        };
        if let (Some(ll), Ok(mut best)) = (ll, self.best.lock()) {
            if best.as_ref().is_none_or(|(b, _)| ll > *b) {
                *best = Some((ll, x.to_vec()));
            }
        }
        (self.progress)(k, ll);
        Ok(Value1 { ll })
    }

    /// Filter every reading at `x`: with the gate off (the objective), or as the request
    /// sets it (`gated`, for the summaries before and after). `summary` writes the
    /// run's summary too.
    pub(crate) fn run(&self, x: &[f64], gated: bool, summary: bool) -> Result<Outcome, Problem> {
        let req = self.substituted(&self.head, x, gated).ok_or_else(|| {
            Problem::new(
                ProblemKind::NumericalFailure,
                "a free value is not a finite number",
            )
        })?;
        let bytes = serde_json::to_vec(&req).map_err(|e| Problem::field("", e.to_string()))?;
        let env = envelope::envelope(&bytes)?;
        let s = setup(&env, self.limits)?;
        let writer = summary.then(|| Writer::new(&s.model, s.prior.mode, s.output.clone()));
        let mut run = Run::new(s.model, s.cfg, s.prior, false).map_err(Problem::from)?;
        run.set_stop(self.guard.stop());
        run.set_step_limit(self.limits.max_gap_steps);
        let mut at_skip = 0.0;
        for (i, r) in self.readings.iter().enumerate() {
            self.guard.check(i)?;
            run.step(r, "")
                .map_err(|e| problem_under(step_problem(e, run.model()), &line_pointer(i)))?;
            if run.counts.updates <= self.skip {
                at_skip = run.counts.log_likelihood;
            }
        }
        let total = run.counts.log_likelihood;
        let mut buf = Vec::new();
        if let Some(w) = writer {
            w.summary(&mut buf, &run);
        }
        Ok(Outcome {
            ll: if self.skip == 0 {
                total
            } else {
                total - at_skip
            },
            readings: run.counts.updates.saturating_sub(self.skip),
            summary: buf,
        })
    }
}
