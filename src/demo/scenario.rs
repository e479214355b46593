//! The embedded demo scenarios, and how their generated files (truth and readings) are
//! made from the committed settings and seeds by tacit's own simulator.

use crate::config::Limits;
use serde_json::Value;

/// One scenario's files as text: the inputs a person writes and the two generated files.
#[derive(Debug, Clone, Copy)]
pub struct Scenario {
    /// Folder name under `demo-data/`.
    pub name: &'static str,
    /// One line on what it shows.
    pub title: &'static str,
    /// `model.json`: the model the filter is given.
    pub model: &'static str,
    /// `filter.json`: the request's `filter` block.
    pub filter: &'static str,
    /// `prior.json`: the request's `prior`.
    pub prior: &'static str,
    /// `simulate.json`: times, input changes, seed and reading schedule.
    pub simulate: &'static str,
    /// `truth-model.json`, when the truth moves differently from what the filter assumes.
    pub truth_model: Option<&'static str>,
    /// `truth-prior.json`, the prior of the truth model (needed with `truth_model`).
    pub truth_prior: Option<&'static str>,
    /// `truth.json` (generated): the simulated states, one line per time.
    pub truth: &'static str,
    /// `measurements.json` (generated): the simulated readings, one line per time.
    pub measurements: &'static str,
    /// How the readings are posted.
    pub delivery: Delivery,
    /// Units of each state, for the printout (JSON models carry no units).
    pub units: &'static [(&'static str, &'static str)],
}

/// How a scenario's readings reach the service.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Delivery {
    /// One `POST /v1/estimate` with every reading.
    Batch,
    /// One batch, then the same readings again in this many requests, each request's
    /// `posterior` sent as the next one's `prior`, to show the estimates are identical.
    BatchAndResumed(usize),
    /// One `POST /v1/estimate/stream`, NDJSON in and out.
    Stream,
}

macro_rules! scenario_file {
    ($dir:literal, $file:literal) => {
        include_str!(concat!("../../demo-data/", $dir, "/", $file))
    };
}

/// The embedded scenarios, in the order the demo runs them.
pub const SCENARIOS: [Scenario; 3] = [
    Scenario {
        name: "crane",
        title: "overhead crane trolley: encoder reads position only, with dropouts and glitches",
        model: scenario_file!("crane", "model.json"),
        filter: scenario_file!("crane", "filter.json"),
        prior: scenario_file!("crane", "prior.json"),
        simulate: scenario_file!("crane", "simulate.json"),
        truth_model: None,
        truth_prior: None,
        truth: scenario_file!("crane", "truth.json"),
        measurements: scenario_file!("crane", "measurements.json"),
        delivery: Delivery::Batch,
        units: &[("position", "m"), ("velocity", "m/s")],
    },
    Scenario {
        name: "water-tower",
        title: "water tower: level gauge only, draw-off flow unknown (a disturbance state)",
        model: scenario_file!("water-tower", "model.json"),
        filter: scenario_file!("water-tower", "filter.json"),
        prior: scenario_file!("water-tower", "prior.json"),
        simulate: scenario_file!("water-tower", "simulate.json"),
        truth_model: None,
        truth_prior: None,
        truth: scenario_file!("water-tower", "truth.json"),
        measurements: scenario_file!("water-tower", "measurements.json"),
        delivery: Delivery::BatchAndResumed(4),
        units: &[("level", "m"), ("draw_off", "L/s")],
    },
    Scenario {
        name: "kiln",
        title: "kiln: thermocouple only, heat-loss coefficient drifting (a parameter)",
        model: scenario_file!("kiln", "model.json"),
        filter: scenario_file!("kiln", "filter.json"),
        prior: scenario_file!("kiln", "prior.json"),
        simulate: scenario_file!("kiln", "simulate.json"),
        truth_model: Some(scenario_file!("kiln", "truth-model.json")),
        truth_prior: Some(scenario_file!("kiln", "truth-prior.json")),
        truth: scenario_file!("kiln", "truth.json"),
        measurements: scenario_file!("kiln", "measurements.json"),
        delivery: Delivery::Stream,
        units: &[("temperature", "°C"), ("loss", "kW/K")],
    },
];

/// The files the simulator produces for one scenario.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct Generated {
    /// `truth.json`.
    pub truth: String,
    /// `measurements.json`.
    pub measurements: String,
}

/// The simulate request of a scenario: its truth model and prior (or the filter's, when the
/// truth follows the filter's own model) with the simulate settings.
pub fn simulate_request(model: &str, prior: &str, simulate: &str) -> Result<Value, String> {
    let mut req = parse(simulate, "simulate.json")?;
    let obj = req
        .as_object_mut()
        .ok_or("simulate.json is not a JSON object")?;
    obj.insert("model".into(), parse(model, "the model")?);
    obj.insert("prior".into(), parse(prior, "the prior")?);
    Ok(req)
}

/// Run tacit's simulator on a scenario's settings and lay out the two generated files,
/// one array element per line so that changes show up line by line in a diff.
pub fn generate(model: &str, prior: &str, simulate: &str) -> Result<Generated, String> {
    let req = simulate_request(model, prior, simulate)?;
    let body = serde_json::to_vec(&req).map_err(|e| e.to_string())?;
    let done = crate::job::simulate(&body, &Limits::default(), &crate::job::Stop::never())
        .map_err(|p| format!("the simulator refused the scenario: {p}"))?;
    let out: Value = serde_json::from_slice(&done.body).map_err(|e| e.to_string())?;
    let lines = |key: &str| -> Result<String, String> {
        let items = out[key]
            .as_array()
            .ok_or_else(|| format!("the simulator's answer has no {key}"))?;
        let mut s = String::from("[\n");
        for (i, it) in items.iter().enumerate() {
            if i > 0 {
                s.push_str(",\n");
            }
            s.push_str(&serde_json::to_string(it).map_err(|e| e.to_string())?);
        }
        s.push_str("\n]\n");
        Ok(s)
    };
    Ok(Generated {
        truth: lines("truth")?,
        measurements: lines("measurements")?,
    })
}

impl Scenario {
    /// Regenerate this scenario's files from its embedded settings.
    pub fn generate(&self) -> Result<Generated, String> {
        generate(
            self.truth_model.unwrap_or(self.model),
            self.truth_prior.unwrap_or(self.prior),
            self.simulate,
        )
    }
}

/// Rebuild `truth.json` and `measurements.json` of every scenario under `dir` (normally
/// `demo-data`) from the settings on disk there; returns the files written.
pub fn regenerate(dir: &std::path::Path) -> Result<Vec<std::path::PathBuf>, String> {
    let mut written = Vec::new();
    for s in &SCENARIOS {
        let folder = dir.join(s.name);
        let read = |file: &str| {
            let p = folder.join(file);
            std::fs::read_to_string(&p).map_err(|e| format!("cannot read {}: {e}", p.display()))
        };
        let optional = |file: &str| -> Result<Option<String>, String> {
            let p = folder.join(file);
            if p.exists() {
                read(file).map(Some)
            } else {
                Ok(None)
            }
        };
        let model = match optional("truth-model.json")? {
            Some(m) => m,
            None => read("model.json")?,
        };
        let prior = match optional("truth-prior.json")? {
            Some(p) => p,
            None => read("prior.json")?,
        };
        let g = generate(&model, &prior, &read("simulate.json")?)
            .map_err(|e| format!("{}: {e}", s.name))?;
        for (file, text) in [
            ("truth.json", &g.truth),
            ("measurements.json", &g.measurements),
        ] {
            let p = folder.join(file);
            std::fs::write(&p, text).map_err(|e| format!("cannot write {}: {e}", p.display()))?;
            written.push(p);
        }
    }
    Ok(written)
}

/// `text` as JSON, or an error naming `what` it was.
pub(super) fn parse(text: &str, what: &str) -> Result<Value, String> {
    serde_json::from_str(text).map_err(|e| format!("{what} is not valid JSON: {e}"))
}
