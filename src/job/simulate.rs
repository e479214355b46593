//! `POST /v1/simulate`: parse `{model, prior, times, inputs?, sampling?, seed?}`, run
//! [`crate::simulate`] and write its truth and readings as JSON, the readings in exactly
//! the form the estimate endpoint accepts.
//!
//! `inputs` is a schedule of changes with their own times; every fault in it is refused
//! with a pointer to the entry's field. The answer has one line per sampling time plus one
//! per input change between sampling times (its measurement line carries only the change,
//! so estimate switches the inputs when the truth did), and each truth line marks the
//! readings made outliers (`injected`) and left out (`dropped`): the marks stay off the
//! measurement lines, which estimate refuses unknown fields on.

use super::budget;
use crate::config::Limits;
use crate::job::write::{num, Writer};
use crate::job::{Pieces, RunStats};
use crate::model::{Dynamics, LinearTime, Model, Prior};
use crate::model::{Halt, Instant, Stop, TimeMode, Zone};
use crate::problem::{Problem, ProblemKind};
use crate::request::envelope;
use crate::request::reader::{
    self, array, index, names_list, number, positive, whole, Errors, Obj,
};
use crate::request::validate;
use crate::simulate::{self, Plan, Sample, Schedule, SimulateError, Sink};
use serde_json::Value;

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
            // Every grid time must fit in i128 nanoseconds (2^127 ns, about 5e21 years):
            // a float past it would saturate and the sum overflow. The grid rises, so its
            // first and last times bound the rest.
            let fits = |x: f64| x.abs() < i128::MAX as f64;
            let last = i128::from(count.saturating_sub(1))
                .checked_mul(step_ns)
                .and_then(|d| d.checked_add(start_ns));
            let seconds = matches!(mode.unwrap_or(TimeMode::Seconds), TimeMode::Seconds);
            if seconds && !fits(start.secs * 1e9) {
                errs.push(&o.at("start"), PAST_RANGE);
                return Vec::new();
            }
            if last.is_none() || !fits(step * 1e9) {
                errs.push(&o.at("step"), PAST_RANGE);
                return Vec::new();
            }
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

/// Why a grid is refused whose times do not fit in i128 nanoseconds.
const PAST_RANGE: &str =
    "the grid's times run past the range of times (2^127 ns, about 5e21 years)";

/// A time as messages show it: seconds, or the RFC 3339 form.
fn show(t: &Instant, mode: TimeMode) -> String {
    match mode {
        TimeMode::Seconds => t.secs.to_string(),
        TimeMode::Stamp => t.to_rfc3339(),
    }
}

/// The input schedule `[{"t", "inputs": {name: value}}]`: each entry is a change that acts
/// from its own time and holds until the next (zero-order hold). Times strictly increase
/// (inputs that change together share one entry) and none comes before the prior, whose
/// `inputs` hold until the first change; every problem names its field.
fn input_schedule(
    v: Option<Value>,
    model: &Model,
    prior: &Prior,
    mode: &mut Option<TimeMode>,
    zone: &Zone,
    errs: &mut Errors,
) -> Vec<(Instant, Vec<(usize, f64)>)> {
    let Some(v) = v else { return Vec::new() };
    let Some(items) = array(&v, "/inputs", errs) else {
        return Vec::new();
    };
    let m = prior.mode;
    let mut out: Vec<(Instant, Vec<(usize, f64)>)> = Vec::with_capacity(items.len());
    for (i, it) in items.iter().enumerate() {
        let p = index("/inputs", i);
        let Some(o) = Obj::new(it, &p, errs) else {
            continue;
        };
        o.deny_unknown(&["t", "inputs"], errs);
        let t = o
            .required("t", errs)
            .and_then(|t| validate::time_value(t, &o.at("t"), mode, zone, errs));
        if let Some(t) = &t {
            if prior.t.is_after(t, m) {
                errs.push(
                    &o.at("t"),
                    format!(
                        "an input change at {} comes before the prior's time {}; the prior's \
                         'inputs' hold the values in force at the start",
                        show(t, m),
                        show(&prior.t, m)
                    ),
                );
            } else if let Some((last, _)) = out.last().filter(|(last, _)| !t.is_after(last, m)) {
                errs.push(
                    &o.at("t"),
                    format!(
                        "input change times must increase: {} is not after {} (the entry \
                         before); inputs that change together go in one entry",
                        show(t, m),
                        show(last, m)
                    ),
                );
            } else if let Some(dt) = grid_step(model) {
                let k = prior.t.until(t, m) / dt;
                if (k - k.round()).abs() > 1e-6 {
                    errs.push(
                        &o.at("t"),
                        format!(
                            "{} is not on the model's grid prior.t + k·{dt}: a discrete \
                             model holds its inputs over whole steps",
                            show(t, m)
                        ),
                    );
                }
            }
        }
        let mut vals = Vec::new();
        if let Some(vo) = o
            .required("inputs", errs)
            .and_then(|x| Obj::new(x, &o.at("inputs"), errs))
        {
            for (k, x) in vo.map {
                let Some(ix) = model.input_index(k) else {
                    errs.push(
                        &vo.at(k),
                        format!(
                            "unknown input '{k}'; inputs are {}",
                            names_list(&model.inputs)
                        ),
                    );
                    continue;
                };
                if let Some(x) = number(x, &vo.at(k), errs) {
                    vals.push((ix, x));
                }
            }
        }
        if let Some(t) = t {
            out.push((t, vals));
        }
    }
    out
}

/// Refuse, before simulating, a gap between two times (or from the prior's time to the
/// first) that would need more grid steps of a discrete model than `max_gap_steps`.
fn refuse_long_gaps(
    model: &Model,
    prior: &Prior,
    times: &[Instant],
    limits: &Limits,
) -> Result<(), Problem> {
    let Some(dt) = grid_step(model) else {
        return Ok(());
    };
    let mut from = prior.t;
    for (i, t) in times.iter().enumerate() {
        let gap = from.until(t, prior.mode);
        let steps = crate::linalg::round_half_away(gap / dt);
        if steps > limits.max_gap_steps as f64 {
            return Err(Problem::field(
                format!("/times/{i}"),
                format!("the gap of {gap} s up to this time would need {steps} steps of the model's dt, more than this server's limit of {} steps in one gap (max_gap_steps in /v1/info)", limits.max_gap_steps),
            ));
        }
        from = *t;
    }
    Ok(())
}

/// The step of a discrete linear model, whose inputs can only change on its grid.
fn grid_step(model: &Model) -> Option<f64> {
    match &model.dynamics {
        Dynamics::Linear {
            time: LinearTime::Discrete { dt },
            ..
        } => Some(*dt),
        _ => None,
    }
}

/// `POST /v1/simulate`, the answer in pieces.
pub(super) fn simulate(body: &[u8], limits: &Limits, stop: &Stop) -> Result<Pieces, Problem> {
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
    let inputs_v = env
        .inputs
        .map(|r| reader::parse_section(r.get(), "/inputs"))
        .transpose()
        .map_err(|e| Problem::invalid(vec![e]))?;
    let inputs = input_schedule(inputs_v, &model, &prior, &mut mode, &zone, &mut errs);
    let seed = match envelope::optional_section(env.seed, "seed")? {
        Some(s) => whole(&s, "/seed", &mut errs).unwrap_or(0),
        None => 0,
    };
    let sched = schedules(
        envelope::optional_section(env.sampling, "sampling")?,
        &model,
        &mut errs,
    );
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
    refuse_long_gaps(&model, &prior, &times, limits)?;
    budget::within(
        budget::simulate_bytes(&model, times.len(), inputs.len(), body.len()),
        limits,
    )?;
    let mut out = Json {
        model: &model,
        writer: Writer::new(&model, mode, Default::default()),
        // Grown as lines are made: nothing is reserved for times not yet simulated.
        truth: Vec::new(),
        meas: Vec::new(),
        lines: 0,
    };
    let plan = Plan {
        model: &model,
        prior: &prior,
        times: &times,
        inputs: &inputs,
        schedules: &sched,
        seed,
    };
    simulate::run(&plan, stop, &mut out).map_err(|e| problem(e, mode))?;
    let Json {
        writer,
        truth,
        meas,
        lines,
        ..
    } = out;
    // The two lists go out as they are, between the pieces around them: no copy.
    let mut head = Vec::with_capacity(128);
    head.push(b'{');
    writer.states(&mut head);
    head.extend_from_slice(b",\"seed\":");
    head.extend_from_slice(itoa::Buffer::new().format(seed).as_bytes());
    head.extend_from_slice(b",\"truth\":[");
    Ok(Pieces {
        parts: vec![
            head,
            truth,
            b"],\"measurements\":[".to_vec(),
            meas,
            b"]}".to_vec(),
        ],
        stats: RunStats {
            filter: "",
            steps: lines,
            updates: 0,
            rejected: 0,
        },
    })
}

/// The truth and measurement lists of the answer, written as the samples arrive: line i
/// of one is line i of the other, at the same time.
struct Json<'a> {
    model: &'a Model,
    writer: Writer,
    truth: Vec<u8>,
    meas: Vec<u8>,
    /// Lines written so far.
    lines: u64,
}

/// `"name"` as a JSON string.
fn quoted(buf: &mut Vec<u8>, name: &str) {
    buf.extend_from_slice(&serde_json::to_vec(name).unwrap_or_default());
}

impl Sink for Json<'_> {
    fn sample(&mut self, s: &Sample<'_>) {
        let Self {
            model,
            writer,
            truth,
            meas,
            lines,
        } = self;
        if *lines > 0 {
            truth.push(b',');
            meas.push(b',');
        }
        *lines += 1;
        truth.extend_from_slice(b"{\"t\":");
        writer.time(truth, s.t);
        truth.extend_from_slice(b",\"state\":{");
        for (i, x) in s.state.iter().enumerate() {
            if i > 0 {
                truth.push(b',');
            }
            quoted(truth, &model.states[i]);
            truth.push(b':');
            num(truth, *x);
        }
        truth.push(b'}');
        // The marks live on the truth line, not the measurement line, so the measurements
        // stay exactly what estimate accepts.
        if !s.outliers.is_empty() {
            truth.extend_from_slice(b",\"injected\":");
            sensor_names(truth, model, s.outliers, b"{}", b":\"outlier\"");
        }
        if !s.dropped.is_empty() {
            truth.extend_from_slice(b",\"dropped\":");
            sensor_names(truth, model, s.dropped, b"[]", b"");
        }
        truth.push(b'}');
        meas.extend_from_slice(b"{\"t\":");
        writer.time(meas, s.t);
        // A sampling time always carries `values` (empty when every reading was dropped or
        // none was due); an input change between sampling times carries only its inputs.
        if s.index.is_some() {
            meas.extend_from_slice(b",\"values\":{");
            for (j, (si, values)) in s.readings.iter().enumerate() {
                if j > 0 {
                    meas.push(b',');
                }
                quoted(meas, &model.sensors[*si].name);
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
        }
        if !s.changed.is_empty() {
            meas.extend_from_slice(b",\"inputs\":{");
            for (j, (i, v)) in s.changed.iter().enumerate() {
                if j > 0 {
                    meas.push(b',');
                }
                quoted(meas, &model.inputs[*i]);
                meas.push(b':');
                num(meas, *v);
            }
            meas.push(b'}');
        }
        meas.push(b'}');
    }
}

/// The problem each way of stopping is answered with.
fn problem(e: SimulateError, mode: TimeMode) -> Problem {
    match e {
        SimulateError::Stopped(Halt::Cancelled) => super::setup::cancelled(),
        SimulateError::Stopped(_) => Problem::new(
            ProblemKind::DeadlineExceeded,
            "the request needed more than the compute deadline (counted from its arrival)",
        ),
        SimulateError::PriorNotPsd => Problem::field(
            "/prior",
            "the prior covariance is not positive semi-definite",
        ),
        SimulateError::Propagation { at, reason } => Problem::new(
            ProblemKind::NumericalFailure,
            format!(
                "simulation stopped moving the truth to {}: {reason}",
                show(&at, mode)
            ),
        ),
        SimulateError::ProcessNoiseNotPsd => Problem::new(
            ProblemKind::NumericalFailure,
            "process noise covariance is not PSD",
        ),
        SimulateError::SensorNoiseNotPsd => {
            Problem::new(ProblemKind::Internal, "sensor noise not PSD")
        }
        SimulateError::NonFiniteReading { sensor, at } => Problem::new(
            ProblemKind::NumericalFailure,
            format!(
                "sensor '{sensor}' gave a non-finite reading at {}",
                show(&at, mode)
            ),
        ),
    }
}

/// The names of `sensors` between `brackets` (`{}` or `[]`), each followed by `after`
/// (`:"outlier"` for an object of marks, nothing for a list).
fn sensor_names(
    buf: &mut Vec<u8>,
    model: &Model,
    sensors: &[usize],
    brackets: &[u8; 2],
    after: &[u8],
) {
    buf.push(brackets[0]);
    for (j, si) in sensors.iter().enumerate() {
        if j > 0 {
            buf.push(b',');
        }
        quoted(buf, &model.sensors[*si].name);
        buf.extend_from_slice(after);
    }
    buf.push(brackets[1]);
}
