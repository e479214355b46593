//! One measurement line after parsing: sensor and input names resolved to indices, values
//! stacked, so a filter step reads it without looking anything up.

use crate::model::time::Instant;

/// One measurement line, checked against the model.
#[derive(Debug, Clone, Default, PartialEq)]
pub struct Reading {
    /// Time of the line.
    pub t: Instant,
    /// Sensors read on this line: `(sensor index, offset into z)`, in model sensor order.
    pub sensors: Vec<(usize, usize)>,
    /// Stacked reading values.
    pub z: Vec<f64>,
    /// Per-reading noise overrides: `(sensor index, offset into std)`.
    pub std_overrides: Vec<(usize, usize)>,
    /// Override std values (a line's `noise_std`).
    pub std: Vec<f64>,
    /// Inputs set on this line: `(input index, value)`.
    pub inputs: Vec<(usize, f64)>,
}

impl Default for Instant {
    fn default() -> Self {
        Instant::seconds(0.0)
    }
}
