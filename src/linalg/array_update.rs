//! The square-root array form of the Kalman measurement update: the posterior covariance
//! comes out as a factor `L⁺` (`P⁺ = L⁺ L⁺ᵀ`), never as the difference `P − K S Kᵀ`, so
//! it stays symmetric and positive semi-definite, and accurate when the prior spread
//! dwarfs the reading noise (where the plain, Joseph and rank-one forms cancel away every
//! digit of the posterior).
//!
//! With the predicted covariance `P = L Lᵀ`, reading rows `H` (or any `m × n` block `B`
//! with `B Bᵀ = H P Hᵀ`, `L Bᵀ = P Hᵀ`) and noise `R = R^{1/2} R^{T/2}`, an orthogonal `Θ`
//! applied from the right brings the pre-array to lower block-triangular form:
//!
//! ```text
//! [ R^{1/2}  H L ]  Θ  =  [ S^{1/2}   0  ]      S = H P Hᵀ + R
//! [   0       L  ]        [   K̄      L⁺ ]      K = K̄ S^{-1/2},  P⁺ = L⁺ L⁺ᵀ
//! ```
//!
//! (both sides multiplied by their transposes give `S`, `P Hᵀ = K̄ S^{T/2}` and
//! `P = K̄ K̄ᵀ + L⁺ L⁺ᵀ`, i.e. `P⁺ = P − P Hᵀ S⁻¹ H P`). Kailath, Sayed & Hassibi 2000,
//! *Linear Estimation*, ch. 12 (array algorithms); Kaminski, Bryson & Schmidt 1971,
//! IEEE TAC 16(6) (square-root filtering). `Θ` is a sequence of Givens rotations
//! (Golub & Van Loan, *Matrix Computations*, 4th ed., §5.1.8, from memory); `L⁺` need
//! not be triangular. One scalar row (uncorrelated readings, processed one at a time)
//! takes `n` rotations of `n + 1` entries each, O(n²); the block form O(m (m + n)²).
//!
//! The factor of `P` ([`ArrayUpdate::factor`]) is its Cholesky factor. When that fails
//! because `P` is only semi-definite, or indefinite by rounding, the factor is taken from
//! a symmetric eigen-decomposition of the Jacobi-scaled `D⁻¹ P D⁻¹` (`D = diag(√p_ii)`,
//! so badly graded covariances keep their small directions), `L = D V Λ₊^{1/2}`, with
//! eigenvalues below zero clipped to zero; an eigenvalue below `−1e-8 · max(1, λ_max)`
//! is an indefinite covariance, and an error. Nothing here allocates: every buffer is
//! sized when the workspace is built.

use super::cholesky::{cholesky, NotPositive};
use super::symmetric_eigen::symmetric_eigen;

/// How far below zero an eigenvalue of the Jacobi-scaled covariance (unit diagonal) may
/// lie and still count as rounding (then clipped to zero).
const CLIP_TOLERANCE: f64 = 1e-8;

/// Why the array update could not go on.
#[derive(Debug, Clone, Copy, PartialEq)]
pub enum ArrayError {
    /// A non-finite value in the covariance or the pre-array.
    NonFinite,
    /// The covariance is indefinite beyond rounding (its most negative scaled eigenvalue).
    Indefinite(f64),
    /// The reading noise (or the innovation covariance) is not positive definite.
    NoisePositive,
}

/// The factor of the predicted covariance and every buffer of the array update, for
/// `n` states and at most `m_max` reading rows at once.
#[derive(Debug, Clone)]
pub struct ArrayUpdate {
    n: usize,
    m_max: usize,
    /// `L` with `P = L Lᵀ` (`n × n`, column-major; not triangular after an update).
    l: Vec<f64>,
    /// `h L` of one row, then the first row of the array as it is rotated (`n`).
    top: Vec<f64>,
    /// `K̄` of the last row update (`n`).
    kbar: Vec<f64>,
    /// The block pre-array `(m + n) × (m + n)`, column-major with leading dimension
    /// `m_max + n`.
    pre: Vec<f64>,
    /// `S^{-1/2} ν` of the last block update (`m`).
    w: Vec<f64>,
    /// Eigenvectors of the scaled covariance (`n × n`), its eigenvalues (`n`), the
    /// eigensolver's scratch (`3n`) and the Jacobi scaling `√p_ii` (`n`).
    eig_v: Vec<f64>,
    eig_d: Vec<f64>,
    eig_scratch: Vec<f64>,
    scale: Vec<f64>,
}

/// One scalar row folded into the factor: its innovation variance `s` and `K̄ = P hᵀ / √s`
/// (read with [`ArrayUpdate::kbar`]).
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct RowOutcome {
    /// `s = h P hᵀ + r`, the `(1,1)` entry of the post-array squared.
    pub s: f64,
}

/// `(c, s, ρ)` with `ρ = √(a² + b²)`, `c = a/ρ`, `s = b/ρ`: the rotation taking `(a, b)`
/// to `(ρ, 0)` (`ρ ≥ 0` when `a ≥ 0`).
#[inline(always)]
fn givens(a: f64, b: f64) -> (f64, f64, f64) {
    // √(a² + b²) directly where neither square can overflow or underflow (the usual
    // case, several times cheaper than `hypot`), `hypot`'s scaled form otherwise.
    let rho = super::symmetric_eigen::pythag(a, b);
    (a / rho, b / rho, rho)
}

impl ArrayUpdate {
    /// Buffers for `n` states and up to `m_max` rows in one block update.
    pub fn new(n: usize, m_max: usize) -> Self {
        let d = m_max + n;
        Self {
            n,
            m_max,
            l: vec![0.0; n * n],
            top: vec![0.0; n.max(1)],
            kbar: vec![0.0; n],
            pre: vec![0.0; d * d],
            w: vec![0.0; m_max.max(1)],
            eig_v: vec![0.0; n * n],
            eig_d: vec![0.0; n],
            eig_scratch: vec![0.0; 3 * n],
            scale: vec![0.0; n],
        }
    }

    /// The current factor `L` (`n × n`, column-major).
    pub fn factor_l(&self) -> &[f64] {
        &self.l
    }

    /// `K̄` of the last [`ArrayUpdate::row`].
    pub fn kbar(&self) -> &[f64] {
        &self.kbar
    }

    /// `w = S^{-1/2} ν` of the last [`ArrayUpdate::block`] (its first `m` entries).
    pub fn whitened_innovation(&self) -> &[f64] {
        &self.w
    }

    /// Factor the symmetric `n × n` covariance `p` (column-major, lower triangle read by
    /// the Cholesky step, all of it by the fallback): Cholesky, else the clipped
    /// eigen square root of the module doc.
    pub fn factor(&mut self, p: &[f64]) -> Result<(), ArrayError> {
        let n = self.n;
        match cholesky(p, &mut self.l, n) {
            Ok(()) => Ok(()),
            Err(NotPositive { pivot, .. }) if !pivot.is_finite() => Err(ArrayError::NonFinite),
            Err(_) => self.factor_by_eigen(p),
        }
    }

    /// The fallback of [`ArrayUpdate::factor`]: `L = D V Λ₊^{1/2}` from `D⁻¹ P D⁻¹ = V Λ Vᵀ`.
    fn factor_by_eigen(&mut self, p: &[f64]) -> Result<(), ArrayError> {
        let n = self.n;
        if !p[..n * n].iter().all(|x| x.is_finite()) {
            return Err(ArrayError::NonFinite);
        }
        for i in 0..n {
            let d = p[i + i * n];
            if d < 0.0 {
                return Err(ArrayError::Indefinite(d));
            }
            // A zero variance keeps scale 1: its row and column are zero up to rounding.
            self.scale[i] = if d > 0.0 { d.sqrt() } else { 1.0 };
        }
        for j in 0..n {
            for i in 0..n {
                // Symmetric part of the scaled matrix, so the solver sees exact symmetry.
                let v = 0.5 * (p[i + j * n] + p[j + i * n]);
                self.eig_v[i + j * n] = v / self.scale[i] / self.scale[j];
            }
        }
        if !symmetric_eigen(&mut self.eig_v, &mut self.eig_d, &mut self.eig_scratch, n) {
            return Err(ArrayError::NonFinite);
        }
        let top = self.eig_d.iter().cloned().fold(1.0, f64::max);
        let low = self.eig_d.iter().cloned().fold(f64::INFINITY, f64::min);
        if n > 0 && low < -CLIP_TOLERANCE * top {
            return Err(ArrayError::Indefinite(low));
        }
        for k in 0..n {
            let root = self.eig_d[k].max(0.0).sqrt();
            for i in 0..n {
                self.l[i + k * n] = self.scale[i] * self.eig_v[i + k * n] * root;
            }
        }
        Ok(())
    }

    /// Fold one scalar reading row `h` (`n`) with noise variance `r > 0` into the factor:
    /// the pre-array `[√r, h L; 0, L]` is rotated column by column (`n` Givens rotations)
    /// to `[√s, 0; K̄, L⁺]`, and `L⁺` replaces `L`. Returns `s`; `K̄` is in
    /// [`ArrayUpdate::kbar`], and the mean moves by `K̄ ν / √s`.
    pub fn row(&mut self, h: &[f64], r: f64) -> Result<RowOutcome, ArrayError> {
        let n = self.n;
        if !(r > 0.0) || !r.is_finite() {
            return Err(ArrayError::NoisePositive);
        }
        let l = &mut self.l[..n * n];
        // top = h L (row times the factor), one column of L at a time.
        for (j, t) in self.top[..n].iter_mut().enumerate() {
            *t = h[..n]
                .iter()
                .zip(&l[j * n..(j + 1) * n])
                .map(|(a, b)| a * b)
                .sum();
        }
        if !self.top[..n].iter().all(|x| x.is_finite()) {
            return Err(ArrayError::NonFinite);
        }
        let kbar = &mut self.kbar[..n];
        kbar.fill(0.0);
        let mut head = r.sqrt();
        for j in 0..n {
            let t = self.top[j];
            if t == 0.0 {
                continue;
            }
            // Rotate column 0 (head, K̄) with column j + 1 (t, L[:, j]) to zero t.
            let (c, s, rho) = givens(head, t);
            head = rho;
            for (k, lij) in kbar.iter_mut().zip(&mut l[j * n..(j + 1) * n]) {
                let (a, b) = (*k, *lij);
                *k = c * a + s * b;
                *lij = c * b - s * a;
            }
        }
        let s = head * head;
        if !(s > 0.0) || !s.is_finite() {
            return Err(ArrayError::NonFinite);
        }
        Ok(RowOutcome { s })
    }

    /// The block form for `m` correlated rows: `noise_factor` is the lower `m × m`
    /// `R^{1/2}` and `b` the `m × n` block `H L` (column-major, for the extended filter
    /// [`ArrayUpdate::mul_rows_factor`] forms it). The pre-array is brought to lower
    /// block-triangular form row by row; `L⁺` replaces `L`, the mean's change is
    /// `K̄ S^{-1/2} ν`, written into `dx` (`n`). Returns `(νᵀ S⁻¹ ν, ln det S)`.
    pub fn block(
        &mut self,
        noise_factor: &[f64],
        b: &[f64],
        nu: &[f64],
        m: usize,
        dx: &mut [f64],
    ) -> Result<(f64, f64), ArrayError> {
        let n = self.n;
        assert!(
            m <= self.m_max,
            "more rows than the workspace was built for"
        );
        let d = m + n;
        let ld = self.m_max + self.n;
        let a = &mut self.pre;
        for j in 0..d {
            for i in 0..d {
                a[i + j * ld] = match (i < m, j < m) {
                    (true, true) => {
                        if i >= j {
                            noise_factor[i + j * m]
                        } else {
                            0.0
                        }
                    }
                    (true, false) => b[i + (j - m) * m],
                    (false, true) => 0.0,
                    (false, false) => self.l[(i - m) + (j - m) * n],
                };
            }
        }
        if !(0..d).all(|j| a[j * ld..j * ld + d].iter().all(|x| x.is_finite())) {
            return Err(ArrayError::NonFinite);
        }
        triangularize_rows(a, ld, m, d, d)?;
        // w = S^{-1/2} ν by forward substitution on the lower m × m block.
        let w = &mut self.w[..m];
        w.copy_from_slice(&nu[..m]);
        let mut log_det = 0.0;
        for i in 0..m {
            let mut v = w[i];
            for k in 0..i {
                v -= a[i + k * ld] * w[k];
            }
            w[i] = v / a[i + i * ld];
            log_det += 2.0 * a[i + i * ld].ln();
        }
        let nis: f64 = w.iter().map(|x| x * x).sum();
        for (r, dxr) in dx[..n].iter_mut().enumerate() {
            *dxr = (0..m).map(|k| a[(m + r) + k * ld] * w[k]).sum();
        }
        for j in 0..n {
            for i in 0..n {
                self.l[i + j * n] = a[(m + i) + (m + j) * ld];
            }
        }
        Ok((nis, log_det))
    }

    /// `out = H L` (`m × n`, column-major) for the `m × n` rows `h` (column-major).
    pub fn mul_rows_factor(&self, h: &[f64], m: usize, out: &mut [f64]) {
        let n = self.n;
        for j in 0..n {
            for i in 0..m {
                out[i + j * m] = (0..n).map(|k| h[i + k * m] * self.l[k + j * n]).sum();
            }
        }
    }

    /// `p = L Lᵀ` (`n × n`): each entry once for `i ≤ j` and mirrored, so `p` is exactly
    /// symmetric and positive semi-definite up to the rounding of its entries.
    pub fn covariance(&self, p: &mut [f64]) {
        let n = self.n;
        let l = &self.l;
        for j in 0..n {
            for i in 0..=j {
                let v: f64 = (0..n).map(|k| l[i + k * n] * l[j + k * n]).sum();
                p[i + j * n] = v;
                p[j + i * n] = v;
            }
        }
    }
}

/// Bring the first `m` rows of the `rows × cols` array `a` (column-major, leading
/// dimension `ld`) to lower-triangular form by Givens rotations from the right, row by row:
/// row i is zeroed right of its diagonal by rotating column i with each later column (rows
/// above i are already zero in both, so only rows i.. change). A negative diagonal entry
/// flips its column (still orthogonal), so the top-left `m × m` block, the factor
/// `S^{1/2}` of the first rows' Gram matrix, has a positive diagonal. Fails when a
/// diagonal entry is zero (the rows are linearly dependent) or not finite.
pub fn triangularize_rows(
    a: &mut [f64],
    ld: usize,
    m: usize,
    rows: usize,
    cols: usize,
) -> Result<(), ArrayError> {
    for i in 0..m {
        for j in i + 1..cols {
            let t = a[i + j * ld];
            if t == 0.0 {
                continue;
            }
            let (c, s, _) = givens(a[i + i * ld], t);
            for k in i..rows {
                let (x, y) = (a[k + i * ld], a[k + j * ld]);
                a[k + i * ld] = c * x + s * y;
                a[k + j * ld] = c * y - s * x;
            }
        }
        if a[i + i * ld] < 0.0 {
            for k in i..rows {
                a[k + i * ld] = -a[k + i * ld];
            }
        }
        if !(a[i + i * ld] > 0.0) || !a[i + i * ld].is_finite() {
            return Err(ArrayError::NoisePositive);
        }
    }
    Ok(())
}

/// `R^{1/2}` for the `m × m` noise `r` (lower Cholesky factor into `out`), or
/// [`ArrayError::NoisePositive`].
pub fn noise_factor(r: &[f64], out: &mut [f64], m: usize) -> Result<(), ArrayError> {
    cholesky(r, out, m).map_err(|_| ArrayError::NoisePositive)
}

#[cfg(test)]
mod tests {
    use super::*;
    use nalgebra::{DMatrix, DVector};

    /// The plain update P − P Hᵀ S⁻¹ H P through nalgebra (the textbook form, Kalman 1960),
    /// as the oracle on well-conditioned cases.
    fn plain(p: &DMatrix<f64>, h: &DMatrix<f64>, r: &DMatrix<f64>) -> (DMatrix<f64>, DMatrix<f64>) {
        let s = h * p * h.transpose() + r;
        let k = p * h.transpose() * s.clone().try_inverse().unwrap();
        (p - &k * &s * k.transpose(), k)
    }

    fn spd(n: usize, seed: u64) -> DMatrix<f64> {
        let a = DMatrix::from_fn(n, n, |i, j| {
            (((i * 7 + j * 13) as u64 + seed) as f64 * 0.37).sin()
        });
        &a * a.transpose() + DMatrix::identity(n, n) * 0.5
    }

    fn close(a: &DMatrix<f64>, b: &DMatrix<f64>, tol: f64) -> bool {
        (a - b).abs().max() <= tol * (1.0 + b.abs().max())
    }

    /// The array's covariance, mean change `dx` and NIS against the plain form's `want`
    /// and gain `k` for the update by `h`, `r` of `p` with innovation `nu`; returns S.
    fn agrees_with_plain(
        au: &ArrayUpdate,
        (p, h, r): (&DMatrix<f64>, &DMatrix<f64>, &DMatrix<f64>),
        (want, k): (&DMatrix<f64>, &DMatrix<f64>),
        nu: &[f64],
        dx: &[f64],
        nis: f64,
    ) -> DMatrix<f64> {
        let n = p.nrows();
        let mut got = DMatrix::zeros(n, n);
        au.covariance(got.as_mut_slice());
        assert!(close(&got, want, 1e-13), "{got} vs {want}");
        let nuv = DVector::from_vec(nu.to_vec());
        let kdx = k * &nuv;
        for i in 0..n {
            assert!((dx[i] - kdx[i]).abs() < 1e-13, "{} vs {}", dx[i], kdx[i]);
        }
        let s = h * p * h.transpose() + r;
        let want_nis = nuv.dot(&(s.clone().try_inverse().unwrap() * &nuv));
        assert!((nis - want_nis).abs() < 1e-12 * want_nis);
        s
    }

    #[test]
    fn rows_one_at_a_time_equal_the_plain_update() {
        // Sequential scalar rows with diagonal R give the stacked Kalman update (an identity
        // of the update; common practice), and each row's array gives the plain form.
        let n = 4;
        let p = spd(n, 3);
        let h = DMatrix::from_row_slice(2, n, &[1.0, 0.5, 0.0, -0.2, 0.0, 1.0, 0.3, 0.1]);
        let r = DMatrix::from_diagonal(&DVector::from_vec(vec![0.04, 0.09]));
        let (want, k) = plain(&p, &h, &r);
        let mut au = ArrayUpdate::new(n, 2);
        au.factor(p.as_slice()).unwrap();
        let nu = [0.3, -0.7];
        let mut dx: DVector<f64> = DVector::zeros(n);
        let mut log_det = 0.0;
        let mut nis = 0.0;
        for a in 0..2 {
            let row: Vec<f64> = (0..n).map(|j| h[(a, j)]).collect();
            let hdx: f64 = row.iter().zip(dx.iter()).map(|(x, y)| x * y).sum();
            let out = au.row(&row, r[(a, a)]).unwrap();
            let e = (nu[a] - hdx) / out.s.sqrt();
            for i in 0..n {
                dx[i] += au.kbar()[i] * e;
            }
            nis += e * e;
            log_det += out.s.ln();
        }
        let s = agrees_with_plain(&au, (&p, &h, &r), (&want, &k), &nu, dx.as_slice(), nis);
        assert!((log_det - s.determinant().ln()).abs() < 1e-12);
    }

    #[test]
    fn block_form_equals_the_plain_update_with_correlated_noise() {
        let n = 3;
        let p = spd(n, 8);
        let h = DMatrix::from_row_slice(2, n, &[1.0, 0.2, 0.0, 0.4, 1.0, -0.5]);
        let r = DMatrix::from_row_slice(2, 2, &[0.05, 0.02, 0.02, 0.08]);
        let (want, k) = plain(&p, &h, &r);
        let mut au = ArrayUpdate::new(n, 2);
        au.factor(p.as_slice()).unwrap();
        let mut lr = vec![0.0; 4];
        noise_factor(r.as_slice(), &mut lr, 2).unwrap();
        let mut b = vec![0.0; 2 * n];
        au.mul_rows_factor(h.as_slice(), 2, &mut b);
        let nu = [0.25, -0.4];
        let mut dx = vec![0.0; n];
        let (nis, log_det) = au.block(&lr, &b, &nu, 2, &mut dx).unwrap();
        let s = agrees_with_plain(&au, (&p, &h, &r), (&want, &k), &nu, &dx, nis);
        // ln det S against the 2 × 2 determinant written out (independent of the array).
        let det = s[(0, 0)] * s[(1, 1)] - s[(0, 1)] * s[(1, 0)];
        assert!(
            (log_det - det.ln()).abs() < 1e-12,
            "{log_det} vs {}",
            det.ln()
        );
    }

    #[test]
    fn long_gap_posterior_keeps_the_reading_variance() {
        // R15 (docs REFERENCES): constant velocity, q = 4e-4, gap T = 1e8 s, prior
        // diag(1e-4, 1e-2), position read with R = 1e-4. The exact posterior position
        // variance is P R / (P + R) (closed form, common practice), here 1e-4 to 16
        // digits; the plain form gives 0 or garbage.
        let (q, t, r) = (4e-4, 1e8, 1e-4);
        let p = DMatrix::from_row_slice(
            2,
            2,
            &[
                1e-4 + 1e-2 * t * t + q * t * t * t / 3.0,
                1e-2 * t + q * t * t / 2.0,
                1e-2 * t + q * t * t / 2.0,
                1e-2 + q * t,
            ],
        );
        let mut au = ArrayUpdate::new(2, 1);
        au.factor(p.as_slice()).unwrap();
        let out = au.row(&[1.0, 0.0], r).unwrap();
        let mut got = DMatrix::zeros(2, 2);
        au.covariance(got.as_mut_slice());
        let want_pp = p[(0, 0)] * r / (p[(0, 0)] + r);
        assert!((got[(0, 0)] - want_pp).abs() < 1e-12 * want_pp, "{got}");
        let want_pv = p[(0, 1)] * r / out.s;
        assert!((got[(0, 1)] - want_pv).abs() < 1e-10 * want_pv, "{got}");
        let want_vv = p[(1, 1)] - p[(0, 1)] * p[(0, 1)] / out.s;
        assert!((got[(1, 1)] - want_vv).abs() < 1e-10 * want_vv, "{got}");
        assert_eq!(got[(0, 1)], got[(1, 0)]);
    }

    #[test]
    fn semidefinite_covariance_factors_through_the_clipped_eigen_root() {
        // Rank one (a direction without spread): Cholesky fails, the fallback factor
        // multiplies back to P (common practice: L Lᵀ = P is the defining identity).
        let v = DVector::from_vec(vec![1.0, 2.0, -1.0]);
        let p = &v * v.transpose();
        let mut au = ArrayUpdate::new(3, 1);
        au.factor(p.as_slice()).unwrap();
        let mut back = DMatrix::zeros(3, 3);
        au.covariance(back.as_mut_slice());
        assert!(close(&back, &p, 1e-14), "{back}");
        // Slightly indefinite by rounding: clipped. Clearly indefinite: refused.
        let mut q = p.clone();
        q[(0, 0)] -= 1e-15;
        au.factor(q.as_slice()).unwrap();
        let bad = DMatrix::from_row_slice(2, 2, &[1.0, 2.0, 2.0, 1.0]);
        let mut au2 = ArrayUpdate::new(2, 1);
        assert!(matches!(
            au2.factor(bad.as_slice()),
            Err(ArrayError::Indefinite(_))
        ));
        let nan = DMatrix::from_row_slice(2, 2, &[f64::NAN, 0.0, 0.0, 1.0]);
        assert_eq!(au2.factor(nan.as_slice()), Err(ArrayError::NonFinite));
    }
}
