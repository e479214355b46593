//! Compact records of filtered steps: what one estimate line of a batch answer needs (time,
//! mean, covariance, innovations), copied out of the filter's buffers as plain numbers.
//!
//! They exist so a large batch can be filtered on one thread and written as JSON on
//! another: the filtering thread fills a [`Records`] block, hands it over, and takes back
//! an emptied one, so blocks are reused and no step allocates. A small batch fills and
//! writes the same blocks on one thread, so both ways go through the same writing code
//! and give the same bytes.

use crate::filter::observe::ObsSpace;
use crate::job::write::Writer;
use crate::model::Instant;
use nalgebra::{DMatrix, DVector};

/// One step's place in a block.
#[derive(Debug, Clone, Copy)]
struct Head {
    t: Instant,
    /// Sensors with innovations to report (0: no `"innovations"` member).
    checks: usize,
}

/// One sensor's innovation check; its innovation vector and the diagonal of S follow the
/// step's numbers.
#[derive(Debug, Clone, Copy)]
struct Check {
    sensor: usize,
    dim: usize,
    nis: f64,
    accepted: bool,
}

/// A block of consecutive steps of one run.
#[derive(Debug, Clone)]
pub struct Records {
    n: usize,
    capacity: usize,
    heads: Vec<Head>,
    checks: Vec<Check>,
    /// Per step: the mean (n), the covariance by columns (n²), then per check its
    /// innovations (dim) and the diagonal of S (dim).
    nums: Vec<f64>,
}

impl Records {
    /// An empty block for `capacity` steps of a model with `n` states and `rows` stacked
    /// reading rows at most per line; its buffers are reserved once here.
    pub fn new(n: usize, rows: usize, sensors: usize, capacity: usize) -> Self {
        let capacity = capacity.max(1);
        Self {
            n,
            capacity,
            heads: Vec::with_capacity(capacity),
            checks: Vec::with_capacity(capacity * sensors.max(1)),
            nums: Vec::with_capacity(capacity * (n + n * n + 2 * rows)),
        }
    }

    /// Steps per block for a model of `n` states and `rows` reading rows: about half a
    /// megabyte of numbers, so a block is worth a hand-over but stays in cache.
    pub fn block_steps(n: usize, rows: usize) -> usize {
        (65_536 / (1 + n + n * n + 2 * rows)).clamp(16, 4096)
    }

    /// Steps held.
    pub fn len(&self) -> usize {
        self.heads.len()
    }

    /// True when no step is held.
    pub fn is_empty(&self) -> bool {
        self.heads.is_empty()
    }

    /// True when the block holds as many steps as it was made for.
    pub fn is_full(&self) -> bool {
        self.heads.len() >= self.capacity
    }

    /// Forget every step, keeping the buffers.
    pub fn clear(&mut self) {
        self.heads.clear();
        self.checks.clear();
        self.nums.clear();
    }

    /// Copy one step out of the filter: its time, belief and, when `writer` reports them
    /// for this line, the innovations in `obs`.
    pub fn push(
        &mut self,
        writer: &Writer,
        t: &Instant,
        mean: &DVector<f64>,
        cov: &DMatrix<f64>,
        obs: Option<&ObsSpace>,
    ) {
        debug_assert_eq!(mean.len(), self.n);
        self.nums.extend_from_slice(mean.as_slice());
        self.nums.extend_from_slice(cov.as_slice());
        let mut checks = 0;
        if let Some(obs) = obs.filter(|o| writer.wants_innovations(o)) {
            let m = obs.m;
            for ck in &obs.checks {
                let rows = ck.row..ck.row + ck.dim;
                self.nums.extend(rows.clone().map(|r| obs.nu[r]));
                self.nums.extend(rows.map(|r| obs.s[r + r * m]));
                self.checks.push(Check {
                    sensor: ck.sensor,
                    dim: ck.dim,
                    nis: ck.nis,
                    accepted: ck.accepted,
                });
                checks += 1;
            }
        }
        self.heads.push(Head { t: *t, checks });
    }

    /// Append every step as an estimate object, comma separated; `first` says whether the
    /// block starts the `"estimates"` array (no comma before its first object).
    pub fn write(&self, writer: &Writer, buf: &mut Vec<u8>, first: bool) {
        let n = self.n;
        let (mut at, mut ck) = (0, 0);
        for (i, h) in self.heads.iter().enumerate() {
            if i > 0 || !first {
                buf.push(b',');
            }
            let mean = &self.nums[at..at + n];
            let cov = &self.nums[at + n..at + n + n * n];
            at += n + n * n;
            writer.estimate_head(buf, &h.t, mean, cov);
            for (j, c) in self.checks[ck..ck + h.checks].iter().enumerate() {
                let innovations = &self.nums[at..at + c.dim];
                let variances = &self.nums[at + c.dim..at + 2 * c.dim];
                at += 2 * c.dim;
                writer.innovation(
                    buf,
                    j == 0,
                    c.sensor,
                    innovations.iter().copied(),
                    variances.iter().copied(),
                    c.nis,
                    c.accepted,
                );
            }
            if h.checks > 0 {
                buf.push(b'}');
            }
            ck += h.checks;
            buf.push(b'}');
        }
    }
}
