//! Loading safetensors checkpoints of the published ViT families, in the
//! tensor layouts that Hugging Face transformers' modules save and load:
//!
//! | family | transformers class | recognised by |
//! |---|---|---|
//! | [`Family::Vit`] | `ViTModel` | `embeddings.cls_token` + `encoder.layer.{i}.layernorm_before` |
//! | [`Family::Dinov2`] | `Dinov2Model` | `embeddings.cls_token` + `encoder.layer.{i}.norm1` |
//! | [`Family::Dinov2Registers`] | `Dinov2WithRegistersModel` | as DINOv2, plus `embeddings.register_tokens` |
//! | [`Family::Clip`] | `CLIPVisionModel[WithProjection]`, `CLIPModel` | `embeddings.class_embedding` |
//!
//! Names may carry a prefix (`vit.`, `dinov2.`, `vision_model.`, ...), as in
//! checkpoints of the downstream models built around these encoders. Tensors outside
//! the image encoder are ignored: ViT's `pooler.*`, DINOv2's
//! `embeddings.mask_token`, task heads (`classifier.*`), CLIP's text tower,
//! `text_projection`, `logit_scale` and the `position_ids` buffers older
//! checkpoints carry. Anything else that is not part of the layout is an error.
//!
//! The architecture comes from the tensor shapes plus, when present, the
//! checkpoint's `config.json`; the two must agree. Only the number of
//! attention heads cannot be read off the shapes: it comes from `config.json`
//! or from [`FamilyHints::num_heads`]. Without `config.json`, the LayerNorm
//! epsilon and the activation default to the values transformers' config
//! classes default to (ViT 1e-12, DINOv2 1e-6, CLIP 1e-5; GELU, CLIP
//! quick_gelu), unless given in the hints.
//!
//! Not supported: DINOv2's SwiGLU feed-forward (the giant size), sharded
//! checkpoints (`model.safetensors.index.json`) and pickled `.bin` files.

use std::collections::{BTreeMap, BTreeSet, HashMap};
use std::path::Path;

use candle_core::{DType, Device, Tensor};
use safetensors::tensor::{Dtype, SafeTensors};
use serde::Deserialize;

use crate::config::{Activation, Family, FinalNorm, PosInterpolation, Projection, VitConfig};
use crate::error::{ModelError, ShapeMismatch};
use crate::layout;

/// Name of the weights file inside a checkpoint directory.
pub const CHECKPOINT_WEIGHTS_FILE: &str = "model.safetensors";
/// Name of the transformers configuration beside the weights.
pub const CHECKPOINT_CONFIG_FILE: &str = "config.json";

/// What the caller knows about a checkpoint beyond its tensors. Each value
/// fills in what `config.json` does not say; when both say something they must
/// agree.
#[derive(Clone, Debug, Default, PartialEq)]
pub struct FamilyHints {
    /// Attention heads per block. Required when there is no `config.json`.
    pub num_heads: Option<usize>,
    pub layer_norm_eps: Option<f64>,
    pub activation: Option<Activation>,
}

/// A checkpoint translated into our canonical layout (see [`crate::layout`]).
#[derive(Debug)]
pub struct FamilyCheckpoint {
    pub config: VitConfig,
    /// Canonical name to f32 tensor; exactly [`layout::expected_tensors`].
    pub tensors: HashMap<String, Tensor>,
}

/// The fields of a transformers `config.json` that describe the image encoder.
/// Everything is optional: missing values are read off the tensor shapes.
#[derive(Clone, Debug, Default, Deserialize)]
pub struct HfConfig {
    pub model_type: Option<String>,
    pub hidden_size: Option<usize>,
    pub num_hidden_layers: Option<usize>,
    pub num_attention_heads: Option<usize>,
    pub intermediate_size: Option<usize>,
    /// DINOv2 gives the MLP width as a multiple of the hidden size.
    pub mlp_ratio: Option<f64>,
    pub hidden_act: Option<String>,
    pub layer_norm_eps: Option<f64>,
    pub image_size: Option<usize>,
    pub patch_size: Option<usize>,
    pub num_channels: Option<usize>,
    pub qkv_bias: Option<bool>,
    pub num_register_tokens: Option<usize>,
    pub use_swiglu_ffn: Option<bool>,
    pub projection_dim: Option<usize>,
    /// `CLIPModel` nests the image encoder's settings here.
    pub vision_config: Option<Box<HfConfig>>,
}

impl HfConfig {
    pub fn read(path: &Path) -> Result<Self, ModelError> {
        let text = std::fs::read(path).map_err(|e| ModelError::io(path, e))?;
        serde_json::from_slice(&text).map_err(|source| ModelError::Json {
            path: path.to_path_buf(),
            source,
        })
    }

    /// The settings of the image encoder, and the projection width, which
    /// `CLIPModel` keeps at the top level rather than in `vision_config`.
    fn image_encoder(&self) -> (&HfConfig, Option<usize>) {
        match &self.vision_config {
            Some(vision) => (vision, self.projection_dim.or(vision.projection_dim)),
            None => (self, self.projection_dim),
        }
    }
}

/// Loads a checkpoint: either a directory holding `model.safetensors` (and
/// optionally `config.json`), or a `.safetensors` file (with an optional
/// `config.json` beside it). Tensors end up as f32 on `device`.
pub fn load_family_checkpoint(
    path: &Path,
    hints: &FamilyHints,
    device: &Device,
) -> Result<FamilyCheckpoint, ModelError> {
    let (weights_path, config_path) = if path.is_dir() {
        (
            path.join(CHECKPOINT_WEIGHTS_FILE),
            path.join(CHECKPOINT_CONFIG_FILE),
        )
    } else {
        let beside = path.with_file_name(CHECKPOINT_CONFIG_FILE);
        (path.to_path_buf(), beside)
    };
    let hf_config = if config_path.is_file() {
        Some(HfConfig::read(&config_path)?)
    } else {
        None
    };
    let bytes = std::fs::read(&weights_path).map_err(|e| ModelError::io(&weights_path, e))?;
    let file = SafeTensors::deserialize(&bytes).map_err(|source| ModelError::Safetensors {
        path: weights_path.clone(),
        source,
    })?;
    let shapes: BTreeMap<String, Vec<usize>> = file
        .tensors()
        .into_iter()
        .map(|(name, view)| (name, view.shape().to_vec()))
        .collect();
    let plan = plan_translation(&shapes, hf_config.as_ref(), hints)?;
    let mut tensors = HashMap::with_capacity(plan.renames.len());
    for rename in plan.renames {
        let view = file
            .tensor(&rename.source)
            .map_err(|source| ModelError::Safetensors {
                path: weights_path.clone(),
                source,
            })?;
        let dtype = candle_dtype(view.dtype()).ok_or_else(|| ModelError::UnsupportedDtype {
            tensor: rename.source.clone(),
            dtype: format!("{:?}", view.dtype()),
            expected: "F32, F16, BF16 or F64".into(),
        })?;
        let tensor = Tensor::from_raw_buffer(view.data(), dtype, view.shape(), &Device::Cpu)?
            .to_dtype(DType::F32)?
            .reshape(rename.canonical_shape)?
            .to_device(device)?;
        tensors.insert(rename.canonical, tensor);
    }
    Ok(FamilyCheckpoint {
        config: plan.config,
        tensors,
    })
}

/// Translates tensors already in memory (named as the checkpoint names them).
pub fn translate_tensors(
    mut source: HashMap<String, Tensor>,
    hf_config: Option<&HfConfig>,
    hints: &FamilyHints,
) -> Result<FamilyCheckpoint, ModelError> {
    let shapes: BTreeMap<String, Vec<usize>> = source
        .iter()
        .map(|(name, tensor)| (name.clone(), tensor.dims().to_vec()))
        .collect();
    let plan = plan_translation(&shapes, hf_config, hints)?;
    let mut tensors = HashMap::with_capacity(plan.renames.len());
    for rename in plan.renames {
        let tensor = source
            .remove(&rename.source)
            .ok_or_else(|| ModelError::MissingTensor {
                tensor: rename.source.clone(),
            })?
            .to_dtype(DType::F32)?
            .reshape(rename.canonical_shape)?;
        tensors.insert(rename.canonical, tensor);
    }
    Ok(FamilyCheckpoint {
        config: plan.config,
        tensors,
    })
}

/// Where one canonical tensor comes from.
#[derive(Clone, Debug, PartialEq, Eq)]
pub struct Rename {
    pub source: String,
    pub canonical: String,
    pub canonical_shape: Vec<usize>,
}

/// The architecture of a checkpoint and where each canonical tensor comes from.
#[derive(Clone, Debug, PartialEq)]
pub struct TranslationPlan {
    pub config: VitConfig,
    pub renames: Vec<Rename>,
}

/// Decides the family and architecture from tensor names and shapes (plus
/// `config.json` and hints), and checks the whole tensor set: every missing,
/// unexpected and wrongly shaped tensor is reported at once, under the
/// checkpoint's own names.
pub fn plan_translation(
    shapes: &BTreeMap<String, Vec<usize>>,
    hf_config: Option<&HfConfig>,
    hints: &FamilyHints,
) -> Result<TranslationPlan, ModelError> {
    let naming = detect_family(shapes.keys().map(String::as_str))?;
    let (encoder_config, projection_dim) = match hf_config {
        Some(c) => {
            let (encoder, projection_dim) = c.image_encoder();
            (Some(encoder), projection_dim)
        }
        None => (None, None),
    };
    if let Some(model_type) = hf_config.and_then(|c| c.model_type.as_deref()) {
        if !naming.family_model_types().contains(&model_type) {
            return Err(unsupported(format!(
                "config.json says model_type `{model_type}` but the tensor names are those of {}",
                naming.family_name()
            )));
        }
    }
    let config = infer_config(&naming, shapes, encoder_config, projection_dim, hints)?;

    let mut renames = Vec::new();
    let mut missing = Vec::new();
    let mut wrong_shape = Vec::new();
    let mut consumed = BTreeSet::new();
    for (canonical, canonical_shape) in layout::expected_tensors(&config) {
        let source = naming.source_name(&canonical);
        let expected = naming.source_shape(&canonical, &canonical_shape);
        match shapes.get(&source) {
            None => missing.push(source),
            Some(found) if *found != expected => wrong_shape.push(ShapeMismatch {
                name: source.clone(),
                expected,
                found: found.clone(),
            }),
            Some(_) => {
                consumed.insert(source.clone());
                renames.push(Rename {
                    source,
                    canonical,
                    canonical_shape,
                });
            }
        }
    }
    let unexpected: Vec<String> = shapes
        .keys()
        .filter(|name| !consumed.contains(name.as_str()) && !naming.is_ignored(name))
        // Wrongly shaped tensors are reported once, as such.
        .filter(|name| !wrong_shape.iter().any(|w| &w.name == *name))
        .cloned()
        .collect();
    if !(missing.is_empty() && unexpected.is_empty() && wrong_shape.is_empty()) {
        missing.sort();
        return Err(ModelError::LayoutMismatch {
            missing,
            unexpected,
            wrong_shape,
        });
    }
    Ok(TranslationPlan { config, renames })
}

/// A family together with the prefix its tensor names carry.
#[derive(Clone, Debug, PartialEq, Eq)]
pub struct FamilyNaming {
    pub family: Family,
    /// Everything before `embeddings.` in the encoder's names, e.g. `vit.`,
    /// `vision_model.` or the empty string.
    pub prefix: String,
}

/// Recognises the family from tensor names alone.
pub fn detect_family<'a>(
    names: impl IntoIterator<Item = &'a str>,
) -> Result<FamilyNaming, ModelError> {
    let names: BTreeSet<&str> = names.into_iter().collect();
    let mut found = Vec::new();
    for name in &names {
        if let Some(prefix) = name.strip_suffix("embeddings.class_embedding") {
            found.push(FamilyNaming {
                family: Family::Clip,
                prefix: prefix.to_string(),
            });
        } else if let Some(prefix) = name.strip_suffix("embeddings.cls_token") {
            let in_first_block = |leaf: &str| {
                let first_block = format!("{prefix}encoder.layer.0.{leaf}");
                names.contains(first_block.as_str())
            };
            let family = if names.contains(format!("{prefix}embeddings.register_tokens").as_str()) {
                Family::Dinov2Registers
            } else if in_first_block("norm1.weight") {
                Family::Dinov2
            } else if in_first_block("layernorm_before.weight") {
                Family::Vit
            } else {
                continue;
            };
            found.push(FamilyNaming {
                family,
                prefix: prefix.to_string(),
            });
        }
    }
    match found.len() {
        1 => Ok(found.remove(0)),
        0 => Err(unsupported(
            "the tensor names match none of the supported checkpoint layouts \
             (transformers ViTModel, Dinov2Model, Dinov2WithRegistersModel, CLIP vision model)"
                .into(),
        )),
        _ => Err(unsupported(format!(
            "the checkpoint holds several image encoders (prefixes {})",
            found
                .iter()
                .map(|f| format!("`{}`", f.prefix))
                .collect::<Vec<_>>()
                .join(", ")
        ))),
    }
}

/// How our block-level names map to a family's, by leading component.
const VIT_BLOCK: &[(&str, &str)] = &[
    ("norm1", "layernorm_before"),
    ("norm2", "layernorm_after"),
    ("attn.q", "attention.attention.query"),
    ("attn.k", "attention.attention.key"),
    ("attn.v", "attention.attention.value"),
    ("attn.out", "attention.output.dense"),
    ("mlp.fc1", "intermediate.dense"),
    ("mlp.fc2", "output.dense"),
];
const DINOV2_BLOCK: &[(&str, &str)] = &[
    ("norm1", "norm1"),
    ("norm2", "norm2"),
    ("attn.q", "attention.attention.query"),
    ("attn.k", "attention.attention.key"),
    ("attn.v", "attention.attention.value"),
    ("attn.out", "attention.output.dense"),
    ("mlp.fc1", "mlp.fc1"),
    ("mlp.fc2", "mlp.fc2"),
    ("ls1", "layer_scale1.lambda1"),
    ("ls2", "layer_scale2.lambda1"),
];
const CLIP_BLOCK: &[(&str, &str)] = &[
    ("norm1", "layer_norm1"),
    ("norm2", "layer_norm2"),
    ("attn.q", "self_attn.q_proj"),
    ("attn.k", "self_attn.k_proj"),
    ("attn.v", "self_attn.v_proj"),
    ("attn.out", "self_attn.out_proj"),
    ("mlp.fc1", "mlp.fc1"),
    ("mlp.fc2", "mlp.fc2"),
];
/// Our top-level names, relative to the encoder prefix.
const VIT_TOP: &[(&str, &str)] = &[
    ("patch_embed", "embeddings.patch_embeddings.projection"),
    ("cls_token", "embeddings.cls_token"),
    ("register_tokens", "embeddings.register_tokens"),
    ("pos_embed", "embeddings.position_embeddings"),
    ("final_norm", "layernorm"),
];
const CLIP_TOP: &[(&str, &str)] = &[
    ("patch_embed", "embeddings.patch_embedding"),
    ("cls_token", "embeddings.class_embedding"),
    ("pos_embed", "embeddings.position_embedding.weight"),
    ("pre_norm", "pre_layrnorm"),
    ("final_norm", "post_layernorm"),
];
/// CLIP's projection sits beside `vision_model`, not inside it.
const CLIP_HEAD: &str = "visual_projection";
const CLIP_TOWER: &str = "vision_model.";

/// Maps `name` through `table` by its leading dotted component(s).
fn map_by_table(table: &[(&str, &str)], name: &str) -> Option<String> {
    table.iter().find_map(|(ours, theirs)| {
        if name == *ours {
            Some((*theirs).to_string())
        } else {
            name.strip_prefix(ours)
                .and_then(|rest| rest.strip_prefix('.'))
                .map(|leaf| format!("{theirs}.{leaf}"))
        }
    })
}

impl FamilyNaming {
    fn family_name(&self) -> &'static str {
        match self.family {
            Family::Vit => "ViT",
            Family::Dinov2 => "DINOv2",
            Family::Dinov2Registers => "DINOv2 with registers",
            Family::Clip => "CLIP",
        }
    }

    /// `model_type` values of transformers configs for this family.
    fn family_model_types(&self) -> &'static [&'static str] {
        match self.family {
            Family::Vit => &["vit"],
            Family::Dinov2 => &["dinov2"],
            Family::Dinov2Registers => &["dinov2_with_registers"],
            Family::Clip => &["clip", "clip_vision_model"],
        }
    }

    /// The prefix of every block's names, up to the block index.
    fn blocks_prefix(&self) -> String {
        match self.family {
            Family::Clip => format!("{}encoder.layers.", self.prefix),
            _ => format!("{}encoder.layer.", self.prefix),
        }
    }

    /// The prefix that CLIP's projection head shares with `vision_model`.
    fn clip_root(&self) -> &str {
        self.prefix.strip_suffix(CLIP_TOWER).unwrap_or(&self.prefix)
    }

    /// The checkpoint's name for a canonical tensor name.
    fn source_name(&self, canonical: &str) -> String {
        if let Some(rest) = canonical.strip_prefix("blocks.") {
            if let Some((index, leaf)) = rest.split_once('.') {
                let table = match self.family {
                    Family::Vit => VIT_BLOCK,
                    Family::Dinov2 | Family::Dinov2Registers => DINOV2_BLOCK,
                    Family::Clip => CLIP_BLOCK,
                };
                if let (Ok(index), Some(theirs)) =
                    (index.parse::<usize>(), map_by_table(table, leaf))
                {
                    return format!("{}{index}.{theirs}", self.blocks_prefix());
                }
            }
        }
        if self.family == Family::Clip {
            if let Some(leaf) = canonical.strip_prefix("head.") {
                return format!("{}{CLIP_HEAD}.{leaf}", self.clip_root());
            }
        }
        let table = match self.family {
            Family::Clip => CLIP_TOP,
            _ => VIT_TOP,
        };
        match map_by_table(table, canonical) {
            Some(theirs) => format!("{}{theirs}", self.prefix),
            // Every canonical name is in a table; an unmapped one shows up
            // as missing under its own name rather than being invented.
            None => canonical.to_string(),
        }
    }

    /// The checkpoint's shape for a canonical tensor: CLIP keeps its class
    /// token as `[D]` and its position table as `[1 + N, D]`.
    fn source_shape(&self, canonical: &str, canonical_shape: &[usize]) -> Vec<usize> {
        match (self.family, canonical) {
            (Family::Clip, "cls_token") => canonical_shape[2..].to_vec(),
            (Family::Clip, "pos_embed") => canonical_shape[1..].to_vec(),
            _ => canonical_shape.to_vec(),
        }
    }

    /// Tensors that belong to the checkpoint but not to the image encoder.
    fn is_ignored(&self, name: &str) -> bool {
        if name.starts_with("classifier.") {
            return true;
        }
        if self.family == Family::Clip {
            if let Some(outside_tower) = name.strip_prefix(self.clip_root()) {
                if outside_tower.starts_with("text_model.")
                    || outside_tower.starts_with("text_projection.")
                    || outside_tower == "logit_scale"
                {
                    return true;
                }
            }
        }
        let Some(relative) = name.strip_prefix(&self.prefix) else {
            return false;
        };
        match self.family {
            Family::Vit => relative.starts_with("pooler.") || relative == "embeddings.mask_token",
            Family::Dinov2 | Family::Dinov2Registers => relative == "embeddings.mask_token",
            Family::Clip => relative == "embeddings.position_ids",
        }
    }
}

/// Reads the architecture off the tensor shapes and checks it against
/// `config.json` and the hints.
fn infer_config(
    naming: &FamilyNaming,
    shapes: &BTreeMap<String, Vec<usize>>,
    hf: Option<&HfConfig>,
    projection_dim: Option<usize>,
    hints: &FamilyHints,
) -> Result<VitConfig, ModelError> {
    let family = naming.family;
    let is_clip = family == Family::Clip;
    let shape_of = |canonical: &str| -> Result<&Vec<usize>, ModelError> {
        let source = naming.source_name(canonical);
        shapes.get(&source).ok_or(ModelError::LayoutMismatch {
            missing: vec![source],
            unexpected: Vec::new(),
            wrong_shape: Vec::new(),
        })
    };
    let has = |canonical: &str| shapes.contains_key(&naming.source_name(canonical));
    let malformed = |canonical: &str, reason: &str| ModelError::MalformedTensor {
        tensor: naming.source_name(canonical),
        reason: reason.to_string(),
    };

    if hf.and_then(|c| c.use_swiglu_ffn) == Some(true)
        || shapes.keys().any(|name| name.contains(".mlp.weights_in."))
    {
        return Err(unsupported(
            "the SwiGLU feed-forward of DINOv2 giant is not supported".into(),
        ));
    }

    let cls_shape = shape_of("cls_token")?;
    let hidden_size = *cls_shape
        .last()
        .ok_or_else(|| malformed("cls_token", "is a scalar"))?;
    let patch_shape = shape_of("patch_embed.weight")?;
    let &[_, num_channels, patch_size, patch_width] = patch_shape.as_slice() else {
        return Err(malformed("patch_embed.weight", "is not [D, C, P, P]"));
    };
    if patch_size != patch_width {
        return Err(malformed("patch_embed.weight", "has non-square patches"));
    }
    let positions = shape_of("pos_embed")?;
    let num_positions = if is_clip {
        positions.first()
    } else {
        positions.get(1)
    }
    .copied()
    .unwrap_or(0);
    let pos_grid = (num_positions.saturating_sub(1) as f64).sqrt().round() as usize;
    if pos_grid == 0 || pos_grid * pos_grid + 1 != num_positions {
        return Err(malformed(
            "pos_embed",
            "does not hold a class position plus a square grid",
        ));
    }
    let num_layers = count_blocks(naming, shapes);
    if num_layers == 0 {
        return Err(unsupported("the checkpoint has no encoder blocks".into()));
    }
    let mlp_size = *shape_of("blocks.0.mlp.fc1.weight")?
        .first()
        .ok_or_else(|| malformed("blocks.0.mlp.fc1.weight", "is a scalar"))?;
    let num_registers = if family == Family::Dinov2Registers {
        *shape_of("register_tokens")?
            .get(1)
            .ok_or_else(|| malformed("register_tokens", "is not [1, R, D]"))?
    } else {
        0
    };
    let projection = if is_clip && has("head.weight") {
        let dim = *shape_of("head.weight")?
            .first()
            .ok_or_else(|| malformed("head.weight", "is a scalar"))?;
        Some(Projection {
            dim,
            bias: has("head.bias"),
        })
    } else {
        None
    };

    if let Some(hf) = hf {
        let check = |field: &str, said: Option<usize>, found: usize| match said {
            Some(said) if said != found => Err(unsupported(format!(
                "config.json says {field} = {said} but the tensors give {found}"
            ))),
            _ => Ok(()),
        };
        check("hidden_size", hf.hidden_size, hidden_size)?;
        check("num_hidden_layers", hf.num_hidden_layers, num_layers)?;
        check("patch_size", hf.patch_size, patch_size)?;
        check("num_channels", hf.num_channels, num_channels)?;
        check(
            "image_size / patch_size",
            hf.image_size.map(|s| s / patch_size),
            pos_grid,
        )?;
        check("intermediate_size", hf.intermediate_size, mlp_size)?;
        let ratio_width = hf
            .mlp_ratio
            .map(|r| (r * hidden_size as f64).round() as usize);
        check("mlp_ratio × hidden_size", ratio_width, mlp_size)?;
        if family == Family::Dinov2Registers {
            check("num_register_tokens", hf.num_register_tokens, num_registers)?;
        }
        if let Some(projection) = projection {
            check("projection_dim", projection_dim, projection.dim)?;
        }
    }

    let num_heads = agree(
        "num_attention_heads",
        hf.and_then(|c| c.num_attention_heads),
        hints.num_heads,
    )?
    .ok_or_else(|| {
        unsupported(
            "the number of attention heads is unknown: give config.json or FamilyHints::num_heads"
                .into(),
        )
    })?;
    if num_heads == 0 || hidden_size % num_heads != 0 {
        return Err(unsupported(format!(
            "{num_heads} attention heads do not divide the hidden size {hidden_size}"
        )));
    }
    let layer_norm_eps = agree(
        "layer_norm_eps",
        hf.and_then(|c| c.layer_norm_eps),
        hints.layer_norm_eps,
    )?
    .unwrap_or(match family {
        Family::Vit => 1e-12,
        Family::Dinov2 | Family::Dinov2Registers => 1e-6,
        Family::Clip => 1e-5,
    });
    let config_activation = hf
        .and_then(|c| c.hidden_act.as_deref())
        .map(parse_activation)
        .transpose()?;
    let activation =
        agree("hidden_act", config_activation, hints.activation)?.unwrap_or(if is_clip {
            Activation::QuickGelu
        } else {
            Activation::Gelu
        });
    // A config that says `qkv_bias` decides; without one the tensors do.
    let qkv_bias = hf
        .and_then(|c| c.qkv_bias)
        .unwrap_or_else(|| has("blocks.0.attn.q.bias"));

    Ok(VitConfig {
        family,
        hidden_size,
        num_layers,
        num_heads,
        mlp_size,
        patch_size,
        num_channels,
        pos_grid,
        // transformers resizes the registers variant's grid with antialiasing.
        pos_interpolation: if family == Family::Dinov2Registers {
            PosInterpolation::BicubicAntialias
        } else {
            PosInterpolation::Bicubic
        },
        num_registers,
        layer_scale: matches!(family, Family::Dinov2 | Family::Dinov2Registers),
        patch_bias: !is_clip,
        qkv_bias,
        pre_norm: is_clip,
        final_norm: if is_clip {
            FinalNorm::PooledOnly
        } else {
            FinalNorm::AllTokens
        },
        activation,
        layer_norm_eps,
        projection,
    })
}

/// One more than the highest block index among the names.
fn count_blocks(naming: &FamilyNaming, shapes: &BTreeMap<String, Vec<usize>>) -> usize {
    let blocks = naming.blocks_prefix();
    shapes
        .keys()
        .filter_map(|name| name.strip_prefix(blocks.as_str()))
        .filter_map(|rest| rest.split_once('.'))
        .filter_map(|(index, _)| index.parse::<usize>().ok())
        .map(|index| index + 1)
        .max()
        .unwrap_or(0)
}

/// The value `config.json` or the hints give, refusing a disagreement.
fn agree<T: PartialEq + std::fmt::Debug>(
    field: &str,
    from_config: Option<T>,
    from_hint: Option<T>,
) -> Result<Option<T>, ModelError> {
    match (from_config, from_hint) {
        (Some(said), Some(hinted)) if said != hinted => Err(unsupported(format!(
            "config.json says {field} = {said:?} but the hint says {hinted:?}"
        ))),
        (said, hinted) => Ok(said.or(hinted)),
    }
}

fn parse_activation(name: &str) -> Result<Activation, ModelError> {
    match name {
        "gelu" => Ok(Activation::Gelu),
        "quick_gelu" => Ok(Activation::QuickGelu),
        other => Err(unsupported(format!(
            "activation `{other}` is not supported (gelu, quick_gelu)"
        ))),
    }
}

fn candle_dtype(dtype: Dtype) -> Option<DType> {
    match dtype {
        Dtype::F32 => Some(DType::F32),
        Dtype::F16 => Some(DType::F16),
        Dtype::BF16 => Some(DType::BF16),
        Dtype::F64 => Some(DType::F64),
        _ => None,
    }
}

fn unsupported(reason: String) -> ModelError {
    ModelError::UnrecognisedGraph { reason }
}

/// What to record with an imported checkpoint.
#[derive(Clone, Debug)]
pub struct ImportSettings {
    pub id: String,
    pub pooling: crate::config::Pooling,
    pub preprocess: vitrine_imaging::PreprocessSpec,
}

/// Translates a transformers-layout checkpoint into our model directory
/// format (`model.json` + canonical `model.safetensors`) in `out_dir`.
pub fn import_checkpoint(
    source: &Path,
    hints: &FamilyHints,
    settings: &ImportSettings,
    out_dir: &Path,
) -> Result<crate::config::ModelSpec, ModelError> {
    let checkpoint = load_family_checkpoint(source, hints, &Device::Cpu)?;
    let mut tensors = Vec::with_capacity(checkpoint.tensors.len());
    for (name, tensor) in checkpoint.tensors {
        tensors.push(crate::model_dir::NamedTensor {
            name,
            shape: tensor.dims().to_vec(),
            data: tensor.flatten_all()?.to_vec1::<f32>()?,
        });
    }
    tensors.sort_by(|a, b| a.name.cmp(&b.name));
    let spec = crate::config::ModelSpec {
        format_version: crate::config::MODEL_FORMAT_VERSION,
        id: settings.id.clone(),
        vit: checkpoint.config,
        pooling: settings.pooling,
        preprocess: settings.preprocess.clone(),
        weights_sha256: String::new(),
        source: format!("imported from {}", source.display()),
    };
    crate::model_dir::write_model_dir(out_dir, spec, &tensors)
}
