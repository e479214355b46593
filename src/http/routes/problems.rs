//! `GET /problems/{slug}`: the page each problem's `type` URI points at. Every answer's
//! `type` is a relative reference such as `/problems/invalid-request` (RFC 9457 section
//! 3.1.1), so it resolves against the service that sent it; the page says, for a person,
//! what the problem means and what to do. Pages are made from the one table of kinds,
//! [`ProblemKind::about`], so a kind cannot be answered without its page.

use super::route::{mount, Route};
use crate::http::problem::problem_response;
use crate::http::state::AppState;
use crate::problem::{Problem, ProblemKind, PROBLEM_PAGES};
use axum::extract::Path;
use axum::http::{header, HeaderValue};
use axum::response::{IntoResponse, Response};
use axum::routing::get;
use axum::Router;

/// `GET /problems/{slug}`.
pub(super) const ROUTES: &[Route] = &[Route {
    method: "GET",
    path: "/problems/{slug}",
    keyed: false,
    handler: || get(page),
}];

/// This group's router.
pub fn router() -> Router<AppState> {
    mount(ROUTES)
}

async fn page(Path(slug): Path<String>) -> Response {
    match ProblemKind::from_slug(&slug) {
        Some(kind) => {
            let mut res = html(kind).into_response();
            res.headers_mut().insert(
                header::CONTENT_TYPE,
                HeaderValue::from_static("text/html; charset=utf-8"),
            );
            res
        }
        None => problem_response(&Problem::new(
            ProblemKind::NotFound,
            format!("no problem kind is called '{}'", slug.escape_debug()),
        )),
    }
}

/// The page of one kind. The table's texts are our own and hold no markup characters,
/// so they go in as they are.
pub(super) fn html(kind: ProblemKind) -> String {
    let a = kind.about();
    let mut others = String::new();
    for k in ProblemKind::ALL {
        let o = k.about();
        others.push_str(&format!(
            "<li><a href=\"{PROBLEM_PAGES}/{}\">{}</a> ({})</li>",
            o.slug, o.title, o.status
        ));
    }
    format!(
        "<!doctype html>\n<html lang=\"en\"><head><meta charset=\"utf-8\">\
         <title>tacit: {title}</title></head><body>\n\
         <h1>{title}</h1>\n<p>HTTP status {status}; problem type <code>{PROBLEM_PAGES}/{slug}</code>.</p>\n\
         <h2>What it means</h2>\n<p>{means}.</p>\n\
         <h2>What to do</h2>\n<p>{to_do}.</p>\n\
         <h2>Every kind of problem</h2>\n<ul>{others}</ul>\n</body></html>\n",
        title = a.title,
        status = a.status,
        slug = a.slug,
        means = a.means,
        to_do = a.to_do,
    )
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn every_kind_has_a_page_with_its_status_title_and_advice() {
        for k in ProblemKind::ALL {
            let a = k.about();
            let page = html(*k);
            assert!(page.contains(&format!("<h1>{}</h1>", a.title)), "{page}");
            assert!(
                page.contains(&format!("HTTP status {}", a.status)),
                "{page}"
            );
            assert!(page.contains(a.to_do), "{page}");
            // The texts go in unescaped, so they must hold no markup.
            for text in [a.title, a.means, a.to_do] {
                assert!(!text.contains(['<', '>', '&', '"']), "{text}");
            }
            assert_eq!(ProblemKind::from_slug(a.slug), Some(*k));
        }
    }
}
