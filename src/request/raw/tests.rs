//! Tests of the raw types: every known field is read, wrong values and unknown keys are
//! kept for the validation step, each shape of a two-shape field lands in its variant.

use super::*;
use serde_json::json;
use serde_json::{Map, Value};

/// A JSON literal that outlives the test's statements, so raw types can borrow from it.
macro_rules! leak {
    ($($t:tt)*) => {
        &*Box::leak(Box::new(json!($($t)*)))
    };
}

/// Every name in a `KNOWN` list is a field of its type: an object holding them all
/// leaves nothing unknown.
macro_rules! all_known {
    ($($t:ty: $known:expr),* $(,)?) => {$({
        let obj: Map<String, Value> =
            $known.iter().map(|k| (k.to_string(), json!(1))).collect();
        let v = Value::Object(obj);
        let Field::Ok(t) = section::<$t>(&v) else {
            panic!("{:?} did not read", $known)
        };
        assert!(t.unknown.is_empty(), "{:?}", $known);
    })*};
}

#[test]
fn known_lists_match_the_types() {
    all_known!(
        RawModel: RawModel::KNOWN,
        RawEstimated: RawEstimated::KNOWN,
        RawDynamics: RawDynamics::KNOWN,
        RawLinear: RawLinear::DISCRETE,
        RawLinear: RawLinear::CONTINUOUS,
        RawProcessNoise: RawProcessNoise::KNOWN,
        RawSensor: RawSensor::KNOWN,
        RawFilter: RawFilter::KNOWN,
        RawUnscented: RawUnscented::KNOWN,
        RawEnsemble: RawEnsemble::KNOWN,
        RawIntegration: RawIntegration::KNOWN,
        RawGate: RawGate::KNOWN,
        RawPrior: RawPrior::KNOWN,
        RawOutput: RawOutput::KNOWN,
    );
}

#[test]
fn wrong_leaves_are_kept_and_unknown_keys_collected() {
    let v = json!({"std": "wide", "initial": 1, "drift": 0.1, "colour": null});
    let Field::Ok(p) = section::<RawEstimated>(&v) else {
        panic!()
    };
    assert_eq!(p.std, Some(Field::Wrong(json!("wide"))));
    assert_eq!(p.initial, Some(Field::Ok(1.0)));
    let keys: Vec<&str> = p.unknown.keys().map(String::as_str).collect();
    assert_eq!(keys, ["drift", "colour"]);
}

#[test]
fn null_reads_as_absent_and_arrays_are_not_objects() {
    let Field::Ok(g) = section::<RawGate>(leak!({"probability": null})) else {
        panic!()
    };
    assert!(g.probability.is_none());
    assert!(matches!(section::<RawGate>(leak!([0.5])), Field::Wrong(_)));
}

#[test]
fn two_shaped_fields_take_either_shape() {
    let Field::Ok(s) = section::<RawSensor>(leak!({"measures": ["a", 2], "std": [1, "x"]})) else {
        panic!()
    };
    let Some(Field::Ok(Measures::Many(m))) = s.measures else {
        panic!()
    };
    assert_eq!(m, [Field::Ok("a"), Field::Wrong(json!(2))]);
    let Some(Field::Ok(Spread::PerComponent(sd))) = s.std else {
        panic!()
    };
    assert_eq!(sd, [Field::Ok(1.0), Field::Wrong(json!("x"))]);
    let Field::Ok(w) = section::<RawEnsemble>(leak!({"members": -3, "seed": 2.5})) else {
        panic!()
    };
    assert_eq!(w.members, Some(Field::Wrong(json!(-3))));
    assert_eq!(u64::found(&json!(2.5)), "2.5");
}

#[test]
fn numbers_keep_their_text_and_shapes_their_variant() {
    let Field::Ok(d) = section::<RawDynamics>(leak!({"rates": {"a": 1.0, "b": 2, "c": "a"}}))
    else {
        panic!()
    };
    let Some(Field::Ok(rates)) = d.rates else {
        panic!()
    };
    let texts: Vec<String> = rates
        .0
        .iter()
        .map(|(_, f)| match f {
            Field::Ok(FormulaText::Number(n)) => n.to_string(),
            Field::Ok(FormulaText::Text(t)) => t.to_string(),
            Field::Wrong(v) => panic!("{v}"),
        })
        .collect();
    // A constant compiles from the text serde_json writes for it, as in v1.
    assert_eq!(texts, ["1.0", "2", "a"]);
    let Field::Ok(m) = section::<RawModel>(leak!({"parameters": {"k": 3, "m": "x", "e": {}}}))
    else {
        panic!()
    };
    let Some(Field::Ok(p)) = m.parameters else {
        panic!()
    };
    assert!(matches!(p.0[0].1, Field::Ok(RawParameter::Fixed(x)) if x == 3.0));
    assert_eq!(p.0[1].1.as_wrong(), Some(&json!("x")));
    assert!(matches!(p.0[2].1, Field::Ok(RawParameter::Estimated(_))));
    let Field::Ok(o) = section::<RawOutput>(leak!({"at": [3, "2026-03-01T06:00:00Z", {}]})) else {
        panic!()
    };
    let Some(Field::Ok(at)) = o.at else { panic!() };
    assert!(matches!(at[0], Field::Ok(RawTime::Seconds(x)) if x == 3.0));
    assert!(matches!(at[1], Field::Ok(RawTime::Stamp(_))));
    assert_eq!(at[2].as_wrong(), Some(&json!({})));
}
