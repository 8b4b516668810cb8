//! Errors of the engine: its own, and those of the crates it drives.

use std::path::PathBuf;

#[derive(Debug, thiserror::Error)]
pub enum EngineError {
    #[error(transparent)]
    Store(#[from] vitrine_store::StoreError),
    #[error(transparent)]
    Model(#[from] vitrine_model::error::ModelError),
    #[error(transparent)]
    Imaging(#[from] vitrine_imaging::ImagingError),
    #[error("root {root} cannot be read: {message}")]
    UnreadableRoot { root: PathBuf, message: String },
    #[error("ignore pattern `{pattern}` is invalid: {message}")]
    BadIgnorePattern { pattern: String, message: String },
    #[error("manifest {path} is invalid: {message}")]
    BadManifest { path: PathBuf, message: String },
    #[error("no image with id {0} in this collection")]
    UnknownImage(u64),
    #[error("the collection's embeddings were made by {stored}, but the loaded model is {loaded}")]
    ModelNotCollectionModel { stored: String, loaded: String },
    #[error("invalid argument: {0}")]
    InvalidArgument(String),
    #[error("near-duplicate verification was stopped (the service is shutting down)")]
    VerificationStopped,
}
