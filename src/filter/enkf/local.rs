//! The localised ensemble transform update (LETKF; Hunt, Kostelich & Szunyogh 2007,
//! Physica D 230, §2.3 and §2.4 steps 3–9) for family models (issue 13): every state is
//! analysed on its own with the readings near it, their weights tapered by distance with
//! the Gaspari–Cohn function (Gaspari & Cohn 1999, QJRMS 125, eq. 4.10), so that the
//! sampling noise of a small ensemble cannot spread a reading across the whole model.
//!
//! For the state at element `i`, with `N` members, predicted-reading deviations
//! `Y'_l` (row `l`, over members), innovations `d_l = z_l − ȳ_l`, reading variances
//! `σ_l²`, taper weights `ρ_l = GC(|i − loc_l|)` and multiplicative inflation `λ`:
//!
//! ```text
//! A = (N−1)/λ I + Σ_l (ρ_l/σ_l²) Y'_l Y'_lᵀ = V Λ Vᵀ,   b = Σ_l (ρ_l/σ_l²) Y'_l d_l
//! w̄ = A⁻¹ b,   W = [(N−1) A⁻¹]^{1/2} = V (N−1)^{1/2} Λ^{−1/2} Vᵀ
//! x_a^(j) = x̄ + Σ_m X'_m (w̄_m + W_mj)
//! ```
//!
//! evaluated as `p = Vᵀ X'`, `x_a^(j) = x̄ + Σ_k p_k (Vᵀb)_k / Λ_k + Σ_k V_jk p_k
//! ((N−1)/Λ_k)^{1/2}`, so no `N × N` product is formed. A state with no reading within the
//! radius keeps its mean and has its deviations inflated by `λ^{1/2}` (the same formula
//! with `A = (N−1)/λ I`). Without a radius every reading has weight 1 in every state's
//! analysis: the global ensemble transform, written per state.
//!
//! States are analysed in parallel (rayon) in fixed chunks, each with its own
//! preallocated scratch; each state's analysis reads only shared inputs and writes only
//! its own slice, so the bits do not depend on the number of threads.

use crate::filter::FilterError;
use crate::linalg::symmetric_eigen;
use rayon::prelude::*;

/// States per parallel task (each task owns one scratch set).
const CHUNK: usize = 128;

/// The Gaspari–Cohn fifth-order piecewise rational taper (Gaspari & Cohn 1999, QJRMS 125,
/// eq. 4.10) at distance `d`, with half-width `c = radius / 2`: 1 at 0, 0 from `radius`
/// on, twice continuously differentiable. With `z = |d|/c`:
///
/// ```text
/// 0 ≤ z ≤ 1:  −z⁵/4 + z⁴/2 + 5z³/8 − 5z²/3 + 1
/// 1 < z < 2:  z⁵/12 − z⁴/2 + 5z³/8 + 5z²/3 − 5z + 4 − 2/(3z)
/// ```
pub fn gaspari_cohn(d: f64, radius: f64) -> f64 {
    let z = 2.0 * d.abs() / radius;
    if z >= 2.0 {
        0.0
    } else if z <= 1.0 {
        (((-0.25 * z + 0.5) * z + 0.625) * z - 5.0 / 3.0) * z * z + 1.0
    } else {
        ((((z / 12.0 - 0.5) * z + 0.625) * z + 5.0 / 3.0) * z - 5.0) * z + 4.0 - 2.0 / (3.0 * z)
    }
}

/// The readings of one analysis: where each is (the element index distances are taken
/// over, and the state it reads) and its value and variance.
#[derive(Debug, Clone, Default)]
pub struct LocalReadings {
    /// Element index of each reading (for distances).
    pub loc: Vec<usize>,
    /// State-vector index each reading reads (`z = x[state] + noise`).
    pub state: Vec<usize>,
    /// Reading values.
    pub z: Vec<f64>,
    /// `1/σ²` of each reading.
    pub inv_var: Vec<f64>,
}

impl LocalReadings {
    /// Number of readings.
    pub fn len(&self) -> usize {
        self.z.len()
    }

    /// Whether there are none.
    pub fn is_empty(&self) -> bool {
        self.z.is_empty()
    }

    /// Forget all readings, keeping the buffers.
    pub fn clear(&mut self) {
        self.loc.clear();
        self.state.clear();
        self.z.clear();
        self.inv_var.clear();
    }

    /// Add one reading of state `state` at element `loc`.
    pub fn push(&mut self, loc: usize, state: usize, z: f64, std: f64) {
        self.loc.push(loc);
        self.state.push(state);
        self.z.push(z);
        self.inv_var.push(1.0 / (std * std));
    }
}

/// Tuning of the local update.
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct LocalSettings {
    /// Distance (in element indices) from which a reading has no weight; `None` for no
    /// localisation.
    pub radius: Option<f64>,
    /// Multiplicative inflation `λ ≥ 1` of the prior spread.
    pub inflation: f64,
}

/// Scratch of one parallel task.
#[derive(Debug, Clone)]
struct Scratch {
    a: Vec<f64>,
    eig: Vec<f64>,
    es: Vec<f64>,
    b: Vec<f64>,
    u: Vec<f64>,
    p: Vec<f64>,
    /// Readings in reach and their weights (the small form, fewer than `N − 1`).
    sel: Vec<(usize, f64)>,
    /// `B`, then the `v_k`, `N × N` each (the small form).
    bm: Vec<f64>,
    vm: Vec<f64>,
}

/// Inputs every state's analysis reads.
struct Shared<'a> {
    ens: &'a [f64],
    n: usize,
    nn: usize,
    size: usize,
    periodic: bool,
    settings: LocalSettings,
    /// Taper weight at distance `d` for `d < weights.len()` (the window).
    weights: &'a [f64],
    start: &'a [usize],
    order: &'a [usize],
    yp: &'a [f64],
    innov: &'a [f64],
    inv_var: &'a [f64],
    loc: &'a [usize],
}

/// The buffers and settings of the local update over `n` states and `N` members.
#[derive(Debug, Clone)]
pub struct LocalTransform {
    n: usize,
    nn: usize,
    size: usize,
    periodic: bool,
    settings: LocalSettings,
    weights: Vec<f64>,
    start: Vec<usize>,
    order: Vec<usize>,
    yp: Vec<f64>,
    innov: Vec<f64>,
    out: Vec<f64>,
    scratch: Vec<Scratch>,
}

impl LocalTransform {
    /// Buffers for `n` states of families of `size` elements each (distance is taken
    /// between element indices, on a ring when `periodic`), `members` members and up to
    /// `max_readings` readings per analysis.
    pub fn new(
        n: usize,
        size: usize,
        periodic: bool,
        members: usize,
        max_readings: usize,
        settings: LocalSettings,
    ) -> LocalTransform {
        let nn = members;
        let weights = match settings.radius {
            Some(r) => {
                let mut w = Vec::new();
                let mut d = 0usize;
                while (d as f64) < r && d < size {
                    w.push(gaspari_cohn(d as f64, r));
                    d += 1;
                }
                w
            }
            None => Vec::new(),
        };
        let chunks = n.div_ceil(CHUNK).max(1);
        let scratch = Scratch {
            a: vec![0.0; nn * nn],
            eig: vec![0.0; nn],
            es: vec![0.0; 3 * nn],
            b: vec![0.0; nn],
            u: vec![0.0; nn],
            p: vec![0.0; nn],
            sel: vec![(0, 0.0); nn],
            bm: vec![0.0; nn * nn],
            vm: vec![0.0; nn * nn],
        };
        LocalTransform {
            n,
            nn,
            size,
            periodic,
            settings,
            weights,
            start: vec![0; size + 1],
            order: vec![0; max_readings],
            yp: vec![0.0; max_readings * nn],
            innov: vec![0.0; max_readings],
            out: vec![0.0; n * nn],
            scratch: vec![scratch; chunks],
        }
    }

    /// Analyse the member-major ensemble `ens` (`ens[j * n + s]`: member `j`, state `s`)
    /// in place with `readings`, whose predicted values are `hx[l * N + j]`. Allocates
    /// nothing (more readings than the buffers hold is a caller bug and panics).
    pub fn analyse(
        &mut self,
        ens: &mut [f64],
        readings: &LocalReadings,
        hx: &[f64],
    ) -> Result<(), FilterError> {
        let (nn, nl) = (self.nn, readings.len());
        assert!(nl <= self.innov.len(), "local update: too many readings");
        let nf = nn as f64;
        // Ȳ and Y' of the predicted readings; innovations.
        for l in 0..nl {
            let row = &hx[l * nn..(l + 1) * nn];
            let mut s = 0.0;
            for &v in row {
                s += v;
            }
            let mean = s / nf;
            for (d, &v) in self.yp[l * nn..(l + 1) * nn].iter_mut().zip(row) {
                *d = v - mean;
            }
            self.innov[l] = readings.z[l] - mean;
        }
        // Readings by element (a counting sort, stable in reading order).
        self.start.fill(0);
        for &loc in &readings.loc[..nl] {
            self.start[loc + 1] += 1;
        }
        for k in 0..self.size {
            self.start[k + 1] += self.start[k];
        }
        for (l, &loc) in readings.loc[..nl].iter().enumerate() {
            // `start[loc]` runs ahead while filling and is restored below.
            self.order[self.start[loc]] = l;
            self.start[loc] += 1;
        }
        for k in (1..=self.size).rev() {
            self.start[k] = self.start[k - 1];
        }
        self.start[0] = 0;
        let shared = Shared {
            ens,
            n: self.n,
            nn,
            size: self.size,
            periodic: self.periodic,
            settings: self.settings,
            weights: &self.weights,
            start: &self.start,
            order: &self.order[..nl],
            yp: &self.yp[..nl * nn],
            innov: &self.innov[..nl],
            inv_var: &readings.inv_var[..nl],
            loc: &readings.loc[..nl],
        };
        let ok = self
            .out
            .par_chunks_mut(CHUNK * nn)
            .zip(self.scratch.par_iter_mut())
            .enumerate()
            .all(|(c, (out, sc))| {
                let first = c * CHUNK;
                out.chunks_mut(nn)
                    .enumerate()
                    .all(|(k, xa)| analyse_state(&shared, first + k, sc, xa))
            });
        if !ok {
            return Err(FilterError::NonFinite("local ensemble transform matrix"));
        }
        let out = &self.out;
        let n = self.n;
        ens.par_chunks_mut(n).enumerate().for_each(|(j, row)| {
            for (s, x) in row.iter_mut().enumerate() {
                *x = out[s * nn + j];
            }
        });
        if ens.iter().all(|x| x.is_finite()) {
            Ok(())
        } else {
            Err(FilterError::NonFinite("local ensemble transform"))
        }
    }
}

/// Add reading `l` with taper weight `w` into `A` (upper triangle) and `b`.
#[inline]
fn accumulate(sh: &Shared<'_>, l: usize, w: f64, a: &mut [f64], b: &mut [f64]) {
    let nn = sh.nn;
    let s = w * sh.inv_var[l];
    let y = &sh.yp[l * nn..(l + 1) * nn];
    let d = sh.innov[l];
    for c in 0..nn {
        let yc = s * y[c];
        b[c] += yc * d;
        let col = &mut a[c * nn..c * nn + c + 1];
        for (r, v) in col.iter_mut().enumerate() {
            *v += yc * y[r];
        }
    }
}

/// Call `f(l, w)` for every reading `l` with a positive weight `w` in the analysis of
/// element `i`, in a fixed order (by offset, then reading order).
fn visit(sh: &Shared<'_>, i: usize, mut f: impl FnMut(usize, f64)) {
    let window = sh.weights.len();
    let whole = sh.settings.radius.is_none() || (sh.periodic && 2 * window > sh.size);
    if whole {
        for &l in sh.order {
            let loc = sh.loc[l];
            let d = i.abs_diff(loc);
            let d = if sh.periodic { d.min(sh.size - d) } else { d };
            let w = match sh.settings.radius {
                None => 1.0,
                Some(_) if d < window => sh.weights[d],
                Some(_) => 0.0,
            };
            if w > 0.0 {
                f(l, w);
            }
        }
    } else if window > 0 {
        let reach = (window - 1) as i64;
        for off in -reach..=reach {
            let at = i as i64 + off;
            let loc = if (0..sh.size as i64).contains(&at) {
                at as usize
            } else if sh.periodic {
                at.rem_euclid(sh.size as i64) as usize
            } else {
                continue;
            };
            let w = sh.weights[off.unsigned_abs() as usize];
            if w <= 0.0 {
                continue;
            }
            for &l in &sh.order[sh.start[loc]..sh.start[loc + 1]] {
                f(l, w);
            }
        }
    }
}

/// The analysis of state `s` (the equations of the module doc) into `xa` (its `N`
/// member values); false when the transform matrix is not positive definite.
///
/// With `L < N − 1` readings in reach, `A = c I + BᵀB` (`B = (ρ/σ²)^{1/2} Y'`, `L × N`,
/// `c = (N−1)/λ`) is decomposed through the small `B Bᵀ = U Σ Uᵀ` instead: its
/// eigenvectors are `v_k = Bᵀ u_k / σ_k^{1/2}` with eigenvalues `c + σ_k`, every other
/// direction has `c` (Hunt et al. 2007, §2.3 notes the same choice of the smaller
/// space; here directions with `σ_k ≤ 1e-13 σ_max` are counted with the rest). Then
/// `x_a^(j) = x̄ + Σ_k p_k σ_k^{1/2} (u_k·d̃)/(c+σ_k) + λ^{1/2} X'_j + Σ_k p_k (g_k − λ^{1/2}) v_kj`
/// with `p_k = v_k·X'`, `d̃ = (ρ/σ²)^{1/2} d` and `g_k = ((N−1)/(c+σ_k))^{1/2}`.
fn analyse_state(sh: &Shared<'_>, s: usize, sc: &mut Scratch, xa: &mut [f64]) -> bool {
    let (nn, n) = (sh.nn, sh.n);
    let nf = nn as f64;
    let i = s % sh.size;
    let mut mean = 0.0;
    for j in 0..nn {
        mean += sh.ens[j * n + s];
    }
    mean /= nf;
    for j in 0..nn {
        sc.u[j] = sh.ens[j * n + s] - mean;
    }
    let cap = nn.saturating_sub(1);
    let mut used = 0usize;
    visit(sh, i, |l, w| {
        if used < cap {
            sc.sel[used] = (l, w);
        }
        used += 1;
    });
    let lam = sh.settings.inflation;
    if used == 0 {
        let g = lam.sqrt();
        for (x, &u) in xa.iter_mut().zip(&sc.u) {
            *x = mean + g * u;
        }
        return true;
    }
    if used < cap {
        return low_rank(sh, used, mean, sc, xa);
    }
    sc.a.fill(0.0);
    sc.b.fill(0.0);
    visit(sh, i, |l, w| accumulate(sh, l, w, &mut sc.a, &mut sc.b));
    let shift = (nf - 1.0) / lam;
    for c in 0..nn {
        sc.a[c * nn + c] += shift;
        for r in 0..c {
            sc.a[r * nn + c] = sc.a[c * nn + r];
        }
    }
    if !symmetric_eigen(&mut sc.a, &mut sc.eig, &mut sc.es, nn) || !(sc.eig[0] > 0.0) {
        return false;
    }
    // p = Vᵀ X', g = Vᵀ b; the mean increment Σ p_k g_k / Λ_k.
    let v = &sc.a;
    let mut incr = 0.0;
    for k in 0..nn {
        let col = &v[k * nn..(k + 1) * nn];
        let (mut pk, mut gk) = (0.0, 0.0);
        for r in 0..nn {
            pk += col[r] * sc.u[r];
            gk += col[r] * sc.b[r];
        }
        incr += pk * gk / sc.eig[k];
        sc.p[k] = pk * ((nf - 1.0) / sc.eig[k]).sqrt();
    }
    let centre = mean + incr;
    for (j, x) in xa.iter_mut().enumerate() {
        let mut t = 0.0;
        for k in 0..nn {
            t += v[k * nn + j] * sc.p[k];
        }
        *x = centre + t;
    }
    true
}

/// The small form of [`analyse_state`] over the `ll` readings in `sc.sel`.
fn low_rank(sh: &Shared<'_>, ll: usize, mean: f64, sc: &mut Scratch, xa: &mut [f64]) -> bool {
    let nn = sh.nn;
    let nf = nn as f64;
    // B (row k at bm[k * N ..]) and d̃.
    for k in 0..ll {
        let (l, w) = sc.sel[k];
        let r = (w * sh.inv_var[l]).sqrt();
        let y = &sh.yp[l * nn..(l + 1) * nn];
        for (d, &v) in sc.bm[k * nn..(k + 1) * nn].iter_mut().zip(y) {
            *d = r * v;
        }
        sc.b[k] = r * sh.innov[l];
    }
    // G = B Bᵀ (ll × ll, column-major) into `a`.
    for c in 0..ll {
        for r in 0..=c {
            let (x, y) = (&sc.bm[r * nn..(r + 1) * nn], &sc.bm[c * nn..(c + 1) * nn]);
            let mut t = 0.0;
            for j in 0..nn {
                t += x[j] * y[j];
            }
            sc.a[r + c * ll] = t;
            sc.a[c + r * ll] = t;
        }
    }
    if !symmetric_eigen(
        &mut sc.a[..ll * ll],
        &mut sc.eig[..ll],
        &mut sc.es[..3 * ll],
        ll,
    ) {
        return false;
    }
    let lam = sh.settings.inflation;
    let c = (nf - 1.0) / lam;
    let g0 = lam.sqrt();
    let top = sc.eig[ll - 1].max(0.0);
    let mut incr = 0.0;
    let mut kept = 0;
    for k in 0..ll {
        let sig = sc.eig[k];
        if !(sig > 1e-13 * top) {
            continue;
        }
        let uk = &sc.a[k * ll..(k + 1) * ll];
        let root = sig.sqrt();
        // v = Bᵀ u_k / σ^{1/2}, p = v·X', u_k·d̃.
        let v = &mut sc.vm[kept * nn..(kept + 1) * nn];
        v.fill(0.0);
        let mut ud = 0.0;
        for r in 0..ll {
            let f = uk[r] / root;
            ud += uk[r] * sc.b[r];
            for (d, &bv) in v.iter_mut().zip(&sc.bm[r * nn..(r + 1) * nn]) {
                *d += f * bv;
            }
        }
        let mut p = 0.0;
        for (a, b) in v.iter().zip(&sc.u) {
            p += a * b;
        }
        incr += p * root * ud / (c + sig);
        sc.p[kept] = p * (((nf - 1.0) / (c + sig)).sqrt() - g0);
        kept += 1;
    }
    let centre = mean + incr;
    for (j, x) in xa.iter_mut().enumerate() {
        let mut t = g0 * sc.u[j];
        for k in 0..kept {
            t += sc.p[k] * sc.vm[k * nn + j];
        }
        *x = centre + t;
    }
    xa.iter().all(|x| x.is_finite())
}

#[cfg(test)]
#[path = "local_tests.rs"]
mod tests;
