//! The calibrate request's own sections: `free` (what to fit, by JSON Pointer into the
//! request, with optional bounds), `likelihood` (`skip`) and `search` (`max_runs`,
//! `tolerance`, `starts`), checked once with the pointer of every fault.
//!
//! Each free number is searched in a transformed coordinate u on the whole real line, so
//! the quasi-Newton search needs no bound handling of its own (a bound is never crossed):
//! x = lo + eᵘ for a quantity bounded below (noise densities, standard deviations and
//! variances are bounded below by 0 without being told), x = hi − eᵘ for one bounded
//! above, x = lo + (hi − lo)/(1 + e⁻ᵘ) (the logistic map) for one bounded on both sides,
//! and x = u otherwise (common practice for bound-constrained maximum likelihood).

use crate::problem::{FieldError, Problem};
use serde_json::Value;

/// How one free number maps to its search coordinate.
#[derive(Debug, Clone, Copy, PartialEq)]
pub(crate) enum Map {
    /// x = u.
    Plain,
    /// x = lo + eᵘ.
    Above(f64),
    /// x = hi − eᵘ.
    Below(f64),
    /// x = lo + (hi − lo)/(1 + e⁻ᵘ).
    Between(f64, f64),
}

impl Map {
    /// The quantity at search coordinate `u`.
    pub(crate) fn x(self, u: f64) -> f64 {
        match self {
            Map::Plain => u,
            Map::Above(lo) => lo + u.exp(),
            Map::Below(hi) => hi - u.exp(),
            Map::Between(lo, hi) => lo + (hi - lo) / (1.0 + (-u).exp()),
        }
    }

    /// The search coordinate of `x` (inside the bounds).
    pub(crate) fn u(self, x: f64) -> f64 {
        match self {
            Map::Plain => x,
            Map::Above(lo) => (x - lo).ln(),
            Map::Below(hi) => (hi - x).ln(),
            Map::Between(lo, hi) => ((x - lo) / (hi - x)).ln(),
        }
    }

    /// dx/du at `u`, for the delta method.
    pub(crate) fn slope(self, u: f64) -> f64 {
        match self {
            Map::Plain => 1.0,
            Map::Above(_) => u.exp(),
            Map::Below(_) => -u.exp(),
            Map::Between(lo, hi) => {
                let s = 1.0 / (1.0 + (-u).exp());
                (hi - lo) * s * (1.0 - s)
            }
        }
    }

    /// Whether u is a log or logistic coordinate (unit steps are relative changes).
    pub(crate) fn scaled(self) -> bool {
        self != Map::Plain
    }
}

/// One number to fit.
#[derive(Debug, Clone)]
pub(crate) struct Free {
    /// RFC 6901 pointer into the request.
    pub pointer: String,
    /// Its search coordinate.
    pub map: Map,
    /// The request's value.
    pub start: f64,
    /// For an entry off the diagonal of a covariance matrix, its mirror entry, which
    /// gets the same value so that the matrix stays symmetric.
    pub mirror: Option<String>,
}

/// The `likelihood` and `search` settings.
#[derive(Debug, Clone, Copy)]
pub(crate) struct Settings {
    /// Readings (lines with an update) left out of the likelihood at the start.
    pub skip: u64,
    /// Most filter runs the whole search may make.
    pub max_runs: u64,
    /// Stop when the gradient's norm in search coordinates is below this times
    /// max(1, |log-likelihood|).
    pub tolerance: f64,
    /// Searches from this many starting points (the request's values first).
    pub starts: u64,
}

impl Default for Settings {
    fn default() -> Self {
        Self {
            skip: 0,
            max_runs: 400,
            tolerance: 1e-8,
            starts: 1,
        }
    }
}

/// Most free numbers in one request (each costs two runs per gradient).
pub(crate) const MAX_FREE: usize = 32;
/// Most starting points.
const MAX_STARTS: u64 = 16;

/// Fields that never enter the likelihood, or are not numbers a fit may move: a pointer
/// at or under one of these is refused with the reason.
const REFUSED: &[(&str, &str)] = &[
    (
        "/output",
        "the output section shapes the answer, not the likelihood",
    ),
    (
        "/measurements",
        "the readings are the data the fit explains, not a setting to fit",
    ),
    (
        "/filter/gate",
        "calibrate runs with the gate off (every reading counts in the likelihood)",
    ),
    (
        "/filter/reacquire",
        "calibrate runs with the gate off, so reacquisition never happens",
    ),
    (
        "/filter/max_gap",
        "max_gap only refuses lines; it does not enter the likelihood",
    ),
    (
        "/filter/late",
        "late-line handling does not enter the likelihood",
    ),
    (
        "/filter/ensemble/seed",
        "the seed is held fixed so that every run draws the same numbers",
    ),
    (
        "/filter/ensemble/members",
        "the ensemble size is a whole number, not a quantity to fit",
    ),
    (
        "/model/bounds",
        "state bounds are watched, not enforced, so they do not enter the likelihood",
    ),
    ("/prior/t", "the prior's time is not a quantity to fit"),
    (
        "/prior/step",
        "the ensemble step counter is not a quantity to fit",
    ),
    (
        "/prior/running",
        "the chain's running tallies do not enter this request's likelihood",
    ),
    (
        "/prior/members",
        "ensemble members are drawn states, not settings to fit",
    ),
    ("/time_zone", "the time zone is not a number"),
];

/// Whether the quantity at `pointer` is positive by its nature: a noise density, a
/// standard deviation, a random-walk density, or a diagonal entry of a covariance.
fn positive(pointer: &str) -> bool {
    let segs: Vec<&str> = pointer.split('/').skip(1).collect();
    match segs.as_slice() {
        ["model", "process_noise", "density", _]
        | ["model", "sensors", _, "std"]
        | ["model", "sensors", _, "std", _]
        | ["model", "parameters", _, "std" | "random_walk"]
        | ["prior", "std", _] => true,
        ["model", "process_noise", "density_matrix" | "covariance", i, j]
        | ["model", "sensors", _, "covariance", i, j]
        | ["prior", "covariance", i, j] => i == j,
        _ => false,
    }
}

/// Whether `pointer` is `base` or lies under it.
fn under(pointer: &str, base: &str) -> bool {
    pointer
        .strip_prefix(base)
        .is_some_and(|rest| rest.is_empty() || rest.starts_with('/'))
}

/// Check `free` against the request `req` (the estimate part, without the calibrate
/// sections): every pointer names an existing number that enters the likelihood.
pub(crate) fn free(v: &Value, req: &Value) -> Result<Vec<Free>, Problem> {
    let Some(obj) = v.as_object() else {
        return Err(Problem::field(
            "/free",
            "free is an object from JSON Pointers into this request to bounds ({} for none)",
        ));
    };
    if obj.is_empty() {
        return Err(Problem::field("/free", "name at least one number to fit"));
    }
    if obj.len() > MAX_FREE {
        return Err(Problem::field(
            "/free",
            format!(
                "at most {MAX_FREE} numbers can be fitted at once, not {}",
                obj.len()
            ),
        ));
    }
    let mut errors = Vec::new();
    let mut out = Vec::new();
    for (pointer, bounds) in obj {
        let at = format!("/free/{}", crate::problem::escape_token(pointer));
        match one(pointer, bounds, req, &at) {
            Ok(f) => out.push(f),
            Err(e) => errors.push(e),
        }
    }
    if errors.is_empty() {
        Ok(out)
    } else {
        Err(Problem::invalid(errors))
    }
}

/// One entry of `free`; errors are at `at` (the entry) or at the pointer itself.
fn one(pointer: &str, bounds: &Value, req: &Value, at: &str) -> Result<Free, FieldError> {
    if !pointer.starts_with('/') {
        return Err(FieldError::new(
            at,
            "each key of free is a JSON Pointer into this request, starting with '/'",
        ));
    }
    if let Some((_, why)) = REFUSED.iter().find(|(base, _)| under(pointer, base)) {
        return Err(FieldError::new(pointer, format!("cannot be fitted: {why}")));
    }
    let start = match req.pointer(pointer) {
        None => {
            return Err(FieldError::new(
                pointer,
                "free names a field that is not in the request; give it a starting value there",
            ))
        }
        Some(Value::Number(n)) => n.as_f64().unwrap_or(f64::NAN),
        Some(_) => {
            return Err(FieldError::new(
                pointer,
                "free names a field that is not a number; only numbers can be fitted",
            ))
        }
    };
    let Some(b) = bounds.as_object() else {
        return Err(FieldError::new(
            at,
            "bounds are an object {\"min\"?, \"max\"?}",
        ));
    };
    let mut lo = None;
    let mut hi = None;
    for (k, val) in b {
        let slot = match k.as_str() {
            "min" => &mut lo,
            "max" => &mut hi,
            _ => {
                return Err(FieldError::new(
                    format!("{at}/{}", crate::problem::escape_token(k)),
                    "unknown field; bounds take min and max",
                ))
            }
        };
        match val.as_f64().filter(|x| x.is_finite()) {
            Some(x) => *slot = Some(x),
            None => {
                return Err(FieldError::new(
                    format!("{at}/{k}"),
                    "expected a finite number",
                ))
            }
        }
    }
    if positive(pointer) && lo.is_none_or(|l| l < 0.0) {
        lo = Some(lo.unwrap_or(0.0).max(0.0));
    }
    let map = match (lo, hi) {
        (Some(l), Some(h)) if !(l < h) => {
            return Err(FieldError::new(at, "min must be below max"));
        }
        (Some(l), Some(h)) => Map::Between(l, h),
        (Some(l), None) => Map::Above(l),
        (None, Some(h)) => Map::Below(h),
        (None, None) => Map::Plain,
    };
    let inside = match map {
        Map::Plain => true,
        Map::Above(l) => start > l,
        Map::Below(h) => start < h,
        Map::Between(l, h) => start > l && start < h,
    };
    if !inside {
        return Err(FieldError::new(
            pointer,
            format!("the starting value {start} must lie strictly inside its bounds (min {}, max {}); a positive quantity starts above 0", fmt_bound(lo), fmt_bound(hi)),
        ));
    }
    Ok(Free {
        pointer: pointer.to_string(),
        map,
        start,
        mirror: mirror(pointer),
    })
}

/// The mirror of an entry off the diagonal of a covariance or density matrix
/// (`…/covariance/0/1` → `…/covariance/1/0`).
fn mirror(pointer: &str) -> Option<String> {
    let segs: Vec<&str> = pointer.split('/').skip(1).collect();
    let matrix = matches!(
        segs.as_slice(),
        [
            "model",
            "process_noise",
            "density_matrix" | "covariance",
            ..
        ] | ["model", "sensors", _, "covariance", ..]
            | ["prior", "covariance", ..]
    );
    match segs.as_slice() {
        [head @ .., i, j] if matrix && i != j && head.len() >= 2 => {
            Some(format!("/{}/{j}/{i}", head.join("/")))
        }
        _ => None,
    }
}

fn fmt_bound(b: Option<f64>) -> String {
    b.map_or_else(|| "none".to_string(), |x| x.to_string())
}

/// Read `likelihood` and `search` (both optional).
pub(crate) fn settings(
    likelihood: Option<&Value>,
    search: Option<&Value>,
) -> Result<Settings, Problem> {
    let mut s = Settings::default();
    let mut errors = Vec::new();
    let fields = |v: Option<&Value>, name: &str, known: &[&str], errors: &mut Vec<FieldError>| {
        let v = v?;
        let Some(o) = v.as_object() else {
            errors.push(FieldError::new(format!("/{name}"), "expected an object"));
            return None;
        };
        for k in o.keys() {
            if !known.contains(&k.as_str()) {
                errors.push(FieldError::new(
                    format!("/{name}/{}", crate::problem::escape_token(k)),
                    format!("unknown field; {name} takes {}", known.join(", ")),
                ));
            }
        }
        Some(o.clone())
    };
    let whole = |o: &serde_json::Map<String, Value>,
                 ptr: &str,
                 key: &str,
                 lo: u64,
                 hi: u64,
                 errors: &mut Vec<FieldError>|
     -> Option<u64> {
        let v = o.get(key)?;
        match v.as_u64().filter(|k| (lo..=hi).contains(k)) {
            Some(k) => Some(k),
            None => {
                errors.push(FieldError::new(
                    format!("{ptr}/{key}"),
                    format!("expected a whole number from {lo} to {hi}"),
                ));
                None
            }
        }
    };
    if let Some(o) = fields(likelihood, "likelihood", &["skip"], &mut errors) {
        if let Some(k) = whole(&o, "/likelihood", "skip", 0, u64::MAX, &mut errors) {
            s.skip = k;
        }
    }
    if let Some(o) = fields(
        search,
        "search",
        &["max_runs", "tolerance", "starts"],
        &mut errors,
    ) {
        if let Some(k) = whole(&o, "/search", "max_runs", 1, 1_000_000, &mut errors) {
            s.max_runs = k;
        }
        if let Some(k) = whole(&o, "/search", "starts", 1, MAX_STARTS, &mut errors) {
            s.starts = k;
        }
        if let Some(v) = o.get("tolerance") {
            match v.as_f64().filter(|t| *t > 0.0 && *t < 1.0) {
                Some(t) => s.tolerance = t,
                None => errors.push(FieldError::new(
                    "/search/tolerance",
                    "expected a number above 0 and below 1",
                )),
            }
        }
    }
    if errors.is_empty() {
        Ok(s)
    } else {
        Err(Problem::invalid(errors))
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use serde_json::json;

    #[test]
    fn maps_go_there_and_back_and_their_slopes_match_a_difference() {
        for (map, x) in [
            (Map::Plain, -0.3),
            (Map::Above(0.0), 2.5e-3),
            (Map::Above(1.0), 4.0),
            (Map::Below(2.0), -7.0),
            (Map::Between(-1.0, 3.0), 0.2),
        ] {
            let u = map.u(x);
            assert!((map.x(u) - x).abs() <= 1e-12 * x.abs().max(1.0), "{map:?}");
            let h = 1e-6;
            let fd = (map.x(u + h) - map.x(u - h)) / (2.0 * h);
            assert!(
                (fd - map.slope(u)).abs() <= 1e-6 * fd.abs().max(1.0),
                "{map:?}"
            );
        }
    }

    #[test]
    fn pointers_are_checked_against_the_request() {
        let req = json!({"model": {"sensors": {"gauge": {"std": 2.0, "measures": "level"}},
                                   "process_noise": {"density": {"level": 1.0}}},
                         "filter": {"method": "ekf", "gate": {"probability": 0.99}},
                         "prior": {"t": 0, "mean": {"level": 0}}});
        let ok = free(
            &json!({"/model/sensors/gauge/std": {}, "/model/process_noise/density/level": {"max": 9}}),
            &req,
        )
        .unwrap();
        assert_eq!(ok[0].map, Map::Above(0.0));
        assert_eq!(ok[1].map, Map::Between(0.0, 9.0));
        for (p, what) in [
            ("/model/sensors/gauge/bias", "not in the request"),
            ("/model/sensors/gauge/measures", "not a number"),
            ("/filter/gate/probability", "gate off"),
            ("/prior/t", "not a quantity"),
        ] {
            let e = free(&json!({ p: {} }), &req).unwrap_err();
            assert_eq!(e.errors[0].pointer, p);
            assert!(e.errors[0].detail.contains(what), "{}", e.errors[0].detail);
        }
        assert_eq!(
            mirror("/model/process_noise/covariance/0/1").as_deref(),
            Some("/model/process_noise/covariance/1/0")
        );
        assert_eq!(mirror("/prior/covariance/1/1"), None);
        assert_eq!(mirror("/model/sensors/gauge/std"), None);
        let e = free(&json!({"/model/sensors/gauge/std": {"min": 3}}), &req).unwrap_err();
        assert!(e.errors[0].detail.contains("inside its bounds"));
    }
}
