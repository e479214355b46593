//! What every filtering request does before its first reading: parse and check the
//! `model`, `filter`, `prior` and `output` sections, and watch the compute deadline and
//! the cancel flag while the lines run.

use crate::config::Limits;
use crate::model::{FilterConfig, Model, OutputConfig, Prior, Zone};
use crate::problem::{FieldError, Problem, ProblemKind};
use crate::request::envelope::{self, Envelope};
use crate::request::validate;
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::Arc;
use std::time::Instant as Clock;

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
    let model = validate::model(&model_v, "/model", limits)
        .map_err(|e| errors.extend(e))
        .ok();
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

/// Checks the per-request deadline and the cancel flag every so many steps.
pub(super) struct Guard<'a> {
    cancel: &'a AtomicBool,
    deadline: Option<Clock>,
}

impl<'a> Guard<'a> {
    /// A guard for `limits.deadline` from now.
    pub(super) fn new(limits: &Limits, cancel: &'a AtomicBool) -> Self {
        Self {
            cancel,
            deadline: limits.deadline.map(|d| Clock::now() + d),
        }
    }

    /// When the request's compute budget runs out, if it has one.
    pub(super) fn deadline(&self) -> Option<Clock> {
        self.deadline
    }

    /// Err when cancelled or past the deadline (checked on every 256th step).
    pub(super) fn check(&self, step: usize) -> Result<(), Problem> {
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
