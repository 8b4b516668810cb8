//! The versioned JSON API under `/api/v1/`, one module per resource.

pub mod analyses;
pub mod clusters;
pub mod collections;
pub mod decisions;
pub mod images;
pub mod jobs;
pub mod labels;
pub mod reports;
pub mod search;
pub mod system;

use std::ops::Range;

use actix_web::{web, HttpRequest};
use serde::Serialize;
use utoipa::ToSchema;
use vitrine_engine::neighbours::{Neighbour, NeighbourFilter};

use crate::error::ApiError;
use crate::settings::ServeSettings;
use crate::state::AppState;

pub type State = web::Data<AppState>;

/// Registers every API route.
pub fn configure(cfg: &mut web::ServiceConfig) {
    cfg.service(
        web::scope("/api/v1")
            .service(collections::list)
            .service(collections::status)
            .service(collections::errors)
            .service(images::list)
            .service(images::metadata)
            .service(images::thumbnail)
            .service(images::neighbours)
            .service(images::upload)
            .service(search::by_image)
            .service(search::by_vector)
            .service(analyses::duplicates)
            .service(analyses::leaks)
            .service(clusters::summaries)
            .service(clusters::members)
            .service(labels::suggestions)
            .service(labels::suspects)
            .service(reports::report)
            .service(decisions::page_key)
            .service(decisions::list)
            .service(decisions::record)
            .service(decisions::manifest)
            .service(jobs::rescan)
            .service(jobs::recluster)
            .service(jobs::status),
    );
}

/// A neighbour as the API answers it.
#[derive(Debug, Serialize, ToSchema)]
pub struct ImageHit {
    pub id: u64,
    /// Relative to `root`, `/`-separated.
    pub path: String,
    pub root: String,
    pub split: Option<String>,
    pub label: Option<String>,
    /// Cosine similarity to the query.
    pub similarity: f32,
}

impl From<Neighbour> for ImageHit {
    fn from(n: Neighbour) -> Self {
        Self {
            id: n.image.id,
            path: n.image.path,
            root: n.image.root,
            split: n.image.split,
            label: n.image.label,
            similarity: n.similarity,
        }
    }
}

#[derive(Debug, Serialize, ToSchema)]
pub struct Hits {
    pub hits: Vec<ImageHit>,
}

impl Hits {
    pub fn from_neighbours(neighbours: Vec<Neighbour>) -> Self {
        Self {
            hits: neighbours.into_iter().map(ImageHit::from).collect(),
        }
    }
}

/// Checks a requested `k` against the configured cap.
pub fn checked_k(k: Option<usize>, settings: &ServeSettings) -> Result<usize, ApiError> {
    let k = k.unwrap_or(settings.default_k);
    if k == 0 || k > settings.max_k {
        return Err(ApiError::bad_request(
            "k_out_of_range",
            format!("k must be between 1 and {}", settings.max_k),
        ));
    }
    Ok(k)
}

pub fn filter_of(
    split: Option<String>,
    label: Option<String>,
    prefix: Option<String>,
) -> NeighbourFilter {
    NeighbourFilter {
        split,
        label,
        path_prefix: prefix,
    }
}

/// Which slice of a listing a page covers.
pub struct PageWindow {
    pub page: usize,
    pub per_page: usize,
}

impl PageWindow {
    /// `page` counts from 1.
    pub fn new(
        page: Option<usize>,
        per_page: Option<usize>,
        settings: &ServeSettings,
    ) -> Result<Self, ApiError> {
        let page = page.unwrap_or(1);
        let per_page = per_page.unwrap_or(settings.default_page_size);
        if page == 0 {
            return Err(ApiError::bad_request(
                "page_out_of_range",
                "page counts from 1",
            ));
        }
        if per_page == 0 || per_page > settings.max_page_size {
            return Err(ApiError::bad_request(
                "page_size_out_of_range",
                format!("per_page must be between 1 and {}", settings.max_page_size),
            ));
        }
        Ok(Self { page, per_page })
    }

    /// The indices of a listing of `total` items on this page (empty past the end).
    pub fn range(&self, total: usize) -> Range<usize> {
        let start = (self.page - 1).saturating_mul(self.per_page).min(total);
        start..start.saturating_add(self.per_page).min(total)
    }
}

/// The bearer token check of write endpoints.
pub fn authorise(req: &HttpRequest, state: &AppState) -> Result<(), ApiError> {
    let Some(expected) = &state.token else {
        return Err(ApiError::new(
            actix_web::http::StatusCode::FORBIDDEN,
            "writes_disabled",
            "no token is configured, so write endpoints are disabled (set VITRINE_TOKEN)",
        ));
    };
    let given = req
        .headers()
        .get(actix_web::http::header::AUTHORIZATION)
        .and_then(|value| value.to_str().ok())
        .and_then(|value| value.strip_prefix("Bearer "))
        .ok_or_else(|| {
            ApiError::new(
                actix_web::http::StatusCode::UNAUTHORIZED,
                "missing_token",
                "write endpoints need an `Authorization: Bearer <token>` header",
            )
        })?;
    // Hashes compare in constant time, so the answer's timing says nothing
    // about how much of the token was right.
    if blake3::hash(given.trim().as_bytes()) != blake3::hash(expected.as_bytes()) {
        return Err(ApiError::new(
            actix_web::http::StatusCode::FORBIDDEN,
            "invalid_token",
            "the bearer token is wrong",
        ));
    }
    Ok(())
}

/// Runs CPU-heavy or blocking work off the async workers.
pub async fn blocking<R: Send + 'static>(
    work: impl FnOnce() -> Result<R, ApiError> + Send + 'static,
) -> Result<R, ApiError> {
    web::block(work).await.map_err(ApiError::internal)?
}
