//! Dense matrix products over column-major slices (`a[i + j * rows]`) into preallocated
//! buffers: `O = A B`, `O = A Bᵀ`, `O += A B`, `O += A Bᵀ`, the congruence `P ← Φ P Φᵀ + Q`,
//! and an interleaved dot product. Nothing here allocates.
//!
//! ```text
//! o_ij = Σ_{l=0}^{k−1} a_il b_lj        (or b_jl for A Bᵀ)
//! ```
//!
//! Every path, whatever its blocking, starts each entry from 0 (or from its old value when
//! accumulating) and adds `a_il b_lj` in increasing `l`, so it gives the same bits as the
//! plain triple loop; the loop order is the column ("saxpy", `jki`) form of Golub &
//! Van Loan, *Matrix Computations*, 4th ed., §1.1.11–1.1.15 (from memory), with the
//! register tiling of §1.5 for larger products. The tests keep the triple loop as the
//! oracle, bit for bit.
//!
//! nalgebra's own product hands dynamic matrices larger than 5 × 5 to a kernel that
//! allocates a packing buffer on every call, so the filter steps and the discretisation
//! use these instead.

use super::repair::symmetrize;
use multiversion::multiversion;
use multiversion::target::target_cfg_f;
use nalgebra::DMatrix;

/// `out = a bᵀ` for `a: r × k`, `b: c × k` (no allocation).
#[inline]
pub fn mul_abt(a: &DMatrix<f64>, b: &DMatrix<f64>, out: &mut DMatrix<f64>) {
    product::<true>(a, b, out, false);
}

/// `out = a b` for `a: r × k`, `b: k × c` (no allocation: nalgebra's product hands
/// matrices above 5 × 5 to a kernel that allocates a packing buffer on every call).
/// Each entry sums `a_il b_lj` over `l` in order; the loop over `i` is innermost so
/// independent entries proceed side by side.
#[inline]
pub fn mul_ab(a: &DMatrix<f64>, b: &DMatrix<f64>, out: &mut DMatrix<f64>) {
    product::<false>(a, b, out, false);
}

/// `out += a b` for `a: r × k`, `b: k × c` (the same additions as [`mul_ab`], onto the
/// old contents of `out`).
#[inline]
pub fn add_mul_ab(a: &DMatrix<f64>, b: &DMatrix<f64>, out: &mut DMatrix<f64>) {
    product::<false>(a, b, out, true);
}

/// `out += a bᵀ` for `a: r × k`, `b: c × k` (the same additions as [`mul_abt`], onto the
/// old contents of `out`).
#[inline]
pub fn add_mul_abt(a: &DMatrix<f64>, b: &DMatrix<f64>, out: &mut DMatrix<f64>) {
    product::<true>(a, b, out, true);
}

/// The four matrix forms above: `a b` (`T = false`) or `a bᵀ` (`T = true`), written over
/// `out` or added to it. Square products up to 8 × 8 that overwrite take the fixed-size
/// kernels ([`square`]), the rest [`gemm`]; both add in the same order.
#[inline]
fn product<const T: bool>(
    a: &DMatrix<f64>,
    b: &DMatrix<f64>,
    out: &mut DMatrix<f64>,
    accumulate: bool,
) {
    let (r, k) = a.shape();
    let (c, inner) = if T {
        (b.nrows(), b.ncols())
    } else {
        (b.ncols(), b.nrows())
    };
    debug_assert_eq!(inner, k, "product: inner dimensions differ");
    debug_assert_eq!(out.shape(), (r, c), "product: output has the wrong shape");
    let (a, b) = (a.as_slice(), b.as_slice());
    let o = out.as_mut_slice();
    if !accumulate && r == k && k == c && square::<T>(r, a, b, o) {
        return;
    }
    gemm::<T>(a, b, o, (r, k, c), accumulate);
}

/// `o = a b`, or `o += a b` with `accumulate`, for column-major slices `a: r × k`,
/// `b: k × c`, `o: r × c` given as `dims = (r, k, c)`. Column `j` of `o` accumulates
/// the columns of `a` weighted by `b_lj`, `l` in order (contiguous inner loop).
#[inline]
pub fn gemm_nn(a: &[f64], b: &[f64], o: &mut [f64], dims: (usize, usize, usize), accumulate: bool) {
    gemm::<false>(a, b, o, dims, accumulate);
}

/// `o = a bᵀ`, or `o += a bᵀ` with `accumulate`, for column-major slices `a: r × k`,
/// `b: c × k`, `o: r × c` given as `dims = (r, k, c)`; the same loop order as
/// [`gemm_nn`].
#[inline]
pub fn gemm_nt(a: &[f64], b: &[f64], o: &mut [f64], dims: (usize, usize, usize), accumulate: bool) {
    gemm::<true>(a, b, o, dims, accumulate);
}

/// [`gemm_nn`] (`T = false`) or [`gemm_nt`] (`T = true`), with the row count fixed at
/// compile time for up to 6 rows and in register tiles ([`gemm_blocked`]) from 7 rows and
/// 4 columns.
#[inline]
fn gemm<const T: bool>(
    a: &[f64],
    b: &[f64],
    o: &mut [f64],
    dims: (usize, usize, usize),
    acc: bool,
) {
    match dims.0 {
        0 => {}
        1 => gemm_cols::<1, T>(a, b, o, dims, acc),
        2 => gemm_cols::<2, T>(a, b, o, dims, acc),
        3 => gemm_cols::<3, T>(a, b, o, dims, acc),
        4 => gemm_cols::<4, T>(a, b, o, dims, acc),
        5 => gemm_cols::<5, T>(a, b, o, dims, acc),
        6 => gemm_cols::<6, T>(a, b, o, dims, acc),
        r if r >= BLOCK && dims.2 >= BLOCK => {
            if T {
                gemm_blocked_nt(a, b, o, dims, acc, false)
            } else {
                gemm_blocked_nn(a, b, o, dims, acc, false)
            }
        }
        _ => gemm_cols::<0, T>(a, b, o, dims, acc),
    }
}

/// Columns of `o` in one tile of [`gemm_blocked`] (its rows are `RB`), and the least row
/// and column count that takes the tiled form.
const BLOCK: usize = 4;

/// [`gemm_blocked`] for `o = a b`.
#[multiversion(targets("x86_64+avx2"), dispatcher = "direct")]
fn gemm_blocked_nn(
    a: &[f64],
    b: &[f64],
    o: &mut [f64],
    dims: (usize, usize, usize),
    accumulate: bool,
    upper: bool,
) {
    if target_cfg_f!(target_feature = "avx2") {
        gemm_blocked::<false, 8>(a, b, o, dims, accumulate, upper)
    } else {
        gemm_blocked::<false, 4>(a, b, o, dims, accumulate, upper)
    }
}

/// [`gemm_blocked`] for `o = a bᵀ`.
#[multiversion(targets("x86_64+avx2"), dispatcher = "direct")]
fn gemm_blocked_nt(
    a: &[f64],
    b: &[f64],
    o: &mut [f64],
    dims: (usize, usize, usize),
    accumulate: bool,
    upper: bool,
) {
    if target_cfg_f!(target_feature = "avx2") {
        gemm_blocked::<true, 8>(a, b, o, dims, accumulate, upper)
    } else {
        gemm_blocked::<true, 4>(a, b, o, dims, accumulate, upper)
    }
}

/// `o = a bᵀ` like [`gemm_nt`], but only the blocks of `o` that reach the upper triangle
/// (i ≤ j) are computed: for a symmetric result (`a = b`, or a product known to be
/// symmetric) whose caller reads the upper triangle and mirrors it.
pub fn gemm_nt_upper(a: &[f64], b: &[f64], o: &mut [f64], dims: (usize, usize, usize)) {
    if dims.0 >= BLOCK && dims.2 >= BLOCK {
        gemm_blocked_nt(a, b, o, dims, false, true);
    } else {
        gemm_cols::<0, true>(a, b, o, dims, false);
    }
}

/// [`gemm_cols`] for larger products, an `RB × BLOCK` tile of `o` at a time with its
/// running sums held in registers across the whole `l` loop (the column form loads and
/// stores every sum on every `l`). Each entry still starts from 0 (or its old value with
/// `accumulate`) and adds `a_il b_lj` over `l` in order, so results are bit-identical to
/// [`gemm_cols`]. Rows and columns beyond the last whole tile take the column form. With
/// `upper`, tiles wholly below the diagonal are skipped. `RB` rows (four doubles, or
/// eight) are one or two registers of the baseline copy or of the AVX2 copy, which makes
/// the tile's sums eight registers, enough independent chains to hide the additions'
/// latency without running out of registers.
#[inline(always)]
fn gemm_blocked<const T: bool, const RB: usize>(
    a: &[f64],
    b: &[f64],
    o: &mut [f64],
    dims: (usize, usize, usize),
    accumulate: bool,
    upper: bool,
) {
    let (r, k, c) = dims;
    let (a, b, o) = (&a[..r * k], &b[..k * c], &mut o[..r * c]);
    let weight = |l: usize, j: usize| if T { b[j + l * c] } else { b[l + j * k] };
    let (rb, cb) = (r - r % RB, c - c % BLOCK);
    for j0 in (0..c).step_by(BLOCK) {
        let cols = BLOCK.min(c - j0);
        // Rows this column block needs: all, or those down to its last diagonal entry.
        let rows = if upper { (j0 + cols).min(r) } else { r };
        // Whole tiles first (only in whole column blocks).
        let mut i0 = if j0 < cb { rows.min(rb) / RB * RB } else { 0 };
        for t0 in (0..i0).step_by(RB) {
            tile::<T, RB>(a, b, o, dims, (t0, j0), accumulate);
        }
        // One narrower tile where a whole one still fits (the diagonal blocks of `upper`).
        if RB > BLOCK && j0 < cb && i0 + BLOCK <= rows {
            tile::<T, BLOCK>(a, b, o, dims, (i0, j0), accumulate);
            i0 += BLOCK;
        }
        // What is left of these columns, one column at a time.
        if i0 >= rows {
            continue;
        }
        for j in j0..j0 + cols {
            let oj = &mut o[i0 + j * r..rows + j * r];
            if !accumulate {
                oj.fill(0.0);
            }
            for l in 0..k {
                let w = weight(l, j);
                for (x, &y) in oj.iter_mut().zip(&a[i0 + l * r..rows + l * r]) {
                    *x += y * w;
                }
            }
        }
    }
}

/// One `R × BLOCK` tile of [`gemm_blocked`], rows from `i0`, columns from `j0`: the sums
/// stay in registers over the whole `l` loop and add in order of `l`.
#[inline(always)]
fn tile<const T: bool, const R: usize>(
    a: &[f64],
    b: &[f64],
    o: &mut [f64],
    (r, k, c): (usize, usize, usize),
    (i0, j0): (usize, usize),
    accumulate: bool,
) {
    let weight = |l: usize, j: usize| if T { b[j + l * c] } else { b[l + j * k] };
    let mut acc = [[0.0; R]; BLOCK];
    if accumulate {
        for (q, col) in acc.iter_mut().enumerate() {
            col.copy_from_slice(&o[i0 + (j0 + q) * r..i0 + (j0 + q) * r + R]);
        }
    }
    for l in 0..k {
        let mut al = [0.0; R];
        al.copy_from_slice(&a[i0 + l * r..i0 + l * r + R]);
        for (q, col) in acc.iter_mut().enumerate() {
            let w = weight(l, j0 + q);
            for p in 0..R {
                col[p] += al[p] * w;
            }
        }
    }
    for (q, col) in acc.iter().enumerate() {
        o[i0 + (j0 + q) * r..i0 + (j0 + q) * r + R].copy_from_slice(col);
    }
}

/// The loop of [`gemm_nn`] (`T = false`, weights `b_lj`) and [`gemm_nt`] (`T = true`,
/// weights `b_jl`). `R > 0` fixes the row count at compile time (equal to `dims.0`), so
/// the short columns of small models unroll; `R = 0` takes it from `dims`.
#[inline(always)]
fn gemm_cols<const R: usize, const T: bool>(
    a: &[f64],
    b: &[f64],
    o: &mut [f64],
    dims: (usize, usize, usize),
    accumulate: bool,
) {
    let (r, k, c) = dims;
    let r = if R > 0 { R } else { r };
    let (a, b) = (&a[..r * k], &b[..k * c]);
    for (j, oj) in o[..r * c].chunks_exact_mut(r).enumerate() {
        if !accumulate {
            oj.fill(0.0);
        }
        for (l, al) in a.chunks_exact(r).enumerate() {
            let w = if T { b[j + l * c] } else { b[l + j * k] };
            for (x, &y) in oj.iter_mut().zip(al) {
                *x += y * w;
            }
        }
    }
}

/// Run `a b` (`T = false`) or `a bᵀ` (`T = true`) on `n × n` column-major slices with a
/// kernel whose size is a compile-time constant, for `n ≤ 8` (the models dashboards post
/// are mostly this small). The loops then unroll and vectorise without bounds checks.
/// The kernel adds in the same order as the general loops, so results are bit-identical.
/// Returns `false` for larger `n`.
#[inline]
fn square<const T: bool>(n: usize, a: &[f64], b: &[f64], o: &mut [f64]) -> bool {
    match n {
        1 => square_kernel::<1, T>(a, b, o),
        2 => square_kernel::<2, T>(a, b, o),
        3 => square_kernel::<3, T>(a, b, o),
        4 => square_kernel::<4, T>(a, b, o),
        5 => square_kernel::<5, T>(a, b, o),
        6 => square_kernel::<6, T>(a, b, o),
        7 => square_kernel::<7, T>(a, b, o),
        8 => square_kernel::<8, T>(a, b, o),
        _ => return false,
    }
    true
}

/// `o = a b` or `o = a bᵀ` for `N × N` column-major matrices: column `j` of `o`
/// accumulates the columns of `a` weighted by `b_lj` (or `b_jl`), `l` in order.
#[inline(always)]
fn square_kernel<const N: usize, const T: bool>(a: &[f64], b: &[f64], o: &mut [f64]) {
    let (a, b, o) = (&a[..N * N], &b[..N * N], &mut o[..N * N]);
    for j in 0..N {
        let mut col = [0.0; N];
        for l in 0..N {
            let w = if T { b[j + l * N] } else { b[l + j * N] };
            for i in 0..N {
                col[i] += a[i + l * N] * w;
            }
        }
        o[j * N..(j + 1) * N].copy_from_slice(&col);
    }
}

/// `p ← φ p φᵀ + q` through the scratch `tmp` (all `n × n`), then symmetrised.
#[inline]
pub fn congruence_plus(
    phi: &DMatrix<f64>,
    p: &mut DMatrix<f64>,
    q: &DMatrix<f64>,
    tmp: &mut DMatrix<f64>,
) {
    mul_ab(phi, p, tmp);
    mul_abt(tmp, phi, p);
    *p += q;
    symmetrize(p);
}

/// Σ aₖ bₖ over the shorter length, in four interleaved partial sums so that the
/// additions pipeline and vectorise, combined as (s₀ + s₂) + (s₁ + s₃), then the tail.
#[inline(always)]
pub fn dot4(a: &[f64], b: &[f64]) -> f64 {
    let len = a.len().min(b.len());
    let (a, b) = (&a[..len], &b[..len]);
    let mut s = [0.0; 4];
    let (mut ca, mut cb) = (a.chunks_exact(4), b.chunks_exact(4));
    for (x, y) in (&mut ca).zip(&mut cb) {
        for q in 0..4 {
            s[q] += x[q] * y[q];
        }
    }
    let mut t = (s[0] + s[2]) + (s[1] + s[3]);
    for (x, y) in ca.remainder().iter().zip(cb.remainder()) {
        t += x * y;
    }
    t
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn avx2_copies_of_the_tiled_product_compute_the_same_bits() {
        // The tiled kernel compiled for AVX2 (see the module overview of `linalg`) must round exactly as the
        // baseline body: IEEE 754 operations in the same order give the same result
        // whatever the register width. On a CPU without AVX2 both calls run the baseline.
        let y: Vec<f64> = (0..1600)
            .map(|k| ((k * 7 + 3) % 11) as f64 / 5.0 - 1.0 + (k as f64 * 0.37).sin())
            .collect();
        let bits = |x: &[f64]| x.iter().map(|v| v.to_bits()).collect::<Vec<_>>();
        for (r, k, c) in [(13, 11, 9), (40, 40, 40), (8, 3, 17)] {
            for (acc, upper) in [(false, false), (true, false), (false, true)] {
                let o0: Vec<f64> = (0..r * c).map(|q| (q as f64 * 0.91).cos()).collect();
                let (mut o1, mut o2) = (o0.clone(), o0.clone());
                gemm_blocked::<false, 4>(&y, &y, &mut o1, (r, k, c), acc, upper);
                gemm_blocked_nn(&y, &y, &mut o2, (r, k, c), acc, upper);
                assert_eq!(bits(&o1), bits(&o2), "a b, {r}×{k}×{c}");
                let (mut o1, mut o2) = (o0.clone(), o0);
                gemm_blocked::<true, 4>(&y, &y, &mut o1, (r, k, c), acc, upper);
                gemm_blocked_nt(&y, &y, &mut o2, (r, k, c), acc, upper);
                assert_eq!(bits(&o1), bits(&o2), "a bᵀ, {r}×{k}×{c}");
            }
        }
    }

    #[test]
    fn products_equal_the_textbook_triple_loop() {
        // o_ij = Σ_l a_il b_lj (or b_jl) added in l order from 0 (the definition of the
        // product), so every path, tiled or not, must match it bit for bit; sizes cover
        // whole tiles, ragged edges on both sides, the fixed-row kernels and the square ones.
        let val = |s: usize| ((s * 37 + 11) % 23) as f64 / 7.0 - 1.5;
        for (r, k, c) in [
            (3, 5, 2),
            (7, 3, 9),
            (8, 8, 8),
            (13, 6, 10),
            (40, 40, 40),
            (41, 7, 5),
        ] {
            let a: Vec<f64> = (0..r * k).map(val).collect();
            let b: Vec<f64> = (0..k * c).map(|s| val(s + 5)).collect();
            let start: Vec<f64> = (0..r * c).map(|s| val(s + 9)).collect();
            for t in [false, true] {
                for accumulate in [false, true] {
                    let mut o = start.clone();
                    if t {
                        gemm_nt(&a, &b, &mut o, (r, k, c), accumulate);
                    } else {
                        gemm_nn(&a, &b, &mut o, (r, k, c), accumulate);
                    }
                    for j in 0..c {
                        for i in 0..r {
                            let mut x = if accumulate { start[i + j * r] } else { 0.0 };
                            for l in 0..k {
                                x += a[i + l * r] * if t { b[j + l * c] } else { b[l + j * k] };
                            }
                            assert_eq!(o[i + j * r].to_bits(), x.to_bits(), "{r}x{k}x{c}");
                        }
                    }
                }
            }
            // The upper-triangle form on a square result.
            if r == c {
                let mut o = vec![f64::NAN; r * c];
                gemm_nt_upper(&a, &b, &mut o, (r, k, c));
                let mut full = vec![0.0; r * c];
                gemm_nt(&a, &b, &mut full, (r, k, c), false);
                for j in 0..c {
                    for i in 0..=j {
                        assert_eq!(o[i + j * r].to_bits(), full[i + j * r].to_bits());
                    }
                }
            }
        }
        // The square matrix products, whose sizes up to 8 take the fixed-size kernels.
        for n in 1..=9 {
            let a = DMatrix::from_fn(n, n, |i, j| val(i + 3 * j));
            let b = DMatrix::from_fn(n, n, |i, j| val(2 * i + j + 1));
            let (mut ab, mut abt) = (DMatrix::zeros(n, n), DMatrix::zeros(n, n));
            mul_ab(&a, &b, &mut ab);
            mul_abt(&a, &b, &mut abt);
            for j in 0..n {
                for i in 0..n {
                    let (mut x, mut y) = (0.0, 0.0);
                    for l in 0..n {
                        x += a[(i, l)] * b[(l, j)];
                        y += a[(i, l)] * b[(j, l)];
                    }
                    assert_eq!(ab[(i, j)].to_bits(), x.to_bits(), "a b, n = {n}");
                    assert_eq!(abt[(i, j)].to_bits(), y.to_bits(), "a bᵀ, n = {n}");
                }
            }
        }
    }
    #[test]
    fn accumulating_products_add_onto_the_old_contents() {
        // o + a b formed entry by entry from o (the definition), bit for bit, on a
        // square size the fixed kernels would take and on a rectangular one.
        let val = |s: usize| ((s * 29 + 7) % 19) as f64 / 5.0 - 1.7;
        for (r, k, c) in [(3, 3, 3), (6, 4, 9)] {
            let a = DMatrix::from_fn(r, k, |i, j| val(i + 7 * j));
            let b = DMatrix::from_fn(k, c, |i, j| val(3 * i + j + 2));
            let bt = b.transpose();
            let start = DMatrix::from_fn(r, c, |i, j| val(i * j + 11));
            let (mut o, mut ot) = (start.clone(), start.clone());
            add_mul_ab(&a, &b, &mut o);
            add_mul_abt(&a, &bt, &mut ot);
            for j in 0..c {
                for i in 0..r {
                    let mut x = start[(i, j)];
                    for l in 0..k {
                        x += a[(i, l)] * b[(l, j)];
                    }
                    assert_eq!(o[(i, j)].to_bits(), x.to_bits());
                    assert_eq!(ot[(i, j)].to_bits(), x.to_bits());
                }
            }
        }
    }

    #[test]
    fn dot4_equals_the_plain_sum_to_rounding() {
        // Σ a_k b_k added in order is the oracle; four partial sums change only the
        // rounding, within the usual bound for a sum of n terms (Higham §3.1, from
        // memory): |error| ≤ n eps Σ |a_k b_k|, checked at 8 n eps.
        for n in [0usize, 1, 3, 4, 7, 16, 41] {
            let a: Vec<f64> = (0..n).map(|k| (k as f64 * 1.3).sin()).collect();
            let b: Vec<f64> = (0..n).map(|k| (k as f64 * 0.4).cos() - 0.3).collect();
            let plain: f64 = a.iter().zip(&b).map(|(x, y)| x * y).sum();
            let size: f64 = a.iter().zip(&b).map(|(x, y)| (x * y).abs()).sum();
            let tol = 8.0 * n as f64 * f64::EPSILON * size;
            assert!((dot4(&a, &b) - plain).abs() <= tol, "n = {n}");
        }
    }

    #[test]
    fn congruence_plus_matches_the_plain_formula() {
        // Φ P Φᵀ + Q with nalgebra's own product (an independent implementation), to
        // 8 n eps of the entries' size, and symmetric exactly.
        let n = 7;
        let phi = DMatrix::from_fn(n, n, |i, j| ((i * 3 + j) as f64 * 0.5).sin());
        let p = DMatrix::from_fn(n, n, |i, j| {
            if i == j {
                2.0
            } else {
                0.1 / (1 + i + j) as f64
            }
        });
        let q = DMatrix::from_fn(n, n, |i, j| if i == j { 0.3 } else { 0.0 });
        let want = &phi * &p * phi.transpose() + &q;
        let (mut got, mut tmp) = (p.clone(), DMatrix::zeros(n, n));
        congruence_plus(&phi, &mut got, &q, &mut tmp);
        let tol = 8.0 * n as f64 * f64::EPSILON * want.amax();
        assert!((&got - &want).amax() <= tol);
        assert_eq!(got, got.transpose());
    }
}
