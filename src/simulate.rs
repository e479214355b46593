//! Truth trajectories and noisy readings from a model, seeded, for integration tests and
//! demos. Readings come out in exactly the form the estimate endpoint accepts.
//!
//! The truth starts from a draw of the prior and moves like one ensemble member: the
//! deterministic flow over each gap plus a draw of the interval's process noise
//! N(0, Q(Δ)). Each sensor reads h(x) + L_R ε on its own schedule (`every` k-th time), with
//! optional dropout and gross outliers (`scale` times the noise) for exercising the gate.

use crate::config::Limits;
use crate::filter::predict::Predictor;
use crate::job::write::num;
use crate::job::{Done, RunStats};
use crate::linalg::cholesky_psd;
use crate::problem::{Problem, ProblemKind};
use crate::spec::model::{Integration, Model};
use crate::spec::reader::{array, index, number, positive, whole, Errors, Obj};
use crate::spec::request;
use crate::spec::time::{Instant, TimeMode};
use crate::spec::validate;
use nalgebra::DMatrix;
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha20Rng;
use rand_distr::StandardNormal;
use serde_json::Value;
use std::sync::atomic::{AtomicBool, Ordering};

/// How one sensor is sampled.
#[derive(Debug, Clone, Copy)]
struct Schedule {
    every: u64,
    dropout: f64,
    outlier_probability: f64,
    outlier_scale: f64,
}

impl Default for Schedule {
    fn default() -> Self {
        Self {
            every: 1,
            dropout: 0.0,
            outlier_probability: 0.0,
            outlier_scale: 20.0,
        }
    }
}

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
    let Some(obj) = Obj::new(&v, "/readings", errs) else {
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
                if let Some(t) = validate::time_value(x, &index(ptr, i), mode, errs) {
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
                .and_then(|s| validate::time_value(s, &o.at("start"), mode, errs));
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
                    TimeMode::Stamp => Instant::from_nanos(start_ns + k * step_ns),
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
            .and_then(|t| validate::time_value(t, &o.at("t"), mode, errs));
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
pub fn run(body: &[u8], limits: &Limits, cancel: &AtomicBool) -> Result<Done, Problem> {
    let env = request::envelope(body)?;
    let [model_v, prior_v, times_v] = request::sections([
        (env.model, "model"),
        (env.prior, "prior"),
        (env.times, "times"),
    ])?;
    let model = validate::model(&model_v, "/model", limits).map_err(Problem::invalid)?;
    let prior = validate::prior(&prior_v, "/prior", &model, None).map_err(Problem::invalid)?;
    let mut errs = Errors::default();
    let mut mode = Some(prior.mode);
    let times = times(&times_v, &mut mode, limits, &mut errs);
    let inputs = input_schedule(
        request::optional_section(env.inputs)?,
        &model,
        &mut mode,
        &mut errs,
    );
    let seed = match request::optional_section(env.seed)? {
        Some(s) => whole(&s, "/seed", &mut errs).unwrap_or(0),
        None => 0,
    };
    let sched = schedules(request::optional_section(env.readings)?, &model, &mut errs);
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
    let (n, nu) = (model.n(), model.nu());
    let mut rng = ChaCha20Rng::seed_from_u64(seed);
    let mut l = vec![0.0; n * n];
    cholesky_psd(prior.cov.as_slice(), &mut l, n).map_err(|_| {
        Problem::field(
            "/prior",
            "the prior covariance is not positive semi-definite",
        )
    })?;
    let mut x = DMatrix::zeros(1, n);
    let z: Vec<f64> = (0..n).map(|_| rng.sample(StandardNormal)).collect();
    for i in 0..n {
        x[(0, i)] = prior.mean[i] + (0..=i).map(|k| l[i + k * n] * z[k]).sum::<f64>();
    }
    let integration = Integration {
        max_step: f64::INFINITY,
        rtol: 1e-9,
        atol: 1e-12,
        fixed_step: None,
    };
    let mut pred = Predictor::new(&model, integration, 1);
    let mut q = DMatrix::zeros(n, n);
    let mut u = prior.inputs.clone();
    let mut t = prior.t;
    let mut next_input = 0;
    let writer = crate::job::write::Writer::new(&model, mode, Default::default());
    let mut truth = Vec::with_capacity(times.len() * 32 * (n + 1));
    let mut meas = Vec::with_capacity(times.len() * 48);
    let mut vars = vec![0.0; model.slot_count()];
    let mut ws: Vec<_> = model
        .sensors
        .iter()
        .map(|s| s.program.workspace())
        .collect();
    let mut zbuf = vec![0.0; model.sensors.iter().map(|s| s.dim).max().unwrap_or(1)];
    let mut lr = vec![0.0; zbuf.len() * zbuf.len()];
    for (k, tk) in times.iter().enumerate() {
        if k % 256 == 0 && cancel.load(Ordering::Relaxed) {
            return Err(Problem::new(
                ProblemKind::DeadlineExceeded,
                "the request was cancelled",
            ));
        }
        let dt = t.until(tk, mode);
        if dt > 0.0 {
            let noisy = pred
                .predict_points(&model, &mut x, &[1.0], u.as_slice(), t.secs, dt, &mut q)
                .map_err(|e| {
                    Problem::new(
                        ProblemKind::NumericalFailure,
                        format!("simulation stopped at time index {k}: {e}"),
                    )
                })?;
            if noisy {
                cholesky_psd(q.as_slice(), &mut l, n).map_err(|_| {
                    Problem::new(
                        ProblemKind::NumericalFailure,
                        "process noise covariance is not PSD",
                    )
                })?;
                let z: Vec<f64> = (0..n).map(|_| rng.sample(StandardNormal)).collect();
                for i in 0..n {
                    x[(0, i)] += (0..=i).map(|c| l[i + c * n] * z[c]).sum::<f64>();
                }
            }
        }
        t = *tk;
        // Input changes due by now take effect at this time (and are written on this line).
        let mut changed: Vec<(usize, f64)> = Vec::new();
        while next_input < inputs.len() && !inputs[next_input].0.is_after(tk, mode) {
            for &(i, v) in &inputs[next_input].1 {
                u[i] = v;
                changed.retain(|c| c.0 != i);
                changed.push((i, v));
            }
            next_input += 1;
        }
        if k > 0 {
            truth.push(b',');
            meas.push(b',');
        }
        truth.extend_from_slice(b"{\"t\":");
        writer.time(&mut truth, tk);
        truth.extend_from_slice(b",\"state\":{");
        for i in 0..n {
            if i > 0 {
                truth.push(b',');
            }
            truth.extend_from_slice(&serde_json::to_vec(&model.states[i]).unwrap_or_default());
            truth.push(b':');
            num(&mut truth, x[(0, i)]);
        }
        truth.extend_from_slice(b"}}");
        meas.extend_from_slice(b"{\"t\":");
        writer.time(&mut meas, tk);
        meas.extend_from_slice(b",\"values\":{");
        vars[..n].copy_from_slice(x.row(0).transpose().as_slice());
        vars[n..n + nu].copy_from_slice(u.as_slice());
        vars[n + nu] = tk.secs;
        let mut first = true;
        for (si, s) in model.sensors.iter().enumerate() {
            let sc = sched[si];
            if k as u64 % sc.every != 0 {
                continue;
            }
            // Draw every random number whatever the branch, so one sensor's settings do not
            // shift another's noise.
            let drop = rng.gen::<f64>() < sc.dropout;
            let outlier = rng.gen::<f64>() < sc.outlier_probability;
            let eps: Vec<f64> = (0..s.dim).map(|_| rng.sample(StandardNormal)).collect();
            if drop {
                continue;
            }
            let slots = s.program.slots();
            s.program
                .eval(&vars[..slots], &mut ws[si], &mut zbuf[..s.dim]);
            cholesky_psd(s.r.as_slice(), &mut lr[..s.dim * s.dim], s.dim)
                .map_err(|_| Problem::new(ProblemKind::Internal, "sensor noise not PSD"))?;
            let mult = if outlier { sc.outlier_scale } else { 1.0 };
            if !first {
                meas.push(b',');
            }
            first = false;
            meas.extend_from_slice(&serde_json::to_vec(&s.name).unwrap_or_default());
            meas.push(b':');
            if s.dim > 1 {
                meas.push(b'[');
            }
            for a in 0..s.dim {
                if a > 0 {
                    meas.push(b',');
                }
                let noise: f64 = (0..=a).map(|b| lr[a + b * s.dim] * eps[b]).sum();
                let v = zbuf[a] + mult * noise;
                if !v.is_finite() {
                    return Err(Problem::new(
                        ProblemKind::NumericalFailure,
                        format!(
                            "sensor '{}' gave a non-finite reading at time index {k}",
                            s.name
                        ),
                    ));
                }
                num(&mut meas, v);
            }
            if s.dim > 1 {
                meas.push(b']');
            }
        }
        meas.push(b'}');
        if !changed.is_empty() {
            meas.extend_from_slice(b",\"inputs\":{");
            for (j, (i, v)) in changed.iter().enumerate() {
                if j > 0 {
                    meas.push(b',');
                }
                meas.extend_from_slice(&serde_json::to_vec(&model.inputs[*i]).unwrap_or_default());
                meas.push(b':');
                num(&mut meas, *v);
            }
            meas.push(b'}');
        }
        meas.push(b'}');
    }
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
            method: "",
            steps: times.len() as u64,
            updates: 0,
            rejected: 0,
        },
    })
}
