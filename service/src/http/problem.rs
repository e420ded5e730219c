//! Errors as `application/problem+json` (RFC 9457) with a stable `type` per kind. Internal causes are
//! logged with the request's span and never shown to the client.

use crate::store::StoreError;
use axum::http::{HeaderValue, StatusCode, header};
use axum::response::{IntoResponse, Response};
use serde::{Deserialize, Serialize};

/// The kinds of problem this API reports; the `type` URI is `urn:henrybook:problem:<kind>`.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Kind {
    BadSweepFile,
    Validation,
    Unauthorized,
    Forbidden,
    NotFound,
    Conflict,
    PayloadTooLarge,
    NotImplemented,
    Unavailable,
    /// Past a bound of one part or client (its queued fits): try again later (429).
    Throttled,
    /// Past a service-wide bound (all queued fits, upload bytes in flight): try again later (503).
    Overloaded,
    Internal,
}

impl Kind {
    pub fn slug(self) -> &'static str {
        match self {
            Kind::BadSweepFile => "bad-sweep-file",
            Kind::Validation => "validation",
            Kind::Unauthorized => "unauthorized",
            Kind::Forbidden => "forbidden",
            Kind::NotFound => "not-found",
            Kind::Conflict => "conflict",
            Kind::PayloadTooLarge => "payload-too-large",
            Kind::NotImplemented => "not-implemented",
            Kind::Unavailable => "unavailable",
            Kind::Throttled => "throttled",
            Kind::Overloaded => "overloaded",
            Kind::Internal => "internal",
        }
    }

    fn status(self) -> StatusCode {
        match self {
            Kind::BadSweepFile | Kind::Validation => StatusCode::UNPROCESSABLE_ENTITY,
            Kind::Unauthorized => StatusCode::UNAUTHORIZED,
            Kind::Forbidden => StatusCode::FORBIDDEN,
            Kind::NotFound => StatusCode::NOT_FOUND,
            Kind::Conflict => StatusCode::CONFLICT,
            Kind::PayloadTooLarge => StatusCode::PAYLOAD_TOO_LARGE,
            Kind::NotImplemented => StatusCode::NOT_IMPLEMENTED,
            Kind::Unavailable | Kind::Overloaded => StatusCode::SERVICE_UNAVAILABLE,
            Kind::Throttled => StatusCode::TOO_MANY_REQUESTS,
            Kind::Internal => StatusCode::INTERNAL_SERVER_ERROR,
        }
    }

    fn title(self) -> &'static str {
        match self {
            Kind::BadSweepFile => "The sweep file cannot be read",
            Kind::Validation => "The request is not valid",
            Kind::Unauthorized => "A valid bearer token is needed",
            Kind::Forbidden => "The token's role may not do this",
            Kind::NotFound => "Not found",
            Kind::Conflict => "The request conflicts with the current state",
            Kind::PayloadTooLarge => "The request body is too large",
            Kind::NotImplemented => "Not available in this build",
            Kind::Unavailable => "The service is not ready",
            Kind::Throttled => "Too much queued for this part; try again later",
            Kind::Overloaded => "The service is at capacity; try again later",
            Kind::Internal => "Internal error",
        }
    }
}

/// The body of a problem response.
#[derive(Debug, Clone, PartialEq, Serialize, Deserialize, utoipa::ToSchema)]
pub struct ProblemBody {
    /// `urn:henrybook:problem:<kind>`.
    #[serde(rename = "type")]
    pub type_: String,
    pub title: String,
    pub status: u16,
    pub detail: String,
    /// For file errors: the 1-based line, when known.
    #[serde(skip_serializing_if = "Option::is_none")]
    pub line: Option<usize>,
}

#[derive(Debug, Clone)]
pub struct Problem {
    pub kind: Kind,
    pub detail: String,
    pub line: Option<usize>,
    /// Seconds after which a throttled or overloaded request may be tried again (`Retry-After`).
    pub retry_after_s: Option<u64>,
}

impl Problem {
    pub fn new(kind: Kind, detail: impl Into<String>) -> Problem {
        Problem {
            kind,
            detail: detail.into(),
            line: None,
            retry_after_s: None,
        }
    }
    /// A request refused past a bound, to be tried again after `retry_after_s`.
    pub fn busy(kind: Kind, detail: impl Into<String>, retry_after_s: u64) -> Problem {
        Problem {
            retry_after_s: Some(retry_after_s),
            ..Problem::new(kind, detail)
        }
    }
    pub fn validation(detail: impl Into<String>) -> Problem {
        Problem::new(Kind::Validation, detail)
    }
    pub fn not_found(detail: impl Into<String>) -> Problem {
        Problem::new(Kind::NotFound, detail)
    }
    /// An internal error: the cause goes to the log, the client sees a generic detail.
    pub fn internal(cause: impl std::fmt::Display) -> Problem {
        tracing::error!(error = %cause, "internal error");
        Problem::new(
            Kind::Internal,
            "the service could not complete the request; the cause is in its log",
        )
    }
}

impl From<StoreError> for Problem {
    fn from(e: StoreError) -> Problem {
        match e {
            StoreError::NotFound(t) => Problem::new(Kind::NotFound, t),
            StoreError::Conflict(t) => Problem::new(Kind::Conflict, t),
            StoreError::Invalid(t) => Problem::new(Kind::Validation, t),
            e @ StoreError::QueueFull { part, .. } => Problem::busy(
                if part {
                    Kind::Throttled
                } else {
                    Kind::Overloaded
                },
                format!("{e}; try again later"),
                super::backpressure::QUEUE_RETRY_AFTER_S,
            ),
            other => Problem::internal(other),
        }
    }
}

pub const PROBLEM_JSON: &str = "application/problem+json";

impl IntoResponse for Problem {
    fn into_response(self) -> Response {
        let status = self.kind.status();
        let body = ProblemBody {
            type_: format!("urn:henrybook:problem:{}", self.kind.slug()),
            title: self.kind.title().into(),
            status: status.as_u16(),
            detail: self.detail,
            line: self.line,
        };
        let mut res = (status, axum::Json(body)).into_response();
        res.headers_mut()
            .insert(header::CONTENT_TYPE, HeaderValue::from_static(PROBLEM_JSON));
        if let Some(s) = self.retry_after_s {
            res.headers_mut()
                .insert(header::RETRY_AFTER, HeaderValue::from(s));
        }
        if self.kind == Kind::Unauthorized {
            res.headers_mut().insert(
                header::WWW_AUTHENTICATE,
                HeaderValue::from_static("Bearer realm=\"henrybook\""),
            );
        }
        res
    }
}

pub type ApiResult<T> = Result<T, Problem>;

/// Parses a JSON body into `T`, as a validation problem when it does not fit.
/// For a field of a request body that is itself an object: refuses an array (serde would take a
/// struct's fields from it by position, and `[]` would clear them all).
pub fn object_only<'de, D, T>(deserializer: D) -> Result<T, D::Error>
where
    D: serde::Deserializer<'de>,
    T: serde::de::DeserializeOwned,
{
    use serde::Deserialize as _;
    use serde::de::Error as _;
    let value = serde_json::Value::deserialize(deserializer)?;
    if !value.is_object() {
        return Err(D::Error::custom(format!(
            "expected an object with named fields, found {}",
            match value {
                serde_json::Value::Array(_) => "an array",
                serde_json::Value::Null => "null",
                serde_json::Value::Bool(_) => "a boolean",
                serde_json::Value::Number(_) => "a number",
                serde_json::Value::String(_) => "a string",
                serde_json::Value::Object(_) => "an object",
            }
        )));
    }
    serde_json::from_value(value).map_err(D::Error::custom)
}

/// A request body: a JSON object of the documented shape (never an array, whose items serde would
/// otherwise take by position).
pub fn json_body<T: serde::de::DeserializeOwned>(bytes: &[u8]) -> ApiResult<T> {
    let value: serde_json::Value = serde_json::from_slice(bytes)
        .map_err(|e| Problem::validation(format!("the JSON body: {e}")))?;
    if !value.is_object() {
        return Err(Problem::validation(
            "the JSON body must be an object with the documented fields",
        ));
    }
    serde_json::from_value(value).map_err(|e| Problem::validation(format!("the JSON body: {e}")))
}

/// Turns axum's own rejections (and anything else non-JSON on an error path) into problems.
pub async fn problem_for_plain_errors(
    req: axum::extract::Request,
    next: axum::middleware::Next,
) -> Response {
    let res = next.run(req).await;
    let status = res.status();
    let is_problem = res
        .headers()
        .get(header::CONTENT_TYPE)
        .is_some_and(|v| v.as_bytes().starts_with(PROBLEM_JSON.as_bytes()));
    if !(status.is_client_error() || status.is_server_error()) || is_problem {
        return res;
    }
    let kind = match status {
        StatusCode::NOT_FOUND => Kind::NotFound,
        StatusCode::PAYLOAD_TOO_LARGE => Kind::PayloadTooLarge,
        StatusCode::UNAUTHORIZED => Kind::Unauthorized,
        StatusCode::FORBIDDEN => Kind::Forbidden,
        StatusCode::CONFLICT => Kind::Conflict,
        StatusCode::TOO_MANY_REQUESTS => Kind::Throttled,
        s if s.is_server_error() => Kind::Internal,
        _ => Kind::Validation,
    };
    let body = axum::body::to_bytes(res.into_body(), 64 * 1024)
        .await
        .unwrap_or_default();
    let detail = String::from_utf8_lossy(&body).trim().to_string();
    let detail = if detail.is_empty() || kind == Kind::Internal {
        status.canonical_reason().unwrap_or("error").to_string()
    } else {
        detail
    };
    let body = ProblemBody {
        type_: format!("urn:henrybook:problem:{}", kind.slug()),
        title: kind.title().into(),
        status: status.as_u16(),
        detail,
        line: None,
    };
    let mut res = (status, axum::Json(body)).into_response();
    res.headers_mut()
        .insert(header::CONTENT_TYPE, HeaderValue::from_static(PROBLEM_JSON));
    res
}
