//! Time propagation of a filter's belief between two readings, for every kind of dynamics.
//!
//! - Gaussian form (EKF): mean and covariance. Linear models use the exact discretisation
//!   (Φ = e^{AΔ}, Q by Van Loan 1978); `next` maps use m⁺ = g(m), P⁺ = G P Gᵀ + Q with the
//!   exact Jacobian G (Jazwinski 1970, *Stochastic Processes and Filtering Theory*, §8.3);
//!   `rates` integrate ṁ = f(m), Ṗ = F P + P Fᵀ + Qc together (the continuous-discrete
//!   EKF, same source, §9.3), optionally with Φ̇ = F Φ for the smoother.
//! - Point form (UKF sigma points, EnKF members): every point moves through the same
//!   deterministic flow in one batched evaluation per stage; the process noise over the
//!   interval, Q = ∫ Φ(Δ,s) Qc Φ(Δ,s)ᵀ ds, comes from Q̇ = F Q + Q Fᵀ + Qc along the
//!   weighted mean of the points (exact for linear models; Särkkä 2013, §5.2 for the idea).
//!
//! Everything is preallocated at construction; a prediction allocates nothing.

use crate::dynamics::{Discrete, Discretiser, Dopri5, OdeError};
use crate::filter::{ensure_finite, FilterError};
use crate::formula::{BatchWorkspace, Program, Workspace};
use crate::linalg::{all_finite, congruence_plus, symmetrize};
use crate::model::{Dynamics, Integration, LinearTime, Model, ProcessNoise, Stop};
use nalgebra::{DMatrix, DVector};

/// `x` rounded to the nearest value with 40 significant bits (the low 12 mantissa bits
/// cleared, rounding half up; a carry into the exponent is the correct rounding).
fn round_to_40_bits(x: f64) -> f64 {
    f64::from_bits((x.to_bits() + 0x800) & !0xFFF)
}

/// Grid steps of a discrete model between two looks at the clock (the cancel flag is
/// looked at every step); one grid step is at least a small matrix product.
const GRID_STOP_EVERY: usize = 64;

/// Classic fixed-step fourth-order Runge–Kutta with its own buffers.
#[derive(Debug, Clone)]
struct Rk4 {
    k: [Vec<f64>; 4],
    tmp: Vec<f64>,
    stop: Stop,
}

impl Rk4 {
    fn new(dim: usize) -> Self {
        Self {
            k: std::array::from_fn(|_| vec![0.0; dim]),
            tmp: vec![0.0; dim],
            stop: Stop::never(),
        }
    }

    /// Integrate from 0 to `span` in equal steps no longer than `h_max`.
    fn integrate<F: FnMut(f64, &[f64], &mut [f64])>(
        &mut self,
        mut f: F,
        span: f64,
        h_max: f64,
        y: &mut [f64],
    ) -> Result<(), OdeError> {
        let steps = (span / h_max).ceil().max(1.0) as usize;
        let h = span / steps as f64;
        let d = y.len();
        for s in 0..steps {
            let t = s as f64 * h;
            if s > 0 && crate::dynamics::past_deadline(&self.stop, s) {
                return Err(OdeError::Deadline { t });
            }
            let [k1, k2, k3, k4] = &mut self.k;
            f(t, y, &mut k1[..d]);
            for i in 0..d {
                self.tmp[i] = y[i] + 0.5 * h * k1[i];
            }
            f(t + 0.5 * h, &self.tmp[..d], &mut k2[..d]);
            for i in 0..d {
                self.tmp[i] = y[i] + 0.5 * h * k2[i];
            }
            f(t + 0.5 * h, &self.tmp[..d], &mut k3[..d]);
            for i in 0..d {
                self.tmp[i] = y[i] + h * k3[i];
            }
            f(t + h, &self.tmp[..d], &mut k4[..d]);
            for i in 0..d {
                y[i] += h / 6.0 * (k1[i] + 2.0 * k2[i] + 2.0 * k3[i] + k4[i]);
            }
            if !all_finite(y) {
                return Err(OdeError::NonFinite {
                    t: t + h,
                    component: crate::dynamics::first_non_finite(y),
                });
            }
        }
        Ok(())
    }
}

/// The filter's error for an integration that failed with `e`; `state_of` maps a component
/// of the integrated vector to the model state whose rate formula it is (`None` for the
/// covariance or transition parts), so the message can name the formula.
fn ode_error(e: OdeError, state_of: impl Fn(usize) -> Option<usize>) -> FilterError {
    match e {
        OdeError::NonFinite {
            component: Some(c), ..
        } if state_of(c).is_some() => FilterError::RateNonFinite {
            state: state_of(c).unwrap_or(0),
        },
        OdeError::NonFinite { .. } => FilterError::NonFinite("state during integration"),
        OdeError::StepTooSmall { .. } => FilterError::Integration(
            "the step size collapsed (the dynamics may be stiff or blow up)",
        ),
        OdeError::TooManySteps { .. } => FilterError::Integration(
            "too many integration steps (set integration.max_step larger, or check the dynamics)",
        ),
        OdeError::Deadline { .. } => FilterError::Deadline,
    }
}

/// Whether a continuous density is all zeros (so the noise integral can be skipped).
fn is_zero(m: &DMatrix<f64>) -> bool {
    m.iter().all(|x| *x == 0.0)
}

/// Buffers of the single-point formula evaluations.
#[derive(Debug, Clone)]
struct PointEval {
    vars: Vec<f64>,
    ws: Option<Workspace>,
    fx: Vec<f64>,
    jac: Vec<f64>,
    f_full: Vec<f64>,
    fp: Vec<f64>,
}

impl PointEval {
    /// `vars = [x, u, t, dt]`, evaluate the dynamics program with its Jacobian over states,
    /// and fill the full `n × n` Jacobian (parameters have zero rate / identity map).
    fn jacobian(&mut self, program: &Program, n: usize, n_model: usize, identity_params: bool) {
        let slots = program.slots();
        let ws = self
            .ws
            .as_mut()
            .expect("workspace exists for formula dynamics");
        program.eval_jacobian(&self.vars[..slots], n, ws, &mut self.fx, &mut self.jac);
        self.f_full.iter_mut().for_each(|x| *x = 0.0);
        for k in 0..n_model {
            for j in 0..n {
                self.f_full[k + j * n] = self.jac[k * n + j];
            }
        }
        if identity_params {
            for k in n_model..n {
                self.f_full[k + k * n] = 1.0;
            }
        }
    }
}

/// dP = F P + P Fᵀ + Qc (also used for Q̇), all `n × n` column-major; `fp` is scratch.
fn lyapunov_rate(f: &[f64], p: &[f64], qc: &[f64], fp: &mut [f64], dp: &mut [f64], n: usize) {
    for j in 0..n {
        for i in 0..n {
            let mut s = 0.0;
            for l in 0..n {
                s += f[i + l * n] * p[l + j * n];
            }
            fp[i + j * n] = s;
        }
    }
    for j in 0..n {
        for i in 0..n {
            dp[i + j * n] = fp[i + j * n] + fp[j + i * n] + qc[i + j * n];
        }
    }
}

/// Lay out the batch variables of `points` points for a formula program: the states
/// (`x`, `points × n` column-major, so each state's values over the points are
/// contiguous), then each of the `nu` inputs `u_j` and the time `t` repeated once per
/// point; the program's own slots follow. Used by the prediction and the point observer.
/// End-of-prediction test of definiteness, O(n): a positive semi-definite P has no
/// negative diagonal entry (Pᵢᵢ = eᵢᵀ P eᵢ ≥ 0, common practice), so a variance below
/// zero proves the prediction lost P's definiteness (cancellation between huge terms, as
/// in a runaway model over a long gap) and the step is refused rather than answered.
/// Rounding leaves a zero variance at most a few ulps of the largest one below zero, so
/// the test allows 64 ε of the largest variance.
pub(crate) fn ensure_variances(cov: &DMatrix<f64>, what: &'static str) -> Result<(), FilterError> {
    let n = cov.nrows();
    let mut largest = 0.0_f64;
    let mut lowest = 0.0_f64;
    for i in 0..n {
        let d = cov[(i, i)];
        largest = largest.max(d);
        lowest = lowest.min(d);
    }
    if lowest < -64.0 * f64::EPSILON * largest {
        Err(FilterError::NotPositive(what))
    } else {
        Ok(())
    }
}

pub(crate) fn load_points(
    bvars: &mut [f64],
    x: &[f64],
    u: &[f64],
    t: f64,
    (nu, points): (usize, usize),
) {
    let states = x.len();
    bvars[..states].copy_from_slice(x);
    for (j, &uj) in u.iter().enumerate() {
        bvars[states + j * points..states + (j + 1) * points].fill(uj);
    }
    bvars[states + nu * points..states + (nu + 1) * points].fill(t);
}

/// `X ← X Mᵀ + 1 vᵀ`: each point (a row of `x`) through the linear map `m`, then moved
/// by `v`; `xm` (the shape of `x`) holds the product. The one linear point step of both
/// the continuous (`M = Φ`, `v = Γ u`) and the discrete (`M = A`, `v = B u`) models.
fn map_points(x: &mut DMatrix<f64>, m: &DMatrix<f64>, v: &DVector<f64>, xm: &mut DMatrix<f64>) {
    crate::linalg::mul_abt(x, m, xm);
    let (points, n) = x.shape();
    for i in 0..n {
        for j in 0..points {
            x[(j, i)] = xm[(j, i)] + v[i];
        }
    }
}

/// Propagates beliefs of one model; owns every buffer it needs.
#[derive(Debug, Clone)]
pub struct Predictor {
    n: usize,
    nu: usize,
    n_model: usize,
    points: usize,
    integration: Integration,
    pe: PointEval,
    // Linear models.
    disc: Option<Discretiser>,
    /// `[B | c]` of a continuous linear model with a constant term `c`, else `B`: the
    /// constant is discretised as an input held at 1 (its `Γ` column is `∫ e^{As} ds c`).
    b_lin: DMatrix<f64>,
    /// Whether `b_lin` carries the constant column (index `nu`).
    has_offset: bool,
    dcache: Vec<Discrete>,
    cached_dt: [f64; 2],
    current: usize,
    // Noise.
    qc: DMatrix<f64>,
    q_step: DMatrix<f64>,
    random_walk: DVector<f64>,
    q_zero: bool,
    /// Whether every estimated parameter's random walk is zero (so per-step noise is `q_step`).
    random_walk_zero: bool,
    // Integrators and their state vectors.
    ode_g: Dopri5,
    rk_g: Rk4,
    y_g: Vec<f64>,
    ode_p: Dopri5,
    rk_p: Rk4,
    y_p: Vec<f64>,
    // Batched evaluation over points.
    bws: Option<BatchWorkspace>,
    bvars: Vec<f64>,
    bout: Vec<f64>,
    weights: Vec<f64>,
    // Scratch.
    tmp: DMatrix<f64>,
    tmp2: DMatrix<f64>,
    g: DMatrix<f64>,
    xm: DMatrix<f64>,
    vtmp: DVector<f64>,
    /// When to give up the grid steps of a discrete model (the integrators and the
    /// discretiser hold their own copies).
    stop: Stop,
}

impl Predictor {
    /// Buffers for `model`, propagating up to `points` points at once (0 for the EKF).
    pub fn new(model: &Model, integration: Integration, points: usize) -> Self {
        let (n, nu, n_model) = (model.n(), model.nu(), model.n_model);
        let program = match &model.dynamics {
            Dynamics::Rates(p) | Dynamics::Next(p) => Some(p),
            Dynamics::Linear { .. } => None,
        };
        let (qc, q_step, random_walk) = match &model.noise {
            ProcessNoise::Density(q) => (q.clone(), DMatrix::zeros(n, n), DVector::zeros(n)),
            ProcessNoise::PerStep { q, random_walk } => {
                (DMatrix::zeros(n, n), q.clone(), random_walk.clone())
            }
        };
        let random_walk_zero = random_walk.iter().all(|d| *d == 0.0);
        let q_zero = is_zero(&qc) && is_zero(&q_step) && random_walk_zero;
        let (disc, dcache, b_lin, has_offset) = match &model.dynamics {
            Dynamics::Linear {
                time: LinearTime::Continuous,
                b,
                offset,
                ..
            } => {
                let has_offset = offset.iter().any(|c| *c != 0.0);
                let b_lin = if has_offset {
                    let mut m = DMatrix::zeros(n, nu + 1);
                    m.columns_mut(0, nu).copy_from(b);
                    m.column_mut(nu).copy_from(offset);
                    m
                } else {
                    b.clone()
                };
                let d = Discretiser::new(n, b_lin.ncols());
                let cache = vec![d.output(), d.output()];
                (Some(d), cache, b_lin, has_offset)
            }
            _ => (None, Vec::new(), DMatrix::zeros(0, 0), false),
        };
        let g_dim = n + n * n;
        let p_dim = n * points + if q_zero { 0 } else { n * n };
        let slots = model.slot_count();
        Self {
            n,
            nu,
            n_model,
            points,
            integration,
            pe: PointEval {
                vars: vec![0.0; slots],
                ws: program.map(|p| p.workspace()),
                fx: vec![0.0; n_model],
                jac: vec![0.0; n_model * n],
                f_full: vec![0.0; n * n],
                fp: vec![0.0; n * n],
            },
            disc,
            b_lin,
            has_offset,
            dcache,
            cached_dt: [f64::NAN; 2],
            current: 0,
            qc,
            q_step,
            random_walk,
            q_zero,
            random_walk_zero,
            ode_g: Self::dopri(n + n * n, &integration),
            rk_g: Rk4::new(g_dim),
            y_g: vec![0.0; g_dim],
            ode_p: Self::dopri(p_dim.max(1), &integration),
            rk_p: Rk4::new(p_dim.max(1)),
            y_p: vec![0.0; p_dim.max(1)],
            bws: program
                .filter(|_| points > 0)
                .map(|p| p.batch_workspace(points)),
            bvars: vec![0.0; slots * points],
            bout: vec![0.0; n_model * points],
            weights: vec![0.0; points],
            tmp: DMatrix::zeros(n, n),
            tmp2: DMatrix::zeros(n, n),
            g: DMatrix::zeros(n, n),
            xm: DMatrix::zeros(points, n),
            vtmp: DVector::zeros(n),
            stop: Stop::never(),
        }
    }

    /// Give up a prediction (integration, discrete stepping, matrix exponential) once
    /// `stop` fires, with [`FilterError::Deadline`].
    pub fn set_stop(&mut self, stop: &Stop) {
        self.ode_g.stop = stop.clone();
        self.ode_p.stop = stop.clone();
        self.rk_g.stop = stop.clone();
        self.rk_p.stop = stop.clone();
        if let Some(d) = self.disc.as_mut() {
            d.set_stop(stop);
        }
        self.stop = stop.clone();
    }

    fn dopri(dim: usize, integration: &Integration) -> Dopri5 {
        let mut d = Dopri5::new(dim);
        d.rtol = integration.rtol;
        d.atol = integration.atol;
        d.max_step = integration.max_step;
        d
    }

    /// Exact discretisation for linear continuous models, cached for repeated steps.
    ///
    /// Readings on a regular grid give gaps that differ in their last bits
    /// (k·0.1 − (k−1)·0.1), so the discretisation is computed for the gap rounded to 40
    /// significant bits (a relative change below 1e-12, far inside any noise model) and the
    /// last two such gaps are kept. The result depends on the gap alone, never on which gap
    /// came first, so a run split into requests still matches one run bit for bit.
    fn discretise(&mut self, model: &Model, dt: f64) -> Result<(), FilterError> {
        let key = round_to_40_bits(dt);
        if let (Some(d), Dynamics::Linear { matrix, .. }) = (self.disc.as_mut(), &model.dynamics) {
            if let Some(slot) = self
                .cached_dt
                .iter()
                .position(|c| c.to_bits() == key.to_bits())
            {
                self.current = slot;
                return Ok(());
            }
            let slot = 1 - self.current;
            d.discretise(matrix, &self.b_lin, &self.qc, key, &mut self.dcache[slot]);
            if d.gave_up() {
                // A half-made discretisation must not be found in the cache later.
                self.cached_dt[slot] = f64::NAN;
                return Err(FilterError::Deadline);
            }
            self.cached_dt[slot] = key;
            self.current = slot;
        }
        Ok(())
    }

    /// Per-step discrete noise `q + diag(random_walk)·dt` into `out`.
    fn step_noise(&self, dt: f64, out: &mut DMatrix<f64>) {
        out.copy_from(&self.q_step);
        for i in 0..self.n {
            out[(i, i)] += self.random_walk[i] * dt;
        }
    }

    /// Number of grid steps for a discrete linear model over a gap `dt`.
    fn grid_steps(dt: f64, grid: f64) -> usize {
        crate::linalg::round_half_away(dt / grid).max(0.0) as usize
    }

    /// Gaussian prediction over `dt > 0` from time `t0` with inputs `u`. When `phi` is
    /// given it receives the state transition matrix of the step (for the smoother).
    #[allow(clippy::too_many_arguments)]
    pub fn predict_gaussian(
        &mut self,
        model: &Model,
        mean: &mut DVector<f64>,
        cov: &mut DMatrix<f64>,
        u: &[f64],
        t0: f64,
        dt: f64,
        mut phi: Option<&mut DMatrix<f64>>,
    ) -> Result<(), FilterError> {
        let n = self.n;
        match &model.dynamics {
            Dynamics::Linear {
                time: LinearTime::Continuous,
                ..
            } => {
                self.discretise(model, dt)?;
                let d = &self.dcache[self.current];
                d.phi.mul_to(mean, &mut self.vtmp);
                mean.copy_from(&self.vtmp);
                for (i, mi) in mean.iter_mut().enumerate() {
                    for (j, uj) in u.iter().enumerate() {
                        *mi += d.gamma[(i, j)] * uj;
                    }
                    if self.has_offset {
                        *mi += d.gamma[(i, self.nu)];
                    }
                }
                congruence_plus(&d.phi, cov, &d.q, &mut self.tmp);
                if let Some(p) = phi.as_deref_mut() {
                    p.copy_from(&d.phi);
                }
            }
            Dynamics::Linear {
                time: LinearTime::Discrete { dt: grid },
                matrix,
                b,
                ..
            } => {
                let k = Self::grid_steps(dt, *grid);
                // Without parameter random walk the per-step noise is the model's own `q`.
                let mut q = std::mem::replace(&mut self.tmp2, DMatrix::zeros(0, 0));
                if !self.random_walk_zero {
                    self.step_noise(*grid, &mut q);
                }
                let q_used = if self.random_walk_zero {
                    &self.q_step
                } else {
                    &q
                };
                if let Some(p) = phi.as_deref_mut() {
                    p.fill_with_identity();
                }
                for i in 0..k {
                    if self.stop.every(i, GRID_STOP_EVERY).is_some() {
                        self.tmp2 = q;
                        return Err(FilterError::Deadline);
                    }
                    matrix.mul_to(mean, &mut self.vtmp);
                    mean.copy_from(&self.vtmp);
                    for (i, mi) in mean.iter_mut().enumerate() {
                        for (j, uj) in u.iter().enumerate() {
                            *mi += b[(i, j)] * uj;
                        }
                    }
                    congruence_plus(matrix, cov, q_used, &mut self.tmp);
                    if let Some(p) = phi.as_deref_mut() {
                        crate::linalg::mul_ab(matrix, p, &mut self.tmp);
                        p.copy_from(&self.tmp);
                    }
                }
                self.tmp2 = q;
            }
            Dynamics::Next(program) => {
                self.fill_vars(mean.as_slice(), u, t0, dt);
                self.pe.jacobian(program, n, self.n_model, true);
                for k in 0..self.n_model {
                    mean[k] = self.pe.fx[k];
                }
                let mut q = std::mem::replace(&mut self.tmp2, DMatrix::zeros(0, 0));
                if !self.random_walk_zero {
                    self.step_noise(dt, &mut q);
                }
                let q_used = if self.random_walk_zero {
                    &self.q_step
                } else {
                    &q
                };
                self.g.as_mut_slice().copy_from_slice(&self.pe.f_full);
                congruence_plus(&self.g, cov, q_used, &mut self.tmp);
                if let Some(p) = phi.as_deref_mut() {
                    p.copy_from(&self.g);
                }
                self.tmp2 = q;
            }
            Dynamics::Rates(program) => {
                // Mean and covariance first, exactly as without smoothing, so asking for Φ
                // never changes the filter's own numbers; then Φ along the same start.
                self.vtmp.copy_from(mean);
                self.y_g[..n].copy_from_slice(mean.as_slice());
                self.y_g[n..n + n * n].copy_from_slice(cov.as_slice());
                self.integrate_rates(program, u, t0, dt, false)?;
                mean.as_mut_slice().copy_from_slice(&self.y_g[..n]);
                cov.as_mut_slice().copy_from_slice(&self.y_g[n..n + n * n]);
                symmetrize(cov);
                if let Some(p) = phi {
                    self.y_g[..n].copy_from_slice(self.vtmp.as_slice());
                    for j in 0..n {
                        for i in 0..n {
                            self.y_g[n + i + j * n] = if i == j { 1.0 } else { 0.0 };
                        }
                    }
                    self.integrate_rates(program, u, t0, dt, true)?;
                    p.as_mut_slice().copy_from_slice(&self.y_g[n..n + n * n]);
                }
            }
        }
        ensure_finite(mean.as_slice(), cov.as_slice(), "predicted state")?;
        ensure_variances(cov, "predicted covariance")
    }

    /// Integrate `y_g = [m, M]` over `dt` where `M` follows Ṗ = F P + P Fᵀ + Qc (covariance)
    /// or, with `variational`, Φ̇ = F Φ (state transition matrix).
    fn integrate_rates(
        &mut self,
        program: &Program,
        u: &[f64],
        t0: f64,
        dt: f64,
        variational: bool,
    ) -> Result<(), FilterError> {
        let (n, nm, nu) = (self.n, self.n_model, self.nu);
        let pe = &mut self.pe;
        let qc = self.qc.as_slice();
        let rhs = |s: f64, y: &[f64], dy: &mut [f64]| {
            pe.vars[..n].copy_from_slice(&y[..n]);
            pe.vars[n..n + nu].copy_from_slice(u);
            pe.vars[n + nu] = t0 + s;
            pe.jacobian(program, n, nm, false);
            dy[..nm].copy_from_slice(&pe.fx);
            dy[nm..n].iter_mut().for_each(|x| *x = 0.0);
            let m = &y[n..n + n * n];
            let dm = &mut dy[n..n + n * n];
            if variational {
                for j in 0..n {
                    for i in 0..n {
                        let mut acc = 0.0;
                        for l in 0..n {
                            acc += pe.f_full[i + l * n] * m[l + j * n];
                        }
                        dm[i + j * n] = acc;
                    }
                }
            } else {
                lyapunov_rate(&pe.f_full, m, qc, &mut pe.fp, dm, n);
            }
        };
        let y = &mut self.y_g[..n + n * n];
        match self.integration.fixed_step {
            Some(h) => self.rk_g.integrate(rhs, dt, h, y),
            None => self.ode_g.integrate(rhs, 0.0, dt, y).map(|_| ()),
        }
        // y = [m, M]: the first n_model entries are the model states' own rates.
        .map_err(|e| ode_error(e, |c| (c < nm).then_some(c)))
    }

    fn fill_vars(&mut self, x: &[f64], u: &[f64], t0: f64, dt: f64) {
        let (n, nu) = (self.n, self.nu);
        self.pe.vars[..n].copy_from_slice(x);
        self.pe.vars[n..n + nu].copy_from_slice(u);
        self.pe.vars[n + nu] = t0;
        self.pe.vars[n + nu + 1] = dt;
    }

    /// Move the points (rows of `x`, `points × n`) over `dt > 0` and put the process noise
    /// covariance of the interval in `q`. `weights` give the mean along which the noise of a
    /// nonlinear continuous model is integrated. Returns whether `q` is non-zero.
    #[allow(clippy::too_many_arguments)]
    pub fn predict_points(
        &mut self,
        model: &Model,
        x: &mut DMatrix<f64>,
        weights: &[f64],
        u: &[f64],
        t0: f64,
        dt: f64,
        q: &mut DMatrix<f64>,
    ) -> Result<bool, FilterError> {
        let (n, nu, nm, mp) = (self.n, self.nu, self.n_model, self.points);
        debug_assert_eq!(x.nrows(), mp);
        match &model.dynamics {
            Dynamics::Linear {
                time: LinearTime::Continuous,
                ..
            } => {
                self.discretise(model, dt)?;
                let d = &self.dcache[self.current];
                // X ← X Φᵀ + 1 (Γ u)ᵀ
                for i in 0..n {
                    let c = if self.has_offset {
                        d.gamma[(i, nu)]
                    } else {
                        0.0
                    };
                    self.vtmp[i] = (0..nu).map(|j| d.gamma[(i, j)] * u[j]).sum::<f64>() + c;
                }
                map_points(x, &d.phi, &self.vtmp, &mut self.xm);
                q.copy_from(&d.q);
            }
            Dynamics::Linear {
                time: LinearTime::Discrete { dt: grid },
                matrix,
                b,
                ..
            } => {
                let k = Self::grid_steps(dt, *grid);
                let mut qs = std::mem::replace(&mut self.tmp2, DMatrix::zeros(0, 0));
                self.step_noise(*grid, &mut qs);
                q.fill(0.0);
                for i in 0..n {
                    self.vtmp[i] = (0..nu).map(|j| b[(i, j)] * u[j]).sum();
                }
                for i in 0..k {
                    if self.stop.every(i, GRID_STOP_EVERY).is_some() {
                        self.tmp2 = qs;
                        return Err(FilterError::Deadline);
                    }
                    map_points(x, matrix, &self.vtmp, &mut self.xm);
                    congruence_plus(matrix, q, &qs, &mut self.tmp);
                }
                self.tmp2 = qs;
            }
            Dynamics::Next(program) => {
                let slots = program.slots();
                load_points(&mut self.bvars, x.as_slice(), u, t0, (nu, mp));
                self.bvars[(n + nu + 1) * mp..(n + nu + 2) * mp]
                    .iter_mut()
                    .for_each(|v| *v = dt);
                let bws = self.bws.as_mut().expect("batch workspace");
                program.eval_batch(&self.bvars[..slots * mp], mp, bws, &mut self.bout);
                x.as_mut_slice()[..nm * mp].copy_from_slice(&self.bout[..nm * mp]);
                self.step_noise(dt, q);
            }
            Dynamics::Rates(program) => {
                self.weights[..mp].copy_from_slice(weights);
                let with_q = !self.q_zero;
                let dim = n * mp + if with_q { n * n } else { 0 };
                let y = &mut self.y_p[..dim];
                y[..n * mp].copy_from_slice(x.as_slice());
                if with_q {
                    y[n * mp..].iter_mut().for_each(|v| *v = 0.0);
                }
                for (j, uj) in u.iter().enumerate() {
                    self.bvars[(n + j) * mp..(n + j + 1) * mp]
                        .iter_mut()
                        .for_each(|v| *v = *uj);
                }
                let slots = program.slots();
                let bvars = &mut self.bvars;
                let bws = self.bws.as_mut().expect("batch workspace");
                let pe = &mut self.pe;
                let w = &self.weights[..mp];
                let qc = self.qc.as_slice();
                let rhs = |s: f64, y: &[f64], dy: &mut [f64]| {
                    bvars[(n + nu) * mp..(n + nu + 1) * mp]
                        .iter_mut()
                        .for_each(|v| *v = t0 + s);
                    // States straight from the integrator, rates straight into it.
                    program.eval_batch_split(
                        &y[..n * mp],
                        &bvars[n * mp..slots.max(n) * mp],
                        mp,
                        bws,
                        &mut dy[..nm * mp],
                    );
                    dy[nm * mp..n * mp].iter_mut().for_each(|v| *v = 0.0);
                    if with_q {
                        for i in 0..n {
                            pe.vars[i] = (0..mp).map(|j| w[j] * y[i * mp + j]).sum();
                        }
                        pe.vars[n..n + nu].copy_from_slice(u);
                        pe.vars[n + nu] = t0 + s;
                        pe.jacobian(program, n, nm, false);
                        let (_, dq) = dy.split_at_mut(n * mp);
                        lyapunov_rate(&pe.f_full, &y[n * mp..], qc, &mut pe.fp, dq, n);
                    }
                };
                match self.integration.fixed_step {
                    Some(h) => self.rk_p.integrate(rhs, dt, h, y),
                    None => self.ode_p.integrate(rhs, 0.0, dt, y).map(|_| ()),
                }
                // y = [points by state (mp each), Q]: entry i·mp + j is state i of point j.
                .map_err(|e| ode_error(e, |c| (c < nm * mp).then_some(c / mp)))?;
                x.as_mut_slice().copy_from_slice(&y[..n * mp]);
                if with_q {
                    q.as_mut_slice().copy_from_slice(&y[n * mp..dim]);
                    symmetrize(q);
                } else {
                    q.fill(0.0);
                }
            }
        }
        ensure_finite(x.as_slice(), q.as_slice(), "predicted points")?;
        Ok(!self.q_zero)
    }
}

#[cfg(test)]
mod tests {
    use super::{ensure_variances, round_to_40_bits, DMatrix, FilterError};

    /// A PSD matrix has no negative diagonal entry (common practice); a prediction
    /// that leaves one is refused, while rounding a few ulps below zero is not.
    #[test]
    fn a_negative_predicted_variance_is_refused() {
        let lost = DMatrix::from_row_slice(2, 2, &[1.0, 0.0, 0.0, -9.5e69]);
        assert!(matches!(
            ensure_variances(&lost, "predicted covariance"),
            Err(FilterError::NotPositive("predicted covariance"))
        ));
        let all_below = DMatrix::from_row_slice(1, 1, &[-1e-300]);
        assert!(ensure_variances(&all_below, "p").is_err());
        let rounding = DMatrix::from_row_slice(2, 2, &[1.0, 0.0, 0.0, -1e-16]);
        assert!(ensure_variances(&rounding, "p").is_ok());
        let zero = DMatrix::zeros(3, 3);
        assert!(ensure_variances(&zero, "p").is_ok());
    }

    #[test]
    fn grid_gaps_share_one_discretisation_key() {
        // Gaps of a 0.1 s grid computed as differences of k·0.1 differ in their last bits;
        // they must share a key, and the key must stay within 1e-12 of the gap.
        let gaps: Vec<f64> = (1..2000)
            .map(|k| k as f64 * 0.1 - (k - 1) as f64 * 0.1)
            .collect();
        let keys: std::collections::BTreeSet<u64> = gaps
            .iter()
            .map(|g| round_to_40_bits(*g).to_bits())
            .collect();
        assert!(keys.len() <= 2, "{} distinct keys", keys.len());
        for g in gaps {
            assert!((round_to_40_bits(g) - g).abs() <= 1e-12 * g);
        }
        assert_eq!(round_to_40_bits(0.0), 0.0);
    }
}
