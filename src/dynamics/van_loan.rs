//! Exact discretisation of `x' = A x + B u + w`, `E[w w'] = Qc δ`, over a step `dt`
//! (zero-order-hold inputs), by Van Loan's block matrix exponential.
//!
//! Linear models skip numerical integration entirely: one block exponential gives the
//! transition, the input gain and the process noise of a step, exactly up to rounding.

use super::Expm;
use crate::linalg::{add_mul_ab, add_mul_abt, mul_ab, mul_abt, norm1, symmetrize};
use crate::model::Stop;
use nalgebra::DMatrix;

/// The discrete model over one step: `x⁺ = phi x + gamma u + w`, `E[w w'] = q`.
#[derive(Debug, Clone)]
pub struct Discrete {
    /// State transition `exp(A dt)`, `n × n`.
    pub phi: DMatrix<f64>,
    /// Input gain `∫₀^dt exp(A s) ds B`, `n × nu`.
    pub gamma: DMatrix<f64>,
    /// Process noise covariance `∫₀^dt exp(A s) Qc exp(A s)' ds`, `n × n`, symmetric.
    pub q: DMatrix<f64>,
}

impl Discrete {
    /// Whether every entry is finite; `false` after non-finite or overflowing input.
    pub fn is_finite(&self) -> bool {
        self.phi
            .iter()
            .chain(self.gamma.iter())
            .chain(self.q.iter())
            .all(|x| x.is_finite())
    }
}

/// Preallocated discretiser for a fixed `(n, nu)`.
///
/// # Method
///
/// Van Loan (C. F. Van Loan, "Computing integrals involving the matrix exponential",
/// IEEE Trans. Automatic Control 23(3), 1978, Theorem 1) reads integrals of exponentials
/// off the blocks of one larger exponential. With step `h`,
///
/// ```text
///        ⎡ A   Qc  B ⎤         ⎡ Φ   F₁₂  Γ ⎤
/// exp( h ⎢ 0  −A'  0 ⎥ )  =    ⎢ 0   ·    0 ⎥ ,
///        ⎣ 0   0   0 ⎦         ⎣ 0   0    I ⎦
/// ```
///
/// `Φ = e^{Ah}`, `Γ = ∫₀^h e^{As} ds B`, `F₁₂ = ∫₀^h e^{A(h−s)} Qc e^{−A's} ds`, so
/// `Q = F₁₂ Φ' = ∫₀^h e^{As} Qc e^{A's} ds`. This is the transpose-side twin of the
/// `[[−A, Qc], [0, A']]` form (there `Φ = G₂₂'`, `Q = Φ G₁₂`); it puts the inputs in
/// the same exponential.
///
/// Both forms contain `e^{−A'h}`, which overflows for a stable `A` over a long step. So
/// when `‖A dt‖₁ > 1` the step is halved `s` times until `‖A h‖₁ ≤ 1`, the block is
/// exponentiated over `h = dt/2^s`, and the results are doubled back exactly:
/// `Q(2h) = Φ Q Φ' + Q`, `Γ(2h) = Φ Γ + Γ`, `Φ(2h) = Φ²` (splitting each integral at `h`).
/// The `Qc` and `B` blocks are scaled by powers of two to the size of `A h` before the
/// exponential (and back after, exactly), so a large or tiny noise density does not
/// inflate the exponential's error bound, which is relative to the whole block's norm.
/// `q` is symmetrised after every step.
///
/// # Failure
///
/// `dt` must be finite and `≥ 0`; otherwise, and for non-finite matrices or results that
/// overflow, `out` holds non-finite entries ([`Discrete::is_finite`] reports it).
#[derive(Debug, Clone)]
pub struct Discretiser {
    n: usize,
    nu: usize,
    expm: Expm,
    block: DMatrix<f64>,
    block_exp: DMatrix<f64>,
    /// `n × n` scratch.
    tmp: DMatrix<f64>,
    /// `n × nu` scratch.
    tmp_gamma: DMatrix<f64>,
    /// When to give up the squarings of a long gap (up to about 1030 of them).
    stop: Stop,
    /// Whether the last call gave up because `stop` fired.
    gave_up: bool,
}

impl Discretiser {
    /// Workspace for `n` states and `nu` inputs.
    pub fn new(n: usize, nu: usize) -> Self {
        let big = 2 * n + nu;
        Self {
            n,
            nu,
            expm: Expm::new(big),
            block: DMatrix::zeros(big, big),
            block_exp: DMatrix::zeros(big, big),
            tmp: DMatrix::zeros(n, n),
            tmp_gamma: DMatrix::zeros(n, nu),
            stop: Stop::never(),
            gave_up: false,
        }
    }

    /// Give up the squarings once `stop` fires: the output is then non-finite and
    /// [`Discretiser::gave_up`] says why.
    pub fn set_stop(&mut self, stop: &Stop) {
        self.stop = stop.clone();
    }

    /// Whether the last [`Discretiser::discretise`] gave up because its stop fired.
    pub fn gave_up(&self) -> bool {
        self.gave_up
    }

    /// An output buffer of the right shape.
    pub fn output(&self) -> Discrete {
        Discrete {
            phi: DMatrix::zeros(self.n, self.n),
            gamma: DMatrix::zeros(self.n, self.nu),
            q: DMatrix::zeros(self.n, self.n),
        }
    }

    /// Discretise `(a, b, qc)` over `dt ≥ 0` into `out` without allocating.
    ///
    /// # Panics
    ///
    /// If a matrix does not have the shape given to [`Discretiser::new`] (a programming
    /// error, not bad input).
    pub fn discretise(
        &mut self,
        a: &DMatrix<f64>,
        b: &DMatrix<f64>,
        qc: &DMatrix<f64>,
        dt: f64,
        out: &mut Discrete,
    ) {
        let (n, nu) = (self.n, self.nu);
        self.gave_up = false;
        assert_eq!(a.shape(), (n, n), "discretise: a is not {n} x {n}");
        assert_eq!(b.shape(), (n, nu), "discretise: b is not {n} x {nu}");
        assert_eq!(qc.shape(), (n, n), "discretise: qc is not {n} x {n}");
        assert_eq!(
            out.phi.shape(),
            (n, n),
            "discretise: out.phi is not {n} x {n}"
        );
        assert_eq!(
            out.gamma.shape(),
            (n, nu),
            "discretise: out.gamma is not {n} x {nu}"
        );
        assert_eq!(out.q.shape(), (n, n), "discretise: out.q is not {n} x {n}");

        if dt == 0.0 {
            out.phi.fill_with_identity();
            out.gamma.fill(0.0);
            out.q.fill(0.0);
            return;
        }
        let norm_a = norm1(a) * dt;
        if dt < 0.0 || !dt.is_finite() || !norm_a.is_finite() {
            out.phi.fill(f64::NAN);
            out.gamma.fill(f64::NAN);
            out.q.fill(f64::NAN);
            return;
        }
        let halvings = if norm_a > 1.0 {
            // At most about 1030 for a finite norm.
            norm_a.log2().ceil() as i32
        } else {
            0
        };
        let h = dt * 2f64.powi(-halvings);
        let norm_ah = norm_a * 2f64.powi(-halvings);
        let scale_q = balancing_power(norm1(qc) * h, norm_ah);
        let scale_b = balancing_power(norm1(b) * h, norm_ah);

        self.block.fill(0.0);
        for j in 0..n {
            for i in 0..n {
                self.block[(i, j)] = a[(i, j)] * h;
                self.block[(n + j, n + i)] = -a[(i, j)] * h;
                self.block[(i, n + j)] = qc[(i, j)] * h / scale_q;
            }
            for k in 0..nu {
                self.block[(j, 2 * n + k)] = b[(j, k)] * h / scale_b;
            }
        }
        self.expm.compute(&self.block, &mut self.block_exp);

        out.phi.copy_from(&self.block_exp.view((0, 0), (n, n)));
        out.gamma
            .copy_from(&self.block_exp.view((0, 2 * n), (n, nu)));
        out.gamma.iter_mut().for_each(|x| *x *= scale_b);
        self.tmp.copy_from(&self.block_exp.view((0, n), (n, n)));
        self.tmp.iter_mut().for_each(|x| *x *= scale_q);
        mul_abt(&self.tmp, &out.phi, &mut out.q);
        symmetrize(&mut out.q);

        for _ in 0..halvings {
            // Each squaring costs a few n × n products: the clock is cheap beside it.
            if self.stop.halted().is_some() {
                self.gave_up = true;
                out.phi.fill(f64::NAN);
                out.gamma.fill(f64::NAN);
                out.q.fill(f64::NAN);
                return;
            }
            // Q ← Φ Q Φ' + Q and Γ ← Φ Γ + Γ use the old Φ, so Φ is squared last.
            mul_ab(&out.phi, &out.q, &mut self.tmp);
            add_mul_abt(&self.tmp, &out.phi, &mut out.q);
            symmetrize(&mut out.q);
            self.tmp_gamma.copy_from(&out.gamma);
            add_mul_ab(&out.phi, &self.tmp_gamma, &mut out.gamma);
            mul_ab(&out.phi, &out.phi, &mut self.tmp);
            out.phi.copy_from(&self.tmp);
        }
    }
}

/// The power of two that brings a block of 1-norm `block_norm` to about `target`, so the
/// rescaling is exact. Returns 1 when either norm is zero (nothing to balance).
fn balancing_power(block_norm: f64, target: f64) -> f64 {
    // A floor on the target keeps the scaled block clear of subnormal numbers when A h
    // is tiny; the exponential of such a nearly nilpotent block is accurate anyway.
    let target = target.max(2f64.powi(-26));
    if block_norm == 0.0 || !block_norm.is_finite() {
        return 1.0;
    }
    let k = (block_norm / target).log2().round().clamp(-1000.0, 1000.0) as i32;
    2f64.powi(k)
}

#[cfg(test)]
mod tests {
    use super::*;

    fn run(a: &DMatrix<f64>, b: &DMatrix<f64>, qc: &DMatrix<f64>, dt: f64) -> Discrete {
        let mut d = Discretiser::new(a.nrows(), b.ncols());
        let mut out = d.output();
        d.discretise(a, b, qc, dt, &mut out);
        out
    }

    fn assert_close(got: f64, expected: f64, rel: f64, what: &str) {
        let tol = rel * expected.abs().max(f64::MIN_POSITIVE);
        assert!(
            (got - expected).abs() <= tol,
            "{what}: got {got:e}, expected {expected:e}"
        );
    }

    #[test]
    fn white_noise_acceleration_matches_closed_form() {
        // R1: Bar-Shalom, Li, Kirubarajan (2001), Estimation with Applications to Tracking
        // and Navigation, §6.2, with Van Loan (1978), IEEE TAC 23(3):
        // Φ = [[1, T],[0, 1]], Γ = [[T²/2],[T]], Q = q [[T³/3, T²/2],[T²/2, T]].
        let a = DMatrix::from_row_slice(2, 2, &[0.0, 1.0, 0.0, 0.0]);
        let b = DMatrix::from_row_slice(2, 1, &[0.0, 1.0]);
        for &q in &[1e-6, 0.5, 1.0, 40.0, 3e9] {
            let qc = DMatrix::from_row_slice(2, 2, &[0.0, 0.0, 0.0, q]);
            for &t in &[0.01, 0.1, 1.0, 3.7, 250.0] {
                let d = run(&a, &b, &qc, t);
                let what = format!("q = {q}, T = {t}");
                assert_close(d.phi[(0, 0)], 1.0, 1e-15, &what);
                assert_close(d.phi[(0, 1)], t, 1e-14, &what);
                assert_eq!(d.phi[(1, 0)], 0.0, "{what}");
                assert_close(d.phi[(1, 1)], 1.0, 1e-15, &what);
                assert_close(d.gamma[(0, 0)], t * t / 2.0, 1e-12, &what);
                assert_close(d.gamma[(1, 0)], t, 1e-12, &what);
                assert_close(d.q[(0, 0)], q * t.powi(3) / 3.0, 1e-12, &what);
                assert_close(d.q[(0, 1)], q * t * t / 2.0, 1e-12, &what);
                assert_close(d.q[(1, 0)], q * t * t / 2.0, 1e-12, &what);
                assert_close(d.q[(1, 1)], q * t, 1e-12, &what);
            }
        }
    }

    #[test]
    fn gauss_markov_scalar_matches_closed_form() {
        // First-order Gauss–Markov (Ornstein–Uhlenbeck) state x' = −x/τ + u + w (common
        // practice, closed forms of the integrals): Φ = e^{−T/τ}, Γ = τ (1 − e^{−T/τ}),
        // Q = qc τ/2 (1 − e^{−2T/τ}). T/τ = 2000 needs the halving path: e^{2000}
        // would overflow in a single block exponential.
        let qc_val = 0.3;
        for &(tau, t) in &[
            (2.0, 0.01),
            (2.0, 1.0),
            (0.5, 3.0),
            (0.05, 100.0),
            (0.001, 2.0),
        ] {
            let a = DMatrix::from_element(1, 1, -1.0 / tau);
            let b = DMatrix::from_element(1, 1, 1.0);
            let qc = DMatrix::from_element(1, 1, qc_val);
            let d = run(&a, &b, &qc, t);
            let what = format!("tau = {tau}, T = {t}");
            assert!(d.is_finite(), "{what}");
            let r = t / tau;
            assert_close(d.phi[(0, 0)], (-r).exp(), 1e-12, &what);
            assert_close(d.gamma[(0, 0)], -tau * (-r).exp_m1(), 1e-12, &what);
            assert_close(
                d.q[(0, 0)],
                -qc_val * tau / 2.0 * (-2.0 * r).exp_m1(),
                1e-12,
                &what,
            );
        }
    }

    #[test]
    fn stable_system_satisfies_lyapunov_and_inverse_identities() {
        // For stable A with A P + P A' + Qc = 0: Q(T) = P − Φ P Φ' (split the infinite
        // integral at T); for invertible A: Γ = A⁻¹ (Φ − I) B (common practice).
        // P comes from the Kronecker form (I ⊗ A + A ⊗ I) vec P = −vec Qc.
        let a = DMatrix::from_row_slice(3, 3, &[-1.0, 2.0, 0.0, -2.0, -1.0, 0.5, 0.3, 0.0, -3.0]);
        let b = DMatrix::from_row_slice(3, 2, &[1.0, 0.0, 0.5, -1.0, 0.0, 2.0]);
        let qc = DMatrix::from_row_slice(3, 3, &[2.0, 0.3, 0.0, 0.3, 1.0, -0.2, 0.0, -0.2, 0.5]);
        let i3 = DMatrix::<f64>::identity(3, 3);
        let kron = i3.kronecker(&a) + a.kronecker(&i3);
        let vec_p = kron
            .lu()
            .solve(&(-DMatrix::from_column_slice(9, 1, qc.as_slice())))
            .unwrap();
        let p = DMatrix::from_column_slice(3, 3, vec_p.as_slice());
        for &t in &[0.05, 0.7, 4.0] {
            let d = run(&a, &b, &qc, t);
            let q_expected = &p - &d.phi * &p * d.phi.transpose();
            assert!((&d.q - &q_expected).amax() < 1e-13 * p.amax(), "T = {t}");
            let g_expected = a.clone().try_inverse().unwrap() * (&d.phi - &i3) * &b;
            assert!(
                (&d.gamma - &g_expected).amax() < 1e-13 * b.amax(),
                "T = {t}"
            );
            // Independent of the block: Φ against the plain exponential of A T.
            let mut phi = DMatrix::zeros(3, 3);
            Expm::new(3).compute(&(&a * t), &mut phi);
            assert!((&d.phi - phi).amax() < 1e-14, "T = {t}");
            assert_eq!(d.q, d.q.transpose());
            assert!(d.q.clone().symmetric_eigenvalues().min() > 0.0);
        }
    }

    #[test]
    fn zero_step_is_identity_and_no_noise() {
        // dt = 0: no time passes, so Φ = I, Γ = 0, Q = 0 exactly (definition).
        let a = DMatrix::from_row_slice(2, 2, &[1.0, 2.0, 3.0, 4.0]);
        let b = DMatrix::from_row_slice(2, 1, &[1.0, 1.0]);
        let d = run(&a, &b, &DMatrix::identity(2, 2), 0.0);
        assert_eq!(d.phi, DMatrix::identity(2, 2));
        assert_eq!(d.gamma, DMatrix::zeros(2, 1));
        assert_eq!(d.q, DMatrix::zeros(2, 2));
    }

    #[test]
    fn bad_step_or_matrix_is_reported_not_hidden() {
        // Invalid input must surface as non-finite output, never as plausible numbers.
        let a = DMatrix::from_element(1, 1, -1.0);
        let b = DMatrix::from_element(1, 0, 0.0);
        let qc = DMatrix::from_element(1, 1, 1.0);
        for &dt in &[-1.0, f64::NAN, f64::INFINITY] {
            assert!(!run(&a, &b, &qc, dt).is_finite(), "dt = {dt}");
        }
        let bad = DMatrix::from_element(1, 1, f64::NAN);
        assert!(!run(&bad, &b, &qc, 1.0).is_finite());
        assert!(!run(&a, &b, &bad, 1.0).is_finite());
    }

    #[test]
    fn workspace_is_reusable_across_steps() {
        // The same workspace gives the same answer as a fresh one (no stale state).
        let a = DMatrix::from_row_slice(2, 2, &[0.0, 1.0, -4.0, -0.4]);
        let b = DMatrix::from_row_slice(2, 1, &[0.0, 1.0]);
        let qc = DMatrix::from_row_slice(2, 2, &[0.0, 0.0, 0.0, 2.0]);
        let mut d = Discretiser::new(2, 1);
        let mut out = d.output();
        d.discretise(&a, &b, &qc, 30.0, &mut out);
        d.discretise(&a, &b, &qc, 0.2, &mut out);
        let fresh = run(&a, &b, &qc, 0.2);
        assert_eq!(out.phi, fresh.phi);
        assert_eq!(out.gamma, fresh.gamma);
        assert_eq!(out.q, fresh.q);
    }
}
