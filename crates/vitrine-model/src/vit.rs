//! The Vision Transformer forward pass over our canonical tensor layout.
//!
//! Mirrors the published image encoders (ViT, DINOv2, CLIP's vision tower):
//! strided-convolution patch embedding, class token, optional register tokens,
//! learned position embeddings (bicubically resized to other patch grids),
//! pre-norm blocks, final LayerNorm, optional projection head.

use std::collections::HashMap;
use std::sync::Mutex;

use candle_core::{DType, Device, IndexOp, Module, Result, Tensor, D};
use candle_nn::{Conv2d, Conv2dConfig, LayerNorm, VarBuilder};

use crate::config::{Activation, FinalNorm, Pooling, VitConfig};
use crate::interpolate::bicubic_resize_grid;
use crate::kernels;

/// What one forward pass yields.
pub struct VitOutput {
    /// `[B, 1 + R + N, D]`: class token, register tokens, patch tokens. Final-normed
    /// for [`FinalNorm::AllTokens`]; the raw encoder output for CLIP-style towers,
    /// as their reference implementation returns it.
    pub hidden: Tensor,
    /// `[B, E]`: the final-normed (and projected, if the model has a head) class
    /// token, not L2-normalised.
    pub pooled_cls: Tensor,
}

/// A linear layer stored `[in, out]` so the hot matmul reads contiguous rows.
struct Dense {
    weight_in_out: Tensor,
    bias: Option<Tensor>,
}

impl Dense {
    fn from_out_in(weight_out_in: Tensor, bias: Option<Tensor>) -> Result<Self> {
        Ok(Self {
            weight_in_out: weight_out_in.t()?.contiguous()?,
            bias,
        })
    }

    fn load(vb: &VarBuilder, in_dim: usize, out_dim: usize, with_bias: bool) -> Result<Self> {
        let weight = vb.get((out_dim, in_dim), "weight")?;
        let bias = if with_bias {
            Some(vb.get(out_dim, "bias")?)
        } else {
            None
        };
        Self::from_out_in(weight, bias)
    }

    /// Multiplies every output by `scale` (`[out]`) once, at load time, so the
    /// forward pass needs no separate scaling pass: `(xW + b)·s = x(W·s) + b·s`.
    fn scale_outputs(self, scale: &Tensor) -> Result<Self> {
        Ok(Self {
            weight_in_out: self.weight_in_out.broadcast_mul(scale)?,
            bias: self.bias.map(|b| b.mul(scale)).transpose()?,
        })
    }

    /// `x`: `[rows, in]` -> `[rows, out]`.
    fn forward_2d(&self, x: &Tensor) -> Result<Tensor> {
        let y = x.matmul(&self.weight_in_out)?;
        match &self.bias {
            Some(b) => y.broadcast_add(b),
            None => Ok(y),
        }
    }
}

fn layer_norm(vb: VarBuilder, dim: usize, eps: f64) -> Result<LayerNorm> {
    let weight = vb.get(dim, "weight")?;
    let bias = vb.get(dim, "bias")?;
    Ok(LayerNorm::new(weight, bias, eps))
}

struct SelfAttention {
    /// q, k and v fused into one `[D, 3D]` projection: one large matmul
    /// instead of three small ones.
    qkv: Dense,
    out: Dense,
    num_heads: usize,
    head_dim: usize,
}

impl SelfAttention {
    /// `layer_scale` (LayerScale's `[D]` gains) is folded into the output projection.
    fn new(cfg: &VitConfig, vb: VarBuilder, layer_scale: Option<&Tensor>) -> Result<Self> {
        let d = cfg.hidden_size;
        let mut weights = Vec::with_capacity(3);
        let mut biases = Vec::with_capacity(3);
        for proj in ["q", "k", "v"] {
            weights.push(vb.pp(proj).get((d, d), "weight")?);
            biases.push(if cfg.qkv_bias {
                vb.pp(proj).get(d, "bias")?
            } else {
                Tensor::zeros(d, DType::F32, vb.device())?
            });
        }
        let head_dim = d / cfg.num_heads;
        // The attention's 1/sqrt(head_dim) is folded into the query projection.
        let query_scale = 1.0 / (head_dim as f32).sqrt();
        let column_scale: Vec<f32> = (0..3 * d)
            .map(|column| if column < d { query_scale } else { 1.0 })
            .collect();
        let qkv = Dense::from_out_in(Tensor::cat(&weights, 0)?, Some(Tensor::cat(&biases, 0)?))?
            .scale_outputs(&Tensor::from_vec(column_scale, 3 * d, vb.device())?)?;
        let mut out = Dense::load(&vb.pp("out"), d, d, true)?;
        if let Some(layer_scale) = layer_scale {
            out = out.scale_outputs(layer_scale)?;
        }
        Ok(Self {
            qkv,
            out,
            num_heads: cfg.num_heads,
            head_dim,
        })
    }

    /// `x`: `[B, T, D]` (contiguous) -> `[B, T, D]`.
    fn forward(&self, x: &Tensor) -> Result<Tensor> {
        let (b, t, d) = x.dims3()?;
        let qkv = self.qkv.forward_2d(&x.reshape((b * t, d))?)?;
        let qkv = qkv
            .reshape((b, t, 3, self.num_heads, self.head_dim))?
            .permute((2, 0, 3, 1, 4))?;
        let q = qkv.i(0)?.contiguous()?;
        let k = qkv.i(1)?.contiguous()?;
        let v = qkv.i(2)?.contiguous()?;
        let scores = q.matmul(&k.t()?)?;
        let weights = kernels::softmax_last_dim(&scores)?;
        let context = weights.matmul(&v)?.transpose(1, 2)?.reshape((b * t, d))?;
        self.out.forward_2d(&context)?.reshape((b, t, d))
    }
}

struct Mlp {
    fc1: Dense,
    fc2: Dense,
    activation: Activation,
}

impl Mlp {
    /// `layer_scale` is folded into the second layer, as in [`SelfAttention::new`].
    fn new(cfg: &VitConfig, vb: VarBuilder, layer_scale: Option<&Tensor>) -> Result<Self> {
        let mut fc2 = Dense::load(&vb.pp("fc2"), cfg.mlp_size, cfg.hidden_size, true)?;
        if let Some(layer_scale) = layer_scale {
            fc2 = fc2.scale_outputs(layer_scale)?;
        }
        Ok(Self {
            fc1: Dense::load(&vb.pp("fc1"), cfg.hidden_size, cfg.mlp_size, true)?,
            fc2,
            activation: cfg.activation,
        })
    }

    fn forward(&self, x: &Tensor) -> Result<Tensor> {
        let (b, t, d) = x.dims3()?;
        let h = self.fc1.forward_2d(&x.reshape((b * t, d))?)?;
        let h = match self.activation {
            Activation::Gelu => kernels::gelu_erf(&h)?,
            Activation::QuickGelu => (&h * candle_nn::ops::sigmoid(&(&h * 1.702)?)?)?,
        };
        self.fc2.forward_2d(&h)?.reshape((b, t, d))
    }
}

/// A pre-norm encoder block; LayerScale, when the model has it, lives inside
/// the attention's and the MLP's output projections.
struct Block {
    norm1: LayerNorm,
    attn: SelfAttention,
    norm2: LayerNorm,
    mlp: Mlp,
}

impl Block {
    fn new(cfg: &VitConfig, vb: VarBuilder) -> Result<Self> {
        let d = cfg.hidden_size;
        let eps = cfg.layer_norm_eps;
        let (layer_scale1, layer_scale2) = if cfg.layer_scale {
            (Some(vb.get(d, "ls1")?), Some(vb.get(d, "ls2")?))
        } else {
            (None, None)
        };
        Ok(Self {
            norm1: layer_norm(vb.pp("norm1"), d, eps)?,
            attn: SelfAttention::new(cfg, vb.pp("attn"), layer_scale1.as_ref())?,
            norm2: layer_norm(vb.pp("norm2"), d, eps)?,
            mlp: Mlp::new(cfg, vb.pp("mlp"), layer_scale2.as_ref())?,
        })
    }

    fn forward(&self, x: &Tensor) -> Result<Tensor> {
        let x = (x + self.attn.forward(&self.norm1.forward(x)?)?)?;
        &x + self.mlp.forward(&self.norm2.forward(&x)?)?
    }
}

/// A Vision Transformer image encoder.
pub struct VitModel {
    cfg: VitConfig,
    patch_embed: Conv2d,
    cls_token: Tensor,
    register_tokens: Option<Tensor>,
    /// `[1, D]`: the class token's position embedding.
    cls_position: Tensor,
    /// `[G*G, D]` row-major, on the host: the source of every resized grid.
    grid_positions: Vec<f32>,
    /// Position grids resized to input patch grids, computed once per size.
    resized_grid_cache: Mutex<HashMap<(usize, usize), Tensor>>,
    pre_norm: Option<LayerNorm>,
    blocks: Vec<Block>,
    final_norm: LayerNorm,
    head: Option<Dense>,
    device: Device,
}

impl VitModel {
    /// Builds the model from canonical tensor names (see [`crate::layout`]).
    pub fn new(cfg: &VitConfig, vb: VarBuilder) -> Result<Self> {
        let d = cfg.hidden_size;
        let p = cfg.patch_size;
        let conv_cfg = Conv2dConfig {
            stride: p,
            ..Default::default()
        };
        let patch_weight = vb
            .pp("patch_embed")
            .get((d, cfg.num_channels, p, p), "weight")?;
        let patch_bias = if cfg.patch_bias {
            Some(vb.pp("patch_embed").get(d, "bias")?)
        } else {
            None
        };
        let patch_embed = Conv2d::new(patch_weight, patch_bias, conv_cfg);
        let n_grid = cfg.pos_grid * cfg.pos_grid;
        let pos_embed = vb.get((1, 1 + n_grid, d), "pos_embed")?.squeeze(0)?;
        let cls_position = pos_embed.i(0..1)?;
        let grid_positions = pos_embed.i(1..)?.flatten_all()?.to_vec1::<f32>()?;
        let register_tokens = if cfg.num_registers > 0 {
            Some(vb.get((1, cfg.num_registers, d), "register_tokens")?)
        } else {
            None
        };
        let pre_norm = if cfg.pre_norm {
            Some(layer_norm(vb.pp("pre_norm"), d, cfg.layer_norm_eps)?)
        } else {
            None
        };
        let blocks = (0..cfg.num_layers)
            .map(|i| Block::new(cfg, vb.pp(format!("blocks.{i}"))))
            .collect::<Result<Vec<_>>>()?;
        let head = match cfg.projection {
            Some(proj) => Some(Dense::load(&vb.pp("head"), d, proj.dim, proj.bias)?),
            None => None,
        };
        Ok(Self {
            cfg: cfg.clone(),
            patch_embed,
            cls_token: vb.get((1, 1, d), "cls_token")?,
            register_tokens,
            cls_position,
            grid_positions,
            resized_grid_cache: Mutex::new(HashMap::new()),
            pre_norm,
            blocks,
            final_norm: layer_norm(vb.pp("final_norm"), d, cfg.layer_norm_eps)?,
            head,
            device: vb.device().clone(),
        })
    }

    /// Builds the model from a map of canonical tensors.
    pub fn from_tensors(
        cfg: &VitConfig,
        tensors: HashMap<String, Tensor>,
        device: &Device,
    ) -> Result<Self> {
        Self::new(cfg, VarBuilder::from_tensors(tensors, DType::F32, device))
    }

    pub fn config(&self) -> &VitConfig {
        &self.cfg
    }

    pub fn device(&self) -> &Device {
        &self.device
    }

    /// Dimension of the pooled class vector (after the projection head, if any).
    pub fn pooled_dim(&self) -> usize {
        self.cfg
            .projection
            .map_or(self.cfg.hidden_size, |proj| proj.dim)
    }

    /// Dimension of the embedding produced with `pooling`.
    pub fn embedding_dim(&self, pooling: Pooling) -> usize {
        match pooling {
            Pooling::Cls | Pooling::Mean => self.pooled_dim(),
            Pooling::ClsMean => 2 * self.pooled_dim(),
        }
    }

    /// Position embeddings for a `rows × cols` patch grid, `[1 + rows*cols, D]`.
    fn positions_for_grid(&self, rows: usize, cols: usize) -> Result<Tensor> {
        let mut cache = self
            .resized_grid_cache
            .lock()
            .unwrap_or_else(|poisoned| poisoned.into_inner());
        if let Some(found) = cache.get(&(rows, cols)) {
            return Ok(found.clone());
        }
        let d = self.cfg.hidden_size;
        let g = self.cfg.pos_grid;
        let resized = if (rows, cols) == (g, g) {
            self.grid_positions.clone()
        } else {
            bicubic_resize_grid(
                self.cfg.pos_interpolation,
                &self.grid_positions,
                g,
                g,
                d,
                rows,
                cols,
            )
        };
        let grid = Tensor::from_vec(resized, (rows * cols, d), &self.device)?;
        let positions = Tensor::cat(&[&self.cls_position, &grid], 0)?;
        cache.insert((rows, cols), positions.clone());
        Ok(positions)
    }

    /// Runs the encoder. `pixels`: `[B, C, H, W]`, `H` and `W` multiples of the
    /// patch size.
    pub fn forward(&self, pixels: &Tensor) -> Result<VitOutput> {
        let (b, _c, h, w) = pixels.dims4()?;
        let p = self.cfg.patch_size;
        if h % p != 0 || w % p != 0 {
            candle_core::bail!("input size {h}x{w} is not a multiple of the patch size {p}");
        }
        let d = self.cfg.hidden_size;
        let (rows, cols) = (h / p, w / p);
        let patches = self
            .patch_embed
            .forward(pixels)?
            .flatten_from(2)?
            .transpose(1, 2)?;
        let cls = self.cls_token.broadcast_as((b, 1, d))?;
        let tokens = Tensor::cat(&[&cls, &patches], 1)?;
        let tokens = tokens.broadcast_add(&self.positions_for_grid(rows, cols)?)?;
        // Register tokens carry no position and sit between the class token
        // and the patches, as in the reference DINOv2 implementation.
        let tokens = match &self.register_tokens {
            Some(registers) => {
                let registers = registers.broadcast_as((b, self.cfg.num_registers, d))?;
                Tensor::cat(
                    &[&tokens.i((.., 0..1))?, &registers, &tokens.i((.., 1..))?],
                    1,
                )?
            }
            None => tokens,
        };
        let mut x = tokens.contiguous()?;
        if let Some(norm) = &self.pre_norm {
            x = norm.forward(&x)?;
        }
        for block in &self.blocks {
            x = block.forward(&x)?;
        }
        let (hidden, cls_normed) = match self.cfg.final_norm {
            FinalNorm::AllTokens => {
                let hidden = self.final_norm.forward(&x)?;
                let cls = hidden.i((.., 0))?;
                (hidden, cls)
            }
            FinalNorm::PooledOnly => {
                let cls = self.final_norm.forward(&x.i((.., 0))?.contiguous()?)?;
                (x, cls)
            }
        };
        let pooled_cls = self.project(&cls_normed)?;
        Ok(VitOutput { hidden, pooled_cls })
    }

    fn project(&self, pooled: &Tensor) -> Result<Tensor> {
        match &self.head {
            Some(head) => head.forward_2d(&pooled.contiguous()?),
            None => Ok(pooled.clone()),
        }
    }

    /// Index of the first patch token in the hidden states.
    pub fn first_patch_token(&self) -> usize {
        1 + self.cfg.num_registers
    }

    /// L2-normalised embeddings `[B, E]` pooled as asked.
    pub fn embed(&self, pixels: &Tensor, pooling: Pooling) -> Result<Tensor> {
        let out = self.forward(pixels)?;
        self.pool(&out, pooling)
    }

    /// Pools a forward pass's output into L2-normalised embeddings.
    pub fn pool(&self, out: &VitOutput, pooling: Pooling) -> Result<Tensor> {
        let cls = || l2_normalise(&out.pooled_cls);
        let mean = || -> Result<Tensor> {
            let patches = out.hidden.i((.., self.first_patch_token()..))?;
            let mean = patches.mean(1)?;
            let mean = match self.cfg.final_norm {
                FinalNorm::AllTokens => mean,
                FinalNorm::PooledOnly => self.final_norm.forward(&mean)?,
            };
            l2_normalise(&self.project(&mean)?)
        };
        match pooling {
            Pooling::Cls => cls(),
            Pooling::Mean => mean(),
            Pooling::ClsMean => {
                Tensor::cat(&[&cls()?, &mean()?], 1)? * std::f64::consts::FRAC_1_SQRT_2
            }
        }
    }
}

/// Row-wise L2 normalisation of `[B, E]`.
pub fn l2_normalise(x: &Tensor) -> Result<Tensor> {
    let norm = x
        .sqr()?
        .sum_keepdim(D::Minus1)?
        .sqrt()?
        .clamp(1e-12, f64::MAX)?;
    x.broadcast_div(&norm)
}
