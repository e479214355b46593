//! The contract file against the code: every routed path is documented and every
//! documented path is routed, keys are declared where they apply, every example matches
//! its schema (checked with a JSON Schema 2020-12 validator, the dialect of OpenAPI 3.1),
//! and every example answer is the running server's real answer to its paired example
//! request, so the examples cannot drift from the service. The README's worked examples
//! are held to the same rule.

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
    // And the router has every route of the README's endpoint table.
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

/// Issue 15, item 14: the schema says what the server does. Empty (or otherwise
/// non-identifier) names passed the schema and got a 422; `null` for `output.at`,
/// `filter.ensemble.seed` and `prior.inputs` was taken as absent by the server and
/// refused by the schema. Each request below is judged by the schema and by the server
/// (in process), and the two must agree.
#[test]
fn the_schema_refuses_what_the_server_refuses_and_takes_what_it_takes() {
    use tacit::job::Stop;
    let d = doc();
    let schema = d["components"]["schemas"]["EstimateRequest"].clone();
    let v = validator(&d, &schema);
    let base = json!({
        "model": {"states": ["pos", "vel"], "inputs": ["force"],
                  "dynamics": {"rates": {"pos": "vel", "vel": "force"}},
                  "process_noise": {"density": {"vel": 0.1}},
                  "sensors": {"encoder": {"measures": "pos", "std": 0.1}}},
        "filter": {"method": "enkf", "ensemble": {"members": 8}},
        "prior": {"t": 0, "mean": {"pos": 0, "vel": 0}, "std": {"pos": 1, "vel": 1}},
        "measurements": [{"t": 1, "values": {"encoder": 0.1}}]
    });
    let with = |f: &dyn Fn(&mut Value)| {
        let mut b = base.clone();
        f(&mut b);
        b
    };
    let cases: Vec<(&str, Value, bool)> = vec![
        ("as given", base.clone(), true),
        (
            "output.at null",
            with(&|b| b["output"] = json!({"at": null})),
            true,
        ),
        (
            "seed null",
            with(&|b| b["filter"]["ensemble"]["seed"] = Value::Null),
            true,
        ),
        (
            "prior.inputs null",
            with(&|b| b["prior"]["inputs"] = Value::Null),
            true,
        ),
        (
            "an empty state name",
            with(&|b| b["model"]["states"] = json!(["", "vel"])),
            false,
        ),
        (
            "a state name with a space",
            with(&|b| b["model"]["inputs"] = json!(["drive force"])),
            false,
        ),
        (
            "an empty sensor name",
            with(&|b| {
                b["model"]["sensors"] = json!({"": {"measures": "pos", "std": 0.1}});
                b["measurements"] = json!([]);
            }),
            false,
        ),
    ];
    let limits = tacit::config::Limits::default();
    for (label, body, ok) in cases {
        let schema_ok = v.is_valid(&body);
        let bytes = serde_json::to_vec(&body).unwrap();
        let server_ok = tacit::job::estimate(&bytes, &limits, &Stop::never()).is_ok();
        assert_eq!(
            (schema_ok, server_ok),
            (ok, ok),
            "{label}: schema {schema_ok}, server {server_ok}"
        );
    }
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
        "inputs": [{"t": 0.0, "inputs": {"force": 2.5}}], "sampling": {"pair": {"every": 2, "dropout": 0.1, "outliers": {"probability": 0.1, "scale": 10}}}});
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

/// A family model (issue 13), lowered for `ekf` and run with the local update, in batch
/// and on the stream: requests and answers match the contract file.
#[tokio::test]
async fn family_requests_and_answers_match_the_contract_file() {
    use crate::support::{answer, start_default};
    let d = doc();
    let s = start_default().await;
    let model = json!({
        "families": {"x": {"size": 12, "boundary": "periodic"}},
        "parameters": {"F": 8.0, "damp": [1.0, 1.0, 1.0, 1.0, 1.0, 1.0, 1.0, 1.0, 1.0, 1.0, 1.0, 1.0]},
        "dynamics": {"rates": {"x[i]": "(x[i+1] - x[i-2])*x[i-1] - damp[i]*x[i] + F"}},
        "process_noise": {"density": {"x": 0.01}},
        "sensors": {"obs": {"measures": "x[i]", "every": 3, "std": 1.0},
                    "two": {"measures": "x[i]", "elements": [1, 5], "std": 0.5}}
    });
    let lines = json!([
        {"t": 0.05, "values": {"obs": [8.1, 7.9, 8.3, 8.0], "two": [8.2, 7.7]}},
        {"t": 0.1, "values": {"obs": [8.0, 8.1, 8.2, 7.9]}}
    ]);
    let post = |path: &'static str, body: Value| {
        let c = s.client.clone();
        let url = s.url(path);
        async move { answer(c.post(url).json(&body).send().await.unwrap()).await }
    };
    let prior = json!({"t": 0.0, "mean": {"x": 8.0}, "std": {"x": 1.0}});
    let local = json!({"method": "enkf", "ensemble": {"members": 6, "seed": 2, "inflation": 1.02, "update": "local", "radius": 3},
        "integration": {"fixed_step": 0.05}});
    for filter in [json!({"method": "ekf"}), local] {
        let req = json!({"model": model, "filter": filter, "prior": prior, "measurements": lines});
        assert_documented(&d, "EstimateRequest", &req);
        let a = post("/v1/estimate", req).await;
        assert_eq!(a.status, 200, "{}", a.text);
        assert_documented(&d, "EstimateResponse", &a.body);
        if a.body["posterior"].get("members").is_some() {
            let chk = post("/v1/check", json!({"model": model, "filter": {"method": "enkf", "ensemble": {"update": "local", "radius": 2}}})).await;
            assert_eq!(chk.status, 200, "{}", chk.text);
            assert_documented(&d, "FamilyCheckResponse", &chk.body);
            let again =
                json!({"t": a.body["posterior"]["t"], "members": a.body["posterior"]["members"]});
            assert_documented(&d, "FamilyPrior", &again);
        }
    }
}

/// Relative tolerance for numbers in an example answer against the live answer. Examples
/// carry the answer's digits, so only a changed number (or a printing change beyond the
/// sixth significant digit) trips it.
const EXAMPLE_RTOL: f64 = 1e-6;

/// Where `example` and `actual` disagree, appended to `out` as `path: reason`. Keys must
/// be the same at every level and arrays the same length, except that an abridged example
/// may leave out keys and show only a leading part of an array. Numbers agree within
/// `EXAMPLE_RTOL` of the larger magnitude; strings, booleans and nulls exactly.
fn disagreements(
    example: &Value,
    actual: &Value,
    abridged: bool,
    path: &str,
    out: &mut Vec<String>,
) {
    match (example, actual) {
        (Value::Object(e), Value::Object(a)) => {
            for (k, ev) in e {
                let here = format!("{path}/{k}");
                match a.get(k) {
                    Some(av) => disagreements(ev, av, abridged, &here, out),
                    None => out.push(format!("{here}: in the example, not in the answer")),
                }
            }
            if !abridged {
                for k in a.keys().filter(|k| !e.contains_key(*k)) {
                    out.push(format!("{path}/{k}: in the answer, not in the example"));
                }
            }
        }
        (Value::Array(e), Value::Array(a)) => {
            let length_ok = if abridged {
                e.len() <= a.len()
            } else {
                e.len() == a.len()
            };
            if !length_ok {
                out.push(format!(
                    "{path}: {} items in the example, {} in the answer",
                    e.len(),
                    a.len()
                ));
            }
            for (i, (ev, av)) in e.iter().zip(a).enumerate() {
                disagreements(ev, av, abridged, &format!("{path}/{i}"), out);
            }
        }
        (Value::Number(e), Value::Number(a)) => {
            let (e, a) = (e.as_f64().unwrap(), a.as_f64().unwrap());
            if (e - a).abs() > EXAMPLE_RTOL * e.abs().max(a.abs()) {
                out.push(format!("{path}: {e} in the example, {a} in the answer"));
            }
        }
        _ if example == actual => {}
        _ => out.push(format!(
            "{path}: {example} in the example, {actual} in the answer"
        )),
    }
}

/// An example request and the example answer of the same name, ready to send.
struct Pair {
    place: String,
    method: String,
    path: String,
    media_type: Option<String>,
    request: Option<Value>,
    answer_media_type: String,
    answer: Value,
    abridged: bool,
}

/// Every example `200` answer with the request that produces it: the request example of
/// the same name, or none for an operation without a body.
fn paired_examples(doc: &Value) -> Vec<Pair> {
    let mut pairs = Vec::new();
    for (method, path, op) in operations(doc) {
        let Some(ok) = op["responses"].get("200") else {
            continue;
        };
        let ok_content = resolve(doc, ok)["content"].clone();
        let Some(ok_content) = ok_content.as_object() else {
            continue;
        };
        for (answer_mt, media) in ok_content {
            if answer_mt.starts_with("text/") {
                continue;
            }
            let Some(exs) = media.get("examples").and_then(Value::as_object) else {
                continue;
            };
            for (name, ex) in exs {
                let ex = resolve(doc, ex);
                let request = match op.get("requestBody") {
                    None => None,
                    Some(body) => {
                        let content = resolve(doc, body)["content"].clone();
                        content.as_object().and_then(|c| {
                            c.iter().find_map(|(mt, m)| {
                                m["examples"]
                                    .get(name)
                                    .map(|r| (mt.clone(), resolve(doc, r)["value"].clone()))
                            })
                        })
                    }
                };
                if op.get("requestBody").is_some() && request.is_none() {
                    continue;
                }
                let (media_type, request) = match request {
                    Some((mt, v)) => (Some(mt), Some(v)),
                    None => (None, None),
                };
                pairs.push(Pair {
                    place: format!("{method} {path} {name}"),
                    method: method.clone(),
                    path: path.clone(),
                    media_type,
                    request,
                    answer_media_type: answer_mt.clone(),
                    answer: ex["value"].clone(),
                    abridged: ex.get("x-abridged").is_some(),
                });
            }
        }
    }
    pairs
}

/// The example answer as JSON: NDJSON examples become the array of their lines.
fn as_json(mt: &str, value: &Value) -> Value {
    match mt {
        "application/x-ndjson" => Value::Array(instances(mt, value)),
        _ => value.clone(),
    }
}

#[tokio::test]
async fn every_example_answer_is_the_live_answer_to_its_example_request() {
    use crate::support::start_default;
    let d = doc();
    let pairs = paired_examples(&d);
    let names: Vec<&str> = pairs.iter().map(|p| p.place.as_str()).collect();
    // Guards against a vacuous pass: the examples this file is known to pair.
    for want in [
        "POST /v1/estimate crane_trolley",
        "POST /v1/estimate bottling_conveyor_linear",
        "POST /v1/estimate/stream water_tower",
        "POST /v1/estimate/stream failed_mid_stream",
        "POST /v1/smooth kiln",
        "POST /v1/simulate crane_trolley",
        "POST /v1/check crane_trolley",
        "POST /v1/identify kiln",
        "POST /v1/calibrate water_tower",
        "GET /v1/info defaults",
        "GET /healthz ok",
    ] {
        assert!(names.contains(&want), "{want} is not paired: {names:?}");
    }
    let s = start_default().await;
    let mut faults = Vec::new();
    for p in &pairs {
        let url = s.url(&p.path);
        let res = match (&p.request, &p.media_type) {
            (Some(body), Some(mt)) => {
                let bytes = match body {
                    Value::String(text) => text.clone().into_bytes(),
                    other => serde_json::to_vec(other).unwrap(),
                };
                s.client
                    .post(url)
                    .header("content-type", mt.as_str())
                    .body(bytes)
                    .send()
                    .await
            }
            _ => {
                assert_eq!(p.method, "GET", "{}: a body-less example answer", p.place);
                s.client.get(url).send().await
            }
        }
        .unwrap();
        let status = res.status().as_u16();
        let text = res.text().await.unwrap();
        if status != 200 {
            faults.push(format!("{}: status {status}: {text}", p.place));
            continue;
        }
        let actual = match p.answer_media_type.as_str() {
            "application/x-ndjson" => as_json(&p.answer_media_type, &Value::String(text)),
            _ => serde_json::from_str(&text).unwrap_or_else(|e| panic!("{}: {e}: {text}", p.place)),
        };
        let example = as_json(&p.answer_media_type, &p.answer);
        let mut out = Vec::new();
        disagreements(&example, &actual, p.abridged, "", &mut out);
        faults.extend(out.into_iter().map(|f| format!("{}: {f}", p.place)));
    }
    assert!(
        faults.is_empty(),
        "examples that differ from the live answers:\n{}",
        faults.join("\n")
    );
}

#[test]
fn the_example_comparison_catches_drift() {
    // Guards the test above: each kind of drift it exists to catch is reported.
    let live = json!({"a": [1.0, 2.0, 3.0], "b": {"c": "ekf", "d": 0.5}});
    let mut out = Vec::new();
    disagreements(&live, &live, false, "", &mut out);
    assert!(out.is_empty(), "{out:?}");
    let within = json!({"a": [1.0 + 5e-7, 2.0, 3.0], "b": {"c": "ekf", "d": 0.5}});
    disagreements(&within, &live, false, "", &mut out);
    assert!(out.is_empty(), "{out:?}");
    for (drifted, abridged, at) in [
        (
            json!({"a": [1.0 + 2e-6, 2.0, 3.0], "b": {"c": "ekf", "d": 0.5}}),
            false,
            "/a/0",
        ),
        (
            json!({"a": [1.0, 2.0, 3.0], "b": {"c": "ukf", "d": 0.5}}),
            false,
            "/b/c",
        ),
        (
            json!({"a": [1.0, 2.0, 3.0], "b": {"c": "ekf", "e": 0.5}}),
            true,
            "/b/e",
        ),
        (
            json!({"a": [1.0, 2.0, 3.0], "b": {"c": "ekf"}}),
            false,
            "/b/d",
        ),
        (
            json!({"a": [1.0, 2.0], "b": {"c": "ekf", "d": 0.5}}),
            false,
            "/a",
        ),
        (
            json!({"a": [1.0, 2.0, 3.0, 4.0], "b": {"c": "ekf", "d": 0.5}}),
            true,
            "/a",
        ),
        (
            json!({"a": [1.0, 2.0, 3.0], "b": {"c": "ekf", "d": "0.5"}}),
            false,
            "/b/d",
        ),
    ] {
        let mut out = Vec::new();
        disagreements(&drifted, &live, abridged, "", &mut out);
        assert!(
            out.iter().any(|f| f.starts_with(&format!("{at}:"))),
            "{drifted}: {out:?}"
        );
    }
    // An abridged example may show a leading part and leave keys out.
    let mut out = Vec::new();
    disagreements(&json!({"a": [1.0, 2.0]}), &live, true, "", &mut out);
    assert!(out.is_empty(), "{out:?}");
}

/// The slugs `GET /problems/{slug}` documents.
fn documented_slugs(doc: &Value) -> Vec<String> {
    let params = doc["paths"]["/problems/{slug}"]["get"]["parameters"]
        .as_array()
        .expect("the problem pages are documented");
    params[0]["schema"]["enum"]
        .as_array()
        .unwrap()
        .iter()
        .map(|s| s.as_str().unwrap().to_string())
        .collect()
}

/// Every problem `type` in the document's examples, inline or in NDJSON lines.
fn example_problem_types(v: &Value, out: &mut Vec<String>) {
    match v {
        Value::Object(m) => {
            if let (Some(Value::String(t)), Some(Value::Number(_))) =
                (m.get("type"), m.get("status"))
            {
                out.push(t.clone());
            }
            m.values().for_each(|x| example_problem_types(x, out));
        }
        Value::Array(items) => items.iter().for_each(|x| example_problem_types(x, out)),
        Value::String(text) if text.contains("\"error\"") => {
            for line in text
                .lines()
                .filter_map(|l| serde_json::from_str::<Value>(l).ok())
            {
                example_problem_types(&line, out);
            }
        }
        _ => {}
    }
}

#[test]
fn every_example_problem_type_is_a_documented_page() {
    // RFC 9457 §3.1.1: a relative type URI is resolved against the document's base and,
    // when dereferenced, should give human-readable documentation of the problem type.
    let d = doc();
    let slugs = documented_slugs(&d);
    let mut types = Vec::new();
    example_problem_types(&d["paths"], &mut types);
    example_problem_types(&d["components"]["responses"], &mut types);
    assert!(types.len() >= 8, "only {} problem examples", types.len());
    for t in types {
        let slug = t
            .strip_prefix("/problems/")
            .unwrap_or_else(|| panic!("{t} is not a relative /problems/<slug> reference"));
        assert!(
            slugs.iter().any(|s| s == slug),
            "{t} has no documented page"
        );
    }
}

#[tokio::test]
async fn every_documented_problem_page_is_served() {
    use crate::support::{answer, start_default};
    let d = doc();
    // Both ways: every kind the service can answer is documented, and every documented
    // slug is served.
    let documented: std::collections::BTreeSet<String> = documented_slugs(&d).into_iter().collect();
    for kind in tacit::problem::ProblemKind::ALL {
        assert!(
            documented.contains(kind.slug()),
            "problem kind {kind:?} (/problems/{}) is not in openapi/openapi.yaml",
            kind.slug()
        );
    }
    let s = start_default().await;
    for slug in documented_slugs(&d) {
        let a = answer(
            s.client
                .get(s.url(&format!("/problems/{slug}")))
                .send()
                .await
                .unwrap(),
        )
        .await;
        assert_eq!(a.status, 200, "/problems/{slug}: {}", a.text);
        assert!(
            a.content_type.starts_with("text/html") || a.content_type.starts_with("text/plain"),
            "/problems/{slug}: {}",
            a.content_type
        );
        assert!(!a.text.trim().is_empty(), "/problems/{slug} is empty");
    }
    let a = answer(
        s.client
            .get(s.url("/problems/no-such-problem"))
            .send()
            .await
            .unwrap(),
    )
    .await;
    assert_eq!(a.status, 404, "{}", a.text);
}

/// The text between `start` (exclusive) and the next `end` after it.
fn between<'a>(text: &'a str, start: &str, end: &str) -> &'a str {
    let from = text
        .find(start)
        .unwrap_or_else(|| panic!("README lacks {start:?}"))
        + start.len();
    let len = text[from..]
        .find(end)
        .unwrap_or_else(|| panic!("README lacks {end:?}"));
    &text[from..from + len]
}

/// The README's two worked examples are the service's real answers too: the Quick start
/// (an abridged answer: the estimates it shows are matched to the live ones by time) and
/// the stream continued from its posterior (shown whole).
#[tokio::test]
async fn readme_examples_are_the_live_answers() {
    use crate::support::start_default;
    let readme = include_str!("../README.md");
    let s = start_default().await;
    let mut faults = Vec::new();

    let request = between(
        readme,
        "/v1/estimate \\\n  -H 'Content-Type: application/json' \\\n  -d '",
        "'\n```",
    );
    let request: Value = serde_json::from_str(request).expect("the Quick start request is JSON");
    let shown = between(readme, "reformatted here):\n\n```json\n", "```");
    let shown: String = shown
        .lines()
        .filter(|l| l.trim() != "...")
        .collect::<Vec<_>>()
        .join("\n");
    let shown: Value =
        serde_json::from_str(&shown).expect("the Quick start answer is JSON once `...` lines go");
    let res = s
        .client
        .post(s.url("/v1/estimate"))
        .json(&request)
        .send()
        .await
        .unwrap();
    let live: Value = res.json().await.unwrap();
    for key in ["states", "posterior", "summary"] {
        let mut out = Vec::new();
        disagreements(&shown[key], &live[key], false, &format!("/{key}"), &mut out);
        faults.extend(out);
    }
    let live_estimates = live["estimates"].as_array().unwrap();
    assert_eq!(live_estimates.len(), 10);
    for e in shown["estimates"].as_array().unwrap() {
        match live_estimates.iter().find(|l| l["t"] == e["t"]) {
            Some(l) => disagreements(
                e,
                l,
                false,
                &format!("/estimates at t={}", e["t"]),
                &mut faults,
            ),
            None => faults.push(format!("no live estimate at t={}", e["t"])),
        }
    }

    let script = between(readme, "printf '%s\\n' \\\n", "|\ncurl");
    let lines: Vec<&str> = script
        .lines()
        .map(|l| l.trim().trim_end_matches(" \\").trim_matches('\''))
        .collect();
    assert_eq!(lines.len(), 3, "{lines:?}");
    let body = lines.join("\n") + "\n";
    let shown = between(readme, "--data-binary @-\n```\n\n```\n", "```");
    let res = s
        .client
        .post(s.url("/v1/estimate/stream"))
        .header("content-type", "application/x-ndjson")
        .body(body)
        .send()
        .await
        .unwrap();
    let live = instances(
        "application/x-ndjson",
        &Value::String(res.text().await.unwrap()),
    );
    let shown = instances("application/x-ndjson", &Value::String(shown.to_string()));
    disagreements(
        &Value::Array(shown),
        &Value::Array(live),
        false,
        "/stream",
        &mut faults,
    );

    assert!(
        faults.is_empty(),
        "README examples that differ from the live answers:\n{}",
        faults.join("\n")
    );
}
