//! Small dense kernels over column-major slices (`a[i + j * rows]`) that the filter steps
//! use on preallocated buffers, and the one home of covariance repair (symmetrising,
//! semi-definite Cholesky). Nothing here allocates.

use crate::simd::with_avx2_copy;
use nalgebra::DMatrix;

/// Why a factorisation failed.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct NotPositive {
    /// Column whose pivot was not positive (or was non-finite).
    pub column: usize,
    /// The pivot value.
    pub pivot: f64,
}

/// Lower Cholesky factor `L L' = A` of a symmetric positive definite `m × m` matrix.
/// Only the lower triangle of `a` is read; the strict upper triangle of `l` is zeroed.
///
/// Column by column, each earlier column `k` is subtracted from the whole of column `j` at
/// once (contiguous, so it vectorises); every entry still receives `l_ik l_jk` for
/// `k = 0, 1, …` in order, so the factor equals the dot-product form bit for bit.
pub fn cholesky(a: &[f64], l: &mut [f64], m: usize) -> Result<(), NotPositive> {
    for j in 0..m {
        let (done, rest) = l.split_at_mut(j * m);
        let col = &mut rest[..m];
        col[j..].copy_from_slice(&a[j + j * m..(j + 1) * m]);
        for k in 0..j {
            let lk = &done[k * m..(k + 1) * m];
            let w = lk[j];
            for (x, &y) in col[j..].iter_mut().zip(&lk[j..]) {
                *x -= y * w;
            }
        }
        let d = col[j];
        if !(d > 0.0) || !d.is_finite() {
            return Err(NotPositive {
                column: j,
                pivot: d,
            });
        }
        let djj = d.sqrt();
        col[j] = djj;
        for x in col[j + 1..].iter_mut() {
            *x /= djj;
        }
        col[..j].fill(0.0);
    }
    Ok(())
}

/// Lower factor `L L' = A` of a symmetric positive *semi*-definite `n × n` matrix: a pivot
/// within `tol · max(diag)` of zero gives a zero column (that direction has no spread).
/// A pivot below that is an error: the matrix is not PSD.
pub fn cholesky_psd(a: &[f64], l: &mut [f64], n: usize) -> Result<(), NotPositive> {
    let mut scale: f64 = 0.0;
    for i in 0..n {
        scale = scale.max(a[i + i * n].abs());
    }
    let tol = 1e-10 * scale.max(f64::MIN_POSITIVE);
    for j in 0..n {
        let mut d = a[j + j * n];
        for k in 0..j {
            d -= l[j + k * n] * l[j + k * n];
        }
        if !d.is_finite() || d < -tol {
            return Err(NotPositive {
                column: j,
                pivot: d,
            });
        }
        for i in 0..j {
            l[i + j * n] = 0.0;
        }
        if d <= tol {
            for i in j..n {
                l[i + j * n] = 0.0;
            }
            continue;
        }
        let djj = d.sqrt();
        l[j + j * n] = djj;
        for i in (j + 1)..n {
            let mut s = a[i + j * n];
            for k in 0..j {
                s -= l[i + k * n] * l[j + k * n];
            }
            l[i + j * n] = s / djj;
        }
    }
    Ok(())
}

/// Solve `L y = b` in place (forward substitution), `L` lower `m × m`.
///
/// Column-oriented: once `y_i` is known it is subtracted from every later row, walking down
/// column `i` of `L` (contiguous, so the loop vectorises and no long chain of dependent
/// additions forms). Each `y_r` still receives `l_rk y_k` for `k = 0, 1, …` in order, so
/// the result is the same, bit for bit, as the row-by-row dot-product form.
pub fn solve_lower(l: &[f64], m: usize, b: &mut [f64]) {
    let b = &mut b[..m];
    for i in 0..m {
        let yi = b[i] / l[i + i * m];
        b[i] = yi;
        let col = &l[i * m + i + 1..(i + 1) * m];
        for (br, lr) in b[i + 1..].iter_mut().zip(col) {
            *br -= lr * yi;
        }
    }
}

/// Solve `L' x = y` in place (back substitution), `L` lower `m × m`.
pub fn solve_lower_transposed(l: &[f64], m: usize, b: &mut [f64]) {
    for i in (0..m).rev() {
        let mut s = b[i];
        for k in (i + 1)..m {
            s -= l[k + i * m] * b[k];
        }
        b[i] = s / l[i + i * m];
    }
}

/// Solve `(L L') X = B` in place for `B` of `cols` columns (`m × cols`, column-major).
pub fn cholesky_solve(l: &[f64], m: usize, b: &mut [f64], cols: usize) {
    for c in 0..cols {
        let col = &mut b[c * m..(c + 1) * m];
        solve_lower(l, m, col);
        solve_lower_transposed(l, m, col);
    }
}

/// `‖L⁻¹ v‖²`, i.e. `v' (L L')⁻¹ v`, using `tmp` (length ≥ m) as scratch.
pub fn mahalanobis(l: &[f64], m: usize, v: &[f64], tmp: &mut [f64]) -> f64 {
    tmp[..m].copy_from_slice(&v[..m]);
    solve_lower(l, m, &mut tmp[..m]);
    tmp[..m].iter().map(|x| x * x).sum()
}

/// Replace `p` by `(p + p') / 2`: the single place where covariances are made symmetric.
#[inline]
pub fn symmetrize(p: &mut DMatrix<f64>) {
    let n = p.nrows();
    for j in 0..n {
        for i in (j + 1)..n {
            let v = 0.5 * (p[(i, j)] + p[(j, i)]);
            p[(i, j)] = v;
            p[(j, i)] = v;
        }
    }
}

/// Whether `p` is symmetric to within `rtol` of its diagonal scale.
pub fn is_symmetric(p: &DMatrix<f64>, rtol: f64) -> bool {
    let n = p.nrows();
    for j in 0..n {
        for i in (j + 1)..n {
            let scale = (p[(i, i)].abs() * p[(j, j)].abs())
                .sqrt()
                .max(f64::MIN_POSITIVE);
            if (p[(i, j)] - p[(j, i)]).abs() > rtol * scale.max(p[(i, j)].abs()) {
                return false;
            }
        }
    }
    true
}

/// `x.round()` (halves away from zero) without a call into libm, which the baseline x86-64
/// target makes for `round`; used twice per step of a discrete model. Exact: below 2^52 the
/// fractional part `x − trunc(x)` is computed without rounding, and above it every `f64`
/// is already an integer. NaN stays NaN.
#[inline]
pub fn round_half_away(x: f64) -> f64 {
    const INTEGRAL: f64 = 4_503_599_627_370_496.0; // 2^52
    if !(x.abs() < INTEGRAL) {
        return x;
    }
    let t = x as i64 as f64;
    let f = x - t;
    let r = if f >= 0.5 {
        t + 1.0
    } else if f <= -0.5 {
        t - 1.0
    } else {
        t
    };
    // Keep the sign of a zero result (-0.3 rounds to -0.0, as std does).
    r.copysign(x)
}

/// Whether every entry is finite: x·0 is ±0 for finite x and NaN otherwise, and NaN
/// survives every sum, so eight running sums of x·0 say it without a branch per entry
/// (the loop vectorises; `Iterator::all` stops to test each entry).
#[inline]
pub fn all_finite(xs: &[f64]) -> bool {
    let mut acc = [0.0; 8];
    let mut chunks = xs.chunks_exact(8);
    for c in &mut chunks {
        for q in 0..8 {
            acc[q] += c[q] * 0.0;
        }
    }
    chunks.remainder().iter().all(|x| x.is_finite()) && acc.iter().all(|a| *a == 0.0)
}

/// `out = a bᵀ` for `a: r × k`, `b: c × k` (no allocation).
#[inline]
pub fn mul_abt(a: &DMatrix<f64>, b: &DMatrix<f64>, out: &mut DMatrix<f64>) {
    let (r, k, c) = (a.nrows(), a.ncols(), b.nrows());
    let (a, b) = (a.as_slice(), b.as_slice());
    let o = out.as_mut_slice();
    if r == k && k == c && square::<true>(r, a, b, o) {
        return;
    }
    gemm_nt(a, b, o, (r, k, c), false);
}

/// `out = a b` for `a: r × k`, `b: k × c` (no allocation: nalgebra's product hands
/// matrices above 5 × 5 to a kernel that allocates a packing buffer on every call).
/// Each entry sums `a_il b_lj` over `l` in order; the loop over `i` is innermost so
/// independent entries proceed side by side.
#[inline]
pub fn mul_ab(a: &DMatrix<f64>, b: &DMatrix<f64>, out: &mut DMatrix<f64>) {
    let (r, k, c) = (a.nrows(), a.ncols(), b.ncols());
    debug_assert_eq!(b.nrows(), k);
    let (a, b) = (a.as_slice(), b.as_slice());
    let o = out.as_mut_slice();
    if r == k && k == c && square::<false>(r, a, b, o) {
        return;
    }
    gemm_nn(a, b, o, (r, k, c), false);
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

with_avx2_copy! {
    /// [`gemm_blocked`] for `o = a b`.
    fn gemm_blocked_nn(a: &[f64], b: &[f64], o: &mut [f64], dims: (usize, usize, usize), accumulate: bool, upper: bool) => gemm_blocked::<false, 8>, gemm_blocked::<false, 4>;
}

with_avx2_copy! {
    /// [`gemm_blocked`] for `o = a bᵀ`.
    fn gemm_blocked_nt(a: &[f64], b: &[f64], o: &mut [f64], dims: (usize, usize, usize), accumulate: bool, upper: bool) => gemm_blocked::<true, 8>, gemm_blocked::<true, 4>;
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
fn pythag(a: f64, b: f64) -> f64 {
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

with_avx2_copy! {
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
pub fn symmetric_eigen(v: &mut [f64], d: &mut [f64], scratch: &mut [f64], n: usize) -> bool => symmetric_eigen_body::<16>, symmetric_eigen_body::<8>;
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

    fn mul_llt(l: &[f64], n: usize) -> Vec<f64> {
        let mut a = vec![0.0; n * n];
        for i in 0..n {
            for j in 0..n {
                a[i + j * n] = (0..n).map(|k| l[i + k * n] * l[j + k * n]).sum();
            }
        }
        a
    }

    #[test]
    fn avx2_copies_compute_the_same_bits_as_the_baseline() {
        // The kernels compiled for AVX2 (src/simd.rs) must round exactly as the baseline
        // body: IEEE 754 operations in the same order give the same result whatever the
        // register width. On a CPU without AVX2 both calls run the baseline copy.
        let n = 40;
        let y: Vec<f64> = (0..n * n)
            .map(|k| ((k * 7 + 3) % 11) as f64 / 5.0 - 1.0 + (k as f64 * 0.37).sin())
            .collect();
        let mut a = vec![0.0; n * n];
        for j in 0..n {
            for i in 0..n {
                a[i + j * n] = (0..n).map(|k| y[k + i * n] * y[k + j * n]).sum::<f64>();
            }
        }
        let (mut v1, mut d1, mut e1) = (a.clone(), vec![0.0; n], vec![0.0; 3 * n]);
        let (mut v2, mut d2, mut e2) = (a.clone(), vec![0.0; n], vec![0.0; 3 * n]);
        assert!(symmetric_eigen_body::<8>(&mut v1, &mut d1, &mut e1, n));
        assert!(symmetric_eigen(&mut v2, &mut d2, &mut e2, n));
        let bits = |x: &[f64]| x.iter().map(|v| v.to_bits()).collect::<Vec<_>>();
        assert_eq!(bits(&v1), bits(&v2), "eigenvectors");
        assert_eq!(bits(&d1), bits(&d2), "eigenvalues");
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
    fn all_finite_matches_is_finite_everywhere() {
        // f64::is_finite is the reference (IEEE 754 classes): one bad value at every
        // position of slices that end inside and outside a chunk of eight.
        for len in [0usize, 1, 7, 8, 9, 16, 21] {
            let base: Vec<f64> = (0..len).map(|k| k as f64 - 3.5).collect();
            assert!(all_finite(&base));
            for pos in 0..len {
                for bad in [f64::NAN, f64::INFINITY, f64::NEG_INFINITY, -0.0, f64::MAX] {
                    let mut v = base.clone();
                    v[pos] = bad;
                    let want = v.iter().all(|x| x.is_finite());
                    assert_eq!(all_finite(&v), want, "len {len} pos {pos} value {bad}");
                }
            }
        }
    }

    #[test]
    fn round_half_away_matches_std_round() {
        // f64::round is the reference (std documents halves away from zero).
        let mut xs = vec![
            0.0,
            -0.0,
            0.5,
            -0.5,
            1.5,
            -1.5,
            2.5,
            0.49999999999999994,
            -0.49999999999999994,
            4503599627370495.5,
            4503599627370496.0,
            -4503599627370497.0,
            1e300,
            -1e300,
            f64::INFINITY,
            f64::NEG_INFINITY,
            12345.678,
            -98765.4321,
        ];
        xs.extend((0..2000).map(|k| (k as f64 - 1000.0) * 0.1 + 1e-13 * k as f64));
        for x in xs {
            assert_eq!(round_half_away(x).to_bits(), x.round().to_bits(), "{x}");
        }
        assert!(round_half_away(f64::NAN).is_nan());
    }

    #[test]
    fn cholesky_factor_multiplies_back() {
        // A symmetric positive definite matrix (diagonally dominant, common practice).
        let a = [4.0, 2.0, 0.4, 2.0, 5.0, 1.0, 0.4, 1.0, 3.0];
        let mut l = [0.0; 9];
        cholesky(&a, &mut l, 3).unwrap();
        let back = mul_llt(&l, 3);
        for (x, y) in back.iter().zip(a.iter()) {
            assert!((x - y).abs() < 8.0 * 3.0 * f64::EPSILON * 5.0);
        }
        // Solving against the factor gives x with A x = b.
        let mut b = [1.0, -2.0, 0.5];
        cholesky_solve(&l, 3, &mut b, 1);
        for i in 0..3 {
            let r: f64 = (0..3).map(|j| a[i + j * 3] * b[j]).sum();
            assert!((r - [1.0, -2.0, 0.5][i]).abs() < 1e-14);
        }
    }

    #[test]
    fn semidefinite_factor_tolerates_zero_variance_and_refuses_indefinite() {
        // Rank-one PSD matrix v v' with v = (1, 2, 0).
        let a = [1.0, 2.0, 0.0, 2.0, 4.0, 0.0, 0.0, 0.0, 0.0];
        let mut l = [0.0; 9];
        cholesky_psd(&a, &mut l, 3).unwrap();
        let back = mul_llt(&l, 3);
        for (x, y) in back.iter().zip(a.iter()) {
            assert!((x - y).abs() < 1e-14);
        }
        assert!(cholesky(&a, &mut l, 3).is_err());
        // Eigenvalues 3 and -1: indefinite.
        let bad = [1.0, 2.0, 2.0, 1.0];
        let mut l2 = [0.0; 4];
        assert_eq!(cholesky_psd(&bad, &mut l2, 2).unwrap_err().column, 1);
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
    fn symmetric_eigenpairs_satisfy_their_definition() {
        // A v = λ v and Vᵀ V = I to rounding (definition of an orthonormal eigenbasis), and
        // the eigenvalues equal nalgebra's (an independent implementation), on a matrix
        // with a repeated eigenvalue ((N−1) I + a rank-3 term, the shape the ensemble
        // transform factors) at sizes that exercise every row-block width of the rotation
        // pass, and on a dense full-rank matrix of the benchmark's size.
        let cases = [(1usize, 3usize), (2, 3), (9, 3), (11, 3), (40, 3), (40, 40)];
        for (n, rank) in cases {
            let y: Vec<f64> = (0..rank * n)
                .map(|k| ((k * 7 + 3) % 11) as f64 / 5.0 - 1.0 + (k as f64 * 0.37).sin())
                .collect();
            let mut a = vec![0.0; n * n];
            for j in 0..n {
                for i in 0..n {
                    a[i + j * n] = (0..rank)
                        .map(|k| y[k + i * rank] * y[k + j * rank])
                        .sum::<f64>()
                        + if i == j { 8.0 } else { 0.0 };
                }
            }
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
