//! The model description stored beside the weights (`model.json`).
//!
//! Weights always live in our own canonical tensor layout (see
//! [`crate::layout`]); family-specific names are translated when a checkpoint
//! is loaded or imported, so the forward pass knows one layout only.

use serde::{Deserialize, Serialize};
use vitrine_imaging::PreprocessSpec;

/// Version of the `model.json` + `model.safetensors` pair we write.
pub const MODEL_FORMAT_VERSION: u32 = 1;

/// The published family a checkpoint came from. Informative only: the
/// architecture switches below decide what the forward pass does.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum Family {
    /// The original ViT (Dosovitskiy et al., 2021), transformers `ViTModel` layout.
    Vit,
    /// DINOv2 (Oquab et al., 2023), transformers `Dinov2Model` layout.
    Dinov2,
    /// DINOv2 with register tokens (Darcet et al., 2024).
    Dinov2Registers,
    /// The CLIP image tower (Radford et al., 2021): pre-LN, projection head.
    Clip,
}

#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum Activation {
    /// Exact GELU with erf.
    Gelu,
    /// x * sigmoid(1.702 x), used by CLIP checkpoints.
    QuickGelu,
}

/// Where the final LayerNorm applies.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum FinalNorm {
    /// To every token (ViT, DINOv2): hidden states are normalised.
    AllTokens,
    /// Only to the pooled vector (CLIP's `post_layernorm`): hidden states are raw.
    PooledOnly,
}

/// How the position grid is resized to another patch grid.
#[derive(Clone, Copy, Debug, Default, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum PosInterpolation {
    /// PyTorch bicubic without antialiasing (a = -0.75): ViT, DINOv2, CLIP.
    #[default]
    Bicubic,
    /// PyTorch bicubic with antialiasing (a = -0.5, stretched kernel), as
    /// transformers' DINOv2-with-registers uses.
    BicubicAntialias,
}

/// How a token sequence becomes one embedding.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum Pooling {
    /// The final class token.
    Cls,
    /// The mean of the patch tokens (class and register tokens excluded).
    Mean,
    /// Both, each L2-normalised, concatenated and scaled by 1/sqrt(2), so that
    /// the cosine of two such vectors is the mean of the two cosines.
    ClsMean,
}

/// Optional linear projection after pooling (CLIP's `visual_projection`).
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize, Deserialize)]
pub struct Projection {
    pub dim: usize,
    pub bias: bool,
}

/// The architecture: every switch the forward pass reads.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct VitConfig {
    pub family: Family,
    pub hidden_size: usize,
    pub num_layers: usize,
    pub num_heads: usize,
    pub mlp_size: usize,
    pub patch_size: usize,
    pub num_channels: usize,
    /// Side of the patch grid the position table was trained at (37 for
    /// DINOv2 at 518 px); other grids are reached by bicubic interpolation.
    pub pos_grid: usize,
    #[serde(default)]
    pub pos_interpolation: PosInterpolation,
    pub num_registers: usize,
    pub layer_scale: bool,
    pub patch_bias: bool,
    pub qkv_bias: bool,
    /// CLIP applies a LayerNorm to the embeddings before the first block.
    pub pre_norm: bool,
    pub final_norm: FinalNorm,
    pub activation: Activation,
    pub layer_norm_eps: f64,
    pub projection: Option<Projection>,
}

/// Everything stored in `model.json`.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct ModelSpec {
    pub format_version: u32,
    /// A short name of our choosing, e.g. `dinov2-vit-s14`.
    pub id: String,
    pub vit: VitConfig,
    pub pooling: Pooling,
    pub preprocess: PreprocessSpec,
    /// Lower-case hex SHA-256 of `model.safetensors`.
    pub weights_sha256: String,
    /// Where the weights came from, for people.
    pub source: String,
}
