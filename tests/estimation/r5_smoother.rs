//! R5: the Rauch–Tung–Striebel smoother (Rauch, Tung & Striebel 1965, AIAA J. 3(8)) equals
//! batch weighted least squares on a linear-Gaussian problem: the smoothed means minimise
//!   (x₀−m₀)ᵀP₀⁻¹(x₀−m₀) + Σ (x_k − F x_{k−1})ᵀQ⁻¹(·) + Σ (z_k − H x_k)ᵀR⁻¹(·),
//! and the smoothed covariances are the diagonal blocks of the inverse information matrix
//! (common practice). The stacked problem is built here with nalgebra.

use super::support::{matrix, rel, smooth};
use nalgebra::{DMatrix, DVector};
use serde_json::{json, Value};

#[test]
fn rts_equals_batch_least_squares() {
    let (k_max, dt) = (40usize, 0.5);
    let f = DMatrix::from_row_slice(2, 2, &[1.0, dt, 0.0, 0.9]);
    let q = DMatrix::from_row_slice(2, 2, &[0.01, 0.002, 0.002, 0.05]);
    let (m0, p0) = (
        DVector::from_vec(vec![0.5, -0.2]),
        DMatrix::from_row_slice(2, 2, &[0.3, 0.05, 0.05, 0.6]),
    );
    let r: f64 = 0.04;
    // Readings at every step but a few (partial data), values from a fixed pattern.
    let z: Vec<Option<f64>> = (1..=k_max)
        .map(|k| {
            if k % 6 == 0 {
                None
            } else {
                Some((k as f64 * 0.31).sin() + 0.05 * k as f64)
            }
        })
        .collect();
    let readings: Vec<Value> = z
        .iter()
        .enumerate()
        .map(|(i, zk)| match zk {
            Some(v) => json!({"t": (i + 1) as f64 * dt, "values": {"gauge": v}}),
            None => json!({"t": (i + 1) as f64 * dt}),
        })
        .collect();
    let body = json!({
        "model": {
            "states": ["x", "v"],
            "dynamics": {"linear": {"time": "discrete", "dt": dt, "F": [[1.0, dt], [0.0, 0.9]]}},
            "process_noise": {"covariance": [[0.01, 0.002], [0.002, 0.05]]},
            "sensors": {"gauge": {"measures": "x", "std": r.sqrt()}}
        },
        "filter": {"method": "ekf"},
        "prior": {"t": 0.0, "mean": {"x": 0.5, "v": -0.2}, "covariance": [[0.3, 0.05], [0.05, 0.6]]},
        "measurements": readings
    });
    // Batch problem over x₀..x_K (2(K+1) unknowns).
    let dim = 2 * (k_max + 1);
    let mut info = DMatrix::zeros(dim, dim);
    let mut rhs = DVector::zeros(dim);
    let p0i = p0.clone().try_inverse().unwrap();
    let qi = q.clone().try_inverse().unwrap();
    info.view_mut((0, 0), (2, 2)).add_assign(&p0i);
    rhs.rows_mut(0, 2).add_assign(&(&p0i * &m0));
    for k in 1..=k_max {
        // Dynamics residual e = x_k − F x_{k−1}: blocks [−F, I].
        let mut a = DMatrix::zeros(2, dim);
        a.view_mut((0, 2 * (k - 1)), (2, 2)).copy_from(&(-&f));
        a.view_mut((0, 2 * k), (2, 2))
            .copy_from(&DMatrix::identity(2, 2));
        info += a.transpose() * &qi * &a;
        if let Some(zk) = z[k - 1] {
            info[(2 * k, 2 * k)] += 1.0 / r;
            rhs[2 * k] += zk / r;
        }
    }
    let cov = info.clone().try_inverse().unwrap();
    let x = &cov * &rhs;
    for which in ["ekf", "ukf"] {
        let mut b = body.clone();
        b["filter"]["method"] = json!(which);
        let out = smooth(&b).unwrap_or_else(|p| panic!("{p}"));
        let est = out["estimates"].as_array().unwrap();
        assert_eq!(est.len(), k_max);
        for k in 1..=k_max {
            let e = &est[k - 1];
            let p = matrix(&e["covariance"]);
            for (i, s) in ["x", "v"].iter().enumerate() {
                let got = e["mean"][*s].as_f64().unwrap();
                assert!(
                    rel(got, x[2 * k + i], 1.0) < 1e-9,
                    "{which} step {k} {s}: {got} vs {}",
                    x[2 * k + i]
                );
                for j in 0..2 {
                    assert!(
                        rel(p[i][j], cov[(2 * k + i, 2 * k + j)], 1e-3) < 1e-9,
                        "{which} step {k} P[{i}][{j}]"
                    );
                }
            }
        }
    }
}

use std::ops::AddAssign;
