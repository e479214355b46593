//! What every filtering request does before its first reading: parse and check the
//! `model`, `filter`, `prior` and `output` sections, and watch the compute deadline and
//! the cancel flag while the lines run.

use crate::config::Limits;
use crate::model::Stop;
use crate::model::{FamilyModel, FilterConfig, Model, OutputConfig, Prior, Zone};
use crate::problem::{FieldError, Problem, ProblemKind};
use crate::request::envelope::{self, Envelope};
use crate::request::validate;
use std::sync::atomic::{AtomicU64, AtomicUsize, Ordering};
use std::sync::Arc;
use std::time::{Duration, Instant as Clock};

/// Everything a filtering request needs before the first reading.
pub(super) struct Setup {
    /// The checked model.
    pub model: Arc<Model>,
    /// Filter settings.
    pub cfg: FilterConfig,
    /// Starting belief.
    pub prior: Prior,
    /// Response options.
    pub output: OutputConfig,
    /// Where offset-less timestamps are read (the request's `time_zone`).
    pub zone: Zone,
}

/// Parse `model`, `filter`, `prior` and `output` (and `time_zone`, which their times
/// are read in), collecting every field error.
pub(super) fn setup(env: &Envelope<'_>, limits: &Limits) -> Result<Setup, Problem> {
    let [model_v, filter_v, prior_v] = envelope::sections([
        (env.model, "model"),
        (env.filter, "filter"),
        (env.prior, "prior"),
    ])?;
    let output_v = envelope::optional_section(env.output, "output")?;
    let zone = envelope::time_zone(env)?;
    let mut errors: Vec<FieldError> = Vec::new();
    let (model_v, prior_v, family) = if validate::has_families(&model_v) {
        let (m, p, fm) = lowered(&model_v, &prior_v, limits)?;
        (m, p, Some(fm))
    } else {
        (model_v, prior_v, None)
    };
    let model = validate::model(&model_v, "/model", limits)
        .map_err(|e| errors.extend(e))
        .ok()
        .map(|mut m| {
            if let Some(fm) = &family {
                for (s, name) in m.states.iter_mut().enumerate() {
                    *name = fm.state_name(s);
                }
            }
            m
        });
    let cfg = validate::filter(&filter_v, "/filter", limits)
        .map_err(|e| errors.extend(e))
        .ok();
    let (Some(model), Some(cfg)) = (model, cfg) else {
        return Err(Problem::invalid(errors));
    };
    let prior = validate::prior_in(&prior_v, "/prior", &model, Some(&cfg), &zone)
        .map_err(Problem::invalid)?;
    let output = validate::output(output_v.as_ref(), "/output", prior.mode, &zone)
        .map_err(Problem::invalid)?;
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
        zone,
    })
}

/// A family model (`model.families`) and its prior written out state by state, for the
/// filters that run on plain models; a model over `max_states` states is refused here
/// (it runs with the local ensemble update only).
fn lowered(
    model_v: &serde_json::Value,
    prior_v: &serde_json::Value,
    limits: &Limits,
) -> Result<(serde_json::Value, serde_json::Value, FamilyModel), Problem> {
    let invalid = |e: Vec<crate::request::error::SpecError>| {
        Problem::invalid(e.into_iter().map(FieldError::from).collect())
    };
    let fm = validate::check_families(model_v, "/model", limits).map_err(invalid)?;
    if fm.n() > limits.max_states {
        return Err(Problem::field(
            "/model/families",
            format!(
                "{} family states exceed the limit of {} for this filter; a larger family model runs with filter.method \"enkf\" and ensemble.update \"local\"",
                fm.n(),
                limits.max_states
            ),
        ));
    }
    let prior = validate::lower_prior(&fm, prior_v, "/prior").map_err(invalid)?;
    Ok((validate::lower_model(&fm, model_v), prior, fm))
}

/// Looks at the request's [`Stop`] between lines: the cancel flag on every line, the clock
/// on lines spaced so that it is read about every [`CLOCK_EVERY`] of work. Cheap lines
/// (a small filter step takes well under a microsecond) then pay almost nothing for the
/// clock, while a line that takes seconds (a large ensemble) is followed by a look at once.
pub(super) struct Guard<'a> {
    stop: &'a Stop,
    /// Clock of the guard's start, the origin of `last`.
    start: Clock,
    /// Lines between two clock reads: a power of two from 1 to 256.
    stride: AtomicUsize,
    /// Nanoseconds from `start` to the last clock read.
    last: AtomicU64,
}

/// Wished-for work between two clock reads.
const CLOCK_EVERY: Duration = Duration::from_micros(100);

impl<'a> Guard<'a> {
    /// A guard over `stop` (its deadline counts from the request's arrival).
    pub(super) fn new(stop: &'a Stop) -> Self {
        Self {
            stop,
            start: Clock::now(),
            stride: AtomicUsize::new(1),
            last: AtomicU64::new(0),
        }
    }

    /// The request's stop, for the loops inside one line.
    pub(super) fn stop(&self) -> &'a Stop {
        self.stop
    }

    /// Err when cancelled or past the deadline; `step` lines have been done.
    pub(super) fn check(&self, step: usize) -> Result<(), Problem> {
        if self.stop.cancelled() {
            return Err(cancelled());
        }
        let Some(deadline) = self.stop.deadline() else {
            return Ok(());
        };
        let stride = self.stride.load(Ordering::Relaxed);
        if step % stride != 0 {
            return Ok(());
        }
        let now = Clock::now();
        if now >= deadline {
            return Err(Problem::new(ProblemKind::DeadlineExceeded, format!("the request needed more than the compute deadline (counted from its arrival); it stopped after {step} lines")));
        }
        let at = u64::try_from(now.duration_since(self.start).as_nanos()).unwrap_or(u64::MAX);
        let since = Duration::from_nanos(at.saturating_sub(self.last.swap(at, Ordering::Relaxed)));
        let stride = if since < CLOCK_EVERY / 4 {
            (stride * 2).min(256)
        } else if since > CLOCK_EVERY * 4 {
            (stride / 2).max(1)
        } else {
            stride
        };
        self.stride.store(stride, Ordering::Relaxed);
        Ok(())
    }
}

/// The problem of work stopped because its client went away (no one reads it).
pub(super) fn cancelled() -> Problem {
    Problem::new(ProblemKind::DeadlineExceeded, "the request was cancelled")
}
