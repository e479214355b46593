//! The service's own browser page: `GET /` (one HTML file), `GET /page/{asset}` (its
//! script and style sheet) and `GET /page/demo/{name}` (the demo plants as ready requests).
//!
//! Everything is embedded in the binary with `include_str!` from `page/` and `demo-data/`,
//! so the page needs no build step, no files beside the binary and no outside network. The
//! page calls the API from the same origin, so no CORS setup is needed. Its content
//! security policy allows this origin only (no inline script, no other host). The demo
//! files are embedded here rather than taken from `crate::demo`, because the demo layer
//! drives the web layer and the web layer may not import it (tests/architecture.rs).

use super::route::{mount, Route};
use crate::http::problem::problem_response;
use crate::http::state::AppState;
use crate::problem::{Problem, ProblemKind};
use axum::extract::Path;
use axum::http::{header, HeaderValue};
use axum::response::{IntoResponse, Response};
use axum::routing::get;
use axum::Router;

/// `GET /`, `GET /page/{asset}`, `GET /page/demo/{name}`.
pub(super) const ROUTES: &[Route] = &[
    Route {
        method: "GET",
        path: "/",
        keyed: false,
        handler: || get(index),
    },
    Route {
        method: "GET",
        path: "/page/{asset}",
        keyed: false,
        handler: || get(asset),
    },
    Route {
        method: "GET",
        path: "/page/demo/{name}",
        keyed: false,
        handler: || get(demo),
    },
];

/// This group's router.
pub fn router() -> Router<AppState> {
    mount(ROUTES)
}

/// Same origin only: scripts, styles, fetches and images come from this server; images may
/// also be `blob:`/`data:` URLs the page makes itself (exports, the plots' canvases).
const CSP: &str = "default-src 'self'; script-src 'self'; style-src 'self'; \
                   img-src 'self' data: blob:; connect-src 'self'; object-src 'none'; \
                   base-uri 'none'; form-action 'none'; frame-ancestors 'none'";

const INDEX: &str = include_str!("../../../page/index.html");

/// The page's files other than the HTML: name, media type, text.
const ASSETS: &[(&str, &str, &str)] = &[
    (
        "app.js",
        "text/javascript; charset=utf-8",
        include_str!("../../../page/app.js"),
    ),
    (
        "plot.js",
        "text/javascript; charset=utf-8",
        include_str!("../../../page/plot.js"),
    ),
    (
        "csv.js",
        "text/javascript; charset=utf-8",
        include_str!("../../../page/csv.js"),
    ),
    (
        "style.css",
        "text/css; charset=utf-8",
        include_str!("../../../page/style.css"),
    ),
];

macro_rules! demo_file {
    ($dir:literal, $file:literal) => {
        include_str!(concat!("../../../demo-data/", $dir, "/", $file))
    };
}

/// One demo plant as the page needs it.
struct Demo {
    name: &'static str,
    title: &'static str,
    /// `[state, unit]` pairs as JSON (the request's model carries no units).
    units: &'static str,
    model: &'static str,
    filter: &'static str,
    prior: &'static str,
    measurements: &'static str,
    truth: &'static str,
    /// `simulate.json`: the schedule, inputs and reading faults the readings were made
    /// with, so the page's "simulate" makes new readings of the same kind.
    simulate: &'static str,
}

const DEMOS: &[Demo] = &[
    Demo {
        name: "crane",
        title: "Overhead crane trolley: encoder reads position only",
        units: r#"{"position": "m", "velocity": "m/s"}"#,
        model: demo_file!("crane", "model.json"),
        filter: demo_file!("crane", "filter.json"),
        prior: demo_file!("crane", "prior.json"),
        measurements: demo_file!("crane", "measurements.json"),
        truth: demo_file!("crane", "truth.json"),
        simulate: demo_file!("crane", "simulate.json"),
    },
    Demo {
        name: "water-tower",
        title: "Water tower: level gauge only, draw-off flow unknown",
        units: r#"{"level": "m", "draw_off": "L/s"}"#,
        model: demo_file!("water-tower", "model.json"),
        filter: demo_file!("water-tower", "filter.json"),
        prior: demo_file!("water-tower", "prior.json"),
        measurements: demo_file!("water-tower", "measurements.json"),
        truth: demo_file!("water-tower", "truth.json"),
        simulate: demo_file!("water-tower", "simulate.json"),
    },
    Demo {
        name: "kiln",
        title: "Kiln: thermocouple only, heat-loss coefficient drifting",
        units: r#"{"temperature": "°C", "loss": "kW/K"}"#,
        model: demo_file!("kiln", "model.json"),
        filter: demo_file!("kiln", "filter.json"),
        prior: demo_file!("kiln", "prior.json"),
        measurements: demo_file!("kiln", "measurements.json"),
        truth: demo_file!("kiln", "truth.json"),
        simulate: demo_file!("kiln", "simulate.json"),
    },
];

fn with_type(body: impl IntoResponse, media: &'static str) -> Response {
    let mut res = body.into_response();
    let h = res.headers_mut();
    h.insert(header::CONTENT_TYPE, HeaderValue::from_static(media));
    h.insert(
        header::X_CONTENT_TYPE_OPTIONS,
        HeaderValue::from_static("nosniff"),
    );
    res
}

async fn index() -> Response {
    let mut res = with_type(INDEX, "text/html; charset=utf-8");
    res.headers_mut().insert(
        header::CONTENT_SECURITY_POLICY,
        HeaderValue::from_static(CSP),
    );
    res
}

async fn asset(Path(name): Path<String>) -> Response {
    match ASSETS.iter().find(|(n, _, _)| *n == name) {
        Some((_, media, text)) => with_type(*text, media),
        None => not_found(format!("the page has no file '{}'", name.escape_debug())),
    }
}

async fn demo(Path(name): Path<String>) -> Response {
    match DEMOS.iter().find(|d| d.name == name) {
        Some(d) => with_type(demo_json(d), "application/json"),
        None => not_found(format!(
            "no demo plant is called '{}'; there are crane, water-tower and kiln",
            name.escape_debug()
        )),
    }
}

/// The demo as `{name, title, units, request, truth, simulate}`: `request` is what
/// `/v1/estimate` takes, `truth` the simulated states the readings were made from (for the
/// plots), `simulate` the settings they were simulated with (without model and prior).
fn demo_json(d: &Demo) -> String {
    let name = serde_json::Value::from(d.name);
    let title = serde_json::Value::from(d.title);
    format!(
        "{{\"name\": {name}, \"title\": {title}, \"units\": {units},\n\"request\": {{\"model\": {model},\n\"filter\": {filter},\n\"prior\": {prior},\n\"measurements\": {measurements}}},\n\"truth\": {truth},\n\"simulate\": {simulate}}}\n",
        units = d.units,
        model = d.model.trim(),
        filter = d.filter.trim(),
        prior = d.prior.trim(),
        measurements = d.measurements.trim(),
        truth = d.truth.trim(),
        simulate = d.simulate.trim(),
    )
}

fn not_found(detail: String) -> Response {
    problem_response(&Problem::new(ProblemKind::NotFound, detail))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn every_demo_is_valid_json_with_a_request_and_its_truth() {
        for d in DEMOS {
            let v: serde_json::Value = serde_json::from_str(&demo_json(d)).expect(d.name);
            for key in ["model", "filter", "prior", "measurements"] {
                assert!(v["request"][key].is_object() || v["request"][key].is_array());
            }
            // Each state of the model has a unit for the plots' axis labels.
            for s in v["request"]["model"]["states"].as_array().expect(d.name) {
                assert!(v["units"][s.as_str().expect("name")].is_string(), "{s}");
            }
            assert_eq!(
                v["truth"].as_array().map(Vec::len),
                v["request"]["measurements"].as_array().map(Vec::len),
                "{}",
                d.name
            );
        }
    }

    #[test]
    fn the_page_loads_only_files_it_serves() {
        for src in [
            "/page/app.js",
            "/page/plot.js",
            "/page/csv.js",
            "/page/style.css",
        ] {
            assert!(INDEX.contains(src), "{src}");
        }
        assert!(
            !INDEX.contains("<script>"),
            "inline script would break the CSP"
        );
        assert!(!INDEX.contains("http://") && !INDEX.contains("https://"));
    }
}
