//! `POST /v1/check` on a family model (issue 13): its dimensions, and which elements no
//! sensor reaches within the local update's radius, as index ranges. A dense rank test
//! over 10⁵ states is neither affordable nor what the local update needs: it analyses
//! each element with the readings within `radius` (`filter.ensemble.radius`, when the
//! request carries a filter section; otherwise only elements read directly count), so an
//! element with none of them in reach keeps its forecast, whatever the readings.

use crate::config::Limits;
use crate::formula::Boundary;
use crate::job::{Done, RunStats};
use crate::model::FamilyModel;
use crate::problem::Problem;
use crate::request::envelope::{self, Envelope};
use crate::request::validate;
use serde_json::{json, Value};

/// Whether element `i` of families of `size` lies within `radius` (strictly, as the
/// Gaspari–Cohn taper is zero from `radius` on) of a read element; `read` holds one flag
/// per element, over every sensor of every family.
fn reached(read: &[bool], radius: f64, periodic: bool) -> Vec<bool> {
    let size = read.len();
    // Largest whole distance with a positive weight: d < radius.
    let reach = if radius.is_finite() {
        (radius.ceil() as usize).saturating_sub(1).min(size)
    } else {
        size
    };
    let mut out = vec![false; size];
    for (j, _) in read.iter().enumerate().filter(|(_, r)| **r) {
        for d in 0..=reach {
            for i in [j as i64 - d as i64, (j + d) as i64] {
                let k = if periodic {
                    Some(i.rem_euclid(size as i64) as usize)
                } else {
                    usize::try_from(i).ok().filter(|&k| k < size)
                };
                if let Some(k) = k {
                    out[k] = true;
                }
            }
        }
    }
    out
}

/// Runs of `false` in `flags` as inclusive `[first, last]` index pairs.
fn gaps(flags: &[bool]) -> Vec<[usize; 2]> {
    let mut out = Vec::new();
    let mut start = None;
    for (i, &f) in flags.iter().enumerate() {
        match (f, start) {
            (false, None) => start = Some(i),
            (true, Some(s)) => {
                out.push([s, i - 1]);
                start = None;
            }
            _ => {}
        }
    }
    if let Some(s) = start {
        out.push([s, flags.len() - 1]);
    }
    out
}

/// The answer for a checked family model with the local radius `radius` (`None`: only
/// elements read directly count as reached).
fn answer(fm: &FamilyModel, radius: Option<f64>) -> Value {
    let size = fm.set.shapes[0].size;
    let periodic = fm.set.shapes[0].boundary == Boundary::Periodic;
    let mut read = vec![false; size];
    for s in &fm.sensors {
        for &e in &s.elements {
            read[e] = true;
        }
    }
    let flags = reached(&read, radius.unwrap_or(1.0), periodic);
    let unreached = gaps(&flags);
    let count: usize = unreached.iter().map(|[a, b]| b - a + 1).sum();
    let families: Vec<Value> = fm
        .set
        .shapes
        .iter()
        .map(|s| {
            let boundary = match s.boundary {
                Boundary::Periodic => json!("periodic"),
                Boundary::Fixed(_) => json!("fixed"),
            };
            json!({"name": s.name, "size": s.size, "boundary": boundary})
        })
        .collect();
    let sensors: Vec<Value> = fm
        .sensors
        .iter()
        .map(|s| json!({"name": s.name, "family": fm.set.shapes[s.family].name, "dimension": s.elements.len()}))
        .collect();
    let mut warnings = Vec::new();
    if count > 0 {
        warnings.push(format!(
            "{count} of {size} elements have no reading within the radius: the local update leaves them at their forecast"
        ));
    }
    json!({
        "families": families,
        "sensors": sensors,
        "dimensions": {"states": fm.n(), "measurement_size": fm.max_readings()},
        "reach": {
            "radius": radius,
            "reached": size - count,
            "unreached": unreached,
        },
        "warnings": warnings,
    })
}

/// `POST /v1/check` when the model declares `families`.
pub(super) fn check(env: &Envelope<'_>, model: &Value, limits: &Limits) -> Result<Done, Problem> {
    let fm = validate::check_families(model, "/model", limits)
        .map_err(|e| Problem::invalid(e.into_iter().map(Into::into).collect()))?;
    let radius = match envelope::optional_section(env.filter, "filter")? {
        Some(f) => match f.pointer("/ensemble/radius") {
            None => None,
            Some(r) => match r.as_f64() {
                Some(r) if r.is_finite() && r > 0.0 => Some(r),
                _ => {
                    return Err(Problem::field(
                        "/filter/ensemble/radius",
                        "expected a positive number",
                    ))
                }
            },
        },
        None => None,
    };
    let body = serde_json::to_vec(&answer(&fm, radius)).unwrap_or_default();
    Ok(Done {
        body,
        stats: RunStats::default(),
    })
}

#[cfg(test)]
mod tests {
    use super::*;

    // Counted by hand: on a ring of 10 read at 0 and 5, radius 2 reaches distance 1
    // (9, 0, 1 and 4, 5, 6); radius 3 reaches distance 2 (8 .. 2 and 3 .. 7: every
    // element); without the wrap, 7 .. 9 stay out at radius 2; radius 1 reaches only the
    // elements read.
    #[test]
    fn reach_counts_whole_distances_below_the_radius() {
        let mut read = vec![false; 10];
        read[0] = true;
        read[5] = true;
        assert_eq!(gaps(&reached(&read, 2.0, true)), vec![[2, 3], [7, 8]]);
        assert_eq!(gaps(&reached(&read, 3.0, true)), Vec::<[usize; 2]>::new());
        assert_eq!(gaps(&reached(&read, 2.0, false)), vec![[2, 3], [7, 9]]);
        assert_eq!(gaps(&reached(&read, 1.0, true)), vec![[1, 4], [6, 9]]);
    }
}
