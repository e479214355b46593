//! Checks shared by every section: reading a [`Field`] as the type it should be (or
//! naming what was found), numbers with a sign, matrices of a given size, covariances,
//! names, times, and refusing keys a section does not have.

use crate::formula::{FormulaError, FormulaLimits, Program, Source};
use crate::linalg::{cholesky_psd, is_symmetric, symmetrize};
use crate::model::{Instant, TimeMode, Zone};
use crate::request::error::{SpecErrorKind, SpecErrors};
use crate::request::raw::{Expected, Field, Matrix, RawTime};
use crate::request::reader::{child, index, Errors};
use nalgebra::DMatrix;
use serde::Deserialize;
use serde_json::{Map, Value};

/// Names a state, input or parameter may not take besides the formula functions: the
/// constants, `t` and `dt`. The functions come from [`crate::formula::is_function_name`], so
/// the two lists cannot drift apart.
const RESERVED: &[&str] = &["t", "dt", "pi", "e"];

/// Whether `s` can be a name in formulas: a letter or `_`, then letters, digits, `_`.
pub(super) fn is_identifier(s: &str) -> bool {
    let mut chars = s.chars();
    matches!(chars.next(), Some(c) if c.is_ascii_alphabetic() || c == '_')
        && chars.all(|c| c.is_ascii_alphanumeric() || c == '_')
}

/// Check a new state, input or parameter name against the names `taken` so far (a set:
/// a list searched per name made 200,000 names tens of seconds of quadratic work).
pub(super) fn check_new_name(
    name: &str,
    ptr: &str,
    what: &'static str,
    taken: &mut std::collections::HashSet<String>,
    errs: &mut SpecErrors,
) {
    let name_s = || name.to_string();
    if !is_identifier(name) {
        errs.push(
            ptr,
            SpecErrorKind::BadName {
                what,
                name: name_s(),
            },
        );
    } else if RESERVED.contains(&name) || crate::formula::is_function_name(name) {
        errs.push(
            ptr,
            SpecErrorKind::ReservedName {
                what,
                name: name_s(),
            },
        );
    } else if taken.contains(name) {
        errs.push(ptr, SpecErrorKind::DuplicateName { name: name_s() });
    }
    taken.insert(name_s());
}

/// Refuse every key of `unknown` (the keys an object's raw type does not have), naming
/// the new field for a v1 name.
pub(super) fn unknown_fields(
    unknown: &Map<String, Value>,
    ptr: &str,
    known: &'static [&'static str],
    renamed: &[(&'static str, &'static str)],
    errs: &mut SpecErrors,
) {
    for k in unknown.keys() {
        let kind = match renamed.iter().find(|(old, _)| old == k) {
            Some(&(old, new)) => SpecErrorKind::Renamed { old, new },
            None => SpecErrorKind::UnknownField {
                name: k.to_string(),
                known,
            },
        };
        errs.push(child(ptr, k), kind);
    }
}

/// The value of a field, or an error naming the type found instead.
pub(super) fn typed<'a, T: Expected>(
    f: &'a Field<T>,
    ptr: &str,
    errs: &mut SpecErrors,
) -> Option<&'a T> {
    match f {
        Field::Ok(t) => Some(t),
        Field::Wrong(v) => {
            errs.push(ptr, wrong_type::<T>(v));
            None
        }
    }
}

/// "expected T, found v".
pub(super) fn wrong_type<T: Expected>(v: &Value) -> SpecErrorKind {
    SpecErrorKind::WrongType {
        expected: T::EXPECTED,
        found: T::found(v),
    }
}

/// An optional member `name` of the object at `parent`: its value, `None` when absent
/// (or null) or of the wrong type (recorded).
pub(super) fn optional<'a, T: Expected>(
    f: &'a Option<Field<T>>,
    parent: &str,
    name: &str,
    errs: &mut SpecErrors,
) -> Option<&'a T> {
    f.as_ref()
        .and_then(|f| typed(f, &child(parent, name), errs))
}

/// A required member `name` of the object at `parent` as given (of any type), or an
/// error naming it.
pub(super) fn present<'a, T>(
    f: &'a Option<Field<T>>,
    parent: &str,
    name: &str,
    errs: &mut SpecErrors,
) -> Option<&'a Field<T>> {
    if f.is_none() {
        errs.push(
            child(parent, name),
            SpecErrorKind::Missing {
                name: name.to_string(),
            },
        );
    }
    f.as_ref()
}

/// A required member `name` of the object at `parent`, or an error naming it.
pub(super) fn required<'a, T: Expected>(
    f: &'a Option<Field<T>>,
    parent: &str,
    name: &str,
    errs: &mut SpecErrors,
) -> Option<&'a T> {
    present(f, parent, name, errs).and_then(|f| typed(f, &child(parent, name), errs))
}

/// A finite number.
pub(super) fn finite(x: f64, ptr: &str, errs: &mut SpecErrors) -> Option<f64> {
    if x.is_finite() {
        Some(x)
    } else {
        errs.push(ptr, SpecErrorKind::NotFinite);
        None
    }
}

/// A finite number from a field.
pub(super) fn number(f: &Field<f64>, ptr: &str, errs: &mut SpecErrors) -> Option<f64> {
    typed(f, ptr, errs).and_then(|&x| finite(x, ptr, errs))
}

/// The largest standard deviation accepted: √(largest f64), rounded down, so that the
/// variance std² every filter, the prior and simulate form from it is still finite.
/// A std of 1.4e154 squared overflows to infinity (IEEE 754 binary64: largest finite
/// value ≈ 1.797e308, common practice).
pub(super) const STD_MAX: f64 = 1.340_780_792_994_259_6e154;

/// How [`STD_MAX`] is stated in refusals.
const STD_RANGE: &str =
    "at or below 1.3407807929942596e154 (its square, the variance, must be a finite number)";

/// A `std` must square to a finite variance; any other field passes. Every std of a
/// request (sensors, parameters, the prior) is read through the two functions below, so
/// this one test guards them all.
fn variance_fits(x: f64, ptr: &str, what: &'static str, errs: &mut SpecErrors) -> Option<f64> {
    if what == "std" && x.abs() > STD_MAX {
        errs.push(
            ptr,
            SpecErrorKind::OutOfRange {
                what,
                range: STD_RANGE,
                value: x,
            },
        );
        return None;
    }
    Some(x)
}

/// A finite number above zero (a `std` also squaring to a finite variance).
pub(super) fn positive_value(
    x: f64,
    ptr: &str,
    what: &'static str,
    errs: &mut SpecErrors,
) -> Option<f64> {
    finite_where(
        x,
        ptr,
        errs,
        |x| x > 0.0,
        |value| SpecErrorKind::NotPositive { what, value },
    )
    .and_then(|x| variance_fits(x, ptr, what, errs))
}

/// A finite number of zero or more (a `std` also squaring to a finite variance).
pub(super) fn non_negative_value(
    x: f64,
    ptr: &str,
    what: &'static str,
    errs: &mut SpecErrors,
) -> Option<f64> {
    finite_where(
        x,
        ptr,
        errs,
        |x| x >= 0.0,
        |value| SpecErrorKind::Negative { what, value },
    )
    .and_then(|x| variance_fits(x, ptr, what, errs))
}

/// A finite number that passes `ok` (a sign test), else the fault recorded at `ptr`:
/// not finite, or `fault(x)`.
fn finite_where(
    x: f64,
    ptr: &str,
    errs: &mut SpecErrors,
    ok: impl FnOnce(f64) -> bool,
    fault: impl FnOnce(f64) -> SpecErrorKind,
) -> Option<f64> {
    let x = finite(x, ptr, errs)?;
    if ok(x) {
        Some(x)
    } else {
        errs.push(ptr, fault(x));
        None
    }
}

/// A finite number above zero, from a field.
pub(super) fn positive(
    f: &Field<f64>,
    ptr: &str,
    what: &'static str,
    errs: &mut SpecErrors,
) -> Option<f64> {
    typed(f, ptr, errs).and_then(|&x| positive_value(x, ptr, what, errs))
}

/// A finite number of zero or more, from a field.
pub(super) fn non_negative(
    f: &Field<f64>,
    ptr: &str,
    what: &'static str,
    errs: &mut SpecErrors,
) -> Option<f64> {
    typed(f, ptr, errs).and_then(|&x| non_negative_value(x, ptr, what, errs))
}

/// A whole number of zero or more, from a field.
pub(super) fn whole(f: &Field<u64>, ptr: &str, errs: &mut SpecErrors) -> Option<u64> {
    typed(f, ptr, errs).copied()
}

/// A `rows × cols` matrix of finite numbers given as rows, flattened row-major; `None`
/// after recording every fault.
pub(super) fn matrix(
    f: &Field<Matrix>,
    ptr: &str,
    rows: usize,
    cols: usize,
    errs: &mut SpecErrors,
) -> Option<Vec<f64>> {
    let a = typed(f, ptr, errs)?;
    if a.len() != rows {
        errs.push(
            ptr,
            SpecErrorKind::Rows {
                expected: rows,
                found: a.len(),
            },
        );
        return None;
    }
    let mut out = vec![0.0; rows * cols];
    let before = errs.len();
    for (i, row) in a.iter().enumerate() {
        let rp = index(ptr, i);
        let Some(r) = typed(row, &rp, errs) else {
            continue;
        };
        if r.len() != cols {
            errs.push(
                &rp,
                SpecErrorKind::Columns {
                    expected: cols,
                    found: r.len(),
                },
            );
            continue;
        }
        for (j, x) in r.iter().enumerate() {
            if let Some(x) = number(x, &index(&rp, j), errs) {
                out[i * cols + j] = x;
            }
        }
    }
    (errs.len() == before).then_some(out)
}

/// Check that a covariance is symmetric and positive semi-definite (`definite` demands
/// positive definite), symmetrising it in place: the average of the matrix and its
/// transpose removes rounding in the client's numbers, so the filters start exactly
/// symmetric (common practice).
pub(super) fn check_covariance(
    m: &mut DMatrix<f64>,
    ptr: &str,
    definite: bool,
    errs: &mut SpecErrors,
) -> bool {
    let n = m.nrows();
    if !is_symmetric(m, 1e-9) {
        errs.push(ptr, SpecErrorKind::NotSymmetric);
        return false;
    }
    symmetrize(m);
    let mut l = vec![0.0; n * n];
    match cholesky_psd(m.as_slice(), &mut l, n) {
        Err(e) => {
            errs.push(
                ptr,
                SpecErrorKind::NotPositiveSemidefinite {
                    pivot: e.pivot,
                    row: e.column,
                },
            );
            false
        }
        Ok(()) if definite && (0..n).any(|i| l[i + i * n] <= 0.0) => {
            errs.push(ptr, SpecErrorKind::NotPositiveDefinite);
            false
        }
        Ok(()) => true,
    }
}

/// Compile formulas given as `(text, pointer)` over the named `slots`, recording every
/// compiler error at its own string.
pub(super) fn compile(
    texts: &[(String, String)],
    slots: &[&str],
    consts: &[(&str, f64)],
    limits: &FormulaLimits,
    errs: &mut SpecErrors,
) -> Option<Program> {
    let sources: Vec<Source> = texts
        .iter()
        .map(|(t, p)| Source {
            text: t,
            pointer: p.clone(),
        })
        .collect();
    match Program::compile(&sources, slots, consts, limits) {
        Ok(p) => Some(p),
        Err(list) => {
            formula_errors(errs, list);
            None
        }
    }
}

/// Record the compiler's errors of a set of formulas, each at its own string.
pub(super) fn formula_errors(errs: &mut SpecErrors, list: Vec<FormulaError>) {
    for e in list {
        errs.push(
            e.pointer,
            SpecErrorKind::Formula {
                column: e.column,
                message: e.message,
            },
        );
    }
}

/// A time (seconds or a timestamp, offset-less ones read in `zone`), holding the whole
/// request to the form of the first one.
pub(super) fn time(
    f: &Field<RawTime>,
    ptr: &str,
    mode: &mut Option<TimeMode>,
    zone: &Zone,
    errs: &mut SpecErrors,
) -> Option<Instant> {
    let (inst, m) = match typed(f, ptr, errs)? {
        RawTime::Seconds(x) => (Instant::seconds(finite(*x, ptr, errs)?), TimeMode::Seconds),
        RawTime::Stamp(s) => match Instant::parse_stamp(s, zone) {
            Ok(i) => (i, TimeMode::Stamp),
            Err(message) => {
                errs.push(ptr, SpecErrorKind::Timestamp { message });
                return None;
            }
        },
    };
    match mode {
        None => *mode = Some(m),
        Some(prev) if *prev != m => {
            errs.push(ptr, SpecErrorKind::MixedTimeForms);
            return None;
        }
        _ => {}
    }
    Some(inst)
}

/// `time` (the section readers' form) for callers that read their section with the
/// pointer-carrying reader (`request::reader`): a time value in JSON, its errors pushed as
/// field errors.
pub fn time_value(
    v: &Value,
    ptr: &str,
    mode: &mut Option<TimeMode>,
    zone: &Zone,
    errs: &mut Errors,
) -> Option<Instant> {
    let field = match RawTime::deserialize(v) {
        Ok(t) => Field::Ok(t),
        Err(_) => Field::Wrong(v.clone()),
    };
    let mut found = SpecErrors::default();
    let t = time(&field, ptr, mode, zone, &mut found);
    for e in found.into_fields() {
        errs.push_field(e);
    }
    t
}

/// Every fault of a failed check as `(pointer, message)`, for the section tests.
#[cfg(test)]
pub(super) fn faults<T: std::fmt::Debug>(
    r: Result<T, Vec<crate::request::error::SpecError>>,
) -> Vec<(String, String)> {
    r.expect_err("the check should fail")
        .into_iter()
        .map(|e| (e.pointer, e.kind.to_string()))
        .collect()
}

/// Expected `(pointer, message)` pairs as owned strings, to compare with [`faults`].
#[cfg(test)]
pub(super) fn pairs(want: &[(&str, &str)]) -> Vec<(String, String)> {
    want.iter()
        .map(|(a, b)| (a.to_string(), b.to_string()))
        .collect()
}

#[cfg(test)]
mod tests {
    use super::*;
    use serde_json::json;

    /// The std bound is exactly where squaring stops being finite (IEEE 754 binary64,
    /// common practice): the bound squares finite, the next double up does not.
    #[test]
    fn the_largest_std_is_the_last_whose_square_is_finite() {
        assert!((STD_MAX * STD_MAX).is_finite());
        assert!((STD_MAX.next_up() * STD_MAX.next_up()).is_infinite());
        let mut errs = SpecErrors::default();
        assert_eq!(
            positive_value(STD_MAX, "/s", "std", &mut errs),
            Some(STD_MAX)
        );
        assert_eq!(non_negative_value(1.4e154, "/s", "std", &mut errs), None);
        // Other fields are not variances' roots and keep their range.
        assert_eq!(
            positive_value(1.4e154, "/d", "dt", &mut errs),
            Some(1.4e154)
        );
        let e = errs.into_fields();
        assert_eq!(e.len(), 1, "{e:?}");
        assert_eq!(e[0].pointer, "/s");
        assert!(
            e[0].detail.contains("1.3407807929942596e154"),
            "{}",
            e[0].detail
        );
    }

    fn field_matrix(v: Value) -> Field<Matrix> {
        Field::deserialize(&v).unwrap()
    }

    #[test]
    fn a_matrix_reports_every_bad_cell() {
        let mut errs = SpecErrors::default();
        let m = field_matrix(json!([[1, "a"], [2], 3]));
        assert!(matrix(&m, "/m", 3, 2, &mut errs).is_none());
        let got: Vec<(String, String)> = errs
            .into_vec()
            .into_iter()
            .map(|e| (e.pointer, e.kind.to_string()))
            .collect();
        assert_eq!(
            got,
            [
                ("/m/0/1".into(), "expected a number, found a string".into()),
                ("/m/1".into(), "expected 2 columns, found 1".into()),
                ("/m/2".into(), "expected an array, found a number".into()),
            ]
        );
        let mut errs = SpecErrors::default();
        let ok = matrix(
            &field_matrix(json!([[1, 2], [3, 4]])),
            "/m",
            2,
            2,
            &mut errs,
        );
        assert_eq!(ok, Some(vec![1.0, 2.0, 3.0, 4.0]));
    }

    #[test]
    fn a_covariance_is_symmetrised_exactly() {
        // Within the 1e-9 tolerance the two triangles may differ; the check leaves the
        // average of the matrix and its transpose, bit-for-bit symmetric (common practice).
        let mut m = DMatrix::from_row_slice(2, 2, &[2.0, 0.5 + 1e-12, 0.5, 1.0]);
        let mut errs = SpecErrors::default();
        assert!(check_covariance(&mut m, "/c", false, &mut errs));
        assert_eq!(m[(0, 1)].to_bits(), m[(1, 0)].to_bits());
        let mut neg = DMatrix::from_row_slice(2, 2, &[1.0, 2.0, 2.0, 1.0]);
        assert!(!check_covariance(&mut neg, "/c", false, &mut errs));
        let mut zero = DMatrix::from_row_slice(1, 1, &[0.0]);
        assert!(check_covariance(&mut zero, "/c", false, &mut errs));
        assert!(!check_covariance(&mut zero, "/c", true, &mut errs));
        let kinds: Vec<String> = errs.into_vec().iter().map(|e| e.kind.to_string()).collect();
        assert!(kinds[0].starts_with("covariance is not positive semi-definite"));
        assert!(kinds[1].starts_with("covariance must be positive definite"));
    }

    #[test]
    fn names_must_be_identifiers_unreserved_and_unique() {
        let mut taken = std::collections::HashSet::new();
        let mut errs = SpecErrors::default();
        for (i, name) in ["level", "2nd", "dt", "level", "_ok"].iter().enumerate() {
            check_new_name(name, &format!("/s/{i}"), "state", &mut taken, &mut errs);
        }
        let got: Vec<String> = errs.into_vec().iter().map(|e| e.to_string()).collect();
        assert_eq!(
            got,
            [
                "/s/1: state name '2nd' must start with a letter or '_' and hold only letters, \
                 digits and '_'",
                "/s/2: state name 'dt' is reserved (a function, a constant, t or dt)",
                "/s/3: name 'level' is used twice",
            ]
        );
    }

    #[test]
    fn one_request_keeps_one_time_form() {
        let mut errs = SpecErrors::default();
        let mut mode = None;
        let secs = Field::Ok(RawTime::Seconds(1.5));
        let stamp = Field::Ok(RawTime::Stamp("2026-03-01T06:00:00Z"));
        assert_eq!(
            time(&secs, "/a", &mut mode, &Zone::none(), &mut errs),
            Some(Instant::seconds(1.5))
        );
        assert_eq!(
            time(&stamp, "/b", &mut mode, &Zone::none(), &mut errs),
            None
        );
        let bad = Field::Wrong(json!(true));
        assert_eq!(time(&bad, "/c", &mut mode, &Zone::none(), &mut errs), None);
        let got: Vec<String> = errs.into_vec().iter().map(|e| e.to_string()).collect();
        assert_eq!(
            got,
            [
                "/b: one request uses one time form: all numbers (seconds) or all RFC 3339 \
                 strings",
                "/c: expected seconds (a number) or an RFC 3339 timestamp, found a boolean",
            ]
        );
    }
}
