//! The checked form of a model written as state families (issue 13): the families'
//! layout, one compiled kernel per family's rate formula with its per-element parameter
//! arrays, the process noise density of each state, and the sensors over families.
//!
//! Built once by `request::validate::families`; the local ensemble filter reads it
//! directly, and a model of at most `max_states` states is also lowered into the plain
//! [`super::Model`] the Gaussian filters run on.

use crate::formula::{FamilyKernel, FamilySet};

/// A sensor over a family: it reads the elements `elements` of family `family` directly,
/// each with noise of standard deviation `std`; a reading line carries its values as an
/// array in the order of `elements`.
#[derive(Debug, Clone, PartialEq)]
pub struct FamilySensor {
    /// Name, as used in readings.
    pub name: String,
    /// Index of the family read (in [`FamilySet::shapes`]).
    pub family: usize,
    /// The element indices read, ascending.
    pub elements: Vec<usize>,
    /// Noise standard deviation of each value.
    pub std: f64,
}

/// A family model (see the module doc).
#[derive(Debug, Clone)]
pub struct FamilyModel {
    /// The families, laid out one after another in the state vector.
    pub set: FamilySet,
    /// The rate kernel of each family, in the order of `set`.
    pub kernels: Vec<FamilyKernel>,
    /// The per-element parameter arrays each kernel reads, in its slot order.
    pub arrays: Vec<Vec<Vec<f64>>>,
    /// Process noise spectral density of every state (zero where none was given).
    pub density: Vec<f64>,
    /// Sensors in the order given.
    pub sensors: Vec<FamilySensor>,
}

impl FamilyModel {
    /// Total number of states.
    pub fn n(&self) -> usize {
        self.set.n()
    }

    /// The display name of state `s`: `x[7]` for element 7 of family `x`.
    pub fn state_name(&self, s: usize) -> String {
        let f = self.set.starts.partition_point(|&st| st <= s) - 1;
        format!("{}[{}]", self.set.shapes[f].name, s - self.set.starts[f])
    }

    /// Index of the sensor called `name`.
    pub fn sensor_index(&self, name: &str) -> Option<usize> {
        self.sensors.iter().position(|s| s.name == name)
    }

    /// Most readings one line can carry (every sensor's every element).
    pub fn max_readings(&self) -> usize {
        self.sensors.iter().map(|s| s.elements.len()).sum()
    }
}
