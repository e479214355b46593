//! `POST /v1/simulate`: parse `{model, prior, times, inputs?, sampling?, seed?}`, run
//! [`crate::simulate`] and write its truth and readings as JSON, the readings in exactly
//! the form the estimate endpoint accepts.

use crate::config::Limits;
use crate::job::write::{num, Writer};
use crate::job::{Done, RunStats};
use crate::model::Model;
use crate::model::{Instant, TimeMode, Zone};
use crate::problem::{Problem, ProblemKind};
use crate::request::envelope;
use crate::request::reader::{array, index, number, positive, whole, Errors, Obj};
use crate::request::validate;
use crate::simulate::{self, Plan, Sample, Schedule, SimulateError, Sink};
use serde_json::Value;
use std::sync::atomic::AtomicBool;

fn probability(v: &Value, ptr: &str, errs: &mut Errors) -> Option<f64> {
    let p = number(v, ptr, errs)?;
    if (0.0..=1.0).contains(&p) {
        Some(p)
    } else {
        errs.push(ptr, format!("a probability lies in [0, 1], got {p}"));
        None
    }
}

fn schedules(v: Option<Value>, model: &Model, errs: &mut Errors) -> Vec<Schedule> {
    let mut out = vec![Schedule::default(); model.sensors.len()];
    let Some(v) = v else { return out };
    let Some(obj) = Obj::new(&v, "/sampling", errs) else {
        return out;
    };
    for (name, sv) in obj.map {
        let p = obj.at(name);
        let Some(si) = model.sensor_index(name) else {
            errs.push(&p, format!("unknown sensor '{name}'"));
            continue;
        };
        let Some(so) = Obj::new(sv, &p, errs) else {
            continue;
        };
        so.deny_unknown(&["every", "dropout", "outliers"], errs);
        if let Some(e) = so.get("every") {
            match whole(e, &so.at("every"), errs) {
                Some(0) => errs.push(&so.at("every"), "every must be at least 1"),
                Some(k) => out[si].every = k,
                None => {}
            }
        }
        if let Some(d) = so.get("dropout") {
            out[si].dropout = probability(d, &so.at("dropout"), errs).unwrap_or(0.0);
        }
        if let Some(o) = so.object("outliers", errs) {
            o.deny_unknown(&["probability", "scale"], errs);
            if let Some(pv) = o.get("probability") {
                out[si].outlier_probability =
                    probability(pv, &o.at("probability"), errs).unwrap_or(0.0);
            }
            if let Some(sc) = o.get("scale") {
                out[si].outlier_scale = positive(sc, &o.at("scale"), "scale", errs).unwrap_or(20.0);
            }
        }
    }
    out
}

fn times(
    v: &Value,
    mode: &mut Option<TimeMode>,
    zone: &Zone,
    limits: &Limits,
    errs: &mut Errors,
) -> Vec<Instant> {
    let ptr = "/times";
    match v {
        Value::Array(items) => {
            if items.len() > limits.max_sim_times {
                errs.push(
                    ptr,
                    format!(
                        "{} times exceed the limit of {}",
                        items.len(),
                        limits.max_sim_times
                    ),
                );
                return Vec::new();
            }
            let mut out: Vec<Instant> = Vec::with_capacity(items.len());
            for (i, x) in items.iter().enumerate() {
                if let Some(t) = validate::time_value(x, &index(ptr, i), mode, zone, errs) {
                    if out
                        .last()
                        .is_some_and(|p| p.is_after(&t, mode.unwrap_or(TimeMode::Seconds)))
                    {
                        errs.push(&index(ptr, i), "times must not decrease");
                    }
                    out.push(t);
                }
            }
            out
        }
        Value::Object(_) => {
            let Some(o) = Obj::new(v, ptr, errs) else {
                return Vec::new();
            };
            o.deny_unknown(&["start", "step", "count"], errs);
            let start = o
                .required("start", errs)
                .and_then(|s| validate::time_value(s, &o.at("start"), mode, zone, errs));
            let step = o
                .required("step", errs)
                .and_then(|s| positive(s, &o.at("step"), "step", errs));
            let count = o
                .required("count", errs)
                .and_then(|c| whole(c, &o.at("count"), errs));
            let (Some(start), Some(step), Some(count)) = (start, step, count) else {
                return Vec::new();
            };
            if count as usize > limits.max_sim_times {
                errs.push(
                    &o.at("count"),
                    format!("{count} times exceed the limit of {}", limits.max_sim_times),
                );
                return Vec::new();
            }
            // Grid times are counted in whole nanoseconds so 0.1 + 2·0.1 is 0.3, not
            // 0.30000000000000004.
            let step_ns = (step * 1e9).round() as i128;
            let start_ns = match mode.unwrap_or(TimeMode::Seconds) {
                TimeMode::Seconds => (start.secs * 1e9).round() as i128,
                TimeMode::Stamp => start.nanos,
            };
            (0..count as i128)
                .map(|k| match mode.unwrap_or(TimeMode::Seconds) {
                    TimeMode::Seconds => Instant::seconds((start_ns + k * step_ns) as f64 / 1e9),
                    // Each grid time is written like the start (its offset, or the
                    // zone's offset at that instant for a wall-clock start).
                    TimeMode::Stamp => start.written_like(start_ns + k * step_ns, zone),
                })
                .collect()
        }
        _ => {
            errs.push(ptr, "times is a list of times or {start, step, count}");
            Vec::new()
        }
    }
}

/// Input change points `[{"t", "inputs": {...}}]`, each as in a measurement line.
fn input_schedule(
    v: Option<Value>,
    model: &Model,
    mode: &mut Option<TimeMode>,
    zone: &Zone,
    errs: &mut Errors,
) -> Vec<(Instant, Vec<(usize, f64)>)> {
    let Some(v) = v else { return Vec::new() };
    let Some(items) = array(&v, "/inputs", errs) else {
        return Vec::new();
    };
    let mut out = Vec::with_capacity(items.len());
    for (i, it) in items.iter().enumerate() {
        let p = index("/inputs", i);
        let Some(o) = Obj::new(it, &p, errs) else {
            continue;
        };
        o.deny_unknown(&["t", "inputs"], errs);
        let t = o
            .required("t", errs)
            .and_then(|t| validate::time_value(t, &o.at("t"), mode, zone, errs));
        let mut vals = Vec::new();
        if let Some(vo) = o
            .required("inputs", errs)
            .and_then(|x| Obj::new(x, &o.at("inputs"), errs))
        {
            for (k, x) in vo.map {
                match model.input_index(k) {
                    Some(ix) => {
                        if let Some(x) = number(x, &vo.at(k), errs) {
                            vals.push((ix, x));
                        }
                    }
                    None => errs.push(&vo.at(k), format!("unknown input '{k}'")),
                }
            }
        }
        if let Some(t) = t {
            out.push((t, vals));
        }
    }
    out
}

/// `POST /v1/simulate`.
pub(super) fn simulate(body: &[u8], limits: &Limits, cancel: &AtomicBool) -> Result<Done, Problem> {
    let env = envelope::envelope(body)?;
    if env.readings.is_some() {
        return Err(Problem::field(
            "/readings",
            "the sampling schedule is now called 'sampling' (v2); 'readings' is no longer read",
        ));
    }
    let [model_v, prior_v, times_v] = envelope::sections([
        (env.model, "model"),
        (env.prior, "prior"),
        (env.times, "times"),
    ])?;
    let model = validate::model(&model_v, "/model", limits).map_err(Problem::invalid)?;
    let zone = envelope::time_zone(&env)?;
    let prior =
        validate::prior_in(&prior_v, "/prior", &model, None, &zone).map_err(Problem::invalid)?;
    let mut errs = Errors::default();
    let mut mode = Some(prior.mode);
    let times = times(&times_v, &mut mode, &zone, limits, &mut errs);
    let inputs = input_schedule(
        envelope::optional_section(env.inputs)?,
        &model,
        &mut mode,
        &zone,
        &mut errs,
    );
    let seed = match envelope::optional_section(env.seed)? {
        Some(s) => whole(&s, "/seed", &mut errs).unwrap_or(0),
        None => 0,
    };
    let sched = schedules(envelope::optional_section(env.sampling)?, &model, &mut errs);
    if !errs.is_empty() {
        return Err(Problem::invalid(errs.into_vec()));
    }
    let mode = prior.mode;
    if let Some(first) = times.first() {
        if prior.t.is_after(first, mode) {
            return Err(Problem::field(
                "/times/0",
                "simulated times must not come before the prior's time",
            ));
        }
    }
    let n = model.n();
    let mut out = Json {
        model: &model,
        writer: Writer::new(&model, mode, Default::default()),
        truth: Vec::with_capacity(times.len() * 32 * (n + 1)),
        meas: Vec::with_capacity(times.len() * 48),
    };
    let plan = Plan {
        model: &model,
        prior: &prior,
        times: &times,
        inputs: &inputs,
        schedules: &sched,
        seed,
    };
    simulate::run(&plan, cancel, &mut out).map_err(problem)?;
    let Json {
        writer,
        truth,
        meas,
        ..
    } = out;
    let mut buf = Vec::with_capacity(truth.len() + meas.len() + 128);
    buf.push(b'{');
    writer.states(&mut buf);
    buf.extend_from_slice(b",\"seed\":");
    buf.extend_from_slice(itoa::Buffer::new().format(seed).as_bytes());
    buf.extend_from_slice(b",\"truth\":[");
    buf.extend_from_slice(&truth);
    buf.extend_from_slice(b"],\"measurements\":[");
    buf.extend_from_slice(&meas);
    buf.extend_from_slice(b"]}");
    Ok(Done {
        body: buf,
        stats: RunStats {
            filter: "",
            steps: times.len() as u64,
            updates: 0,
            rejected: 0,
        },
    })
}

/// The truth and measurement lists of the answer, written as the samples arrive.
struct Json<'a> {
    model: &'a Model,
    writer: Writer,
    truth: Vec<u8>,
    meas: Vec<u8>,
}

impl Sink for Json<'_> {
    fn sample(&mut self, s: &Sample<'_>) {
        let Self {
            model,
            writer,
            truth,
            meas,
        } = self;
        if s.index > 0 {
            truth.push(b',');
            meas.push(b',');
        }
        truth.extend_from_slice(b"{\"t\":");
        writer.time(truth, s.t);
        truth.extend_from_slice(b",\"state\":{");
        for (i, x) in s.state.iter().enumerate() {
            if i > 0 {
                truth.push(b',');
            }
            truth.extend_from_slice(&serde_json::to_vec(&model.states[i]).unwrap_or_default());
            truth.push(b':');
            num(truth, *x);
        }
        truth.extend_from_slice(b"}}");
        meas.extend_from_slice(b"{\"t\":");
        writer.time(meas, s.t);
        meas.extend_from_slice(b",\"values\":{");
        for (j, (si, values)) in s.readings.iter().enumerate() {
            if j > 0 {
                meas.push(b',');
            }
            meas.extend_from_slice(
                &serde_json::to_vec(&model.sensors[*si].name).unwrap_or_default(),
            );
            meas.push(b':');
            let vector = values.len() > 1;
            if vector {
                meas.push(b'[');
            }
            for (a, v) in values.iter().enumerate() {
                if a > 0 {
                    meas.push(b',');
                }
                num(meas, *v);
            }
            if vector {
                meas.push(b']');
            }
        }
        meas.push(b'}');
        if !s.changed.is_empty() {
            meas.extend_from_slice(b",\"inputs\":{");
            for (j, (i, v)) in s.changed.iter().enumerate() {
                if j > 0 {
                    meas.push(b',');
                }
                meas.extend_from_slice(&serde_json::to_vec(&model.inputs[*i]).unwrap_or_default());
                meas.push(b':');
                num(meas, *v);
            }
            meas.push(b'}');
        }
        meas.push(b'}');
    }
}

/// The problem each way of stopping is answered with.
fn problem(e: SimulateError) -> Problem {
    match e {
        SimulateError::Cancelled => {
            Problem::new(ProblemKind::DeadlineExceeded, "the request was cancelled")
        }
        SimulateError::PriorNotPsd => Problem::field(
            "/prior",
            "the prior covariance is not positive semi-definite",
        ),
        SimulateError::Propagation { index, reason } => Problem::new(
            ProblemKind::NumericalFailure,
            format!("simulation stopped at time index {index}: {reason}"),
        ),
        SimulateError::ProcessNoiseNotPsd => Problem::new(
            ProblemKind::NumericalFailure,
            "process noise covariance is not PSD",
        ),
        SimulateError::SensorNoiseNotPsd => {
            Problem::new(ProblemKind::Internal, "sensor noise not PSD")
        }
        SimulateError::NonFiniteReading { sensor, index } => Problem::new(
            ProblemKind::NumericalFailure,
            format!("sensor '{sensor}' gave a non-finite reading at time index {index}"),
        ),
    }
}
