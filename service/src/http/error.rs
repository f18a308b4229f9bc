//! Errors at the HTTP edge and their RFC 9457 `application/problem+json` form.
//!
//! Every failure a handler can meet becomes an [`ApiError`]; this is the only place that
//! chooses status codes and problem types. A 5xx logs the whole cause chain and answers an
//! opaque message, so internals never reach a client.

use crate::problem::InvalidJob;
use actix_web::http::{header, StatusCode};
use actix_web::{HttpResponse, ResponseError};
use serde::Serialize;
use std::fmt;

/// Media type of problem documents.
pub const PROBLEM_JSON: &str = "application/problem+json";

/// A failure, as the client will see it.
#[derive(Debug)]
pub enum ApiError {
    /// The job (or a matrix document) failed validation: 422 with every problem.
    InvalidJob(InvalidJob),
    /// The `Idempotency-Key` was used before with a different body: 422.
    IdempotencyKeyReused {
        /// The run the key belongs to.
        run_id: String,
    },
    /// A malformed request (query, header): 400.
    BadRequest(String),
    /// No such resource: 404.
    NotFound(String),
    /// The request conflicts with the resource's state: 409.
    Conflict(String),
    /// The run has not finished, so what was asked of it does not exist yet: 409 with
    /// `Retry-After` and the run's id.
    NotFinished {
        /// The run.
        run_id: String,
        /// Its status (`queued` or `running`).
        status: &'static str,
    },
    /// The path exists but not with this method: 405 with `Allow`.
    MethodNotAllowed {
        /// The methods the path answers, as the `Allow` header lists them.
        allow: String,
    },
    /// The body's media type is not one the route reads: 415.
    UnsupportedMediaType(String),
    /// The body exceeds the limit: 413.
    PayloadTooLarge {
        /// The limit, bytes.
        limit: usize,
    },
    /// Temporarily unable to answer: 503 with `Retry-After`.
    Unavailable(String),
    /// Anything else: 500, logged, opaque to the client.
    Internal(Box<dyn std::error::Error + Send + Sync>),
}

impl ApiError {
    /// An internal error caused by `e`.
    pub fn internal(e: impl std::error::Error + Send + Sync + 'static) -> Self {
        Self::Internal(Box::new(e))
    }
}

impl fmt::Display for ApiError {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        match self {
            ApiError::InvalidJob(doc) => f.write_str(&doc.detail),
            ApiError::IdempotencyKeyReused { run_id } => {
                write!(
                    f,
                    "the Idempotency-Key belongs to run {run_id}, sent with another body"
                )
            }
            ApiError::BadRequest(m)
            | ApiError::NotFound(m)
            | ApiError::Conflict(m)
            | ApiError::UnsupportedMediaType(m)
            | ApiError::Unavailable(m) => f.write_str(m),
            ApiError::PayloadTooLarge { limit } => {
                write!(f, "the request body exceeds the limit of {limit} bytes")
            }
            ApiError::MethodNotAllowed { allow } => {
                write!(f, "this path answers {allow} only; see /openapi.yaml")
            }
            ApiError::NotFinished { run_id, status } => write!(
                f,
                "run {run_id} is {status}; its report exists once it has finished"
            ),
            ApiError::Internal(e) => write!(f, "internal error: {e}"),
        }
    }
}

/// A problem document without `errors`.
#[derive(Debug, Serialize)]
struct ProblemDoc<'a> {
    #[serde(rename = "type")]
    kind: &'a str,
    title: &'a str,
    status: u16,
    detail: String,
    #[serde(skip_serializing_if = "Option::is_none")]
    run_id: Option<&'a str>,
}

fn cause_chain(e: &(dyn std::error::Error + 'static)) -> String {
    let mut text = e.to_string();
    let mut source = e.source();
    while let Some(s) = source {
        text.push_str(": ");
        text.push_str(&s.to_string());
        source = s.source();
    }
    text
}

impl ResponseError for ApiError {
    fn status_code(&self) -> StatusCode {
        match self {
            ApiError::InvalidJob(_) | ApiError::IdempotencyKeyReused { .. } => {
                StatusCode::UNPROCESSABLE_ENTITY
            }
            ApiError::BadRequest(_) => StatusCode::BAD_REQUEST,
            ApiError::NotFound(_) => StatusCode::NOT_FOUND,
            ApiError::Conflict(_) | ApiError::NotFinished { .. } => StatusCode::CONFLICT,
            ApiError::PayloadTooLarge { .. } => StatusCode::PAYLOAD_TOO_LARGE,
            ApiError::MethodNotAllowed { .. } => StatusCode::METHOD_NOT_ALLOWED,
            ApiError::UnsupportedMediaType(_) => StatusCode::UNSUPPORTED_MEDIA_TYPE,
            ApiError::Unavailable(_) => StatusCode::SERVICE_UNAVAILABLE,
            ApiError::Internal(_) => StatusCode::INTERNAL_SERVER_ERROR,
        }
    }

    fn error_response(&self) -> HttpResponse {
        let status = self.status_code();
        let mut response = HttpResponse::build(status);
        response.insert_header((header::CONTENT_TYPE, PROBLEM_JSON));
        if let ApiError::InvalidJob(doc) = self {
            return response.json(doc);
        }
        let (kind, title) = match self {
            ApiError::InvalidJob(_) => unreachable!("answered above"),
            ApiError::IdempotencyKeyReused { .. } => {
                ("/problems/idempotency-key-reused", "Idempotency-Key reused")
            }
            ApiError::BadRequest(_) => ("/problems/bad-request", "Bad request"),
            ApiError::NotFound(_) => ("/problems/not-found", "Not found"),
            ApiError::Conflict(_) => ("/problems/conflict", "Conflict"),
            ApiError::NotFinished { .. } => ("/problems/run-not-finished", "Run not finished"),
            ApiError::PayloadTooLarge { .. } => {
                ("/problems/payload-too-large", "Payload too large")
            }
            ApiError::MethodNotAllowed { .. } => {
                ("/problems/method-not-allowed", "Method not allowed")
            }
            ApiError::UnsupportedMediaType(_) => {
                ("/problems/unsupported-media-type", "Unsupported media type")
            }
            ApiError::Unavailable(_) => ("/problems/unavailable", "Service unavailable"),
            ApiError::Internal(_) => ("/problems/internal", "Internal error"),
        };
        let detail = match self {
            ApiError::Internal(e) => {
                tracing::error!(cause = %cause_chain(e.as_ref()), "internal error");
                "the service failed to answer; the cause is in its log".to_owned()
            }
            other => other.to_string(),
        };
        if matches!(
            self,
            ApiError::Unavailable(_) | ApiError::NotFinished { .. }
        ) {
            response.insert_header((header::RETRY_AFTER, "1"));
        }
        if let ApiError::MethodNotAllowed { allow } = self {
            response.insert_header((header::ALLOW, allow.as_str()));
        }
        let run_id = match self {
            ApiError::IdempotencyKeyReused { run_id } | ApiError::NotFinished { run_id, .. } => {
                Some(run_id.as_str())
            }
            _ => None,
        };
        response.json(ProblemDoc {
            kind,
            title,
            status: status.as_u16(),
            detail,
            run_id,
        })
    }
}
