//! Hand-written JSON output for estimates, posteriors and summaries: names are escaped once
//! per request, numbers go through `zmij` (shortest round-trip form, so a posterior sent back
//! as a prior is read to the same bits), and nothing is built as a tree first.

use crate::diagnostics::nis::NisSummary;
use crate::diagnostics::warnings::Warning;
use crate::filter::observe::ObsSpace;
use crate::filter::run::Run;
use crate::model::{CovarianceOutput, Model, OutputConfig, Running};
use crate::model::{Instant, TimeMode};
use nalgebra::{DMatrix, DVector};

/// Writes the pieces of responses for one model.
pub struct Writer {
    state_keys: Vec<Vec<u8>>,
    sensor_keys: Vec<Vec<u8>>,
    input_keys: Vec<Vec<u8>>,
    states_json: Vec<u8>,
    mode: TimeMode,
    out: OutputConfig,
}

fn key(name: &str) -> Vec<u8> {
    let mut v = serde_json::to_vec(name).unwrap_or_default();
    v.push(b':');
    v
}

/// Append a finite number (callers have checked finiteness; a stray non-finite becomes null).
pub fn num(buf: &mut Vec<u8>, x: f64) {
    if x.is_finite() {
        let mut b = zmij::Buffer::new();
        buf.extend_from_slice(b.format_finite(x).as_bytes());
    } else {
        buf.extend_from_slice(b"null");
    }
}

impl Writer {
    /// A writer for `model`'s names, times in `mode`, with response options `out`.
    pub fn new(model: &Model, mode: TimeMode, out: OutputConfig) -> Self {
        Self {
            state_keys: model.states.iter().map(|s| key(s)).collect(),
            sensor_keys: model.sensors.iter().map(|s| key(&s.name)).collect(),
            input_keys: model.inputs.iter().map(|s| key(s)).collect(),
            states_json: serde_json::to_vec(&model.states).unwrap_or_default(),
            mode,
            out,
        }
    }

    /// The response options.
    pub fn output(&self) -> &OutputConfig {
        &self.out
    }

    /// `"states":[...]`
    pub fn states(&self, buf: &mut Vec<u8>) {
        buf.extend_from_slice(b"\"states\":");
        buf.extend_from_slice(&self.states_json);
    }

    /// A time in the request's form; a timestamp as it was written (its own offset, or
    /// none for a wall-clock time read in the request's `time_zone`).
    pub fn time(&self, buf: &mut Vec<u8>, t: &Instant) {
        match self.mode {
            TimeMode::Seconds => num(buf, t.secs),
            TimeMode::Stamp => {
                buf.push(b'"');
                t.write_stamp(buf);
                buf.push(b'"');
            }
        }
    }

    fn vector(&self, buf: &mut Vec<u8>, keys: &[Vec<u8>], v: impl Iterator<Item = f64>) {
        buf.push(b'{');
        for (i, (k, x)) in keys.iter().zip(v).enumerate() {
            if i > 0 {
                buf.push(b',');
            }
            buf.extend_from_slice(k);
            num(buf, x);
        }
        buf.push(b'}');
    }

    fn matrix(&self, buf: &mut Vec<u8>, m: &DMatrix<f64>) {
        buf.push(b'[');
        for i in 0..m.nrows() {
            if i > 0 {
                buf.push(b',');
            }
            buf.push(b'[');
            for j in 0..m.ncols() {
                if j > 0 {
                    buf.push(b',');
                }
                num(buf, m[(i, j)]);
            }
            buf.push(b']');
        }
        buf.push(b']');
    }

    /// A square `n × n` matrix stored by columns (as nalgebra stores it), as rows. A
    /// covariance is symmetric, so an entry below the diagonal whose bits equal its mirror
    /// above is copied from the mirror's text instead of being formatted again (the same
    /// bytes either way; an entry that differs in any bit is formatted on its own).
    fn square(&self, buf: &mut Vec<u8>, m: &[f64], n: usize) {
        // Where each entry above the diagonal was written, for models of up to this many
        // states (the array lives on the stack); larger ones format every entry.
        const MIRROR_UP_TO: usize = 8;
        // Entry (i, j), i < j, at `tri(i, j)`, as offsets from the matrix's first byte (a
        // matrix of at most 64 numbers is far shorter than 64 kB): small enough to be
        // zeroed in registers for every estimate, not by a call to memset.
        let tri = |i: usize, j: usize| j * (j - 1) / 2 + i;
        let mut spans = [(0u16, 0u16); MIRROR_UP_TO * (MIRROR_UP_TO - 1) / 2];
        let mirror = n <= MIRROR_UP_TO;
        let start = buf.len();
        buf.push(b'[');
        for i in 0..n {
            if i > 0 {
                buf.push(b',');
            }
            buf.push(b'[');
            for j in 0..n {
                if j > 0 {
                    buf.push(b',');
                }
                let x = m[i + j * n];
                if mirror && j < i && x.to_bits() == m[j + i * n].to_bits() {
                    let (from, to) = spans[tri(j, i)];
                    buf.extend_from_within(start + from as usize..start + to as usize);
                } else {
                    let from = buf.len() - start;
                    num(buf, x);
                    if mirror && j > i {
                        spans[tri(i, j)] = (from as u16, (buf.len() - start) as u16);
                    }
                }
            }
            buf.push(b']');
        }
        buf.push(b']');
    }

    /// One estimate object; `obs` carries the innovations of the line's update, if any.
    pub fn estimate(
        &self,
        buf: &mut Vec<u8>,
        t: &Instant,
        mean: &DVector<f64>,
        cov: &DMatrix<f64>,
        obs: Option<&ObsSpace>,
    ) {
        self.estimate_open(buf, t, mean, cov);
        if let Some(obs) = obs {
            self.innovations(buf, obs);
        }
        buf.push(b'}');
    }

    /// One estimate object with innovations already written by [`Writer::innovations`]
    /// (the smoother reports the forward filter's innovations).
    pub fn estimate_with(
        &self,
        buf: &mut Vec<u8>,
        t: &Instant,
        mean: &DVector<f64>,
        cov: &DMatrix<f64>,
        innovations: &[u8],
    ) {
        self.estimate_open(buf, t, mean, cov);
        buf.extend_from_slice(innovations);
        buf.push(b'}');
    }

    fn estimate_open(
        &self,
        buf: &mut Vec<u8>,
        t: &Instant,
        mean: &DVector<f64>,
        cov: &DMatrix<f64>,
    ) {
        self.estimate_head(buf, t, mean.as_slice(), cov.as_slice());
    }

    /// `{"t":..,"mean":..,"std":..,"covariance":..` of one estimate (without its closing
    /// brace), from the mean and the covariance stored by columns.
    pub fn estimate_head(&self, buf: &mut Vec<u8>, t: &Instant, mean: &[f64], cov: &[f64]) {
        let n = mean.len();
        buf.extend_from_slice(b"{\"t\":");
        self.time(buf, t);
        buf.extend_from_slice(b",\"mean\":");
        self.vector(buf, &self.state_keys, mean.iter().copied());
        if self.out.covariance != CovarianceOutput::None {
            buf.extend_from_slice(b",\"std\":");
            self.vector(
                buf,
                &self.state_keys,
                (0..n).map(|i| cov[i + i * n].max(0.0).sqrt()),
            );
        }
        if self.out.covariance == CovarianceOutput::Full {
            buf.extend_from_slice(b",\"covariance\":");
            self.square(buf, cov, n);
        }
    }

    /// `,"innovations":{...}` for the sensors read on the line (nothing when none were read
    /// or innovations are switched off).
    pub fn innovations(&self, buf: &mut Vec<u8>, obs: &ObsSpace) {
        if !self.wants_innovations(obs) {
            return;
        }
        let m = obs.m;
        for (i, ck) in obs.checks.iter().enumerate() {
            let rows = ck.row..ck.row + ck.dim;
            self.innovation(
                buf,
                i == 0,
                ck.sensor,
                rows.clone().map(|r| obs.nu[r]),
                rows.map(|r| obs.s[r + r * m]),
                ck.nis,
                ck.accepted,
            );
        }
        buf.push(b'}');
    }

    /// Whether [`Writer::innovations`] writes anything for `obs`.
    pub fn wants_innovations(&self, obs: &ObsSpace) -> bool {
        self.out.innovations && !obs.checks.is_empty()
    }

    /// One sensor's entry of `"innovations"`; the first one opens the object (the caller
    /// closes it). `variances` are the diagonal of S, reported as standard deviations.
    #[allow(clippy::too_many_arguments)]
    pub fn innovation(
        &self,
        buf: &mut Vec<u8>,
        first: bool,
        sensor: usize,
        innovations: impl ExactSizeIterator<Item = f64>,
        variances: impl ExactSizeIterator<Item = f64>,
        nis: f64,
        accepted: bool,
    ) {
        buf.extend_from_slice(if first { b",\"innovations\":{" } else { b"," });
        buf.extend_from_slice(&self.sensor_keys[sensor]);
        buf.extend_from_slice(b"{\"innovation\":");
        self.scalar_or_list(buf, innovations);
        buf.extend_from_slice(b",\"innovation_std\":");
        self.scalar_or_list(buf, variances.map(|v| v.max(0.0).sqrt()));
        buf.extend_from_slice(b",\"nis\":");
        num(buf, nis);
        buf.extend_from_slice(if accepted {
            b",\"accepted\":true}"
        } else {
            b",\"accepted\":false}"
        });
    }

    fn scalar_or_list(&self, buf: &mut Vec<u8>, xs: impl ExactSizeIterator<Item = f64>) {
        if xs.len() == 1 {
            for x in xs {
                num(buf, x);
            }
            return;
        }
        buf.push(b'[');
        for (i, x) in xs.enumerate() {
            if i > 0 {
                buf.push(b',');
            }
            num(buf, x);
        }
        buf.push(b']');
    }

    /// `"posterior":{...}` of `run`: full covariance always, so it can be sent back
    /// exactly, and the chain's `running` tallies.
    pub fn posterior(&self, buf: &mut Vec<u8>, run: &Run) {
        let est = run.estimator();
        self.posterior_parts(
            buf,
            &run.time(),
            est.mean(),
            est.covariance(),
            est.members(),
            est.step(),
            run.inputs(),
            &run.running(),
            run.in_a_row(),
        );
    }

    /// [`Writer::posterior`] from its parts (a stream's last good state).
    #[allow(clippy::too_many_arguments)]
    pub fn posterior_parts(
        &self,
        buf: &mut Vec<u8>,
        t: &Instant,
        mean: &DVector<f64>,
        cov: &DMatrix<f64>,
        members: Option<&DMatrix<f64>>,
        step: u64,
        inputs: &DVector<f64>,
        r: &Running,
        in_a_row: impl Iterator<Item = u64>,
    ) {
        buf.extend_from_slice(b"\"posterior\":{\"t\":");
        self.time(buf, t);
        buf.extend_from_slice(b",\"mean\":");
        self.vector(buf, &self.state_keys, mean.iter().copied());
        buf.extend_from_slice(b",\"covariance\":");
        self.square(buf, cov.as_slice(), cov.nrows());
        if !self.input_keys.is_empty() {
            buf.extend_from_slice(b",\"inputs\":");
            self.vector(buf, &self.input_keys, inputs.iter().copied());
        }
        if let Some(x) = members {
            buf.extend_from_slice(b",\"members\":");
            self.matrix(buf, x);
            buf.extend_from_slice(b",\"step\":");
            buf.extend_from_slice(itoa::Buffer::new().format(step).as_bytes());
        }
        buf.extend_from_slice(b",\"running\":{\"readings\":");
        buf.extend_from_slice(itoa::Buffer::new().format(r.readings).as_bytes());
        buf.extend_from_slice(b",\"nis_sum\":");
        num(buf, r.nis_sum);
        buf.extend_from_slice(b",\"dof_sum\":");
        buf.extend_from_slice(itoa::Buffer::new().format(r.dof_sum).as_bytes());
        buf.extend_from_slice(b",\"log_likelihood\":");
        num(buf, r.log_likelihood);
        buf.extend_from_slice(b",\"judged\":");
        buf.extend_from_slice(itoa::Buffer::new().format(r.judged).as_bytes());
        buf.extend_from_slice(b",\"refused\":");
        buf.extend_from_slice(itoa::Buffer::new().format(r.refused).as_bytes());
        buf.extend_from_slice(b",\"refused_again\":");
        buf.extend_from_slice(itoa::Buffer::new().format(r.refused_again).as_bytes());
        buf.extend_from_slice(b",\"in_a_row\":{");
        for (s, k) in in_a_row.enumerate() {
            if s > 0 {
                buf.push(b',');
            }
            buf.extend_from_slice(&self.sensor_keys[s]);
            buf.extend_from_slice(itoa::Buffer::new().format(k).as_bytes());
        }
        buf.extend_from_slice(b"}}}");
    }

    /// `"summary":{...}`.
    pub fn summary(&self, buf: &mut Vec<u8>, run: &Run) {
        #[derive(serde::Serialize)]
        struct Summary {
            steps: u64,
            updates: u64,
            rejected: u64,
            #[serde(skip_serializing_if = "is_zero")]
            skipped: u64,
            log_likelihood: f64,
            nis: NisSummary,
            /// Only when some parameter has bounds: how they were kept (`filter::bounds`).
            #[serde(skip_serializing_if = "Option::is_none")]
            bounds: Option<BoundsSummary>,
        }
        #[derive(serde::Serialize)]
        struct BoundsSummary {
            method: crate::filter::bounds::BoundsMethod,
            applied: u64,
        }
        fn is_zero(x: &u64) -> bool {
            *x == 0
        }
        let counts = &run.counts;
        let warnings = run.final_warnings();
        buf.extend_from_slice(b"\"summary\":");
        let s = Summary {
            steps: counts.steps,
            updates: counts.updates,
            rejected: counts.rejected,
            skipped: counts.skipped,
            log_likelihood: counts.log_likelihood,
            nis: run.nis_summary(),
            bounds: counts.bounds.method.map(|method| BoundsSummary {
                method,
                applied: counts.bounds.applied,
            }),
        };
        buf.extend_from_slice(&serde_json::to_vec(&s).unwrap_or_default());
        // The warnings go inside the object just written: drop its closing brace.
        buf.pop();
        buf.extend_from_slice(b",\"warnings\":[");
        for (i, w) in warnings.list().iter().enumerate() {
            if i > 0 {
                buf.push(b',');
            }
            self.warning(buf, w);
        }
        buf.extend_from_slice(b"]}");
    }

    /// One entry of `summary.warnings`: `{kind, sensor?, state?, at_t, count, detail}`.
    fn warning(&self, buf: &mut Vec<u8>, w: &Warning) {
        buf.extend_from_slice(b"{\"kind\":");
        buf.extend_from_slice(&serde_json::to_vec(&w.kind).unwrap_or_default());
        if let Some(s) = w.sensor {
            buf.extend_from_slice(b",\"sensor\":");
            buf.extend_from_slice(&self.sensor_keys[s][..self.sensor_keys[s].len() - 1]);
        }
        if let Some(s) = w.state {
            buf.extend_from_slice(b",\"state\":");
            buf.extend_from_slice(&self.state_keys[s][..self.state_keys[s].len() - 1]);
        }
        buf.extend_from_slice(b",\"at_t\":");
        self.time(buf, &w.at);
        buf.extend_from_slice(b",\"count\":");
        buf.extend_from_slice(itoa::Buffer::new().format(w.count).as_bytes());
        buf.extend_from_slice(b",\"detail\":");
        buf.extend_from_slice(&serde_json::to_vec(&w.detail).unwrap_or_default());
        buf.push(b'}');
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::model::OutputConfig;

    fn square_text(m: &[f64], n: usize) -> String {
        let w = Writer {
            state_keys: Vec::new(),
            sensor_keys: Vec::new(),
            input_keys: Vec::new(),
            states_json: Vec::new(),
            mode: TimeMode::Seconds,
            out: OutputConfig::default(),
        };
        let mut buf = b"prefix".to_vec();
        w.square(&mut buf, m, n);
        String::from_utf8(buf).unwrap()
    }

    #[test]
    fn a_square_matrix_is_written_by_rows_with_mirrored_entries_copied() {
        // Stored by columns: m[i + j n] is row i, column j. zmij writes a positive
        // exponent with its sign (1e+300), JSON either way.
        let m = [1.0, 0.25, -3e-7, 0.25, 2.0, 1e300, -3e-7, 1e300, 3.5];
        assert_eq!(
            square_text(&m, 3),
            "prefix[[1.0,0.25,-3e-7],[0.25,2.0,1e+300],[-3e-7,1e+300,3.5]]"
        );
        // An entry that differs from its mirror in the last bit is formatted on its own:
        // 0.1 and the next double up, 0.10000000000000002 (shortest round-trip forms,
        // common practice).
        let a = 0.1f64;
        let b = f64::from_bits(a.to_bits() + 1);
        assert_eq!(
            square_text(&[1.0, a, b, 2.0], 2),
            "prefix[[1.0,0.10000000000000002],[0.1,2.0]]"
        );
        // The largest mirrored size and one past it, read back by serde_json: every entry
        // must be its own value, whichever mirror it was copied from.
        for n in [8usize, 9] {
            let m: Vec<f64> = (0..n * n)
                .map(|k| {
                    let (i, j) = (k % n, k / n);
                    (i + j) as f64 + 0.1 * (i * j) as f64 + 1e-3 * (i == j) as u8 as f64
                })
                .collect();
            let text = square_text(&m, n);
            let back: Vec<Vec<f64>> = serde_json::from_str(&text["prefix".len()..]).unwrap();
            for (i, row) in back.iter().enumerate() {
                for (j, v) in row.iter().enumerate() {
                    assert_eq!(*v, m[i + j * n], "({i}, {j}) of {n}");
                }
            }
        }
    }
}
