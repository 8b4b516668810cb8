use std::path::PathBuf;

use crate::types::{ImageId, ModelFingerprint};

/// Everything that can go wrong while reading or writing a collection store.
#[derive(Debug, thiserror::Error)]
pub enum StoreError {
    #[error("no collection store at {path}")]
    NotAStore { path: PathBuf },

    #[error(
        "store at {path} was built with model {stored} but {requested} was requested \
         (they differ in {differing})"
    )]
    ModelMismatch {
        path: PathBuf,
        stored: Box<ModelFingerprint>,
        requested: Box<ModelFingerprint>,
        /// Comma-separated names of the fingerprint fields that differ.
        differing: String,
    },

    #[error(
        "store at {path} has format version {found}, newer than this build supports \
         (format version {supported})"
    )]
    NewerFormat {
        path: PathBuf,
        found: u32,
        supported: u32,
    },

    #[error(
        "store at {path} has format version {found}, older than the oldest this build reads \
         (format version {oldest_readable})"
    )]
    OlderFormat {
        path: PathBuf,
        found: u32,
        oldest_readable: u32,
    },

    #[error(
        "store at {path} is open in another process (waited {waited:?} for its lock); \
         stop that process or use another store"
    )]
    InUse {
        path: PathBuf,
        waited: std::time::Duration,
    },

    #[error("database error in store at {path}: {source}")]
    Database {
        path: PathBuf,
        #[source]
        source: sled::Error,
    },

    #[error("i/o error on {path}: {source}")]
    Io {
        path: PathBuf,
        #[source]
        source: std::io::Error,
    },

    #[error("corrupt entry {key} in store at {path}: {reason}")]
    Corrupt {
        path: PathBuf,
        key: String,
        reason: String,
    },

    #[error("could not encode entry {key}: {reason}")]
    Encode { key: String, reason: String },

    #[error("embedding for {what} has dimension {found}, the store's model produces {expected}")]
    DimensionMismatch {
        what: String,
        expected: usize,
        found: usize,
    },

    #[error("embedding for {what} is not a finite, non-zero vector")]
    InvalidEmbedding { what: String },

    #[error("image id {id} does not exist in the store")]
    UnknownImage { id: ImageId },

    #[error("root id {root} (named by {rel_path}) is not registered in the store")]
    UnknownRoot { root: u32, rel_path: String },

    #[error("change set names {rel_path} in root {root} more than once")]
    DuplicateInChangeSet { root: u32, rel_path: String },

    #[error("image id {id} is both replaced and removed in one change set")]
    ConflictingChange { id: ImageId },

    #[error("root path {path} is not valid UTF-8")]
    NonUtf8Path { path: PathBuf },

    #[error("could not write the nearest-neighbour index to {path}: {reason}")]
    IndexDump { path: PathBuf, reason: String },
}
