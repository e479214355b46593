//! What a run noticed that the numbers alone would hide: a sensor refused many times in a
//! row, a run with no updates, a model without process noise, a spread that collapsed, a
//! state outside its declared bounds, a line skipped for coming late.
//!
//! Memory stays bounded however long the run (a stream may last for millions of lines):
//! one entry per (kind, sensor, state); a repeat adds to the entry's `count`, and the
//! first occurrence's time and detail are kept.

use crate::model::Instant;
use serde::Serialize;
use std::borrow::Cow;

/// The kinds of warning, as the answer names them.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
#[serde(rename_all = "snake_case")]
#[non_exhaustive]
pub enum WarningKind {
    /// A sensor's readings were refused by the gate many times in a row; `count` is the
    /// longest such run.
    RefusedInARow,
    /// No reading updated the filter.
    NoUpdates,
    /// The model has no process noise: the filter will trust its dynamics without limit.
    NoProcessNoise,
    /// An ensemble's spread in a state fell far below what its noise justifies.
    CollapsedSpread,
    /// A state's estimate left the bounds the model declares for it.
    OutOfBounds,
    /// A line whose time went backwards was skipped (`filter.late: "skip"`).
    LateLineSkipped,
    /// A line had the same time as the one before it.
    DuplicateTime,
    /// A sensor refused `filter.reacquire.after` times in a row was accepted again and
    /// the states it measures were reset to their prior spread.
    Reacquired,
}

/// One warning of the answer's `summary.warnings`.
#[derive(Debug, Clone, PartialEq)]
pub struct Warning {
    /// What happened.
    pub kind: WarningKind,
    /// The sensor concerned (index into the model's sensors), if any.
    pub sensor: Option<usize>,
    /// The state concerned (index into the model's states), if any.
    pub state: Option<usize>,
    /// When it first happened.
    pub at: Instant,
    /// How many times it happened (for `refused_in_a_row`, the longest run).
    pub count: u64,
    /// One sentence for a person (fixed text where it can be, so that recording a
    /// warning in the filter loop need not allocate).
    pub detail: Cow<'static, str>,
}

/// A warning's detail: fixed text, or text made for the occasion.
pub type Detail = Cow<'static, str>;

/// The warnings of one run, at most one per (kind, sensor, state).
#[derive(Debug, Clone, Default, PartialEq)]
pub struct Warnings {
    list: Vec<Warning>,
}

impl Warnings {
    /// Room for `n` warnings before the list grows.
    pub fn with_capacity(n: usize) -> Self {
        Self {
            list: Vec::with_capacity(n),
        }
    }

    /// Record one occurrence. The first of its (kind, sensor, state) is kept with `at`
    /// and the `detail` (only then built); a later one adds one to its count.
    pub fn note(
        &mut self,
        kind: WarningKind,
        sensor: Option<usize>,
        state: Option<usize>,
        at: Instant,
        detail: impl FnOnce() -> Detail,
    ) {
        match self.find(kind, sensor, state) {
            Some(w) => w.count += 1,
            None => self.list.push(Warning {
                kind,
                sensor,
                state,
                at,
                count: 1,
                detail: detail(),
            }),
        }
    }

    /// Record a run of `count` occurrences (a streak): the first keeps `at` and `detail`;
    /// the entry's count is the longest run seen (so `detail` should not quote it).
    pub fn streak(
        &mut self,
        kind: WarningKind,
        sensor: Option<usize>,
        at: Instant,
        count: u64,
        detail: impl FnOnce() -> &'static str,
    ) {
        match self.find(kind, sensor, None) {
            Some(w) => w.count = w.count.max(count),
            None => self.list.push(Warning {
                kind,
                sensor,
                state: None,
                at,
                count,
                detail: Cow::Borrowed(detail()),
            }),
        }
    }

    fn find(
        &mut self,
        kind: WarningKind,
        sensor: Option<usize>,
        state: Option<usize>,
    ) -> Option<&mut Warning> {
        self.list
            .iter_mut()
            .find(|w| w.kind == kind && w.sensor == sensor && w.state == state)
    }

    /// The warnings, in the order they first happened.
    pub fn list(&self) -> &[Warning] {
        &self.list
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn repeats_add_to_one_entry_and_keep_the_first_time() {
        let mut w = Warnings::default();
        for k in 0..1000 {
            w.note(
                WarningKind::DuplicateTime,
                None,
                None,
                Instant::seconds(k as f64),
                || format!("first at {k}").into(),
            );
        }
        w.note(
            WarningKind::OutOfBounds,
            None,
            Some(2),
            Instant::seconds(5.0),
            || "state 2".into(),
        );
        assert_eq!(w.list().len(), 2);
        assert_eq!(w.list()[0].count, 1000);
        assert_eq!(w.list()[0].at, Instant::seconds(0.0));
        assert_eq!(w.list()[0].detail, "first at 0");
        assert_eq!(w.list()[1].kind, WarningKind::OutOfBounds);
        assert_eq!(w.list()[1].state, Some(2));
    }

    #[test]
    fn a_streak_keeps_the_longest_run() {
        let mut w = Warnings::default();
        for (t, n) in [(1.0, 10), (5.0, 40), (9.0, 12)] {
            w.streak(
                WarningKind::RefusedInARow,
                Some(0),
                Instant::seconds(t),
                n,
                || "refused",
            );
        }
        assert_eq!(w.list().len(), 1);
        assert_eq!(w.list()[0].count, 40);
        assert_eq!(w.list()[0].at, Instant::seconds(1.0));
    }
}
