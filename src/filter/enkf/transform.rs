//! The deterministic update: the ensemble transform (ETKF; Bishop, Etherton & Majumdar
//! 2001, MWR 129; Hunt, Kostelich & Szunyogh 2007, Physica D 230, §2.3), computed in the
//! `N`-dimensional space of member weights:
//!
//! ```text
//! Ỹ = L_R⁻¹ Y',  d̃ = L_R⁻¹ (z − ȳ)
//! P̃ = [(N−1) I + ỸᵀỸ]⁻¹,  w̄ = P̃ Ỹᵀ d̃
//! W = [(N−1) P̃]^{1/2}  (symmetric square root),  X_a = x̄ + X' (w̄ + W)
//! ```
//!
//! `P̃` and `W` come from one symmetric eigen-decomposition `(N−1) I + ỸᵀỸ = V Λ Vᵀ`; with
//! fewer accepted rows than members, from the eigenpairs of the small `Ỹ Ỹᵀ` instead
//! (`transform_low_rank`). The joint NIS follows from the same quantities by Woodbury's
//! identity (`transform_nis`). It fails when the transform matrix is not positive
//! definite or not finite.

use super::members::Enkf;
use crate::filter::FilterError;
use crate::linalg::{dot4, gemm_nn, gemm_nt_upper, solve_lower, symmetric_eigen};

/// `L_R⁻¹ v` in place for the `ma × ma` lower factor `lr`; a diagonal factor multiplies
/// entry by entry by `inv_sd`, the reciprocals of its diagonal (the triangular solve's
/// values to rounding, without its O(ma²) loop or a division per entry).
fn whiten(lr: &[f64], inv_sd: &[f64], diagonal: bool, ma: usize, v: &mut [f64]) {
    if diagonal {
        for (x, &w) in v.iter_mut().zip(&inv_sd[..ma]) {
            *x *= w;
        }
    } else {
        solve_lower(&lr[..ma * ma], ma, v);
    }
}

impl Enkf {
    /// The ensemble transform analysis of the accepted rows (the equations in this
    /// module's doc), through the small form when there are fewer rows than members.
    pub(super) fn transform_update(&mut self) -> Result<(), FilterError> {
        let (nn, n, ma) = (
            self.ensemble.nrows(),
            self.ensemble.ncols(),
            self.core.obs.ma,
        );
        let mm = self.ws.whitened.nrows();
        let zs = &self.pobs.zs;
        let nf = nn as f64;
        // Ỹ = L_R⁻¹ Y' (ma × N) and d̃ = L_R⁻¹ (z − ȳ).
        if self.ws.noise_is_diagonal {
            // Row a of Ỹ is the contiguous row of predicted readings over the members,
            // scaled: build Ỹᵀ (`ytt`) in that order, then Ỹ from it.
            for a in 0..ma {
                let row = self.core.obs.keep[a];
                let (yb, w) = (self.ws.reading_mean[row], self.ws.inv_noise_sd[a]);
                let src = &zs[row * nn..(row + 1) * nn];
                for (t, &z) in self.ws.whitened_t[a * nn..(a + 1) * nn].iter_mut().zip(src) {
                    *t = (z - yb) * w;
                }
            }
            let (ytt, yt) = (&self.ws.whitened_t, self.ws.whitened.as_mut_slice());
            for j in 0..nn {
                for a in 0..ma {
                    yt[a + j * mm] = ytt[j + a * nn];
                }
            }
        } else {
            for j in 0..nn {
                for a in 0..ma {
                    let row = self.core.obs.keep[a];
                    self.ws.draws[a] = zs[row * nn + j] - self.ws.reading_mean[row];
                }
                solve_lower(
                    &self.ws.noise_factor[..ma * ma],
                    ma,
                    &mut self.ws.draws[..ma],
                );
                for a in 0..ma {
                    self.ws.whitened[(a, j)] = self.ws.draws[a];
                }
            }
            for a in 0..ma {
                for j in 0..nn {
                    self.ws.whitened_t[j + a * nn] = self.ws.whitened[(a, j)];
                }
            }
        }
        for a in 0..ma {
            self.ws.innovation[a] = self.core.obs.nu_acc[a];
        }
        whiten(
            &self.ws.noise_factor,
            &self.ws.inv_noise_sd,
            self.ws.noise_is_diagonal,
            ma,
            &mut self.ws.innovation[..ma],
        );
        if ma < nn && !self.always_full {
            return self.transform_low_rank();
        }
        // A = (N−1) I + ỸᵀỸ first, as the eigen solver converges fastest on it; when
        // rounding has made it indefinite (a reading far more precise than the spread,
        // after a long gap, where N−1 drowns in the rounding of ỸᵀỸ), the Gram matrix ỸᵀỸ
        // alone, whose eigenvalues are clipped at zero before N−1 is added, so A stays
        // positive definite however large Ỹ grows (the same eigenvectors either way).
        let mut log_det_m = 0.0;
        for shifted in [true, false] {
            // Column j for all i ≤ j at once from Ỹ transposed.
            gemm_nt_upper(
                &self.ws.whitened_t,
                &self.ws.whitened_t,
                self.ws.transform_gram.as_mut_slice(),
                (nn, ma, nn),
            );
            for j in 0..nn {
                if shifted {
                    self.ws.transform_gram[(j, j)] += nf - 1.0;
                }
                for i in 0..j {
                    self.ws.transform_gram[(j, i)] = self.ws.transform_gram[(i, j)];
                }
            }
            // Eigenvectors overwrite `transform_gram`.
            if !symmetric_eigen(
                self.ws.transform_gram.as_mut_slice(),
                &mut self.ws.eigenvalues,
                &mut self.ws.eigen_scratch,
                nn,
            ) {
                return Err(FilterError::NonFinite("ensemble transform matrix"));
            }
            let eig = &mut self.ws.eigenvalues[..nn];
            if shifted && eig.iter().any(|l| !(*l > 0.0)) {
                continue;
            }
            // det M = det(I + ỸᵀỸ/(N−1)) (Sylvester's determinant identity).
            log_det_m = 0.0;
            for l in eig.iter_mut() {
                if !shifted {
                    *l = l.max(0.0) + (nf - 1.0);
                }
                log_det_m += (*l / (nf - 1.0)).ln();
            }
            break;
        }
        self.ws.log_det_m = log_det_m;
        // w̄ = V Λ⁻¹ Vᵀ Ỹᵀ d̃ ; W = √(N−1) V Λ^{-1/2} Vᵀ.
        let v = self.ws.transform_gram.as_slice();
        // Each sum below runs over its index in order from −0.0, with the outputs as
        // independent running sums (the inner loops are over outputs, so they vectorise).
        // Ỹᵀ d̃ once (it does not depend on k), kept in `sq` until the square roots below.
        let sq = &mut self.ws.sqrt_eigenvalues[..nn];
        sq.fill(-0.0);
        for a in 0..ma {
            let d = self.ws.innovation[a];
            for (s, &y) in sq.iter_mut().zip(&self.ws.whitened_t[a * nn..(a + 1) * nn]) {
                *s += y * d;
            }
        }
        // g = Λ⁻¹ Vᵀ (Ỹᵀ d̃).
        let g = &mut self.ws.member_vector.as_mut_slice()[..nn];
        g.fill(-0.0);
        for j in 0..nn {
            let sj = sq[j];
            for (gk, vk) in g.iter_mut().zip(v[j..].iter().step_by(nn)) {
                *gk += vk * sj;
            }
        }
        for (gk, &l) in g.iter_mut().zip(&self.ws.eigenvalues[..nn]) {
            *gk /= l;
        }
        // w̄ = V g.
        let wbar = &mut self.ws.mean_weights.as_mut_slice()[..nn];
        wbar.fill(-0.0);
        for k in 0..nn {
            let gk = g[k];
            for (w, &vjk) in wbar.iter_mut().zip(&v[k * nn..(k + 1) * nn]) {
                *w += vjk * gk;
            }
        }
        let v = &self.ws.transform_gram;
        // T(i, j) = c Σₗ vᵢₗ vⱼₗ / √λₗ + w̄ᵢ, stored transposed (`trans[(j, i)] = T(i, j)`)
        // so that the next product runs down contiguous columns.
        let c = (nf - 1.0).sqrt();
        for l in 0..nn {
            self.ws.sqrt_eigenvalues[l] = self.ws.eigenvalues[l].sqrt();
        }
        // Σₗ (vᵢₗ/√λₗ) vⱼₗ for i ≤ j (the sum is symmetric), one division per l.
        for l in 0..nn {
            let inv = 1.0 / self.ws.sqrt_eigenvalues[l];
            for i in 0..nn {
                self.ws.scaled_eigenvectors[i + l * nn] = v[(i, l)] * inv;
            }
        }
        gemm_nt_upper(
            &self.ws.scaled_eigenvectors,
            v.as_slice(),
            self.ws.transform_t.as_mut_slice(),
            (nn, nn, nn),
        );
        for j in 0..nn {
            for i in 0..=j {
                let sum = self.ws.transform_t[(i, j)];
                self.ws.transform_t[(j, i)] = c * sum + self.ws.mean_weights[i];
                self.ws.transform_t[(i, j)] = c * sum + self.ws.mean_weights[j];
            }
        }
        // Xₐ(j, :) = x̄ + Σ_k X'(k, :) T(k, j): with `trans` = Tᵀ, Xₐ − x̄ = Tᵀ X'.
        let xs = self.ensemble.as_slice();
        for i in 0..n {
            let m = self.core.mean[i];
            let col = &xs[i * nn..(i + 1) * nn];
            for (d, &x) in self.ws.member_anomalies[i * nn..(i + 1) * nn]
                .iter_mut()
                .zip(col)
            {
                *d = x - m;
            }
        }
        gemm_nn(
            self.ws.transform_t.as_slice(),
            &self.ws.member_anomalies,
            self.ws.analysis_anomalies.as_mut_slice(),
            (nn, nn, n),
            false,
        );
        let (xs, xa) = (
            self.ensemble.as_mut_slice(),
            self.ws.analysis_anomalies.as_slice(),
        );
        for i in 0..n {
            let m = self.core.mean[i];
            let col = &xa[i * nn..(i + 1) * nn];
            for (x, &d) in xs[i * nn..(i + 1) * nn].iter_mut().zip(col) {
                *x = m + d;
            }
        }
        Ok(())
    }

    /// The same transform through the eigenpairs of the small `ma × ma` matrix G = Ỹ Ỹᵀ when
    /// there are fewer readings than members. With G = U Σ² Uᵀ and vₖ = Ỹᵀ uₖ / σₖ,
    /// (N−1)I + ỸᵀỸ has eigenvalues N−1+σₖ² on vₖ and N−1 elsewhere, so
    ///   w̄ = Σₖ vₖ σₖ (uₖᵀ d̃) / (N−1+σₖ²),  W = I + Σₖ (cₖ − 1) vₖ vₖᵀ,
    ///   cₖ = √((N−1)/(N−1+σₖ²)),
    /// exactly as the full form, at O(N n m) cost instead of O(N³).
    fn transform_low_rank(&mut self) -> Result<(), FilterError> {
        let (nn, n, ma) = (
            self.ensemble.nrows(),
            self.ensemble.ncols(),
            self.core.obs.ma,
        );
        let nf = nn as f64;
        let g = &mut self.ws.reading_gram[..ma * ma];
        for b in 0..ma {
            for a in 0..=b {
                let v: f64 = (0..nn)
                    .map(|j| self.ws.whitened[(a, j)] * self.ws.whitened[(b, j)])
                    .sum();
                g[a + b * ma] = v;
                g[b + a * ma] = v;
            }
        }
        // Eigenvectors overwrite `gbuf`.
        if !symmetric_eigen(g, &mut self.ws.eigenvalues, &mut self.ws.eigen_scratch, ma) {
            return Err(FilterError::NonFinite("ensemble transform matrix"));
        }
        let scale = self.ws.eigenvalues[..ma]
            .iter()
            .cloned()
            .fold(0.0, f64::max);
        // Anomaly of each member: X'ⱼ = xⱼ − x̄, kept in `xa`.
        for i in 0..n {
            for j in 0..nn {
                self.ws.analysis_anomalies[(j, i)] = self.ensemble[(j, i)] - self.core.mean[i];
            }
        }
        self.ws.mean_weights.fill(0.0);
        // ln det M = Σ ln(1 + σₖ²/(N−1)), M = I + ỸỸᵀ/(N−1) (σₖ² clipped at zero).
        self.ws.log_det_m = self.ws.eigenvalues[..ma]
            .iter()
            .map(|s2| (s2.max(0.0) / (nf - 1.0)).ln_1p())
            .sum();
        for k in 0..ma {
            let s2 = self.ws.eigenvalues[k];
            if !(s2 > 1e-14 * scale) {
                continue;
            }
            let sigma = s2.sqrt();
            let u = &self.ws.reading_gram[k * ma..(k + 1) * ma];
            for j in 0..nn {
                self.ws.member_vector[j] = (0..ma)
                    .map(|a| self.ws.whitened[(a, j)] * u[a])
                    .sum::<f64>()
                    / sigma;
            }
            let ud: f64 = (0..ma).map(|a| u[a] * self.ws.innovation[a]).sum();
            let wk = sigma * ud / (nf - 1.0 + s2);
            let ck = ((nf - 1.0) / (nf - 1.0 + s2)).sqrt();
            for j in 0..nn {
                self.ws.mean_weights[j] += self.ws.member_vector[j] * wk;
            }
            // Aₖ = Σᵢ X'ᵢ vₖᵢ, then xⱼ += (cₖ − 1) vₖⱼ Aₖ.
            for i in 0..n {
                let a: f64 = (0..nn)
                    .map(|j| self.ws.analysis_anomalies[(j, i)] * self.ws.member_vector[j])
                    .sum();
                for j in 0..nn {
                    self.ensemble[(j, i)] += (ck - 1.0) * self.ws.member_vector[j] * a;
                }
            }
        }
        // + X' w̄ on every member.
        for i in 0..n {
            let b: f64 = (0..nn)
                .map(|j| self.ws.analysis_anomalies[(j, i)] * self.ws.mean_weights[j])
                .sum();
            for j in 0..nn {
                self.ensemble[(j, i)] += b;
            }
        }
        Ok(())
    }

    /// The joint NIS νᵀS⁻¹ν of the accepted rows from the transform's own quantities,
    /// without forming S: with M = I + ỸỸᵀ/(N−1) (so S = L_R M L_Rᵀ), Woodbury's identity
    /// gives M⁻¹d̃ = d̃ − Ỹ [(N−1)I + ỸᵀỸ]⁻¹ Ỹᵀd̃ = d̃ − Ỹw̄ =: r, and
    /// NIS = d̃ᵀM⁻¹d̃ = rᵀMr = rᵀr + |Ỹᵀr|²/(N−1), a sum of squares (never negative).
    /// (Woodbury: Golub & Van Loan 2013, *Matrix Computations*, §2.1.4.)
    pub(super) fn transform_nis(&mut self) -> f64 {
        let (nn, ma) = (self.ensemble.nrows(), self.core.obs.ma);
        let mm = self.ws.whitened.nrows();
        let yt = self.ws.whitened.as_slice();
        let r = &mut self.ws.draws[..ma];
        r.copy_from_slice(&self.ws.innovation[..ma]);
        for j in 0..nn {
            let wj = self.ws.mean_weights[j];
            for (ra, &y) in r.iter_mut().zip(&yt[j * mm..j * mm + ma]) {
                *ra -= y * wj;
            }
        }
        let rr = dot4(r, r);
        let yr: f64 = (0..nn)
            .map(|j| {
                let t = dot4(&yt[j * mm..j * mm + ma], r);
                t * t
            })
            .sum();
        rr + yr / (nn as f64 - 1.0)
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::filter::test_fixtures::{etkf, integration, prior, three_states, two_sensors};
    use crate::filter::Estimator;
    use crate::model::Instant;
    use crate::model::Reading;
    use nalgebra::{DMatrix, DVector};
    use serde_json::json;

    #[test]
    fn low_rank_transform_equals_full_transform() {
        // Two forms of the same ETKF analysis (Hunt et al. 2007, §2.3) must agree to
        // rounding: the small-eigenproblem form is an identity of linear algebra.
        let model = three_states(json!({"s": {"measures": ["a + c", "b*b"], "std": [0.3, 0.5]}}));
        let cfg = etkf(4);
        let ((mean, cov), integ) = (prior(), integration());
        let mut fast = Enkf::new(&model, integ, cfg, &mean, &cov, None, 0).unwrap();
        let mut full = fast.clone();
        full.always_full = true;
        let reading = Reading {
            t: Instant::seconds(0.0),
            sensors: vec![(0, 0)],
            z: vec![1.3, 0.1],
            ..Default::default()
        };
        assert!(fast.update(&model, &reading, &[], 0.0, None).unwrap());
        assert!(full.update(&model, &reading, &[], 0.0, None).unwrap());
        for (a, b) in fast.ensemble.iter().zip(full.ensemble.iter()) {
            assert!((a - b).abs() < 1e-12 * (1.0 + b.abs()), "{a} vs {b}");
        }
    }

    #[test]
    fn transform_nis_equals_the_direct_innovation_form() {
        // NIS = νᵀS⁻¹ν with S = Y'Y'ᵀ/(N−1) + R formed from the members and solved by
        // nalgebra's Cholesky (the textbook definition, Bar-Shalom et al. 2001, §5.4) must
        // equal the value the transform derives through Woodbury's identity, for the
        // low-rank and the full form, and for a gated line whose NIS comes from the block.
        let model = three_states(two_sensors());
        let cfg = etkf(9);
        let ((mean, cov), integ) = (prior(), integration());
        let base = Enkf::new(&model, integ, cfg, &mean, &cov, None, 0).unwrap();
        let reading = Reading {
            t: Instant::seconds(0.0),
            sensors: vec![(0, 0), (1, 1)],
            z: vec![0.6, 0.4, 1.3],
            ..Default::default()
        };
        // The direct form from the members before the update.
        let nn = 25;
        let h = |x: &DMatrix<f64>, j: usize| {
            DVector::from_vec(vec![
                x[(j, 0)] + x[(j, 2)],
                x[(j, 1)] * x[(j, 1)],
                x[(j, 0)],
            ])
        };
        let ys: Vec<DVector<f64>> = (0..nn).map(|j| h(&base.ensemble, j)).collect();
        let ybar = ys.iter().fold(DVector::zeros(3), |a, y| a + y) / nn as f64;
        let mut s = DMatrix::from_diagonal(&DVector::from_vec(vec![0.09, 0.25, 0.04]));
        for y in &ys {
            s += (y - &ybar) * (y - &ybar).transpose() / (nn as f64 - 1.0);
        }
        let nu = DVector::from_vec(reading.z.clone()) - &ybar;
        let direct = nu.dot(&s.clone().cholesky().unwrap().solve(&nu));
        for full in [false, true] {
            let mut f = base.clone();
            f.always_full = full;
            assert!(f.update(&model, &reading, &[], 0.0, None).unwrap());
            let got = f.core.obs.joint_nis;
            assert!(
                (got - direct).abs() < 1e-10 * direct,
                "{got} vs {direct} (full {full})"
            );
            // ln det S against nalgebra's determinant of the directly formed S.
            let want = s.determinant().ln();
            let got = f.core.obs.log_det_s;
            assert!(
                (got - want).abs() < 1e-10,
                "ln det S {got} vs {want} (full {full})"
            );
            // Each row's predicted variance (reported with its innovation).
            for r in 0..3 {
                let got = f.core.obs.s[r + r * 3];
                assert!((got - s[(r, r)]).abs() < 1e-12 * s[(r, r)], "S_rr {got}");
            }
        }
        // One sensor, gated: its NIS comes from its block, and the joint NIS is that value.
        let one = Reading {
            sensors: vec![(1, 0)],
            z: vec![0.4, 1.3],
            ..reading.clone()
        };
        let s2 = s.view((1, 1), (2, 2)).into_owned();
        let nu2 = nu.rows(1, 2).into_owned();
        let direct2 = nu2.dot(&s2.clone().cholesky().unwrap().solve(&nu2));
        let mut ungated = base.clone();
        assert!(ungated.update(&model, &one, &[], 0.0, None).unwrap());
        let mut gated = base.clone();
        assert!(gated
            .update(&model, &one, &[], 0.0, Some(&[1e9, 1e9]))
            .unwrap());
        for f in [&ungated, &gated] {
            assert_eq!(f.core.obs.checks[0].nis, f.core.obs.joint_nis);
            for r in 0..2 {
                let got = f.core.obs.s[r + r * 2];
                assert!((got - s2[(r, r)]).abs() < 1e-12 * s2[(r, r)], "S_rr {got}");
            }
            let got = f.core.obs.joint_nis;
            assert!(
                (got - direct2).abs() < 1e-10 * direct2,
                "{got} vs {direct2}"
            );
            let want = s2.determinant().ln();
            let got = f.core.obs.log_det_s;
            assert!((got - want).abs() < 1e-10, "ln det S {got} vs {want}");
        }
    }

    #[test]
    fn perturbed_update_sets_log_det_s_from_the_sample_statistics() {
        // The perturbed update's S = Y'Y'ᵀ/(N−1) + R (Evensen 2003, from memory); its
        // ln det must equal nalgebra's determinant of the same S formed from the members.
        let model = three_states(two_sensors());
        let mut cfg = etkf(5);
        cfg.update = crate::model::EnsembleUpdate::Perturbed;
        let ((mean, cov), integ) = (prior(), integration());
        let mut f = Enkf::new(&model, integ, cfg, &mean, &cov, None, 0).unwrap();
        let nn = 25;
        let ys: Vec<DVector<f64>> = (0..nn)
            .map(|j| {
                let x = &f.ensemble;
                DVector::from_vec(vec![
                    x[(j, 0)] + x[(j, 2)],
                    x[(j, 1)] * x[(j, 1)],
                    x[(j, 0)],
                ])
            })
            .collect();
        let ybar = ys.iter().fold(DVector::zeros(3), |a, y| a + y) / nn as f64;
        let mut s = DMatrix::from_diagonal(&DVector::from_vec(vec![0.09, 0.25, 0.04]));
        for y in &ys {
            s += (y - &ybar) * (y - &ybar).transpose() / (nn as f64 - 1.0);
        }
        let reading = Reading {
            t: Instant::seconds(0.0),
            sensors: vec![(0, 0), (1, 1)],
            z: vec![0.6, 0.4, 1.3],
            ..Default::default()
        };
        assert!(f.update(&model, &reading, &[], 0.0, None).unwrap());
        let want = s.determinant().ln();
        let got = f.core.obs.log_det_s;
        assert!((got - want).abs() < 1e-10, "ln det S {got} vs {want}");
    }
}
