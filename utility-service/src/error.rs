//! The service's error type, mapped to HTTP in one place.

use axum::http::StatusCode;
use axum::response::{IntoResponse, Response};
use axum::Json;
use meterveil_shared::wire::ErrorWire;
use meterveil_shared::FieldError;

#[derive(Debug, thiserror::Error)]
pub enum ApiError {
    /// The body is not the JSON we expect (400).
    #[error("{0}")]
    Malformed(FieldError),
    /// Well-formed but refused (422): unknown meter, level out of range, ...
    #[error("{0}")]
    Invalid(FieldError),
    /// Conflicts with stored state (409): batch id reused, used profile changed.
    #[error("{0}")]
    Conflict(FieldError),
    /// Not found (404).
    #[error("{0}")]
    NotFound(FieldError),
    /// Body over the limit (413).
    #[error("{0}")]
    TooLarge(FieldError),
    /// Missing or wrong operator token, or a gateway signature that fails (401).
    #[error("{0}")]
    Unauthorized(FieldError),
    /// Authenticated, but not allowed this (403): a gateway writing for a feeder
    /// or meter it does not serve.
    #[error("{0}")]
    Forbidden(FieldError),
    /// Over the per-gateway rate (429), with the seconds to wait.
    #[error("{0}")]
    TooMany(FieldError, u64),
    /// Anything else: logged, answered with an opaque 500.
    #[error(transparent)]
    Internal(#[from] anyhow::Error),
}

impl ApiError {
    pub fn status(&self) -> StatusCode {
        match self {
            ApiError::Malformed(_) => StatusCode::BAD_REQUEST,
            ApiError::Invalid(_) => StatusCode::UNPROCESSABLE_ENTITY,
            ApiError::Conflict(_) => StatusCode::CONFLICT,
            ApiError::NotFound(_) => StatusCode::NOT_FOUND,
            ApiError::TooLarge(_) => StatusCode::PAYLOAD_TOO_LARGE,
            ApiError::Unauthorized(_) => StatusCode::UNAUTHORIZED,
            ApiError::Forbidden(_) => StatusCode::FORBIDDEN,
            ApiError::TooMany(..) => StatusCode::TOO_MANY_REQUESTS,
            ApiError::Internal(_) => StatusCode::INTERNAL_SERVER_ERROR,
        }
    }

    pub fn invalid(field: impl Into<String>, reason: impl Into<String>) -> Self {
        ApiError::Invalid(FieldError::new(field, reason))
    }
}

/// The one mapping of store errors to HTTP.
impl From<crate::store::StoreError> for ApiError {
    fn from(e: crate::store::StoreError) -> Self {
        use crate::store::StoreError;
        match e {
            StoreError::NotFound(f) => ApiError::NotFound(f),
            StoreError::Conflict(f) => ApiError::Conflict(f),
            StoreError::Database(e) => ApiError::Internal(e.into()),
            StoreError::Other(e) => ApiError::Internal(e),
        }
    }
}

/// The one mapping of the ingest rules' refusals to HTTP.
impl From<crate::ingest::Refusal> for ApiError {
    fn from(e: crate::ingest::Refusal) -> Self {
        use crate::ingest::Refusal;
        match e {
            Refusal::Invalid(f) => ApiError::Invalid(f),
            Refusal::Conflict(f) => ApiError::Conflict(f),
            Refusal::Forbidden(f) => ApiError::Forbidden(f),
            Refusal::Unauthorized(f) => ApiError::Unauthorized(f),
        }
    }
}

impl From<crate::committer::CommitError> for ApiError {
    fn from(e: crate::committer::CommitError) -> Self {
        use crate::committer::CommitError;
        match e {
            CommitError::Refused(r) => r.into(),
            CommitError::Store(s) => s.into(),
            CommitError::Failed(e) => ApiError::Internal(e),
        }
    }
}

impl From<sqlx::Error> for ApiError {
    fn from(e: sqlx::Error) -> Self {
        ApiError::Internal(e.into())
    }
}

impl IntoResponse for ApiError {
    fn into_response(self) -> Response {
        let status = self.status();
        let retry_after = match &self {
            ApiError::TooMany(_, s) => Some(*s),
            _ => None,
        };
        let fe = match self {
            ApiError::Malformed(f)
            | ApiError::Invalid(f)
            | ApiError::Conflict(f)
            | ApiError::NotFound(f)
            | ApiError::TooLarge(f)
            | ApiError::Unauthorized(f)
            | ApiError::Forbidden(f)
            | ApiError::TooMany(f, _) => f,
            ApiError::Internal(e) => {
                tracing::error!(error = ?e, "internal error");
                FieldError::new("", "internal error; see the service log")
            }
        };
        let message = if fe.field.is_empty() { fe.reason.clone() } else { fe.to_string() };
        let body = ErrorWire { field: fe.field, reason: fe.reason, message };
        let mut resp = (status, Json(body)).into_response();
        if let Some(s) = retry_after {
            if let Ok(v) = axum::http::HeaderValue::from_str(&s.max(1).to_string()) {
                resp.headers_mut().insert(axum::http::header::RETRY_AFTER, v);
            }
        }
        resp
    }
}
