//! A family model run with the localised ensemble transform (issue 13;
//! `filter.ensemble.update: "local"`): the request's sections checked once, the members
//! drawn from the prior (or taken from a posterior's `members`), then per line one RK4
//! forecast over the gap (steps of `integration.fixed_step`, default
//! [`DEFAULT_STEP`]), the local analysis with the line's readings, and the line's answer:
//! per family the members' `mean` and `std` as arrays. No `n × n` covariance is ever
//! formed, so `output.covariance: "full"` is refused.
//!
//! The same [`LocalRun`] serves the batch (`/v1/estimate`) and the stream: `start` with
//! the sections, `push` per line, `finish` with the posterior (its `members`, so a chain
//! of requests, each starting from the last posterior, gives one request's bits: the
//! analysis draws nothing at random) and a summary.
//!
//! The family's process noise density is not applied here: the local transform keeps its
//! members' spread with multiplicative inflation (`ensemble.inflation`), the usual
//! practice for this filter (Hunt, Kostelich & Szunyogh 2007, §2.4).

use super::write::num;
use super::RunStats;
use crate::config::Limits;
use crate::dynamics::FamilyRates;
use crate::filter::enkf::{FamilyEnsemble, LocalReadings, LocalSettings};
use crate::model::{FamilyModel, Stop};
use crate::problem::{FieldError, Problem, ProblemKind};
use crate::request::{envelope, validate};
use rand::SeedableRng;
use rand_chacha::ChaCha20Rng;
use rand_distr::{Distribution, StandardNormal};
use serde_json::{Map, Value};

/// RK4 step of the forecast when `integration.fixed_step` is not given.
pub(super) const DEFAULT_STEP: f64 = 0.01;

/// Whether a request's `model` and `filter` sections ask for the local family run.
pub(super) fn wants_local(model: &Value, filter: &Value) -> bool {
    validate::has_families(model) && filter["ensemble"]["update"].as_str() == Some("local")
}

/// The settings read from `filter` and `output`.
struct Settings {
    members: usize,
    seed: u64,
    local: LocalSettings,
    step: f64,
    std: bool,
}

fn invalid(errs: Vec<FieldError>) -> Problem {
    Problem::invalid(errs)
}

fn field(p: &str, d: impl Into<String>) -> FieldError {
    FieldError::new(p, d)
}

/// Positive finite number at `ptr`, or a field error.
fn positive(v: &Value, ptr: &str, errs: &mut Vec<FieldError>) -> Option<f64> {
    match v.as_f64() {
        Some(x) if x.is_finite() && x > 0.0 => Some(x),
        _ => {
            errs.push(field(ptr, "expected a positive number"));
            None
        }
    }
}

/// `filter` (method `enkf`, `ensemble` with `update: "local"`, `radius`, `members`,
/// `seed`, `inflation`; `integration.fixed_step`) and `output.covariance`.
fn settings(filter: &Value, output: Option<&Value>, limits: &Limits) -> Result<Settings, Problem> {
    let mut errs = Vec::new();
    let f = filter.as_object().cloned().unwrap_or_default();
    for k in f.keys() {
        if !["method", "ensemble", "integration"].contains(&k.as_str()) {
            errs.push(field(&format!("/filter/{k}"), format!("unknown field '{k}'; the local ensemble update takes method, ensemble and integration")));
        }
    }
    if f.get("method").and_then(Value::as_str) != Some("enkf") {
        errs.push(field(
            "/filter/method",
            "the local update is an ensemble update: method \"enkf\"",
        ));
    }
    let e = f
        .get("ensemble")
        .and_then(Value::as_object)
        .cloned()
        .unwrap_or_default();
    for k in e.keys() {
        if !["members", "seed", "inflation", "update", "radius"].contains(&k.as_str()) {
            errs.push(field(&format!("/filter/ensemble/{k}"), format!("unknown field '{k}'; the local update takes members, seed, inflation, update and radius")));
        }
    }
    let members = match e.get("members").map(Value::as_u64) {
        None => 32,
        Some(Some(m)) if (2..=limits.max_members as u64).contains(&m) => m as usize,
        Some(_) => {
            errs.push(field(
                "/filter/ensemble/members",
                format!("expected a whole number from 2 to {}", limits.max_members),
            ));
            0
        }
    };
    let seed = match e.get("seed").map(Value::as_u64) {
        None => 0,
        Some(Some(s)) => s,
        Some(None) => {
            errs.push(field("/filter/ensemble/seed", "expected a whole number"));
            0
        }
    };
    let inflation = match e.get("inflation") {
        None => 1.0,
        Some(v) => match v.as_f64() {
            Some(x) if x.is_finite() && x >= 1.0 => x,
            _ => {
                errs.push(field(
                    "/filter/ensemble/inflation",
                    "expected a number of at least 1",
                ));
                1.0
            }
        },
    };
    let radius = e
        .get("radius")
        .and_then(|r| positive(r, "/filter/ensemble/radius", &mut errs));
    let i = f
        .get("integration")
        .and_then(Value::as_object)
        .cloned()
        .unwrap_or_default();
    for k in i.keys().filter(|k| *k != "fixed_step") {
        errs.push(field(
            &format!("/filter/integration/{k}"),
            "the local update's forecast takes fixed_step only (classical RK4)",
        ));
    }
    let step = i
        .get("fixed_step")
        .and_then(|s| positive(s, "/filter/integration/fixed_step", &mut errs))
        .unwrap_or(DEFAULT_STEP);
    let std = match output.and_then(|o| o.get("covariance")).map(Value::as_str) {
        None | Some(Some("std")) => true,
        Some(Some("none")) => false,
        Some(Some("full")) => {
            errs.push(field("/output/covariance", "a family model run with the local update has no full covariance (its n × n entries are never formed); ask for \"std\" or \"none\""));
            true
        }
        Some(_) => {
            errs.push(field(
                "/output/covariance",
                "expected \"std\" or \"none\" for a family model",
            ));
            true
        }
    };
    if let Some(o) = output.and_then(Value::as_object) {
        for k in o.keys().filter(|k| *k != "covariance") {
            errs.push(field(
                &format!("/output/{k}"),
                "a family model's answer takes output.covariance only",
            ));
        }
    }
    if !errs.is_empty() {
        return Err(invalid(errs));
    }
    Ok(Settings {
        members,
        seed,
        local: LocalSettings { radius, inflation },
        step,
        std,
    })
}

/// The starting members, `[j * n + s]`: a posterior's `members` (per family, one array
/// per member), or drawn as `mean + std · ξ` with `ξ` standard normal from the seeded
/// ChaCha20 stream of the ensemble's initial draw.
fn start_members(
    fm: &FamilyModel,
    prior: &Value,
    cfg: &Settings,
) -> Result<(f64, Vec<f64>), Problem> {
    let (n, nn) = (fm.n(), cfg.members);
    let mut errs = Vec::new();
    let t = match prior.get("t").and_then(Value::as_f64) {
        Some(t) if t.is_finite() => t,
        _ => {
            errs.push(field(
                "/prior/t",
                "expected the prior's time as a number of seconds",
            ));
            0.0
        }
    };
    let mut ens = vec![0.0; n * nn];
    if let Some(m) = prior.get("members") {
        for (f, shape) in fm.set.shapes.iter().enumerate() {
            let p = format!("/prior/members/{}", shape.name);
            let rows = m.get(&shape.name).and_then(Value::as_array);
            match rows {
                Some(rows) if rows.len() == nn => {
                    for (j, row) in rows.iter().enumerate() {
                        let row = row.as_array().filter(|r| r.len() == shape.size);
                        let Some(row) = row else {
                            errs.push(field(&format!("{p}/{j}"), format!("expected {} numbers", shape.size)));
                            continue;
                        };
                        for (e, x) in row.iter().enumerate() {
                            match x.as_f64() {
                                Some(x) if x.is_finite() => ens[j * n + fm.set.starts[f] + e] = x,
                                _ => errs.push(field(&format!("{p}/{j}/{e}"), "expected a finite number")),
                            }
                        }
                    }
                }
                _ => errs.push(field(&p, format!("expected {nn} members (filter.ensemble.members), each an array of {} numbers", shape.size))),
            }
        }
    } else {
        let mut mean = vec![0.0; n];
        let mut std = vec![0.0; n];
        for (part, out) in [("mean", &mut mean), ("std", &mut std)] {
            for (f, shape) in fm.set.shapes.iter().enumerate() {
                let p = format!("/prior/{part}/{}", shape.name);
                let at = &mut out[fm.set.starts[f]..fm.set.starts[f] + shape.size];
                match prior.get(part).and_then(|o| o.get(&shape.name)) {
                    Some(Value::Array(a)) if a.len() == shape.size => {
                        for (k, (d, x)) in at.iter_mut().zip(a).enumerate() {
                            match x.as_f64() {
                                Some(x) if x.is_finite() && (part == "mean" || x >= 0.0) => *d = x,
                                _ => errs.push(field(
                                    &format!("{p}/{k}"),
                                    "expected a finite number (a std of zero or more)",
                                )),
                            }
                        }
                    }
                    Some(x) => match x.as_f64() {
                        Some(x) if x.is_finite() && (part == "mean" || x >= 0.0) => at.fill(x),
                        _ => errs.push(field(
                            &p,
                            format!("expected a number or an array of {} numbers", shape.size),
                        )),
                    },
                    None => errs.push(field(
                        &p,
                        format!(
                            "missing the family's {part} (a number for every element or an array)"
                        ),
                    )),
                }
            }
        }
        let mut rng = ChaCha20Rng::seed_from_u64(cfg.seed);
        rng.set_stream(2);
        for j in 0..nn {
            for s in 0..n {
                let xi: f64 = StandardNormal.sample(&mut rng);
                ens[j * n + s] = mean[s] + std[s] * xi;
            }
        }
    }
    if let Some(o) = prior.as_object() {
        for k in o.keys() {
            if !["t", "mean", "std", "members"].contains(&k.as_str()) {
                errs.push(field(&format!("/prior/{k}"), "a family model's prior has t, and mean and std per family, or a posterior's members"));
            }
        }
    }
    if errs.is_empty() {
        Ok((t, ens))
    } else {
        Err(invalid(errs))
    }
}

/// A family model's run with the local update, line by line.
pub(super) struct LocalRun {
    fm: FamilyModel,
    ens: FamilyEnsemble,
    cfg: Settings,
    t: f64,
    readings: LocalReadings,
    mean: Vec<f64>,
    std: Vec<f64>,
    stats: RunStats,
    readings_total: u64,
    max_gap_steps: u64,
}

impl LocalRun {
    /// Check `model`, `filter`, `prior` and `output` and draw (or take) the members.
    pub(super) fn start(
        model: &Value,
        filter: &Value,
        prior: &Value,
        output: Option<&Value>,
        limits: &Limits,
    ) -> Result<LocalRun, Problem> {
        let fm = validate::check_families(model, "/model", limits)
            .map_err(|e| invalid(e.into_iter().map(FieldError::from).collect()))?;
        let cfg = settings(filter, output, limits)?;
        let need = (fm.n() as u64)
            .saturating_mul(cfg.members as u64)
            .saturating_mul(8 * 4);
        if need > limits.max_request_bytes {
            return Err(Problem::new(ProblemKind::OverMemoryBudget, format!("{} states × {} members need about {need} bytes of members and buffers, over this server's {} per request", fm.n(), cfg.members, limits.max_request_bytes)));
        }
        let (t, members) = start_members(&fm, prior, &cfg)?;
        let rates = FamilyRates {
            set: fm.set.clone(),
            kernels: fm.kernels.clone(),
            arrays: fm.arrays.clone(),
        };
        let max_readings = fm.max_readings();
        let ens = FamilyEnsemble::new(rates, members, cfg.members, cfg.local, max_readings);
        let n = fm.n();
        let mut readings = LocalReadings::default();
        readings.loc.reserve(max_readings);
        readings.state.reserve(max_readings);
        readings.z.reserve(max_readings);
        readings.inv_var.reserve(max_readings);
        Ok(LocalRun {
            fm,
            ens,
            cfg,
            t,
            readings,
            mean: vec![0.0; n],
            std: vec![0.0; n],
            stats: RunStats {
                filter: "enkf",
                ..RunStats::default()
            },
            readings_total: 0,
            max_gap_steps: limits.max_gap_steps,
        })
    }

    /// Run one measurement line (`at` is its pointer, `/measurements/3` or `/3` on the
    /// stream) and append its estimate object to `out`.
    pub(super) fn push(
        &mut self,
        line: &[u8],
        at: &str,
        stop: &Stop,
        out: &mut Vec<u8>,
    ) -> Result<(), Problem> {
        if stop.halted().is_some() {
            return Err(Problem::new(
                ProblemKind::DeadlineExceeded,
                format!("the request stopped before {at} (cancelled or past its compute deadline)"),
            ));
        }
        let v: Value = serde_json::from_slice(line).map_err(envelope::json_problem)?;
        let t = match v.get("t").and_then(Value::as_f64) {
            Some(t) if t.is_finite() => t,
            _ => {
                return Err(Problem::field(
                    format!("{at}/t"),
                    "expected the line's time as a number of seconds",
                ))
            }
        };
        if t < self.t {
            return Err(Problem::field(
                format!("{at}/t"),
                format!("time {t} comes before the previous {}", self.t),
            ));
        }
        self.readings.clear();
        if let Some(values) = v.get("values") {
            let Some(values) = values.as_object() else {
                return Err(Problem::field(
                    format!("{at}/values"),
                    "expected an object of sensor readings",
                ));
            };
            self.gather(values, at)?;
        }
        let gap = t - self.t;
        if gap > 0.0 {
            let steps = (gap / self.cfg.step).ceil();
            if steps > self.max_gap_steps as f64 {
                return Err(Problem::field(
                    format!("{at}/t"),
                    format!(
                        "the gap of {gap} s needs {steps} RK4 steps of {}, over the limit of {}",
                        self.cfg.step, self.max_gap_steps
                    ),
                ));
            }
            let steps = steps.max(1.0) as u64;
            let h = gap / steps as f64;
            for k in 0..steps {
                self.ens
                    .forecast(self.t + k as f64 * h, h)
                    .map_err(|e| numerical(at, &e.to_string()))?;
            }
        }
        self.t = t;
        if !self.readings.is_empty() {
            self.ens
                .analyse(&self.readings)
                .map_err(|e| numerical(at, &e.to_string()))?;
            self.stats.updates += 1;
            self.readings_total += self.readings.len() as u64;
        }
        self.stats.steps += 1;
        self.ens.mean_std(&mut self.mean, &mut self.std);
        out.extend_from_slice(b"{\"t\":");
        num(out, t);
        self.families(out, true, self.cfg.std);
        out.push(b'}');
        Ok(())
    }

    /// The line's readings into `self.readings`, each value at its element.
    fn gather(&mut self, values: &Map<String, Value>, at: &str) -> Result<(), Problem> {
        for (name, x) in values {
            let p = format!("{at}/values/{name}");
            let Some(k) = self.fm.sensor_index(name) else {
                return Err(Problem::field(
                    p,
                    format!("'{name}' is not a sensor of this model"),
                ));
            };
            let s = &self.fm.sensors[k];
            let list = x.as_array().filter(|a| a.len() == s.elements.len());
            let Some(list) = list else {
                return Err(Problem::field(
                    p,
                    format!(
                        "expected an array of {} values, one per element read, in index order",
                        s.elements.len()
                    ),
                ));
            };
            let start = self.fm.set.starts[s.family];
            for (i, (z, &e)) in list.iter().zip(&s.elements).enumerate() {
                match z.as_f64() {
                    Some(z) if z.is_finite() => self.readings.push(e, start + e, z, s.std),
                    _ => {
                        return Err(Problem::field(
                            format!("{p}/{i}"),
                            "expected a finite number",
                        ))
                    }
                }
            }
        }
        Ok(())
    }

    /// `,"mean":{"x":[...]}` and, with `std`, `,"std":{...}` from the last moments.
    fn families(&self, out: &mut Vec<u8>, mean: bool, std: bool) {
        for (part, on, v) in [("mean", mean, &self.mean), ("std", std, &self.std)] {
            if !on {
                continue;
            }
            out.extend_from_slice(format!(",\"{part}\":{{").as_bytes());
            for (f, shape) in self.fm.set.shapes.iter().enumerate() {
                if f > 0 {
                    out.push(b',');
                }
                out.extend_from_slice(&serde_json::to_vec(&shape.name).unwrap_or_default());
                out.extend_from_slice(b":[");
                let start = self.fm.set.starts[f];
                for (k, &x) in v[start..start + shape.size].iter().enumerate() {
                    if k > 0 {
                        out.push(b',');
                    }
                    num(out, x);
                }
                out.push(b']');
            }
            out.push(b'}');
        }
    }

    /// `"posterior":{t, mean, std, members},"summary":{...}` (no braces around).
    pub(super) fn tail(&mut self, out: &mut Vec<u8>) {
        let (n, nn) = (self.fm.n(), self.cfg.members);
        self.ens.mean_std(&mut self.mean, &mut self.std);
        out.extend_from_slice(b"\"posterior\":{\"t\":");
        num(out, self.t);
        self.families(out, true, true);
        out.extend_from_slice(b",\"members\":{");
        let ens = self.ens.ensemble();
        for (f, shape) in self.fm.set.shapes.iter().enumerate() {
            if f > 0 {
                out.push(b',');
            }
            out.extend_from_slice(&serde_json::to_vec(&shape.name).unwrap_or_default());
            out.extend_from_slice(b":[");
            let start = self.fm.set.starts[f];
            for j in 0..nn {
                if j > 0 {
                    out.push(b',');
                }
                out.push(b'[');
                for (k, &x) in ens[j * n + start..j * n + start + shape.size]
                    .iter()
                    .enumerate()
                {
                    if k > 0 {
                        out.push(b',');
                    }
                    num(out, x);
                }
                out.push(b']');
            }
            out.push(b']');
        }
        out.extend_from_slice(b"}},\"summary\":{\"lines\":");
        out.extend_from_slice(self.stats.steps.to_string().as_bytes());
        out.extend_from_slice(b",\"updates\":");
        out.extend_from_slice(self.stats.updates.to_string().as_bytes());
        out.extend_from_slice(b",\"readings\":");
        out.extend_from_slice(self.readings_total.to_string().as_bytes());
        out.extend_from_slice(b",\"states\":");
        out.extend_from_slice(n.to_string().as_bytes());
        out.extend_from_slice(b",\"members\":");
        out.extend_from_slice(nn.to_string().as_bytes());
        out.push(b'}');
    }

    /// The stream's last line `{posterior, summary}` with its newline. A line is read
    /// whole before the members move, so only a numerical failure (members no longer
    /// finite) leaves them part-way through a line.
    pub(super) fn closing_line(&mut self, out: &mut Vec<u8>) {
        out.push(b'{');
        self.tail(out);
        out.extend_from_slice(b"}\n");
    }

    /// Work counters so far.
    pub(super) fn stats(&self) -> RunStats {
        self.stats
    }
}

fn numerical(at: &str, what: &str) -> Problem {
    Problem::new(ProblemKind::NumericalFailure, format!("at {at}: {what} (the members left the finite numbers; a smaller integration.fixed_step or more inflation may help)"))
}

/// The stream's header line `{model, filter, prior, output?}` of a family model with the
/// local update as its run; `None` for every other header.
pub(super) fn stream_start(header: &[u8], limits: &Limits) -> Result<Option<LocalRun>, Problem> {
    let env = envelope::envelope(header)?;
    let (Ok(model), Ok(filter)) = (
        envelope::section(env.model, "model"),
        envelope::section(env.filter, "filter"),
    ) else {
        return Ok(None);
    };
    if !wants_local(&model, &filter) {
        return Ok(None);
    }
    if env.measurements.is_some() {
        return Err(Problem::field("/measurements", "the stream's first line holds model, filter, prior and output; readings follow one per line"));
    }
    let prior = envelope::section(env.prior, "prior")?;
    let output = envelope::optional_section(env.output, "output")?;
    LocalRun::start(&model, &filter, &prior, output.as_ref(), limits).map(Some)
}

/// `POST /v1/estimate` for a family model with the local update: the whole answer.
pub(super) fn estimate(
    sections: [&Value; 3],
    output: Option<&Value>,
    lines: &[&str],
    limits: &Limits,
    stop: &Stop,
) -> Result<super::Pieces, Problem> {
    let [model, filter, prior] = sections;
    let mut run = LocalRun::start(model, filter, prior, output, limits)?;
    let mut out = b"{\"estimates\":[".to_vec();
    for (i, line) in lines.iter().enumerate() {
        if i > 0 {
            out.push(b',');
        }
        run.push(
            line.as_bytes(),
            &format!("/measurements/{i}"),
            stop,
            &mut out,
        )?;
    }
    out.extend_from_slice(b"],");
    run.tail(&mut out);
    out.push(b'}');
    Ok(super::Pieces {
        parts: vec![out],
        stats: run.stats(),
    })
}
