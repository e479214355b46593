//! The one error shape every failure leaves as: RFC 9457 problem details with JSON Pointers.
//!
//! The core builds [`Problem`]s without knowing about HTTP; the web layer only maps
//! `status` onto the response. Each kind of failure is declared once in [`ProblemKind`].

use serde::Serialize;

/// One invalid field of a request, located by an RFC 6901 JSON Pointer.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct FieldError {
    /// JSON Pointer into the request body (`/model/sensors/encoder/std`).
    pub pointer: String,
    /// What is wrong there, lower case, actionable.
    pub detail: String,
    /// 1-based column inside a formula string, for formula errors.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub column: Option<usize>,
}

impl FieldError {
    /// A field error without a formula column.
    pub fn new(pointer: impl Into<String>, detail: impl Into<String>) -> Self {
        Self {
            pointer: pointer.into(),
            detail: detail.into(),
            column: None,
        }
    }
}

/// The kinds of failure, each with its status and title side by side.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
#[non_exhaustive]
pub enum ProblemKind {
    /// The body is not JSON (syntax error, truncated).
    MalformedJson,
    /// The body is larger than the configured limit.
    TooLarge,
    /// The body is not `application/json` (or NDJSON for the stream).
    UnsupportedMediaType,
    /// Well-formed JSON that does not describe a valid request.
    InvalidRequest,
    /// The filter could not continue (non-finite value, covariance lost definiteness).
    NumericalFailure,
    /// The request ran past the per-request compute deadline.
    DeadlineExceeded,
    /// Missing or wrong API key.
    Unauthorized,
    /// Too many requests in flight; retry later.
    Overloaded,
    /// No such route.
    NotFound,
    /// Wrong HTTP method for the route.
    MethodNotAllowed,
    /// A bug: the details went to the log, not to the client.
    Internal,
}

impl ProblemKind {
    /// HTTP status and human title of this kind.
    pub fn status_title(self) -> (u16, &'static str) {
        match self {
            Self::MalformedJson => (400, "malformed JSON"),
            Self::TooLarge => (413, "request too large"),
            Self::UnsupportedMediaType => (415, "unsupported media type"),
            Self::InvalidRequest => (422, "invalid request"),
            Self::NumericalFailure => (422, "numerical failure"),
            Self::DeadlineExceeded => (503, "compute deadline exceeded"),
            Self::Unauthorized => (401, "unauthorized"),
            Self::Overloaded => (503, "overloaded"),
            Self::NotFound => (404, "not found"),
            Self::MethodNotAllowed => (405, "method not allowed"),
            Self::Internal => (500, "internal error"),
        }
    }

    /// Stable identifier used in the problem's `type` URI.
    pub fn slug(self) -> &'static str {
        match self {
            Self::MalformedJson => "malformed-json",
            Self::TooLarge => "too-large",
            Self::UnsupportedMediaType => "unsupported-media-type",
            Self::InvalidRequest => "invalid-request",
            Self::NumericalFailure => "numerical-failure",
            Self::DeadlineExceeded => "deadline-exceeded",
            Self::Unauthorized => "unauthorized",
            Self::Overloaded => "overloaded",
            Self::NotFound => "not-found",
            Self::MethodNotAllowed => "method-not-allowed",
            Self::Internal => "internal",
        }
    }
}

/// An RFC 9457 problem document.
#[derive(Debug, Clone, PartialEq, Serialize)]
pub struct Problem {
    /// URI naming the kind of problem.
    #[serde(rename = "type")]
    pub type_uri: String,
    /// Short, fixed summary of the kind.
    pub title: String,
    /// HTTP status code.
    pub status: u16,
    /// What happened in this request.
    pub detail: String,
    /// The invalid fields, when the request itself was at fault.
    #[serde(skip_serializing_if = "Vec::is_empty")]
    pub errors: Vec<FieldError>,
}

impl Problem {
    /// A problem of `kind` with a request-specific detail.
    pub fn new(kind: ProblemKind, detail: impl Into<String>) -> Self {
        let (status, title) = kind.status_title();
        Self {
            type_uri: format!("https://tacit.dev/problems/{}", kind.slug()),
            title: title.to_string(),
            status,
            detail: detail.into(),
            errors: Vec::new(),
        }
    }

    /// A 422 listing the invalid fields; the detail summarises the first.
    pub fn invalid(errors: Vec<FieldError>) -> Self {
        let detail = match errors.as_slice() {
            [] => "the request is not valid".to_string(),
            [one] => format!("{}: {}", pointer_or_root(&one.pointer), one.detail),
            [first, rest @ ..] => format!(
                "{}: {} (and {} more)",
                pointer_or_root(&first.pointer),
                first.detail,
                rest.len()
            ),
        };
        let mut p = Self::new(ProblemKind::InvalidRequest, detail);
        p.errors = errors;
        p
    }

    /// A 422 for a single invalid field.
    pub fn field(pointer: impl Into<String>, detail: impl Into<String>) -> Self {
        Self::invalid(vec![FieldError::new(pointer, detail)])
    }

    /// Serialise to JSON bytes (never fails for this type).
    pub fn to_json(&self) -> Vec<u8> {
        serde_json::to_vec(self).unwrap_or_else(|_| b"{\"status\":500}".to_vec())
    }
}

fn pointer_or_root(p: &str) -> &str {
    if p.is_empty() {
        "(request body)"
    } else {
        p
    }
}

/// Escape one reference token for an RFC 6901 pointer (`~` → `~0`, `/` → `~1`).
pub fn escape_token(token: &str) -> String {
    token.replace('~', "~0").replace('/', "~1")
}

impl std::fmt::Display for Problem {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        write!(f, "{} ({}): {}", self.title, self.status, self.detail)?;
        for e in &self.errors {
            write!(f, "\n  at {}: {}", pointer_or_root(&e.pointer), e.detail)?;
            if let Some(c) = e.column {
                write!(f, " (column {c})")?;
            }
        }
        Ok(())
    }
}

impl std::error::Error for Problem {}
