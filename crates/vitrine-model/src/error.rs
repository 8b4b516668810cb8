//! The one error type of this crate.

use std::fmt;
use std::path::PathBuf;

/// A tensor whose shape is not the one the layout asks for.
#[derive(Clone, Debug, PartialEq, Eq)]
pub struct ShapeMismatch {
    pub name: String,
    pub expected: Vec<usize>,
    pub found: Vec<usize>,
}

impl fmt::Display for ShapeMismatch {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        write!(
            f,
            "{} is {:?}, expected {:?}",
            self.name, self.found, self.expected
        )
    }
}

#[derive(Debug, thiserror::Error)]
pub enum ModelError {
    #[error("i/o error on {path}: {source}")]
    Io {
        path: PathBuf,
        #[source]
        source: std::io::Error,
    },

    #[error("{path} is not an ONNX model: {reason}")]
    NotOnnx { path: PathBuf, reason: String },

    #[error("ONNX tensor {tensor} keeps its data in an external file, which is not supported")]
    ExternalData { tensor: String },

    #[error("tensor {tensor} is missing")]
    MissingTensor { tensor: String },

    #[error("tensor {tensor} has data type {dtype}, expected {expected}")]
    UnsupportedDtype {
        tensor: String,
        dtype: String,
        expected: String,
    },

    #[error("tensor {tensor} is malformed: {reason}")]
    MalformedTensor { tensor: String, reason: String },

    /// The graph decodes but does not have the structure the importer needs.
    #[error("unrecognised model graph: {reason}")]
    UnrecognisedGraph { reason: String },

    /// The tensor set does not match [`crate::layout::expected_tensors`].
    #[error("{}", layout_mismatch_message(.missing, .unexpected, .wrong_shape))]
    LayoutMismatch {
        missing: Vec<String>,
        unexpected: Vec<String>,
        wrong_shape: Vec<ShapeMismatch>,
    },

    #[error(
        "{path} has format version {found}, this build reads up to version {supported}; \
         upgrade vitrine or import the model again"
    )]
    FormatTooNew {
        path: PathBuf,
        found: u32,
        supported: u32,
    },

    #[error("invalid JSON in {path}: {source}")]
    Json {
        path: PathBuf,
        #[source]
        source: serde_json::Error,
    },

    #[error("invalid safetensors file {path}: {source}")]
    Safetensors {
        path: PathBuf,
        #[source]
        source: safetensors::SafeTensorError,
    },

    #[error("checksum mismatch for {path}: expected sha256 {expected}, found {actual}")]
    ChecksumMismatch {
        path: PathBuf,
        expected: String,
        actual: String,
    },

    #[error("`{command}` failed ({status}): {stderr}")]
    CommandFailed {
        command: String,
        status: String,
        stderr: String,
    },

    #[error("`{command}` left no wheel in {dir}")]
    NoWheel { command: String, dir: PathBuf },

    #[error("invalid zip archive {path}: {source}")]
    Archive {
        path: PathBuf,
        #[source]
        source: zip::result::ZipError,
    },

    #[error("{path} has no entry {entry}")]
    ArchiveEntryMissing { path: PathBuf, entry: String },

    #[error("{path} is neither a model directory (with model.json) nor an .onnx file")]
    NotAModel { path: PathBuf },

    #[error("invalid model input: {0}")]
    InvalidInput(String),

    #[error("tensor computation failed: {0}")]
    Candle(#[from] candle_core::Error),
}

impl ModelError {
    pub(crate) fn io(path: impl Into<PathBuf>, source: std::io::Error) -> Self {
        ModelError::Io {
            path: path.into(),
            source,
        }
    }
}

fn layout_mismatch_message(
    missing: &[String],
    unexpected: &[String],
    wrong_shape: &[ShapeMismatch],
) -> String {
    let mut parts = Vec::new();
    if !missing.is_empty() {
        parts.push(format!("missing: {}", missing.join(", ")));
    }
    if !unexpected.is_empty() {
        parts.push(format!("unexpected: {}", unexpected.join(", ")));
    }
    if !wrong_shape.is_empty() {
        let shapes: Vec<String> = wrong_shape.iter().map(ToString::to_string).collect();
        parts.push(format!("wrong shape: {}", shapes.join(", ")));
    }
    format!(
        "tensors do not match the model layout ({})",
        parts.join("; ")
    )
}
