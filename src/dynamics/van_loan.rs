//! Exact discretisation of `x' = A x + B u + w`, `E[w w'] = Qc δ`, over a step `dt`
//! (zero-order-hold inputs), by Van Loan's block matrix exponential.

// INTERFACE (skeleton): the implementation replaces the bodies below.
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

/// Preallocated discretiser for a fixed `(n, nu)`.
#[derive(Debug, Clone)]
pub struct Discretiser {
    n: usize,
    nu: usize,
}

impl Discretiser {
    /// Workspace for `n` states and `nu` inputs.
    pub fn new(n: usize, nu: usize) -> Self {
        Self { n, nu }
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
    pub fn discretise(
        &mut self,
        a: &DMatrix<f64>,
        b: &DMatrix<f64>,
        qc: &DMatrix<f64>,
        dt: f64,
        out: &mut Discrete,
    ) {
        let _ = (a, b, qc, dt, out);
        todo!()
    }
}
