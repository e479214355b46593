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

/// The kinds of failure. Each is described once, in [`ProblemKind::about`]: status,
/// title, slug, what it means and what to do, side by side.
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
    /// The server is shutting down and takes no new work (`/readyz`).
    ShuttingDown,
    /// A stream's header line did not arrive in time.
    HeaderTimeout,
    /// A stream fell silent between two lines for longer than the server waits.
    StreamIdle,
    /// The request would need more memory than one request may have.
    OverMemoryBudget,
}

/// The description of one kind of problem: what the answer carries and what the page at
/// its `type` URI says.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub struct About {
    /// HTTP status.
    pub status: u16,
    /// Short, fixed summary (the problem's `title`).
    pub title: &'static str,
    /// Stable identifier, the last segment of the `type` URI.
    pub slug: &'static str,
    /// What the problem means, for the page.
    pub means: &'static str,
    /// What the client can do about it, for the page.
    pub to_do: &'static str,
}

impl ProblemKind {
    /// Every kind, in the order the problem pages list them.
    pub const ALL: &'static [ProblemKind] = &[
        Self::MalformedJson,
        Self::TooLarge,
        Self::UnsupportedMediaType,
        Self::InvalidRequest,
        Self::NumericalFailure,
        Self::DeadlineExceeded,
        Self::Unauthorized,
        Self::Overloaded,
        Self::NotFound,
        Self::MethodNotAllowed,
        Self::Internal,
        Self::ShuttingDown,
        Self::HeaderTimeout,
        Self::StreamIdle,
        Self::OverMemoryBudget,
    ];

    /// The one table of problem kinds.
    pub fn about(self) -> About {
        let (status, title, slug, means, to_do) = match self {
            Self::MalformedJson => (400, "malformed JSON", "malformed-json",
                "the body (or one line of a stream) is not JSON: a syntax error, a truncated document, or bytes that are not UTF-8",
                "send one complete JSON document (or one per line on the stream); the detail names the line and column"),
            Self::TooLarge => (413, "request too large", "too-large",
                "the body, a stream line or the header line is larger than the server's limit",
                "split the readings over several requests or use the stream endpoint; GET /v1/info lists the limits"),
            Self::UnsupportedMediaType => (415, "unsupported media type", "unsupported-media-type",
                "the Content-Type is not one the endpoint reads",
                "send application/json to the batch endpoints and application/x-ndjson to the stream"),
            Self::InvalidRequest => (422, "invalid request", "invalid-request",
                "the JSON is well formed but does not describe a valid request",
                "fix each field listed under errors; every pointer is an RFC 6901 JSON Pointer into the body"),
            Self::NumericalFailure => (422, "numerical failure", "numerical-failure",
                "the filter could not go on: a value became non-finite, a covariance lost its definiteness, or an update moved an estimate so far that double-precision rounding of the move exceeds the spread it ended with",
                "check the model's formulas and units, give process noise to every state, start from a prior with spread near the readings, or send readings closer together"),
            Self::DeadlineExceeded => (503, "compute deadline exceeded", "deadline-exceeded",
                "the work ran past the server's per-request compute deadline, or the client went away",
                "send fewer readings per request, or resume from the last posterior in several requests"),
            Self::Unauthorized => (401, "unauthorized", "unauthorized",
                "the request carries no API key, or one the server does not accept",
                "send Authorization: Bearer followed by a key the operator gave you"),
            Self::Overloaded => (503, "overloaded", "overloaded",
                "every job slot is busy; the request was turned away rather than queued",
                "retry after the number of seconds in the Retry-After header"),
            Self::NotFound => (404, "not found", "not-found",
                "there is no route at this path",
                "check the path against GET /openapi.json"),
            Self::MethodNotAllowed => (405, "method not allowed", "method-not-allowed",
                "the route exists but not for this HTTP method",
                "check the method against GET /openapi.json"),
            Self::Internal => (500, "internal error", "internal",
                "the server failed in a way that is its own fault; the details went to its log",
                "report it to the operator with the x-request-id of the answer"),
            Self::ShuttingDown => (503, "shutting down", "shutting-down",
                "the server is shutting down and takes no new work",
                "send the request to another instance, or retry once the server is back"),
            Self::HeaderTimeout => (408, "request timeout", "header-timeout",
                "the stream's first line (model, filter, prior) did not arrive in time",
                "send the header line as soon as the request starts; readings may follow at any pace within the server's idle time (stream-idle)"),
            Self::StreamIdle => (408, "request timeout", "stream-idle",
                "the stream sent no byte between two lines for longer than the server's idle time; the last good posterior came before this error",
                "resume from that posterior in a new stream when readings are due again, or send lines more often than the idle time"),
            Self::OverMemoryBudget => (413, "needs too much memory", "over-memory-budget",
                "the work the request asks for (lines times states, ensemble members, simulated times, the answer's size) would need more memory than the server allows one request; nothing was run",
                "send fewer lines per request and resume from the posterior, ask for less output (output.covariance std or none), or use the stream endpoint; GET /v1/info gives max_request_bytes"),
        };
        About {
            status,
            title,
            slug,
            means,
            to_do,
        }
    }

    /// HTTP status and human title of this kind.
    pub fn status_title(self) -> (u16, &'static str) {
        let a = self.about();
        (a.status, a.title)
    }

    /// Stable identifier used in the problem's `type` URI.
    pub fn slug(self) -> &'static str {
        self.about().slug
    }

    /// The kind whose slug is `slug`.
    pub fn from_slug(slug: &str) -> Option<Self> {
        Self::ALL.iter().copied().find(|k| k.slug() == slug)
    }

    /// The problem's `type`: a URI reference relative to the service (RFC 9457 section
    /// 3.1.1), which the service itself serves as a short page.
    pub fn type_uri(self) -> String {
        format!("{PROBLEM_PAGES}/{}", self.slug())
    }
}

/// Where the problem pages are served; each kind's page is `{PROBLEM_PAGES}/{slug}`.
pub const PROBLEM_PAGES: &str = "/problems";

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
            type_uri: kind.type_uri(),
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
