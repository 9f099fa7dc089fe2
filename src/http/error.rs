//! The one error type every handler returns, and the table mapping error kinds to statuses.
//!
//! Every error body has one shape, `{"error": {"kind": "...", "message": "..."}}`, extractor
//! rejections and unknown routes included. Client faults show their message; internal faults
//! answer a generic 500 and carry the details in a response extension for the log.

use axum::Json;
use axum::http::{HeaderValue, StatusCode, header};
use axum::response::{IntoResponse, Response};
use serde::Serialize;

use crate::batch::BatchError;
use crate::preprocess::PreprocessError;
use crate::preprocess::pool::PoolError;

/// What went wrong, as a client can act on it. docs/http-api.md's error table lists the same.
#[derive(Debug, Clone, Copy, PartialEq, Eq, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum ErrorKind {
    /// No model by that name.
    UnknownModel,
    /// The body is not a decodable image (empty, truncated, corrupt, not an image).
    BadImage,
    /// Body or image above the configured limits.
    TooLarge,
    /// A recognised image format this build cannot decode.
    UnsupportedFormat,
    /// An image with a side below `preprocess.min_side`.
    TooSmall,
    /// The configured region of interest does not fit the image.
    RoiOutside,
    /// Backlog or decode queue full: retry after the `Retry-After` seconds.
    Overloaded,
    /// Malformed request parameters.
    BadRequest,
    /// Models still loading, or loading failed.
    NotReady,
    /// The server is shutting down: retry on another instance.
    Draining,
    /// The request's deadline passed before it could be answered.
    Deadline,
    /// The client took longer than `server.body_timeout_ms` to send its body.
    BodyTimeout,
    /// The engine failed or panicked on this request's pass (the lane was restarted).
    InferenceFailed,
    /// No such route.
    NotFound,
    /// The route exists but not with this method.
    MethodNotAllowed,
    /// A lane has been stuck in one pass longer than `server.stall_ms` (`/healthz`).
    Stalled,
    /// No credentials, malformed ones, or an expired page session (docs/security.md).
    Unauthorized,
    /// Wrong credentials, or a peer that may not do this at all.
    Forbidden,
    /// A reload of this model is already running (`POST /models/{model}/reload`).
    Busy,
    /// The new version failed to load, check or self-test; the old one still serves.
    ReloadFailed,
    /// The request line and headers together exceed `server.max_header_bytes`.
    HeadersTooLarge,
    /// `server.max_connections` connections are open: the connection is answered and closed.
    TooManyConnections,
    /// A fault inside lineside (details in the server log).
    Internal,
}

impl ErrorKind {
    /// Every kind (for documents and tests that must list them all).
    pub const ALL: &[ErrorKind] = &[
        ErrorKind::UnknownModel,
        ErrorKind::BadImage,
        ErrorKind::TooLarge,
        ErrorKind::UnsupportedFormat,
        ErrorKind::TooSmall,
        ErrorKind::RoiOutside,
        ErrorKind::Overloaded,
        ErrorKind::BadRequest,
        ErrorKind::NotReady,
        ErrorKind::Draining,
        ErrorKind::Deadline,
        ErrorKind::BodyTimeout,
        ErrorKind::InferenceFailed,
        ErrorKind::NotFound,
        ErrorKind::MethodNotAllowed,
        ErrorKind::Stalled,
        ErrorKind::Unauthorized,
        ErrorKind::Forbidden,
        ErrorKind::Busy,
        ErrorKind::ReloadFailed,
        ErrorKind::HeadersTooLarge,
        ErrorKind::TooManyConnections,
        ErrorKind::Internal,
    ];

    /// The HTTP status for this kind.
    pub fn status(self) -> StatusCode {
        match self {
            ErrorKind::UnknownModel | ErrorKind::NotFound => StatusCode::NOT_FOUND,
            ErrorKind::BadImage | ErrorKind::BadRequest => StatusCode::BAD_REQUEST,
            ErrorKind::TooLarge => StatusCode::PAYLOAD_TOO_LARGE,
            ErrorKind::UnsupportedFormat => StatusCode::UNSUPPORTED_MEDIA_TYPE,
            ErrorKind::TooSmall | ErrorKind::RoiOutside => StatusCode::UNPROCESSABLE_ENTITY,
            ErrorKind::Overloaded | ErrorKind::NotReady | ErrorKind::Draining | ErrorKind::Stalled => {
                StatusCode::SERVICE_UNAVAILABLE
            }
            ErrorKind::Deadline => StatusCode::GATEWAY_TIMEOUT,
            ErrorKind::BodyTimeout => StatusCode::REQUEST_TIMEOUT,
            ErrorKind::InferenceFailed => StatusCode::INTERNAL_SERVER_ERROR,
            ErrorKind::MethodNotAllowed => StatusCode::METHOD_NOT_ALLOWED,
            ErrorKind::Unauthorized => StatusCode::UNAUTHORIZED,
            ErrorKind::Forbidden => StatusCode::FORBIDDEN,
            ErrorKind::Busy => StatusCode::CONFLICT,
            ErrorKind::ReloadFailed => StatusCode::UNPROCESSABLE_ENTITY,
            ErrorKind::HeadersTooLarge => StatusCode::REQUEST_HEADER_FIELDS_TOO_LARGE,
            ErrorKind::TooManyConnections => StatusCode::SERVICE_UNAVAILABLE,
            ErrorKind::Internal => StatusCode::INTERNAL_SERVER_ERROR,
        }
    }

    /// The kind as it appears in JSON and in metric labels.
    pub fn as_str(self) -> &'static str {
        match self {
            ErrorKind::UnknownModel => "unknown_model",
            ErrorKind::BadImage => "bad_image",
            ErrorKind::TooLarge => "too_large",
            ErrorKind::UnsupportedFormat => "unsupported_format",
            ErrorKind::TooSmall => "too_small",
            ErrorKind::RoiOutside => "roi_outside",
            ErrorKind::Overloaded => "overloaded",
            ErrorKind::BadRequest => "bad_request",
            ErrorKind::NotReady => "not_ready",
            ErrorKind::Draining => "draining",
            ErrorKind::Deadline => "deadline",
            ErrorKind::BodyTimeout => "body_timeout",
            ErrorKind::InferenceFailed => "inference_failed",
            ErrorKind::NotFound => "not_found",
            ErrorKind::MethodNotAllowed => "method_not_allowed",
            ErrorKind::Stalled => "stalled",
            ErrorKind::Unauthorized => "unauthorized",
            ErrorKind::Forbidden => "forbidden",
            ErrorKind::Busy => "busy",
            ErrorKind::ReloadFailed => "reload_failed",
            ErrorKind::HeadersTooLarge => "headers_too_large",
            ErrorKind::TooManyConnections => "too_many_connections",
            ErrorKind::Internal => "internal",
        }
    }
}

/// Details of an internal fault, attached to the response for the logging middleware.
#[derive(Debug, Clone)]
pub struct InternalDetail(pub String);

/// An error answer.
#[derive(Debug)]
pub struct ApiError {
    /// The kind.
    pub kind: ErrorKind,
    /// Message shown to the client (generic for internal faults).
    pub message: String,
    /// Structured details for the client (e.g. which models are not ready).
    pub details: Option<serde_json::Value>,
    detail: Option<String>,
}

impl ApiError {
    /// A client-facing error with its message.
    pub fn new(kind: ErrorKind, message: impl Into<String>) -> ApiError {
        ApiError { kind, message: message.into(), details: None, detail: None }
    }

    /// The same error with structured details in its body (`error.details`).
    pub fn with_details(mut self, details: serde_json::Value) -> ApiError {
        self.details = Some(details);
        self
    }

    /// An internal fault: the client sees a generic message, the log sees `detail`.
    pub fn internal(detail: impl Into<String>) -> ApiError {
        ApiError {
            kind: ErrorKind::Internal,
            message: "internal error in lineside; the server log has the details".into(),
            details: None,
            detail: Some(detail.into()),
        }
    }
}

#[derive(Serialize)]
struct Body<'a> {
    error: Inner<'a>,
}

#[derive(Serialize)]
struct Inner<'a> {
    kind: &'a str,
    message: &'a str,
    #[serde(skip_serializing_if = "Option::is_none")]
    details: Option<&'a serde_json::Value>,
}

impl IntoResponse for ApiError {
    fn into_response(self) -> Response {
        let body =
            Body { error: Inner { kind: self.kind.as_str(), message: &self.message, details: self.details.as_ref() } };
        let mut resp = (self.kind.status(), Json(body)).into_response();
        if matches!(
            self.kind,
            ErrorKind::Overloaded | ErrorKind::NotReady | ErrorKind::Draining | ErrorKind::TooManyConnections
        ) {
            resp.headers_mut().insert(header::RETRY_AFTER, HeaderValue::from_static("1"));
        }
        if self.kind == ErrorKind::Unauthorized {
            // RFC 6750, section 3: a 401 names the scheme the client should use.
            resp.headers_mut().insert(header::WWW_AUTHENTICATE, HeaderValue::from_static("Bearer realm=\"lineside\""));
        }
        if let Some(d) = self.detail {
            resp.extensions_mut().insert(InternalDetail(d));
        }
        resp
    }
}

impl From<crate::access::Denied> for ApiError {
    fn from(d: crate::access::Denied) -> Self {
        match d {
            crate::access::Denied::Unauthorized(m) => ApiError::new(ErrorKind::Unauthorized, m),
            crate::access::Denied::Forbidden(m) => ApiError::new(ErrorKind::Forbidden, m),
        }
    }
}

impl From<crate::reload::ReloadError> for ApiError {
    fn from(e: crate::reload::ReloadError) -> Self {
        use crate::reload::ReloadError as R;
        let kind = match &e {
            R::Busy(_) => ErrorKind::Busy,
            R::Unknown(_) => ErrorKind::UnknownModel,
            R::NotServing(_) => ErrorKind::NotReady,
            R::Failed(_) => ErrorKind::ReloadFailed,
        };
        ApiError::new(kind, e.to_string())
    }
}

impl From<PreprocessError> for ApiError {
    fn from(e: PreprocessError) -> Self {
        let kind = match &e {
            PreprocessError::Empty | PreprocessError::BadImage(_) => ErrorKind::BadImage,
            PreprocessError::Unsupported(_) => ErrorKind::UnsupportedFormat,
            PreprocessError::TooLarge { .. }
            | PreprocessError::TooLargeUnknown { .. }
            | PreprocessError::TooCostly { .. } => ErrorKind::TooLarge,
            PreprocessError::TooSmall { .. } => ErrorKind::TooSmall,
            PreprocessError::RoiOutside { .. } => ErrorKind::RoiOutside,
            PreprocessError::Internal(_) => return ApiError::internal(e.to_string()),
        };
        ApiError::new(kind, e.to_string())
    }
}

impl From<BatchError> for ApiError {
    fn from(e: BatchError) -> Self {
        match e {
            BatchError::QueueFull { .. } => ApiError::new(ErrorKind::Overloaded, e.to_string()),
            BatchError::ShuttingDown => ApiError::new(ErrorKind::Draining, e.to_string()),
            BatchError::DeadlineExpired { .. } => ApiError::new(ErrorKind::Deadline, e.to_string()),
            BatchError::Inference(_) => ApiError {
                kind: ErrorKind::InferenceFailed,
                message: "inference failed on this request's pass; the lane was restarted and the server \
                          log has the details; retrying is safe"
                    .into(),
                details: None,
                detail: Some(e.to_string()),
            },
        }
    }
}

impl From<PoolError> for ApiError {
    fn from(e: PoolError) -> Self {
        match e {
            PoolError::Full(_) => ApiError::new(ErrorKind::Overloaded, format!("{e}; retry shortly")),
            PoolError::Closed => ApiError::new(ErrorKind::Draining, e.to_string()),
            PoolError::Panicked => ApiError::internal(e.to_string()),
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn every_kind_maps_to_its_documented_status() {
        // docs/http-api.md's error table, row by row.
        let table = [
            (ErrorKind::UnknownModel, 404, "unknown_model"),
            (ErrorKind::BadImage, 400, "bad_image"),
            (ErrorKind::TooLarge, 413, "too_large"),
            (ErrorKind::UnsupportedFormat, 415, "unsupported_format"),
            (ErrorKind::TooSmall, 422, "too_small"),
            (ErrorKind::RoiOutside, 422, "roi_outside"),
            (ErrorKind::Overloaded, 503, "overloaded"),
            (ErrorKind::BadRequest, 400, "bad_request"),
            (ErrorKind::NotReady, 503, "not_ready"),
            (ErrorKind::Draining, 503, "draining"),
            (ErrorKind::Deadline, 504, "deadline"),
            (ErrorKind::BodyTimeout, 408, "body_timeout"),
            (ErrorKind::InferenceFailed, 500, "inference_failed"),
            (ErrorKind::NotFound, 404, "not_found"),
            (ErrorKind::MethodNotAllowed, 405, "method_not_allowed"),
            (ErrorKind::Stalled, 503, "stalled"),
            (ErrorKind::Unauthorized, 401, "unauthorized"),
            (ErrorKind::Forbidden, 403, "forbidden"),
            (ErrorKind::Busy, 409, "busy"),
            (ErrorKind::ReloadFailed, 422, "reload_failed"),
            (ErrorKind::HeadersTooLarge, 431, "headers_too_large"),
            (ErrorKind::TooManyConnections, 503, "too_many_connections"),
            (ErrorKind::Internal, 500, "internal"),
        ];
        for (kind, status, name) in table {
            assert_eq!(kind.status().as_u16(), status, "{name}");
            assert_eq!(kind.as_str(), name);
            assert_eq!(serde_json::to_value(kind).unwrap(), name);
        }
    }

    #[test]
    fn overloaded_carries_retry_after_and_internal_hides_detail() {
        let r = ApiError::new(ErrorKind::Overloaded, "full").into_response();
        assert_eq!(r.status(), 503);
        assert_eq!(r.headers()[header::RETRY_AFTER], "1");
        let r = ApiError::internal("secret stack").into_response();
        assert_eq!(r.status(), 500);
        assert_eq!(r.extensions().get::<InternalDetail>().unwrap().0, "secret stack");
    }

    #[test]
    fn client_faults_never_become_500() {
        for e in
            [PreprocessError::Empty, PreprocessError::BadImage("x".into()), PreprocessError::Unsupported("gif".into())]
        {
            assert_ne!(ApiError::from(e).kind, ErrorKind::Internal);
        }
    }

    #[test]
    fn evaluate_names_preprocessing_failures_as_the_api_does() {
        let all = [
            PreprocessError::Empty,
            PreprocessError::BadImage("x".into()),
            PreprocessError::Unsupported("gif".into()),
            PreprocessError::TooLarge { width: 9, height: 9, max_pixels: 1 },
            PreprocessError::TooLargeUnknown { max_pixels: 1, detail: "x".into() },
            PreprocessError::TooSmall { width: 1, height: 1, min_side: 8 },
            PreprocessError::Internal("x".into()),
        ];
        for e in all {
            let kind = e.kind();
            assert_eq!(ApiError::from(e).kind.as_str(), kind);
        }
    }
}
