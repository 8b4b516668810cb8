//! vitrine-service: the HTTP service over one or more collections.
//!
//! A versioned JSON API under `/api/v1/` (described by the OpenAPI document
//! at `/openapi.json`), health, readiness and Prometheus metrics, and the
//! page's files at `/` and `/static/`. See [`collection`] for how readers stay
//! correct while an index job writes, and [`state::Model`] for what happens
//! without a model.

pub mod api;
pub mod collection;
pub mod discovery;
pub mod error;
pub mod jobs;
pub mod metrics;
pub mod openapi;
pub mod server;
pub mod settings;
pub mod state;
pub mod thumbnails;
pub mod upload;

pub use error::{ApiError, ServiceError};
pub use openapi::openapi_json;
pub use server::{serve, Service};
pub use settings::ServeSettings;
pub use state::{Model, ServiceConfig};
