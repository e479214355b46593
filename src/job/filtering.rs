//! `POST /v1/estimate` and `POST /v1/smooth`: parse the request once, run the filter
//! line by line and write each estimate as it is made.
//!
//! The path of one line is [`super::plain`] (parse, step, write a record). A large batch
//! runs the same loop with parsing and writing on two more threads ([`super::pipeline`],
//! from [`OVERLAP_MIN_LINES`] on), with the same bytes as on one; a smoothed batch keeps
//! every step for the backward pass ([`super::smooth`]). The stream is [`super::stream`].

use super::plain::{stats, Lines, Predictions, Shape};
use super::setup::{setup, Guard, Setup};
use crate::config::Limits;
use crate::filter::run::Run;
use crate::job::write::Writer;
use crate::job::Pieces;
use crate::problem::Problem;
use crate::request::envelope::{self, Envelope};
use crate::request::reading::ReadingParser;
use serde_json::value::RawValue;
use std::sync::atomic::AtomicBool;

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
    let env = envelope::envelope(body)?;
    let Setup {
        model,
        cfg,
        prior,
        output,
        zone,
    } = setup(&env, limits)?;
    let lines = measurement_list(&env, limits)?;
    let writer = Writer::new(&model, prior.mode, output.clone());
    let mut run = Run::new(model.clone(), cfg, prior, smooth)?;
    let ctx = Lines {
        lines: &lines,
        parser: ReadingParser::new(&model, run.mode(), &zone),
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
        ctx.filter_plain(&mut run, &mut preds, &mut head)?;
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
    writer.posterior(&mut tail, &run);
    tail.push(b',');
    writer.summary(&mut tail, &run);
    tail.push(b'}');
    parts.push(tail);
    Ok(Pieces {
        parts,
        stats: stats(&run),
    })
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
