//! Health, readiness, metrics, the OpenAPI document and the page's files.

use actix_web::http::header;
use actix_web::{get, web, HttpResponse};
use rust_embed::RustEmbed;
use serde::Serialize;
use utoipa::{OpenApi, ToSchema};

use super::State;
use crate::error::ApiError;
use crate::openapi::ApiDoc;
use crate::state::Model;

#[derive(Debug, Serialize, ToSchema)]
pub struct Health {
    #[schema(example = "ok")]
    pub status: String,
}

/// Liveness: the process answers.
#[utoipa::path(operation_id = "healthz", tag = "system", responses((status = 200, body = Health)))]
#[get("/healthz")]
pub async fn healthz() -> HttpResponse {
    HttpResponse::Ok().json(Health {
        status: "ok".into(),
    })
}

#[derive(Debug, Serialize, ToSchema)]
pub struct Readiness {
    pub ready: bool,
    pub collections: usize,
    /// Whether an embedding model is loaded (needed for search by image and indexing).
    pub model_loaded: bool,
    /// Why no model is loaded.
    pub model_problem: Option<String>,
}

/// Readiness: collections are open (they are opened before the server listens).
#[utoipa::path(operation_id = "readyz", tag = "system", responses((status = 200, body = Readiness)))]
#[get("/readyz")]
pub async fn readyz(state: State) -> HttpResponse {
    let model_problem = match &state.model {
        Model::Loaded(_) => None,
        Model::Missing(reason) => Some(reason.clone()),
    };
    HttpResponse::Ok().json(Readiness {
        ready: true,
        collections: state.collections.len(),
        model_loaded: model_problem.is_none(),
        model_problem,
    })
}

/// Prometheus metrics in the text exposition format.
#[utoipa::path(
    operation_id = "metrics",
    tag = "system",
    responses((status = 200, description = "Prometheus text format", content_type = "text/plain", body = String))
)]
#[get("/metrics")]
pub async fn metrics(state: State) -> Result<HttpResponse, ApiError> {
    let text = state.metrics.render(&state)?;
    Ok(HttpResponse::Ok()
        .content_type("text/plain; version=0.0.4; charset=utf-8")
        .body(text))
}

/// This API's OpenAPI 3 document.
#[utoipa::path(
    operation_id = "openapi_document",
    tag = "system",
    responses((status = 200, description = "OpenAPI 3 document", content_type = "application/json", body = Object))
)]
#[get("/openapi.json")]
pub async fn openapi() -> HttpResponse {
    HttpResponse::Ok().json(ApiDoc::openapi())
}

/// The page's files, embedded in the binary.
#[derive(RustEmbed)]
#[folder = "static/"]
struct PageFiles;

fn page_file(name: &str) -> Result<HttpResponse, ApiError> {
    let file = PageFiles::get(name)
        .ok_or_else(|| ApiError::not_found("not_found", format!("no page file named `{name}`")))?;
    Ok(HttpResponse::Ok()
        .content_type(file.metadata.mimetype())
        .insert_header((header::CACHE_CONTROL, "no-cache"))
        .body(file.data.into_owned()))
}

#[get("/")]
pub async fn index() -> Result<HttpResponse, ApiError> {
    page_file("index.html")
}

#[get("/static/{file:.*}")]
pub async fn static_file(path: web::Path<String>) -> Result<HttpResponse, ApiError> {
    page_file(&path)
}

/// Answers 404 in our JSON shape for every unknown path.
pub async fn not_found() -> Result<HttpResponse, ApiError> {
    Err(ApiError::not_found("not_found", "no such endpoint"))
}
