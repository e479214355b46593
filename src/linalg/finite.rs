//! The finiteness check that keeps NaN and infinities out of every answer.
//!
//! A value is finite when it is neither NaN nor ±∞ (IEEE 754-2019, §3.4 and §6, from
//! memory). The filters ask this of whole states and covariances after every step, so the
//! check is written to vectorise; `f64::is_finite` applied entry by entry is its oracle.

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

#[cfg(test)]
mod tests {
    use super::*;

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
}
