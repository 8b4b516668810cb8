//! The engine: walking folders, incremental ingest, and every query the
//! users come for (neighbours, duplicates, leakage, clusters, labels).
//!
//! Knows nothing of HTTP or command-line parsing.

pub mod analytics;
pub mod calibrate;
pub mod catalog;
pub mod clusters;
pub mod decisions;
pub mod duplicates;
pub mod error;
pub mod ingest;
pub mod labels;
pub mod neighbours;
pub mod progress;
pub mod questions;
pub mod shards;
pub mod splits;
pub mod status;
pub mod verify;
pub mod walk;

pub use error::EngineError;
