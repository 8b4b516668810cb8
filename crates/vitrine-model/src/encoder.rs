//! An encoder ready to embed prepared images: the model, its description and
//! the pooling it records with every embedding.

use std::borrow::Borrow;

use candle_core::{Device, Tensor};
use vitrine_imaging::PreparedImage;

use crate::config::{ModelSpec, Pooling};
use crate::error::ModelError;
use crate::vit::{VitModel, VitOutput};

pub struct Encoder {
    spec: ModelSpec,
    model: VitModel,
}

/// One image's outputs beyond its embedding: the L2-normalised patch tokens,
/// `[n_patches * dim]` row-major, for finer comparisons of two images.
pub struct PatchTokens {
    pub rows: usize,
    pub cols: usize,
    pub dim: usize,
    pub normalised: Vec<f32>,
}

impl Encoder {
    pub fn new(spec: ModelSpec, model: VitModel) -> Self {
        Self { spec, model }
    }

    /// Loads a model directory (`model.json` + `model.safetensors`),
    /// verifying the weights' checksum and tensor layout.
    pub fn load(dir: &std::path::Path) -> Result<Self, ModelError> {
        let (spec, tensors) = crate::model_dir::load_model_dir(dir)?;
        let model = VitModel::from_tensors(&spec.vit, tensors, &Device::Cpu)?;
        Ok(Self { spec, model })
    }

    pub fn spec(&self) -> &ModelSpec {
        &self.spec
    }

    pub fn model(&self) -> &VitModel {
        &self.model
    }

    /// The embedding dimension under the spec's pooling.
    pub fn embedding_dim(&self) -> usize {
        self.model.embedding_dim(self.spec.pooling)
    }

    /// Uses another pooling than the one the model was saved with.
    pub fn set_pooling(&mut self, pooling: Pooling) {
        self.spec.pooling = pooling;
    }

    fn batch_tensor<I: Borrow<PreparedImage>>(&self, images: &[I]) -> Result<Tensor, ModelError> {
        let first = images
            .first()
            .map(Borrow::borrow)
            .ok_or_else(|| ModelError::InvalidInput("empty batch".into()))?;
        let (w, h) = (first.width as usize, first.height as usize);
        let mut data = Vec::with_capacity(images.len() * 3 * h * w);
        for image in images.iter().map(Borrow::borrow) {
            if (image.width as usize, image.height as usize) != (w, h) {
                return Err(ModelError::InvalidInput(format!(
                    "batch mixes input sizes {w}x{h} and {}x{}",
                    image.width, image.height
                )));
            }
            data.extend_from_slice(&image.chw);
        }
        Ok(Tensor::from_vec(
            data,
            (images.len(), 3, h, w),
            &Device::Cpu,
        )?)
    }

    fn forward<I: Borrow<PreparedImage>>(&self, images: &[I]) -> Result<VitOutput, ModelError> {
        let pixels = self.batch_tensor(images)?;
        Ok(self.model.forward(&pixels)?)
    }

    /// L2-normalised embeddings, one per image, pooled as the spec says.
    pub fn embed<I: Borrow<PreparedImage>>(
        &self,
        images: &[I],
    ) -> Result<Vec<Vec<f32>>, ModelError> {
        if images.is_empty() {
            return Ok(Vec::new());
        }
        let out = self.forward(images)?;
        Ok(self.model.pool(&out, self.spec.pooling)?.to_vec2::<f32>()?)
    }

    /// Embeddings together with each image's normalised patch tokens.
    pub fn embed_with_patches<I: Borrow<PreparedImage>>(
        &self,
        images: &[I],
    ) -> Result<Vec<(Vec<f32>, PatchTokens)>, ModelError> {
        if images.is_empty() {
            return Ok(Vec::new());
        }
        let out = self.forward(images)?;
        let embeddings = self.model.pool(&out, self.spec.pooling)?.to_vec2::<f32>()?;
        let patches = out.hidden.narrow(
            1,
            self.model.first_patch_token(),
            out.hidden.dim(1)? - self.model.first_patch_token(),
        )?;
        let (b, n, d) = patches.dims3()?;
        let patches =
            crate::vit::l2_normalise(&patches.reshape((b * n, d))?)?.reshape((b, n, d))?;
        let p = self.model.config().patch_size;
        let first = images[0].borrow();
        let (rows, cols) = (first.height as usize / p, first.width as usize / p);
        let mut result = Vec::with_capacity(b);
        for (i, embedding) in embeddings.into_iter().enumerate() {
            let normalised = patches.get(i)?.flatten_all()?.to_vec1::<f32>()?;
            result.push((
                embedding,
                PatchTokens {
                    rows,
                    cols,
                    dim: d,
                    normalised,
                },
            ));
        }
        Ok(result)
    }
}
