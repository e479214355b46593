//! An ensemble over a family model (issue 13): members stored one after another
//! (`N × n`), forecast in parallel with the classical RK4 step, analysed with the local
//! ensemble transform ([`LocalTransform`]), and summarised as a mean and a spread per
//! state (a full `n × n` covariance is never formed).
//!
//! The forecast splits the members into as many groups as there are RK4 buffer sets
//! (one per thread present at construction, never more than the members); each member's
//! step reads only its own state and overwrites the buffers it uses, so the bits do not
//! depend on which group or thread runs it.

use super::local::{LocalReadings, LocalSettings, LocalTransform};
use crate::dynamics::{FamilyRates, FamilyRk4};
use crate::filter::FilterError;
use rayon::prelude::*;

/// Members of a family model with their forecast and analysis buffers.
#[derive(Debug, Clone)]
pub struct FamilyEnsemble {
    rates: FamilyRates,
    n: usize,
    nn: usize,
    ens: Vec<f64>,
    steppers: Vec<FamilyRk4>,
    local: LocalTransform,
    hx: Vec<f64>,
}

impl FamilyEnsemble {
    /// An ensemble of `members` over `rates` starting from `ens` (`ens[j * n + s]`),
    /// analysed with `settings` and up to `max_readings` readings per analysis. Every
    /// family must have the same size (distances are element indices); the boundary of
    /// the first decides whether distances wrap.
    ///
    /// # Panics
    /// If `ens` is not `members × n` long (a caller bug).
    pub fn new(
        rates: FamilyRates,
        ens: Vec<f64>,
        members: usize,
        settings: LocalSettings,
        max_readings: usize,
    ) -> FamilyEnsemble {
        let n = rates.set.n();
        assert_eq!(ens.len(), n * members, "family ensemble: members × states");
        let first = &rates.set.shapes[0];
        let periodic = first.boundary == crate::formula::Boundary::Periodic;
        let groups = rayon::current_num_threads().clamp(1, members.max(1));
        let steppers = (0..groups).map(|_| FamilyRk4::new(&rates)).collect();
        let local = LocalTransform::new(n, first.size, periodic, members, max_readings, settings);
        FamilyEnsemble {
            n,
            nn: members,
            ens,
            steppers,
            local,
            hx: vec![0.0; max_readings * members],
            rates,
        }
    }

    /// Number of states.
    pub fn n(&self) -> usize {
        self.n
    }

    /// Number of members.
    pub fn members(&self) -> usize {
        self.nn
    }

    /// The members, `[j * n + s]`.
    pub fn ensemble(&self) -> &[f64] {
        &self.ens
    }

    /// Move every member from `t` to `t + h` by one RK4 step, members in parallel.
    pub fn forecast(&mut self, t: f64, h: f64) -> Result<(), FilterError> {
        let (n, rates) = (self.n, &self.rates);
        let per = self.nn.div_ceil(self.steppers.len());
        self.ens
            .par_chunks_mut(per * n)
            .zip(self.steppers.par_iter_mut())
            .for_each(|(group, rk)| {
                for x in group.chunks_mut(n) {
                    rk.step(rates, x, t, h);
                }
            });
        if self.ens.iter().all(|x| x.is_finite()) {
            Ok(())
        } else {
            Err(FilterError::NonFinite("family forecast"))
        }
    }

    /// The local analysis with `readings`, each of which reads one state directly.
    pub fn analyse(&mut self, readings: &LocalReadings) -> Result<(), FilterError> {
        let (n, nn) = (self.n, self.nn);
        for (l, &s) in readings.state.iter().enumerate() {
            for j in 0..nn {
                self.hx[l * nn + j] = self.ens[j * n + s];
            }
        }
        self.local.analyse(&mut self.ens, readings, &self.hx)
    }

    /// The members' mean of each state into `mean` and their sample standard deviation
    /// (divisor `N − 1`) into `std`.
    pub fn mean_std(&self, mean: &mut [f64], std: &mut [f64]) {
        let (n, nn) = (self.n, self.nn);
        mean[..n].fill(0.0);
        for j in 0..nn {
            for (m, &x) in mean.iter_mut().zip(&self.ens[j * n..(j + 1) * n]) {
                *m += x;
            }
        }
        for m in mean[..n].iter_mut() {
            *m /= nn as f64;
        }
        std[..n].fill(0.0);
        for j in 0..nn {
            for ((v, &m), &x) in std.iter_mut().zip(mean.iter()).zip(&self.ens[j * n..]) {
                *v += (x - m) * (x - m);
            }
        }
        for v in std[..n].iter_mut() {
            *v = (*v / (nn as f64 - 1.0).max(1.0)).sqrt();
        }
    }
}
