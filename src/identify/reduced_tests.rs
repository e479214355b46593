//! Unit tests of [`super::reduced`]: a plant that lives in a known three-dimensional
//! subspace with chosen eigenvalues, with and without an input, the rank rule and every
//! refusal. The heat-rod check against closed-form rates is in tests/identify.rs.

use super::*;
use crate::model::Halt;
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha20Rng;
use std::time::Duration;

/// An orthonormal n × 3 matrix (QR of a seeded random matrix).
fn subspace_basis(n: usize, seed: u64) -> DMatrix<f64> {
    let mut rng = ChaCha20Rng::seed_from_u64(seed);
    let g = DMatrix::from_fn(n, 3, |_, _| rng.gen_range(-1.0..1.0));
    g.qr().q()
}

/// `M = Q diag(λ) Qᵀ` has eigenvalues λ on span(Q) and 0 elsewhere (common practice).
fn plant(n: usize, lambdas: [f64; 3]) -> (DMatrix<f64>, DMatrix<f64>) {
    let q = subspace_basis(n, 1);
    let m =
        &q * DMatrix::from_diagonal(&nalgebra::DVector::from_row_slice(&lambdas)) * q.transpose();
    (q, m)
}

fn refusal(e: KernelError) -> IdentifyRefusal {
    match e {
        KernelError::Refused(r) => r,
        KernelError::Halted(h) => panic!("halted: {h:?}"),
    }
}

#[test]
fn snapshots_of_a_three_mode_plant_give_its_eigenvalues_and_rank() {
    let lambdas = [0.95, 0.8, 0.5];
    let (q, m) = plant(40, lambdas);
    let mut x = DMatrix::zeros(40, 30);
    x.set_column(
        0,
        &(&q * nalgebra::DVector::from_row_slice(&[1.0, -2.0, 0.5])),
    );
    for k in 1..30 {
        let next = &m * x.column(k - 1);
        x.set_column(k, &next);
    }
    let fit = reduced(&x, None, 0.1, None, &Stop::never()).unwrap();
    assert_eq!(fit.rank, 3, "{:?}", &fit.singular_values[..5]);
    for (got, want) in fit.eigenvalues.iter().zip(lambdas) {
        assert!(
            (got.0 - want).abs() < 1e-10 && got.1.abs() < 1e-10,
            "{got:?} vs {want}"
        );
    }
    // ln(0.95)/0.1, the continuous rate of the slowest mode.
    assert!((fit.rates[0].0 - 0.95f64.ln() / 0.1).abs() < 1e-8);
    // The basis spans the plant's subspace: Q Qᵀ U_r = U_r.
    let back = &q * q.transpose() * &fit.basis;
    assert!((back - &fit.basis).amax() < 1e-10);
    let r = refusal(reduced(&x, None, 0.1, Some(5), &Stop::never()).unwrap_err());
    assert_eq!(r.field, "/rank");
    assert!(r.detail.contains("at most 3 modes"), "{}", r.detail);
}

#[test]
fn an_input_in_the_plant_subspace_gives_its_eigenvalues_and_input_map() {
    let lambdas = [0.9, 0.7, -0.3];
    let (q, m) = plant(25, lambdas);
    let b = &q * nalgebra::DVector::from_row_slice(&[1.0, 0.5, -1.0]);
    let mut rng = ChaCha20Rng::seed_from_u64(9);
    let snaps = 60;
    let u = DMatrix::from_fn(1, snaps, |_, _| rng.gen_range(-1.0..1.0));
    let mut x = DMatrix::zeros(25, snaps);
    for k in 1..snaps {
        let next = &m * x.column(k - 1) + &b * u[(0, k - 1)];
        x.set_column(k, &next);
    }
    let fit = reduced(&x, Some(&u), 1.0, Some(3), &Stop::never()).unwrap();
    let mut eig: Vec<f64> = fit.eigenvalues.iter().map(|e| e.0).collect();
    eig.sort_by(|p, q| q.total_cmp(p));
    for (got, want) in eig.iter().zip([0.9, 0.7, -0.3]) {
        assert!((got - want).abs() < 1e-9, "{eig:?}");
    }
    // B̃ = U_rᵀ b: the input's direction in the amplitudes.
    let want_b = fit.basis.tr_mul(&b);
    assert!((fit.b.as_ref().unwrap().column(0) - want_b).amax() < 1e-9);
    let v = reduced_model(&fit, 1.0, &["heater".into()], &[("probe".into(), 4)]);
    assert_eq!(v["inputs"], json!(["heater"]));
    assert_eq!(v["states"], json!(["mode1", "mode2", "mode3"]));
    let f = v["sensors"]["probe"]["measures"].as_str().unwrap();
    assert!(f.contains("*mode1"), "{f}");
}

#[test]
fn the_rank_rule_cuts_at_the_noise_threshold() {
    // Three strong values over a flat floor of 1.0: ω(β)·median ≈ 2.9 for β = 1 keeps 3.
    let mut sv = vec![100.0, 50.0, 20.0];
    sv.extend(std::iter::repeat_n(1.0, 20));
    assert_eq!(pick_rank(&sv, 23, None).unwrap(), 3);
    assert_eq!(pick_rank(&[1.0, 1e-12, 1e-13], 3, None).unwrap(), 1);
    assert_eq!(pick_rank(&[0.0], 1, None).unwrap_err().field, "/series");
}

#[test]
fn bad_snapshots_are_refused_and_a_deadline_halts() {
    let x = DMatrix::from_fn(5, 10, |i, k| ((i + 1) as f64 * 0.3 * k as f64).cos());
    let stop = Stop::never();
    assert_eq!(
        refusal(reduced(&x, None, 0.0, None, &stop).unwrap_err()).field,
        "/dt"
    );
    let two = x.columns(0, 2).clone_owned();
    assert!(refusal(reduced(&two, None, 1.0, None, &stop).unwrap_err())
        .detail
        .contains("too few"));
    assert_eq!(
        refusal(reduced(&x, None, 1.0, Some(0), &stop).unwrap_err()).field,
        "/rank"
    );
    let still = DMatrix::from_element(1, 10, 2.0);
    let r = refusal(reduced(&x, Some(&still), 1.0, None, &stop).unwrap_err());
    assert!(r.detail.contains("never moves"), "{}", r.detail);
    let mut bad = x.clone();
    bad[(2, 2)] = f64::INFINITY;
    assert!(refusal(reduced(&bad, None, 1.0, None, &stop).unwrap_err())
        .detail
        .contains("finite"));
    let zero = DMatrix::zeros(5, 10);
    assert_eq!(
        refusal(reduced(&zero, None, 1.0, None, &stop).unwrap_err()).field,
        "/series"
    );
    let e = reduced(&x, None, 1.0, None, &Stop::within(Some(Duration::ZERO))).unwrap_err();
    assert_eq!(e, KernelError::Halted(Halt::Deadline));
}
