//! Unit tests of [`super::subspace`]: a noise-free second-order plant whose poles are known
//! in closed form, the order rule on chosen singular values, and every refusal.

use super::*;
use crate::model::Halt;
use rand::{Rng, SeedableRng};
use rand_chacha::ChaCha20Rng;
use std::time::Duration;

/// `A = r·[[cos θ, −sin θ], [sin θ, cos θ]]` has the poles `r·e^{±iθ}` (a rotation
/// scaled by r; common practice).
fn rotation_plant(r: f64, theta: f64) -> (DMatrix<f64>, DMatrix<f64>, DMatrix<f64>, DMatrix<f64>) {
    let a = DMatrix::from_row_slice(
        2,
        2,
        &[
            r * theta.cos(),
            -r * theta.sin(),
            r * theta.sin(),
            r * theta.cos(),
        ],
    );
    let b = DMatrix::from_row_slice(2, 1, &[1.0, 0.5]);
    let c = DMatrix::from_row_slice(1, 2, &[1.0, 0.3]);
    let d = DMatrix::from_row_slice(1, 1, &[0.2]);
    (a, b, c, d)
}

/// Seeded uniform inputs on [−1, 1] and the plant's outputs from x = 0, with white
/// output noise of standard deviation `noise`.
fn simulate(
    plant: &(DMatrix<f64>, DMatrix<f64>, DMatrix<f64>, DMatrix<f64>),
    samples: usize,
    noise: f64,
    seed: u64,
) -> (DMatrix<f64>, DMatrix<f64>) {
    let (a, b, c, d) = plant;
    let mut rng = ChaCha20Rng::seed_from_u64(seed);
    let u = DMatrix::from_fn(samples, b.ncols(), |_, _| rng.gen_range(-1.0..1.0));
    let mut y = DMatrix::zeros(samples, c.nrows());
    let mut x = DVector::zeros(a.nrows());
    for k in 0..samples {
        let uk = u.row(k).transpose();
        let yk = c * &x + d * &uk;
        for o in 0..c.nrows() {
            y[(k, o)] = yk[o] + noise * (rng.gen::<f64>() - 0.5) * 12f64.sqrt();
        }
        x = a * &x + b * &uk;
    }
    (u, y)
}

fn poles(a: &DMatrix<f64>) -> Vec<(f64, f64)> {
    let mut p: Vec<(f64, f64)> = a
        .complex_eigenvalues()
        .iter()
        .map(|c| (c.re, c.im))
        .collect();
    p.sort_by(|x, y| y.1.total_cmp(&x.1));
    p
}

fn refusal(e: KernelError) -> IdentifyRefusal {
    match e {
        KernelError::Refused(r) => r,
        KernelError::Halted(h) => panic!("halted: {h:?}"),
    }
}

#[test]
fn a_noise_free_second_order_plant_gives_its_poles_order_and_feedthrough() {
    let (r, theta) = (0.9, 0.4);
    let plant = rotation_plant(r, theta);
    let (u, y) = simulate(&plant, 2000, 0.0, 7);
    let fit = subspace(&u, &y, None, &Stop::never()).unwrap();
    assert_eq!(
        fit.order, 2,
        "gap rule: the true order; {:?}",
        fit.singular_values
    );
    let p = poles(&fit.a);
    // Closed form r·e^{±iθ} of the rotation plant (common practice).
    assert!((p[0].0 - r * theta.cos()).abs() < 1e-8 && (p[0].1 - r * theta.sin()).abs() < 1e-8);
    assert!((p[1].1 + r * theta.sin()).abs() < 1e-8, "{p:?}");
    // D is the same in every state basis: the plant's 0.2.
    assert!((fit.d[(0, 0)] - 0.2).abs() < 1e-8, "{}", fit.d);
    assert_eq!(fit.k, DMatrix::zeros(2, 1), "noise-free: no gain");
    // The fitted model from x0 reproduces the outputs (same input-output map).
    let mut x = fit.x0.clone();
    for k in 0..200 {
        let uk = u.row(k).transpose();
        let yk = &fit.c * &x + &fit.d * &uk;
        assert!((yk[0] - y[(k, 0)]).abs() < 1e-7, "sample {k}");
        x = &fit.a * &x + &fit.b * &uk;
    }
}

#[test]
fn a_given_order_is_kept_and_one_the_data_do_not_carry_is_refused() {
    let plant = rotation_plant(0.8, 1.0);
    let (u, y) = simulate(&plant, 1500, 0.0, 3);
    assert_eq!(subspace(&u, &y, Some(2), &Stop::never()).unwrap().order, 2);
    let r = refusal(subspace(&u, &y, Some(5), &Stop::never()).unwrap_err());
    assert_eq!(r.field, "/order");
    assert!(r.detail.contains("at most 2 states"), "{}", r.detail);
}

#[test]
fn with_output_noise_the_order_rule_still_finds_two_and_the_noise_lands_in_sigma() {
    let plant = rotation_plant(0.9, 0.4);
    let (u, y) = simulate(&plant, 4000, 0.05, 11);
    let fit = subspace(&u, &y, None, &Stop::never()).unwrap();
    assert_eq!(fit.order, 2, "{:?}", fit.singular_values);
    let p = poles(&fit.a);
    assert!((p[0].0 - 0.9 * 0.4f64.cos()).abs() < 0.02, "{p:?}");
    // White output noise of std 0.05 is the whole innovation of this plant (common
    // practice: an output-error plant's predictor has zero steady gain).
    let s = fit.innovation_cov[(0, 0)].sqrt();
    assert!((s - 0.05).abs() < 0.005, "{s}");
}

#[test]
fn the_order_rule_takes_the_largest_log_gap_above_the_floor() {
    assert_eq!(pick_order(&[10.0, 8.0, 1e-3, 5e-4, 4e-4], None).unwrap(), 2);
    assert_eq!(
        pick_order(&[10.0, 1.0, 0.9, 1e-14, 1e-15], None).unwrap(),
        3
    );
    // Values under the floor are lifted to it: no gap of their own.
    assert_eq!(pick_order(&[1.0, 0.5, 1e-20, 1e-40], None).unwrap(), 2);
    assert_eq!(pick_order(&[3.0, 2.0, 1.0], Some(2)).unwrap(), 2);
    assert_eq!(pick_order(&[0.0, 0.0], None).unwrap_err().field, "/series");
}

#[test]
fn bad_series_are_refused_with_the_field_and_a_plain_reason() {
    let plant = rotation_plant(0.8, 1.0);
    let (u, y) = simulate(&plant, 600, 0.0, 5);
    let stop = Stop::never();
    let still = DMatrix::from_element(600, 1, 1.5);
    let r = refusal(subspace(&still, &y, None, &stop).unwrap_err());
    assert!(r.detail.contains("never moves"), "{}", r.detail);
    let r = refusal(
        subspace(
            &u.rows(0, 15).clone_owned(),
            &y.rows(0, 15).clone_owned(),
            None,
            &stop,
        )
        .unwrap_err(),
    );
    assert!(r.detail.contains("too few"), "{}", r.detail);
    let r = refusal(subspace(&u.rows(0, 500).clone_owned(), &y, None, &stop).unwrap_err());
    assert!(r.detail.contains("same rows"), "{}", r.detail);
    let mut bad = y.clone();
    bad[(3, 0)] = f64::NAN;
    assert!(refusal(subspace(&u, &bad, None, &stop).unwrap_err())
        .detail
        .contains("finite"));
    assert_eq!(
        refusal(subspace(&u, &y, Some(0), &stop).unwrap_err()).field,
        "/order"
    );
    // A single sine is not rich enough for a 10-block horizon.
    let sine = DMatrix::from_fn(600, 1, |k, _| (0.3 * k as f64).sin());
    let r = refusal(subspace(&sine, &y, None, &stop).unwrap_err());
    assert!(r.detail.contains("not rich enough"), "{}", r.detail);
}

#[test]
fn a_passed_deadline_halts_the_fit() {
    let plant = rotation_plant(0.8, 1.0);
    let (u, y) = simulate(&plant, 600, 0.0, 5);
    let e = subspace(&u, &y, None, &Stop::within(Some(Duration::ZERO))).unwrap_err();
    assert_eq!(e, KernelError::Halted(Halt::Deadline));
}

#[test]
fn the_model_section_writes_the_matrices_and_the_sensor_formula() {
    let plant = rotation_plant(0.9, 0.4);
    let (u, y) = simulate(&plant, 2000, 0.01, 7);
    let fit = subspace(&u, &y, Some(2), &Stop::never()).unwrap();
    let v = subspace_model(&fit, 0.5, &["valve".into()], &["level".into()]);
    assert_eq!(v["states"], json!(["s1", "s2"]));
    assert_eq!(v["dynamics"]["linear"]["F"][1][0], json!(fit.a[(1, 0)]));
    assert_eq!(v["dynamics"]["linear"]["dt"], json!(0.5));
    let f = v["sensors"]["level"]["measures"].as_str().unwrap();
    assert!(f.contains("*s1") && f.contains("*valve"), "{f}");
    assert!(v["sensors"]["level"]["std"].as_f64().unwrap() > 0.0);
}
