//! Running NIS statistics of a run and the one-word consistency verdict.
//!
//! Over K updates of dimensions m_k the sum of NIS values is χ² with Σ m_k degrees of
//! freedom when the filter is consistent, so the mean NIS has the two-sided 95 % interval
//! [χ²_{0.025}(Σm)/K, χ²_{0.975}(Σm)/K] (Bar-Shalom, Li, Kirubarajan 2001, §5.4.2).
//!
//! Refused readings count too. Behind a gate of probability p, a consistent filter refuses
//! each judged reading with probability 1 − p, so out of J judged readings the number
//! refused is Binomial(J, 1 − p). When at least the refused count R is less likely than
//! 0.1 % under that law, P(X ≥ R) = I_{1−p}(R, J − R + 1) (the regularised incomplete beta
//! function; any statistics text, common practice), the verdict is `overconfident`
//! whatever the accepted readings' NIS says: a filter that locks a sensor out or refuses
//! a sensor that changed its units must not look consistent because the readings that
//! would show it were left out. The level is stricter than the NIS bounds' 2.5 % on
//! purpose: a gate is there to refuse the odd glitch that no noise model describes, and
//! one refused glitch among ten readings (a tail of 1 %) must not turn the verdict, while
//! a lock-out (hundreds refused, a tail far below 1e-100) must.

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

/// The binomial tail below which the gate's refusals make the verdict `overconfident`.
pub const REFUSAL_LEVEL: f64 = 1e-3;

/// What the gate did: readings judged and refused, at gate probability `p`.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct Refusals {
    /// Gate probability.
    pub p: f64,
    /// Sensor readings judged by the gate.
    pub judged: u64,
    /// Of those, refused.
    pub refused: u64,
}

impl Refusals {
    /// P(X ≥ refused) for X ~ Binomial(judged, 1 − p): how likely this many refusals or
    /// more are from a consistent filter.
    pub fn tail_probability(&self) -> f64 {
        if self.refused == 0 {
            return 1.0;
        }
        let (k, n) = (self.refused as f64, self.judged as f64);
        beta_reg(k, n - k + 1.0, 1.0 - self.p)
    }

    /// Whether the refusals alone show the filter overconfident (tail below
    /// [`REFUSAL_LEVEL`]).
    pub fn too_many(&self) -> bool {
        self.refused > 0 && self.tail_probability() < REFUSAL_LEVEL
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
    /// `consistent`, `overconfident` (NIS too large, or more readings refused than the
    /// gate explains), `underconfident` (NIS too small), or `no_data` when no reading
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
    fn refusals_beyond_what_the_gate_explains_make_the_verdict_overconfident() {
        // A gate at p = 0.999 refuses a consistent filter's reading with probability
        // 0.001. P(X ≥ 1) for X ~ Binomial(1000, 0.001) is 1 − 0.999^1000 = 0.6323 (closed
        // form, common practice): one refusal in 1000 is ordinary.
        let one = Refusals {
            p: 0.999,
            judged: 1000,
            refused: 1,
        };
        let closed = 1.0 - 0.999f64.powi(1000);
        assert!((one.tail_probability() - closed).abs() < 1e-12);
        assert!(!one.too_many());
        // P(X ≥ 2) = 1 − 0.999^1000 − 1000·0.001·0.999^999 = 0.2642 (closed form).
        // One glitch refused among nine readings (a README example): tail
        // 1 − 0.999⁹ = 0.009, above the 0.1 % level, so it does not turn the verdict.
        let glitch = Refusals {
            p: 0.999,
            judged: 9,
            refused: 1,
        };
        assert!((glitch.tail_probability() - (1.0 - 0.999f64.powi(9))).abs() < 1e-12);
        assert!(!glitch.too_many());
        let two = Refusals { refused: 2, ..one };
        let closed2 = 1.0 - 0.999f64.powi(1000) - 0.999f64.powi(999);
        assert!((two.tail_probability() - closed2).abs() < 1e-12);
        // The cart that locked out: 562 of 1105 refused. However good the accepted
        // readings' NIS, the verdict is overconfident.
        let mut acc = NisTally::default();
        for _ in 0..543 {
            acc.add(1.0, 1);
        }
        assert_eq!(acc.verdict(None), "consistent");
        let lockout = Refusals {
            p: 0.999,
            judged: 1105,
            refused: 562,
        };
        assert!(lockout.tail_probability() < 1e-100);
        assert_eq!(acc.verdict(Some(lockout)), "overconfident");
        // Every reading refused (a sensor that switched units): not `no_data`.
        let all = Refusals {
            p: 0.99,
            judged: 40,
            refused: 40,
        };
        assert_eq!(NisTally::default().verdict(Some(all)), "overconfident");
    }
}
