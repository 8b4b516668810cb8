use std::path::PathBuf;

/// Everything that can go wrong turning a file into a model input.
///
/// Decoding failures are split by cause so callers can report "this file is
/// cut short" differently from "this is not an image at all".
#[derive(Debug, thiserror::Error)]
pub enum ImagingError {
    /// The cause is part of the message and not a `source`, so that a
    /// report of the whole chain does not say it twice.
    #[error("cannot read image file {path}: {cause}")]
    Io {
        path: PathBuf,
        cause: std::io::Error,
    },
    #[error("image file is empty")]
    EmptyFile,
    #[error("content is not a recognised image format")]
    NotAnImage,
    #[error("unsupported image format: {0}")]
    Unsupported(String),
    #[error("image data is truncated: {0}")]
    Truncated(String),
    #[error("image data is corrupt: {0}")]
    Corrupt(String),
    #[error("image is {width}x{height} pixels, over the limit of {limit} pixels")]
    TooManyPixels { width: u32, height: u32, limit: u64 },
    #[error("image file is {bytes} bytes, over the limit of {limit} bytes")]
    TooLarge { bytes: u64, limit: u64 },
    #[error("cannot preprocess image: {0}")]
    Preprocess(String),
}
