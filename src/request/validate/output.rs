//! The optional `output` section: how much each estimate carries and extra times to
//! predict at.

use super::common::{optional, time, typed, unknown_fields};
use crate::model::{CovarianceOutput, OutputConfig};
use crate::model::{TimeMode, Zone};
use crate::problem::FieldError;
use crate::request::error::{SpecError, SpecErrorKind, SpecErrors};
use crate::request::raw::{self, RawOutput};
use crate::request::reader::{child, index};
use serde_json::Value;

/// Parse the optional `output` section at `ptr` (absent or `null`: the defaults), with
/// times in the request's form `mode` (offset-less timestamps read in `zone`), reporting
/// every fault found as the problem document's field errors.
pub fn output(
    v: Option<&Value>,
    ptr: &str,
    mode: TimeMode,
    zone: &Zone,
) -> Result<OutputConfig, Vec<FieldError>> {
    check_output(v, ptr, mode, zone).map_err(|e| e.into_iter().map(FieldError::from).collect())
}

/// [`output`] with typed errors.
pub fn check_output(
    v: Option<&Value>,
    ptr: &str,
    mode: TimeMode,
    zone: &Zone,
) -> Result<OutputConfig, Vec<SpecError>> {
    let Some(v) = v.filter(|v| !v.is_null()) else {
        return Ok(OutputConfig::default());
    };
    let mut errs = SpecErrors::default();
    let section = raw::section::<RawOutput>(v);
    let out = typed(&section, ptr, &mut errs).map(|o| checked(o, ptr, mode, zone, &mut errs));
    match out {
        Some(o) if errs.is_empty() => Ok(o),
        _ => Err(errs.into_vec()),
    }
}

fn checked(
    o: &RawOutput,
    ptr: &str,
    mode: TimeMode,
    zone: &Zone,
    errs: &mut SpecErrors,
) -> OutputConfig {
    unknown_fields(&o.unknown, ptr, RawOutput::KNOWN, &[], errs);
    let mut out = OutputConfig::default();
    match optional(&o.covariance, ptr, "covariance", errs).copied() {
        Some("full") | None => {}
        Some("std") => out.covariance = CovarianceOutput::Std,
        Some("none") => out.covariance = CovarianceOutput::None,
        Some(other) => errs.push(
            child(ptr, "covariance"),
            SpecErrorKind::NotAChoice {
                what: "covariance",
                choices: &["full", "std", "none"],
                found: other.to_string(),
            },
        ),
    }
    if let Some(b) = optional(&o.innovations, ptr, "innovations", errs) {
        out.innovations = *b;
    }
    let ap = child(ptr, "at");
    if let Some(items) = optional(&o.at, ptr, "at", errs) {
        let mut m = Some(mode);
        for (i, x) in items.iter().enumerate() {
            let p = index(&ap, i);
            if let Some(t) = time(x, &p, &mut m, zone, errs) {
                if let Some(prev) = out.at.last() {
                    if prev.is_after(&t, mode) {
                        errs.push(&p, SpecErrorKind::DecreasingTimes);
                    }
                }
                out.at.push(t);
            }
        }
    }
    out
}

#[cfg(test)]
mod tests {
    use super::super::common::{faults, pairs};
    use super::*;
    use crate::model::Instant;
    use serde_json::json;

    #[test]
    fn absent_or_null_output_takes_the_defaults() {
        let d = OutputConfig::default();
        assert_eq!(
            check_output(None, "/output", TimeMode::Seconds, &Zone::none()).unwrap(),
            d
        );
        let null = json!(null);
        assert_eq!(
            check_output(Some(&null), "/output", TimeMode::Seconds, &Zone::none()).unwrap(),
            d
        );
        assert!(d.innovations && d.covariance == CovarianceOutput::Full);
    }

    #[test]
    fn a_valid_output_is_read() {
        let v = json!({"covariance": "std", "innovations": false, "at": [0.5, 0.5, 2]});
        let o = check_output(Some(&v), "/output", TimeMode::Seconds, &Zone::none()).unwrap();
        assert_eq!(o.covariance, CovarianceOutput::Std);
        assert!(!o.innovations);
        assert_eq!(o.at, [0.5, 0.5, 2.0].map(Instant::seconds));
    }

    #[test]
    fn every_fault_is_reported_at_its_pointer() {
        let v = json!({"covariance": "half", "innovations": "yes", "at": [2, 1, "2026-03-01T06:00:00Z"], "every": 1});
        let got = faults(check_output(
            Some(&v),
            "/output",
            TimeMode::Seconds,
            &Zone::none(),
        ));
        let want = [
            (
                "/output/every",
                "unknown field 'every'; expected one of covariance, innovations, at",
            ),
            (
                "/output/covariance",
                "covariance must be \"full\", \"std\" or \"none\", found \"half\"",
            ),
            (
                "/output/innovations",
                "expected true or false, found a string",
            ),
            ("/output/at/1", "times in at must not decrease"),
            (
                "/output/at/2",
                "one request uses one time form: all numbers (seconds) or all RFC 3339 strings",
            ),
        ];
        assert_eq!(got, pairs(&want));
        let arr = json!([1]);
        assert_eq!(
            faults(check_output(
                Some(&arr),
                "/output",
                TimeMode::Seconds,
                &Zone::none()
            )),
            [(
                "/output".into(),
                "expected an object, found an array".into()
            )]
        );
    }
}
