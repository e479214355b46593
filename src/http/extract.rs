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
use axum::extract::{DefaultBodyLimit, FromRequest, Request};
use axum::http::{header, HeaderMap};
use axum::response::Response;
use bytes::{Bytes, BytesMut};
use futures_util::StreamExt;
use tower::{Layer, ServiceExt};

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

/// What a batch route (`/v1/estimate`, `/v1/smooth`, `/v1/calibrate`) was sent.
#[derive(Debug)]
pub(crate) enum Posted {
    /// `application/json`: the request as usual.
    Json(Bytes),
    /// `multipart/form-data`: the `request` part (JSON without `measurements`, with a `csv`
    /// section) and the `readings` part (a historian CSV).
    Csv {
        /// The `request` part.
        request: Bytes,
        /// The `readings` part.
        readings: Bytes,
    },
}

/// A JSON or multipart body and its job slot, with [`JsonBody`]'s rules for both: the slot
/// is taken before a byte is read and the whole body (every part) is within
/// `max_body_bytes`. Any other media type is a 415.
#[derive(Debug)]
pub(crate) struct BatchBody(pub(crate) Posted, pub(crate) JobSlot);

impl FromRequest<AppState> for BatchBody {
    type Rejection = Response;

    async fn from_request(req: Request, state: &AppState) -> Result<Self, Self::Rejection> {
        require_media_type(
            req.headers(),
            &["application/json", "multipart/form-data"],
            "application/json, or multipart/form-data with request and readings parts",
        )
        .map_err(|p| problem_response(&p))?;
        let multipart = media_type(req.headers()).as_deref() == Some("multipart/form-data");
        let route = req.uri().path().to_string();
        let id = req
            .headers()
            .get(super::app::REQUEST_ID)
            .and_then(|v| v.to_str().ok());
        let slot = take_slot(state, &route, id).map_err(|r| *r)?;
        let limit = state.limits().max_body_bytes;
        let declared = content_length(req.headers());
        let (parts, body) = req.into_parts();
        let bytes = read_limited(body, limit, declared)
            .await
            .map_err(|p| problem_response(&p))?;
        if !multipart {
            return Ok(Self(Posted::Json(bytes), slot));
        }
        let req = Request::from_parts(parts, Body::from(bytes));
        let posted = read_parts(req, state)
            .await
            .map_err(|p| problem_response(&p))?;
        Ok(Self(posted, slot))
    }
}

/// The `request` and `readings` parts of a multipart body already in memory.
async fn read_parts(req: Request, state: &AppState) -> Result<Posted, Problem> {
    let bad = |e: axum::extract::multipart::MultipartError| {
        Problem::new(
            ProblemKind::MalformedJson,
            format!("the multipart body could not be read: {}", e.body_text()),
        )
    };
    // The body is already read within `max_body_bytes`: axum's own 2 MB default for
    // multipart bodies is lifted (its layer only marks the request).
    let unlimited = DefaultBodyLimit::disable().layer(tower::service_fn(|r: Request| async move {
        Ok::<_, std::convert::Infallible>(r)
    }));
    let req = match unlimited.oneshot(req).await {
        Ok(r) => r,
        Err(never) => match never {},
    };
    let mut form = axum::extract::Multipart::from_request(req, state)
        .await
        .map_err(|e| {
            Problem::new(
                ProblemKind::MalformedJson,
                format!("the multipart body could not be read: {}", e.body_text()),
            )
        })?;
    let (mut request, mut readings) = (None, None);
    while let Some(field) = form.next_field().await.map_err(bad)? {
        let name = field.name().unwrap_or("").to_string();
        let slot = match name.as_str() {
            "request" => &mut request,
            "readings" => &mut readings,
            other => {
                return Err(Problem::field(
                    "",
                    format!("unknown part '{other}': send a 'request' part (JSON) and a 'readings' part (CSV)"),
                ))
            }
        };
        if slot.is_some() {
            return Err(Problem::field(
                format!("/{name}"),
                format!("the '{name}' part is given twice"),
            ));
        }
        *slot = Some(field.bytes().await.map_err(bad)?);
    }
    match (request, readings) {
        (Some(request), Some(readings)) => Ok(Posted::Csv { request, readings }),
        (None, _) => Err(Problem::field(
            "",
            "missing the 'request' part: the JSON request without measurements, with a csv section",
        )),
        (_, None) => Err(Problem::field(
            "/readings",
            "missing the 'readings' part: the CSV file of readings",
        )),
    }
}
