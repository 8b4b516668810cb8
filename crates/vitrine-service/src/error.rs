//! Errors: the JSON error every failed request answers with, and the errors
//! that stop the service from starting.

use std::path::PathBuf;

use actix_web::http::{header, StatusCode};
use actix_web::{HttpResponse, ResponseError};
use serde::Serialize;
use utoipa::ToSchema;
use vitrine_engine::EngineError;
use vitrine_imaging::ImagingError;
use vitrine_store::StoreError;

/// Why the service could not start.
#[derive(Debug, thiserror::Error)]
pub enum ServiceError {
    #[error("cannot draw the page key from the operating system's random source: {0}")]
    PageKey(String),
    #[error("refusing to listen on {bind}: only loopback addresses are allowed without a token (set VITRINE_TOKEN or [serve] token)")]
    PublicBindWithoutToken { bind: String },
    #[error("cannot listen on {bind}: {source}")]
    Bind {
        bind: String,
        #[source]
        source: std::io::Error,
    },
    #[error("cannot open collection `{name}` at {dir}: {source}")]
    OpenCollection {
        name: String,
        dir: PathBuf,
        #[source]
        source: Box<EngineError>,
    },
    #[error("collection name `{0}` is used twice")]
    DuplicateCollection(String),
    #[error("collection name `{0}` is invalid: use letters, digits, `-`, `_` and `.`")]
    BadCollectionName(String),
    #[error("invalid setting {name}: {reason}")]
    BadSetting { name: &'static str, reason: String },
    #[error("cannot set up metrics: {0}")]
    Metrics(#[from] prometheus::Error),
    #[error("server stopped with an error: {0}")]
    Run(#[source] std::io::Error),
    #[error("cannot start the background threads: {0}")]
    BackgroundThreads(#[source] rayon::ThreadPoolBuildError),
}

/// The body of every error response.
#[derive(Debug, Serialize, ToSchema)]
pub struct ErrorBody {
    pub error: ErrorDetail,
}

#[derive(Debug, Serialize, ToSchema)]
pub struct ErrorDetail {
    /// Stable machine-readable code, e.g. `unknown_image`.
    #[schema(example = "unknown_image")]
    pub code: String,
    /// Human-readable explanation.
    pub message: String,
}

/// An error answered to the client as `{"error": {"code", "message"}}`.
#[derive(Debug, Clone)]
pub struct ApiError {
    pub status: StatusCode,
    pub code: &'static str,
    pub message: String,
    /// Seconds for a `Retry-After` header (busy or unavailable answers).
    pub retry_after_s: Option<u32>,
}

impl ApiError {
    pub fn new(status: StatusCode, code: &'static str, message: impl Into<String>) -> Self {
        Self {
            status,
            code,
            message: message.into(),
            retry_after_s: None,
        }
    }

    pub fn bad_request(code: &'static str, message: impl Into<String>) -> Self {
        Self::new(StatusCode::BAD_REQUEST, code, message)
    }

    pub fn not_found(code: &'static str, message: impl Into<String>) -> Self {
        Self::new(StatusCode::NOT_FOUND, code, message)
    }

    pub fn unavailable(code: &'static str, message: impl Into<String>) -> Self {
        Self {
            retry_after_s: Some(5),
            ..Self::new(StatusCode::SERVICE_UNAVAILABLE, code, message)
        }
    }

    pub fn internal(message: impl std::fmt::Display) -> Self {
        tracing::error!("internal error: {message}");
        Self::new(
            StatusCode::INTERNAL_SERVER_ERROR,
            "internal_error",
            "the server failed to answer; see its log",
        )
    }

    pub fn payload_too_large(limit: usize) -> Self {
        Self::new(
            StatusCode::PAYLOAD_TOO_LARGE,
            "payload_too_large",
            format!("request body is over the limit of {limit} bytes"),
        )
    }

    pub fn body(&self) -> ErrorBody {
        ErrorBody {
            error: ErrorDetail {
                code: self.code.into(),
                message: self.message.clone(),
            },
        }
    }
}

impl std::fmt::Display for ApiError {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        write!(f, "{}: {}", self.code, self.message)
    }
}

impl ResponseError for ApiError {
    fn status_code(&self) -> StatusCode {
        self.status
    }

    fn error_response(&self) -> HttpResponse {
        let mut response = HttpResponse::build(self.status);
        if let Some(seconds) = self.retry_after_s {
            response.insert_header((header::RETRY_AFTER, seconds.to_string()));
        }
        if self.status == StatusCode::UNAUTHORIZED {
            response.insert_header((header::WWW_AUTHENTICATE, "Bearer"));
        }
        response.json(self.body())
    }
}

impl From<ImagingError> for ApiError {
    fn from(err: ImagingError) -> Self {
        let message = err.to_string();
        match err {
            ImagingError::TooManyPixels { .. } => {
                Self::new(StatusCode::PAYLOAD_TOO_LARGE, "too_many_pixels", message)
            }
            ImagingError::TooLarge { .. } => {
                Self::new(StatusCode::PAYLOAD_TOO_LARGE, "payload_too_large", message)
            }
            ImagingError::EmptyFile | ImagingError::NotAnImage => {
                Self::new(StatusCode::UNPROCESSABLE_ENTITY, "not_an_image", message)
            }
            ImagingError::Unsupported(_) => Self::new(
                StatusCode::UNPROCESSABLE_ENTITY,
                "unsupported_image_format",
                message,
            ),
            ImagingError::Truncated(_) | ImagingError::Corrupt(_) | ImagingError::Preprocess(_) => {
                Self::new(StatusCode::UNPROCESSABLE_ENTITY, "corrupt_image", message)
            }
            ImagingError::Io { .. } => Self::internal(message),
        }
    }
}

impl From<EngineError> for ApiError {
    fn from(err: EngineError) -> Self {
        let message = vitrine_engine::error::describe(&err);
        match err {
            EngineError::UnknownImage(_) => Self::not_found("unknown_image", message),
            EngineError::UnknownPath(_) => Self::not_found("unknown_path", message),
            EngineError::InvalidArgument(_) | EngineError::Analytics(_) => {
                Self::bad_request("invalid_argument", message)
            }
            EngineError::UnknownSplit { .. } => Self::bad_request("unknown_split", message),
            EngineError::UnknownLabel { .. } => Self::bad_request("unknown_label", message),
            EngineError::NoImageMatches(_) => Self::bad_request("no_image_matches", message),
            EngineError::InvalidDecision(_) => Self::bad_request("invalid_decision", message),
            EngineError::DecisionConflict { .. } => {
                Self::new(StatusCode::CONFLICT, "decision_conflict", message)
            }
            EngineError::ModelNotCollectionModel { .. } => {
                Self::new(StatusCode::CONFLICT, "model_mismatch", message)
            }
            EngineError::Imaging(inner) => inner.into(),
            EngineError::Store(StoreError::DimensionMismatch { .. }) => {
                Self::bad_request("dimension_mismatch", message)
            }
            EngineError::Store(StoreError::InvalidEmbedding { .. }) => {
                Self::bad_request("invalid_vector", message)
            }
            EngineError::Store(StoreError::UnknownImage { .. }) => {
                Self::not_found("unknown_image", message)
            }
            _ => Self::internal(message),
        }
    }
}
