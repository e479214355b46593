//! `POST /v1/estimate` and `POST /v1/smooth`: parse the request once, run the filter
//! line by line and write each estimate as it is made.
//!
//! The path of one line is [`super::plain`] (parse, step, write a record). A large batch
//! runs the same loop with parsing and writing on two more threads ([`super::pipeline`],
//! from [`OVERLAP_MIN_LINES`] on), with the same bytes as on one; a smoothed batch keeps
//! every step for the backward pass ([`super::smooth`]). The stream is [`super::stream`].

use super::budget::{self, BatchShape, Held};
use super::plain::{stats, Lines, Predictions, Shape};
use super::setup::{setup, Guard, Setup};
use crate::config::Limits;
use crate::filter::run::Run;
use crate::job::write::Writer;
use crate::job::{BatchAnswer, PieceSink, Pieces};
use crate::model::Stop;
use crate::problem::{Problem, ProblemKind};
use crate::request::envelope::{self, Envelope};
use crate::request::reading::ReadingParser;
use serde_json::value::RawValue;

/// The measurement array as the text of each element. The envelope parse has checked the
/// section's syntax, so a byte scan finds the elements; anything it does not take for an
/// array goes through serde_json, which reports what is wrong.
pub(super) fn measurement_list<'a>(
    env: &Envelope<'a>,
    limits: &Limits,
) -> Result<Vec<&'a str>, Problem> {
    let raw = env
        .measurements
        .ok_or_else(|| Problem::field("/measurements", "missing required field 'measurements'"))?;
    let text: &'a str = raw.get();
    let list = match envelope::array_elements(text) {
        Some(list) => list,
        None => {
            let raws: Vec<&'a RawValue> =
                serde_json::from_str(text).map_err(|e| match e.classify() {
                    serde_json::error::Category::Data => {
                        Problem::field("/measurements", "expected an array of measurement lines")
                    }
                    _ => envelope::json_problem(e),
                })?;
            raws.into_iter().map(RawValue::get).collect()
        }
    };
    if list.len() > limits.max_lines {
        return Err(Problem::field("/measurements", format!("{} lines exceed the limit of {} per request; use the stream endpoint or split the run", list.len(), limits.max_lines)));
    }
    Ok(list)
}

/// A batch of at least this many lines is parsed on one more thread and written as JSON on
/// another while it is being filtered, so its time is about the longest of the three
/// rather than their sum. Below it, threads and their hand-overs would cost more than
/// they save.
pub(super) const OVERLAP_MIN_LINES: usize = 4096;

/// `POST /v1/estimate` and, with `smooth`, `POST /v1/smooth`.
pub(super) fn run_batch(
    body: &[u8],
    limits: &Limits,
    stop: &Stop,
    smooth: bool,
) -> Result<Pieces, Problem> {
    run_batch_overlapping(body, limits, stop, smooth, OVERLAP_MIN_LINES)
}

/// `POST /v1/estimate`, its answer sent to `sink` as it is written when it is large
/// (see [`super::estimate_streaming`]).
pub(super) fn run_batch_streaming(
    body: &[u8],
    limits: &Limits,
    stop: &Stop,
    stream_from: u64,
    sink: &mut dyn PieceSink,
) -> Result<BatchAnswer, Problem> {
    let out = Streaming {
        from: stream_from,
        sink,
    };
    run_batch_to(body, limits, stop, false, OVERLAP_MIN_LINES, Some(out))
}

/// [`run_batch`], writing on a second thread from `overlap_from` lines on.
fn run_batch_overlapping(
    body: &[u8],
    limits: &Limits,
    stop: &Stop,
    smooth: bool,
    overlap_from: usize,
) -> Result<Pieces, Problem> {
    match run_batch_to(body, limits, stop, smooth, overlap_from, None)? {
        BatchAnswer::Pieces(p) => Ok(p),
        BatchAnswer::Sent { .. } => Err(Problem::new(
            ProblemKind::Internal,
            "an answer was streamed without a sink",
        )),
    }
}

/// Where a large answer may be streamed, and from which estimated size on.
struct Streaming<'s> {
    from: u64,
    sink: &'s mut dyn PieceSink,
}

/// A sink that puts the answer's head before its first piece and notes whether anything
/// has gone: until then a problem is still an ordinary error answer.
struct Headed<'s> {
    head: Option<Vec<u8>>,
    sink: &'s mut dyn PieceSink,
    sent: bool,
}

impl PieceSink for Headed<'_> {
    fn send(&mut self, piece: Vec<u8>) -> bool {
        let piece = match self.head.take() {
            Some(mut head) => {
                head.extend_from_slice(&piece);
                head
            }
            None => piece,
        };
        self.sent = true;
        self.sink.send(piece)
    }
}

/// [`run_batch_overlapping`], streaming the answer to `out` when it qualifies.
fn run_batch_to(
    body: &[u8],
    limits: &Limits,
    stop: &Stop,
    smooth: bool,
    overlap_from: usize,
    out: Option<Streaming<'_>>,
) -> Result<BatchAnswer, Problem> {
    let env = envelope::envelope(body)?;
    if !smooth {
        let lines = || measurement_list(&env, limits);
        if let Some(p) = super::family::estimate(&env, body.len(), lines, limits, stop)? {
            return Ok(BatchAnswer::Pieces(p));
        }
    }
    let Setup {
        model,
        cfg,
        prior,
        output,
        zone,
    } = setup(&env, limits)?;
    let lines = measurement_list(&env, limits)?;
    let overlap = !smooth && lines.len() >= overlap_from;
    let answer_bytes = lines.len() as u64 * budget::estimate_line_bytes(&model, &output);
    let out = out.filter(|o| overlap && answer_bytes >= o.from);
    let mut need = shape(&model, &cfg, &output, &lines, body, smooth, overlap);
    if out.is_some() {
        need.answer = Held::Streamed;
    }
    budget::within(budget::batch_bytes(&need), limits)?;
    let writer = Writer::new(&model, prior.mode, output.clone());
    let mut run = Run::new(model.clone(), cfg, prior, smooth)?;
    let ctx = Lines {
        lines: &lines,
        parser: ReadingParser::new(&model, run.mode(), &zone),
        writer: &writer,
        guard: Guard::new(stop),
        shape: Shape::of(&model),
    };
    // Inside one long gap the prediction watches the same stop, and a gap needing too
    // many steps is refused before any.
    run.set_stop(stop);
    run.set_step_limit(limits.max_gap_steps);
    let mut preds = Predictions {
        at: &output.at,
        next: 0,
        buf: Vec::new(),
    };
    // The answer grows as it is written: nothing is reserved for lines not yet run.
    let mut head = Vec::with_capacity(256);
    head.push(b'{');
    writer.states(&mut head);
    head.extend_from_slice(b",\"estimates\":[");
    if let Some(out) = out {
        let mut headed = Headed {
            head: Some(head),
            sink: out.sink,
            sent: false,
        };
        let ran = ctx
            .filter_overlapped(&mut run, &mut preds, Some(&mut headed))
            .and_then(|_| preds.write(&run, &writer, None));
        let mut tail = headed.head.take().unwrap_or_default();
        let failed = match ran {
            Err(p) if !headed.sent => return Err(p),
            Err(p) => {
                tail.extend_from_slice(b"],\"error\":");
                tail.extend_from_slice(&public_problem(&p).to_json());
                tail.push(b'}');
                Some(p)
            }
            Ok(()) => {
                finish(&mut tail, &writer, &run, &output, &preds);
                None
            }
        };
        headed.send(tail);
        return Ok(BatchAnswer::Sent {
            stats: stats(&run),
            failed,
        });
    }
    let mut parts = Vec::new();
    if smooth {
        ctx.smooth(&mut run, &mut preds, &mut head)?;
    } else if overlap {
        parts = ctx.filter_overlapped(&mut run, &mut preds, None)?;
    } else {
        ctx.filter_plain(&mut run, &mut preds, &mut head)?;
    }
    preds.write(&run, &writer, None)?;
    let mut tail = if parts.is_empty() {
        head
    } else {
        parts.insert(0, head);
        Vec::with_capacity(1024 + preds.buf.len())
    };
    finish(&mut tail, &writer, &run, &output, &preds);
    parts.push(tail);
    Ok(BatchAnswer::Pieces(Pieces {
        parts,
        stats: stats(&run),
    }))
}

/// The end of a batch answer after its estimates: predictions, posterior, summary.
fn finish(
    tail: &mut Vec<u8>,
    writer: &Writer,
    run: &Run,
    output: &crate::model::OutputConfig,
    preds: &Predictions<'_>,
) {
    tail.push(b']');
    if !output.at.is_empty() {
        tail.extend_from_slice(b",\"predictions\":[");
        tail.extend_from_slice(&preds.buf);
        tail.push(b']');
    }
    tail.push(b',');
    writer.posterior(tail, run);
    tail.push(b',');
    writer.summary(tail, run);
    tail.push(b'}');
}

/// A problem as a client may read it: the words of an internal error stay in the log.
fn public_problem(p: &Problem) -> Problem {
    if p.status >= 500 && p.type_uri == Problem::new(ProblemKind::Internal, "").type_uri {
        Problem::new(
            ProblemKind::Internal,
            "an internal error occurred; it has been logged with this request's id",
        )
    } else {
        p.clone()
    }
}

/// The shape the memory estimate reads.
fn shape<'a>(
    model: &'a crate::model::Model,
    cfg: &'a crate::model::FilterConfig,
    output: &'a crate::model::OutputConfig,
    lines: &[&str],
    body: &[u8],
    smooth: bool,
    overlap: bool,
) -> BatchShape<'a> {
    BatchShape {
        model,
        cfg,
        output,
        lines: lines.len(),
        body: body.len(),
        smooth,
        answer: if overlap { Held::Pieces } else { Held::Buffer },
    }
}

/// The memory a batch request would need at its peak, as [`run_batch`] estimates it
/// before running (for tests and operators sizing `max_request_bytes`).
pub(super) fn batch_need(body: &[u8], limits: &Limits, smooth: bool) -> Result<u64, Problem> {
    let env = envelope::envelope(body)?;
    if !smooth {
        let lines = measurement_list(&env, limits)?.len();
        if let Some(need) = super::family::batch_need(&env, body.len(), lines, limits)? {
            return Ok(need);
        }
    }
    let s = setup(&env, limits)?;
    let lines = measurement_list(&env, limits)?;
    let overlap = !smooth && lines.len() >= OVERLAP_MIN_LINES;
    let shape = shape(&s.model, &s.cfg, &s.output, &lines, body, smooth, overlap);
    Ok(budget::batch_bytes(&shape))
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
        run_batch_overlapping(body, &limits, &Stop::never(), false, overlap_from)
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
