//! The operations' errors ([`OpsError`]) as `application/problem+json` (RFC 9457) with a stable
//! `type` per kind. Internal causes are logged with the request's span and never shown to the client.

pub use crate::ops::{ErrorKind, OpsError, OpsResult};
use axum::http::{HeaderValue, StatusCode, header};
use axum::response::{IntoResponse, Response};
use serde::{Deserialize, Serialize};

/// The `type` URI of a problem is `urn:henrybook:problem:<slug>`.
pub fn slug(kind: ErrorKind) -> &'static str {
    match kind {
        ErrorKind::BadSweepFile => "bad-sweep-file",
        ErrorKind::Validation => "validation",
        ErrorKind::Unauthorized => "unauthorized",
        ErrorKind::Forbidden => "forbidden",
        ErrorKind::NotFound => "not-found",
        ErrorKind::Conflict => "conflict",
        ErrorKind::PayloadTooLarge => "payload-too-large",
        ErrorKind::NotImplemented => "not-implemented",
        ErrorKind::Unavailable => "unavailable",
        ErrorKind::Throttled => "throttled",
        ErrorKind::Overloaded => "overloaded",
        ErrorKind::Internal => "internal",
    }
}

/// The status code of each kind: past a part's bound 429, past a service-wide bound 503.
fn status_of(kind: ErrorKind) -> StatusCode {
    match kind {
        ErrorKind::BadSweepFile | ErrorKind::Validation => StatusCode::UNPROCESSABLE_ENTITY,
        ErrorKind::Unauthorized => StatusCode::UNAUTHORIZED,
        ErrorKind::Forbidden => StatusCode::FORBIDDEN,
        ErrorKind::NotFound => StatusCode::NOT_FOUND,
        ErrorKind::Conflict => StatusCode::CONFLICT,
        ErrorKind::PayloadTooLarge => StatusCode::PAYLOAD_TOO_LARGE,
        ErrorKind::NotImplemented => StatusCode::NOT_IMPLEMENTED,
        ErrorKind::Unavailable | ErrorKind::Overloaded => StatusCode::SERVICE_UNAVAILABLE,
        ErrorKind::Throttled => StatusCode::TOO_MANY_REQUESTS,
        ErrorKind::Internal => StatusCode::INTERNAL_SERVER_ERROR,
    }
}

fn title(kind: ErrorKind) -> &'static str {
    match kind {
        ErrorKind::BadSweepFile => "The sweep file cannot be read",
        ErrorKind::Validation => "The request is not valid",
        ErrorKind::Unauthorized => "A valid bearer token is needed",
        ErrorKind::Forbidden => "The token's role may not do this",
        ErrorKind::NotFound => "Not found",
        ErrorKind::Conflict => "The request conflicts with the current state",
        ErrorKind::PayloadTooLarge => "The request body is too large",
        ErrorKind::NotImplemented => "Not available in this build",
        ErrorKind::Unavailable => "The service is not ready",
        ErrorKind::Throttled => "Too much queued for this part; try again later",
        ErrorKind::Overloaded => "The service is at capacity; try again later",
        ErrorKind::Internal => "Internal error",
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

pub const PROBLEM_JSON: &str = "application/problem+json";

impl IntoResponse for OpsError {
    fn into_response(self) -> Response {
        let status = status_of(self.kind);
        let body = ProblemBody {
            type_: format!("urn:henrybook:problem:{}", slug(self.kind)),
            title: title(self.kind).into(),
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
        if self.kind == ErrorKind::Unauthorized {
            res.headers_mut().insert(
                header::WWW_AUTHENTICATE,
                HeaderValue::from_static("Bearer realm=\"henrybook\""),
            );
        }
        res
    }
}

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
pub fn json_body<T: serde::de::DeserializeOwned>(bytes: &[u8]) -> OpsResult<T> {
    let value: serde_json::Value = serde_json::from_slice(bytes)
        .map_err(|e| OpsError::validation(format!("the JSON body: {e}")))?;
    if !value.is_object() {
        return Err(OpsError::validation(
            "the JSON body must be an object with the documented fields",
        ));
    }
    serde_json::from_value(value).map_err(|e| OpsError::validation(format!("the JSON body: {e}")))
}

/// Turns axum's own rejections (and anything else non-JSON on an error path) into problems.
pub async fn problem_for_plain_errors(
    req: axum::extract::Request,
    next: axum::middleware::Next,
) -> Response {
    let res = next.run(req).await;
    let status = res.status();
    // Problems pass as they are, and so does a JSON body a handler chose to send with an error status
    // (the readiness report with 503): only axum's plain-text rejections and empty bodies are turned.
    let is_json = res.headers().get(header::CONTENT_TYPE).is_some_and(|v| {
        v.as_bytes().starts_with(PROBLEM_JSON.as_bytes())
            || v.as_bytes().starts_with(b"application/json")
    });
    if !(status.is_client_error() || status.is_server_error()) || is_json {
        return res;
    }
    let kind = match status {
        StatusCode::NOT_FOUND => ErrorKind::NotFound,
        StatusCode::PAYLOAD_TOO_LARGE => ErrorKind::PayloadTooLarge,
        StatusCode::UNAUTHORIZED => ErrorKind::Unauthorized,
        StatusCode::FORBIDDEN => ErrorKind::Forbidden,
        StatusCode::CONFLICT => ErrorKind::Conflict,
        StatusCode::TOO_MANY_REQUESTS => ErrorKind::Throttled,
        s if s.is_server_error() => ErrorKind::Internal,
        _ => ErrorKind::Validation,
    };
    let body = axum::body::to_bytes(res.into_body(), 64 * 1024)
        .await
        .unwrap_or_default();
    let detail = String::from_utf8_lossy(&body).trim().to_string();
    let detail = if detail.is_empty() || kind == ErrorKind::Internal {
        status.canonical_reason().unwrap_or("error").to_string()
    } else {
        detail
    };
    let body = ProblemBody {
        type_: format!("urn:henrybook:problem:{}", slug(kind)),
        title: title(kind).into(),
        status: status.as_u16(),
        detail,
        line: None,
    };
    let mut res = (status, axum::Json(body)).into_response();
    res.headers_mut()
        .insert(header::CONTENT_TYPE, HeaderValue::from_static(PROBLEM_JSON));
    res
}
