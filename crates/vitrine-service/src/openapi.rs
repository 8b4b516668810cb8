//! The OpenAPI 3 document, generated from the handlers and wire types.

use utoipa::openapi::security::{HttpAuthScheme, HttpBuilder, SecurityScheme};
use utoipa::{Modify, OpenApi};

use crate::api::{
    analyses, clusters, collections, decisions, images, jobs, labels, reports, search, system,
};

/// The versioned API, nested under `/api/v1`.
#[derive(OpenApi)]
#[openapi(paths(
    collections::list,
    collections::status,
    collections::errors,
    images::list,
    images::metadata,
    images::thumbnail,
    images::neighbours,
    images::upload,
    search::by_image,
    search::by_vector,
    analyses::duplicates,
    analyses::leaks,
    clusters::summaries,
    clusters::members,
    labels::suggestions,
    labels::suspects,
    reports::report,
    decisions::page_key,
    decisions::list,
    decisions::record,
    decisions::manifest,
    jobs::rescan,
    jobs::recluster,
    jobs::status,
))]
struct V1Api;

#[derive(OpenApi)]
#[openapi(
    info(
        title = "vitrine",
        description = "Embeddings, nearest neighbours, duplicates, split leakage, clusters and label checks for image collections. Every error answers `{\"error\": {\"code\", \"message\"}}`."
    ),
    paths(system::healthz, system::readyz, system::metrics, system::openapi),
    nest((path = "/api/v1", api = V1Api)),
    modifiers(&BearerToken),
    tags(
        (name = "collections"), (name = "images"), (name = "search"), (name = "analyses"),
        (name = "clusters"), (name = "labels"), (name = "decisions"), (name = "jobs"),
        (name = "system"),
    )
)]
pub struct ApiDoc;

/// Declares the bearer token that write endpoints require.
struct BearerToken;

impl Modify for BearerToken {
    fn modify(&self, openapi: &mut utoipa::openapi::OpenApi) {
        if let Some(components) = openapi.components.as_mut() {
            components.add_security_scheme(
                "bearer",
                SecurityScheme::Http(HttpBuilder::new().scheme(HttpAuthScheme::Bearer).build()),
            );
        }
    }
}

/// The document as pretty JSON (what `/openapi.json` serves, and the
/// checked-in `openapi.json`).
pub fn openapi_json() -> String {
    ApiDoc::openapi()
        .to_pretty_json()
        .unwrap_or_else(|e| format!("{{\"error\": \"{e}\"}}"))
}
