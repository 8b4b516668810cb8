//! Reading uploaded images from a request body: either the raw bytes of one
//! image or the file fields of a `multipart/form-data` form, within the body
//! size limit.

use actix_multipart::Multipart;
use actix_web::http::header;
use actix_web::web::{Bytes, BytesMut, Payload};
use actix_web::HttpRequest;
use futures_util::StreamExt;

use crate::error::ApiError;

/// An image file's bytes, as documented in the OpenAPI document.
#[derive(utoipa::ToSchema)]
#[schema(value_type = String, format = Binary)]
pub struct ImageBytes(pub Vec<u8>);

/// A `multipart/form-data` form with image files, as documented.
#[derive(utoipa::ToSchema)]
pub struct ImageForm {
    /// One or more file fields (any field name; `file` is usual).
    #[schema(value_type = String, format = Binary)]
    pub file: Vec<u8>,
}

/// One uploaded file.
pub struct UploadedFile {
    /// The client's file name, if it gave one (never trusted as a path).
    pub file_name: Option<String>,
    pub bytes: Bytes,
}

fn malformed(err: impl std::fmt::Display) -> ApiError {
    ApiError::bad_request(
        "malformed_multipart",
        format!("cannot read the form: {err}"),
    )
}

/// Appends `chunk` to `buffer`, failing with 413 once `used + buffer` would
/// pass `limit`.
fn append_within(
    buffer: &mut BytesMut,
    chunk: &[u8],
    used: usize,
    limit: usize,
) -> Result<(), ApiError> {
    if used + buffer.len() + chunk.len() > limit {
        return Err(ApiError::payload_too_large(limit));
    }
    buffer.extend_from_slice(chunk);
    Ok(())
}

/// The uploaded files of the request: one for a raw image body, every file
/// field of a multipart form. Answers 415 for other content types and 400
/// when nothing was uploaded.
pub async fn read_uploads(
    req: &HttpRequest,
    mut payload: Payload,
    limit: usize,
) -> Result<Vec<UploadedFile>, ApiError> {
    let content_type = req
        .headers()
        .get(header::CONTENT_TYPE)
        .and_then(|v| v.to_str().ok())
        .unwrap_or("")
        .to_ascii_lowercase();
    let declared_length = req
        .headers()
        .get(header::CONTENT_LENGTH)
        .and_then(|v| v.to_str().ok())
        .and_then(|v| v.parse::<usize>().ok());
    if declared_length.is_some_and(|n| n > limit) {
        return Err(ApiError::payload_too_large(limit));
    }
    let mut files = Vec::new();
    if content_type.starts_with("multipart/form-data") {
        let mut form = Multipart::new(req.headers(), payload);
        let mut used = 0;
        while let Some(field) = form.next().await {
            let mut field = field.map_err(malformed)?;
            let file_name = field
                .content_disposition()
                .and_then(|d| d.get_filename())
                .map(str::to_owned);
            let mut buffer = BytesMut::new();
            while let Some(chunk) = field.next().await {
                append_within(&mut buffer, &chunk.map_err(malformed)?, used, limit)?;
            }
            used += buffer.len();
            // Plain form fields (without a file name) are not images.
            if file_name.is_some() || field.name() == Some("file") {
                files.push(UploadedFile {
                    file_name,
                    bytes: buffer.freeze(),
                });
            }
        }
    } else if content_type.starts_with("image/")
        || content_type.starts_with("application/octet-stream")
    {
        let mut buffer = BytesMut::new();
        while let Some(chunk) = payload.next().await {
            let chunk = chunk.map_err(|e| {
                ApiError::bad_request("unreadable_body", format!("cannot read the body: {e}"))
            })?;
            append_within(&mut buffer, &chunk, 0, limit)?;
        }
        files.push(UploadedFile {
            file_name: None,
            bytes: buffer.freeze(),
        });
    } else {
        return Err(ApiError::new(
            actix_web::http::StatusCode::UNSUPPORTED_MEDIA_TYPE,
            "unsupported_media_type",
            "send the image's bytes with an image/* content type, or a multipart/form-data form with a file field",
        ));
    }
    files.retain(|f| !f.bytes.is_empty());
    if files.is_empty() {
        return Err(ApiError::bad_request(
            "no_image",
            "the request carries no image",
        ));
    }
    Ok(files)
}
