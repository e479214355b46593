//! Estimate, smooth and stream: parse the request once, run the filter line by line and
//! write each estimate as it is made.

use crate::config::Limits;
use crate::filter::run::Run;
use crate::filter::smoother::{rts, Stored};
use crate::job::write::Writer;
use crate::job::{Done, RunStats};
use crate::problem::{FieldError, Problem, ProblemKind};
use crate::spec::model::{FilterConfig, Model, OutputConfig, Prior};
use crate::spec::reading::{LineError, Reading, ReadingParser};
use crate::spec::request::{self, Envelope};
use crate::spec::validate;
use serde_json::value::RawValue;
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::Arc;
use std::time::Instant as Clock;

/// Everything a filtering request needs before the first reading.
pub struct Setup {
    /// The checked model.
    pub model: Arc<Model>,
    /// Filter settings.
    pub cfg: FilterConfig,
    /// Starting belief.
    pub prior: Prior,
    /// Response options.
    pub output: OutputConfig,
}

/// Parse `model`, `filter`, `prior` and `output`, collecting every field error.
pub fn setup(env: &Envelope<'_>, limits: &Limits) -> Result<Setup, Problem> {
    let [model_v, filter_v, prior_v] = request::sections([
        (env.model, "model"),
        (env.filter, "filter"),
        (env.prior, "prior"),
    ])?;
    let output_v = request::optional_section(env.output)?;
    let mut errors: Vec<FieldError> = Vec::new();
    let model = validate::model(&model_v, "/model", limits)
        .map_err(|e| errors.extend(e))
        .ok();
    let cfg = validate::filter(&filter_v, "/filter", limits)
        .map_err(|e| errors.extend(e))
        .ok();
    let (Some(model), Some(cfg)) = (model, cfg) else {
        return Err(Problem::invalid(errors));
    };
    let prior =
        validate::prior(&prior_v, "/prior", &model, Some(&cfg)).map_err(Problem::invalid)?;
    let output =
        validate::output(output_v.as_ref(), "/output", prior.mode).map_err(Problem::invalid)?;
    if let Some(first) = output.at.first() {
        if prior.t.is_after(first, prior.mode) {
            return Err(Problem::field(
                "/output/at/0",
                "prediction times must not come before the prior's time",
            ));
        }
    }
    Ok(Setup {
        model: Arc::new(model),
        cfg,
        prior,
        output,
    })
}

/// Checks the per-request deadline and the cancel flag every so many steps.
pub struct Guard<'a> {
    cancel: &'a AtomicBool,
    deadline: Option<Clock>,
}

impl<'a> Guard<'a> {
    /// A guard for `limits.deadline` from now.
    pub fn new(limits: &Limits, cancel: &'a AtomicBool) -> Self {
        Self {
            cancel,
            deadline: limits.deadline.map(|d| Clock::now() + d),
        }
    }

    /// Err when cancelled or past the deadline (checked on every 256th step).
    pub fn check(&self, step: usize) -> Result<(), Problem> {
        if step % 256 != 0 {
            return Ok(());
        }
        if self.cancel.load(Ordering::Relaxed) {
            return Err(Problem::new(
                ProblemKind::DeadlineExceeded,
                "the request was cancelled",
            ));
        }
        if self.deadline.is_some_and(|d| Clock::now() > d) {
            return Err(Problem::new(ProblemKind::DeadlineExceeded, format!("the request needed more than the compute deadline; it stopped after {step} lines")));
        }
        Ok(())
    }
}

/// Pointer of batch line `i`; built only for a line that failed.
fn line_pointer(i: usize) -> String {
    format!("/measurements/{i}")
}

/// A step's problem with its field pointers (relative to the line) put under `base`. The
/// detail of a 422 names the first pointer, so it is built again from the moved pointers.
fn problem_under(p: Problem, base: &str) -> Problem {
    if p.errors.is_empty() || p.type_uri != Problem::invalid(Vec::new()).type_uri {
        return p;
    }
    let errors = p
        .errors
        .into_iter()
        .map(|mut e| {
            e.pointer.insert_str(0, base);
            e
        })
        .collect();
    Problem::invalid(errors)
}

fn line_problem(e: LineError) -> Problem {
    match e {
        LineError::Syntax(msg) => Problem::new(ProblemKind::MalformedJson, msg),
        LineError::Invalid(errors) => Problem::invalid(errors),
    }
}

/// The measurement array as raw elements.
fn measurement_list<'a>(env: &Envelope<'a>, limits: &Limits) -> Result<Vec<&'a RawValue>, Problem> {
    let raw = env
        .measurements
        .ok_or_else(|| Problem::field("/measurements", "missing required field 'measurements'"))?;
    let list: Vec<&RawValue> = serde_json::from_str(raw.get()).map_err(|e| match e.classify() {
        serde_json::error::Category::Data => {
            Problem::field("/measurements", "expected an array of measurement lines")
        }
        _ => request::json_problem(e),
    })?;
    if list.len() > limits.max_readings {
        return Err(Problem::field("/measurements", format!("{} lines exceed the limit of {} per request; use the stream endpoint or split the run", list.len(), limits.max_readings)));
    }
    Ok(list)
}

fn stats(run: &Run) -> RunStats {
    RunStats {
        method: run.config().method.name(),
        steps: run.counts.steps,
        updates: run.counts.updates,
        rejected: run.counts.rejected,
    }
}

/// Write `,"predictions":[...]` for the `output.at` times at or before `upto` (all when None).
fn write_predictions(
    run: &Run,
    writer: &Writer,
    at: &[crate::spec::time::Instant],
    next: &mut usize,
    upto: Option<&crate::spec::time::Instant>,
    buf: &mut Vec<u8>,
    first: &mut bool,
) -> Result<(), Problem> {
    let mode = run.mode();
    while *next < at.len() && upto.is_none_or(|u| !at[*next].is_after(u, mode) && at[*next] != *u) {
        let (m, p) = run.predict_aside(&at[*next])?;
        if !*first {
            buf.push(b',');
        }
        *first = false;
        writer.estimate(buf, &at[*next], &m, &p, None);
        *next += 1;
    }
    Ok(())
}

/// `POST /v1/estimate` and, with `smooth`, `POST /v1/smooth`.
pub fn run_batch(
    body: &[u8],
    limits: &Limits,
    cancel: &AtomicBool,
    smooth: bool,
) -> Result<Done, Problem> {
    let env = request::envelope(body)?;
    let Setup {
        model,
        cfg,
        prior,
        output,
    } = setup(&env, limits)?;
    let lines = measurement_list(&env, limits)?;
    let mode = prior.mode;
    let writer = Writer::new(&model, mode, output.clone());
    let parser = ReadingParser::new(&model, mode);
    let mut run = Run::new(model.clone(), cfg, prior, smooth)?;
    let guard = Guard::new(limits, cancel);
    let mut buf = Vec::with_capacity(64 + lines.len() * 64 * (1 + model.n()));
    buf.push(b'{');
    writer.states(&mut buf);
    buf.extend_from_slice(b",\"estimates\":[");
    let mut reading = Reading::default();
    let mut stored: Vec<Stored> = Vec::new();
    let mut times = Vec::new();
    let at = output.at.clone();
    let mut next_at = 0;
    let mut pred_buf = Vec::new();
    let mut first_pred = true;
    for (i, raw) in lines.iter().enumerate() {
        guard.check(i)?;
        parser
            .parse(raw.get(), &mut reading)
            .map_err(|e| line_problem(e.under(&line_pointer(i))))?;
        write_predictions(
            &run,
            &writer,
            &at,
            &mut next_at,
            Some(&reading.t),
            &mut pred_buf,
            &mut first_pred,
        )?;
        let mut predicted = None;
        run.step_capturing(&reading, "", smooth.then_some(&mut predicted))
            .map_err(|p| problem_under(p, &line_pointer(i)))?;
        let est = run.estimator();
        if smooth {
            let predicted = predicted.map(|(m, p)| (m, p, est.cross().clone()));
            stored.push(Stored {
                predicted,
                mean: est.mean().clone(),
                cov: est.covariance().clone(),
            });
            let mut frag = Vec::new();
            if !reading.sensors.is_empty() {
                writer.innovations(&mut frag, est.obs());
            }
            times.push((reading.t, frag));
        } else {
            if i > 0 {
                buf.push(b',');
            }
            writer.estimate(
                &mut buf,
                &reading.t,
                est.mean(),
                est.covariance(),
                Some(est.obs()).filter(|_| !reading.sensors.is_empty()),
            );
        }
    }
    write_predictions(
        &run,
        &writer,
        &at,
        &mut next_at,
        None,
        &mut pred_buf,
        &mut first_pred,
    )?;
    if smooth {
        rts(&mut stored).map_err(|e| Problem::new(ProblemKind::NumericalFailure, format!("smoothing failed at line {}: the predicted covariance is singular (give the model process noise or a prior with spread in every state)", e.line)))?;
        for (i, s) in stored.iter().enumerate() {
            if i > 0 {
                buf.push(b',');
            }
            writer.estimate_with(&mut buf, &times[i].0, &s.mean, &s.cov, &times[i].1);
        }
    }
    buf.push(b']');
    if !at.is_empty() {
        buf.extend_from_slice(b",\"predictions\":[");
        buf.extend_from_slice(&pred_buf);
        buf.push(b']');
    }
    buf.push(b',');
    let est = run.estimator();
    writer.posterior(
        &mut buf,
        &run.time(),
        est.mean(),
        est.covariance(),
        est.members(),
        est.step(),
        run.inputs(),
    );
    buf.push(b',');
    writer.summary(&mut buf, &run.counts);
    buf.push(b'}');
    Ok(Done {
        body: buf,
        stats: stats(&run),
    })
}

/// A stream in progress (see [`crate::job::StreamSession`]).
pub struct Stream {
    run: Run,
    writer: Writer,
    reading: Reading,
    lines: u64,
}

impl Stream {
    /// Parse the header line `{model, filter, prior, output?}`.
    pub fn start(header: &[u8], limits: &Limits) -> Result<Self, Problem> {
        let env = request::envelope(header)?;
        if env.measurements.is_some() {
            return Err(Problem::field("/measurements", "the stream's first line holds model, filter, prior and output; readings follow one per line"));
        }
        let Setup {
            model,
            cfg,
            prior,
            output,
        } = setup(&env, limits)?;
        if !output.at.is_empty() {
            return Err(Problem::field(
                "/output/at",
                "prediction-only times are available on /v1/estimate, not on the stream",
            ));
        }
        let writer = Writer::new(&model, prior.mode, output);
        let run = Run::new(model, cfg, prior, false)?;
        Ok(Self {
            run,
            writer,
            reading: Reading::default(),
            lines: 0,
        })
    }

    /// One measurement line → one estimate line.
    pub fn push(&mut self, line: &[u8], line_no: u64, out: &mut Vec<u8>) -> Result<(), Problem> {
        let text = std::str::from_utf8(line).map_err(|_| {
            Problem::new(
                ProblemKind::MalformedJson,
                format!("line {line_no} is not UTF-8"),
            )
        })?;
        let model = self.run.model();
        let parser = ReadingParser::new(model, self.run.mode());
        parser.parse(text, &mut self.reading).map_err(|e| {
            let mut p = line_problem(e);
            p.detail = format!("line {line_no}: {}", p.detail);
            p
        })?;
        self.run.step(&self.reading, "").map_err(|mut p| {
            p.detail = format!("line {line_no}: {}", p.detail);
            p
        })?;
        self.lines += 1;
        let est = self.run.estimator();
        self.writer.estimate(
            out,
            &self.reading.t,
            est.mean(),
            est.covariance(),
            Some(est.obs()).filter(|_| !self.reading.sensors.is_empty()),
        );
        out.push(b'\n');
        Ok(())
    }

    /// The last line `{posterior, summary}`.
    pub fn finish(self, out: &mut Vec<u8>) -> RunStats {
        out.push(b'{');
        let est = self.run.estimator();
        self.writer.posterior(
            out,
            &self.run.time(),
            est.mean(),
            est.covariance(),
            est.members(),
            est.step(),
            self.run.inputs(),
        );
        out.push(b',');
        self.writer.summary(out, &self.run.counts);
        out.extend_from_slice(b"}\n");
        stats(&self.run)
    }
}
