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

use super::budget;
use super::write::num;
use super::RunStats;
use crate::config::Limits;
use crate::dynamics::FamilyRates;
use crate::filter::enkf::{FamilyEnsemble, LocalReadings, LocalSettings};
use crate::model::{FamilyModel, Stop};
use crate::problem::{FieldError, Problem, ProblemKind};
use crate::request::envelope::{self, Envelope};
use crate::request::validate;
use rand::SeedableRng;
use rand_chacha::ChaCha20Rng;
use rand_distr::{Distribution, StandardNormal};
use serde_json::Value;
use std::fmt::Write as _;

mod line;

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
    /// Which sensors the line being read has named (the one-pass reader's duplicate check).
    seen: Vec<bool>,
    /// Each family's name as a JSON string, written once.
    names: Vec<Vec<u8>>,
    mean: Vec<f64>,
    std: Vec<f64>,
    stats: RunStats,
    readings_total: u64,
    max_gap_steps: u64,
}

impl LocalRun {
    /// Check `model`, `filter`, `prior` and `output` and draw (or take) the members.
    /// The memory the run will hold is checked against the budget before any member is
    /// drawn.
    fn start(
        model: &Value,
        filter: &Value,
        prior: &Value,
        output: Option<&Value>,
        held: Held,
        limits: &Limits,
    ) -> Result<LocalRun, Problem> {
        let (fm, cfg) = plan(model, filter, output, limits)?;
        budget::within(budget::family_bytes(&shape(&fm, &cfg, held)), limits)?;
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
        let seen = vec![false; fm.sensors.len()];
        let names = fm
            .set
            .shapes
            .iter()
            .map(|s| serde_json::to_vec(&s.name).unwrap_or_default())
            .collect();
        Ok(LocalRun {
            fm,
            ens,
            cfg,
            t,
            readings,
            seen,
            names,
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
            return Err(stopped(at));
        }
        self.readings.clear();
        let scanned = std::str::from_utf8(line)
            .ok()
            .and_then(|l| self.scan_line(l));
        let t = match scanned {
            Some(t) => t,
            None => self.read_tree(line, at)?,
        };
        if t < self.t {
            return Err(Problem::field(
                format!("{at}/t"),
                format!("time {t} comes before the previous {}", self.t),
            ));
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
                if k > 0 && stop.halted().is_some() {
                    return Err(stopped(at));
                }
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

    /// `,"mean":{"x":[...]}` and, with `std`, `,"std":{...}` from the last moments.
    fn families(&self, out: &mut Vec<u8>, mean: bool, std: bool) {
        for (part, on, v) in [("mean", mean, &self.mean), ("std", std, &self.std)] {
            if !on {
                continue;
            }
            out.extend_from_slice(b",\"");
            out.extend_from_slice(part.as_bytes());
            out.extend_from_slice(b"\":{");
            for (f, shape) in self.fm.set.shapes.iter().enumerate() {
                if f > 0 {
                    out.push(b',');
                }
                out.extend_from_slice(&self.names[f]);
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

    /// Most readings one line can carry (every element every sensor reads).
    pub(super) fn max_readings(&self) -> usize {
        self.fm.max_readings()
    }

    /// Work counters so far.
    pub(super) fn stats(&self) -> RunStats {
        self.stats
    }
}

fn stopped(at: &str) -> Problem {
    Problem::new(
        ProblemKind::DeadlineExceeded,
        format!("the request stopped at {at} (cancelled or past its compute deadline)"),
    )
}

fn numerical(at: &str, what: &str) -> Problem {
    Problem::new(ProblemKind::NumericalFailure, format!("at {at}: {what} (the members left the finite numbers; a smaller integration.fixed_step or more inflation may help)"))
}

/// What a run holds besides its members: the answer lines kept at once and the bytes of
/// the body (a stream's header).
#[derive(Debug, Clone, Copy)]
struct Held {
    lines: usize,
    sections: usize,
    body: usize,
}

/// The model checked into its family form and the settings read, the members not drawn.
fn plan(
    model: &Value,
    filter: &Value,
    output: Option<&Value>,
    limits: &Limits,
) -> Result<(FamilyModel, Settings), Problem> {
    let fm = validate::check_families(model, "/model", limits)
        .map_err(|e| invalid(e.into_iter().map(FieldError::from).collect()))?;
    let cfg = settings(filter, output, limits)?;
    Ok((fm, cfg))
}

/// The shape [`budget::family_bytes`] reads.
fn shape(fm: &FamilyModel, cfg: &Settings, held: Held) -> budget::FamilyShape {
    budget::FamilyShape {
        states: fm.n(),
        size: fm.set.shapes.first().map_or(0, |s| s.size),
        members: cfg.members,
        readings: fm.max_readings(),
        threads: rayon::current_num_threads(),
        lines: held.lines,
        std: cfg.std,
        sections: held.sections,
        body: held.body,
    }
}

/// The parsed `model`, `filter`, `prior` and `output` of a request whose filter asks for
/// the local update over a family model; `None` for every other request (the plain
/// path then reports any fault in its sections). The sections' trees are counted
/// against the budget before they are built.
fn local_sections(
    env: &Envelope<'_>,
    body: usize,
    limits: &Limits,
) -> Result<Option<([Value; 3], usize)>, Problem> {
    let Ok(filter) = envelope::section(env.filter, "filter") else {
        return Ok(None);
    };
    if filter["ensemble"]["update"].as_str() != Some("local") {
        return Ok(None);
    }
    let text: usize = [env.model, env.prior, env.output]
        .iter()
        .flatten()
        .map(|r| r.get().len())
        .sum();
    budget::within(body as u64 + budget::FAMILY_TREE * text as u64, limits)?;
    let Ok(model) = envelope::section(env.model, "model") else {
        return Ok(None);
    };
    if !wants_local(&model, &filter) {
        return Ok(None);
    }
    let prior = envelope::section(env.prior, "prior")?;
    Ok(Some(([model, filter, prior], text)))
}

/// The stream's header line `{model, filter, prior, output?}` of a family model with the
/// local update as its run; `None` for every other header.
pub(super) fn stream_start(header: &[u8], limits: &Limits) -> Result<Option<LocalRun>, Problem> {
    let env = envelope::envelope(header)?;
    let Some(([model, filter, prior], sections)) = local_sections(&env, header.len(), limits)?
    else {
        return Ok(None);
    };
    if env.measurements.is_some() {
        return Err(Problem::field("/measurements", "the stream's first line holds model, filter, prior and output; readings follow one per line"));
    }
    let output = envelope::optional_section(env.output, "output")?;
    let held = Held {
        lines: 1,
        sections,
        body: header.len(),
    };
    LocalRun::start(&model, &filter, &prior, output.as_ref(), held, limits).map(Some)
}

/// The memory a batch request of a family model with the local update would need at its
/// peak, bytes; `None` for every other request.
pub(super) fn batch_need(
    env: &Envelope<'_>,
    body: usize,
    lines: usize,
    limits: &Limits,
) -> Result<Option<u64>, Problem> {
    let Some(([model, filter, _], sections)) = local_sections(env, body, limits)? else {
        return Ok(None);
    };
    let output = envelope::optional_section(env.output, "output")?;
    let (fm, cfg) = plan(&model, &filter, output.as_ref(), limits)?;
    let held = Held {
        lines,
        sections,
        body,
    };
    Ok(Some(budget::family_bytes(&shape(&fm, &cfg, held))))
}

/// `POST /v1/estimate` for a family model with the local update: the whole answer,
/// its memory checked against the budget first; `None` for every other request.
pub(super) fn estimate<'a>(
    env: &Envelope<'a>,
    body: usize,
    lines: impl FnOnce() -> Result<Vec<&'a str>, Problem>,
    limits: &Limits,
    stop: &Stop,
) -> Result<Option<super::Pieces>, Problem> {
    let Some(([model, filter, prior], sections)) = local_sections(env, body, limits)? else {
        return Ok(None);
    };
    let output = envelope::optional_section(env.output, "output")?;
    let lines = lines()?;
    let held = Held {
        lines: lines.len(),
        sections,
        body,
    };
    let mut run = LocalRun::start(&model, &filter, &prior, output.as_ref(), held, limits)?;
    let mut out = b"{\"estimates\":[".to_vec();
    // One pointer buffer for every line: a line's pointer costs no allocation.
    let mut at = String::with_capacity(32);
    for (i, line) in lines.iter().enumerate() {
        if i > 0 {
            out.push(b',');
        }
        at.clear();
        let _ = write!(at, "/measurements/{i}");
        run.push(line.as_bytes(), &at, stop, &mut out)?;
    }
    out.extend_from_slice(b"],");
    run.tail(&mut out);
    out.push(b'}');
    Ok(Some(super::Pieces {
        parts: vec![out],
        stats: run.stats(),
    }))
}
