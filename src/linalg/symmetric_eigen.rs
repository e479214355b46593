//! Eigen-decomposition of a symmetric matrix, `A = V Λ Vᵀ` with `V` orthogonal and `Λ`
//! diagonal (eigenvalues ascending), into preallocated buffers.
//!
//! Two stages (Wilkinson & Reinsch 1971, *Handbook for Automatic Computation* II,
//! contributions II/2 and II/3, `tred2` and `tql2`; Golub & Van Loan, *Matrix
//! Computations*, 4th ed., §8.3, from memory):
//!
//! 1. Householder tridiagonalisation: `n − 2` reflections `H_i = I − u uᵀ / h` give
//!    `Qᵀ A Q = T` tridiagonal, with `Q = H_{n−1} ⋯ H_2` accumulated into `V`.
//! 2. Implicit QL with shifts on `T`: each sweep applies plane rotations
//!    `(v_i, v_{i+1}) ← (c v_i − s v_{i+1}, s v_i + c v_{i+1})` until the off-diagonal
//!    entries fall below `eps · max(|d_i| + |e_i|)`; at most 60 sweeps per eigenvalue.
//!
//! It fails (returns `false`) when a value is not finite or a sweep does not converge.
//! Both stages are backward stable: the computed pairs are exact for `A + E` with
//! `‖E‖ ≈ n eps ‖A‖`. The tests keep the cyclic Jacobi method (Golub & Van Loan §8.5.2,
//! from memory), a different algorithm, as the oracle.
//!
//! The ensemble transform calls it once per reading line; nalgebra's `symmetric_eigen`
//! allocates its factors on every call, so this one works in caller-owned buffers.

use super::finite::all_finite;
use super::products::dot4;
use multiversion::multiversion;
use multiversion::target::target_cfg_f;

/// Whether `a² + b²` can be formed plainly: squaring can neither overflow nor lose
/// precision to underflow.
#[inline(always)]
fn squares_are_safe(a: f64, b: f64) -> bool {
    const LO: f64 = 1e-150;
    const HI: f64 = 1e150;
    let (x, y) = (a.abs(), b.abs());
    x.max(y) < HI && (x == 0.0 || x > LO) && (y == 0.0 || y > LO)
}

/// `√(a² + b²)`: the plain formula where [`squares_are_safe`] (much cheaper than libm's
/// `hypot`, and as accurate to within an ulp, which the QL iteration does not notice),
/// `hypot` outside that range.
#[inline(always)]
#[allow(clippy::imprecise_flops)] // the plain formula is chosen on purpose, see above
pub(crate) fn pythag(a: f64, b: f64) -> f64 {
    if squares_are_safe(a, b) {
        (a * a + b * b).sqrt()
    } else {
        a.hypot(b)
    }
}

/// One plane rotation of the QL sweep: with r = √(a² + b²) (as [`pythag`]), returns
/// `(r, 1/r, num/r)`. On the sweep's critical path: where the plain formula is safe (and
/// r ≠ 0), 1/r = r · (1/q) and num/r = (num · (1/q)) · r with q = a² + b², so the square
/// root and the division run side by side instead of one after the other, and the next p
/// waits for one multiplication after the root (each within two ulps of the quotient,
/// which the rotations' c² + s² = 1 does not notice at the iteration's tolerance).
#[inline(always)]
fn rotation(a: f64, b: f64, num: f64) -> (f64, f64, f64) {
    if squares_are_safe(a, b) && (a != 0.0 || b != 0.0) {
        let q = a * a + b * b;
        let r = q.sqrt();
        let iq = 1.0 / q;
        (r, r * iq, (num * iq) * r)
    } else {
        let r = a.hypot(b);
        let ri = 1.0 / r;
        (r, ri, num * ri)
    }
}

/// Eigen-decomposition of a symmetric `n × n` matrix held column-major in `v` (only its
/// values are read; it is overwritten with the orthonormal eigenvectors as columns),
/// eigenvalues ascending into `d`, `scratch` (length ≥ 3n) as scratch. Householder
/// reduction to tridiagonal form, then implicit QL with Wilkinson-type shifts (Wilkinson &
/// Reinsch 1971, *Handbook for Automatic Computation* II, contributions II/2 and II/3,
/// `tred2`, `tql2`). Returns false when the QL iteration fails to converge or a value is
/// not finite.
///
/// Changes from the published routines that alter only the order of operations and the
/// last bits (each Householder step and QL rotation stays an exact orthogonal
/// transformation to rounding): the sums add in four interleaved partial sums
/// ([`dot4`]); A·d reads two columns of the lower triangle per pass; scalings by 1/scale
/// and 1/h multiply by one reciprocal; each QL sweep first computes its plane rotations
/// (a chain of dependent square roots and divisions, shortened by `rotation`) and then
/// applies them all to the eigenvector columns (`rotate_columns`), so that the chain is
/// not held up by the column updates.
///
/// It replaces nalgebra's `symmetric_eigen`, which allocates its factors on every call,
/// in the ensemble transform that runs once per reading line.
#[multiversion(targets("x86_64+avx2"), dispatcher = "direct")]
pub fn symmetric_eigen(v: &mut [f64], d: &mut [f64], scratch: &mut [f64], n: usize) -> bool {
    if target_cfg_f!(target_feature = "avx2") {
        symmetric_eigen_body::<16>(v, d, scratch, n)
    } else {
        symmetric_eigen_body::<8>(v, d, scratch, n)
    }
}

/// The body of [`symmetric_eigen`], inlined into its baseline and its AVX2 copy, with the
/// rotations applied to `B` rows at a time (see [`rotate_columns`]).
#[inline(always)]
fn symmetric_eigen_body<const B: usize>(
    v: &mut [f64],
    d: &mut [f64],
    scratch: &mut [f64],
    n: usize,
) -> bool {
    if n == 0 {
        return true;
    }
    let (e, rest) = scratch.split_at_mut(n);
    let (cs, ss) = rest.split_at_mut(n);
    if !all_finite(&v[..n * n]) {
        return false;
    }
    // V(i, j) = v[i + j n].
    macro_rules! at {
        ($i:expr, $j:expr) => {
            v[$i + $j * n]
        };
    }
    // Householder tridiagonalisation.
    for j in 0..n {
        d[j] = at!(n - 1, j);
    }
    for i in (1..n).rev() {
        // Σ |d_k| in four partial sums (the scale only guards against overflow, so its
        // order of additions does not matter).
        let mut part = [0.0; 4];
        let mut chunks = d[..i].chunks_exact(4);
        for c4 in &mut chunks {
            for q in 0..4 {
                part[q] += c4[q].abs();
            }
        }
        let mut scale = (part[0] + part[2]) + (part[1] + part[3]);
        for x in chunks.remainder() {
            scale += x.abs();
        }
        let mut h = 0.0;
        if scale == 0.0 {
            e[i] = d[i - 1];
            for j in 0..i {
                d[j] = at!(i - 1, j);
                at!(i, j) = 0.0;
                at!(j, i) = 0.0;
            }
        } else {
            // Scaled by one reciprocal (the reflector does not depend on the scale).
            let inv = 1.0 / scale;
            for x in &mut d[..i] {
                *x *= inv;
            }
            h = dot4(&d[..i], &d[..i]);
            let mut f = d[i - 1];
            let mut g = h.sqrt();
            if f > 0.0 {
                g = -g;
            }
            e[i] = scale * g;
            h -= f * g;
            d[i - 1] = f - g;
            for j in 0..i {
                e[j] = 0.0;
            }
            // e = A d over the lower triangle (column j below the diagonal is contiguous),
            // two columns per pass: their dot products with d (four partial sums each, as
            // `dot4`) and e += column · d_j, each e_k still adding column j before j + 1.
            let mut j = 0;
            while j + 1 < i {
                let (f0, f1) = (d[j], d[j + 1]);
                at!(j, i) = f0;
                at!(j + 1, i) = f1;
                let c01 = at!(j + 1, j);
                e[j + 1] += c01 * f0;
                let lo = j + 2;
                let col0 = &v[j * n + lo..j * n + i];
                let col1 = &v[(j + 1) * n + lo..(j + 1) * n + i];
                let (dd, ee) = (&d[lo..i], &mut e[lo..i]);
                let (mut p0, mut p1) = ([0.0; 4], [0.0; 4]);
                let (mut c0, mut c1) = (col0.chunks_exact(4), col1.chunks_exact(4));
                let (mut cd, mut ce) = (dd.chunks_exact(4), ee.chunks_exact_mut(4));
                for (((a4, b4), d4), e4) in (&mut c0).zip(&mut c1).zip(&mut cd).zip(&mut ce) {
                    for q in 0..4 {
                        p0[q] += a4[q] * d4[q];
                        p1[q] += b4[q] * d4[q];
                        e4[q] += a4[q] * f0;
                        e4[q] += b4[q] * f1;
                    }
                }
                let mut dot0 = (p0[0] + p0[2]) + (p0[1] + p0[3]);
                let mut dot1 = (p1[0] + p1[2]) + (p1[1] + p1[3]);
                let tail = c0
                    .remainder()
                    .iter()
                    .zip(c1.remainder())
                    .zip(cd.remainder());
                for (((&a, &b), &dk), ek) in tail.zip(ce.into_remainder()) {
                    dot0 += a * dk;
                    dot1 += b * dk;
                    *ek += a * f0;
                    *ek += b * f1;
                }
                e[j] += at!(j, j) * f0 + (c01 * d[j + 1] + dot0);
                e[j + 1] += at!(j + 1, j + 1) * f1 + dot1;
                j += 2;
            }
            if j < i {
                // The last column alone: only its diagonal entry is inside the block.
                f = d[j];
                at!(j, i) = f;
                e[j] += at!(j, j) * f;
            }
            // e ← e / h (one reciprocal), f = eᵀd.
            let inv_h = 1.0 / h;
            for x in &mut e[..i] {
                *x *= inv_h;
            }
            f = dot4(&e[..i], &d[..i]);
            let hh = f / (h + h);
            for j in 0..i {
                e[j] -= hh * d[j];
            }
            for j in 0..i {
                f = d[j];
                g = e[j];
                for k in j..i {
                    at!(k, j) -= f * e[k] + g * d[k];
                }
                d[j] = at!(i - 1, j);
                at!(i, j) = 0.0;
            }
        }
        d[i] = h;
    }
    // Accumulate the transformations.
    for i in 0..n - 1 {
        at!(n - 1, i) = at!(i, i);
        at!(i, i) = 1.0;
        let h = d[i + 1];
        if h != 0.0 {
            for k in 0..=i {
                d[k] = at!(k, i + 1) / h;
            }
            let (left, right) = v.split_at_mut((i + 1) * n);
            let next = &right[..=i];
            for j in 0..=i {
                let cj = &mut left[j * n..j * n + i + 1];
                let g = dot4(next, cj);
                for (x, dk) in cj.iter_mut().zip(&d[..=i]) {
                    *x -= g * dk;
                }
            }
        }
        for k in 0..=i {
            at!(k, i + 1) = 0.0;
        }
    }
    for j in 0..n {
        d[j] = at!(n - 1, j);
        at!(n - 1, j) = 0.0;
    }
    at!(n - 1, n - 1) = 1.0;
    e[0] = 0.0;
    // Implicit QL on the tridiagonal (d, e).
    for i in 1..n {
        e[i - 1] = e[i];
    }
    e[n - 1] = 0.0;
    let mut f = 0.0;
    let mut tst1: f64 = 0.0;
    let eps = f64::EPSILON;
    for l in 0..n {
        tst1 = tst1.max(d[l].abs() + e[l].abs());
        let mut m = l;
        while m < n - 1 && e[m].abs() > eps * tst1 {
            m += 1;
        }
        if m > l {
            let mut iter = 0;
            loop {
                iter += 1;
                if iter > 60 {
                    return false;
                }
                let mut g = d[l];
                let mut p = (d[l + 1] - g) / (2.0 * e[l]);
                let mut r = pythag(p, 1.0);
                if p < 0.0 {
                    r = -r;
                }
                d[l] = e[l] / (p + r);
                d[l + 1] = e[l] * (p + r);
                let dl1 = d[l + 1];
                let mut h = g - d[l];
                for di in d.iter_mut().take(n).skip(l + 2) {
                    *di -= h;
                }
                f += h;
                p = d[m];
                let (mut c, mut c2, mut c3) = (1.0, 1.0, 1.0);
                let el1 = e[l + 1];
                let (mut s, mut s2) = (0.0, 0.0);
                for i in (l..m).rev() {
                    c3 = c2;
                    c2 = c;
                    s2 = s;
                    let (ei, di) = (e[i], d[i]);
                    g = c * ei;
                    h = c * p;
                    // c dᵢ − s g with c = p/r, s = eᵢ/r: the numerator does not wait for r.
                    let num = p * di - ei * g;
                    let (ri, next);
                    (r, ri, next) = rotation(p, ei, num);
                    e[i + 1] = s * r;
                    s = ei * ri;
                    c = p * ri;
                    d[i + 1] = h + s * (c * g + s * di);
                    p = next;
                    cs[i] = c;
                    ss[i] = s;
                }
                rotate_columns::<B>(v, n, l, m, cs, ss);
                p = -s * s2 * c3 * el1 * e[l] / dl1;
                e[l] = s * p;
                d[l] = c * p;
                if !(e[l].abs() > eps * tst1) {
                    break;
                }
            }
        }
        d[l] += f;
        e[l] = 0.0;
    }
    // Ascending order.
    for i in 0..n - 1 {
        let mut k = i;
        let mut p = d[i];
        for j in (i + 1)..n {
            if d[j] < p {
                k = j;
                p = d[j];
            }
        }
        if k != i {
            d[k] = d[i];
            d[i] = p;
            for j in 0..n {
                v.swap(j + i * n, j + k * n);
            }
        }
    }
    all_finite(&d[..n])
}

/// Apply one QL sweep's rotations, i = m−1 down to l, to the columns of `v` (`n × n`,
/// column-major): (vᵢ, vᵢ₊₁) ← (c vᵢ − s vᵢ₊₁, s vᵢ + c vᵢ₊₁), the update `tql2` makes
/// inside its loop. Rows are independent, so each block of rows carries its running
/// column through the whole sweep in registers: one load and one store per rotation.
/// Blocks of `B` rows first (16 fit the AVX2 copy's registers, 8 the baseline's), then
/// of 8, 2 and 1.
#[inline(always)]
fn rotate_columns<const B: usize>(
    v: &mut [f64],
    n: usize,
    l: usize,
    m: usize,
    cs: &[f64],
    ss: &[f64],
) {
    let mut k0 = 0;
    while k0 + B <= n {
        rotate_rows::<B>(v, n, k0, (l, m), cs, ss);
        k0 += B;
    }
    while k0 + 8 <= n {
        rotate_rows::<8>(v, n, k0, (l, m), cs, ss);
        k0 += 8;
    }
    while k0 + 2 <= n {
        rotate_rows::<2>(v, n, k0, (l, m), cs, ss);
        k0 += 2;
    }
    if k0 < n {
        rotate_rows::<1>(v, n, k0, (l, m), cs, ss);
    }
}

/// [`rotate_columns`] for rows `k0..k0 + B`.
#[inline(always)]
fn rotate_rows<const B: usize>(
    v: &mut [f64],
    n: usize,
    k0: usize,
    (l, m): (usize, usize),
    cs: &[f64],
    ss: &[f64],
) {
    let mut carry = [0.0; B];
    carry.copy_from_slice(&v[k0 + m * n..k0 + m * n + B]);
    for i in (l..m).rev() {
        let (c, s) = (cs[i], ss[i]);
        let mut a = [0.0; B];
        a.copy_from_slice(&v[k0 + i * n..k0 + i * n + B]);
        let out = &mut v[k0 + (i + 1) * n..k0 + (i + 1) * n + B];
        for q in 0..B {
            out[q] = s * a[q] + c * carry[q];
            carry[q] = c * a[q] - s * carry[q];
        }
    }
    v[k0 + l * n..k0 + l * n + B].copy_from_slice(&carry);
}

#[cfg(test)]
mod tests {
    use super::*;

    /// `Yᵀ Y + shift · I` (`n × n`, column-major) for an irregular `rank × n` matrix `Y`:
    /// symmetric, of rank `rank` before the shift, so with `rank < n` it has an eigenvalue
    /// `shift` repeated `n − rank` times.
    fn gram_plus_shift(n: usize, rank: usize, shift: f64) -> Vec<f64> {
        let y: Vec<f64> = (0..rank * n)
            .map(|k| ((k * 7 + 3) % 11) as f64 / 5.0 - 1.0 + (k as f64 * 0.37).sin())
            .collect();
        let mut a = vec![0.0; n * n];
        for j in 0..n {
            for i in 0..n {
                a[i + j * n] = (0..rank)
                    .map(|k| y[k + i * rank] * y[k + j * rank])
                    .sum::<f64>()
                    + if i == j { shift } else { 0.0 };
            }
        }
        a
    }

    /// Cyclic Jacobi (Golub & Van Loan §8.5.2, from memory): sweeps of plane rotations
    /// that zero each off-diagonal pair `(p, q)` in turn, `J(p, q, θ)ᵀ A J(p, q, θ)`,
    /// until the off-diagonal part is negligible. Slow and plain: the oracle for
    /// [`symmetric_eigen`]. Returns the eigenvalues ascending.
    fn jacobi_eigenvalues(a: &[f64], n: usize) -> Vec<f64> {
        let mut a = a.to_vec();
        let at = |i: usize, j: usize| i + j * n;
        for _sweep in 0..100 {
            let off: f64 = (0..n)
                .flat_map(|j| (0..n).filter(move |&i| i != j).map(move |i| (i, j)))
                .map(|(i, j)| a[at(i, j)] * a[at(i, j)])
                .sum();
            let size: f64 = a.iter().map(|x| x * x).sum();
            if off <= f64::EPSILON * f64::EPSILON * size {
                break;
            }
            for p in 0..n {
                for q in p + 1..n {
                    let apq = a[at(p, q)];
                    if apq == 0.0 {
                        continue;
                    }
                    // The symmetric Schur decomposition of the 2 × 2 block (§8.5.1).
                    let tau = (a[at(q, q)] - a[at(p, p)]) / (2.0 * apq);
                    let t = tau.signum() / (tau.abs() + (1.0 + tau * tau).sqrt());
                    let c = 1.0 / (1.0 + t * t).sqrt();
                    let s = t * c;
                    for k in 0..n {
                        let (akp, akq) = (a[at(k, p)], a[at(k, q)]);
                        a[at(k, p)] = c * akp - s * akq;
                        a[at(k, q)] = s * akp + c * akq;
                    }
                    for k in 0..n {
                        let (apk, aqk) = (a[at(p, k)], a[at(q, k)]);
                        a[at(p, k)] = c * apk - s * aqk;
                        a[at(q, k)] = s * apk + c * aqk;
                    }
                }
            }
        }
        let mut d: Vec<f64> = (0..n).map(|i| a[at(i, i)]).collect();
        d.sort_by(f64::total_cmp);
        d
    }

    #[test]
    fn eigenvalues_agree_with_cyclic_jacobi() {
        // Two backward-stable methods agree to about n eps ‖A‖ (Golub & Van Loan §8.1,
        // Weyl's bound, from memory); checked at 8 n eps ‖A‖ on dense matrices with
        // distinct and with repeated eigenvalues.
        for n in [1usize, 2, 3, 6, 9, 17, 40] {
            for rank in [3usize, n] {
                let a = gram_plus_shift(n, rank, 2.0);
                let (mut v, mut d, mut e) = (a.clone(), vec![0.0; n], vec![0.0; 3 * n]);
                assert!(symmetric_eigen(&mut v, &mut d, &mut e, n));
                let want = jacobi_eigenvalues(&a, n);
                let norm = want.iter().fold(0.0f64, |m, x| m.max(x.abs()));
                let tol = 8.0 * n as f64 * f64::EPSILON * norm;
                for (mine, oracle) in d.iter().zip(&want) {
                    assert!(
                        (mine - oracle).abs() <= tol,
                        "n = {n}, rank {rank}: {mine} vs Jacobi {oracle}"
                    );
                }
            }
        }
    }

    #[test]
    fn avx2_copy_computes_the_same_bits_as_the_baseline() {
        // The copy compiled for AVX2 (see the module overview of `linalg`) must round exactly as the baseline
        // body: IEEE 754 operations in the same order give the same result whatever the
        // register width. On a CPU without AVX2 both calls run the baseline copy.
        let n = 40;
        let a = gram_plus_shift(n, n, 0.0);
        let (mut v1, mut d1, mut e1) = (a.clone(), vec![0.0; n], vec![0.0; 3 * n]);
        let (mut v2, mut d2, mut e2) = (a.clone(), vec![0.0; n], vec![0.0; 3 * n]);
        assert!(symmetric_eigen_body::<8>(&mut v1, &mut d1, &mut e1, n));
        assert!(symmetric_eigen(&mut v2, &mut d2, &mut e2, n));
        let bits = |x: &[f64]| x.iter().map(|v| v.to_bits()).collect::<Vec<_>>();
        assert_eq!(bits(&v1), bits(&v2), "eigenvectors");
        assert_eq!(bits(&d1), bits(&d2), "eigenvalues");
    }

    #[test]
    fn symmetric_eigenpairs_satisfy_their_definition() {
        // A v = λ v and Vᵀ V = I to rounding (definition of an orthonormal eigenbasis), and
        // the eigenvalues equal nalgebra's (an independent implementation), on a matrix
        // with a repeated eigenvalue ((N−1) I + a rank-3 term, the shape the ensemble
        // transform factors) at sizes that exercise every row-block width of the rotation
        // pass, and on a dense full-rank matrix of the benchmark's size.
        let cases = [(1usize, 3usize), (2, 3), (9, 3), (11, 3), (40, 3), (40, 40)];
        for (n, rank) in cases {
            let a = gram_plus_shift(n, rank, 8.0);
            let (mut v, mut d, mut e) = (a.clone(), vec![0.0; n], vec![0.0; 3 * n]);
            assert!(symmetric_eigen(&mut v, &mut d, &mut e, n));
            assert!(d.windows(2).all(|w| w[0] <= w[1]), "ascending");
            let tol = 64.0 * n as f64 * f64::EPSILON * d[n - 1].abs();
            let mut reference: Vec<f64> = nalgebra::DMatrix::from_column_slice(n, n, &a)
                .symmetric_eigenvalues()
                .iter()
                .cloned()
                .collect();
            reference.sort_by(f64::total_cmp);
            for (mine, theirs) in d.iter().zip(&reference) {
                assert!(
                    (mine - theirs).abs() < tol,
                    "n={n}: {mine} vs nalgebra {theirs}"
                );
            }
            for j in 0..n {
                for i in 0..n {
                    let av: f64 = (0..n).map(|k| a[i + k * n] * v[k + j * n]).sum();
                    assert!((av - d[j] * v[i + j * n]).abs() < tol, "A v = λ v");
                    let vv: f64 = (0..n).map(|k| v[k + i * n] * v[k + j * n]).sum();
                    let id = if i == j { 1.0 } else { 0.0 };
                    assert!((vv - id).abs() < 64.0 * n as f64 * f64::EPSILON, "VᵀV = I");
                }
            }
        }
        let mut bad = [1.0, f64::NAN, f64::NAN, 1.0];
        assert!(!symmetric_eigen(&mut bad, &mut [0.0; 2], &mut [0.0; 6], 2));
    }
}
