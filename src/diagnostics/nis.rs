//! Running NIS statistics of a run and the one-word consistency verdict.
//!
//! Over K updates of dimensions m_k the sum of NIS values is χ² with Σ m_k degrees of
//! freedom when the filter is consistent, so the mean NIS has the two-sided 95 % interval
//! [χ²_{0.025}(Σm)/K, χ²_{0.975}(Σm)/K] (Bar-Shalom, Li, Kirubarajan 2001, §5.4.2).
//!
//! Refused readings count too, by how they come. Behind a gate of probability p, a
//! consistent filter refuses each judged reading with probability 1 − p, and its
//! innovations are white (independent from step to step; Bar-Shalom et al. 2001, §5.4.2),
//! so a reading is refused right after the same sensor's previous reading was refused
//! with probability (1 − p)². An overconfident filter refuses in runs: its error persists
//! from step to step, so once a reading is refused the next one is likely refused too (a
//! locked-out sensor, a sensor that changed its units). An isolated glitch, refused once
//! between accepted readings, says nothing against the filter's spread: that is what a gate
//! is for. So the test counts the refusals that followed a refusal of the same sensor, A,
//! out of J judged readings, against Binomial(J, (1 − p)²): when at least A is less likely
//! than 0.1 %, P(X ≥ A) = I_{(1−p)²}(A, J − A + 1) (the regularised incomplete beta
//! function; any statistics text, common practice), the verdict is `overconfident`
//! whatever the accepted readings' NIS says. The pairs overlap and so are not quite
//! independent; for rare refusals their count is close to Poisson with the same mean (the
//! law of rare events, common practice), which the binomial with J ≥ the number of pairs
//! matches or errs above. Runs carry across the requests of a chain
//! (`posterior.running.in_a_row`), so a dashboard posting one reading at a time is judged
//! as one long run would be.

use crate::diagnostics::chi2;
use serde::Serialize;
use statrs::function::beta::beta_reg;

/// Accumulates NIS values in constant memory.
#[derive(Debug, Clone, Copy, Default, PartialEq)]
pub struct NisTally {
    /// Number of updates.
    pub count: u64,
    /// Sum of NIS values.
    pub sum: f64,
    /// Sum of their degrees of freedom.
    pub dof: u64,
}

/// The binomial tail below which the gate's repeated refusals make the verdict
/// `overconfident`.
pub const REFUSAL_LEVEL: f64 = 1e-3;

/// What the gate did: readings judged, and how many were refused right after the same
/// sensor's previous refusal, at gate probability `p`.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Refusals {
    /// Gate probability.
    pub p: f64,
    /// Sensor readings judged by the gate.
    pub judged: u64,
    /// Of those, refused right after the same sensor's previous reading was refused.
    pub again: u64,
}

impl Refusals {
    /// P(X ≥ again) for X ~ Binomial(judged, (1 − p)²): how likely this many repeated
    /// refusals or more are from a consistent filter.
    pub fn tail_probability(&self) -> f64 {
        if self.again == 0 {
            return 1.0;
        }
        let (k, n) = (self.again as f64, self.judged as f64);
        let q = 1.0 - self.p;
        beta_reg(k, n - k + 1.0, q * q)
    }

    /// Whether the repeated refusals alone show the filter overconfident (tail below
    /// [`REFUSAL_LEVEL`]).
    pub fn too_many(&self) -> bool {
        self.again > 0 && self.tail_probability() < REFUSAL_LEVEL
    }
}

/// The `summary.nis` object.
#[derive(Debug, Clone, Serialize, PartialEq)]
pub struct NisSummary {
    /// Mean NIS over the updates (null when there were none).
    pub mean: Option<f64>,
    /// Mean NIS over every judged reading, refused ones included (null without readings).
    pub all_mean: Option<f64>,
    /// Mean degrees of freedom per update (the expected mean NIS).
    pub dof: f64,
    /// Lower two-sided 95 % bound of the mean NIS.
    pub lower_95: Option<f64>,
    /// Upper two-sided 95 % bound of the mean NIS.
    pub upper_95: Option<f64>,
    /// `consistent`, `overconfident` (NIS too large, or more readings refused in runs than
    /// the gate explains), `underconfident` (NIS too small), or `no_data` when no reading
    /// updated the filter and none was refused.
    pub verdict: &'static str,
    /// The same verdict over every request of a chain (`posterior.running`).
    pub running_verdict: &'static str,
}

impl NisTally {
    /// Record one update's NIS and dimension.
    pub fn add(&mut self, nis: f64, dim: usize) {
        self.count += 1;
        self.sum += nis;
        self.dof += dim as u64;
    }

    /// The summary of the accepted readings' tally `self`, with `all` the tally over every
    /// judged reading, `refusals` what the gate did (`None` without a gate) and
    /// `running_verdict` the chain's verdict. With no updates and no refusals there is
    /// nothing to judge: the verdict is `no_data` and the figures null (saying
    /// `consistent` there would vouch for a filter no reading has tested).
    pub fn summary(
        &self,
        all: &NisTally,
        refusals: Option<Refusals>,
        running_verdict: &'static str,
    ) -> NisSummary {
        let all_mean = (all.count > 0).then(|| all.sum / all.count as f64);
        // The chi-square quantiles once, for the verdict and the figures alike.
        let bounds = self.bounds();
        let verdict = self.judge(refusals, bounds);
        let Some((lower, upper)) = bounds else {
            return NisSummary {
                mean: None,
                all_mean,
                dof: 0.0,
                lower_95: None,
                upper_95: None,
                verdict,
                running_verdict,
            };
        };
        let k = self.count as f64;
        NisSummary {
            mean: Some(self.sum / k),
            all_mean,
            dof: self.dof as f64 / k,
            lower_95: Some(lower),
            upper_95: Some(upper),
            verdict,
            running_verdict,
        }
    }

    /// The two-sided 95 % interval of the mean NIS (`None` without updates).
    fn bounds(&self) -> Option<(f64, f64)> {
        if self.count == 0 {
            return None;
        }
        let (k, dof) = (self.count as f64, self.dof as f64);
        Some((
            chi2::quantile(0.025, dof) / k,
            chi2::quantile(0.975, dof) / k,
        ))
    }

    /// The one-word verdict of this tally of accepted readings and the gate's refusals.
    pub fn verdict(&self, refusals: Option<Refusals>) -> &'static str {
        self.judge(refusals, self.bounds())
    }

    /// [`NisTally::verdict`] with the interval already computed.
    fn judge(&self, refusals: Option<Refusals>, bounds: Option<(f64, f64)>) -> &'static str {
        if refusals.is_some_and(|r| r.too_many()) {
            return "overconfident";
        }
        let Some((lower, upper)) = bounds else {
            return "no_data";
        };
        let mean = self.sum / self.count as f64;
        if mean > upper {
            "overconfident"
        } else if mean < lower {
            "underconfident"
        } else {
            "consistent"
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn zero_updates_give_the_verdict_no_data() {
        let s = NisTally::default().summary(&NisTally::default(), None, "no_data");
        assert_eq!(s.verdict, "no_data");
        assert_eq!((s.mean, s.lower_95, s.upper_95), (None, None, None));
    }

    #[test]
    fn one_update_at_its_expected_value_is_consistent() {
        // One scalar update with NIS 1 (the mean of chi-square with 1 dof) lies inside the
        // two-sided 95 % interval [0.000982, 5.024] (NIST/SEMATECH e-Handbook §1.3.6.7.4
        // tabulates 0.001 and 5.024; the lower bound's further digits are from memory).
        let mut t = NisTally::default();
        t.add(1.0, 1);
        let s = t.summary(&t, None, "consistent");
        assert_eq!(s.verdict, "consistent");
        assert!((s.lower_95.unwrap() - 0.000982).abs() < 1e-6);
        assert!((s.upper_95.unwrap() - 5.024).abs() < 1e-3);
    }

    #[test]
    fn repeated_refusals_beyond_what_the_gate_explains_make_the_verdict_overconfident() {
        // A gate at p = 0.999 refuses a consistent filter's reading right after a refused
        // one with probability 0.001² = 1e-6. P(X ≥ 1) for X ~ Binomial(1000, 1e-6) is
        // 1 − (1 − 1e-6)^1000 (closed form, common practice): about 1e-3.
        let one = Refusals {
            p: 0.999,
            judged: 1000,
            again: 1,
        };
        let closed = 1.0 - (1.0 - 1e-6f64).powi(1000);
        assert!((one.tail_probability() - closed).abs() < 1e-12);
        // P(X ≥ 2) = 1 − (1−q)^1000 − 1000·q·(1−q)^999 with q = 1e-6 (closed form; about
        // 5e-7, so the difference of near-equal terms is compared to 1e-6 relative).
        let q = 1e-6f64;
        let two = Refusals { again: 2, ..one };
        let closed2 = 1.0 - (1.0 - q).powi(1000) - 1000.0 * q * (1.0 - q).powi(999);
        assert!((two.tail_probability() / closed2 - 1.0).abs() < 1e-6);
        assert!(two.too_many());
        // Isolated glitches, each refused once between accepted readings, never repeat:
        // however many, they do not turn the verdict.
        let glitches = Refusals { again: 0, ..one };
        assert_eq!(glitches.tail_probability(), 1.0);
        assert!(!glitches.too_many());
        // The cart that locked out: 562 of 1105 refused, 561 of them right after another.
        // However good the accepted readings' NIS, the verdict is overconfident.
        let mut acc = NisTally::default();
        for _ in 0..543 {
            acc.add(1.0, 1);
        }
        assert_eq!(acc.verdict(None), "consistent");
        let lockout = Refusals {
            p: 0.999,
            judged: 1105,
            again: 561,
        };
        assert!(lockout.tail_probability() < 1e-100);
        assert_eq!(acc.verdict(Some(lockout)), "overconfident");
        // Two readings, both refused behind a 0.99 gate (a sensor that switched units):
        // one repeat out of two, P(X ≥ 1) = 1 − (1 − 1e-4)² ≈ 2e-4 < 1e-3: not `no_data`.
        let all = Refusals {
            p: 0.99,
            judged: 2,
            again: 1,
        };
        assert!((all.tail_probability() - (1.0 - (1.0 - 1e-4f64).powi(2))).abs() < 1e-12);
        assert_eq!(NisTally::default().verdict(Some(all)), "overconfident");
    }
}
