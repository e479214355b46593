//! The sensors of `model.sensors`: each one's formulas and noise covariance.

use super::common::{
    check_covariance, compile, is_identifier, matrix, positive_value, typed, unknown_fields,
};
use crate::config::Limits;
use crate::formula::FormulaLimits;
use crate::model::Sensor;
use crate::request::error::{SpecErrorKind, SpecErrors};
use crate::request::raw::{Entries, Field, Measures, RawSensor, Spread};
use crate::request::reader::{child, index};
use nalgebra::DMatrix;

/// Check every sensor; a sensor with a fault is left out after its errors are recorded.
pub(super) fn sensors(
    list: &Entries<RawSensor>,
    ptr: &str,
    slots: &[&str],
    consts: &[(&str, f64)],
    flimits: &FormulaLimits,
    limits: &Limits,
    errs: &mut SpecErrors,
) -> Vec<Sensor> {
    if list.is_empty() {
        errs.push(
            ptr,
            SpecErrorKind::NeedsAtLeastOne {
                holder: "a model",
                item: "sensor",
            },
        );
    }
    if list.len() > limits.max_sensors {
        errs.push(
            ptr,
            SpecErrorKind::OverLimit {
                what: "sensors",
                count: list.len() as u64,
                limit: limits.max_sensors,
            },
        );
        return Vec::new();
    }
    let mut out = Vec::with_capacity(list.len());
    for (name, f) in &list.0 {
        let sp = child(ptr, name);
        if !is_identifier(name) {
            errs.push(
                &sp,
                SpecErrorKind::BadName {
                    what: "sensor",
                    name: name.to_string(),
                },
            );
        }
        let Some(s) = typed(f, &sp, errs) else {
            continue;
        };
        if let Some(sensor) = sensor(name, s, &sp, slots, consts, flimits, errs) {
            out.push(sensor);
        }
    }
    out
}

/// One sensor at `sp`.
fn sensor(
    name: &str,
    s: &RawSensor,
    sp: &str,
    slots: &[&str],
    consts: &[(&str, f64)],
    flimits: &FormulaLimits,
    errs: &mut SpecErrors,
) -> Option<Sensor> {
    unknown_fields(&s.unknown, sp, RawSensor::KNOWN, &[], errs);
    let mp = child(sp, "measures");
    let texts: Vec<(String, String)> =
        match super::common::required(&s.measures, sp, "measures", errs)? {
            Measures::One(text) => vec![(text.to_string(), mp)],
            Measures::Many(items) if !items.is_empty() => items
                .iter()
                .enumerate()
                .filter_map(|(i, it)| {
                    let p = index(&mp, i);
                    typed(it, &p, errs).map(|s| (s.to_string(), p))
                })
                .collect(),
            Measures::Many(_) => {
                errs.push(
                    &mp,
                    SpecErrorKind::NeedsAtLeastOne {
                        holder: "a vector sensor",
                        item: "formula",
                    },
                );
                return None;
            }
        };
    let dim = texts.len();
    let r = noise(s, sp, dim, errs);
    let program = compile(&texts, slots, consts, flimits, errs)?;
    // Slots are [x, u, t]: affine in states and inputs, never reading t.
    let affine = program.affine_form(slots.len() - 1);
    Some(Sensor {
        name: name.to_string(),
        program,
        dim,
        r: r?,
        affine,
    })
}

/// A sensor's noise covariance from `std` (scalar or list) or `covariance`.
fn noise(s: &RawSensor, sp: &str, dim: usize, errs: &mut SpecErrors) -> Option<DMatrix<f64>> {
    match (&s.std, &s.covariance) {
        (Some(_), Some(_)) => {
            errs.push(sp, SpecErrorKind::StdAndCovariance { what: "the noise" });
            None
        }
        (None, None) => {
            errs.push(child(sp, "std"), SpecErrorKind::NoSpread { what: "noise" });
            None
        }
        (Some(f), None) => std_to_cov(f, &child(sp, "std"), dim, errs),
        (None, Some(c)) => {
            let cp = child(sp, "covariance");
            let vals = matrix(c, &cp, dim, dim, errs)?;
            let mut m = DMatrix::from_row_slice(dim, dim, &vals);
            check_covariance(&mut m, &cp, true, errs).then_some(m)
        }
    }
}

/// Noise std (a number, or one per component) as a diagonal covariance `diag(std²)`.
fn std_to_cov(
    f: &Field<Spread>,
    ptr: &str,
    dim: usize,
    errs: &mut SpecErrors,
) -> Option<DMatrix<f64>> {
    let mut r = DMatrix::zeros(dim, dim);
    match typed(f, ptr, errs)? {
        Spread::PerComponent(items) => {
            if items.len() != dim {
                errs.push(
                    ptr,
                    SpecErrorKind::StdCount {
                        expected: dim,
                        found: items.len(),
                    },
                );
                return None;
            }
            let mut ok = true;
            for (i, x) in items.iter().enumerate() {
                let p = index(ptr, i);
                match typed(x, &p, errs).and_then(|&x| positive_value(x, &p, "std", errs)) {
                    Some(s) => r[(i, i)] = s * s,
                    None => ok = false,
                }
            }
            ok.then_some(r)
        }
        Spread::One(s) => {
            let s = positive_value(*s, ptr, "std", errs)?;
            for i in 0..dim {
                r[(i, i)] = s * s;
            }
            Some(r)
        }
    }
}

#[cfg(test)]
mod tests {
    use super::super::common::faults;
    use super::super::model::check_model;
    use crate::config::Limits;
    use serde_json::{json, Value};

    /// A kiln: temperature read by a thermocouple pair.
    fn kiln(sensors: Value) -> Value {
        json!({"states": ["temp", "rate"], "dynamics": {"rates": {"temp": "rate"}},
               "sensors": sensors})
    }

    fn sensor_faults(sensors: Value) -> Vec<(String, String)> {
        faults(check_model(&kiln(sensors), "/model", &Limits::default()))
    }

    #[test]
    fn a_vector_sensor_takes_one_std_each_or_a_covariance() {
        let m = check_model(
            &kiln(json!({"pair": {"measures": ["temp", "rate"], "std": [0.5, 2]},
                         "full": {"measures": ["temp", "temp"], "covariance": [[1, 0.5], [0.5, 1]]}})),
            "/model",
            &Limits::default(),
        )
        .unwrap();
        assert_eq!(m.sensors[0].dim, 2);
        assert_eq!(
            (m.sensors[0].r[(0, 0)], m.sensors[0].r[(1, 1)]),
            (0.25, 4.0)
        );
        assert_eq!(m.sensors[1].r[(0, 1)], 0.5);
        // `measures: "temp"` is affine: the extended filter reads H directly.
        assert!(m.sensors[1].affine.is_some());
    }

    #[test]
    fn every_sensor_fault_is_named() {
        let cases = [
            (
                json!({"tc": {"measures": ["temp", "rate"], "std": [0.5]}}),
                "/model/sensors/tc/std",
                "expected 2 std values (one per component), found 1",
            ),
            (
                json!({"tc": {"measures": "temp", "std": 1, "covariance": [[1]]}}),
                "/model/sensors/tc",
                "give the noise as std or as covariance, not both",
            ),
            (
                json!({"tc": {"measures": "temp"}}),
                "/model/sensors/tc/std",
                "missing noise: give std (or covariance)",
            ),
            (
                json!({"tc": {"measures": "temp", "covariance": [[0]]}}),
                "/model/sensors/tc/covariance",
                "covariance must be positive definite (a reading with zero noise cannot be \
                 weighed)",
            ),
            (
                json!({"tc": {"measures": [], "std": 1}}),
                "/model/sensors/tc/measures",
                "a vector sensor needs at least one formula",
            ),
            (
                json!({"tc": {"measures": 4, "std": 1}}),
                "/model/sensors/tc/measures",
                "expected a formula string or a list of them, found a number",
            ),
            (
                json!({"tc": {"measures": "temp", "std": "tight"}}),
                "/model/sensors/tc/std",
                "expected a number, found a string",
            ),
            (
                json!({"t-c": {"measures": "temp", "std": 1}}),
                "/model/sensors/t-c",
                "sensor name 't-c' must start with a letter or '_' and hold only letters, \
                 digits and '_'",
            ),
            (
                json!({"tc": {"measures": "temp", "std": 1, "sigma": 1}}),
                "/model/sensors/tc/sigma",
                "unknown field 'sigma'; expected one of measures, std, covariance",
            ),
        ];
        for (sensors, at, msg) in cases {
            assert_eq!(sensor_faults(sensors), [(at.to_string(), msg.to_string())]);
        }
    }

    #[test]
    fn the_sensor_limit_is_kept() {
        let limits = Limits {
            max_sensors: 1,
            ..Limits::default()
        };
        let two =
            kiln(json!({"a": {"measures": "temp", "std": 1}, "b": {"measures": "temp", "std": 1}}));
        assert_eq!(
            faults(check_model(&two, "/model", &limits)),
            [(
                "/model/sensors".into(),
                "2 sensors exceed the limit of 1".into()
            )]
        );
    }
}
