//! R3: the filter's steady-state covariance solves the discrete algebraic Riccati equation.
//! Reference values come from SciPy's `scipy.linalg.solve_discrete_are` (a general-purpose
//! reference library), written to tests/data/dare_fixtures.json by
//! tests/data/make_dare_fixtures.py, which records the SciPy version it used.

use super::support::{matrix, ok};
use nalgebra::DMatrix;
use serde_json::{json, Value};

fn mat(v: &Value) -> DMatrix<f64> {
    let rows = matrix(v);
    DMatrix::from_fn(rows.len(), rows[0].len(), |i, j| rows[i][j])
}

fn formula(row: &[f64], names: &[String]) -> String {
    let terms: Vec<String> = row
        .iter()
        .zip(names)
        .filter(|(c, _)| **c != 0.0)
        .map(|(c, n)| format!("({c:e})*{n}"))
        .collect();
    terms.join(" + ")
}

#[test]
fn steady_state_covariance_matches_scipy_dare() {
    let text = std::fs::read_to_string(concat!(
        env!("CARGO_MANIFEST_DIR"),
        "/tests/data/dare_fixtures.json"
    ))
    .unwrap();
    let fixtures: Value = serde_json::from_str(&text).unwrap();
    assert!(fixtures["scipy_version"].is_string());
    for case in fixtures["cases"].as_array().unwrap() {
        let (f, h, q, r, want) = (
            mat(&case["F"]),
            mat(&case["H"]),
            mat(&case["Q"]),
            mat(&case["R"]),
            mat(&case["P_predicted"]),
        );
        let n = f.nrows();
        let names: Vec<String> = (0..n).map(|i| format!("s{i}")).collect();
        let measures: Vec<String> = (0..h.nrows())
            .map(|i| formula(h.row(i).transpose().as_slice(), &names))
            .collect();
        let mean: serde_json::Map<String, Value> =
            names.iter().map(|s| (s.clone(), json!(0.0))).collect();
        let std: serde_json::Map<String, Value> =
            names.iter().map(|s| (s.clone(), json!(1.0))).collect();
        let readings: Vec<Value> = (1..=2000).map(|k| json!({"t": k as f64, "values": {"probe": (0..h.nrows()).map(|i| ((k * (i + 1)) as f64 * 0.1).cos()).collect::<Vec<_>>()}})).collect();
        let body = json!({
            "model": {
                "states": names,
                "dynamics": {"linear": {"time": "discrete", "dt": 1.0, "F": matrix(&case["F"])}},
                "process_noise": {"covariance": matrix(&case["Q"])},
                "sensors": {"probe": {"measures": measures, "covariance": matrix(&case["R"])}}
            },
            "filter": {"method": "ekf"},
            "prior": {"t": 0.0, "mean": mean, "std": std},
            "measurements": readings
        });
        let out = ok(&body);
        let post = mat(&out["posterior"]["covariance"]);
        // Predicted covariance one step on: P⁻ = F P⁺ Fᵀ + Q (Kalman 1960; common practice).
        let pred = &f * &post * f.transpose() + &q;
        let err = (&pred - &want).abs().max() / want.abs().max();
        assert!(
            err < 1e-9,
            "{}: relative error {err:e}\nours {pred}\nscipy {want}",
            case["name"]
        );
        let _ = (h, r);
    }
}
