//! Visual search: by an uploaded image, or by an embedding vector.

use actix_web::{post, web, HttpRequest, HttpResponse};
use serde::Deserialize;
use utoipa::ToSchema;
use vitrine_imaging::{decode_bytes, preprocess, DecodeOptions};

use super::images::NeighbourParams;
use super::{blocking, checked_k, filter_of, Hits, State};
use crate::collection::Query;
use crate::error::{ApiError, ErrorBody};
use crate::upload::{read_uploads, ImageBytes, ImageForm};

/// Images most similar to an uploaded image, best first.
#[utoipa::path(
    operation_id = "search_by_image",
    tag = "search",
    params(("collection" = String, Path, description = "Collection name"), NeighbourParams),
    request_body(
        description = "The image's bytes (image/*), or a multipart/form-data form with a file field",
        content(
            (ImageBytes = "image/*"),
            (ImageForm = "multipart/form-data"),
        )
    ),
    responses(
        (status = 200, body = Hits),
        (status = 400, body = ErrorBody),
        (status = 404, body = ErrorBody),
        (status = 409, description = "The loaded model is not the collection's", body = ErrorBody),
        (status = 413, body = ErrorBody),
        (status = 415, body = ErrorBody),
        (status = 422, body = ErrorBody),
        (status = 503, description = "No model is loaded", body = ErrorBody),
    )
)]
#[post("/collections/{collection}/search")]
pub async fn by_image(
    req: HttpRequest,
    state: State,
    path: web::Path<String>,
    query: web::Query<NeighbourParams>,
    payload: web::Payload,
) -> Result<HttpResponse, ApiError> {
    let collection = state.collection(&path)?;
    let k = checked_k(query.k, &state.settings)?;
    let encoder = state.encoder_for(&collection.snapshot().fingerprint)?;
    let query = query.into_inner();
    let filter = filter_of(query.split, query.label, query.prefix);
    let mut files = read_uploads(&req, payload, state.settings.max_body_bytes).await?;
    if files.len() > 1 {
        return Err(ApiError::bad_request(
            "one_image_only",
            "search takes one image; the form has several",
        ));
    }
    let file = files.remove(0);
    let options = DecodeOptions {
        target_shorter_side: Some(encoder.spec().preprocess.resize_shorter),
        ..state.upload_limits.clone()
    };
    let hits = blocking(move || {
        let decoded = decode_bytes(&file.bytes, &options)?;
        let prepared = preprocess(&decoded.rgb, &encoder.spec().preprocess)?;
        let embedding = encoder
            .embed(std::slice::from_ref(&prepared))
            .map_err(ApiError::internal)?
            .pop()
            .ok_or_else(|| ApiError::internal("the model returned no embedding"))?;
        collection.nearest(Query::Vector(&embedding), k, &filter)
    })
    .await?;
    Ok(HttpResponse::Ok().json(Hits::from_neighbours(hits)))
}

/// A search by embedding vector.
#[derive(Debug, Deserialize, ToSchema)]
#[serde(deny_unknown_fields)]
pub struct VectorSearch {
    /// A vector of the collection's dimension (need not be normalised).
    pub vector: Vec<f32>,
    /// How many neighbours (default 10; capped by the server's `max_k`).
    pub k: Option<usize>,
    pub split: Option<String>,
    pub label: Option<String>,
    /// Relative path prefix.
    pub prefix: Option<String>,
}

/// Images whose embeddings are most similar to a vector, best first.
#[utoipa::path(
    operation_id = "search_by_vector",
    tag = "search",
    params(("collection" = String, Path, description = "Collection name")),
    request_body = VectorSearch,
    responses(
        (status = 200, body = Hits),
        (status = 400, body = ErrorBody),
        (status = 404, body = ErrorBody),
        (status = 413, body = ErrorBody),
    )
)]
#[post("/collections/{collection}/search/vector")]
pub async fn by_vector(
    state: State,
    path: web::Path<String>,
    body: web::Json<VectorSearch>,
) -> Result<HttpResponse, ApiError> {
    let collection = state.collection(&path)?;
    let body = body.into_inner();
    let k = checked_k(body.k, &state.settings)?;
    let filter = filter_of(body.split, body.label, body.prefix);
    let vector = body.vector;
    let hits = blocking(move || collection.nearest(Query::Vector(&vector), k, &filter)).await?;
    Ok(HttpResponse::Ok().json(Hits::from_neighbours(hits)))
}
