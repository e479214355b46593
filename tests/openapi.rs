//! The contract file against the code: every routed path is documented and every
//! documented path is routed, keys are declared where they apply, and every example
//! matches its schema (checked with a JSON Schema 2020-12 validator, the dialect of
//! OpenAPI 3.1).

use serde_json::{json, Value};
use std::collections::BTreeSet;

const METHODS: &[&str] = &[
    "get", "put", "post", "delete", "options", "head", "patch", "trace",
];

fn doc() -> Value {
    serde_norway::from_str(tacit::http::OPENAPI_YAML).expect("openapi.yaml parses")
}

fn operations(doc: &Value) -> Vec<(String, String, Value)> {
    let mut ops = Vec::new();
    for (path, item) in doc["paths"].as_object().expect("paths") {
        for (method, op) in item.as_object().expect("path item") {
            if METHODS.contains(&method.as_str()) {
                ops.push((method.to_uppercase(), path.clone(), op.clone()));
            }
        }
    }
    ops
}

#[test]
fn every_route_is_documented_and_every_documented_path_is_routed() {
    let routed: BTreeSet<(String, String)> = tacit::http::routes::all()
        .map(|r| (r.method.to_string(), r.path.to_string()))
        .collect();
    let documented: BTreeSet<(String, String)> = operations(&doc())
        .into_iter()
        .map(|(m, p, _)| (m, p))
        .collect();
    assert_eq!(routed, documented);
    // And the router has every route of API.md's endpoint table.
    for (m, p) in [
        ("POST", "/v1/estimate"),
        ("POST", "/v1/estimate/stream"),
        ("POST", "/v1/smooth"),
        ("POST", "/v1/simulate"),
        ("POST", "/v1/check"),
        ("GET", "/v1/info"),
        ("GET", "/healthz"),
        ("GET", "/readyz"),
        ("GET", "/metrics"),
        ("GET", "/openapi.json"),
    ] {
        assert!(routed.contains(&(m.to_string(), p.to_string())), "{m} {p}");
    }
}

#[test]
fn keyed_routes_require_the_bearer_scheme_and_open_routes_say_so() {
    let d = doc();
    assert_eq!(d["security"], json!([{"bearer": []}]));
    assert_eq!(
        d["components"]["securitySchemes"]["bearer"]["scheme"],
        "bearer"
    );
    let ops = operations(&d);
    for r in tacit::http::routes::all() {
        let (_, _, op) = ops
            .iter()
            .find(|(m, p, _)| m == r.method && p == r.path)
            .expect("documented");
        if r.keyed {
            assert!(
                op.get("security").is_none(),
                "{r:?} inherits the bearer scheme"
            );
            assert!(op["responses"].get("401").is_some(), "{r:?} documents 401");
        } else {
            assert_eq!(op["security"], json!([]), "{r:?} is open");
        }
    }
}

#[test]
fn post_routes_document_their_errors() {
    for (m, p, op) in operations(&doc()) {
        if m != "POST" {
            continue;
        }
        for code in ["200", "400", "401", "413", "415", "422", "503"] {
            assert!(op["responses"].get(code).is_some(), "{m} {p} lacks {code}");
        }
    }
}

#[test]
fn the_safety_caution_is_in_the_description() {
    let d = doc();
    let text = d["info"]["description"].as_str().unwrap();
    for phrase in ["advisory", "safety function", "local codes"] {
        assert!(text.contains(phrase), "{phrase}");
    }
}

fn resolve<'a>(doc: &'a Value, v: &'a Value) -> &'a Value {
    match v.get("$ref").and_then(Value::as_str) {
        Some(r) => doc
            .pointer(r.trim_start_matches('#'))
            .unwrap_or_else(|| panic!("dangling {r}")),
        None => v,
    }
}

/// A validator for `schema`, with the document's components beside it so its
/// `#/components/...` references resolve.
fn validator(doc: &Value, schema: &Value) -> jsonschema::Validator {
    let mut root = match schema {
        Value::Object(m) => m.clone(),
        Value::Bool(_) => panic!("boolean schema"),
        _ => panic!("not a schema: {schema}"),
    };
    root.insert(
        "$schema".into(),
        json!("https://json-schema.org/draft/2020-12/schema"),
    );
    root.insert("components".into(), doc["components"].clone());
    jsonschema::validator_for(&Value::Object(root)).expect("schema compiles")
}

/// Every (where, media type, schema, example value) in the document.
fn examples(doc: &Value) -> Vec<(String, String, Value, Value)> {
    let mut out = Vec::new();
    let mut visit = |place: String, content: &Value| {
        let Some(content) = content.as_object() else {
            return;
        };
        for (mt, media) in content {
            let Some(schema) = media.get("schema") else {
                continue;
            };
            if let Some(exs) = media.get("examples").and_then(Value::as_object) {
                for (name, ex) in exs {
                    let ex = resolve(doc, ex);
                    out.push((
                        format!("{place} {mt} {name}"),
                        mt.clone(),
                        schema.clone(),
                        ex["value"].clone(),
                    ));
                }
            }
        }
    };
    for (m, p, op) in operations(doc) {
        if let Some(body) = op.get("requestBody") {
            visit(format!("{m} {p} request"), &resolve(doc, body)["content"]);
        }
        for (code, res) in op["responses"].as_object().unwrap() {
            visit(format!("{m} {p} {code}"), &resolve(doc, res)["content"]);
        }
    }
    out
}

/// The JSON values an example stands for: NDJSON examples are one value per line.
fn instances(mt: &str, value: &Value) -> Vec<Value> {
    match (mt, value) {
        ("application/x-ndjson", Value::String(text)) => text
            .lines()
            .filter(|l| !l.trim().is_empty())
            .map(|l| serde_json::from_str(l).unwrap_or_else(|e| panic!("{e}: {l}")))
            .collect(),
        _ => vec![value.clone()],
    }
}

#[test]
fn every_example_matches_its_schema() {
    let d = doc();
    let all = examples(&d);
    assert!(all.len() >= 20, "only {} examples", all.len());
    let mut lines = 0;
    for (place, mt, schema, value) in &all {
        let v = validator(&d, schema);
        for inst in instances(mt, value) {
            lines += 1;
            let errors: Vec<String> = v.iter_errors(&inst).map(|e| e.to_string()).collect();
            assert!(errors.is_empty(), "{place}: {errors:?}");
        }
    }
    assert!(lines > all.len(), "NDJSON examples were split into lines");
}

#[test]
fn the_validator_rejects_broken_examples() {
    // Guards the test above against passing vacuously (a schema that accepts anything).
    let d = doc();
    let req = &d["paths"]["/v1/estimate"]["post"]["requestBody"]["content"]["application/json"];
    let v = validator(&d, &req["schema"]);
    let good = req["examples"]["crane_trolley"]["value"].clone();
    assert!(v.is_valid(&good));
    let mut no_method = good.clone();
    no_method["filter"]
        .as_object_mut()
        .unwrap()
        .remove("method");
    assert!(!v.is_valid(&no_method));
    let mut bad_time = good.clone();
    bad_time["measurements"][0]["t"] = json!(true);
    assert!(!v.is_valid(&bad_time));
    let mut two_dynamics = good.clone();
    two_dynamics["model"]["dynamics"]["next"] = json!({"pos": "pos"});
    assert!(!v.is_valid(&two_dynamics));
    let mut bad_method = good;
    bad_method["filter"]["method"] = json!("particle");
    assert!(!v.is_valid(&bad_method));
}

#[test]
fn problem_schema_matches_what_the_server_sends() {
    let d = doc();
    let v = validator(&d, &json!({"$ref": "#/components/schemas/Problem"}));
    let mut p =
        tacit::problem::Problem::field("/model/sensors/encoder/std", "must not be negative");
    p.errors[0].column = Some(3);
    let sent: Value = serde_json::from_slice(&p.to_json()).unwrap();
    assert!(v.is_valid(&sent), "{sent}");
    let info = v_info(&d);
    assert!(info.is_valid(&tacit::job::info(&tacit::config::Limits::default())));
}

fn v_info(d: &Value) -> jsonschema::Validator {
    validator(d, &json!({"$ref": "#/components/schemas/Info"}))
}

/// Paths in `value` that the schema neither validates nor names: a field the server sends
/// (or a request field it accepts) that the contract file does not document.
fn undocumented(doc: &Value, schema: &Value, value: &Value, path: &str, out: &mut Vec<String>) {
    let schema = resolve(doc, schema);
    for key in ["oneOf", "anyOf"] {
        if let Some(variants) = schema.get(key).and_then(Value::as_array) {
            match variants.iter().find(|v| validator(doc, v).is_valid(value)) {
                Some(v) => undocumented(doc, v, value, path, out),
                None => out.push(format!("{path} (matches no variant)")),
            }
            return;
        }
    }
    match value {
        Value::Object(map) => {
            let props = schema.get("properties").and_then(Value::as_object);
            for (k, v) in map {
                let here = format!("{path}/{k}");
                match (
                    props.and_then(|p| p.get(k)),
                    schema.get("additionalProperties"),
                ) {
                    (Some(s), _) => undocumented(doc, s, v, &here, out),
                    (None, Some(s)) if s.is_object() => undocumented(doc, s, v, &here, out),
                    _ => out.push(here),
                }
            }
        }
        Value::Array(items) => {
            if let Some(s) = schema.get("items") {
                for (i, v) in items.iter().enumerate().take(5) {
                    undocumented(doc, s, v, &format!("{path}/{i}"), out);
                }
            }
        }
        _ => {}
    }
}

fn assert_documented(doc: &Value, schema_name: &str, value: &Value) {
    let schema = json!({"$ref": format!("#/components/schemas/{schema_name}")});
    let v = validator(doc, &schema);
    let errors: Vec<String> = v
        .iter_errors(value)
        .map(|e| format!("{} at {}", e, e.instance_path()))
        .collect();
    assert!(errors.is_empty(), "{schema_name}: {errors:?}\n{value}");
    let mut extra = Vec::new();
    undocumented(doc, &schema, value, "", &mut extra);
    assert!(
        extra.is_empty(),
        "{schema_name}: undocumented fields {extra:?}"
    );
}

/// Real requests and the server's real answers, checked against the contract file: both
/// must validate and neither may carry a field the file does not describe.
#[tokio::test]
async fn real_requests_and_answers_match_the_contract_file() {
    use crate::support::{answer, start_default};
    let d = doc();
    let s = start_default().await;
    let model = json!({
        "states": ["pos", "vel"],
        "inputs": ["force"],
        "parameters": {"mass": 12.0, "drag": {"initial": 0.4, "std": 0.2, "random_walk": 1e-4}},
        "dynamics": {"rates": {"pos": "vel", "vel": "(force - drag*vel*abs(vel))/mass"}},
        "process_noise": {"density": {"vel": 0.05}},
        "sensors": {"encoder": {"measures": "pos", "std": 0.002}, "pair": {"measures": ["pos", "vel"], "covariance": [[1e-4, 0], [0, 1e-2]]}}
    });
    let prior =
        json!({"t": 0.0, "mean": {"pos": 0.0, "vel": 0.0}, "std": {"pos": 1.0, "vel": 5.0}});
    let sim_req = json!({"model": model, "prior": prior, "times": {"start": 0.1, "step": 0.1, "count": 6}, "seed": 3,
        "inputs": [{"t": 0.0, "inputs": {"force": 2.5}}], "readings": {"pair": {"every": 2, "dropout": 0.1, "outliers": {"probability": 0.1, "scale": 10}}}});
    assert_documented(&d, "SimulateRequest", &sim_req);
    let post = |path: &'static str, body: Value| {
        let c = s.client.clone();
        let url = s.url(path);
        async move { answer(c.post(url).json(&body).send().await.unwrap()).await }
    };
    let sim = post("/v1/simulate", sim_req).await;
    assert_eq!(sim.status, 200, "{}", sim.text);
    assert_documented(&d, "SimulateResponse", &sim.body);
    for method in ["ekf", "ukf", "enkf"] {
        let req = json!({"model": model, "filter": {"method": method, "unscented": {"alpha": 1.0}, "ensemble": {"members": 8, "seed": 1},
            "integration": {"max_step": 0.05, "rtol": 1e-7}, "gate": {"probability": 0.999}}, "prior": prior,
            "measurements": sim.body["measurements"], "output": {"covariance": "full", "innovations": true, "at": [0.05, 0.25]}});
        assert_documented(&d, "EstimateRequest", &req);
        for path in ["/v1/estimate", "/v1/smooth"] {
            let a = post(path, req.clone()).await;
            assert_eq!(a.status, 200, "{path} {method}: {}", a.text);
            assert_documented(&d, "EstimateResponse", &a.body);
            // The posterior goes back in as a prior.
            assert_documented(&d, "Prior", &a.body["posterior"]);
        }
    }
    let chk = post("/v1/check", json!({"model": model, "prior": prior})).await;
    assert_eq!(chk.status, 200, "{}", chk.text);
    assert_documented(&d, "CheckResponse", &chk.body);
    let bad = post("/v1/estimate", json!({"model": model})).await;
    assert_documented(&d, "Problem", &bad.body);
    let info = answer(s.client.get(s.url("/v1/info")).send().await.unwrap()).await;
    assert_documented(&d, "Info", &info.body);
}
