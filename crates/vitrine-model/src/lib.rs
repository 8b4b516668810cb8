//! The Vision Transformer encoder: model description, canonical weights,
//! checkpoint loading and import, and the forward pass.
//!
//! Knows nothing of indexes, stores or HTTP.

pub mod config;
pub mod encoder;
pub mod error;
pub mod families;
pub mod fetch;
pub mod import;
pub mod interpolate;
mod kernels;
pub mod layout;
pub mod model_dir;
pub mod onnx;
pub mod vit;

pub use error::ModelError;
