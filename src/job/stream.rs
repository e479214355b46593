//! `POST /v1/estimate/stream`: the header line sets the run up, then each measurement
//! line becomes one estimate line and the end one `{posterior, summary}` line. Memory does
//! not grow with the number of lines.
//!
//! A stream that fails on a line (a bad line, a filter failure) still owes the client a
//! place to resume from: the `{posterior, summary}` of the last line that went through,
//! sent before the error. A failed filter step may have moved the filter part-way, so
//! that belief is copied aside after every line (into buffers made once, no allocation).

use super::failure::step_problem;
use super::plain::{line_problem, stats};
use super::setup::{setup, Setup};
use crate::config::Limits;
use crate::diagnostics::warnings::Warnings;
use crate::filter::run::{Counts, Run};
use crate::job::write::Writer;
use crate::job::RunStats;
use crate::model::{Instant, Reading, Running, Stop, Zone};
use crate::problem::{Problem, ProblemKind};
use crate::request::envelope;
use crate::request::reading::ReadingParser;
use nalgebra::{DMatrix, DVector};

/// A stream in progress (see [`crate::job::StreamSession`]).
pub(super) struct Stream {
    run: Run,
    writer: Writer,
    reading: Reading,
    lines: u64,
    /// Where offset-less timestamps are read (the header's `time_zone`).
    zone: Zone,
    /// The belief after the last line that went through.
    good: LastGood,
}

/// What a `{posterior, summary}` line needs, as it stood after the last good line.
struct LastGood {
    t: Instant,
    mean: DVector<f64>,
    cov: DMatrix<f64>,
    members: Option<DMatrix<f64>>,
    step: u64,
    inputs: DVector<f64>,
    counts: Counts,
    running: Running,
    in_a_row: Vec<u64>,
    warnings: Warnings,
    /// Entries and the sum of their counts in `warnings`. Warnings only ever gain entries
    /// or counts, so while this pair is unchanged they are unchanged and are not copied.
    seen: (usize, u64),
}

/// [`LastGood::seen`] of `w`.
fn fingerprint(w: &Warnings) -> (usize, u64) {
    let list = w.list();
    (list.len(), list.iter().map(|x| x.count).sum())
}

impl LastGood {
    fn of(run: &Run) -> Self {
        let est = run.estimator();
        Self {
            t: run.time(),
            mean: est.mean().clone(),
            cov: est.covariance().clone(),
            members: est.members().cloned(),
            step: est.step(),
            inputs: run.inputs().clone(),
            counts: run.counts,
            running: run.running(),
            in_a_row: run.in_a_row().collect(),
            warnings: run.warnings.clone(),
            seen: fingerprint(&run.warnings),
        }
    }

    /// Copy the run's belief in place (same shapes every line: no allocation, except
    /// when the warnings changed).
    fn keep(&mut self, run: &Run) {
        let est = run.estimator();
        self.t = run.time();
        self.mean.copy_from(est.mean());
        self.cov.copy_from(est.covariance());
        match (&mut self.members, est.members()) {
            (Some(mine), Some(theirs)) if mine.shape() == theirs.shape() => mine.copy_from(theirs),
            (mine, theirs) => *mine = theirs.cloned(),
        }
        self.step = est.step();
        self.inputs.copy_from(run.inputs());
        self.counts = run.counts;
        self.running = run.running();
        for (mine, theirs) in self.in_a_row.iter_mut().zip(run.in_a_row()) {
            *mine = theirs;
        }
        let seen = fingerprint(&run.warnings);
        if seen != self.seen {
            self.warnings = run.warnings.clone();
            self.seen = seen;
        }
    }
}

impl Stream {
    /// Parse the header line `{model, filter, prior, output?}`.
    pub(super) fn start(header: &[u8], limits: &Limits, stop: &Stop) -> Result<Self, Problem> {
        let env = envelope::envelope(header)?;
        if env.measurements.is_some() {
            return Err(Problem::field("/measurements", "the stream's first line holds model, filter, prior and output; readings follow one per line"));
        }
        let Setup {
            model,
            cfg,
            prior,
            output,
            zone,
        } = setup(&env, limits)?;
        if !output.at.is_empty() {
            return Err(Problem::field(
                "/output/at",
                "prediction-only times are available on /v1/estimate, not on the stream",
            ));
        }
        let writer = Writer::new(&model, prior.mode, output);
        let mut run = Run::new(model, cfg, prior, false)?;
        run.set_stop(stop);
        run.set_step_limit(limits.max_gap_steps);
        Ok(Self {
            good: LastGood::of(&run),
            run,
            writer,
            reading: Reading::default(),
            lines: 0,
            zone,
        })
    }

    /// One measurement line → one estimate line.
    pub(super) fn push(
        &mut self,
        line: &[u8],
        line_no: u64,
        out: &mut Vec<u8>,
    ) -> Result<(), Problem> {
        let text = std::str::from_utf8(line).map_err(|_| {
            Problem::new(
                ProblemKind::MalformedJson,
                format!("line {line_no} is not UTF-8"),
            )
        })?;
        let model = self.run.model();
        let parser = ReadingParser::new(model, self.run.mode(), &self.zone);
        parser.parse(text, &mut self.reading).map_err(|e| {
            let mut p = line_problem(e);
            p.detail = format!("line {line_no}: {}", p.detail);
            p
        })?;
        let done = self.run.step(&self.reading, "").map_err(|e| {
            let mut p = step_problem(e, self.run.model());
            p.detail = format!("line {line_no}: {}", p.detail);
            p
        })?;
        self.lines += 1;
        self.good.keep(&self.run);
        if done.skipped {
            // A late line skipped under `filter.late: "skip"` has no estimate line.
            return Ok(());
        }
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

    /// The `{posterior, summary}` line of the last line that went through, for a stream
    /// that cannot go on: resuming from this posterior with the lines after that one
    /// gives the same estimates as a run that never stopped. The summary counts those
    /// lines; the stream ends here.
    pub(super) fn last_good(&mut self, out: &mut Vec<u8>) {
        let g = &self.good;
        out.push(b'{');
        self.writer.posterior_parts(
            out,
            &g.t,
            &g.mean,
            &g.cov,
            g.members.as_ref(),
            g.step,
            &g.inputs,
            &g.running,
            g.in_a_row.iter().copied(),
        );
        out.push(b',');
        // The run's own summary rules (e.g. `no_updates`) over the last good tallies.
        self.run
            .restore_tallies(g.counts, g.warnings.clone(), g.running);
        self.writer.summary(out, &self.run);
        out.extend_from_slice(b"}\n");
    }

    /// The last line `{posterior, summary}`.
    pub(super) fn finish(self, out: &mut Vec<u8>) -> RunStats {
        out.push(b'{');
        self.writer.posterior(out, &self.run);
        out.push(b',');
        self.writer.summary(out, &self.run);
        out.extend_from_slice(b"}\n");
        stats(&self.run)
    }
}
