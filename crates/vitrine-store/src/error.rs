use std::io::ErrorKind;
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

    // The cause is a source, not part of the message: a caller printing the
    // chain (anyhow's `{:#}`) would otherwise print it twice.
    #[error("database error in store at {path}")]
    Database {
        path: PathBuf,
        #[source]
        source: sled::Error,
    },

    #[error("i/o error on {path}")]
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

impl StoreError {
    /// True when a write failed because the device holding the store is full.
    /// The last commit is intact then: commits are atomic.
    pub fn is_storage_full(&self) -> bool {
        let io_error = match self {
            StoreError::Io { source, .. } => source,
            StoreError::Database {
                source: sled::Error::Io(source),
                ..
            } => source,
            _ => return false,
        };
        io_error.kind() == ErrorKind::StorageFull
    }
}

#[cfg(test)]
mod tests {
    use std::io;

    use super::*;

    /// ENOSPC, as the kernel reports a full device to a write.
    fn no_space() -> io::Error {
        io::Error::from_raw_os_error(28)
    }

    #[test]
    fn a_full_device_is_recognised_in_file_and_database_errors() {
        let path = PathBuf::from("/data/store");
        assert!(StoreError::Io {
            path: path.join("graph/index.hnsw.data"),
            source: no_space(),
        }
        .is_storage_full());
        assert!(StoreError::Database {
            path: path.clone(),
            source: sled::Error::Io(no_space()),
        }
        .is_storage_full());
        // sled hands every later caller a clone of its flusher's error, which
        // keeps the kind but not the OS code.
        let cloned = sled::Error::Io(no_space()).clone();
        assert!(StoreError::Database {
            path: path.clone(),
            source: cloned,
        }
        .is_storage_full());
        assert!(!StoreError::Io {
            path,
            source: io::Error::from(ErrorKind::PermissionDenied),
        }
        .is_storage_full());
    }

    #[test]
    fn a_cause_is_printed_once_along_the_chain() {
        for error in [
            StoreError::Database {
                path: PathBuf::from("/data/store"),
                source: sled::Error::Io(no_space()),
            },
            StoreError::Io {
                path: PathBuf::from("/data/store/graph"),
                source: no_space(),
            },
        ] {
            let printed = format!("{:#}", anyhow::Error::new(error));
            assert_eq!(
                printed.matches("No space left on device").count(),
                1,
                "{printed}"
            );
        }
    }
}
