//! Image decoding and model preprocessing.
//!
//! This crate turns bytes into pixels and pixels into the normalised tensor
//! layout a model expects. It knows nothing of models, indexes or HTTP.

use serde::{Deserialize, Serialize};

pub mod decode;
mod error;
pub mod preprocess;

pub use decode::{
    decode_bytes, decode_path, read_dimensions, DecodeOptions, DecodedImage, ImageFormatKind,
};
pub use error::ImagingError;
pub use preprocess::preprocess;

/// How a model wants its input prepared. Stored with every model so that the
/// same recipe is applied at indexing and at query time.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct PreprocessSpec {
    /// The shorter side is resized to this many pixels (antialiased bicubic).
    pub resize_shorter: u32,
    /// Then a centred square of this side is cut out.
    pub crop: u32,
    /// Per-channel mean (RGB, on the 0..1 scale) subtracted after scaling.
    pub mean: [f32; 3],
    /// Per-channel standard deviation (RGB, on the 0..1 scale).
    pub std: [f32; 3],
}

/// A preprocessed image: planar RGB (channel, row, column), normalised f32.
#[derive(Clone, Debug, PartialEq)]
pub struct PreparedImage {
    pub width: u32,
    pub height: u32,
    /// `3 * height * width` values, channel-major.
    pub chw: Vec<f32>,
}
