//! Our canonical tensor names. Every loader and importer produces exactly
//! these; the forward pass reads exactly these.
//!
//! Linear weights are stored `[out, in]` (the candle / PyTorch convention).
//!
//! | name | shape | when |
//! |---|---|---|
//! | `patch_embed.weight` | `[D, C, P, P]` | always |
//! | `patch_embed.bias` | `[D]` | `patch_bias` |
//! | `cls_token` | `[1, 1, D]` | always |
//! | `register_tokens` | `[1, R, D]` | `num_registers > 0` |
//! | `pos_embed` | `[1, 1 + G*G, D]` | always (class position first, then the G×G grid row-major) |
//! | `pre_norm.{weight,bias}` | `[D]` | `pre_norm` |
//! | `blocks.{i}.norm1.{weight,bias}` | `[D]` | always |
//! | `blocks.{i}.attn.{q,k,v}.weight` | `[D, D]` | always |
//! | `blocks.{i}.attn.{q,k,v}.bias` | `[D]` | `qkv_bias` |
//! | `blocks.{i}.attn.out.{weight,bias}` | `[D, D]`, `[D]` | always |
//! | `blocks.{i}.ls1`, `blocks.{i}.ls2` | `[D]` | `layer_scale` |
//! | `blocks.{i}.norm2.{weight,bias}` | `[D]` | always |
//! | `blocks.{i}.mlp.fc1.{weight,bias}` | `[M, D]`, `[M]` | always |
//! | `blocks.{i}.mlp.fc2.{weight,bias}` | `[D, M]`, `[D]` | always |
//! | `final_norm.{weight,bias}` | `[D]` | always |
//! | `head.weight` | `[E, D]` | `projection` |
//! | `head.bias` | `[E]` | `projection.bias` |

use crate::config::VitConfig;

/// Every canonical tensor name with its expected shape for `cfg`.
pub fn expected_tensors(cfg: &VitConfig) -> Vec<(String, Vec<usize>)> {
    let d = cfg.hidden_size;
    let m = cfg.mlp_size;
    let p = cfg.patch_size;
    let g = cfg.pos_grid;
    let mut out: Vec<(String, Vec<usize>)> = vec![
        ("patch_embed.weight".into(), vec![d, cfg.num_channels, p, p]),
        ("cls_token".into(), vec![1, 1, d]),
        ("pos_embed".into(), vec![1, 1 + g * g, d]),
        ("final_norm.weight".into(), vec![d]),
        ("final_norm.bias".into(), vec![d]),
    ];
    if cfg.patch_bias {
        out.push(("patch_embed.bias".into(), vec![d]));
    }
    if cfg.num_registers > 0 {
        out.push(("register_tokens".into(), vec![1, cfg.num_registers, d]));
    }
    if cfg.pre_norm {
        out.push(("pre_norm.weight".into(), vec![d]));
        out.push(("pre_norm.bias".into(), vec![d]));
    }
    for i in 0..cfg.num_layers {
        let b = format!("blocks.{i}");
        for norm in ["norm1", "norm2"] {
            out.push((format!("{b}.{norm}.weight"), vec![d]));
            out.push((format!("{b}.{norm}.bias"), vec![d]));
        }
        for proj in ["q", "k", "v"] {
            out.push((format!("{b}.attn.{proj}.weight"), vec![d, d]));
            if cfg.qkv_bias {
                out.push((format!("{b}.attn.{proj}.bias"), vec![d]));
            }
        }
        out.push((format!("{b}.attn.out.weight"), vec![d, d]));
        out.push((format!("{b}.attn.out.bias"), vec![d]));
        out.push((format!("{b}.mlp.fc1.weight"), vec![m, d]));
        out.push((format!("{b}.mlp.fc1.bias"), vec![m]));
        out.push((format!("{b}.mlp.fc2.weight"), vec![d, m]));
        out.push((format!("{b}.mlp.fc2.bias"), vec![d]));
        if cfg.layer_scale {
            out.push((format!("{b}.ls1"), vec![d]));
            out.push((format!("{b}.ls2"), vec![d]));
        }
    }
    if let Some(proj) = cfg.projection {
        out.push(("head.weight".into(), vec![proj.dim, d]));
        if proj.bias {
            out.push(("head.bias".into(), vec![proj.dim]));
        }
    }
    out
}

/// Checks a tensor set (name and shape of each) against [`expected_tensors`],
/// reporting every missing, unexpected and wrongly shaped tensor at once.
pub fn check_layout<'a>(
    cfg: &VitConfig,
    found: impl IntoIterator<Item = (&'a str, &'a [usize])>,
) -> Result<(), crate::error::ModelError> {
    use std::collections::BTreeMap;
    let mut expected: BTreeMap<String, Vec<usize>> = expected_tensors(cfg).into_iter().collect();
    let mut unexpected = Vec::new();
    let mut wrong_shape = Vec::new();
    for (name, shape) in found {
        match expected.remove(name) {
            None => unexpected.push(name.to_string()),
            Some(want) if want != shape => wrong_shape.push(crate::error::ShapeMismatch {
                name: name.to_string(),
                expected: want,
                found: shape.to_vec(),
            }),
            Some(_) => {}
        }
    }
    let missing: Vec<String> = expected.into_keys().collect();
    if missing.is_empty() && unexpected.is_empty() && wrong_shape.is_empty() {
        return Ok(());
    }
    unexpected.sort();
    wrong_shape.sort_by(|a, b| a.name.cmp(&b.name));
    Err(crate::error::ModelError::LayoutMismatch {
        missing,
        unexpected,
        wrong_shape,
    })
}
