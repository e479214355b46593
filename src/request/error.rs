//! What can be wrong with a request section, as data: [`SpecError`] is where (an RFC 6901
//! pointer) and [`SpecErrorKind`] is what. Validation collects every error it finds, so a
//! client fixes a request in one round trip; at the edge each becomes a
//! [`FieldError`] of the problem document, with its message from `Display` here.

use crate::problem::FieldError;
use std::fmt;

/// One problem found in a request section.
#[derive(Debug, Clone, PartialEq)]
pub struct SpecError {
    /// JSON Pointer into the request body.
    pub pointer: String,
    /// What is wrong there.
    pub kind: SpecErrorKind,
}

impl SpecError {
    /// An error of `kind` at `pointer`.
    pub fn new(pointer: impl Into<String>, kind: SpecErrorKind) -> Self {
        Self {
            pointer: pointer.into(),
            kind,
        }
    }
}

impl fmt::Display for SpecError {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        write!(f, "{}: {}", self.pointer, self.kind)
    }
}

impl std::error::Error for SpecError {}

impl From<SpecError> for FieldError {
    fn from(e: SpecError) -> Self {
        let column = match &e.kind {
            SpecErrorKind::Formula { column, .. } => Some(*column),
            _ => None,
        };
        FieldError {
            pointer: e.pointer,
            detail: e.kind.to_string(),
            column,
        }
    }
}

/// Every kind of problem a request section can have; messages are lower case and say
/// what to do.
#[derive(Debug, Clone, PartialEq)]
#[non_exhaustive]
pub enum SpecErrorKind {
    /// A value of the wrong JSON type (`found` names the type, or the number for a whole
    /// number that was not one).
    WrongType {
        /// What the field takes, with its article (`a number`).
        expected: &'static str,
        /// What was there.
        found: String,
    },
    /// A number that is not finite.
    NotFinite,
    /// A required field is absent (or `null`).
    Missing {
        /// The field's name.
        name: String,
    },
    /// A field this section does not have.
    UnknownField {
        /// The field as given.
        name: String,
        /// The fields the section has.
        known: &'static [&'static str],
    },
    /// A field under its v1 name.
    Renamed {
        /// The v1 name, as given.
        old: &'static str,
        /// The name to use now.
        new: &'static str,
    },
    /// A number that must be above zero.
    NotPositive {
        /// The field's name.
        what: &'static str,
        /// The value given.
        value: f64,
    },
    /// A number that must not be below zero.
    Negative {
        /// The field's name.
        what: &'static str,
        /// The value given.
        value: f64,
    },
    /// A number outside its allowed interval.
    OutOfRange {
        /// The field's name.
        what: &'static str,
        /// The allowed interval in words (`in [1, 10]`).
        range: &'static str,
        /// The value given.
        value: f64,
    },
    /// A string that is not one of the few it may be.
    NotAChoice {
        /// The field's name.
        what: &'static str,
        /// The accepted strings.
        choices: &'static [&'static str],
        /// The string given.
        found: String,
    },
    /// A filter method that does not exist.
    UnknownMethod {
        /// The name given.
        name: String,
    },
    /// A name that the model does not define.
    UnknownName {
        /// The name given.
        name: String,
        /// The names the model defines.
        known: Vec<String>,
    },
    /// A key of a per-state map that is not one of the model's own states.
    NotAModelState {
        /// The name given.
        name: String,
        /// The model's states.
        states: Vec<String>,
    },
    /// A state, input or parameter name that is not an identifier.
    BadName {
        /// `state`, `input`, `parameter` or `sensor`.
        what: &'static str,
        /// The name given.
        name: String,
    },
    /// A name taken by a formula function, a constant, `t` or `dt`.
    ReservedName {
        /// `state`, `input` or `parameter`.
        what: &'static str,
        /// The name given.
        name: String,
    },
    /// A name given twice among states, inputs and parameters.
    DuplicateName {
        /// The name given.
        name: String,
    },
    /// A list or map that may not be empty.
    NeedsAtLeastOne {
        /// What holds the items (`a model`).
        holder: &'static str,
        /// One item (`state`).
        item: &'static str,
    },
    /// More of something than this server accepts.
    OverLimit {
        /// What was counted, plural (`sensors`).
        what: &'static str,
        /// How many were asked for.
        count: u64,
        /// The server's limit.
        limit: usize,
    },
    /// A parameter that is neither a number nor an object.
    ParameterShape {
        /// The JSON type found.
        found: String,
    },
    /// `dynamics` must take exactly one form.
    DynamicsForm {
        /// The forms given (empty for none).
        given: Vec<&'static str>,
    },
    /// Process noise given in more than one form.
    NoiseForms {
        /// The forms given.
        given: Vec<&'static str>,
    },
    /// A density given for a discrete-time model.
    DensityForDiscrete,
    /// `filter.reacquire` without a gate to refuse readings.
    ReacquireWithoutGate,
    /// `filter.reacquire.after` of zero.
    ReacquireAfterZero,
    /// A per-step covariance given for a continuous-time model.
    CovarianceForContinuous,
    /// A spread given both as std and as covariance.
    StdAndCovariance {
        /// Whose spread (`the noise`, `the prior spread`).
        what: &'static str,
    },
    /// No spread given at all.
    NoSpread {
        /// Whose spread (`noise`, `prior spread`).
        what: &'static str,
    },
    /// A list of std values whose length is not the sensor's dimension.
    StdCount {
        /// The sensor's number of components.
        expected: usize,
        /// How many were given.
        found: usize,
    },
    /// A matrix with the wrong number of rows.
    Rows {
        /// Rows wanted.
        expected: usize,
        /// Rows given.
        found: usize,
    },
    /// A matrix row with the wrong number of columns.
    Columns {
        /// Columns wanted.
        expected: usize,
        /// Columns given.
        found: usize,
    },
    /// A covariance that is not symmetric.
    NotSymmetric,
    /// A covariance with a negative direction.
    NotPositiveSemidefinite {
        /// The failing Cholesky pivot.
        pivot: f64,
        /// Its row.
        row: usize,
    },
    /// A sensor covariance with a zero-variance direction.
    NotPositiveDefinite,
    /// A formula that does not compile.
    Formula {
        /// 1-based column in the formula string.
        column: usize,
        /// The compiler's message.
        message: String,
    },
    /// An ensemble of fewer than two members.
    TooFewMembers {
        /// The count given.
        count: u64,
    },
    /// A timestamp that does not parse.
    Timestamp {
        /// The parser's message.
        message: String,
    },
    /// Seconds and timestamps mixed within one request.
    MixedTimeForms,
    /// Output times that go backwards.
    DecreasingTimes,
    /// A state of the model with no prior value.
    MissingState {
        /// `mean` or `std`.
        what: &'static str,
        /// The state.
        state: String,
    },
    /// A prior mean that names some estimated parameters but not every state.
    PartialMean,
    /// A prior std for a parameter whose prior comes from the model.
    ParameterSpread {
        /// The parameter.
        name: String,
    },
    /// Ensemble members in the prior of a filter that has none.
    MembersWithoutEnsemble,
    /// Bounds whose `min` is not below their `max`.
    BoundsOrder {
        /// The lower bound given.
        min: f64,
        /// The upper bound given.
        max: f64,
    },
    /// A fault of a family model (`model.families` and what reads it), in words.
    Family(String),
    /// A starting value outside the bounds given for it.
    OutsideBounds {
        /// The field's name (`initial`).
        what: &'static str,
        /// The value given.
        value: f64,
        /// Lower bound (`-inf` when none).
        min: f64,
        /// Upper bound (`+inf` when none).
        max: f64,
    },
}

/// "a, b, c" for messages listing known names.
fn list<S: AsRef<str>>(names: &[S]) -> String {
    crate::request::reader::names_list(names)
}

/// `"a", "b" or "c"`.
fn choices(items: &[&str]) -> String {
    let quoted: Vec<String> = items.iter().map(|c| format!("\"{c}\"")).collect();
    match quoted.split_last() {
        Some((last, rest)) if !rest.is_empty() => format!("{} or {last}", rest.join(", ")),
        _ => quoted.concat(),
    }
}

impl fmt::Display for SpecErrorKind {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        use SpecErrorKind as K;
        match self {
            K::WrongType { expected, found } => write!(f, "expected {expected}, found {found}"),
            K::NotFinite => f.write_str("number is out of range"),
            K::Missing { name } => write!(f, "missing required field '{name}'"),
            K::UnknownField { name, known } => write!(
                f,
                "unknown field '{name}'; expected one of {}",
                known.join(", ")
            ),
            K::Renamed { old, new } => write!(f, "`{old}` was renamed `{new}`"),
            K::NotPositive { what, value } => write!(f, "{what} must be positive, got {value}"),
            K::Negative { what, value } => write!(f, "{what} must not be negative, got {value}"),
            K::OutOfRange { what, range, value } => {
                write!(f, "{what} must lie {range}, got {value}")
            }
            K::NotAChoice {
                what,
                choices: c,
                found,
            } => write!(f, "{what} must be {}, found \"{found}\"", choices(c)),
            K::UnknownMethod { name } => {
                write!(f, "unknown method '{name}'; methods are ekf, ukf, enkf")
            }
            K::UnknownName { name, known } => {
                write!(f, "unknown name '{name}'; known names are {}", list(known))
            }
            K::BoundsOrder { min, max } => {
                write!(f, "min must be below max, got min {min} and max {max}")
            }
            K::Family(detail) => f.write_str(detail),
            K::OutsideBounds {
                what,
                value,
                min,
                max,
            } => write!(f, "{what} {value} lies outside its bounds [{min}, {max}]"),
            K::NotAModelState { name, states } => {
                write!(
                    f,
                    "'{name}' is not a model state; states are {}",
                    list(states)
                )
            }
            K::BadName { what, name } => write!(
                f,
                "{what} name '{name}' must start with a letter or '_' and hold only letters, \
                 digits and '_'"
            ),
            K::ReservedName { what, name } => write!(
                f,
                "{what} name '{name}' is reserved (a function, a constant, t or dt)"
            ),
            K::DuplicateName { name } => write!(f, "name '{name}' is used twice"),
            K::NeedsAtLeastOne { holder, item } => write!(f, "{holder} needs at least one {item}"),
            K::OverLimit { what, count, limit } => {
                write!(f, "{count} {what} exceed the limit of {limit}")
            }
            K::ParameterShape { found } => write!(
                f,
                "a parameter is a number (fixed) or an object {{initial, std, random_walk, \
                 min, max}} (estimated), found {found}"
            ),
            K::DynamicsForm { given } => write!(
                f,
                "dynamics needs exactly one of rates, next or linear; found {}",
                if given.is_empty() {
                    "none".to_string()
                } else {
                    given.join(", ")
                }
            ),
            K::NoiseForms { given } => write!(
                f,
                "give one of density, density_matrix or covariance, not {}",
                given.join(" and ")
            ),
            K::ReacquireWithoutGate => f.write_str(
                "reacquire takes back a sensor the gate refused, so it needs filter.gate",
            ),
            K::ReacquireAfterZero => f.write_str(
                "after must be at least 1: the number of refusals in a row before a reading is taken back",
            ),
            K::DensityForDiscrete => f.write_str(
                "a discrete-time model takes process_noise.covariance (per step), not a density",
            ),
            K::CovarianceForContinuous => f.write_str(
                "a continuous-time model takes process_noise.density or density_matrix \
                 (variance per unit time), not a per-step covariance",
            ),
            K::StdAndCovariance { what } => {
                write!(f, "give {what} as std or as covariance, not both")
            }
            K::NoSpread { what } => write!(f, "missing {what}: give std (or covariance)"),
            K::StdCount { expected, found } => write!(
                f,
                "expected {expected} std values (one per component), found {found}"
            ),
            K::Rows { expected, found } => write!(f, "expected {expected} rows, found {found}"),
            K::Columns { expected, found } => {
                write!(f, "expected {expected} columns, found {found}")
            }
            K::NotSymmetric => f.write_str("covariance must be symmetric"),
            K::NotPositiveSemidefinite { pivot, row } => write!(
                f,
                "covariance is not positive semi-definite (pivot {pivot:.3e} at row {row})"
            ),
            K::NotPositiveDefinite => f.write_str(
                "covariance must be positive definite (a reading with zero noise cannot be \
                 weighed)",
            ),
            K::Formula { message, .. } => f.write_str(message),
            K::TooFewMembers { count } => {
                write!(f, "an ensemble needs at least 2 members, got {count}")
            }
            K::Timestamp { message } => f.write_str(message),
            K::MixedTimeForms => f.write_str(
                "one request uses one time form: all numbers (seconds) or all RFC 3339 strings",
            ),
            K::DecreasingTimes => f.write_str("times in at must not decrease"),
            K::MissingState { what, state } => {
                write!(f, "missing prior {what} of state '{state}'")
            }
            K::PartialMean => f.write_str(
                "name either the model's states only (parameters start from their initial \
                 values) or every state",
            ),
            K::ParameterSpread { name } => write!(
                f,
                "'{name}' is an estimated parameter; its prior comes from the model unless the \
                 mean names every state"
            ),
            K::MembersWithoutEnsemble => f.write_str("members belong to an ensemble (enkf) prior"),
        }
    }
}

/// The errors found so far in one request section.
#[derive(Debug, Default)]
pub struct SpecErrors {
    list: Vec<SpecError>,
}

impl SpecErrors {
    /// Record `kind` at `pointer`.
    pub fn push(&mut self, pointer: impl Into<String>, kind: SpecErrorKind) {
        self.list.push(SpecError::new(pointer, kind));
    }

    /// Whether nothing went wrong so far.
    pub fn is_empty(&self) -> bool {
        self.list.is_empty()
    }

    /// How many errors so far (to tell whether a step added any).
    pub fn len(&self) -> usize {
        self.list.len()
    }

    /// The errors in the order found.
    pub fn into_vec(self) -> Vec<SpecError> {
        self.list
    }

    /// The errors as the problem document's field errors.
    pub fn into_fields(self) -> Vec<FieldError> {
        self.list.into_iter().map(FieldError::from).collect()
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn messages_read_as_before() {
        // Each message is the one v1 gave for the same fault (the integration tests and
        // clients read them), so a changed word here is a changed contract.
        let cases = [
            (
                SpecErrorKind::NotAChoice {
                    what: "covariance",
                    choices: &["full", "std", "none"],
                    found: "half".into(),
                },
                "covariance must be \"full\", \"std\" or \"none\", found \"half\"",
            ),
            (
                SpecErrorKind::NotAChoice {
                    what: "time",
                    choices: &["continuous", "discrete"],
                    found: "x".into(),
                },
                "time must be \"continuous\" or \"discrete\", found \"x\"",
            ),
            (
                SpecErrorKind::DynamicsForm { given: vec![] },
                "dynamics needs exactly one of rates, next or linear; found none",
            ),
            (
                SpecErrorKind::NoiseForms {
                    given: vec!["density", "covariance"],
                },
                "give one of density, density_matrix or covariance, not density and covariance",
            ),
            (
                SpecErrorKind::NotPositiveSemidefinite {
                    pivot: -3.0,
                    row: 1,
                },
                "covariance is not positive semi-definite (pivot -3.000e0 at row 1)",
            ),
            (
                SpecErrorKind::Renamed {
                    old: "drift",
                    new: "random_walk",
                },
                "`drift` was renamed `random_walk`",
            ),
            (
                SpecErrorKind::UnknownName {
                    name: "x".into(),
                    known: vec![],
                },
                "unknown name 'x'; known names are (none)",
            ),
        ];
        for (kind, text) in cases {
            assert_eq!(kind.to_string(), text);
        }
    }

    #[test]
    fn a_formula_error_keeps_its_column() {
        let e = SpecError::new(
            "/model/dynamics/rates/vel",
            SpecErrorKind::Formula {
                column: 7,
                message: "unknown name 'vell'".into(),
            },
        );
        let f = FieldError::from(e);
        assert_eq!(f.column, Some(7));
        assert_eq!(f.detail, "unknown name 'vell'");
        assert_eq!(f.pointer, "/model/dynamics/rates/vel");
    }
}
