//! Background jobs: rescans, reclustering, and their status.

use std::path::PathBuf;
use std::sync::Arc;

use actix_web::{get, post, web, HttpRequest, HttpResponse};
use vitrine_engine::ingest::index_roots;
use vitrine_model::encoder::Encoder;

use super::clusters::{clustering, ClusterParams};
use super::{authorise, State};
use crate::collection::Collection;
use crate::error::{ApiError, ErrorBody};
use crate::jobs::{IndexCounts, JobKind, JobStatus};
use crate::state::AppState;

/// Starts a background job indexing `roots` into `collection`.
pub fn start_index_job(
    state: &AppState,
    collection: &Arc<Collection>,
    kind: JobKind,
    roots: Vec<PathBuf>,
    encoder: Arc<Encoder>,
) -> Result<JobStatus, ApiError> {
    let options = state.index.clone();
    let target = collection.clone();
    state.jobs.submit(
        kind,
        &collection.name,
        Box::new(move |job| {
            target
                .write(|store| index_roots(store, &encoder, &roots, &options, job))
                .map(|report| Some(IndexCounts::from(report)))
                .map_err(|e| e.to_string())
        }),
    )
}

/// Re-indexes every root of the collection in the background.
#[utoipa::path(
    operation_id = "start_rescan",
    tag = "jobs",
    params(("collection" = String, Path, description = "Collection name")),
    security(("bearer" = [])),
    responses(
        (status = 202, description = "Job queued", body = JobStatus),
        (status = 401, body = ErrorBody),
        (status = 403, body = ErrorBody),
        (status = 404, body = ErrorBody),
        (status = 409, description = "The loaded model is not the collection's", body = ErrorBody),
        (status = 503, description = "No model is loaded, or shutting down", body = ErrorBody),
    )
)]
#[post("/collections/{collection}/jobs/rescan")]
pub async fn rescan(
    req: HttpRequest,
    state: State,
    path: web::Path<String>,
) -> Result<HttpResponse, ApiError> {
    authorise(&req, &state)?;
    let collection = state.collection(&path)?;
    let snapshot = collection.snapshot();
    let encoder = state.encoder_for(&snapshot.fingerprint)?;
    let roots = snapshot.roots.iter().map(|(_, p)| p.clone()).collect();
    let job = start_index_job(&state, &collection, JobKind::Rescan, roots, encoder)?;
    Ok(HttpResponse::Accepted().json(job))
}

/// Recomputes the clustering for `k` and `seed` in the background; the
/// summaries endpoint then answers from it.
#[utoipa::path(
    operation_id = "start_clustering",
    tag = "jobs",
    params(("collection" = String, Path, description = "Collection name"), ClusterParams),
    security(("bearer" = [])),
    responses(
        (status = 202, description = "Job queued", body = JobStatus),
        (status = 400, body = ErrorBody),
        (status = 401, body = ErrorBody),
        (status = 403, body = ErrorBody),
        (status = 404, body = ErrorBody),
    )
)]
#[post("/collections/{collection}/jobs/clusters")]
pub async fn recluster(
    req: HttpRequest,
    state: State,
    path: web::Path<String>,
    query: web::Query<ClusterParams>,
) -> Result<HttpResponse, ApiError> {
    authorise(&req, &state)?;
    let collection = state.collection(&path)?;
    let options = query.options(&state.settings)?;
    let target = collection.clone();
    let job = state.jobs.submit(
        JobKind::Clusters,
        &collection.name,
        Box::new(move |_| {
            clustering(&target, &target.snapshot(), &options)
                .map(|_| None)
                .map_err(|e| e.message)
        }),
    )?;
    Ok(HttpResponse::Accepted().json(job))
}

/// A job's state, progress, counts and error.
#[utoipa::path(
    operation_id = "job_status",
    tag = "jobs",
    params(
        ("collection" = String, Path, description = "Collection name"),
        ("job_id" = u64, Path, description = "Job id"),
    ),
    responses(
        (status = 200, body = JobStatus),
        (status = 400, body = ErrorBody),
        (status = 404, body = ErrorBody),
    )
)]
#[get("/collections/{collection}/jobs/{job_id}")]
pub async fn status(
    state: State,
    path: web::Path<(String, u64)>,
) -> Result<HttpResponse, ApiError> {
    let (name, job_id) = path.into_inner();
    let collection = state.collection(&name)?;
    let job = state
        .jobs
        .get(job_id)
        .filter(|job| job.collection == collection.name)
        .ok_or_else(|| {
            ApiError::not_found(
                "unknown_job",
                format!("no job {job_id} for collection `{name}`"),
            )
        })?;
    Ok(HttpResponse::Ok().json(job))
}
