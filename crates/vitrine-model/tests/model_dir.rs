//! Writing and reading our model directory: integrity and layout checks.

mod onnx_support;

use std::path::Path;

use anyhow::Result;
use vitrine_model::config::{
    Activation, Family, FinalNorm, ModelSpec, Pooling, PosInterpolation, VitConfig,
    MODEL_FORMAT_VERSION,
};
use vitrine_model::import::dinov2_preprocess;
use vitrine_model::layout::expected_tensors;
use vitrine_model::model_dir::{
    load_model_dir, read_spec, write_model_dir, NamedTensor, SPEC_FILE, WEIGHTS_FILE,
};
use vitrine_model::ModelError;

fn tiny_spec() -> ModelSpec {
    ModelSpec {
        format_version: MODEL_FORMAT_VERSION,
        id: "tiny".into(),
        vit: VitConfig {
            family: Family::Dinov2,
            hidden_size: 4,
            num_layers: 1,
            num_heads: 1,
            mlp_size: 8,
            patch_size: 2,
            num_channels: 3,
            pos_grid: 2,
            pos_interpolation: PosInterpolation::Bicubic,
            num_registers: 0,
            layer_scale: true,
            patch_bias: true,
            qkv_bias: true,
            pre_norm: false,
            final_norm: FinalNorm::AllTokens,
            activation: Activation::Gelu,
            layer_norm_eps: 1e-6,
            projection: None,
        },
        pooling: Pooling::Cls,
        preprocess: dinov2_preprocess(),
        weights_sha256: String::new(),
        source: "test".into(),
    }
}

fn tiny_tensors(spec: &ModelSpec) -> Vec<NamedTensor> {
    expected_tensors(&spec.vit)
        .into_iter()
        .enumerate()
        .map(|(n, (name, shape))| {
            let count: usize = shape.iter().product();
            NamedTensor {
                name,
                shape,
                data: (0..count).map(|i| (n * 1000 + i) as f32).collect(),
            }
        })
        .collect()
}

fn write_tiny(dir: &Path) -> Result<ModelSpec> {
    let spec = tiny_spec();
    let tensors = tiny_tensors(&spec);
    Ok(write_model_dir(dir, spec, &tensors)?)
}

fn file_names(dir: &Path) -> Result<Vec<String>> {
    let mut names = std::fs::read_dir(dir)?
        .map(|e| Ok(e?.file_name().to_string_lossy().into_owned()))
        .collect::<Result<Vec<_>>>()?;
    names.sort();
    Ok(names)
}

#[test]
fn round_trip_keeps_every_value_and_leaves_no_temporary_files() -> Result<()> {
    let tmp = tempfile::tempdir()?;
    let dir = tmp.path().join("m");
    let written = write_tiny(&dir)?;
    assert_eq!(file_names(&dir)?, vec![SPEC_FILE, WEIGHTS_FILE]);
    // The recorded hash is the one coreutils computes for the weights file.
    assert_eq!(
        written.weights_sha256,
        onnx_support::coreutils_sha256(&dir.join(WEIGHTS_FILE))?
    );

    let (spec, tensors) = load_model_dir(&dir)?;
    assert_eq!(spec, written);
    for t in tiny_tensors(&spec) {
        let loaded = &tensors[&t.name];
        assert_eq!(loaded.dims(), t.shape.as_slice(), "{}", t.name);
        assert_eq!(
            loaded.flatten_all()?.to_vec1::<f32>()?,
            t.data,
            "{}",
            t.name
        );
    }
    Ok(())
}

#[test]
fn safetensors_file_is_readable_by_the_reference_reader() -> Result<()> {
    // The `safetensors` crate's own parser (maintained by the format's
    // authors) must see f32 tensors with the names and shapes we wrote.
    let tmp = tempfile::tempdir()?;
    write_tiny(tmp.path())?;
    let bytes = std::fs::read(tmp.path().join(WEIGHTS_FILE))?;
    let file = safetensors::SafeTensors::deserialize(&bytes)?;
    let spec = tiny_spec();
    for t in tiny_tensors(&spec) {
        let view = file.tensor(&t.name)?;
        assert_eq!(view.dtype(), safetensors::Dtype::F32);
        assert_eq!(view.shape(), t.shape.as_slice());
    }
    Ok(())
}

#[test]
fn corrupted_weights_fail_the_checksum() -> Result<()> {
    let tmp = tempfile::tempdir()?;
    let spec = write_tiny(tmp.path())?;
    let path = tmp.path().join(WEIGHTS_FILE);
    let mut bytes = std::fs::read(&path)?;
    let last = bytes.len() - 1;
    bytes[last] ^= 0x01;
    std::fs::write(&path, &bytes)?;
    match load_model_dir(tmp.path()).unwrap_err() {
        ModelError::ChecksumMismatch {
            path: reported,
            expected,
            actual,
        } => {
            assert_eq!(reported, path);
            assert_eq!(expected, spec.weights_sha256);
            assert_eq!(actual, onnx_support::coreutils_sha256(&path)?);
        }
        other => panic!("unexpected error {other}"),
    }
    Ok(())
}

#[test]
fn newer_format_version_is_refused_naming_both_versions() -> Result<()> {
    let tmp = tempfile::tempdir()?;
    write_tiny(tmp.path())?;
    let path = tmp.path().join(SPEC_FILE);
    let mut json: serde_json::Value = serde_json::from_slice(&std::fs::read(&path)?)?;
    let newer = MODEL_FORMAT_VERSION + 1;
    json["format_version"] = newer.into();
    // A future version may change anything else too.
    json["vit"] = serde_json::json!({"layers_v2": []});
    std::fs::write(&path, serde_json::to_vec(&json)?)?;
    let err = read_spec(tmp.path()).unwrap_err();
    assert!(
        matches!(err, ModelError::FormatTooNew { found, supported, .. } if found == newer && supported == MODEL_FORMAT_VERSION),
        "{err}"
    );
    let message = err.to_string();
    assert!(message.contains(&format!("version {newer}")), "{message}");
    assert!(
        message.contains(&format!("version {MODEL_FORMAT_VERSION}")),
        "{message}"
    );
    Ok(())
}

#[test]
fn spec_disagreeing_with_weights_lists_missing_and_misshaped_tensors() -> Result<()> {
    let tmp = tempfile::tempdir()?;
    write_tiny(tmp.path())?;
    let path = tmp.path().join(SPEC_FILE);
    let mut spec = read_spec(tmp.path())?;
    spec.vit.num_layers = 2;
    spec.vit.mlp_size = 6;
    std::fs::write(&path, serde_json::to_vec_pretty(&spec)?)?;
    match load_model_dir(tmp.path()).unwrap_err() {
        ModelError::LayoutMismatch {
            missing,
            unexpected,
            wrong_shape,
        } => {
            assert!(missing.contains(&"blocks.1.attn.q.weight".to_string()));
            assert!(
                missing.iter().all(|n| n.starts_with("blocks.1.")),
                "{missing:?}"
            );
            assert!(unexpected.is_empty());
            let names: Vec<&str> = wrong_shape.iter().map(|w| w.name.as_str()).collect();
            assert_eq!(
                names,
                [
                    "blocks.0.mlp.fc1.bias",
                    "blocks.0.mlp.fc1.weight",
                    "blocks.0.mlp.fc2.weight"
                ]
            );
            assert_eq!(wrong_shape[1].expected, vec![6, 4]);
            assert_eq!(wrong_shape[1].found, vec![8, 4]);
        }
        other => panic!("unexpected error {other}"),
    }
    Ok(())
}

#[test]
fn rejected_write_leaves_the_previous_model_intact() -> Result<()> {
    let tmp = tempfile::tempdir()?;
    let first = write_tiny(tmp.path())?;
    let mut spec = tiny_spec();
    let mut tensors = tiny_tensors(&spec);
    tensors.retain(|t| t.name != "cls_token");
    tensors.push(NamedTensor {
        name: "decoder.head".into(),
        shape: vec![1],
        data: vec![0.0],
    });
    spec.id = "second".into();
    let err = write_model_dir(tmp.path(), spec, &tensors).unwrap_err();
    let message = err.to_string();
    assert!(message.contains("missing: cls_token"), "{message}");
    assert!(message.contains("unexpected: decoder.head"), "{message}");
    let (still, _) = load_model_dir(tmp.path())?;
    assert_eq!(still, first);
    Ok(())
}

#[test]
fn missing_spec_file_is_an_io_error_naming_it() -> Result<()> {
    let tmp = tempfile::tempdir()?;
    let err = load_model_dir(tmp.path()).unwrap_err();
    assert!(matches!(err, ModelError::Io { .. }), "{err}");
    assert!(err.to_string().contains(SPEC_FILE), "{err}");
    Ok(())
}
