//! Limits in force for one server (or CLI run): what a request may ask of it.
//!
//! The web layer fills these from flags and environment variables; the core reads them
//! while parsing so an oversized request is refused before any work is done.

use serde::Serialize;
use std::time::Duration;

/// Upper bounds on what one request may ask for.
#[derive(Debug, Clone, Serialize)]
pub struct Limits {
    /// Largest accepted request body, bytes (the stream endpoint limits each line instead).
    pub max_body_bytes: usize,
    /// Largest line of an NDJSON stream, bytes.
    pub max_line_bytes: usize,
    /// Most states (model states plus estimated parameters).
    pub max_states: usize,
    /// Most states of a model written as state families (`model.families`), all
    /// families together; such a model is analysed element by element, so it has its own
    /// limit, far above `max_states`.
    pub max_family_states: usize,
    /// Most sensors in one model.
    pub max_sensors: usize,
    /// Most ensemble members.
    pub max_members: usize,
    /// Most measurement lines in one batch request (the stream is unbounded).
    pub max_lines: usize,
    /// Most simulated times in one simulate request.
    pub max_sim_times: usize,
    /// Most samples in one identify request's `series`.
    pub max_identify_samples: usize,
    /// Most candidate terms in one identify request's library.
    pub max_identify_terms: usize,
    /// Longest formula, characters.
    pub max_formula_len: usize,
    /// Deepest nesting of a formula (parentheses, calls, unary operators).
    pub max_formula_depth: usize,
    /// Most fixed-size steps one gap between readings may need (grid steps of a discrete
    /// model, or steps of `integration.fixed_step`); a longer gap is refused with a 422
    /// before any stepping.
    pub max_gap_steps: u64,
    /// Wall-clock budget of one request, counted from its arrival; `None` for no
    /// deadline (a request whose client goes away still stops).
    #[serde(rename = "deadline_secs", serialize_with = "ser_opt_secs")]
    pub deadline: Option<Duration>,
    /// Most requests doing filter work at once; more are answered 503.
    pub max_concurrency: usize,
    /// Most memory one request may need, bytes, as estimated from its shape before any
    /// work starts (stored smoothing steps, ensemble, answer); more is refused with 413.
    pub max_request_bytes: u64,
}

/// The per-request memory budget when the machine's memory cannot be read: 1 GiB.
pub const FALLBACK_REQUEST_BYTES: u64 = 1 << 30;

/// A quarter of the memory this process may use (the smaller of physical memory, from
/// `/proc/meminfo`, and a cgroup v2 `memory.max`): what `tacit serve` and `tacit run`
/// allow one request when `--max-request-bytes` is not given. A quarter leaves room for a
/// few large requests at once and for the server itself; [`FALLBACK_REQUEST_BYTES`] where
/// neither can be read.
pub fn machine_request_bytes() -> u64 {
    let total = std::fs::read_to_string("/proc/meminfo")
        .ok()
        .and_then(|t| meminfo_total(&t));
    let cgroup = std::fs::read_to_string("/sys/fs/cgroup/memory.max")
        .ok()
        .and_then(|t| t.trim().parse::<u64>().ok());
    match (total, cgroup) {
        (Some(a), Some(b)) => a.min(b) / 4,
        (Some(a), None) | (None, Some(a)) => a / 4,
        (None, None) => FALLBACK_REQUEST_BYTES,
    }
}

/// `MemTotal` of a `/proc/meminfo` text, in bytes (the file counts kibibytes).
fn meminfo_total(text: &str) -> Option<u64> {
    let line = text.lines().find(|l| l.starts_with("MemTotal:"))?;
    let kib: u64 = line
        .trim_start_matches("MemTotal:")
        .trim()
        .trim_end_matches("kB")
        .trim()
        .parse()
        .ok()?;
    kib.checked_mul(1024)
}

fn ser_opt_secs<S: serde::Serializer>(d: &Option<Duration>, s: S) -> Result<S::Ok, S::Error> {
    match d {
        Some(d) => s.serialize_some(&d.as_secs_f64()),
        None => s.serialize_none(),
    }
}

impl Default for Limits {
    fn default() -> Self {
        Self {
            max_body_bytes: 256 * 1024 * 1024,
            max_line_bytes: 1024 * 1024,
            max_states: 256,
            max_family_states: 1_000_000,
            max_sensors: 256,
            max_members: 4096,
            max_lines: 5_000_000,
            max_sim_times: 1_000_000,
            max_identify_samples: 1_000_000,
            max_identify_terms: 200,
            max_formula_len: 4096,
            max_formula_depth: 64,
            max_gap_steps: 10_000_000,
            deadline: Some(Duration::from_secs(60)),
            max_concurrency: 64,
            max_request_bytes: FALLBACK_REQUEST_BYTES,
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn meminfo_total_reads_kibibytes_as_bytes() {
        // The format of proc(5): "MemTotal:  <n> kB" on its own line.
        let text = "MemTotal:       24683568 kB\nMemFree:         1000 kB\n";
        assert_eq!(meminfo_total(text), Some(24_683_568 * 1024));
        assert_eq!(meminfo_total("MemFree: 12 kB\n"), None);
        assert!(machine_request_bytes() > 0);
    }
}
