//! The plain path of a batch, on one thread and in order: parse a line, step the filter,
//! keep the estimate as a record, and write the records as JSON block by block.
//!
//! [`Lines::filter`] is the one loop every batch estimate runs; the three-thread
//! pipeline ([`super::pipeline`]) runs it too, with the lines parsed and the records
//! written elsewhere.

use super::failure::step_problem;
use super::setup::Guard;
use crate::filter::run::Run;
use crate::job::records::Records;
use crate::job::write::Writer;
use crate::job::RunStats;
use crate::model::Model;
use crate::model::Reading;
use crate::problem::{Problem, ProblemKind};
use crate::request::reading::{LineError, ReadingParser};

/// What the filtering loop of one batch reads and writes with.
pub(super) struct Lines<'a> {
    pub(super) lines: &'a [&'a str],
    pub(super) parser: ReadingParser<'a>,
    pub(super) writer: &'a Writer,
    pub(super) guard: Guard<'a>,
    pub(super) shape: Shape,
}

impl Lines<'_> {
    /// Filter every line on this thread, appending each full block of estimates to `out`
    /// as JSON.
    pub(super) fn filter_plain(
        &self,
        run: &mut Run,
        preds: &mut Predictions<'_>,
        out: &mut Vec<u8>,
    ) -> Result<(), Problem> {
        let mut block = self.shape.block(self.lines.len());
        let mut first = true;
        let mut source = ParseHere {
            lines: self,
            reading: Reading::default(),
        };
        self.filter(run, preds, &mut source, &mut block, |b| {
            b.write(self.writer, out, first);
            first = false;
            b.clear();
            Ok(())
        })
    }

    /// Filter every line, copying each estimate into `block`; `flush` takes a full block
    /// (and the last one) and leaves an empty one in its place. The parsed lines come
    /// from `source`, in order.
    pub(super) fn filter(
        &self,
        run: &mut Run,
        preds: &mut Predictions<'_>,
        source: &mut impl Source,
        block: &mut Records,
        mut flush: impl FnMut(&mut Records) -> Result<(), Problem>,
    ) -> Result<(), Problem> {
        for i in 0..self.lines.len() {
            self.guard.check(i)?;
            let reading = source.next(i)?;
            preds.write(run, self.writer, Some(&reading.t))?;
            let done = run
                .step(reading, "")
                .map_err(|e| problem_under(step_problem(e, run.model()), &line_pointer(i)))?;
            if done.skipped {
                // A late line skipped under `filter.late: "skip"` has no estimate.
                continue;
            }
            let est = run.estimator();
            block.push(
                self.writer,
                &reading.t,
                est.mean(),
                est.covariance(),
                Some(est.obs()).filter(|_| !reading.sensors.is_empty()),
            );
            if block.is_full() {
                flush(block)?;
            }
        }
        if !block.is_empty() {
            flush(block)?;
        }
        Ok(())
    }

    /// Parse line `i` here, for a batch read on one thread.
    pub(super) fn parse_line(&self, i: usize, out: &mut Reading) -> Result<(), Problem> {
        self.parser
            .parse(self.lines[i], out)
            .map_err(|e| line_problem(e.under(&line_pointer(i))))
    }
}

/// Where the filtering loop takes its parsed lines from, in order.
pub(super) trait Source {
    /// The reading of line `i`, or the problem of that line.
    fn next(&mut self, i: usize) -> Result<&Reading, Problem>;
}

/// Lines parsed on the filtering thread itself, one at a time.
struct ParseHere<'a, 'b> {
    lines: &'b Lines<'a>,
    reading: Reading,
}

impl Source for ParseHere<'_, '_> {
    fn next(&mut self, i: usize) -> Result<&Reading, Problem> {
        self.lines.parse_line(i, &mut self.reading)?;
        Ok(&self.reading)
    }
}

/// One run's counters, for metrics and logs.
pub(super) fn stats(run: &Run) -> RunStats {
    RunStats {
        filter: run.config().method.name(),
        steps: run.counts.steps,
        updates: run.counts.updates,
        rejected: run.counts.rejected,
    }
}

/// The `output.at` prediction times and how far they have been written.
pub(super) struct Predictions<'a> {
    pub(super) at: &'a [crate::model::Instant],
    pub(super) next: usize,
    pub(super) buf: Vec<u8>,
}

impl Predictions<'_> {
    /// Write the prediction times at or before `upto` (all that are left when None).
    pub(super) fn write(
        &mut self,
        run: &Run,
        writer: &Writer,
        upto: Option<&crate::model::Instant>,
    ) -> Result<(), Problem> {
        let mode = run.mode();
        while let Some(at) = self.at.get(self.next) {
            if upto.is_some_and(|u| at.is_after(u, mode) || at == u) {
                break;
            }
            let (m, p) = run.predict_aside(at)?;
            if self.next > 0 {
                self.buf.push(b',');
            }
            writer.estimate(&mut self.buf, at, &m, &p, None);
            self.next += 1;
        }
        Ok(())
    }
}

/// Sizes of one model's records and answer lines.
#[derive(Clone, Copy)]
pub(super) struct Shape {
    n: usize,
    rows: usize,
    sensors: usize,
}

impl Shape {
    pub(super) fn of(model: &Model) -> Self {
        Self {
            n: model.n(),
            rows: model.sensors.iter().map(|s| s.dim).sum(),
            sensors: model.sensors.len(),
        }
    }

    /// An empty block of records for at most `lines` steps (a small request's block
    /// stays small: a large one would be mapped and unmapped by the allocator each time).
    pub(super) fn block(&self, lines: usize) -> Records {
        let steps = Records::block_steps(self.n, self.rows).min(lines);
        Records::new(self.n, self.rows, self.sensors, steps)
    }

    /// A generous guess of one estimate's bytes, before any has been written: a number
    /// is rarely longer than 24 bytes, a sensor's innovation adds about 80 bytes of names.
    pub(super) fn guess_bytes(&self) -> usize {
        let Self { n, rows, sensors } = *self;
        24 * (1 + 2 * n + n * n + 3 * rows) + 16 * n + 80 * sensors + 64
    }
}

/// Pointer of batch line `i`; built only for a line that failed.
pub(super) fn line_pointer(i: usize) -> String {
    format!("/measurements/{i}")
}

/// A step's problem with its field pointers (relative to the line) put under `base`. The
/// detail of a 422 names the first pointer, so it is built again from the moved pointers.
pub(super) fn problem_under(p: Problem, base: &str) -> Problem {
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

/// A line that did not parse: bad JSON is a 400, a bad field a 422.
pub(super) fn line_problem(e: LineError) -> Problem {
    match e {
        LineError::Syntax(msg) => Problem::new(ProblemKind::MalformedJson, msg),
        LineError::Invalid(errors) => Problem::invalid(errors),
    }
}
