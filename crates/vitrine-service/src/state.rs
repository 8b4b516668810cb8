//! What the service is started with, and the state its handlers share.

use std::collections::BTreeMap;
use std::path::PathBuf;
use std::sync::Arc;
use std::time::Duration;

use vitrine_engine::duplicates::DuplicateOptions;
use vitrine_engine::ingest::{fingerprint_of, IndexOptions};
use vitrine_imaging::DecodeOptions;
use vitrine_model::encoder::Encoder;
use vitrine_store::ModelFingerprint;

use crate::collection::Collection;
use crate::error::{ApiError, ServiceError};
use crate::jobs::{background_pool, Jobs};
use crate::metrics::Metrics;
use crate::settings::ServeSettings;
use crate::thumbnails::Thumbnails;

/// How long a whole-collection query waits for a running index job before
/// answering 503 `collection_busy`.
pub const BUSY_WAIT: Duration = Duration::from_secs(2);

/// The embedding model, or why there is none. Without a model the service
/// still serves every query on stored embeddings; search by uploaded image,
/// rescans and uploads answer 503 `model_unavailable`.
pub enum Model {
    Loaded(Arc<Encoder>),
    Missing(String),
}

/// Everything the service is started with (the command line builds it from
/// the configuration file and its flags).
pub struct ServiceConfig {
    pub settings: ServeSettings,
    /// (name, store directory), in the order they are listed.
    pub collections: Vec<(String, PathBuf)>,
    pub model: Model,
    /// How rescans and uploads are indexed (walk, split rule, decoding, batches).
    pub index: IndexOptions,
    /// Defaults of duplicate and leak queries.
    pub duplicates: DuplicateOptions,
    /// The default reference split of leak reports; `None`: each split
    /// against every split before it.
    pub reference_split: Option<String>,
}

pub struct AppState {
    pub settings: ServeSettings,
    pub token: Option<String>,
    /// A secret of this process that the page sends with its writes when no
    /// token is configured (see `api::decision_author`); other web sites
    /// cannot read it.
    pub page_key: String,
    pub collections: BTreeMap<String, Arc<Collection>>,
    pub model: Model,
    pub index: IndexOptions,
    pub duplicates: DuplicateOptions,
    pub reference_split: Option<String>,
    pub jobs: Arc<Jobs>,
    pub thumbnails: Thumbnails,
    pub metrics: Metrics,
    /// Limits applied to uploaded images.
    pub upload_limits: DecodeOptions,
    /// Background work's own threads (see [`crate::jobs::background_pool`]).
    pub background: Arc<rayon::ThreadPool>,
}

fn valid_collection_name(name: &str) -> bool {
    !name.is_empty()
        && name.len() <= 64
        && name
            .chars()
            .all(|c| c.is_ascii_alphanumeric() || matches!(c, '-' | '_' | '.'))
        && !name.starts_with('.')
}

impl AppState {
    pub fn new(config: ServiceConfig) -> Result<Self, ServiceError> {
        let settings = config.settings;
        for (name, value) in [
            ("max_k", settings.max_k),
            ("max_page_size", settings.max_page_size),
            ("max_body_bytes", settings.max_body_bytes),
        ] {
            if value == 0 {
                return Err(ServiceError::BadSetting {
                    name,
                    reason: "must be at least 1".into(),
                });
            }
        }
        let mut collections = BTreeMap::new();
        for (name, dir) in config.collections {
            if !valid_collection_name(&name) {
                return Err(ServiceError::BadCollectionName(name));
            }
            if collections.contains_key(&name) {
                return Err(ServiceError::DuplicateCollection(name));
            }
            let collection = Collection::open(name.clone(), dir.clone()).map_err(|source| {
                ServiceError::OpenCollection {
                    name: name.clone(),
                    dir,
                    source: Box::new(source),
                }
            })?;
            collections.insert(name, Arc::new(collection));
        }
        let upload_limits = DecodeOptions {
            max_pixels: settings.max_upload_pixels,
            max_file_bytes: settings.max_body_bytes as u64,
            target_shorter_side: None,
        };
        let background = Arc::new(background_pool().map_err(ServiceError::BackgroundThreads)?);
        let mut key = [0u8; 16];
        getrandom::fill(&mut key).map_err(|err| ServiceError::PageKey(err.to_string()))?;
        Ok(Self {
            token: settings.effective_token(),
            page_key: hex::encode(key),
            jobs: Arc::new(Jobs::new(settings.heavy_jobs, background.clone())),
            background,
            thumbnails: Thumbnails::new(settings.thumbnail_cache_entries),
            metrics: Metrics::new()?,
            collections,
            model: config.model,
            index: config.index,
            duplicates: config.duplicates,
            reference_split: config.reference_split,
            upload_limits,
            settings,
        })
    }

    pub fn collection(&self, name: &str) -> Result<Arc<Collection>, ApiError> {
        self.collections.get(name).cloned().ok_or_else(|| {
            ApiError::not_found(
                "unknown_collection",
                format!("no collection named `{name}` is served here"),
            )
        })
    }

    /// The encoder, checked to be the one that made `fingerprint`'s embeddings.
    pub fn encoder_for(&self, fingerprint: &ModelFingerprint) -> Result<Arc<Encoder>, ApiError> {
        match &self.model {
            Model::Missing(reason) => Err(ApiError::unavailable(
                "model_unavailable",
                format!("no embedding model is loaded: {reason}"),
            )),
            Model::Loaded(encoder) => {
                let loaded = fingerprint_of(encoder);
                if &loaded == fingerprint {
                    Ok(encoder.clone())
                } else {
                    Err(ApiError::new(
                        actix_web::http::StatusCode::CONFLICT,
                        "model_mismatch",
                        format!(
                            "the collection's embeddings were made by {fingerprint}, the loaded model is {loaded}"
                        ),
                    ))
                }
            }
        }
    }
}
