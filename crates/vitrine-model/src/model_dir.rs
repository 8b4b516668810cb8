//! Our model directory: `model.json` (a [`ModelSpec`]) beside
//! `model.safetensors` (canonical f32 tensors, see [`crate::layout`]).
//!
//! `model.json` is written last and names the SHA-256 of the weights, so a
//! directory interrupted mid-write never passes for a valid model.

use std::collections::HashMap;
use std::io::{Read, Write};
use std::path::{Path, PathBuf};

use candle_core::{DType, Device, Tensor};
use safetensors::tensor::{Dtype, SafeTensors, TensorView};
use sha2::{Digest, Sha256};

use crate::config::{ModelSpec, MODEL_FORMAT_VERSION};
use crate::error::ModelError;
use crate::layout;

pub const SPEC_FILE: &str = "model.json";
pub const WEIGHTS_FILE: &str = "model.safetensors";

/// One f32 tensor in canonical layout, row-major.
#[derive(Clone, Debug, PartialEq)]
pub struct NamedTensor {
    pub name: String,
    pub shape: Vec<usize>,
    pub data: Vec<f32>,
}

/// Lower-case hex SHA-256 of a file, streamed.
pub fn sha256_file(path: &Path) -> Result<String, ModelError> {
    let mut file = std::fs::File::open(path).map_err(|e| ModelError::io(path, e))?;
    let mut hasher = Sha256::new();
    let mut buf = vec![0u8; 1 << 20];
    loop {
        let n = file.read(&mut buf).map_err(|e| ModelError::io(path, e))?;
        if n == 0 {
            break;
        }
        hasher.update(&buf[..n]);
    }
    Ok(hex::encode(hasher.finalize()))
}

/// Fails with [`ModelError::ChecksumMismatch`] unless `path` hashes to `expected`.
pub fn verify_sha256(path: &Path, expected: &str) -> Result<(), ModelError> {
    let actual = sha256_file(path)?;
    if actual.eq_ignore_ascii_case(expected) {
        Ok(())
    } else {
        Err(ModelError::ChecksumMismatch {
            path: path.to_path_buf(),
            expected: expected.to_ascii_lowercase(),
            actual,
        })
    }
}

/// Writes `tensors` and `spec` into `dir` (created if needed), replacing any
/// model there. The tensors are checked against the layout of `spec.vit`
/// first; `spec.weights_sha256` is filled in. Returns the written spec.
pub fn write_model_dir(
    dir: &Path,
    mut spec: ModelSpec,
    tensors: &[NamedTensor],
) -> Result<ModelSpec, ModelError> {
    layout::check_layout(
        &spec.vit,
        tensors
            .iter()
            .map(|t| (t.name.as_str(), t.shape.as_slice())),
    )?;
    for t in tensors {
        let count: usize = t.shape.iter().product();
        if count != t.data.len() {
            return Err(ModelError::MalformedTensor {
                tensor: t.name.clone(),
                reason: format!(
                    "shape {:?} needs {count} values, got {}",
                    t.shape,
                    t.data.len()
                ),
            });
        }
    }
    std::fs::create_dir_all(dir).map_err(|e| ModelError::io(dir, e))?;

    let weights_path = dir.join(WEIGHTS_FILE);
    let bytes: Vec<Vec<u8>> = tensors
        .iter()
        .map(|t| t.data.iter().flat_map(|v| v.to_le_bytes()).collect())
        .collect();
    let views = tensors
        .iter()
        .zip(&bytes)
        .map(|(t, b)| {
            TensorView::new(Dtype::F32, t.shape.clone(), b)
                .map(|view| (t.name.as_str(), view))
                .map_err(|source| ModelError::Safetensors {
                    path: weights_path.clone(),
                    source,
                })
        })
        .collect::<Result<Vec<_>, _>>()?;
    let serialized =
        safetensors::serialize(views, None).map_err(|source| ModelError::Safetensors {
            path: weights_path.clone(),
            source,
        })?;
    drop(bytes);
    spec.weights_sha256 = hex::encode(Sha256::digest(&serialized));

    // Invalidate the old model before its weights are replaced, so that no
    // moment exists where an old spec names new weights or the reverse.
    let spec_path = dir.join(SPEC_FILE);
    match std::fs::remove_file(&spec_path) {
        Err(e) if e.kind() != std::io::ErrorKind::NotFound => {
            return Err(ModelError::io(&spec_path, e))
        }
        _ => {}
    }
    write_atomically(&weights_path, &serialized)?;
    let json = serde_json::to_vec_pretty(&spec).map_err(|source| ModelError::Json {
        path: spec_path.clone(),
        source,
    })?;
    write_atomically(&spec_path, &json)?;
    Ok(spec)
}

/// Writes through a temporary file in the same directory, synced, then renamed.
fn write_atomically(path: &Path, contents: &[u8]) -> Result<(), ModelError> {
    let dir = path.parent().unwrap_or(Path::new("."));
    let mut tmp = tempfile::NamedTempFile::new_in(dir).map_err(|e| ModelError::io(dir, e))?;
    tmp.write_all(contents)
        .and_then(|()| tmp.as_file().sync_all())
        .map_err(|e| ModelError::io(tmp.path(), e))?;
    tmp.persist(path)
        .map_err(|e| ModelError::io(path, e.error))?;
    Ok(())
}

/// Reads `dir/model.json`, refusing a format version newer than ours before
/// interpreting anything else in it.
pub fn read_spec(dir: &Path) -> Result<ModelSpec, ModelError> {
    let path = dir.join(SPEC_FILE);
    let text = std::fs::read(&path).map_err(|e| ModelError::io(&path, e))?;
    let json_error = |source| ModelError::Json {
        path: path.clone(),
        source,
    };
    let value: serde_json::Value = serde_json::from_slice(&text).map_err(json_error)?;
    if let Some(found) = value.get("format_version").and_then(|v| v.as_u64()) {
        if found > u64::from(MODEL_FORMAT_VERSION) {
            return Err(ModelError::FormatTooNew {
                path,
                found: u32::try_from(found).unwrap_or(u32::MAX),
                supported: MODEL_FORMAT_VERSION,
            });
        }
    }
    serde_json::from_value(value).map_err(json_error)
}

/// Checks that `dir/model.safetensors` hashes to `spec.weights_sha256`.
pub fn verify_weights(dir: &Path, spec: &ModelSpec) -> Result<(), ModelError> {
    verify_sha256(&dir.join(WEIGHTS_FILE), &spec.weights_sha256)
}

/// True when `dir` holds a readable spec whose weights verify.
pub fn is_complete_model_dir(dir: &Path) -> bool {
    read_spec(dir)
        .and_then(|spec| verify_weights(dir, &spec))
        .is_ok()
}

/// Loads a model directory: the spec, and every tensor on the CPU after
/// checking the weights' hash and the tensor set against the layout.
pub fn load_model_dir(dir: &Path) -> Result<(ModelSpec, HashMap<String, Tensor>), ModelError> {
    let spec = read_spec(dir)?;
    let weights_path: PathBuf = dir.join(WEIGHTS_FILE);
    let bytes = std::fs::read(&weights_path).map_err(|e| ModelError::io(&weights_path, e))?;
    let actual = hex::encode(Sha256::digest(&bytes));
    if !actual.eq_ignore_ascii_case(&spec.weights_sha256) {
        return Err(ModelError::ChecksumMismatch {
            path: weights_path,
            expected: spec.weights_sha256.clone(),
            actual,
        });
    }
    let file = SafeTensors::deserialize(&bytes).map_err(|source| ModelError::Safetensors {
        path: weights_path.clone(),
        source,
    })?;
    let views = file.tensors();
    layout::check_layout(
        &spec.vit,
        views
            .iter()
            .map(|(name, view)| (name.as_str(), view.shape())),
    )?;
    let mut tensors = HashMap::with_capacity(views.len());
    for (name, view) in &views {
        if view.dtype() != Dtype::F32 {
            return Err(ModelError::UnsupportedDtype {
                tensor: name.clone(),
                dtype: format!("{:?}", view.dtype()),
                expected: "F32".into(),
            });
        }
        let tensor = Tensor::from_raw_buffer(view.data(), DType::F32, view.shape(), &Device::Cpu)?;
        tensors.insert(name.clone(), tensor);
    }
    Ok((spec, tensors))
}
