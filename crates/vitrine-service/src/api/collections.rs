//! Collections: the list, each one's status, and its per-file errors.

use std::collections::BTreeMap;

use actix_web::{get, web, HttpResponse};
use serde::{Deserialize, Serialize};
use utoipa::{IntoParams, ToSchema};

use super::{PageWindow, State};
use crate::collection::{Collection, PrecomputedReports, Snapshot};
use crate::error::{ApiError, ErrorBody};
use crate::state::AppState;

/// The model that made a collection's embeddings.
#[derive(Debug, Serialize, ToSchema)]
pub struct ModelInfo {
    pub id: String,
    /// Model id, weights checksum prefix, pooling and dimension.
    pub description: String,
    pub weights_sha256: String,
    pub pooling: String,
    pub dimension: usize,
}

/// Counts and facts about one collection.
#[derive(Debug, Serialize, ToSchema)]
pub struct CollectionStatus {
    pub name: String,
    pub images: usize,
    /// Files that could not be indexed.
    pub errors: usize,
    /// Images per split; `(none)` counts images without a split.
    pub splits: BTreeMap<String, usize>,
    /// Images per label; `(none)` counts images without a label.
    pub labels: BTreeMap<String, usize>,
    pub roots: Vec<String>,
    pub model: ModelInfo,
    /// Size of the nearest-neighbour index files on disk.
    pub index_disk_bytes: u64,
    /// Whether search by uploaded image (and rescans) can run: the loaded
    /// model is the collection's.
    pub model_loaded: bool,
    /// Where the default duplicate and leak reports, computed in the
    /// background at start, stand. Searches never wait for them.
    pub precomputed_reports: PrecomputedReports,
}

#[derive(Debug, Serialize, ToSchema)]
pub struct CollectionList {
    pub collections: Vec<CollectionStatus>,
}

const NONE: &str = "(none)";

fn status_of(state: &AppState, collection: &Collection, snapshot: &Snapshot) -> CollectionStatus {
    let mut splits = BTreeMap::new();
    let mut labels = BTreeMap::new();
    for record in &snapshot.catalog.records {
        *splits
            .entry(record.split.clone().unwrap_or_else(|| NONE.into()))
            .or_insert(0) += 1;
        *labels
            .entry(record.label.clone().unwrap_or_else(|| NONE.into()))
            .or_insert(0) += 1;
    }
    let fingerprint = &snapshot.fingerprint;
    CollectionStatus {
        name: collection.name.clone(),
        images: snapshot.catalog.len(),
        errors: snapshot.errors.len(),
        splits,
        labels,
        roots: snapshot
            .roots
            .iter()
            .map(|(_, p)| p.display().to_string())
            .collect(),
        model: ModelInfo {
            id: fingerprint.model_id.clone(),
            description: fingerprint.to_string(),
            weights_sha256: fingerprint.weights_sha256.clone(),
            pooling: fingerprint.pooling.clone(),
            dimension: fingerprint.dim,
        },
        index_disk_bytes: snapshot.index_disk_bytes,
        model_loaded: state.encoder_for(fingerprint).is_ok(),
        precomputed_reports: collection.precomputed_reports(),
    }
}

/// Every served collection with its status.
#[utoipa::path(
    operation_id = "list_collections",
    tag = "collections",
    responses((status = 200, body = CollectionList))
)]
#[get("/collections")]
pub async fn list(state: State) -> HttpResponse {
    let collections = state
        .collections
        .values()
        .map(|c| status_of(&state, c, &c.snapshot()))
        .collect();
    HttpResponse::Ok().json(CollectionList { collections })
}

/// One collection's status.
#[utoipa::path(
    operation_id = "collection_status",
    tag = "collections",
    params(("collection" = String, Path, description = "Collection name")),
    responses(
        (status = 200, body = CollectionStatus),
        (status = 404, description = "Unknown collection", body = ErrorBody),
    )
)]
#[get("/collections/{collection}/status")]
pub async fn status(state: State, path: web::Path<String>) -> Result<HttpResponse, ApiError> {
    let collection = state.collection(&path)?;
    Ok(HttpResponse::Ok().json(status_of(&state, &collection, &collection.snapshot())))
}

#[derive(Debug, Deserialize, IntoParams)]
#[into_params(parameter_in = Query)]
pub struct PageParams {
    /// Page number, from 1.
    pub page: Option<usize>,
    /// Items per page (capped by the server's `max_page_size`).
    pub per_page: Option<usize>,
}

/// A file that could not be indexed.
#[derive(Debug, Serialize, ToSchema)]
pub struct FileErrorInfo {
    pub root: String,
    pub path: String,
    pub reason: String,
    pub at_unix_s: i64,
}

#[derive(Debug, Serialize, ToSchema)]
pub struct ErrorsPage {
    pub items: Vec<FileErrorInfo>,
    pub total: usize,
    pub page: usize,
    pub per_page: usize,
}

/// Files of the collection that could not be indexed, and why.
#[utoipa::path(
    operation_id = "collection_errors",
    tag = "collections",
    params(("collection" = String, Path, description = "Collection name"), PageParams),
    responses(
        (status = 200, body = ErrorsPage),
        (status = 400, body = ErrorBody),
        (status = 404, body = ErrorBody),
    )
)]
#[get("/collections/{collection}/errors")]
pub async fn errors(
    state: State,
    path: web::Path<String>,
    query: web::Query<PageParams>,
) -> Result<HttpResponse, ApiError> {
    let collection = state.collection(&path)?;
    let window = PageWindow::new(query.page, query.per_page, &state.settings)?;
    let snapshot = collection.snapshot();
    let roots: BTreeMap<u32, String> = snapshot
        .roots
        .iter()
        .map(|(id, p)| (*id, p.display().to_string()))
        .collect();
    let items = snapshot.errors[window.range(snapshot.errors.len())]
        .iter()
        .map(|e| FileErrorInfo {
            root: roots.get(&e.root).cloned().unwrap_or_default(),
            path: e.rel_path.clone(),
            reason: e.reason.clone(),
            at_unix_s: e.at_unix_s,
        })
        .collect();
    Ok(HttpResponse::Ok().json(ErrorsPage {
        items,
        total: snapshot.errors.len(),
        page: window.page,
        per_page: window.per_page,
    }))
}
