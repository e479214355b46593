//! Requests as bytes in, responses as bytes out: the boundary between the web layer (or the
//! CLI) and the estimation core. Nothing here knows about HTTP.
//!
//! Each entry point parses the request once into a checked model, runs the work and writes
//! the JSON answer. Failures are [`Problem`]s with JSON Pointers into the request.
//!
//! Where each request goes: `setup.rs` parses the sections every filtering request has;
//! `filtering.rs` is the batch estimate and smooth; `plain.rs` is the path of one line
//! (parse, filter step, record), which `pipeline.rs` runs with parsing and writing on two
//! more threads for large batches; `smooth.rs` adds the backward pass; `stream.rs` is the
//! stream session; `check.rs` and `simulate.rs` answer `/v1/check` and `/v1/simulate` over
//! [`crate::diagnostics::observability`] and [`crate::simulate`]; `upload.rs` turns a
//! historian CSV upload into a batch or calibration request; `records.rs` and
//! `write.rs` turn estimates into the JSON bytes. Modules here call down into the filters,
//! diagnostics and dynamics; nothing below imports this module.

use crate::config::Limits;
pub mod budget;
mod calibrate;
mod check;
mod failure;
mod family;
mod family_check;
mod filtering;
mod identify;
mod pipeline;
mod plain;
pub mod records;
mod setup;
mod simulate;
mod smooth;
mod stream;
mod upload;
pub mod write;

pub use crate::model::{Halt, Stop};
use crate::problem::Problem;

/// Counters of one request's filter work, for metrics and logs.
#[derive(Debug, Clone, Copy, Default, PartialEq, Eq)]
pub struct RunStats {
    /// `ekf`, `ukf`, `enkf`, or `""` for requests that run no filter.
    pub filter: &'static str,
    /// Estimates produced (one per measurement line).
    pub steps: u64,
    /// Updates applied (lines with at least one accepted reading).
    pub updates: u64,
    /// Readings rejected by the gate.
    pub rejected: u64,
}

/// A finished request: the JSON body and what it cost.
#[derive(Debug, Clone)]
pub struct Done {
    /// The JSON response body.
    pub body: Vec<u8>,
    /// Work counters.
    pub stats: RunStats,
}

/// A finished request whose JSON body is in pieces, to be sent one after the other.
///
/// A large batch answer is written in blocks by a second thread; keeping the blocks apart
/// spares joining hundreds of megabytes into one buffer (and copying them while it grows).
#[derive(Debug, Clone)]
pub struct Pieces {
    /// The body, in order.
    pub parts: Vec<Vec<u8>>,
    /// Work counters.
    pub stats: RunStats,
}

impl Pieces {
    /// Bytes of the whole body.
    pub fn len(&self) -> usize {
        self.parts.iter().map(Vec::len).sum()
    }

    /// True when the body is empty.
    pub fn is_empty(&self) -> bool {
        self.parts.iter().all(Vec::is_empty)
    }

    /// The body as one buffer.
    pub fn into_done(self) -> Done {
        let mut parts = self.parts.into_iter();
        let mut body = parts.next().unwrap_or_default();
        let rest: Vec<Vec<u8>> = parts.collect();
        body.reserve_exact(rest.iter().map(Vec::len).sum());
        for p in rest {
            body.extend_from_slice(&p);
        }
        Done {
            body,
            stats: self.stats,
        }
    }
}

/// `POST /v1/estimate`: `{model, filter, prior, measurements, output?}`.
/// `stop` is looked at between lines and inside long ones: when its client has gone or
/// its deadline (counted from the request's arrival) has passed, the work stops early
/// with an error.
pub fn estimate(body: &[u8], limits: &Limits, stop: &Stop) -> Result<Done, Problem> {
    estimate_pieces(body, limits, stop).map(Pieces::into_done)
}

/// [`estimate`] with the answer left in pieces (what the server sends).
pub fn estimate_pieces(body: &[u8], limits: &Limits, stop: &Stop) -> Result<Pieces, Problem> {
    filtering::run_batch(body, limits, stop, false)
}

/// Where a streamed answer's pieces go, in order.
pub trait PieceSink: Send {
    /// Hand over the next piece; false when nobody reads the answer any more.
    fn send(&mut self, piece: Vec<u8>) -> bool;
}

/// A batch answer: whole, or already handed to a [`PieceSink`] piece by piece.
#[derive(Debug)]
pub enum BatchAnswer {
    /// Nothing was sent: the whole answer, to be sent with its length.
    Pieces(Pieces),
    /// Everything was sent. `failed` is the problem that ended the answer after its head
    /// had gone: the answer's last member is then `"error": problem` (in place of
    /// `posterior` and `summary`), so the document stays valid JSON.
    Sent {
        /// Work counters.
        stats: RunStats,
        /// The problem written as the answer's last member, if the run failed.
        failed: Option<Problem>,
    },
}

/// [`estimate_pieces`], sending the answer to `sink` as it is written when it is run on
/// three threads (4096 lines or more) and its size is estimated at `stream_from` bytes or
/// more: memory then holds a few blocks instead of the whole answer. A problem found
/// before the first piece is sent is returned as usual.
pub fn estimate_streaming(
    body: &[u8],
    limits: &Limits,
    stop: &Stop,
    stream_from: u64,
    sink: &mut dyn PieceSink,
) -> Result<BatchAnswer, Problem> {
    filtering::run_batch_streaming(body, limits, stop, stream_from, sink)
}

/// `POST /v1/smooth`: same input as estimate, smoothed estimates out.
pub fn smooth(body: &[u8], limits: &Limits, stop: &Stop) -> Result<Done, Problem> {
    smooth_pieces(body, limits, stop).map(Pieces::into_done)
}

/// [`smooth`] with the answer left in pieces.
pub fn smooth_pieces(body: &[u8], limits: &Limits, stop: &Stop) -> Result<Pieces, Problem> {
    filtering::run_batch(body, limits, stop, true)
}

/// The memory a batch request (`smooth` for `/v1/smooth`) would need at its peak, bytes:
/// the estimate checked against `limits.max_request_bytes` before any work starts.
pub fn batch_memory(body: &[u8], limits: &Limits, smooth: bool) -> Result<u64, Problem> {
    filtering::batch_need(body, limits, smooth)
}

/// `POST /v1/calibrate`: an estimate request plus `free` (JSON Pointers of the numbers to
/// fit), `likelihood` and `search`; the fitted values with their uncertainty and the
/// request with them substituted. `progress` hears of every filter run.
pub fn calibrate(
    body: &[u8],
    limits: &Limits,
    stop: &Stop,
    progress: &(dyn Fn(u64, Option<f64>) + Sync),
) -> Result<Done, Problem> {
    calibrate::calibrate(body, limits, stop, progress)
}

/// `POST /v1/estimate` (`smooth`: `/v1/smooth`) with its readings as a historian CSV:
/// `request` is the JSON request without `measurements`, with a `csv` section saying how
/// to read `readings`. The answer is the one the same readings sent as JSON would get,
/// with the conversion's notes in `summary.warnings`.
pub fn batch_csv(
    request: &[u8],
    readings: &[u8],
    limits: &Limits,
    stop: &Stop,
    smooth: bool,
) -> Result<Pieces, Problem> {
    upload::batch(request, readings, limits, stop, smooth)
}

/// `POST /v1/calibrate` with its readings as a historian CSV (see [`batch_csv`]).
pub fn calibrate_csv(
    request: &[u8],
    readings: &[u8],
    limits: &Limits,
    stop: &Stop,
    progress: &(dyn Fn(u64, Option<f64>) + Sync),
) -> Result<Done, Problem> {
    upload::calibrate(request, readings, limits, stop, progress)
}

/// The memory a calibrate request would need at its peak, bytes: the estimate checked
/// against `limits.max_request_bytes` before its readings are parsed.
pub fn calibrate_memory(body: &[u8], limits: &Limits) -> Result<u64, Problem> {
    calibrate::memory(body, limits)
}

/// `POST /v1/simulate`: `{model, prior, times, inputs?, seed}`.
pub fn simulate(body: &[u8], limits: &Limits, stop: &Stop) -> Result<Done, Problem> {
    simulate_pieces(body, limits, stop).map(Pieces::into_done)
}

/// [`simulate`] with the answer left in pieces (what the server sends).
pub fn simulate_pieces(body: &[u8], limits: &Limits, stop: &Stop) -> Result<Pieces, Problem> {
    simulate::simulate(body, limits, stop)
}

/// `POST /v1/identify`: `{form, states, inputs?, series, ...}`; a model section that
/// `/v1/estimate` accepts, the fitted terms and the fit on a held-out tail.
pub fn identify(body: &[u8], limits: &Limits, stop: &Stop) -> Result<Done, Problem> {
    identify::identify(body, limits, stop)
}

/// The memory an identify request would need at its peak, bytes: the estimate checked
/// against `limits.max_request_bytes` once the request is parsed.
pub fn identify_memory(body: &[u8], limits: &Limits) -> Result<u64, Problem> {
    identify::memory(body, limits)
}

/// `POST /v1/check`: `{model, prior?}`.
pub fn check(body: &[u8], limits: &Limits, stop: &Stop) -> Result<Done, Problem> {
    check::check(body, limits, stop)
}

/// `GET /v1/info`: version, methods and the limits in force.
pub fn info(limits: &Limits) -> serde_json::Value {
    serde_json::json!({
        "name": "tacit",
        "version": env!("CARGO_PKG_VERSION"),
        "methods": ["ekf", "ukf", "enkf"],
        "limits": limits,
    })
}

/// One `POST /v1/estimate/stream` in progress: the header line was accepted, readings
/// arrive one line at a time and each answer line is appended to the caller's buffer.
/// Memory does not grow with the number of lines.
pub struct StreamSession {
    inner: Session,
}

/// The plain stream, or a family model's run with the local update.
enum Session {
    Plain(Box<stream::Stream>),
    Family(Box<family::LocalRun>, Stop),
}

impl StreamSession {
    /// Parse the first line `{model, filter, prior, output?}`. Each line's filter step
    /// gives up when `stop` fires (the client went away, or a deadline passed).
    pub fn start(header: &[u8], limits: &Limits, stop: &Stop) -> Result<Self, Problem> {
        if header.len() > Self::header_limit(limits) {
            return Err(Problem::new(
                crate::problem::ProblemKind::TooLarge,
                "the header line is too large",
            ));
        }
        if let Some(run) = family::stream_start(header, limits)? {
            return Ok(Self {
                inner: Session::Family(Box::new(run), stop.clone()),
            });
        }
        stream::Stream::start(header, limits, stop).map(|s| Self {
            inner: Session::Plain(Box::new(s)),
        })
    }

    /// The longest header line a stream may send: `max_line_bytes`, or more up to the
    /// body limit (at most 64 MiB), so that a posterior carrying a family run's members
    /// can start the next stream.
    pub fn header_limit(limits: &Limits) -> usize {
        limits
            .max_line_bytes
            .max(limits.max_body_bytes.min(64 << 20))
    }

    /// The longest reading line this stream takes: `max_line_bytes`, or for a family run
    /// room for every element its sensors read (26 bytes a number) when that is more.
    pub fn line_limit(&self, limits: &Limits) -> usize {
        match &self.inner {
            Session::Plain(_) => limits.max_line_bytes,
            Session::Family(run, _) => limits.max_line_bytes.max(26 * run.max_readings() + 4096),
        }
    }

    /// Apply one measurement line (1-based `line_no` for error pointers) and append its
    /// estimate as one NDJSON line (with `\n`) to `out`.
    pub fn push(&mut self, line: &[u8], line_no: u64, out: &mut Vec<u8>) -> Result<(), Problem> {
        match &mut self.inner {
            Session::Plain(s) => s.push(line, line_no, out),
            Session::Family(run, stop) => {
                run.push(line, "", stop, out).map_err(|mut p| {
                    p.detail = format!("line {line_no}: {}", p.detail);
                    p
                })?;
                out.push(b'\n');
                Ok(())
            }
        }
    }

    /// Append the `{posterior, summary}` line of the last line that went through (the
    /// prior, when none did), for a stream that fails and ends: the client resumes from it.
    pub fn last_good(&mut self, out: &mut Vec<u8>) {
        match &mut self.inner {
            Session::Plain(s) => s.last_good(out),
            Session::Family(run, _) => run.closing_line(out),
        }
    }

    /// Append the last line `{posterior, summary}` to `out`.
    pub fn finish(self, out: &mut Vec<u8>) -> Result<RunStats, Problem> {
        match self.inner {
            Session::Plain(s) => Ok(s.finish(out)),
            Session::Family(mut run, _) => {
                run.closing_line(out);
                Ok(run.stats())
            }
        }
    }
}
