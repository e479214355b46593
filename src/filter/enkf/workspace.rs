//! Every buffer the ensemble filter works in, allocated once when the filter is built so
//! that a step allocates nothing. Sizes: `N` members, `n` states, `m` reading rows of all
//! sensors, `a` of them accepted on the current line (`a ≤ m`); matrices are column-major.
//!
//! Several buffers are laid out twice over (by member and by state, or transposed) so
//! that each sum over members runs with its outputs innermost: independent running sums
//! that vectorise, each still adding its terms in member order, so results equal plain
//! dot products bit for bit.

use nalgebra::{DMatrix, DVector};

/// The ensemble filter's scratch and per-step buffers (one documented line each).
#[derive(Debug, Clone)]
pub(super) struct Workspace {
    /// Weight of each member in the forecast's sample statistics, `1/N` each (`N`).
    pub member_weights: Vec<f64>,
    /// Process noise covariance of the current interval (`n × n`).
    pub process_noise: DMatrix<f64>,
    /// Lower Cholesky factor of `process_noise` (`n × n`, column-major).
    pub process_noise_factor: Vec<f64>,
    /// Lower Cholesky factor `L_R` of the accepted readings' noise (`a × a` used, `m × m`).
    pub noise_factor: Vec<f64>,
    /// Whether the accepted readings' noise is diagonal (independent sensors, the usual
    /// case), so whitening is one multiplication per entry by `inv_noise_sd`.
    pub noise_is_diagonal: bool,
    /// `1/√R_aa` of the accepted readings when `noise_is_diagonal` (`m`).
    pub inv_noise_sd: Vec<f64>,
    /// Mean predicted reading `ȳ` over the members (`m`).
    pub reading_mean: Vec<f64>,
    /// Standard normal draws for one member, and the NIS residual `r` (`max(m, n)`).
    pub draws: Vec<f64>,
    /// Members before the last prediction, for the smoother's cross covariance (`N × n`).
    pub previous_members: DMatrix<f64>,
    /// Ensemble mean before the last prediction (`n`).
    pub previous_mean: DVector<f64>,
    /// Whitened predicted-reading anomalies `Ỹ = L_R⁻¹ Y'` (`a × N` used, `m × N`).
    pub whitened: DMatrix<f64>,
    /// `Ỹᵀ`: `whitened_t[j + r N] = Ỹ_rj` (`N × a` used).
    pub whitened_t: Vec<f64>,
    /// The transform's `(N−1) I + ỸᵀỸ`, overwritten by its eigenvectors `V` (`N × N`).
    pub transform_gram: DMatrix<f64>,
    /// The small form's `G = Ỹ Ỹᵀ`, overwritten by its eigenvectors `U` (`a × a` used).
    pub reading_gram: Vec<f64>,
    /// Eigenvalues of `transform_gram` or `reading_gram` (`max(N, m)`).
    pub eigenvalues: Vec<f64>,
    /// The eigensolver's scratch, three entries per row (`3 max(N, m)`).
    pub eigen_scratch: Vec<f64>,
    /// `√λ` of the transform's eigenvalues; first holds `Ỹᵀ d̃` (`N`).
    pub sqrt_eigenvalues: Vec<f64>,
    /// Eigenvectors scaled by `1/√λ`, `v_il / √λ_l` (`N × N`).
    pub scaled_eigenvectors: Vec<f64>,
    /// Weights of the mean update `w̄` (`N`).
    pub mean_weights: DVector<f64>,
    /// `g = Λ⁻¹ Vᵀ Ỹᵀ d̃` (full form), or the direction `v_k = Ỹᵀ u_k / σ_k` (small form) (`N`).
    pub member_vector: DVector<f64>,
    /// Whitened innovation `d̃ = L_R⁻¹ (z − ȳ)` (transform), or one member's innovation
    /// `z + L_R ε − h(x_j)` (perturbed) (`a` used, `m`).
    pub innovation: Vec<f64>,
    /// The transform `T` stored transposed, `transform_t[(j, i)] = T(i, j)` (`N × N`).
    pub transform_t: DMatrix<f64>,
    /// Full form: `Tᵀ X'`, the analysis anomalies; small form: the forecast anomalies `X'`
    /// (`N × n`).
    pub analysis_anomalies: DMatrix<f64>,
    /// Forecast anomalies member-major, `x_ji − x̄_i` at `[j + i N]` (`N × n`).
    pub member_anomalies: Vec<f64>,
    /// Forecast anomalies state-major, `x_ki − x̄_i` at `[i + k n]` (`n × N`).
    pub state_anomalies: Vec<f64>,
    /// Predicted-reading anomalies per member, `y_rk − ȳ_r` at `[r + k m]` (`m × N`).
    pub reading_anomalies: Vec<f64>,
    /// The array `[L_R, Y'/√(N−1); 0, X'/√(N−1); 0, 1ᵀ]`, rotated to
    /// `[S^{1/2}, 0; K̄, X̃; 0, u₂ᵀ]` (`(m + n + 1) × (m + N)`, leading dimension
    /// `m + n + 1`): the perturbed update's gain, and the analysis anomalies of the
    /// fallback when the members lose their spread to rounding.
    pub gain_array: Vec<f64>,
    /// The analysis members' covariance and its Cholesky factor, for the spread check
    /// (`n × n` each).
    pub check_cov: Vec<f64>,
    pub check_factor: Vec<f64>,
    /// The reflector `v = u₂ − 1` of the fallback (`N`).
    pub reflector: Vec<f64>,
    /// ln det M of the last transform, M = I + ỸỸᵀ/(N−1) (so ln det S = ln det R + this).
    pub log_det_m: f64,
    /// Running sums, one per output of an innermost loop (`max(n, m, N)`).
    pub sums: Vec<f64>,
    /// The forecast mean, before the analysis moved it, for the resolution check (`n`).
    pub forecast_mean: Vec<f64>,
    /// Forecast spread (std) of each estimated parameter before the analysis, for the
    /// relaxation in `relax.rs` (`n` − model states).
    pub forecast_spread: Vec<f64>,
}

impl Workspace {
    /// Buffers for `members` members, `n` states and `m` reading rows over all sensors.
    pub(super) fn new(members: usize, n: usize, m: usize, parameters: usize) -> Self {
        let nn = members;
        Self {
            member_weights: vec![1.0 / nn as f64; nn],
            process_noise: DMatrix::zeros(n, n),
            process_noise_factor: vec![0.0; n * n],
            noise_factor: vec![0.0; m * m],
            noise_is_diagonal: false,
            inv_noise_sd: vec![0.0; m],
            reading_mean: vec![0.0; m],
            draws: vec![0.0; m.max(n)],
            previous_members: DMatrix::zeros(nn, n),
            previous_mean: DVector::zeros(n),
            whitened: DMatrix::zeros(m, nn),
            whitened_t: vec![0.0; nn * m],
            transform_gram: DMatrix::zeros(nn, nn),
            reading_gram: vec![0.0; m * m],
            eigenvalues: vec![0.0; nn.max(m)],
            eigen_scratch: vec![0.0; 3 * nn.max(m)],
            sqrt_eigenvalues: vec![0.0; nn],
            scaled_eigenvectors: vec![0.0; nn * nn],
            mean_weights: DVector::zeros(nn),
            member_vector: DVector::zeros(nn),
            innovation: vec![0.0; m],
            transform_t: DMatrix::zeros(nn, nn),
            analysis_anomalies: DMatrix::zeros(nn, n),
            member_anomalies: vec![0.0; nn * n],
            state_anomalies: vec![0.0; n * nn],
            reading_anomalies: vec![0.0; m * nn],
            gain_array: vec![0.0; (m + n + 1) * (m + nn)],
            check_cov: vec![0.0; n * n],
            check_factor: vec![0.0; n * n],
            reflector: vec![0.0; nn],
            log_det_m: 0.0,
            sums: vec![0.0; n.max(m).max(nn)],
            forecast_mean: vec![0.0; n],
            forecast_spread: vec![0.0; parameters],
        }
    }
}
