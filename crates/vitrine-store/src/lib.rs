//! vitrine-store: one image collection on disk.
//!
//! A collection is a directory holding a sled database (image records, L2-normalised
//! embeddings, roots, per-file errors, format version and model fingerprint) and the
//! dumped HNSW graph (cosine similarity, in hnsw_rs' file layout) used for
//! nearest-neighbour search.
//! See [`Store`] for the consistency rules between the two.

mod compact;
mod construct;
mod distance;
mod dump;
mod error;
mod graph;
mod keys;
mod store;
mod types;

pub use error::StoreError;
pub use graph::Graph;
pub use store::{Store, FORMAT_VERSION, OLDEST_READABLE_FORMAT};
pub use types::{ChangeSet, FileError, HnswParams, ImageId, ImageRecord, ModelFingerprint, Upsert};
