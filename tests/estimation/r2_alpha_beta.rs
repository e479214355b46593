//! R2: the steady-state gain of a constant-velocity filter fed position-only readings is the
//! α–β filter of Kalata (1984), IEEE Trans. Aerospace and Electronic Systems 20(2), also
//! Bar-Shalom, Li, Kirubarajan (2001) §6.5: with tracking index λ = σ_a T²/σ_z,
//!   α = −(λ² + 8λ − (λ+4)√(λ²+8λ))/8,  β = (λ² + 4λ − λ√(λ²+8λ))/4,  K = [α, β/T].
//! This is the textbook case of recovering an unmeasured velocity from positions.

use super::support::{f, matrix, ok, rel};
use serde_json::{json, Value};

fn kalata(lambda: f64) -> (f64, f64) {
    let r = (lambda * lambda + 8.0 * lambda).sqrt();
    let alpha = -(lambda * lambda + 8.0 * lambda - (lambda + 4.0) * r) / 8.0;
    let beta = (lambda * lambda + 4.0 * lambda - lambda * r) / 4.0;
    (alpha, beta)
}

/// Discrete white-noise-acceleration model (Bar-Shalom et al. 2001, §6.3.3):
/// Q = σ_a² Γ Γᵀ with Γ = [T²/2, T]ᵀ.
fn request(method: &str, t: f64, sigma_a: f64, sigma_z: f64, steps: usize) -> Value {
    let q = sigma_a * sigma_a;
    let readings: Vec<Value> = (1..=steps)
        .map(|k| json!({"t": k as f64 * t, "values": {"encoder": (k as f64 * 0.37).sin()}}))
        .collect();
    json!({
        "model": {
            "states": ["pos", "vel"],
            "dynamics": {"linear": {"time": "discrete", "dt": t, "F": [[1.0, t], [0.0, 1.0]]}},
            "process_noise": {"covariance": [[q * t.powi(4) / 4.0, q * t.powi(3) / 2.0], [q * t.powi(3) / 2.0, q * t * t]]},
            "sensors": {"encoder": {"measures": "pos", "std": sigma_z}}
        },
        "filter": {"method": method},
        "prior": {"t": 0.0, "mean": {"pos": 0.0, "vel": 0.0}, "std": {"pos": 1.0, "vel": 1.0}},
        "measurements": readings
    })
}

fn converged_gain(method: &str, t: f64, sigma_a: f64, sigma_z: f64) -> [f64; 2] {
    let out = ok(&request(method, t, sigma_a, sigma_z, 3000));
    let est = out["estimates"].as_array().unwrap();
    let last = &est[est.len() - 1];
    // For the optimal gain, K = P⁺ Hᵀ R⁻¹ (Bar-Shalom et al. 2001, eq. 5.2.4-13, common practice).
    let p = matrix(&last["covariance"]);
    let k_cov = [p[0][0] / (sigma_z * sigma_z), p[1][0] / (sigma_z * sigma_z)];
    // Independently, from the means: m⁺ − F m⁻ = K ν.
    let prev = &est[est.len() - 2];
    let (x0, v0) = (f(&prev["mean"], "pos"), f(&prev["mean"], "vel"));
    let (x1, v1) = (f(&last["mean"], "pos"), f(&last["mean"], "vel"));
    let nu = f(&last["innovations"]["encoder"], "innovation");
    let k_mean = [(x1 - (x0 + t * v0)) / nu, (v1 - v0) / nu];
    for i in 0..2 {
        assert!(
            rel(k_cov[i], k_mean[i], 1e-12) < 1e-6,
            "gain from covariance {k_cov:?} vs from means {k_mean:?}"
        );
    }
    k_cov
}

#[test]
fn ekf_gain_converges_to_kalata_alpha_beta() {
    for (t, sigma_a, sigma_z) in [(0.1, 2.0, 0.05), (0.5, 0.3, 0.2), (1.0, 3.0, 1.0)] {
        let lambda = sigma_a * t * t / sigma_z;
        let (alpha, beta) = kalata(lambda);
        let k = converged_gain("ekf", t, sigma_a, sigma_z);
        assert!(
            rel(k[0], alpha, 1e-12) < 1e-8,
            "λ={lambda}: α {} vs {alpha}",
            k[0]
        );
        assert!(
            rel(k[1], beta / t, 1e-12) < 1e-8,
            "λ={lambda}: β/T {} vs {}",
            k[1],
            beta / t
        );
    }
}

#[test]
fn innovation_std_converges_to_the_alpha_beta_value() {
    // At steady state α = P⁻₁₁ / S and S = P⁻₁₁ + σ_z², so the innovation's standard
    // deviation is σ_z / √(1 − α) (follows from Kalata 1984's α; common practice). The
    // answer's `innovations.*.innovation_std` must converge to it, for every filter's update path.
    for method in ["ekf", "ukf"] {
        let (t, sigma_a, sigma_z) = (0.5, 0.3, 0.2);
        let (alpha, _) = kalata(sigma_a * t * t / sigma_z);
        let mut body = request(method, t, sigma_a, sigma_z, 3000);
        body["output"] = json!({"innovations": true});
        let out = ok(&body);
        let last = out["estimates"].as_array().unwrap().last().unwrap().clone();
        let std = f(&last["innovations"]["encoder"], "innovation_std");
        let expected = sigma_z / (1.0 - alpha).sqrt();
        assert!(
            rel(std, expected, 1e-12) < 1e-8,
            "{method}: innovation std {std} vs {expected}"
        );
    }
}

#[test]
fn ukf_gain_converges_to_kalata_alpha_beta() {
    let (t, sigma_a, sigma_z) = (0.2, 1.5, 0.1);
    let (alpha, beta) = kalata(sigma_a * t * t / sigma_z);
    let k = converged_gain("ukf", t, sigma_a, sigma_z);
    assert!(rel(k[0], alpha, 1e-12) < 1e-8);
    assert!(rel(k[1], beta / t, 1e-12) < 1e-8);
}

#[test]
fn velocity_is_recovered_from_positions_only() {
    // A trolley moving at a constant 0.8 m/s read by a position encoder alone: the velocity
    // estimate must approach the truth (common practice: the velocity is observable).
    let t = 0.1;
    let readings: Vec<Value> = (1..=200)
        .map(|k| json!({"t": k as f64 * t, "values": {"encoder": 0.8 * k as f64 * t}}))
        .collect();
    let mut body = request("ekf", t, 0.05, 0.01, 1);
    body["measurements"] = json!(readings);
    let out = ok(&body);
    let last = out["estimates"].as_array().unwrap().last().unwrap().clone();
    let v = f(&last["mean"], "vel");
    let sv = f(&last["std"], "vel");
    assert!(
        (v - 0.8).abs() < 3.0 * sv && sv < 0.05,
        "velocity {v} ± {sv}"
    );
}
