//! JPEG thumbnails of indexed images, made on demand and kept in a small
//! least-recently-used cache.

use std::num::NonZeroUsize;
use std::path::Path;

use actix_web::web::Bytes;
use image::codecs::jpeg::JpegEncoder;
use image::DynamicImage;
use lru::LruCache;
use parking_lot::Mutex;
use vitrine_imaging::{decode_path, DecodeOptions};
use vitrine_store::ImageId;

use crate::error::ApiError;

/// JPEG quality of thumbnails (a common web default, from memory).
const JPEG_QUALITY: u8 = 85;

/// Identifies a thumbnail: collection, image id and size. Re-indexing a
/// changed file gives it a new id, so entries never go stale by generation.
type Key = (String, ImageId, u32);

pub struct Thumbnails {
    cache: Option<Mutex<LruCache<Key, Bytes>>>,
}

impl Thumbnails {
    pub fn new(entries: usize) -> Self {
        Self {
            cache: NonZeroUsize::new(entries).map(|n| Mutex::new(LruCache::new(n))),
        }
    }

    pub fn cached(&self, key: &Key) -> Option<Bytes> {
        self.cache.as_ref()?.lock().get(key).cloned()
    }

    pub fn keep(&self, key: Key, jpeg: Bytes) {
        if let Some(cache) = &self.cache {
            cache.lock().put(key, jpeg);
        }
    }
}

/// Decodes `path` and encodes a JPEG whose longer side is at most `size`.
pub fn make_thumbnail(path: &Path, size: u32, limits: &DecodeOptions) -> Result<Bytes, ApiError> {
    let options = DecodeOptions {
        target_shorter_side: Some(size),
        ..limits.clone()
    };
    let decoded = decode_path(path, &options).map_err(|err| {
        ApiError::new(
            actix_web::http::StatusCode::GONE,
            "image_unreadable",
            format!("the indexed file can no longer be read: {err}"),
        )
    })?;
    let thumbnail = DynamicImage::ImageRgb8(decoded.rgb).thumbnail(size, size);
    let mut jpeg = Vec::new();
    thumbnail
        .write_with_encoder(JpegEncoder::new_with_quality(&mut jpeg, JPEG_QUALITY))
        .map_err(ApiError::internal)?;
    Ok(Bytes::from(jpeg))
}
