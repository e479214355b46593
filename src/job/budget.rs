//! How much memory a request will need, estimated from its shape once it has been parsed
//! and checked, before anything is reserved or run; a request over the per-request
//! budget (`Limits::max_request_bytes`) is refused with a plain 413 instead of being
//! allowed to take the process down.
//!
//! The estimates are upper bounds of what is held at once: the body, what the run keeps
//! per line (the smoother's stored steps, a calibration's parsed readings), the
//! ensemble's workspace, and the answer's bytes, counting each number at its longest
//! shortest-round-trip form (24 bytes) plus a separator, and a buffer that grows by
//! doubling at twice its contents. The tests
//! `the_memory_estimate_bounds_what_a_request_allocates` and
//! `the_calibrate_memory_estimate_bounds_what_it_allocates` hold them to the bytes a
//! counting allocator measures.

use crate::config::Limits;
use crate::model::{CovarianceOutput, FilterConfig, Method, Model, OutputConfig};
use crate::problem::{Problem, ProblemKind};

/// Bytes of one number in an answer: the longest shortest-round-trip `f64`
/// (`-1.2345678901234567e-100`, 24 bytes) and a comma.
const NUM: u64 = 25;

/// Bytes of one time in an answer: a timestamp with nanoseconds and an offset, quoted.
const TIME: u64 = 40;

/// Bytes of one `f64`.
const F64: u64 = 8;

/// What one batch request (`/v1/estimate`, `/v1/smooth`) asks for.
#[derive(Debug, Clone, Copy)]
pub struct BatchShape<'a> {
    /// The checked model.
    pub model: &'a Model,
    /// The filter settings.
    pub cfg: &'a FilterConfig,
    /// The response options.
    pub output: &'a OutputConfig,
    /// Measurement lines.
    pub lines: usize,
    /// Bytes of the request body (held while the request runs).
    pub body: usize,
    /// Whether every step is kept for the backward pass.
    pub smooth: bool,
    /// How the answer is held.
    pub answer: Held,
}

/// How a batch answer is held while it is written.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Held {
    /// One buffer growing by doubling: up to twice its contents.
    Buffer,
    /// Pieces of one block each, sized a quarter over the bytes seen per line.
    Pieces,
    /// Sent as it is written: only the pieces in flight are held.
    Streamed,
}

/// `"name":` as the writer puts a key.
fn key(name: &str) -> u64 {
    name.len() as u64 + 3
}

/// `{"a":x,"b":y}` over `names`.
fn object(names: impl Iterator<Item = u64>) -> u64 {
    2 + names.map(|k| k + NUM).sum::<u64>()
}

/// Upper bound of one estimate object's bytes, with every sensor's innovations when they
/// are asked for (a line reads at most every sensor once).
pub fn estimate_line_bytes(model: &Model, output: &OutputConfig) -> u64 {
    let n = model.n() as u64;
    let means = object(model.states.iter().map(|s| key(s)));
    let mut b = 8 + TIME + 8 + means;
    if output.covariance != CovarianceOutput::None {
        b += 7 + means;
    }
    if output.covariance == CovarianceOutput::Full {
        b += 15 + n * (n * NUM + 3);
    }
    if output.innovations {
        b += 17;
        for s in &model.sensors {
            let list = 2 + s.dim as u64 * NUM;
            b += key(&s.name) + 15 + list + 19 + list + 7 + NUM + 18;
        }
    }
    b
}

/// The ensemble filter's members and workspace (members × states, members², readings ×
/// members), or a Gaussian filter's covariance-sized buffers; per request, not per line.
fn filter_bytes(model: &Model, cfg: &FilterConfig) -> u64 {
    let n = model.n() as u64;
    let m: u64 = model.sensors.iter().map(|s| s.dim as u64).sum();
    let gaussian = F64 * (24 * n * n + 8 * m * m + 16 * n * m + 64 * n);
    match cfg.method {
        Method::Enkf => {
            let e = cfg.ensemble.members as u64;
            gaussian + F64 * (4 * e * e + 6 * e * n + 4 * e * m + 8 * e)
        }
        _ => gaussian,
    }
}

/// Bytes a batch request will hold at its peak.
pub fn batch_bytes(s: &BatchShape<'_>) -> u64 {
    let n = s.model.n() as u64;
    let lines = s.lines as u64;
    let line = estimate_line_bytes(s.model, s.output);
    // The body, and the list of each line's text (a slice is 16 bytes).
    let mut b = s.body as u64 + 16 * lines;
    b += filter_bytes(s.model, s.cfg);
    // Blocks of records between the filtering and writing threads (four of at most half
    // a megabyte of numbers, or 16 steps of a large model).
    let block = block_steps(n).min(lines.max(1));
    b += 4 * F64 * block * (1 + n + n * n);
    // Predictions at `output.at`, gathered apart.
    b += 2 * s.output.at.len() as u64 * line;
    if s.smooth {
        // Per stored step: the predicted mean, covariance and cross covariance, and the
        // filtered mean and covariance (five heap blocks), plus the line's innovation text.
        b += lines * (F64 * (3 * n * n + 2 * n) + 5 * 32 + 96);
        if s.output.innovations {
            b += lines * (line - estimate_line_bytes_without_innovations(s.model, s.output));
        }
    }
    b += match s.answer {
        Held::Buffer => 2 * lines * line,
        Held::Pieces => lines * line * 5 / 4 + 2 * line,
        // Pieces in the channels towards the socket and the one being written.
        Held::Streamed => 8 * block * line * 5 / 4,
    };
    b
}

/// Steps in one block of records for `n` states, as `Records::block_steps` without
/// reading rows (a lower bound on the rows only makes the block larger).
fn block_steps(n: u64) -> u64 {
    (65_536 / (1 + n + n * n)).clamp(16, 4096)
}

fn estimate_line_bytes_without_innovations(model: &Model, output: &OutputConfig) -> u64 {
    let plain = OutputConfig {
        innovations: false,
        ..output.clone()
    };
    estimate_line_bytes(model, &plain)
}

/// Bytes a `/v1/simulate` request will hold at its peak: `times` sampling times and
/// `changes` input changes (each a line of truth and one of measurements), the parsed
/// times, and the body.
pub fn simulate_bytes(model: &Model, times: usize, changes: usize, body: usize) -> u64 {
    let lines = (times + changes) as u64;
    let states = object(model.states.iter().map(|s| key(s)));
    let marks: u64 = model.sensors.iter().map(|s| 2 * (key(&s.name) + 10)).sum();
    let truth = 6 + TIME + 10 + states + marks + 2;
    let values: u64 = model
        .sensors
        .iter()
        .map(|s| key(&s.name) + 2 + s.dim as u64 * NUM)
        .sum();
    let inputs = object(model.inputs.iter().map(|s| key(s)));
    let meas = 6 + TIME + 11 + values + 10 + inputs + 2;
    // Two answer lists growing by doubling; each time parsed as a JSON value (32 bytes)
    // and kept as an instant (32 bytes).
    body as u64 + 2 * lines * (truth + meas) + 64 * times as u64
}

/// What one `/v1/calibrate` request asks for.
#[derive(Debug, Clone, Copy)]
pub struct CalibrateShape<'a> {
    /// The checked model.
    pub model: &'a Model,
    /// The filter settings.
    pub cfg: &'a FilterConfig,
    /// Measurement lines.
    pub lines: usize,
    /// Bytes of the request body (held while the request runs).
    pub body: usize,
    /// Bytes of the request without its measurements: kept as a JSON tree, copied for
    /// every run and written back in the answer.
    pub head: usize,
    /// Upper bound of the measurements' bytes when written back ([`echo_bytes`]).
    pub echo: u64,
    /// Whether some line may carry `noise_std` (each reading then keeps its overrides).
    pub overrides: bool,
    /// Filter runs going at once (one per core in a gradient or a curvature).
    pub threads: usize,
}

/// Bytes of a JSON tree (`serde_json::Value`, ordered maps) per byte of its text: at
/// most about 50 for the smallest object `{"a":1}` (a map's entry vector of four 64-byte
/// slots, its index table and a key block), less for anything larger.
const TREE: u64 = 64;

/// Bytes of one heap block of `b` bytes: the allocator's 8-byte header, rounded up to
/// 16 bytes, 32 at least (glibc malloc's chunk sizes, from memory); none for 0.
fn heap(b: u64) -> u64 {
    if b == 0 {
        0
    } else {
        (b + 8).next_multiple_of(16).max(32)
    }
}

/// Bytes of one parsed reading kept for every run: the `Reading` itself and its lists
/// (trimmed to their length), with every sensor read, and every input set when the
/// model has inputs.
fn reading_bytes(model: &Model, overrides: bool) -> u64 {
    let s = model.sensors.len() as u64;
    let m: u64 = model.sensors.iter().map(|s| s.dim as u64).sum();
    let mut b = std::mem::size_of::<crate::model::Reading>() as u64 + heap(16 * s) + heap(F64 * m);
    if overrides {
        b += heap(16 * s) + heap(F64 * m);
    }
    b + heap(16 * model.inputs.len() as u64)
}

/// Bytes a `/v1/calibrate` request will hold at its peak: the body; the list of each
/// line's text (kept while the readings are parsed, and again while they are written
/// back); every parsed reading, kept for all runs; per run going at once, the filter's
/// buffers and a copy of the request without its measurements as a tree; and the
/// answer, which echoes the whole request, in a buffer growing by doubling.
pub fn calibrate_bytes(s: &CalibrateShape<'_>) -> u64 {
    let lines = s.lines as u64;
    let head = s.head as u64;
    let threads = s.threads.max(1) as u64;
    let mut b = s.body as u64 + 16 * lines;
    b += lines * reading_bytes(s.model, s.overrides);
    // The head as a tree once, the fitted copy, and one copy (tree and text) per run.
    b += 2 * TREE * head + threads * (filter_bytes(s.model, s.cfg) + (TREE + 1) * head);
    // The answer: the echoed measurements, the head written back (a number can grow to
    // 24 bytes), and the fitted values, correlations, warnings and two summaries.
    b += 2 * (s.echo + 8 * head + (64 << 10));
    b
}

/// Upper bound of the bytes `text` (JSON) takes when parsed and written back compactly by
/// serde_json: whitespace goes, strings come back as long or shorter (escapes only
/// shrink), an integer of up to 19 digits comes back as it was, and any other number as
/// its shortest round-trip form, which has no more significant digits than the text but
/// may be laid out positionally (`1e15` is `1000000000000000.0`): at most 24 bytes, or
/// 4 more than a positional text (an exponent replacing zeros).
pub fn echo_bytes(text: &str) -> u64 {
    let b = text.as_bytes();
    let mut out = 0u64;
    let mut i = 0;
    while i < b.len() {
        match b[i] {
            b' ' | b'\t' | b'\n' | b'\r' => i += 1,
            b'"' => {
                let start = i;
                i += 1;
                while i < b.len() && b[i] != b'"' {
                    i += if b[i] == b'\\' { 2 } else { 1 };
                }
                i += 1;
                out += (i.min(b.len()) - start) as u64;
            }
            b'-' | b'0'..=b'9' => {
                let start = i;
                let (mut dot, mut exp) = (false, false);
                while i < b.len() && matches!(b[i], b'-' | b'+' | b'.' | b'e' | b'E' | b'0'..=b'9')
                {
                    dot |= b[i] == b'.';
                    exp |= matches!(b[i], b'e' | b'E');
                    i += 1;
                }
                let len = (i - start) as u64;
                out += if exp {
                    len.max(24)
                } else if dot {
                    (len + 4).min(len.max(24))
                } else if len <= 19 {
                    len
                } else {
                    len.max(24)
                };
            }
            _ => {
                out += 1;
                i += 1;
            }
        }
    }
    out
}

/// Bytes of an identify request's JSON tree per byte of its body: 14 measured for
/// series entries by name and as arrays (a counting allocator over whole requests of
/// 20,000 samples), with room to spare.
pub const IDENTIFY_TREE: u64 = 16;

/// What one `/v1/identify` request asks for, once parsed.
#[derive(Debug, Clone, Copy)]
pub struct IdentifyShape {
    /// Which kernel runs.
    pub work: IdentifyWork,
    /// Samples in the series.
    pub samples: usize,
    /// Values per sample (states, or outputs for `subspace`, then inputs).
    pub slots: usize,
    /// States (outputs for `subspace`).
    pub states: usize,
    /// Library terms (regression forms).
    pub terms: usize,
    /// Bytes of the request body (held while the request runs).
    pub body: usize,
}

/// The kernel an identify request runs.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum IdentifyWork {
    /// `linear`, `sparse`, `known`: windowed least squares over library columns.
    Regression,
    /// `subspace` with this many block rows at most (the horizon).
    Subspace {
        /// Block rows `i` of the past and future Hankel matrices.
        horizon: usize,
    },
    /// `reduced`: a thin SVD of the snapshots.
    Reduced,
}

/// Bytes an identify request holds at its peak: the larger of the parse (the body and
/// its JSON tree, [`IDENTIFY_TREE`] per byte, and the series filling up) and the fit (the
/// body, the series, the kernel's matrices and the answer). The kernels' matrices:
/// - regression: the series with its inputs held (two copies), the library columns at
///   each sample and with the inputs held, the known rates twice, and three sets of
///   window rows (training, twice as wide, held out) of terms + states numbers each;
/// - subspace: the transposed Hankel matrix (samples × 2i(inputs + outputs)), the copy
///   its QR factorisation consumes and the product of the same size;
/// - reduced: the snapshot matrix, the SVD's workspace (a copy), its V
///   (snapshots × min(states, snapshots)) and the one-step prediction errors.
pub fn identify_bytes(s: &IdentifyShape) -> u64 {
    let m = s.samples as u64;
    let slots = s.slots as u64;
    let series = F64 * m * slots + 16 * m;
    let parse = s.body as u64 * (1 + IDENTIFY_TREE) + series;
    let work = match s.work {
        IdentifyWork::Regression => {
            let (k, n) = (s.terms as u64, s.states as u64);
            F64 * m * (slots + 2 * k + 2 * n + 3 * (k + n))
        }
        IdentifyWork::Subspace { horizon } => {
            let cols = 2 * horizon as u64 * slots;
            3 * F64 * m * cols
        }
        IdentifyWork::Reduced => {
            let n = s.states as u64;
            F64 * (3 * n * m + m * n.min(m))
        }
    };
    // The answer: a number per state and sample at most (the reduced basis, fit figures).
    let answer = 2 * NUM * (s.states as u64 * 64 + 4096);
    parse.max(s.body as u64 + series + work + answer)
}

/// Bytes of a parsed JSON section's tree per byte of its text (the model and prior of a
/// family request: parameter arrays, a posterior's members), as for identify.
pub const FAMILY_TREE: u64 = IDENTIFY_TREE;

/// States the local transform analyses with one scratch set (`CHUNK` in
/// `filter::enkf::local`).
const LOCAL_CHUNK: u64 = 128;

/// What one family-model run with the local ensemble update asks for.
#[derive(Debug, Clone, Copy)]
pub struct FamilyShape {
    /// States over all families.
    pub states: usize,
    /// Elements in one family (the boundary table of the transform).
    pub size: usize,
    /// Ensemble members.
    pub members: usize,
    /// Most readings in one line (every element every sensor reads).
    pub readings: usize,
    /// Threads that forecast members at once (one RK4 buffer set each).
    pub threads: usize,
    /// Answer lines held at once: every line for a batch, one for a stream.
    pub lines: usize,
    /// Whether each line carries `std` as well as `mean`.
    pub std: bool,
    /// Bytes of the sections parsed into trees (model, filter, prior, output).
    pub sections: usize,
    /// Bytes of the request body (a stream's header), held while the run lasts.
    pub body: usize,
}

/// Bytes a family run with the local update holds at its peak: the body and its parsed
/// sections ([`FAMILY_TREE`] per byte), the members and the transform's output copy
/// (N·n numbers each), one RK4 set of five state vectors per thread, the transform's
/// scratch (per 128 states four N×N matrices and a few N-vectors), the readings'
/// buffers (N + 8 numbers each), a reading line's text as it gathers (26 bytes a value,
/// at twice its contents) and parsed (64 bytes a value), the mean and
/// std, and the answer (n or 2n numbers per line held, and the posterior's N·n + 2n
/// numbers) at twice its contents.
pub fn family_bytes(s: &FamilyShape) -> u64 {
    let (n, nn, r) = (s.states as u64, s.members as u64, s.readings as u64);
    let chunks = n.div_ceil(LOCAL_CHUNK).max(1);
    let run = F64
        * (2 * n * nn
            + 5 * n * s.threads.clamp(1, s.members.max(1)) as u64
            + chunks * (4 * nn * nn + 8 * nn)
            + r * (2 * nn + 8)
            + 2 * n
            + s.size as u64)
        + (64 + 2 * 26) * r;
    let per_line = NUM * n * if s.std { 2 } else { 1 };
    let answer = 2 * (s.lines as u64 * per_line + NUM * n * (nn + 2));
    s.body as u64 + FAMILY_TREE * s.sections as u64 + run + answer
}

/// Refuse `need` bytes over the budget, with both in the detail.
pub fn within(need: u64, limits: &Limits) -> Result<(), Problem> {
    if need <= limits.max_request_bytes {
        return Ok(());
    }
    Err(Problem::new(
        ProblemKind::OverMemoryBudget,
        format!(
            "this request needs about {} of memory; the limit is {} per request \
             (max_request_bytes in GET /v1/info); send fewer lines and resume from the \
             posterior, ask for less output, or use the stream endpoint",
            size(need),
            size(limits.max_request_bytes)
        ),
    ))
}

/// Bytes for people: `25.4 GB`, `512 MB`, `900 kB`, `12 bytes` (powers of 1000).
pub fn size(b: u64) -> String {
    const UNITS: [(u64, &str); 4] = [
        (1_000_000_000_000, "TB"),
        (1_000_000_000, "GB"),
        (1_000_000, "MB"),
        (1_000, "kB"),
    ];
    for (unit, name) in UNITS {
        if b >= unit {
            let x = b as f64 / unit as f64;
            return if x < 10.0 {
                format!("{x:.1} {name}")
            } else {
                format!("{x:.0} {name}")
            };
        }
    }
    format!("{b} bytes")
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn sizes_read_in_powers_of_a_thousand() {
        // SI prefixes (common practice): 1 GB = 10^9 bytes.
        assert_eq!(size(25_431_808_256), "25 GB");
        assert_eq!(size(6_170_000_000), "6.2 GB");
        assert_eq!(size(999), "999 bytes");
        assert_eq!(size(1_500), "1.5 kB");
    }

    #[test]
    fn the_echo_bound_holds_what_serde_json_writes_back() {
        // serde_json (float_roundtrip) is the independent writer: parse and write back.
        for text in [
            r#"[{"t": 1, "values": {"g": 0.125}}, {"t":2,"values":{"g":null}}]"#,
            r#"[{"t":1e15,"values":{"g":[1e-7,5E2,-0.000001234]}}]"#,
            r#"[{"t":"2026-12-03T04:00:00\u002B01:00","values":{"g":10000000000000001.0}}]"#,
            r#"[{"t":123456789012345678901234,"values":{"g":1.0}}]"#,
        ] {
            let v: serde_json::Value = serde_json::from_str(text).unwrap();
            let written = serde_json::to_vec(&v).unwrap().len() as u64;
            let bound = echo_bytes(text);
            assert!(bound >= written, "{text}: {bound} < {written}");
            assert!(bound <= written + 96, "{text}: {bound} vs {written}");
        }
    }
}
