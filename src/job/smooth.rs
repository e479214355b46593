//! `POST /v1/smooth`: filter every line keeping what the backward pass needs, run the
//! Rauch–Tung–Striebel pass ([`crate::filter::smoother`]) and write the smoothed
//! estimates.

use super::failure::step_problem;
use super::plain::{line_pointer, line_problem, problem_under, Lines, Predictions};
use super::setup::cancelled;
use crate::filter::run::Run;
use crate::filter::smoother::{rts, Stored};
use crate::model::{Halt, Reading};
use crate::problem::{Problem, ProblemKind};

impl Lines<'_> {
    /// Filter every line keeping what the smoother needs, smooth, and write the smoothed
    /// estimates to `buf`.
    pub(super) fn smooth(
        &self,
        run: &mut Run,
        preds: &mut Predictions<'_>,
        buf: &mut Vec<u8>,
    ) -> Result<(), Problem> {
        let mut reading = Reading::default();
        // Grown as lines go through: a line that fails early has not earned room for all.
        let mut stored: Vec<Stored> = Vec::new();
        let mut times = Vec::new();
        for (i, raw) in self.lines.iter().enumerate() {
            self.guard.check(i)?;
            self.parser
                .parse(raw, &mut reading)
                .map_err(|e| line_problem(e.under(&line_pointer(i))))?;
            preds.write(run, self.writer, Some(&reading.t))?;
            let mut predicted = None;
            let done = run
                .step_capturing(&reading, "", Some(&mut predicted))
                .map_err(|e| problem_under(step_problem(e, run.model()), &line_pointer(i)))?;
            if done.skipped {
                continue;
            }
            let est = run.estimator();
            let predicted = predicted.map(|(m, p)| (m, p, est.cross().clone()));
            stored.push(Stored {
                predicted,
                mean: est.mean().clone(),
                cov: est.covariance().clone(),
            });
            let mut frag = Vec::new();
            if !reading.sensors.is_empty() {
                self.writer.innovations(&mut frag, est.obs());
            }
            times.push((reading.t, frag));
        }
        rts(&mut stored, self.guard.stop()).map_err(|e| match e.stopped {
            Some(Halt::Cancelled) => cancelled(),
            Some(Halt::Deadline) => Problem::new(ProblemKind::DeadlineExceeded, format!("the request needed more than the compute deadline (counted from its arrival); the backward pass stopped at line {}", e.line + 1)),
            None => Problem::new(ProblemKind::NumericalFailure, format!("smoothing failed at line {}: the predicted covariance is singular (give the model process noise or a prior with spread in every state)", e.line)),
        })?;
        for (i, s) in stored.iter().enumerate() {
            if i > 0 {
                buf.push(b',');
            }
            self.writer
                .estimate_with(buf, &times[i].0, &s.mean, &s.cov, &times[i].1);
        }
        Ok(())
    }
}
