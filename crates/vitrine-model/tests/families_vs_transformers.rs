//! Checkpoints of each published ViT family, loaded by `families` and run by our
//! forward pass, against the same checkpoints run by transformers' own modules.
//!
//! Source of every expected value: `tools/make_family_fixtures.py`, which builds
//! tiny random `ViTModel`, `Dinov2Model`, `Dinov2WithRegistersModel` and
//! `CLIPVisionModelWithProjection` models with transformers 5.24.0 on torch
//! 2.15.0 (recorded in `tests/fixtures/families/versions.json`), saves them
//! with `save_pretrained` and stores their outputs, computed in float64, on a
//! square batch at the training size and on a non-square batch (40×24 pixels)
//! that forces bicubic interpolation of the position table.

use std::collections::HashMap;
use std::path::{Path, PathBuf};

use anyhow::{ensure, Context, Result};
use candle_core::{Device, Tensor};
use vitrine_model::config::{Activation, Family};
use vitrine_model::families::{
    load_family_checkpoint, translate_tensors, FamilyCheckpoint, FamilyHints, HfConfig,
};
use vitrine_model::vit::VitModel;
use vitrine_model::ModelError;

/// Largest absolute difference allowed against the float64 reference (the
/// project's agreed bound for f32 inference on these tiny models).
const TOLERANCE: f32 = 1e-4;
/// Attention heads of every fixture (set in the fixture script).
const FIXTURE_HEADS: usize = 4;

fn fixtures() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/fixtures/families")
}

fn load_safetensors(path: &Path) -> Result<HashMap<String, Tensor>> {
    candle_core::safetensors::load(path, &Device::Cpu)
        .with_context(|| format!("reading {}", path.display()))
}

fn max_abs_diff(ours: &Tensor, theirs: &Tensor) -> Result<f32> {
    ensure!(
        ours.dims() == theirs.dims(),
        "shape {:?}, reference {:?}",
        ours.dims(),
        theirs.dims()
    );
    Ok((ours - theirs)?
        .abs()?
        .flatten_all()?
        .max(0)?
        .to_scalar::<f32>()?)
}

/// Which outputs of the reference to compare.
#[derive(Clone, Copy, PartialEq)]
enum Compare {
    HiddenAndPooled,
    HiddenOnly,
}

/// Runs `checkpoint` on both fixture inputs and compares with the reference
/// outputs of fixture `name`.
fn assert_matches_reference(
    name: &str,
    checkpoint: FamilyCheckpoint,
    compare: Compare,
) -> Result<()> {
    let config = checkpoint.config.clone();
    let model = VitModel::from_tensors(&config, checkpoint.tensors, &Device::Cpu)?;
    let inputs = load_safetensors(&fixtures().join("inputs.safetensors"))?;
    let reference = load_safetensors(&fixtures().join(name).join("reference.safetensors"))?;
    for input in ["square", "non_square"] {
        let out = model.forward(&inputs[input])?;
        let hidden_error = max_abs_diff(
            &out.hidden,
            &reference[&format!("{input}.last_hidden_state")],
        )
        .with_context(|| format!("{name} {input} hidden states"))?;
        println!("{name} {input}: hidden states max abs error {hidden_error:.2e}");
        ensure!(
            hidden_error <= TOLERANCE,
            "{name} {input}: hidden states differ from transformers by {hidden_error:e}"
        );
        if compare == Compare::HiddenAndPooled {
            let pooled_error =
                max_abs_diff(&out.pooled_cls, &reference[&format!("{input}.pooled")])
                    .with_context(|| format!("{name} {input} pooled output"))?;
            println!("{name} {input}: pooled output max abs error {pooled_error:.2e}");
            ensure!(
                pooled_error <= TOLERANCE,
                "{name} {input}: pooled output differs from transformers by {pooled_error:e}"
            );
        }
    }
    Ok(())
}

fn check_saved_checkpoint(name: &str, family: Family) -> Result<()> {
    let checkpoint = load_family_checkpoint(
        &fixtures().join(name),
        &FamilyHints::default(),
        &Device::Cpu,
    )?;
    ensure!(
        checkpoint.config.family == family,
        "detected {:?}",
        checkpoint.config.family
    );
    assert_matches_reference(name, checkpoint, Compare::HiddenAndPooled)
}

// Reference: transformers ViTModel (pooled = last_hidden_state[:, 0]; its
// tanh `pooler` is ignored by design).
#[test]
fn vit_matches_transformers() -> Result<()> {
    check_saved_checkpoint("vit", Family::Vit)
}

// Reference: transformers Dinov2Model, layer scale on.
#[test]
fn dinov2_matches_transformers() -> Result<()> {
    check_saved_checkpoint("dinov2", Family::Dinov2)
}

// Reference: transformers Dinov2WithRegistersModel, 4 register tokens placed
// after the class token in the hidden states. Its position interpolation is
// bicubic with `antialias=True`, unlike the other three families.
#[test]
fn dinov2_with_registers_matches_transformers() -> Result<()> {
    let checkpoint = load_family_checkpoint(
        &fixtures().join("dinov2_registers"),
        &FamilyHints::default(),
        &Device::Cpu,
    )?;
    ensure!(checkpoint.config.num_registers == 4);
    check_saved_checkpoint("dinov2_registers", Family::Dinov2Registers)
}

// Reference: transformers CLIPVisionModelWithProjection (hidden states are the
// raw encoder output; pooled = `image_embeds`, post_layernorm + projection).
#[test]
fn clip_matches_transformers() -> Result<()> {
    check_saved_checkpoint("clip", Family::Clip)
}

fn raw_tensors(name: &str) -> Result<HashMap<String, Tensor>> {
    load_safetensors(&fixtures().join(name).join("model.safetensors"))
}

fn hf_config(name: &str) -> Result<HfConfig> {
    Ok(HfConfig::read(&fixtures().join(name).join("config.json"))?)
}

// Task models built around ViTModel name it `vit.` and add a `classifier`;
// the reference outputs are those of the bare encoder (transformers ViTModel).
#[test]
fn prefixed_vit_with_task_head_matches_transformers() -> Result<()> {
    let mut tensors: HashMap<String, Tensor> = raw_tensors("vit")?
        .into_iter()
        .map(|(name, tensor)| (format!("vit.{name}"), tensor))
        .collect();
    tensors.insert(
        "classifier.weight".into(),
        Tensor::zeros((10, 32), candle_core::DType::F32, &Device::Cpu)?,
    );
    tensors.insert(
        "classifier.bias".into(),
        Tensor::zeros(10, candle_core::DType::F32, &Device::Cpu)?,
    );
    let checkpoint = translate_tensors(tensors, Some(&hf_config("vit")?), &FamilyHints::default())?;
    assert_matches_reference("vit", checkpoint, Compare::HiddenAndPooled)
}

// Without config.json the loader falls back to transformers' config defaults
// (CLIP: quick_gelu, eps 1e-5; DINOv2: gelu, eps 1e-6), which the fixtures use.
#[test]
fn without_config_json_heads_from_hints_and_defaults_match_transformers() -> Result<()> {
    let hints = FamilyHints {
        num_heads: Some(FIXTURE_HEADS),
        ..FamilyHints::default()
    };
    for name in ["clip", "dinov2"] {
        let checkpoint = translate_tensors(raw_tensors(name)?, None, &hints)?;
        assert_matches_reference(name, checkpoint, Compare::HiddenAndPooled)?;
    }
    Ok(())
}

// A full CLIPModel checkpoint also holds the text tower, `text_projection`,
// `logit_scale` and (older files) `position_ids` buffers; all are ignored.
#[test]
fn clip_model_layout_ignores_text_tower() -> Result<()> {
    let mut tensors = raw_tensors("clip")?;
    let cpu = Device::Cpu;
    let f32 = candle_core::DType::F32;
    tensors.insert(
        "text_model.final_layer_norm.weight".into(),
        Tensor::ones(48, f32, &cpu)?,
    );
    tensors.insert(
        "text_projection.weight".into(),
        Tensor::zeros((16, 48), f32, &cpu)?,
    );
    tensors.insert("logit_scale".into(), Tensor::new(2.6592f32, &cpu)?);
    tensors.insert(
        "vision_model.embeddings.position_ids".into(),
        Tensor::arange(0i64, 17, &cpu)?.unsqueeze(0)?,
    );
    let checkpoint =
        translate_tensors(tensors, Some(&hf_config("clip")?), &FamilyHints::default())?;
    assert_matches_reference("clip", checkpoint, Compare::HiddenAndPooled)
}

// transformers 5 saves a bare CLIPVisionModel without the `vision_model.`
// prefix and without a projection; its hidden states are the same tensors.
#[test]
fn unprefixed_clip_vision_model_without_projection_matches_hidden_states() -> Result<()> {
    let tensors: HashMap<String, Tensor> = raw_tensors("clip")?
        .into_iter()
        .filter_map(|(name, tensor)| {
            name.strip_prefix("vision_model.")
                .map(|relative| (relative.to_string(), tensor))
        })
        .collect();
    let checkpoint =
        translate_tensors(tensors, Some(&hf_config("clip")?), &FamilyHints::default())?;
    ensure!(checkpoint.config.projection.is_none());
    assert_matches_reference("clip", checkpoint, Compare::HiddenOnly)
}

#[test]
fn heads_are_required_without_config_json() -> Result<()> {
    let err = translate_tensors(raw_tensors("vit")?, None, &FamilyHints::default())
        .err()
        .context("loading without heads should fail")?;
    ensure!(err.to_string().contains("attention heads"), "{err}");
    Ok(())
}

#[test]
fn hints_that_contradict_config_json_are_refused() -> Result<()> {
    let hints = FamilyHints {
        activation: Some(Activation::Gelu),
        ..FamilyHints::default()
    };
    let err = translate_tensors(raw_tensors("clip")?, Some(&hf_config("clip")?), &hints)
        .err()
        .context("gelu against quick_gelu should fail")?;
    ensure!(err.to_string().contains("hidden_act"), "{err}");
    Ok(())
}

#[test]
fn config_json_that_contradicts_the_tensors_is_refused() -> Result<()> {
    let mut config = hf_config("dinov2")?;
    config.num_hidden_layers = Some(12);
    let err = translate_tensors(
        raw_tensors("dinov2")?,
        Some(&config),
        &FamilyHints::default(),
    )
    .err()
    .context("12 layers against 2 should fail")?;
    ensure!(err.to_string().contains("num_hidden_layers"), "{err}");
    Ok(())
}

// One tensor dropped, one foreign tensor added, one reshaped: the error names
// each under the checkpoint's own names, all at once.
#[test]
fn layout_mismatch_lists_missing_unexpected_and_wrongly_shaped_tensors() -> Result<()> {
    let mut tensors = raw_tensors("dinov2_registers")?;
    let missing = "encoder.layer.1.layer_scale2.lambda1";
    let reshaped = "encoder.layer.0.attention.attention.key.weight";
    tensors.remove(missing).context("fixture tensor")?;
    let key = tensors.remove(reshaped).context("fixture tensor")?;
    tensors.insert(reshaped.into(), key.reshape((16, 64))?);
    tensors.insert(
        "encoder.layer.0.extra.weight".into(),
        Tensor::zeros(3, candle_core::DType::F32, &Device::Cpu)?,
    );
    let err = translate_tensors(
        tensors,
        Some(&hf_config("dinov2_registers")?),
        &FamilyHints::default(),
    )
    .err()
    .context("a broken checkpoint should fail")?;
    let ModelError::LayoutMismatch {
        missing: found_missing,
        unexpected,
        wrong_shape,
    } = &err
    else {
        anyhow::bail!("expected a layout mismatch, got {err}");
    };
    ensure!(found_missing == &[missing.to_string()], "{err}");
    ensure!(
        unexpected == &["encoder.layer.0.extra.weight".to_string()],
        "{err}"
    );
    ensure!(
        wrong_shape.len() == 1 && wrong_shape[0].name == reshaped,
        "{err}"
    );
    ensure!(
        wrong_shape[0].expected == [32, 32] && wrong_shape[0].found == [16, 64],
        "{err}"
    );
    Ok(())
}

#[test]
fn unknown_layouts_are_refused() -> Result<()> {
    let tensors = HashMap::from([(
        "transformer.blocks.0.weight".to_string(),
        Tensor::zeros(4, candle_core::DType::F32, &Device::Cpu)?,
    )]);
    let err = translate_tensors(tensors, None, &FamilyHints::default())
        .err()
        .context("an unknown layout should fail")?;
    ensure!(err.to_string().contains("none of the supported"), "{err}");
    Ok(())
}
