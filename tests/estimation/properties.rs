//! Properties over random stable linear models and random readings (proptest): the
//! covariance stays symmetric positive semi-definite over thousands of steps, the unscented
//! filter equals the Kalman filter, and a run split at random points equals one run.

use super::support::{matrix, ok, rel};
use nalgebra::DMatrix;
use proptest::prelude::*;
use serde_json::{json, Value};

/// A random stable continuous model `A = −(M Mᵀ + 0.1 I) + (S − Sᵀ)`: the symmetric part is
/// negative definite, so every eigenvalue has a negative real part (common practice).
#[derive(Debug, Clone)]
struct Case {
    n: usize,
    m: Vec<f64>,
    s: Vec<f64>,
    q: Vec<f64>,
    h: Vec<f64>,
    r: f64,
    gaps: Vec<f64>,
    z: Vec<f64>,
    split: Vec<usize>,
}

fn case(steps: usize) -> impl Strategy<Value = Case> {
    (2usize..=4).prop_flat_map(move |n| {
        (
            Just(n),
            prop::collection::vec(-1.0f64..1.0, n * n),
            prop::collection::vec(-1.0f64..1.0, n * n),
            prop::collection::vec(0.0f64..0.5, n),
            prop::collection::vec(-1.0f64..1.0, n),
            0.01f64..1.0,
            prop::collection::vec(prop_oneof![Just(0.0), 0.001f64..0.5], steps),
            prop::collection::vec(-10.0f64..10.0, steps),
            prop::collection::vec(1usize..steps, 3),
        )
            .prop_map(|(n, m, s, q, h, r, gaps, z, split)| Case {
                n,
                m,
                s,
                q,
                h,
                r,
                gaps,
                z,
                split,
            })
    })
}

fn body(c: &Case, method: &str) -> Value {
    let n = c.n;
    let mut a = vec![vec![0.0; n]; n];
    for i in 0..n {
        for j in 0..n {
            let mmt: f64 = (0..n).map(|k| c.m[i * n + k] * c.m[j * n + k]).sum();
            a[i][j] = -mmt - if i == j { 0.1 } else { 0.0 } + c.s[i * n + j] - c.s[j * n + i];
        }
    }
    let names: Vec<String> = (0..n).map(|i| format!("x{i}")).collect();
    let h: Vec<String> = (0..n)
        .map(|i| format!("({:e})*x{i}", c.h[i] + if i == 0 { 1.5 } else { 0.0 }))
        .collect();
    let density: serde_json::Map<String, Value> = names
        .iter()
        .zip(&c.q)
        .map(|(k, v)| (k.clone(), json!(v)))
        .collect();
    let mean: serde_json::Map<String, Value> =
        names.iter().map(|k| (k.clone(), json!(0.0))).collect();
    let std: serde_json::Map<String, Value> =
        names.iter().map(|k| (k.clone(), json!(1.0))).collect();
    let mut t = 0.0;
    let readings: Vec<Value> = c
        .gaps
        .iter()
        .zip(&c.z)
        .map(|(g, z)| {
            t += g;
            json!({"t": t, "values": {"probe": z}})
        })
        .collect();
    json!({
        "model": {"states": names, "dynamics": {"linear": {"time": "continuous", "A": a}}, "process_noise": {"density": density}, "sensors": {"probe": {"measures": h.join(" + "), "std": c.r}}},
        "filter": {"method": method},
        "prior": {"t": 0.0, "mean": mean, "std": std},
        "measurements": readings
    })
}

proptest! {
    #![proptest_config(ProptestConfig { cases: 24, ..ProptestConfig::default() })]

    #[test]
    fn covariance_stays_symmetric_psd_over_thousands_of_steps(c in case(3000)) {
        let out = ok(&body(&c, "ekf"));
        for (k, e) in out["estimates"].as_array().unwrap().iter().enumerate().filter(|(k, _)| k % 97 == 0 || *k == 2999) {
            let p = matrix(&e["covariance"]);
            let m = DMatrix::from_fn(c.n, c.n, |i, j| p[i][j]);
            prop_assert!(m == m.transpose(), "step {}: not symmetric", k);
            let min = m.clone().symmetric_eigen().eigenvalues.min();
            prop_assert!(min >= -1e-12 * m.norm(), "step {}: eigenvalue {}", k, min);
        }
    }

    #[test]
    fn unscented_equals_kalman_on_linear_models(c in case(300)) {
        let kf = ok(&body(&c, "ekf"));
        let ukf = ok(&body(&c, "ukf"));
        for (a, b) in kf["estimates"].as_array().unwrap().iter().zip(ukf["estimates"].as_array().unwrap()) {
            let (pa, pb) = (matrix(&a["covariance"]), matrix(&b["covariance"]));
            let scale = (0..c.n).map(|i| pa[i][i]).fold(0.0, f64::max);
            for i in 0..c.n {
                let s = format!("x{i}");
                prop_assert!(rel(a["mean"][&s].as_f64().unwrap(), b["mean"][&s].as_f64().unwrap(), scale.sqrt()) < 1e-8);
                for j in 0..c.n {
                    prop_assert!(rel(pa[i][j], pb[i][j], scale) < 1e-8);
                }
            }
        }
    }

    #[test]
    fn split_runs_equal_one_run(c in case(200)) {
        for method in ["ekf", "ukf", "enkf"] {
            let whole = ok(&body(&c, method));
            let mut cuts = c.split.clone();
            cuts.sort_unstable();
            cuts.dedup();
            let readings = body(&c, method)["measurements"].as_array().unwrap().clone();
            let mut prior = body(&c, method)["prior"].clone();
            let mut got = Vec::new();
            let mut start = 0;
            for end in cuts.into_iter().chain([readings.len()]) {
                let mut b = body(&c, method);
                b["prior"] = prior;
                b["measurements"] = json!(readings[start..end]);
                let out = ok(&b);
                got.extend(out["estimates"].as_array().unwrap().iter().cloned());
                prior = out["posterior"].clone();
                start = end;
            }
            prop_assert_eq!(whole["estimates"].as_array().unwrap(), &got, "{}", method);
            prop_assert_eq!(&whole["posterior"], &prior, "{}", method);
        }
    }
}
