//! The one error type of the operations layer. Each transport maps it to its own wire form: HTTP to a
//! problem+json body with a status code (`http::problem`), gRPC to a status code (`grpc::status`).
//! Internal causes are logged here and never handed to a client.

use crate::store::StoreError;

/// What went wrong, as a client can act on it.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum ErrorKind {
    BadSweepFile,
    Validation,
    Unauthorized,
    Forbidden,
    NotFound,
    Conflict,
    PayloadTooLarge,
    NotImplemented,
    Unavailable,
    /// Past a bound of one part or client (its queued fits): try again later.
    Throttled,
    /// Past a service-wide bound (all queued fits, upload bytes in flight): try again later.
    Overloaded,
    Internal,
}

/// An operation's refusal or failure: its kind, a detail for the client, and where it helps, the
/// line of a file and the seconds after which to try again.
#[derive(Debug, Clone)]
pub struct OpsError {
    pub kind: ErrorKind,
    pub detail: String,
    /// For file errors: the 1-based line, when known.
    pub line: Option<usize>,
    /// Seconds after which a throttled or overloaded request may be tried again.
    pub retry_after_s: Option<u64>,
}

pub type OpsResult<T> = Result<T, OpsError>;

impl OpsError {
    pub fn new(kind: ErrorKind, detail: impl Into<String>) -> OpsError {
        OpsError {
            kind,
            detail: detail.into(),
            line: None,
            retry_after_s: None,
        }
    }
    /// A request refused past a bound, to be tried again after `retry_after_s`.
    pub fn busy(kind: ErrorKind, detail: impl Into<String>, retry_after_s: u64) -> OpsError {
        OpsError {
            retry_after_s: Some(retry_after_s),
            ..OpsError::new(kind, detail)
        }
    }
    pub fn validation(detail: impl Into<String>) -> OpsError {
        OpsError::new(ErrorKind::Validation, detail)
    }
    pub fn not_found(detail: impl Into<String>) -> OpsError {
        OpsError::new(ErrorKind::NotFound, detail)
    }
    pub fn conflict(detail: impl Into<String>) -> OpsError {
        OpsError::new(ErrorKind::Conflict, detail)
    }
    /// An internal error: the cause goes to the log, the client sees a generic detail.
    pub fn internal(cause: impl std::fmt::Display) -> OpsError {
        tracing::error!(error = %cause, "internal error");
        OpsError::new(
            ErrorKind::Internal,
            "the service could not complete the request; the cause is in its log",
        )
    }
}

/// Seconds a client is asked to wait when the database is out of reach for the moment.
pub const DATABASE_RETRY_AFTER_S: u64 = 2;

impl From<StoreError> for OpsError {
    fn from(e: StoreError) -> OpsError {
        match e {
            StoreError::NotFound(t) => OpsError::new(ErrorKind::NotFound, t),
            StoreError::Conflict(t) => OpsError::new(ErrorKind::Conflict, t),
            StoreError::Invalid(t) => OpsError::new(ErrorKind::Validation, t),
            e @ StoreError::QueueFull { part, .. } => OpsError::busy(
                if part {
                    ErrorKind::Throttled
                } else {
                    ErrorKind::Overloaded
                },
                format!("{e}; try again later"),
                super::backpressure::QUEUE_RETRY_AFTER_S,
            ),
            e if e.is_transient() => {
                tracing::warn!(error = %e, "the database is out of reach for the moment");
                OpsError::busy(
                    ErrorKind::Unavailable,
                    "the database is out of reach for the moment (a lost connection or a restart); \
                     try again shortly. A change sent just before may already have been applied: \
                     an upload sent again is answered with the same fit",
                    DATABASE_RETRY_AFTER_S,
                )
            }
            other => OpsError::internal(other),
        }
    }
}
