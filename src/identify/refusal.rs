//! What an identification kernel answers when it cannot fit: an [`IdentifyRefusal`]
//! (the data or the settings cannot give a model; the endpoint answers 422 with the
//! field's pointer and the plain detail) or the [`Halt`] that stopped it (the endpoint
//! answers as for any deadline or cancel).

use crate::model::Halt;
use std::fmt;

/// A fit the data or the settings cannot give: the field at fault and why, in plain words.
#[derive(Debug, Clone, PartialEq, Eq)]
pub struct IdentifyRefusal {
    /// JSON Pointer of the field at fault, relative to the request (`"/series"`,
    /// `"/order"`, `"/rank"`, `"/dt"`, `"/inputs"`).
    pub field: &'static str,
    /// What is wrong and what would do, for a person.
    pub detail: String,
}

impl IdentifyRefusal {
    /// A refusal at `field` with `detail`.
    pub fn new(field: &'static str, detail: impl Into<String>) -> Self {
        Self {
            field,
            detail: detail.into(),
        }
    }
}

impl fmt::Display for IdentifyRefusal {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        write!(f, "{}: {}", self.field, self.detail)
    }
}

/// Why an identification kernel gave no fit.
#[derive(Debug, Clone, PartialEq, Eq)]
pub enum KernelError {
    /// The data or the settings cannot give a model (a 422 at `field`).
    Refused(IdentifyRefusal),
    /// The deadline passed or the client went away while it ran.
    Halted(Halt),
}

impl From<IdentifyRefusal> for KernelError {
    fn from(r: IdentifyRefusal) -> Self {
        Self::Refused(r)
    }
}

impl From<Halt> for KernelError {
    fn from(h: Halt) -> Self {
        Self::Halted(h)
    }
}

impl fmt::Display for KernelError {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match self {
            Self::Refused(r) => r.fmt(f),
            Self::Halted(h) => write!(f, "stopped: {h:?}"),
        }
    }
}

impl std::error::Error for KernelError {}

/// `Err(Halted)` when `stop` says the work must end now (a clock read).
pub(crate) fn check(stop: &crate::model::Stop) -> Result<(), KernelError> {
    stop.halted()
        .map_or(Ok(()), |h| Err(KernelError::Halted(h)))
}

/// `Err(Halted)` when `stop` says so at loop index `i` (the clock every `every` calls).
pub(crate) fn check_every(
    stop: &crate::model::Stop,
    i: usize,
    every: usize,
) -> Result<(), KernelError> {
    stop.every(i, every)
        .map_or(Ok(()), |h| Err(KernelError::Halted(h)))
}

/// Refuse unless every entry of `m` is finite.
pub(crate) fn all_finite(
    m: &nalgebra::DMatrix<f64>,
    field: &'static str,
    what: &str,
) -> Result<(), IdentifyRefusal> {
    match m.iter().position(|x| !x.is_finite()) {
        None => Ok(()),
        Some(p) => Err(IdentifyRefusal::new(
            field,
            format!(
                "{what} holds a value that is not a finite number (row {}, column {})",
                p % m.nrows().max(1),
                p / m.nrows().max(1)
            ),
        )),
    }
}
