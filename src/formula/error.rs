//! The error a formula reports: which formula (JSON Pointer), where in it (1-based
//! character column) and what went wrong, in lower case, ready for a problem+json entry.

use std::fmt;

/// What went wrong in a formula.
#[derive(Debug, Clone, PartialEq)]
pub struct FormulaError {
    /// JSON Pointer of the formula string.
    pub pointer: String,
    /// 1-based column (in characters) where the problem starts.
    pub column: usize,
    /// Lower-case message naming the problem and, for unknown names, the known ones.
    pub message: String,
}

impl fmt::Display for FormulaError {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        if self.pointer.is_empty() {
            f.write_str(&self.message)
        } else {
            write!(f, "{}: {}", self.pointer, self.message)
        }
    }
}

impl std::error::Error for FormulaError {}

/// A problem found inside one formula before we know its pointer; the compiler attaches
/// the pointer when it collects the errors of all formulas.
#[derive(Debug, Clone, PartialEq)]
pub(crate) struct Fault {
    pub(crate) column: usize,
    pub(crate) message: String,
}

impl Fault {
    /// A fault at `column`; the message should already name the column, so that it reads
    /// well on its own (in logs, in the problem's `detail`).
    pub(crate) fn new(column: usize, message: String) -> Fault {
        Fault { column, message }
    }

    pub(crate) fn with_pointer(self, pointer: &str) -> FormulaError {
        FormulaError {
            pointer: pointer.to_string(),
            column: self.column,
            message: self.message,
        }
    }
}
