//! Import of a DINOv2 backbone from an ONNX graph exported by PyTorch from a
//! transformers `Dinov2Model` (node and initializer names follow its module
//! paths under a `backbone` prefix). Anything after the backbone's final
//! LayerNorm in the graph (e.g. a task head) is ignored.

use std::collections::HashMap;
use std::path::Path;

use vitrine_imaging::PreprocessSpec;

use crate::config::{
    Activation, Family, FinalNorm, ModelSpec, Pooling, PosInterpolation, VitConfig,
    MODEL_FORMAT_VERSION,
};
use crate::error::ModelError;
use crate::model_dir::{write_model_dir, NamedTensor};
use crate::onnx::{self, GraphProto, NodeProto, TensorProto};

/// Every DINOv2 size uses 64-dimensional attention heads (Oquab et al., 2023,
/// architecture table; from memory). The graph only holds the head count in
/// a dynamically computed reshape, so it is derived from the width instead.
const DINOV2_HEAD_DIM: usize = 64;

/// Node that adds the class position to the class token.
const CLASS_POSITION_NODE: &str = "/backbone/embeddings/Concat_6";
/// Node that reshapes the patch-grid position table before interpolation.
const GRID_POSITION_NODE: &str = "/backbone/embeddings/Reshape_1";

/// Imports the DINOv2 backbone of `onnx_path` into `out_dir` (see
/// [`crate::model_dir`]) under the name `id`; `source` says where it came from.
pub fn import_onnx_dinov2(
    onnx_path: &Path,
    out_dir: &Path,
    id: &str,
    source: &str,
) -> Result<ModelSpec, ModelError> {
    let model = onnx::read_model(onnx_path)?;
    let graph = model.graph.as_ref().ok_or_else(|| ModelError::NotOnnx {
        path: onnx_path.to_path_buf(),
        reason: "no graph".into(),
    })?;
    let (vit, tensors) = dinov2_backbone(graph)?;
    let spec = ModelSpec {
        format_version: MODEL_FORMAT_VERSION,
        id: id.to_string(),
        vit,
        pooling: Pooling::Cls,
        preprocess: dinov2_preprocess(),
        weights_sha256: String::new(),
        source: source.to_string(),
    };
    write_model_dir(out_dir, spec, &tensors)
}

/// The usual DINOv2 evaluation recipe: shorter side to 256, centre crop 224,
/// ImageNet mean and std (common practice; values from memory).
pub fn dinov2_preprocess() -> PreprocessSpec {
    PreprocessSpec {
        resize_shorter: 256,
        crop: 224,
        mean: [0.485, 0.456, 0.406],
        std: [0.229, 0.224, 0.225],
    }
}

/// Reads the backbone's architecture and weights (canonical names, linear
/// weights transposed to `[out, in]`) out of `graph`.
pub fn dinov2_backbone(graph: &GraphProto) -> Result<(VitConfig, Vec<NamedTensor>), ModelError> {
    let g = GraphIndex::new(graph);

    let cls = g.named("backbone.embeddings.cls_token")?;
    let patch = g.named("backbone.embeddings.patch_embeddings.projection.weight")?;
    let patch_shape = patch.shape()?;
    let [hidden, channels, patch_size, patch_size_w] = patch_shape[..] else {
        return Err(unrecognised(format!(
            "patch projection has shape {patch_shape:?}, expected [D, C, P, P]"
        )));
    };
    if patch_size != patch_size_w || hidden % DINOV2_HEAD_DIM != 0 {
        return Err(unrecognised(format!(
            "patch projection shape {patch_shape:?} is not a square patch with a width divisible by {DINOV2_HEAD_DIM}"
        )));
    }

    let class_pos = g.weight_of(CLASS_POSITION_NODE)?;
    let grid_pos = g.weight_of(GRID_POSITION_NODE)?;
    let grid_tokens = grid_pos.shape()?.get(1).copied().unwrap_or(0);
    let pos_grid = (grid_tokens as f64).sqrt().round() as usize;
    if pos_grid == 0 || pos_grid * pos_grid != grid_tokens {
        return Err(unrecognised(format!(
            "position table {} has {grid_tokens} patch positions, not a square grid",
            grid_pos.name
        )));
    }

    let num_layers = (0..)
        .take_while(|i| g.has(&format!("backbone.encoder.layer.{i}.norm1.weight")))
        .count();
    if num_layers == 0 {
        return Err(ModelError::MissingTensor {
            tensor: "backbone.encoder.layer.0.norm1.weight".into(),
        });
    }
    let mlp_size = g
        .named("backbone.encoder.layer.0.mlp.fc1.bias")?
        .shape()?
        .first()
        .copied()
        .unwrap_or(0);
    let num_registers = if g.has("backbone.embeddings.register_tokens") {
        g.named("backbone.embeddings.register_tokens")?
            .shape()?
            .get(1)
            .copied()
            .unwrap_or(0)
    } else {
        0
    };
    if !g.has_op_under("/backbone/encoder/layer.0/mlp/", "Erf") {
        return Err(unrecognised(
            "the MLP of layer 0 has no Erf node (only exact GELU is supported)".into(),
        ));
    }

    let vit = VitConfig {
        family: if num_registers > 0 {
            Family::Dinov2Registers
        } else {
            Family::Dinov2
        },
        hidden_size: hidden,
        num_layers,
        num_heads: hidden / DINOV2_HEAD_DIM,
        mlp_size,
        patch_size,
        num_channels: channels,
        pos_grid,
        pos_interpolation: PosInterpolation::Bicubic,
        num_registers,
        layer_scale: g.has("backbone.encoder.layer.0.layer_scale1.lambda1"),
        patch_bias: g.has("backbone.embeddings.patch_embeddings.projection.bias"),
        qkv_bias: g.has("backbone.encoder.layer.0.attention.attention.query.bias"),
        pre_norm: false,
        final_norm: FinalNorm::AllTokens,
        activation: Activation::Gelu,
        layer_norm_eps: g.layer_norm_eps("/backbone/layernorm/")?,
        projection: None,
    };

    let mut out = vec![
        copy("patch_embed.weight", patch)?,
        copy("cls_token", cls)?,
        position_table(class_pos, grid_pos)?,
        copy("final_norm.weight", g.named("backbone.layernorm.weight")?)?,
        copy("final_norm.bias", g.named("backbone.layernorm.bias")?)?,
    ];
    if vit.patch_bias {
        out.push(copy(
            "patch_embed.bias",
            g.named("backbone.embeddings.patch_embeddings.projection.bias")?,
        )?);
    }
    if num_registers > 0 {
        out.push(copy(
            "register_tokens",
            g.named("backbone.embeddings.register_tokens")?,
        )?);
    }
    for i in 0..num_layers {
        let src = format!("backbone.encoder.layer.{i}");
        let node = format!("/backbone/encoder/layer.{i}");
        let dst = format!("blocks.{i}");
        let mut named = |canonical: &str, onnx_name: &str| -> Result<(), ModelError> {
            out.push(copy(
                &format!("{dst}.{canonical}"),
                g.named(&format!("{src}.{onnx_name}"))?,
            )?);
            Ok(())
        };
        named("norm1.weight", "norm1.weight")?;
        named("norm1.bias", "norm1.bias")?;
        named("norm2.weight", "norm2.weight")?;
        named("norm2.bias", "norm2.bias")?;
        named("attn.out.bias", "attention.output.dense.bias")?;
        named("mlp.fc1.bias", "mlp.fc1.bias")?;
        named("mlp.fc2.bias", "mlp.fc2.bias")?;
        if vit.qkv_bias {
            named("attn.q.bias", "attention.attention.query.bias")?;
            named("attn.k.bias", "attention.attention.key.bias")?;
            named("attn.v.bias", "attention.attention.value.bias")?;
        }
        if vit.layer_scale {
            named("ls1", "layer_scale1.lambda1")?;
            named("ls2", "layer_scale2.lambda1")?;
        }
        // MatMul weights are anonymous initializers stored [in, out]; their
        // role is the name of the consuming node.
        for (canonical, matmul) in [
            ("attn.q.weight", "attention/attention/query/MatMul"),
            ("attn.k.weight", "attention/attention/key/MatMul"),
            ("attn.v.weight", "attention/attention/value/MatMul"),
            ("attn.out.weight", "attention/output/dense/MatMul"),
            ("mlp.fc1.weight", "mlp/fc1/MatMul"),
            ("mlp.fc2.weight", "mlp/fc2/MatMul"),
        ] {
            let weight = g.weight_of(&format!("{node}/{matmul}"))?;
            out.push(transposed(&format!("{dst}.{canonical}"), weight)?);
        }
    }
    Ok((vit, out))
}

/// The f64 nearest to the shortest decimal that round-trips `v` (so an f32
/// `1e-6` becomes `1e-6`, not `9.99999997e-7`): the value the exporter wrote.
fn f32_as_written(v: f32) -> f64 {
    v.to_string().parse().unwrap_or(f64::from(v))
}

fn unrecognised(reason: String) -> ModelError {
    ModelError::UnrecognisedGraph { reason }
}

fn copy(name: &str, tensor: &TensorProto) -> Result<NamedTensor, ModelError> {
    Ok(NamedTensor {
        name: name.to_string(),
        shape: tensor.shape()?,
        data: tensor.to_f32()?,
    })
}

/// `[in, out]` -> `[out, in]`.
fn transposed(name: &str, tensor: &TensorProto) -> Result<NamedTensor, ModelError> {
    let shape = tensor.shape()?;
    let [rows, cols] = shape[..] else {
        return Err(ModelError::MalformedTensor {
            tensor: tensor.name.clone(),
            reason: format!("a MatMul weight must be 2-D, found shape {shape:?}"),
        });
    };
    let data = tensor.to_f32()?;
    let mut t = vec![0f32; data.len()];
    for (r, row) in data.chunks_exact(cols).enumerate() {
        for (c, &v) in row.iter().enumerate() {
            t[c * rows + r] = v;
        }
    }
    Ok(NamedTensor {
        name: name.to_string(),
        shape: vec![cols, rows],
        data: t,
    })
}

/// Our `pos_embed`: the class position followed by the grid positions.
fn position_table(class: &TensorProto, grid: &TensorProto) -> Result<NamedTensor, ModelError> {
    let class_shape = class.shape()?;
    let grid_shape = grid.shape()?;
    let (&[1, 1, d], &[1, n, d_grid]) = (&class_shape[..], &grid_shape[..]) else {
        return Err(unrecognised(format!(
            "position tables {} {class_shape:?} and {} {grid_shape:?} are not [1, 1, D] and [1, N, D]",
            class.name, grid.name
        )));
    };
    if d != d_grid {
        return Err(unrecognised(format!(
            "position tables {} and {} differ in width ({d} vs {d_grid})",
            class.name, grid.name
        )));
    }
    let mut data = class.to_f32()?;
    data.extend(grid.to_f32()?);
    Ok(NamedTensor {
        name: "pos_embed".into(),
        shape: vec![1, 1 + n, d],
        data,
    })
}

/// Look-ups by initializer name, node name and node output.
struct GraphIndex<'a> {
    initializers: HashMap<&'a str, &'a TensorProto>,
    nodes: HashMap<&'a str, &'a NodeProto>,
    producers: HashMap<&'a str, &'a NodeProto>,
    graph: &'a GraphProto,
}

impl<'a> GraphIndex<'a> {
    fn new(graph: &'a GraphProto) -> Self {
        let initializers = graph
            .initializer
            .iter()
            .map(|t| (t.name.as_str(), t))
            .collect();
        let nodes = graph.node.iter().map(|n| (n.name.as_str(), n)).collect();
        let producers = graph
            .node
            .iter()
            .flat_map(|n| n.output.iter().map(move |o| (o.as_str(), n)))
            .collect();
        GraphIndex {
            initializers,
            nodes,
            producers,
            graph,
        }
    }

    fn has(&self, name: &str) -> bool {
        self.initializers.contains_key(name)
    }

    fn named(&self, name: &str) -> Result<&'a TensorProto, ModelError> {
        self.initializers
            .get(name)
            .copied()
            .ok_or_else(|| ModelError::MissingTensor {
                tensor: name.to_string(),
            })
    }

    fn node(&self, name: &str) -> Result<&'a NodeProto, ModelError> {
        self.nodes
            .get(name)
            .copied()
            .ok_or_else(|| unrecognised(format!("node {name} not found")))
    }

    /// The single initializer among the inputs of node `node_name`.
    fn weight_of(&self, node_name: &str) -> Result<&'a TensorProto, ModelError> {
        let node = self.node(node_name)?;
        let mut weights = node
            .input
            .iter()
            .filter_map(|i| self.initializers.get(i.as_str()).copied());
        match (weights.next(), weights.next()) {
            (Some(w), None) => Ok(w),
            (None, _) => Err(unrecognised(format!(
                "node {node_name} has no initializer input"
            ))),
            (Some(_), Some(_)) => Err(unrecognised(format!(
                "node {node_name} has more than one initializer input"
            ))),
        }
    }

    fn has_op_under(&self, prefix: &str, op_type: &str) -> bool {
        self.graph
            .node
            .iter()
            .any(|n| n.op_type == op_type && n.name.starts_with(prefix))
    }

    /// The epsilon of the LayerNorm whose nodes are named under `prefix`:
    /// either a fused `LayerNormalization` node's attribute, or (opset < 17
    /// exports, decomposed into elementwise ops) the scalar constant added to
    /// the variance by the `{prefix}Add` node.
    fn layer_norm_eps(&self, prefix: &str) -> Result<f64, ModelError> {
        if let Some(node) = self
            .graph
            .node
            .iter()
            .find(|n| n.op_type == "LayerNormalization" && n.name.starts_with(prefix))
        {
            // onnx.proto: epsilon defaults to 1e-5 when the attribute is absent.
            let eps = node
                .attribute
                .iter()
                .find(|a| a.name == "epsilon")
                .map_or(1e-5, |a| a.f);
            return Ok(f32_as_written(eps));
        }
        let add_name = format!("{prefix}Add");
        let add = self.node(&add_name)?;
        let scalar = add.input.iter().find_map(|input| {
            let tensor = self.initializers.get(input.as_str()).copied().or_else(|| {
                self.producers
                    .get(input.as_str())
                    .filter(|n| n.op_type == "Constant")
                    .and_then(|n| n.attribute.iter().find(|a| a.name == "value"))
                    .and_then(|a| a.t.as_ref())
            })?;
            match tensor.to_f32().ok()?[..] {
                [eps] => Some(eps),
                _ => None,
            }
        });
        scalar
            .map(f32_as_written)
            .ok_or_else(|| unrecognised(format!("node {add_name} adds no scalar constant")))
    }
}
