//! `ApiError`: every non-2xx answer, mapped to a status and the `{"error": ...}` body in one
//! place.
//!
//! Caller mistakes (4xx) carry a message the caller can act on and are not logged above debug.
//! Service faults (5xx other than shedding) carry a generic message; the detail travels in a
//! response extension ([`InternalDetail`]) to the observing middleware, which logs it once, so
//! building a response has no side effects.

use axum::http::{header, HeaderValue, StatusCode};
use axum::response::{IntoResponse, Response};

use crate::api::wire::ErrorBody;
use crate::api::RequestError;

/// Every way a request can fail at the HTTP layer.
#[derive(Debug, thiserror::Error)]
pub enum ApiError {
    /// A decoding or validation failure (400 or 422).
    #[error(transparent)]
    Request(#[from] RequestError),
    /// The body exceeds the limit (413).
    #[error("the request body exceeds the limit of {limit} bytes; send fewer or shorter embeddings (embedding_b64 is about 2.5x smaller)")]
    PayloadTooLarge {
        /// The configured limit.
        limit: usize,
    },
    /// Wrong or missing `Content-Type` (415).
    #[error("Content-Type must be {expected}, got {got}")]
    UnsupportedMediaType {
        /// What the route accepts.
        expected: &'static str,
        /// What the request sent.
        got: String,
    },
    /// The body could not be read to its end (400).
    #[error("the request body could not be read: {0}")]
    BodyRead(String),
    /// The body did not arrive within `body_timeout_ms` (408; the connection is closed).
    #[error("the request body stalled: body_timeout_ms = {ms} passed (for the whole body, or between two chunks of a stream); the connection is closed")]
    BodyTimeout {
        /// The limit.
        ms: u128,
    },
    /// No such route (404).
    #[error("no route {method} {path}; see GET /openapi.json for the API")]
    NotFound {
        /// Request method.
        method: String,
        /// Request path.
        path: String,
    },
    /// The route exists with other methods (405).
    #[error("{method} is not allowed on {path}; see GET /openapi.json for the API")]
    MethodNotAllowed {
        /// Request method.
        method: String,
        /// Request path.
        path: String,
    },
    /// The concurrency limit is reached (503 with `Retry-After`).
    #[error(
        "the service is at its concurrency limit of {limit} requests; retry after the Retry-After delay"
    )]
    Overloaded {
        /// `max_in_flight`.
        limit: usize,
    },
    /// The bodies in flight hold `server.max_inflight_body_bytes` (503 with `Retry-After`).
    #[error(
        "the service holds its limit of {budget} bytes of request bodies in flight; retry after the Retry-After delay"
    )]
    BodyBudget {
        /// `max_inflight_body_bytes`.
        budget: usize,
    },
    /// The request ran past its deadline (503 with `Retry-After`).
    #[error("the request did not finish within {ms} ms; retry, or send fewer candidates or a smaller k")]
    DeadlineExceeded {
        /// The deadline.
        ms: u128,
    },
    /// The service is shutting down (503).
    #[error("the service is shutting down; retry on another instance")]
    ShuttingDown,
    /// A panic was caught (500).
    #[error("panic: {0}")]
    Panicked(String),
    /// No admin token is configured (403).
    #[error("the admin endpoints are disabled: start medley with MEDLEY_ADMIN_TOKEN set, then send Authorization: Bearer <token>")]
    AdminDisabled,
    /// Missing or wrong bearer token (401).
    #[error("missing or wrong admin token: send Authorization: Bearer <the value of MEDLEY_ADMIN_TOKEN>")]
    Unauthorized,
    /// A config change that does not validate (422); the old config keeps serving.
    #[error("config refused, the previous one keeps serving: {0}")]
    InvalidConfig(#[from] crate::serve::config::ConfigError),
    /// `DELETE` of a slice that only the file defines (404).
    #[error("{0}")]
    NotRuntimeSlice(String),
    /// The overlay file could not be written (500); nothing changed.
    #[error("{0}")]
    PersistFailed(String),
}

/// Detail of a 5xx, for the logging middleware; never sent to the client.
#[derive(Debug, Clone)]
pub struct InternalDetail(pub String);

impl ApiError {
    /// HTTP status.
    #[must_use]
    pub fn status(&self) -> StatusCode {
        match self {
            Self::Request(e) if e.is_internal() => StatusCode::INTERNAL_SERVER_ERROR,
            Self::Request(RequestError::MalformedJson { .. } | RequestError::InvalidField { .. })
            | Self::BodyRead(_) => StatusCode::BAD_REQUEST,
            Self::Request(_) => StatusCode::UNPROCESSABLE_ENTITY,
            Self::PayloadTooLarge { .. } => StatusCode::PAYLOAD_TOO_LARGE,
            Self::BodyTimeout { .. } => StatusCode::REQUEST_TIMEOUT,
            Self::UnsupportedMediaType { .. } => StatusCode::UNSUPPORTED_MEDIA_TYPE,
            Self::NotFound { .. } => StatusCode::NOT_FOUND,
            Self::MethodNotAllowed { .. } => StatusCode::METHOD_NOT_ALLOWED,
            Self::Overloaded { .. }
            | Self::BodyBudget { .. }
            | Self::DeadlineExceeded { .. }
            | Self::ShuttingDown => StatusCode::SERVICE_UNAVAILABLE,
            Self::Panicked(_) | Self::PersistFailed(_) => StatusCode::INTERNAL_SERVER_ERROR,
            Self::AdminDisabled => StatusCode::FORBIDDEN,
            Self::Unauthorized => StatusCode::UNAUTHORIZED,
            Self::InvalidConfig(_) => StatusCode::UNPROCESSABLE_ENTITY,
            Self::NotRuntimeSlice(_) => StatusCode::NOT_FOUND,
        }
    }

    /// Stable snake_case code.
    #[must_use]
    pub fn code(&self) -> &'static str {
        match self {
            Self::Request(e) => e.code(),
            Self::PayloadTooLarge { .. } => "body_too_large",
            Self::UnsupportedMediaType { .. } => "unsupported_media_type",
            Self::BodyRead(_) => "body_read_failed",
            Self::BodyTimeout { .. } => "body_timeout",
            Self::NotFound { .. } => "not_found",
            Self::MethodNotAllowed { .. } => "method_not_allowed",
            Self::Overloaded { .. } | Self::BodyBudget { .. } => "overloaded",
            Self::DeadlineExceeded { .. } => "deadline_exceeded",
            Self::ShuttingDown => "shutting_down",
            Self::Panicked(_) | Self::PersistFailed(_) => "internal",
            Self::AdminDisabled => "admin_disabled",
            Self::Unauthorized => "unauthorized",
            Self::InvalidConfig(_) => "invalid_config",
            Self::NotRuntimeSlice(_) => "not_a_runtime_slice",
        }
    }

    /// The body sent to the client.
    #[must_use]
    pub fn body(&self) -> ErrorBody {
        match self {
            Self::Request(e) if !e.is_internal() => ErrorBody::from_request_error(e),
            Self::Request(_) | Self::Panicked(_) | Self::PersistFailed(_) => ErrorBody::new(
                "internal",
                "internal error; the service logged the detail and keeps serving, so the request may be retried",
                None,
            ),
            Self::InvalidConfig(crate::serve::config::ConfigError::Invalid { field, .. }) => {
                ErrorBody::new(self.code(), self.to_string(), Some(field.clone()))
            }
            other => ErrorBody::new(other.code(), other.to_string(), None),
        }
    }
}

/// Seconds callers should wait before retrying a 503.
pub const RETRY_AFTER_SECONDS: &str = "1";

impl IntoResponse for ApiError {
    fn into_response(self) -> Response {
        let status = self.status();
        let mut response = (
            status,
            [(header::CONTENT_TYPE, HeaderValue::from_static("application/json"))],
            self.body().to_json(),
        )
            .into_response();
        if status == StatusCode::SERVICE_UNAVAILABLE {
            response.headers_mut().insert(header::RETRY_AFTER, HeaderValue::from_static(RETRY_AFTER_SECONDS));
        }
        if status == StatusCode::REQUEST_TIMEOUT {
            // The rest of the body may still be on its way; the connection cannot be reused.
            response.headers_mut().insert(header::CONNECTION, HeaderValue::from_static("close"));
        }
        if status == StatusCode::UNAUTHORIZED {
            response.headers_mut().insert(header::WWW_AUTHENTICATE, HeaderValue::from_static("Bearer"));
        }
        if status.is_server_error() && status != StatusCode::SERVICE_UNAVAILABLE {
            response.extensions_mut().insert(InternalDetail(self.to_string()));
        }
        response
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn statuses_and_codes() {
        let bad = ApiError::Request(RequestError::MalformedJson { message: "x".into() });
        assert_eq!((bad.status(), bad.code()), (StatusCode::BAD_REQUEST, "malformed_json"));
        let shed = ApiError::Overloaded { limit: 1 }.into_response();
        assert_eq!(shed.status(), StatusCode::SERVICE_UNAVAILABLE);
        assert_eq!(shed.headers()[header::RETRY_AFTER], "1");
        let panic = ApiError::Panicked("secret detail".into());
        assert!(!panic.body().error.message.contains("secret"));
        let r = panic.into_response();
        assert_eq!(r.extensions().get::<InternalDetail>().unwrap().0, "panic: secret detail");
    }
}
