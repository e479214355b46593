//! The project's own body extractor: checks the media type and the size, then hands the
//! raw bytes to the job. Every rejection leaves as problem+json, never as the framework's
//! plain-text errors.
//!
//! The bytes are not parsed here: the job parses them once, with pointers into the
//! request, so a syntax error (400) comes from the same parser that reports field errors
//! (422). Parsing twice would cost a measurable share of a large batch's time.

use super::jobs::take_slot;
use super::problem::problem_response;
use super::state::{AppState, JobSlot};
use crate::problem::{Problem, ProblemKind};
use axum::body::Body;
use axum::extract::{FromRequest, Request};
use axum::http::{header, HeaderMap};
use axum::response::Response;
use bytes::{Bytes, BytesMut};
use futures_util::StreamExt;

/// A request body of media type `application/json`, read whole within the body limit,
/// and the job slot it runs under. The slot is taken first: when none is free (or the
/// server is shutting down) the 503 goes out before a byte of the body is read, so
/// turned-away uploads cost neither memory nor bandwidth.
#[derive(Debug)]
pub struct JsonBody(pub Bytes, pub JobSlot);

impl FromRequest<AppState> for JsonBody {
    type Rejection = Response;

    async fn from_request(req: Request, state: &AppState) -> Result<Self, Self::Rejection> {
        require_media_type(req.headers(), &["application/json"], "application/json")
            .map_err(|p| problem_response(&p))?;
        let route = req.uri().path().to_string();
        let id = req
            .headers()
            .get(super::app::REQUEST_ID)
            .and_then(|v| v.to_str().ok());
        let slot = take_slot(state, &route, id).map_err(|r| *r)?;
        let limit = state.limits().max_body_bytes;
        let declared = content_length(req.headers());
        let bytes = read_limited(req.into_body(), limit, declared)
            .await
            .map_err(|p| problem_response(&p))?;
        Ok(Self(bytes, slot))
    }
}

/// The media type of a request (`type/subtype`, lower case, parameters dropped).
pub(super) fn media_type(headers: &HeaderMap) -> Option<String> {
    let v = headers.get(header::CONTENT_TYPE)?.to_str().ok()?;
    let essence = v.split(';').next().unwrap_or("").trim();
    Some(essence.to_ascii_lowercase())
}

/// 415 unless the request's media type is one of `accepted`; `expected` names the
/// preferred one in the message.
pub(super) fn require_media_type(
    headers: &HeaderMap,
    accepted: &[&str],
    expected: &str,
) -> Result<(), Problem> {
    match media_type(headers) {
        Some(m) if accepted.contains(&m.as_str()) => Ok(()),
        Some(m) => Err(Problem::new(
            ProblemKind::UnsupportedMediaType,
            format!("content-type is {m}; this endpoint expects {expected}"),
        )),
        None => Err(Problem::new(
            ProblemKind::UnsupportedMediaType,
            format!("content-type is missing; this endpoint expects {expected}"),
        )),
    }
}

/// The declared `Content-Length`, if present and readable.
pub(super) fn content_length(headers: &HeaderMap) -> Option<u64> {
    headers
        .get(header::CONTENT_LENGTH)?
        .to_str()
        .ok()?
        .parse()
        .ok()
}

/// The 413 for a body over `limit` bytes.
pub(super) fn too_large(limit: usize) -> Problem {
    Problem::new(
        ProblemKind::TooLarge,
        format!("the request body exceeds the limit of {limit} bytes"),
    )
}

/// Read a whole body, refusing it as soon as it passes `limit` (a declared length over
/// the limit is refused before reading anything). The buffer is reserved once from the
/// declared length, so a large batch is not copied while it grows.
pub(super) async fn read_limited(
    body: Body,
    limit: usize,
    declared: Option<u64>,
) -> Result<Bytes, Problem> {
    if let Some(n) = declared {
        if n > limit as u64 {
            return Err(too_large(limit));
        }
    }
    let mut stream = body.into_data_stream();
    let first = match stream.next().await {
        None => return Ok(Bytes::new()),
        Some(chunk) => chunk.map_err(unreadable)?,
    };
    // A body that arrives as one frame needs no copy at all.
    let mut buf: Option<BytesMut> = None;
    let mut only = Some(first);
    while let Some(chunk) = stream.next().await {
        let chunk = chunk.map_err(unreadable)?;
        let b = buf.get_or_insert_with(|| {
            let cap = declared.map_or(0, |n| n as usize).min(limit);
            let mut b = BytesMut::with_capacity(cap);
            if let Some(f) = only.take() {
                b.extend_from_slice(&f);
            }
            b
        });
        if b.len() + chunk.len() > limit {
            return Err(too_large(limit));
        }
        b.extend_from_slice(&chunk);
    }
    match (buf, only) {
        (Some(b), _) => Ok(b.freeze()),
        (None, Some(f)) if f.len() > limit => Err(too_large(limit)),
        (None, Some(f)) => Ok(f),
        (None, None) => Ok(Bytes::new()),
    }
}

fn unreadable(e: axum::Error) -> Problem {
    tracing::debug!(error = %e, "request body could not be read");
    Problem::new(
        ProblemKind::MalformedJson,
        "the request body could not be read to its end",
    )
}
