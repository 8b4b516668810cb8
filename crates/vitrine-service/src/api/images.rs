//! Images: paged listing, metadata, thumbnails, neighbours, and uploads.

use std::fs::OpenOptions;
use std::io::Write;
use std::path::{Component, Path, PathBuf};

use actix_web::http::header;
use actix_web::{get, post, web, HttpRequest, HttpResponse};
use serde::{Deserialize, Serialize};
use utoipa::{IntoParams, ToSchema};
use vitrine_engine::splits::canonical_split;
use vitrine_imaging::decode_bytes;
use vitrine_store::{ImageId, ImageRecord};

use super::jobs::start_index_job;
use super::{authorise, blocking, checked_k, filter_of, Hits, PageWindow, State};
use crate::collection::{Query, Snapshot};
use crate::error::{ApiError, ErrorBody};
use crate::jobs::{JobKind, JobStatus};
use crate::thumbnails::make_thumbnail;
use crate::upload::{read_uploads, ImageBytes, ImageForm, UploadedFile};

/// What the index knows about one image.
#[derive(Debug, Serialize, ToSchema)]
pub struct ImageInfo {
    pub id: u64,
    /// Relative to `root`, `/`-separated.
    pub path: String,
    pub root: String,
    pub split: Option<String>,
    pub label: Option<String>,
    /// File size in bytes.
    pub byte_size: u64,
    pub width: u32,
    pub height: u32,
    /// BLAKE3 of the file's bytes, hex.
    pub content_hash: String,
    /// BLAKE3 of the decoded pixels, hex.
    pub pixel_hash: String,
    pub modified_unix_ns: i64,
}

fn image_info(snapshot: &Snapshot, row: usize) -> ImageInfo {
    let image = snapshot.catalog.image_ref(row);
    let record: &ImageRecord = &snapshot.catalog.records[row];
    ImageInfo {
        id: image.id,
        path: image.path,
        root: image.root,
        split: image.split,
        label: image.label,
        byte_size: record.byte_size,
        width: record.width,
        height: record.height,
        content_hash: hex::encode(record.content_hash),
        pixel_hash: hex::encode(record.pixel_hash),
        modified_unix_ns: record.modified_unix_ns,
    }
}

#[derive(Debug, Deserialize, IntoParams)]
#[into_params(parameter_in = Query)]
pub struct ListParams {
    /// Page number, from 1.
    pub page: Option<usize>,
    pub per_page: Option<usize>,
    /// Only images of this split.
    pub split: Option<String>,
    /// Only images with this label.
    pub label: Option<String>,
    /// Only images whose relative path starts with this.
    pub prefix: Option<String>,
}

#[derive(Debug, Serialize, ToSchema)]
pub struct ImagesPage {
    pub items: Vec<ImageInfo>,
    pub total: usize,
    pub page: usize,
    pub per_page: usize,
}

/// Indexed images, by increasing id, optionally filtered.
#[utoipa::path(
    operation_id = "list_images",
    tag = "images",
    params(("collection" = String, Path, description = "Collection name"), ListParams),
    responses(
        (status = 200, body = ImagesPage),
        (status = 400, body = ErrorBody),
        (status = 404, body = ErrorBody),
    )
)]
#[get("/collections/{collection}/images")]
pub async fn list(
    state: State,
    path: web::Path<String>,
    query: web::Query<ListParams>,
) -> Result<HttpResponse, ApiError> {
    let collection = state.collection(&path)?;
    let window = PageWindow::new(query.page, query.per_page, &state.settings)?;
    let query = query.into_inner();
    let snapshot = collection.snapshot();
    let records = &snapshot.catalog.records;
    let filter = filter_of(query.split, query.label, query.prefix);
    filter.check_known(&snapshot.catalog)?;
    let mut rows: Vec<usize> = (0..records.len())
        .filter(|&row| filter.accepts_record(&records[row]))
        .collect();
    rows.sort_by_key(|&row| snapshot.catalog.ids[row]);
    let items = rows[window.range(rows.len())]
        .iter()
        .map(|&row| image_info(&snapshot, row))
        .collect();
    Ok(HttpResponse::Ok().json(ImagesPage {
        items,
        total: rows.len(),
        page: window.page,
        per_page: window.per_page,
    }))
}

fn row_of(snapshot: &Snapshot, id: ImageId) -> Result<usize, ApiError> {
    snapshot.catalog.row(id).ok_or_else(|| {
        ApiError::not_found(
            "unknown_image",
            format!("no image with id {id} in this collection"),
        )
    })
}

/// One image's metadata.
#[utoipa::path(
    operation_id = "image_metadata",
    tag = "images",
    params(
        ("collection" = String, Path, description = "Collection name"),
        ("id" = u64, Path, description = "Image id"),
    ),
    responses(
        (status = 200, body = ImageInfo),
        (status = 400, body = ErrorBody),
        (status = 404, body = ErrorBody),
    )
)]
#[get("/collections/{collection}/images/{id}")]
pub async fn metadata(
    state: State,
    path: web::Path<(String, ImageId)>,
) -> Result<HttpResponse, ApiError> {
    let (name, id) = path.into_inner();
    let snapshot = state.collection(&name)?.snapshot();
    let row = row_of(&snapshot, id)?;
    Ok(HttpResponse::Ok().json(image_info(&snapshot, row)))
}

#[derive(Debug, Deserialize, IntoParams)]
#[into_params(parameter_in = Query)]
pub struct ThumbnailParams {
    /// Longest side in pixels (default 160; capped by the server's `thumbnail_max_size`).
    pub size: Option<u32>,
}

/// A JPEG thumbnail of an indexed image, made from the indexed file.
#[utoipa::path(
    operation_id = "image_thumbnail",
    tag = "images",
    params(
        ("collection" = String, Path, description = "Collection name"),
        ("id" = u64, Path, description = "Image id"),
        ThumbnailParams,
    ),
    responses(
        (status = 200, description = "JPEG thumbnail", content_type = "image/jpeg", body = ImageBytes),
        (status = 400, body = ErrorBody),
        (status = 404, body = ErrorBody),
        (status = 410, description = "The indexed file is gone or unreadable", body = ErrorBody),
    )
)]
#[get("/collections/{collection}/images/{id}/thumbnail")]
pub async fn thumbnail(
    state: State,
    path: web::Path<(String, ImageId)>,
    query: web::Query<ThumbnailParams>,
) -> Result<HttpResponse, ApiError> {
    let (name, id) = path.into_inner();
    let size = query.size.unwrap_or(160);
    if size == 0 {
        return Err(ApiError::bad_request(
            "invalid_size",
            "size must be at least 1",
        ));
    }
    let size = size.min(state.settings.thumbnail_max_size);
    let snapshot = state.collection(&name)?.snapshot();
    row_of(&snapshot, id)?;
    let key = (name, id, size);
    let jpeg = match state.thumbnails.cached(&key) {
        Some(jpeg) => jpeg,
        None => {
            let file = snapshot
                .catalog
                .absolute_path(id)
                .ok_or_else(|| ApiError::internal(format!("image {id} has no root")))?;
            let limits = state.index.decode.clone();
            let jpeg = blocking(move || make_thumbnail(&file, size, &limits)).await?;
            state.thumbnails.keep(key, jpeg.clone());
            jpeg
        }
    };
    Ok(HttpResponse::Ok()
        .content_type("image/jpeg")
        .insert_header((header::CACHE_CONTROL, "private, max-age=3600"))
        .body(jpeg))
}

#[derive(Debug, Deserialize, IntoParams)]
#[into_params(parameter_in = Query)]
pub struct NeighbourParams {
    /// How many neighbours (default 10; capped by the server's `max_k`).
    pub k: Option<usize>,
    /// Only images of this split.
    pub split: Option<String>,
    /// Only images with this label.
    pub label: Option<String>,
    /// Only images whose relative path starts with this.
    pub prefix: Option<String>,
}

/// Nearest neighbours of an indexed image (itself excluded), best first.
#[utoipa::path(
    operation_id = "image_neighbours",
    tag = "images",
    params(
        ("collection" = String, Path, description = "Collection name"),
        ("id" = u64, Path, description = "Image id"),
        NeighbourParams,
    ),
    responses(
        (status = 200, body = Hits),
        (status = 400, body = ErrorBody),
        (status = 404, body = ErrorBody),
    )
)]
#[get("/collections/{collection}/images/{id}/neighbours")]
pub async fn neighbours(
    state: State,
    path: web::Path<(String, ImageId)>,
    query: web::Query<NeighbourParams>,
) -> Result<HttpResponse, ApiError> {
    let (name, id) = path.into_inner();
    let collection = state.collection(&name)?;
    let k = checked_k(query.k, &state.settings)?;
    let query = query.into_inner();
    let filter = filter_of(query.split, query.label, query.prefix);
    let hits = blocking(move || collection.nearest(Query::Image(id), k, &filter)).await?;
    Ok(HttpResponse::Ok().json(Hits::from_neighbours(hits)))
}

#[derive(Debug, Deserialize, IntoParams)]
#[into_params(parameter_in = Query)]
pub struct UploadParams {
    /// Split of the uploaded images (`train`, `val` or `test`).
    pub split: Option<String>,
    /// Label of the uploaded images (needs `split`).
    pub label: Option<String>,
}

#[derive(Debug, Serialize, ToSchema)]
pub struct UploadAccepted {
    /// Where the images were saved, relative to the root.
    pub saved: Vec<String>,
    /// The job indexing them.
    pub job: JobStatus,
}

/// A label becomes a folder name: no separators, no `..`, nothing hidden.
fn checked_label(label: &str) -> Result<(), ApiError> {
    let plain = !label.is_empty()
        && label.len() <= 100
        && !label.starts_with('.')
        && label
            .chars()
            .all(|c| c.is_alphanumeric() || matches!(c, '-' | '_' | '.' | ' '));
    if plain {
        Ok(())
    } else {
        Err(ApiError::bad_request(
            "invalid_label",
            format!("label `{label}` must be a plain name (letters, digits, space, `-`, `_`, `.`)"),
        ))
    }
}

/// The upload folder (relative to a root) for this split and label.
fn upload_folder(folder: &str, params: &UploadParams) -> Result<PathBuf, ApiError> {
    let mut relative = PathBuf::from(folder);
    if !relative
        .components()
        .all(|c| matches!(c, Component::Normal(_)))
    {
        return Err(ApiError::internal(format!(
            "the configured upload folder `{folder}` is not a relative path without `..`"
        )));
    }
    match (&params.split, &params.label) {
        (None, Some(_)) => {
            return Err(ApiError::bad_request(
                "label_without_split",
                "a label is only recorded for images of a split: give `split` too",
            ))
        }
        (Some(split), label) => {
            let canonical = canonical_split(split).ok_or_else(|| {
                ApiError::bad_request(
                    "invalid_split",
                    format!("split `{split}` is not one of train, val, test"),
                )
            })?;
            relative.push(canonical);
            if let Some(label) = label {
                checked_label(label)?;
                relative.push(label);
            }
        }
        (None, None) => {}
    }
    Ok(relative)
}

/// A safe file name from the client's, with the extension of the detected format.
fn file_name_for(file: &UploadedFile, index: usize) -> String {
    let extension = image::guess_format(&file.bytes)
        .ok()
        .and_then(|f| f.extensions_str().first().copied())
        .unwrap_or("img");
    let stem: String = file
        .file_name
        .as_deref()
        .and_then(|n| Path::new(n).file_stem())
        .map(|s| s.to_string_lossy())
        .unwrap_or_default()
        .chars()
        .filter(|c| c.is_ascii_alphanumeric() || matches!(c, '-' | '_'))
        .take(80)
        .collect();
    let stem = if stem.is_empty() {
        format!("upload-{index}")
    } else {
        stem
    };
    format!("{stem}.{extension}")
}

/// Writes `bytes` under `dir` as `name`, or `stem-N.ext` when taken: never
/// overwrites a file.
fn save_new_file(dir: &Path, name: &str, bytes: &[u8]) -> Result<PathBuf, ApiError> {
    let (stem, extension) = name.rsplit_once('.').unwrap_or((name, "img"));
    for attempt in 0..1000 {
        let candidate = if attempt == 0 {
            dir.join(name)
        } else {
            dir.join(format!("{stem}-{attempt}.{extension}"))
        };
        match OpenOptions::new()
            .write(true)
            .create_new(true)
            .open(&candidate)
        {
            Ok(mut file) => {
                file.write_all(bytes)
                    .and_then(|_| file.sync_all())
                    .map_err(|e| {
                        ApiError::internal(format!("cannot write {}: {e}", candidate.display()))
                    })?;
                return Ok(candidate);
            }
            Err(e) if e.kind() == std::io::ErrorKind::AlreadyExists => continue,
            Err(e) => {
                return Err(ApiError::internal(format!(
                    "cannot create {}: {e}",
                    candidate.display()
                )))
            }
        }
    }
    Err(ApiError::new(
        actix_web::http::StatusCode::CONFLICT,
        "name_taken",
        format!("too many files are already named like {name}"),
    ))
}

/// Adds images: saves them in the upload folder of the collection's first
/// root (never overwriting a file) and indexes them in a background job.
#[utoipa::path(
    operation_id = "upload_images",
    tag = "images",
    params(("collection" = String, Path, description = "Collection name"), UploadParams),
    request_body(
        description = "One image's bytes (image/*), or a multipart/form-data form with file fields",
        content(
            (ImageBytes = "image/*"),
            (ImageForm = "multipart/form-data"),
        )
    ),
    security(("bearer" = [])),
    responses(
        (status = 202, description = "Saved; indexing in the background", body = UploadAccepted),
        (status = 400, body = ErrorBody),
        (status = 401, body = ErrorBody),
        (status = 403, body = ErrorBody),
        (status = 404, body = ErrorBody),
        (status = 413, body = ErrorBody),
        (status = 415, body = ErrorBody),
        (status = 422, body = ErrorBody),
        (status = 503, body = ErrorBody),
    )
)]
#[post("/collections/{collection}/images")]
pub async fn upload(
    req: HttpRequest,
    state: State,
    path: web::Path<String>,
    query: web::Query<UploadParams>,
    payload: web::Payload,
) -> Result<HttpResponse, ApiError> {
    authorise(&req, &state)?;
    let collection = state.collection(&path)?;
    let snapshot = collection.snapshot();
    let encoder = state.encoder_for(&snapshot.fingerprint)?;
    let relative = upload_folder(&state.settings.upload_folder, &query)?;
    let (_, root) = snapshot
        .roots
        .iter()
        .min_by_key(|(id, _)| *id)
        .cloned()
        .ok_or_else(|| {
            ApiError::new(
                actix_web::http::StatusCode::CONFLICT,
                "no_root",
                "the collection has no indexed folder to save uploads in",
            )
        })?;
    let files = read_uploads(&req, payload, state.settings.max_body_bytes).await?;
    let limits = state.upload_limits.clone();
    let saved = blocking(move || {
        // Every file must decode before any is saved.
        for file in &files {
            decode_bytes(&file.bytes, &limits)?;
        }
        let dir = root.join(&relative);
        std::fs::create_dir_all(&dir)
            .map_err(|e| ApiError::internal(format!("cannot create {}: {e}", dir.display())))?;
        let mut saved = Vec::new();
        for (index, file) in files.iter().enumerate() {
            let written = save_new_file(&dir, &file_name_for(file, index), &file.bytes)?;
            let relative = written.strip_prefix(&root).unwrap_or(&written);
            saved.push(
                relative
                    .components()
                    .map(|c| c.as_os_str().to_string_lossy())
                    .collect::<Vec<_>>()
                    .join("/"),
            );
        }
        Ok((saved, root))
    })
    .await?;
    let (saved, root) = saved;
    let job = start_index_job(&state, &collection, JobKind::Upload, vec![root], encoder)?;
    Ok(HttpResponse::Accepted().json(UploadAccepted { saved, job }))
}
