//! Rates of a family model (issue 13) and the classical fourth-order Runge–Kutta step that
//! moves one member of a large ensemble through them.
//!
//! A family model's rates are one compiled kernel per family ([`FamilyKernel`]), each
//! evaluated over all its elements by batch evaluation; the state vector holds the
//! families one after another ([`FamilySet`]). The step is fixed (the ensemble's forecast
//! of a model with 10⁵ states and more takes one step per cycle, as the issue's Lorenz-96
//! bench does, rather than an adaptive step with its error norm over every state).

use crate::formula::{FamilyKernel, FamilySet, FamilyWorkspace};

/// The rates `x' = f(x, t)` of a family model: one kernel per family, in the order of
/// `set`, with each kernel's per-element parameter arrays.
#[derive(Debug, Clone)]
pub struct FamilyRates {
    /// Layout of the families in the state vector.
    pub set: FamilySet,
    /// Kernel of family `f` at index `f`.
    pub kernels: Vec<FamilyKernel>,
    /// Per-element parameter arrays of each kernel, in the order it was compiled with.
    pub arrays: Vec<Vec<Vec<f64>>>,
}

impl FamilyRates {
    /// Scratch space for [`FamilyRates::eval`].
    pub fn workspace(&self) -> Vec<FamilyWorkspace> {
        self.kernels.iter().map(FamilyKernel::workspace).collect()
    }

    /// `out = f(x, t)` over all states. Allocates nothing.
    pub fn eval(&self, x: &[f64], t: f64, ws: &mut [FamilyWorkspace], out: &mut [f64]) {
        let mut arrays: [&[f64]; MAX_FAMILY_ARRAYS] = [&[]; MAX_FAMILY_ARRAYS];
        for (f, k) in self.kernels.iter().enumerate() {
            let own = &self.arrays[f];
            for (a, v) in arrays.iter_mut().zip(own) {
                *a = v;
            }
            let (start, size) = (self.set.starts[f], self.set.shapes[f].size);
            k.eval_all(
                x,
                &self.set,
                &arrays[..own.len().min(MAX_FAMILY_ARRAYS)],
                t,
                &mut ws[f],
                &mut out[start..start + size],
            );
        }
    }
}

/// Most per-element parameter arrays one family formula may read.
pub const MAX_FAMILY_ARRAYS: usize = 8;

/// Buffers of one classical RK4 step over `n` states.
#[derive(Debug, Clone)]
pub struct FamilyRk4 {
    k: [Vec<f64>; 4],
    tmp: Vec<f64>,
    ws: Vec<FamilyWorkspace>,
}

impl FamilyRk4 {
    /// Buffers for `rates`.
    pub fn new(rates: &FamilyRates) -> FamilyRk4 {
        let n = rates.set.n();
        FamilyRk4 {
            k: std::array::from_fn(|_| vec![0.0; n]),
            tmp: vec![0.0; n],
            ws: rates.workspace(),
        }
    }

    /// One step of the classical Runge–Kutta method (Kutta 1901; Hairer, Nørsett &
    /// Wanner, *Solving ODEs I*, §II.1, table 1.2, from memory):
    ///
    /// ```text
    /// k1 = f(x, t),  k2 = f(x + h/2 k1, t + h/2),  k3 = f(x + h/2 k2, t + h/2),
    /// k4 = f(x + h k3, t + h),  x ← x + h/6 (k1 + 2 k2 + 2 k3 + k4)
    /// ```
    ///
    /// Allocates nothing.
    pub fn step(&mut self, rates: &FamilyRates, x: &mut [f64], t: f64, h: f64) {
        let half = 0.5 * h;
        let [k1, k2, k3, k4] = &mut self.k;
        rates.eval(x, t, &mut self.ws, k1);
        for ((d, &xi), &k) in self.tmp.iter_mut().zip(x.iter()).zip(k1.iter()) {
            *d = xi + half * k;
        }
        rates.eval(&self.tmp, t + half, &mut self.ws, k2);
        for ((d, &xi), &k) in self.tmp.iter_mut().zip(x.iter()).zip(k2.iter()) {
            *d = xi + half * k;
        }
        rates.eval(&self.tmp, t + half, &mut self.ws, k3);
        for ((d, &xi), &k) in self.tmp.iter_mut().zip(x.iter()).zip(k3.iter()) {
            *d = xi + h * k;
        }
        rates.eval(&self.tmp, t + h, &mut self.ws, k4);
        let sixth = h / 6.0;
        for i in 0..x.len() {
            x[i] += sixth * (k1[i] + 2.0 * k2[i] + 2.0 * k3[i] + k4[i]);
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::formula::{Boundary, FamilyShape, FormulaLimits, Source};

    /// Exponential decay `x' = -c[i] x[i]` per element.
    fn decay(c: Vec<f64>) -> FamilyRates {
        let set = FamilySet::new(vec![FamilyShape {
            name: "x".into(),
            size: c.len(),
            boundary: Boundary::Periodic,
        }]);
        let src = Source {
            text: "-c[i]*x[i]",
            pointer: String::new(),
        };
        let limits = FormulaLimits {
            max_len: 100,
            max_depth: 16,
        };
        let k = FamilyKernel::compile(&src, c.len(), &set, &["c"], &[], &limits).unwrap();
        FamilyRates {
            set,
            kernels: vec![k],
            arrays: vec![vec![c]],
        }
    }

    // RK4 on x' = -c x multiplies by the degree-4 Taylor polynomial of exp(-c h) per step
    // (the stability function of classical RK4; Hairer, Nørsett & Wanner §IV.2, from
    // memory).
    #[test]
    fn one_step_on_decay_is_the_fourth_order_taylor_factor() {
        let rates = decay(vec![0.5, 2.0, 3.0]);
        let mut rk = FamilyRk4::new(&rates);
        let mut x = vec![1.0, 1.0, 2.0];
        let h = 0.1;
        rk.step(&rates, &mut x, 0.0, h);
        for (i, c) in [0.5, 2.0, 3.0].iter().enumerate() {
            let z: f64 = -c * h;
            let r = 1.0 + z + z * z / 2.0 + z.powi(3) / 6.0 + z.powi(4) / 24.0;
            let x0 = if i == 2 { 2.0 } else { 1.0 };
            assert!(
                (x[i] - x0 * r).abs() <= 1e-15,
                "{i}: {} vs {}",
                x[i],
                x0 * r
            );
        }
    }
}
