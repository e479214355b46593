//! `POST /v1/calibrate`: fit numbers of an estimate request (noise settings, sensor
//! spreads, parameters, prior spreads), named by JSON Pointer in `free`, to the request's
//! own readings by maximum likelihood.
//!
//! `spec.rs` reads `free`, `likelihood` and `search`; `objective.rs` parses the request
//! once and runs the filter for given values (the log-likelihood by the prediction-error
//! decomposition); `search.rs` is the quasi-Newton search with its derivative-free
//! fallback; `stats.rs` turns the curvature at the optimum into standard errors,
//! intervals, correlations and identifiability warnings. The answer carries the whole
//! request with the fitted values substituted, ready for /v1/estimate.

mod objective;
mod parts;
mod search;
mod spec;
mod stats;

use crate::config::Limits;
use crate::job::filtering::measurement_list;
use crate::job::setup::cancelled;
use crate::job::{Done, RunStats};
use crate::model::{Halt, Stop as RequestStop};
use crate::problem::Problem;
use crate::request::envelope;
use objective::{readings_only, Objective, Progress, Stop};
use serde_json::value::RawValue;
use serde_json::{json, Map as JsonMap, Value};

/// The summary object a run wrote (`"summary":{...}`) as JSON.
fn summary_value(bytes: &[u8]) -> Value {
    let body = bytes.strip_prefix(b"\"summary\":").unwrap_or(bytes);
    serde_json::from_slice(body).unwrap_or(Value::Null)
}

/// A number, or null when it is not finite (never NaN in an answer).
fn num(x: f64) -> Value {
    serde_json::Number::from_f64(x).map_or(Value::Null, Value::Number)
}

/// The sections of a calibrate request: `free` (required), `likelihood`, `search`, the
/// measurements' raw text, and the rest as a tree (see [`parts::Members::head`]).
#[allow(clippy::type_complexity)]
fn sections<'b>(
    members: &mut parts::Members<'b>,
) -> Result<
    (
        Value,
        Option<Value>,
        Option<Value>,
        Option<&'b RawValue>,
        Value,
    ),
    Problem,
> {
    let section = |raw: Option<&RawValue>| -> Result<Option<Value>, Problem> {
        raw.map(|r| serde_json::from_str(r.get()).map_err(envelope::json_problem))
            .transpose()
    };
    let free_v = section(members.take("free"))?
        .ok_or_else(|| Problem::field("/free", "missing required field 'free'"))?;
    let likelihood = section(members.take("likelihood"))?;
    let search_v = section(members.take("search"))?;
    let measurements = members.get("measurements");
    let head = Value::Object(members.head()?);
    Ok((free_v, likelihood, search_v, measurements, head))
}

/// The memory a calibrate request would need at its peak, bytes, as [`calibrate`]
/// estimates it before parsing its readings.
pub(super) fn memory(body: &[u8], limits: &Limits) -> Result<u64, Problem> {
    let mut members = parts::members(body)?;
    let (_, _, _, measurements, head) = sections(&mut members)?;
    objective::checked(&head, measurements, body.len(), limits).map(|(_, _, need)| need)
}

/// `POST /v1/calibrate`. `progress` hears of every run (its number from 1 and its
/// log-likelihood, None for a run that failed).
pub(super) fn calibrate(
    body: &[u8],
    limits: &Limits,
    stop: &RequestStop,
    progress: Progress<'_>,
) -> Result<Done, Problem> {
    let mut members = parts::members(body)?;
    let (free_v, likelihood, search_v, measurements, head) = sections(&mut members)?;
    let settings = spec::settings(likelihood.as_ref(), search_v.as_ref())?;
    let frees = spec::free(&free_v, &head)?;

    let maps: Vec<spec::Map> = frees.iter().map(|f| f.map).collect();
    let obj = Objective::new(
        head,
        measurements,
        body.len(),
        &frees,
        settings.skip,
        settings.max_runs,
        limits,
        stop,
        progress,
    )?;
    let x0: Vec<f64> = frees.iter().map(|f| f.start).collect();
    let u0: Vec<f64> = frees.iter().map(|f| f.map.u(f.start)).collect();
    // The starting values must give a likelihood: their failure is the request's.
    let start = obj.run(&x0, false, false)?;
    if !start.ll.is_finite() {
        return Err(Problem::new(
            crate::problem::ProblemKind::NumericalFailure,
            "the log-likelihood at the starting values is not finite",
        ));
    }
    obj.eval(&x0, true).map_err(fatal)?;
    let ended = search::search(
        &obj,
        &maps,
        &u0,
        start.ll,
        settings.tolerance,
        settings.starts,
    )?;
    let (best_ll, best_x) = obj.best().unwrap_or((start.ll, x0.clone()));
    let best_u: Vec<f64> = maps.iter().zip(&best_x).map(|(m, &x)| m.u(x)).collect();
    let h = stats::curvature(&obj, &maps, &best_u, -best_ll).map_err(fatal)?;
    let errs = stats::errors(&h, &maps, &best_u);
    let before = obj.run(&x0, true, true)?;
    let after = obj.run(&best_x, true, true)?;
    let mut fitted = obj
        .substituted(obj.head(), &best_x, true)
        .ok_or_else(|| Problem::field("/free", "a fitted value is not a finite number"))?;
    drop_absent(&mut fitted);

    let mut free_out = JsonMap::new();
    for (i, f) in frees.iter().enumerate() {
        let mut o = JsonMap::new();
        o.insert("value".into(), num(best_x[i]));
        o.insert("start".into(), num(f.start));
        match errs.spread[i] {
            Some(s) => {
                o.insert("std_error".into(), num(s.std_error));
                o.insert("lower_95".into(), num(s.lower));
                o.insert("upper_95".into(), num(s.upper));
            }
            None => {
                for k in ["std_error", "lower_95", "upper_95"] {
                    o.insert(k.into(), Value::Null);
                }
            }
        }
        free_out.insert(f.pointer.clone(), Value::Object(o));
    }
    let k = frees.len() as f64;
    let n = after.readings.max(1) as f64;
    let mut warnings = Vec::new();
    if !errs.flat.is_empty() {
        let names: Vec<&str> = errs
            .flat
            .iter()
            .map(|&i| frees[i].pointer.as_str())
            .collect();
        warnings.push(json!({
            "kind": "not_identifiable",
            "quantities": names,
            "detail": format!("the readings cannot tell {} apart: the log-likelihood is flat or nearly so along a combination of them, so only that combination is determined and their standard errors are left out; fix all but one of them from outside knowledge, or add readings that separate them", names.join(", ")),
        }));
    }
    let correlation: Vec<Vec<Value>> = errs
        .correlation
        .iter()
        .map(|row| row.iter().map(|c| c.map_or(Value::Null, num)).collect())
        .collect();
    let answer = json!({
        "free": free_out,
        "log_likelihood": {"start": num(start.ll), "best": num(best_ll)},
        "aic": num(2.0 * k - 2.0 * best_ll),
        "bic": num(k * n.ln() - 2.0 * best_ll),
        "readings": after.readings,
        "runs": obj.runs(),
        "converged": ended.converged,
        "detail": ended.detail,
        "correlation": correlation,
        "warnings": warnings,
        "request": Value::Null,
        "summary_before": summary_value(&before.summary),
        "summary_after": summary_value(&after.summary),
    });
    let body = answer_bytes(&answer, &fitted, measurements, limits, stop)?;
    Ok(Done {
        body,
        stats: RunStats {
            filter: "",
            steps: obj.runs(),
            updates: 0,
            rejected: 0,
        },
    })
}

/// The answer's bytes: `answer` with `request` written as the fitted request `head` with
/// the measurements put back in their place.
fn answer_bytes(
    answer: &Value,
    head: &Value,
    measurements: Option<&RawValue>,
    limits: &Limits,
    stop: &RequestStop,
) -> Result<Vec<u8>, Problem> {
    let (Value::Object(answer), Value::Object(head)) = (answer, head) else {
        return Err(Problem::field("", "the answer is an object"));
    };
    let lines = measurement_list(&readings_only(measurements), limits)?;
    let echo = parts::Spliced {
        map: head,
        key: "measurements",
        value: parts::Echoed {
            lines: &lines,
            stop,
        },
    };
    let whole = parts::Spliced {
        map: answer,
        key: "request",
        value: echo,
    };
    serde_json::to_vec(&whole).map_err(|e| match stop.halted() {
        Some(Halt::Cancelled) => cancelled(),
        Some(Halt::Deadline) => Problem::new(
            crate::problem::ProblemKind::DeadlineExceeded,
            "the request needed more than the compute deadline (counted from its \
             arrival); it stopped while writing the answer",
        ),
        None => Problem::field("", e.to_string()),
    })
}

/// Remove the `null` members of every object (an optional field given as `null` counts as
/// absent): the echoed request must read as the schema's `EstimateRequest`, whose optional
/// fields are not nullable. Each reading line loses its own `null` members (`noise_std`,
/// `inputs`) but keeps its `values` and `inputs` maps as sent.
fn drop_absent(v: &mut Value) {
    if let Value::Object(o) = v {
        o.retain(|_, x| !x.is_null());
        for (k, x) in o.iter_mut() {
            if k == "measurements" {
                for line in x.as_array_mut().into_iter().flatten() {
                    if let Value::Object(l) = line {
                        l.retain(|_, y| !y.is_null());
                    }
                }
            } else {
                drop_absent(x);
            }
        }
    }
}

/// A stop outside the search: the budget does not apply there, so it is fatal.
fn fatal(s: Stop) -> Problem {
    match s {
        Stop::Fatal(p) => p,
        Stop::Budget => Problem::new(
            crate::problem::ProblemKind::Internal,
            "the run budget stopped a run outside the search",
        ),
    }
}
