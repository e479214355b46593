//! Running NIS statistics of a run and the one-word consistency verdict.
//!
//! Over K updates of dimensions m_k the sum of NIS values is χ² with Σ m_k degrees of
//! freedom when the filter is consistent, so the mean NIS has the two-sided 95 % interval
//! [χ²_{0.025}(Σm)/K, χ²_{0.975}(Σm)/K] (Bar-Shalom, Li, Kirubarajan 2001, §5.4.2).

use crate::diagnostics::chi2;
use serde::Serialize;

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

/// The `summary.nis` object.
#[derive(Debug, Clone, Serialize, PartialEq)]
pub struct NisSummary {
    /// Mean NIS over the updates (null when there were none).
    pub mean: Option<f64>,
    /// Mean degrees of freedom per update (the expected mean NIS).
    pub dof: f64,
    /// Lower two-sided 95 % bound of the mean NIS.
    pub lower_95: Option<f64>,
    /// Upper two-sided 95 % bound of the mean NIS.
    pub upper_95: Option<f64>,
    /// `consistent`, `overconfident` (NIS too large), `underconfident` (too small), or
    /// `no_data` when no reading updated the filter.
    pub verdict: &'static str,
}

impl NisTally {
    /// Record one update's NIS and dimension.
    pub fn add(&mut self, nis: f64, dim: usize) {
        self.count += 1;
        self.sum += nis;
        self.dof += dim as u64;
    }

    /// The summary; with no updates there is nothing to judge: the verdict is `no_data` and
    /// the figures null (saying `consistent` there would vouch for a filter no reading
    /// has tested).
    pub fn summary(&self) -> NisSummary {
        if self.count == 0 {
            return NisSummary {
                mean: None,
                dof: 0.0,
                lower_95: None,
                upper_95: None,
                verdict: "no_data",
            };
        }
        let k = self.count as f64;
        let dof = self.dof as f64;
        let mean = self.sum / k;
        let lower = chi2::quantile(0.025, dof) / k;
        let upper = chi2::quantile(0.975, dof) / k;
        let verdict = if mean > upper {
            "overconfident"
        } else if mean < lower {
            "underconfident"
        } else {
            "consistent"
        };
        NisSummary {
            mean: Some(mean),
            dof: dof / k,
            lower_95: Some(lower),
            upper_95: Some(upper),
            verdict,
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn zero_updates_give_the_verdict_no_data() {
        let s = NisTally::default().summary();
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
        let s = t.summary();
        assert_eq!(s.verdict, "consistent");
        assert!((s.lower_95.unwrap() - 0.000982).abs() < 1e-6);
        assert!((s.upper_95.unwrap() - 5.024).abs() < 1e-3);
    }
}
