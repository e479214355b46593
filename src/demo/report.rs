//! What the demo found for each scenario, and how it is shown: a text table for people
//! and one JSON document for scripts.

use super::scenario::SCENARIOS;
use serde::Serialize;
use serde_json::{json, Map, Value};
use std::fmt::Write as _;

/// A reading this many of its std away from the truth counts as a glitch. Ordinary noise
/// gets there with probability 2·10⁻⁹ (normal tail, common practice), so every flagged
/// reading was injected; an injected glitch that happens to land closer is not told apart.
pub const GLITCH_SIGMAS: f64 = 6.0;

/// The share of each run left out of the RMSE while the filter forgets its prior.
pub const SETTLING_SHARE: f64 = 0.1;

/// How well one state was recovered.
#[derive(Debug, Clone, Serialize)]
pub struct StateReport {
    /// The state's name.
    pub name: String,
    /// Whether a sensor reads this state directly.
    pub measured: bool,
    /// Whether it is an estimated parameter of the model.
    pub parameter: bool,
    /// Root-mean-square error of the filtered mean against the truth, after start-up.
    pub rmse: f64,
    /// Mean reported standard deviation over the same span (what the filter claims).
    pub mean_std: f64,
    /// The final estimate.
    pub final_estimate: f64,
    /// Its standard deviation.
    pub final_std: f64,
    /// The true value at the last time.
    pub final_truth: f64,
    /// The true value at the first time (differs from the last for a drifting parameter).
    pub initial_truth: f64,
}

/// The NIS figures of a run, as the service's summary reports them.
#[derive(Debug, Clone, Serialize)]
pub struct NisReport {
    /// Mean NIS over the updates.
    pub mean: f64,
    /// Expected mean (degrees of freedom per update).
    pub dof: f64,
    /// Lower and upper 95 % bounds of the mean.
    pub bounds_95: [f64; 2],
    /// `consistent`, `overconfident` or `underconfident`.
    pub verdict: String,
}

/// What the demo found for one scenario.
#[derive(Debug, Clone, Serialize)]
pub struct Report {
    /// Scenario folder name.
    pub scenario: String,
    /// Filter method used.
    pub method: String,
    /// How the readings were posted.
    pub delivery: String,
    /// Measurement lines posted.
    pub lines: usize,
    /// Sensor readings among them (dropped readings are absent lines' values).
    pub readings: usize,
    /// Updates applied by the filter.
    pub updates: u64,
    /// The gate's probability, when the filter has a gate.
    pub gate: Option<f64>,
    /// Readings the gate refused.
    pub rejected: u64,
    /// Readings further than [`GLITCH_SIGMAS`] reading std from the truth: the glitches
    /// the simulator injected, as far as they can be told from the noise.
    pub glitches: usize,
    /// Glitches among the rejected readings.
    pub glitches_rejected: usize,
    /// Estimates that started from the prior's spread and are left out of the RMSE.
    pub settling_lines: usize,
    /// Per state, in the response's `states` order.
    pub states: Vec<StateReport>,
    /// Consistency of the innovations.
    pub nis: NisReport,
    /// For resumed delivery: whether the resumed estimates equal the single batch's
    /// bit for bit.
    pub resumed_identical: Option<bool>,
    /// Wall-clock time of the scenario's requests, seconds.
    pub seconds: f64,
}

fn sig(x: f64) -> String {
    // Four significant figures, in plain or exponent notation as the size asks.
    if x == 0.0 || (1e-3..1e5).contains(&x.abs()) {
        let digits = (3 - x.abs().log10().floor() as i32).clamp(0, 7) as usize;
        format!("{x:.digits$}")
    } else {
        format!("{x:.3e}")
    }
}

/// The reports as text for people.
pub fn render(reports: &[Report]) -> String {
    let mut o = String::new();
    let _ = writeln!(
        o,
        "tacit demo: {} invented plants, readings simulated by tacit from committed seeds,",
        reports.len()
    );
    let _ = writeln!(
        o,
        "posted over HTTP to the service running in this process. RMSE is against the"
    );
    let _ = writeln!(
        o,
        "simulated truth, leaving out the first {:.0} % of each run (start-up from the prior).",
        SETTLING_SHARE * 100.0
    );
    for (r, s) in reports.iter().zip(SCENARIOS.iter()) {
        let _ = writeln!(o);
        let _ = writeln!(o, "== {} — {}", r.scenario, s.title);
        let _ = writeln!(
            o,
            "   {} via {}; {} lines, {} readings, {} updates, {:.2} s",
            r.method, r.delivery, r.lines, r.readings, r.updates, r.seconds
        );
        for st in &r.states {
            let unit = s.units.iter().find(|u| u.0 == st.name).map_or("", |u| u.1);
            let kind = match (st.measured, st.parameter) {
                (true, _) => "measured",
                (false, true) => "UNMEASURED parameter",
                (false, false) => "UNMEASURED",
            };
            let _ = writeln!(
                o,
                "   {:<12} {:<5} {:<21} RMSE {:>9}  (filter's mean std {:>9})  final {} ± {} vs truth {}",
                st.name,
                unit,
                kind,
                sig(st.rmse),
                sig(st.mean_std),
                sig(st.final_estimate),
                sig(st.final_std),
                sig(st.final_truth)
            );
            if st.parameter {
                let _ = writeln!(
                    o,
                    "   {:<18} the true {} drifted from {} to {} {unit} over the run",
                    "",
                    st.name,
                    sig(st.initial_truth),
                    sig(st.final_truth)
                );
            }
        }
        let _ = writeln!(
            o,
            "   NIS: mean {} (expected {}, 95 % bounds {} .. {}) -> {}",
            sig(r.nis.mean),
            sig(r.nis.dof),
            sig(r.nis.bounds_95[0]),
            sig(r.nis.bounds_95[1]),
            r.nis.verdict
        );
        match r.gate {
            Some(p) => {
                let _ = writeln!(
                    o,
                    "   gate (probability {p}): {} readings rejected; glitches injected (> {GLITCH_SIGMAS} std off the truth): {}, of them rejected: {}",
                    r.rejected, r.glitches, r.glitches_rejected
                );
            }
            None => {
                let _ = writeln!(
                    o,
                    "   no gate; glitches (> {GLITCH_SIGMAS} std off the truth): {}",
                    r.glitches
                );
            }
        }
        if let Some(same) = r.resumed_identical {
            let _ = writeln!(
                o,
                "   resumed across requests: estimates {} the single request's",
                if same {
                    "identical to"
                } else {
                    "DIFFERENT from"
                }
            );
        }
    }
    o
}

/// The reports as one JSON document.
pub fn to_json(reports: &[Report]) -> Value {
    let mut m = Map::new();
    m.insert("glitch_sigmas".into(), json!(GLITCH_SIGMAS));
    m.insert("settling_share".into(), json!(SETTLING_SHARE));
    m.insert(
        "scenarios".into(),
        serde_json::to_value(reports).unwrap_or(Value::Null),
    );
    Value::Object(m)
}
