//! Estimate, smooth and stream: parse the request once, run the filter line by line and
//! write each estimate as it is made. A large batch is parsed, filtered and written on
//! three threads at once (see [`OVERLAP_MIN_LINES`]), with the same bytes as on one.

use crate::config::Limits;
use crate::filter::run::Run;
use crate::filter::smoother::{rts, Stored};
use crate::job::records::Records;
use crate::job::write::Writer;
use crate::job::{Pieces, RunStats};
use crate::problem::{FieldError, Problem, ProblemKind};
use crate::spec::model::{FilterConfig, Model, OutputConfig, Prior};
use crate::spec::reading::{LineError, Reading, ReadingParser};
use crate::spec::request::{self, Envelope};
use crate::spec::validate;
use serde_json::value::RawValue;
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::mpsc;
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

    /// When the request's compute budget runs out, if it has one.
    pub fn deadline(&self) -> Option<Clock> {
        self.deadline
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

/// The measurement array as the text of each element. The envelope parse has checked the
/// section's syntax, so a byte scan finds the elements; anything it does not take for an
/// array goes through serde_json, which reports what is wrong.
fn measurement_list<'a>(env: &Envelope<'a>, limits: &Limits) -> Result<Vec<&'a str>, Problem> {
    let raw = env
        .measurements
        .ok_or_else(|| Problem::field("/measurements", "missing required field 'measurements'"))?;
    let text: &'a str = raw.get();
    let list = match request::array_elements(text) {
        Some(list) => list,
        None => {
            let raws: Vec<&'a RawValue> =
                serde_json::from_str(text).map_err(|e| match e.classify() {
                    serde_json::error::Category::Data => {
                        Problem::field("/measurements", "expected an array of measurement lines")
                    }
                    _ => request::json_problem(e),
                })?;
            raws.into_iter().map(RawValue::get).collect()
        }
    };
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

/// The `output.at` prediction times and how far they have been written.
struct Predictions<'a> {
    at: &'a [crate::spec::time::Instant],
    next: usize,
    buf: Vec<u8>,
}

impl Predictions<'_> {
    /// Write the prediction times at or before `upto` (all that are left when None).
    fn write(
        &mut self,
        run: &Run,
        writer: &Writer,
        upto: Option<&crate::spec::time::Instant>,
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

/// A batch of at least this many lines is parsed on one more thread and written as JSON on
/// another while it is being filtered, so its time is about the longest of the three
/// rather than their sum. Below it, threads and their hand-overs would cost more than
/// they save.
pub const OVERLAP_MIN_LINES: usize = 4096;

/// Blocks of records in flight between the two threads (besides the one being filled).
const BLOCKS_IN_FLIGHT: usize = 3;

/// `POST /v1/estimate` and, with `smooth`, `POST /v1/smooth`.
pub fn run_batch(
    body: &[u8],
    limits: &Limits,
    cancel: &AtomicBool,
    smooth: bool,
) -> Result<Pieces, Problem> {
    run_batch_overlapping(body, limits, cancel, smooth, OVERLAP_MIN_LINES)
}

/// [`run_batch`], writing on a second thread from `overlap_from` lines on.
fn run_batch_overlapping(
    body: &[u8],
    limits: &Limits,
    cancel: &AtomicBool,
    smooth: bool,
    overlap_from: usize,
) -> Result<Pieces, Problem> {
    let env = request::envelope(body)?;
    let Setup {
        model,
        cfg,
        prior,
        output,
    } = setup(&env, limits)?;
    let lines = measurement_list(&env, limits)?;
    let writer = Writer::new(&model, prior.mode, output.clone());
    let mut run = Run::new(model.clone(), cfg, prior, smooth)?;
    let ctx = Lines {
        lines: &lines,
        parser: ReadingParser::new(&model, run.mode()),
        writer: &writer,
        guard: Guard::new(limits, cancel),
        shape: Shape::of(&model),
    };
    // Inside one long gap the integrator watches the same deadline.
    run.set_deadline(ctx.guard.deadline());
    let mut preds = Predictions {
        at: &output.at,
        next: 0,
        buf: Vec::new(),
    };
    let overlap = !smooth && lines.len() >= overlap_from;
    let mut head = Vec::with_capacity(if overlap {
        256
    } else {
        256 + lines.len() * ctx.shape.guess_bytes()
    });
    head.push(b'{');
    writer.states(&mut head);
    head.extend_from_slice(b",\"estimates\":[");
    let mut parts = Vec::new();
    if smooth {
        ctx.smooth(&mut run, &mut preds, &mut head)?;
    } else if overlap {
        parts = ctx.filter_overlapped(&mut run, &mut preds)?;
    } else {
        let mut block = ctx.shape.block(lines.len());
        let mut first = true;
        let mut source = ParseHere {
            lines: &ctx,
            reading: Reading::default(),
        };
        ctx.filter(&mut run, &mut preds, &mut source, &mut block, |b| {
            b.write(&writer, &mut head, first);
            first = false;
            b.clear();
            Ok(())
        })?;
    }
    preds.write(&run, &writer, None)?;
    let mut tail = if parts.is_empty() {
        head
    } else {
        parts.insert(0, head);
        Vec::with_capacity(1024 + preds.buf.len())
    };
    tail.push(b']');
    if !output.at.is_empty() {
        tail.extend_from_slice(b",\"predictions\":[");
        tail.extend_from_slice(&preds.buf);
        tail.push(b']');
    }
    tail.push(b',');
    let est = run.estimator();
    writer.posterior(
        &mut tail,
        &run.time(),
        est.mean(),
        est.covariance(),
        est.members(),
        est.step(),
        run.inputs(),
    );
    tail.push(b',');
    writer.summary(&mut tail, &run.counts);
    tail.push(b'}');
    parts.push(tail);
    Ok(Pieces {
        parts,
        stats: stats(&run),
    })
}

/// Sizes of one model's records and answer lines.
#[derive(Clone, Copy)]
struct Shape {
    n: usize,
    rows: usize,
    sensors: usize,
}

impl Shape {
    fn of(model: &Model) -> Self {
        Self {
            n: model.n(),
            rows: model.sensors.iter().map(|s| s.dim).sum(),
            sensors: model.sensors.len(),
        }
    }

    /// An empty block of records for at most `lines` steps (a small request's block
    /// stays small: a large one would be mapped and unmapped by the allocator each time).
    fn block(&self, lines: usize) -> Records {
        let steps = Records::block_steps(self.n, self.rows).min(lines);
        Records::new(self.n, self.rows, self.sensors, steps)
    }

    /// A generous guess of one estimate's bytes, before any has been written: a number
    /// is rarely longer than 24 bytes, a sensor's innovation adds about 80 bytes of names.
    fn guess_bytes(&self) -> usize {
        let Self { n, rows, sensors } = *self;
        24 * (1 + 2 * n + n * n + 3 * rows) + 16 * n + 80 * sensors + 64
    }
}

/// What the filtering loop of one batch reads and writes with.
struct Lines<'a> {
    lines: &'a [&'a str],
    parser: ReadingParser<'a>,
    writer: &'a Writer,
    guard: Guard<'a>,
    shape: Shape,
}

impl Lines<'_> {
    /// Filter every line, copying each estimate into `block`; `flush` takes a full block
    /// (and the last one) and leaves an empty one in its place. The parsed lines come
    /// from `source`, in order.
    fn filter(
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
            run.step(reading, "")
                .map_err(|e| problem_under(e.into(), &line_pointer(i)))?;
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
    fn parse_line(&self, i: usize, out: &mut Reading) -> Result<(), Problem> {
        self.parser
            .parse(self.lines[i], out)
            .map_err(|e| line_problem(e.under(&line_pointer(i))))
    }

    /// [`Lines::filter`] on three threads: one parses the lines into blocks of readings,
    /// this one filters them, and one writes the JSON from blocks of records; the
    /// answer's estimates come back as pieces in order. Each hand-over is a bounded
    /// channel with emptied blocks coming back, so nothing is allocated per line. Nothing
    /// is answered before the whole run has succeeded: on a failure the pieces are
    /// dropped, and the first failing line is the one reported, as on one thread.
    fn filter_overlapped(
        &self,
        run: &mut Run,
        preds: &mut Predictions<'_>,
    ) -> Result<Vec<Vec<u8>>, Problem> {
        let shape = self.shape;
        let writer = self.writer;
        std::thread::scope(|s| {
            let (full_tx, full_rx) = mpsc::sync_channel::<Records>(BLOCKS_IN_FLIGHT);
            let (empty_tx, empty_rx) = mpsc::channel::<Records>();
            for _ in 0..BLOCKS_IN_FLIGHT {
                let _ = empty_tx.send(shape.block(usize::MAX));
            }
            let written = std::thread::Builder::new()
                .name("tacit-writer".into())
                .spawn_scoped(s, move || write_blocks(writer, shape, full_rx, empty_tx))
                .map_err(|e| thread_failed("writing", e))?;
            let (parsed_tx, parsed_rx) = mpsc::sync_channel::<ReadingBlock>(BLOCKS_IN_FLIGHT);
            let (spent_tx, spent_rx) = mpsc::channel::<ReadingBlock>();
            for _ in 0..=BLOCKS_IN_FLIGHT {
                let _ = spent_tx.send(ReadingBlock::default());
            }
            let parsed = std::thread::Builder::new()
                .name("tacit-reader".into())
                .spawn_scoped(s, move || self.parse_blocks(parsed_tx, spent_rx))
                .map_err(|e| thread_failed("reading", e))?;
            let mut source = Parsed {
                full: parsed_rx,
                spent: spent_tx,
                block: ReadingBlock::default(),
                pos: 0,
            };
            let mut block = shape.block(usize::MAX);
            let filtered = self.filter(run, preds, &mut source, &mut block, |b| {
                // The writer hands every block back unless it has died; its panic is
                // raised again below.
                let empty = empty_rx.recv().map_err(|_| thread_gone())?;
                full_tx
                    .send(std::mem::replace(b, empty))
                    .map_err(|_| thread_gone())
            });
            // Closing the channels stops the other two threads if this one stopped early.
            drop((source, full_tx, empty_rx));
            let parts = match (written.join(), parsed.join()) {
                (Ok(parts), Ok(())) => parts,
                (Err(panic), _) | (_, Err(panic)) => std::panic::resume_unwind(panic),
            };
            filtered.map(|()| parts)
        })
    }

    /// The reading thread: parse the lines in order into blocks; a line that fails ends
    /// its block and the thread, the block carrying the line's problem.
    fn parse_blocks(
        &self,
        full: mpsc::SyncSender<ReadingBlock>,
        spent: mpsc::Receiver<ReadingBlock>,
    ) {
        let mut i = 0;
        while i < self.lines.len() {
            let Ok(mut b) = spent.recv() else { return };
            b.len = 0;
            b.error = None;
            while b.len < READINGS_PER_BLOCK && i < self.lines.len() {
                if b.readings.len() == b.len {
                    b.readings.push(Reading::default());
                }
                if let Err(p) = self.parse_line(i, &mut b.readings[b.len]) {
                    b.error = Some(p);
                    i = self.lines.len();
                    break;
                }
                b.len += 1;
                i += 1;
            }
            if full.send(b).is_err() {
                return;
            }
        }
    }

    /// Filter every line keeping what the smoother needs, smooth, and write the smoothed
    /// estimates to `buf`.
    fn smooth(
        &self,
        run: &mut Run,
        preds: &mut Predictions<'_>,
        buf: &mut Vec<u8>,
    ) -> Result<(), Problem> {
        let mut reading = Reading::default();
        let mut stored: Vec<Stored> = Vec::with_capacity(self.lines.len());
        let mut times = Vec::with_capacity(self.lines.len());
        for (i, raw) in self.lines.iter().enumerate() {
            self.guard.check(i)?;
            self.parser
                .parse(raw, &mut reading)
                .map_err(|e| line_problem(e.under(&line_pointer(i))))?;
            preds.write(run, self.writer, Some(&reading.t))?;
            let mut predicted = None;
            run.step_capturing(&reading, "", Some(&mut predicted))
                .map_err(|e| problem_under(e.into(), &line_pointer(i)))?;
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
        rts(&mut stored).map_err(|e| Problem::new(ProblemKind::NumericalFailure, format!("smoothing failed at line {}: the predicted covariance is singular (give the model process noise or a prior with spread in every state)", e.line)))?;
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

/// The writing thread: each full block becomes one piece of the answer, sized from the
/// bytes per estimate seen so far so that it is not copied while it grows.
fn write_blocks(
    writer: &Writer,
    shape: Shape,
    full: mpsc::Receiver<Records>,
    empty: mpsc::Sender<Records>,
) -> Vec<Vec<u8>> {
    let mut parts = Vec::new();
    let mut per_step = shape.guess_bytes();
    for mut block in full {
        let mut buf = Vec::with_capacity(64 + per_step * block.len());
        block.write(writer, &mut buf, parts.is_empty());
        // A quarter more than the largest seen: the numbers' lengths vary a little.
        per_step = per_step.max(buf.len().div_ceil(block.len()) * 5 / 4);
        parts.push(buf);
        block.clear();
        // The filtering thread may have stopped (a failed line); then the block is dropped.
        let _ = empty.send(block);
    }
    parts
}

fn thread_gone() -> Problem {
    Problem::new(
        ProblemKind::Internal,
        "a reading or writing thread stopped early",
    )
}

fn thread_failed(what: &str, e: std::io::Error) -> Problem {
    Problem::new(
        ProblemKind::Internal,
        format!("could not start the {what} thread: {e}"),
    )
}

/// Lines per block handed from the reading thread to the filtering thread.
const READINGS_PER_BLOCK: usize = 512;

/// Where the filtering loop takes its parsed lines from, in order.
trait Source {
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

/// Parsed lines handed over by the reading thread.
#[derive(Default)]
struct ReadingBlock {
    /// Reused from block to block, so their buffers are allocated once.
    readings: Vec<Reading>,
    /// Readings filled in this block.
    len: usize,
    /// The problem of the line after the last one filled, which ended the reading.
    error: Option<Problem>,
}

/// The filtering thread's end of the reading thread's channels.
struct Parsed {
    full: mpsc::Receiver<ReadingBlock>,
    spent: mpsc::Sender<ReadingBlock>,
    block: ReadingBlock,
    pos: usize,
}

impl Source for Parsed {
    fn next(&mut self, _i: usize) -> Result<&Reading, Problem> {
        loop {
            if self.pos < self.block.len {
                self.pos += 1;
                return Ok(&self.block.readings[self.pos - 1]);
            }
            if let Some(p) = self.block.error.take() {
                return Err(p);
            }
            let next = self.full.recv().map_err(|_| thread_gone())?;
            let spent = std::mem::replace(&mut self.block, next);
            // The reading thread may have finished; then the block is simply dropped.
            let _ = self.spent.send(spent);
            self.pos = 0;
        }
    }
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
        self.run.step(&self.reading, "").map_err(|e| {
            let mut p = Problem::from(e);
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

#[cfg(test)]
mod tests {
    use super::*;

    /// A batch that exercises every part of an estimate line: two sensors (one a vector),
    /// lines with one, both or neither, a gated outlier, inputs, and prediction times.
    fn body(lines: usize, covariance: &str, bad_line: Option<usize>, bad_sensor: bool) -> Vec<u8> {
        let mut s = String::from(
            r#"{"model":{"states":["pos","vel"],"inputs":["force"],
            "dynamics":{"rates":{"pos":"vel","vel":"force"}},
            "process_noise":{"density":{"vel":0.1}},
            "sensors":{"encoder":{"measures":"pos","std":0.05},
                       "pair":{"measures":["pos","vel"],"std":[0.1,0.2]}}},
            "filter":{"method":"ekf","gate":{"probability":0.999}},
            "prior":{"t":0,"mean":{"pos":0,"vel":0},"std":{"pos":1,"vel":5}},"#,
        );
        s.push_str(&format!(
            r#""output":{{"covariance":"{covariance}","innovations":true,"at":[0.005,1.234,99]}},"measurements":["#
        ));
        for k in 1..=lines {
            if k > 1 {
                s.push(',');
            }
            let t = if bad_line == Some(k - 1) {
                0.0
            } else {
                k as f64 * 0.01
            };
            let pos = 0.3 * t + ((k * 7919) % 101) as f64 * 1e-3;
            let line = match k % 7 {
                _ if bad_line == Some(k - 1) && bad_sensor => {
                    format!(r#"{{"t":{t},"values":{{"tachometer":1.0}}}}"#)
                }
                0 => format!(r#"{{"t":{t},"inputs":{{"force":0.5}}}}"#),
                3 => format!(r#"{{"t":{t},"values":{{"pair":[{pos},0.3],"encoder":{pos}}}}}"#),
                5 => format!(r#"{{"t":{t},"values":{{"encoder":{}}}}}"#, pos + 50.0),
                6 => format!(r#"{{"t":{t},"values":{{"pair":[{pos},0.3]}}}}"#),
                _ => format!(r#"{{"t":{t},"values":{{"encoder":{pos}}}}}"#),
            };
            s.push_str(&line);
        }
        s.push_str("]}");
        s.into_bytes()
    }

    fn run(body: &[u8], overlap_from: usize) -> Result<Pieces, Problem> {
        let limits = Limits::default();
        run_batch_overlapping(body, &limits, &AtomicBool::new(false), false, overlap_from)
    }

    #[test]
    fn the_reading_and_writing_threads_give_the_same_bytes_as_one_thread() {
        // Lines enough for several blocks of records, so the hand-over and the piece
        // boundaries are crossed many times.
        for covariance in ["full", "std", "none"] {
            let b = body(3 * 4096 + 17, covariance, None, false);
            let one = run(&b, usize::MAX).unwrap();
            let two = run(&b, 1).unwrap();
            assert_eq!(one.parts.len(), 1);
            assert!(two.parts.len() > 3, "{} pieces", two.parts.len());
            let (one, two) = (one.into_done(), two.into_done());
            assert!(one.body == two.body, "the answers differ ({covariance})");
            assert_eq!(one.stats, two.stats);
            let v: serde_json::Value = serde_json::from_slice(&two.body).unwrap();
            assert_eq!(v["estimates"].as_array().unwrap().len(), 3 * 4096 + 17);
            assert_eq!(v["predictions"].as_array().unwrap().len(), 3);
            assert!(
                one.stats.rejected > 0,
                "the outliers were meant to be gated"
            );
        }
    }

    #[test]
    fn a_failing_line_fails_the_whole_overlapped_batch_with_its_pointer() {
        // A time going backwards fails in the filter, an unknown sensor in the reader;
        // either way the answer is the first failing line's problem, as on one thread.
        for (bad_sensor, pointer) in [
            (false, "/measurements/5000/t"),
            (true, "/measurements/5000/values/tachometer"),
        ] {
            let b = body(2 * 4096 + 5, "full", Some(5000), bad_sensor);
            let one = run(&b, usize::MAX).unwrap_err();
            let two = run(&b, 1).unwrap_err();
            assert_eq!(two.status, 422);
            assert_eq!(two.errors[0].pointer, pointer);
            assert_eq!(one.to_json(), two.to_json());
        }
    }
}
