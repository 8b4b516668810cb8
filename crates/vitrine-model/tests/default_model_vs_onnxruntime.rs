//! Our forward pass of the default model against onnxruntime running the same
//! ONNX graph (cut at the backbone's final LayerNorm) on the same
//! preprocessed tensor. Reference: onnxruntime (CPU provider), version pinned
//! in tools/requirements-test.txt; photos: scikit-image's public-domain
//! sample images (`skimage.data`).
//!
//! Needs `VITRINE_PYTHON` (a Python with numpy, onnx, onnxruntime and
//! scikit-image), `VITRINE_TEST_ONNX` (the original ONNX file) and the
//! imported default model; tools/test-all provides all three. Without them
//! the test says so and passes vacuously only outside CI.

use std::path::PathBuf;
use std::process::Command;

use anyhow::{bail, Context, Result};
use candle_core::{Device, Tensor};
use vitrine_imaging::{decode_path, preprocess, DecodeOptions};
use vitrine_model::encoder::Encoder;
use vitrine_model::fetch::{default_model_root, DEFAULT_WHEEL};

struct Reference {
    python: String,
    onnx: PathBuf,
    model_dir: PathBuf,
}

fn reference_setup() -> Result<Option<Reference>> {
    let python = std::env::var("VITRINE_PYTHON").ok();
    let onnx = std::env::var_os("VITRINE_TEST_ONNX").map(PathBuf::from);
    let model_dir = default_model_root().join(DEFAULT_WHEEL.id);
    match (python, onnx) {
        (Some(python), Some(onnx)) if model_dir.join("model.json").exists() => {
            Ok(Some(Reference {
                python,
                onnx,
                model_dir,
            }))
        }
        _ if std::env::var_os("CI").is_some() => {
            bail!("CI must provide VITRINE_PYTHON, VITRINE_TEST_ONNX and the default model")
        }
        _ => {
            eprintln!("skipping: VITRINE_PYTHON, VITRINE_TEST_ONNX or the default model missing");
            Ok(None)
        }
    }
}

fn skimage_photos(python: &str) -> Result<Vec<PathBuf>> {
    let out = Command::new(python)
        .args([
            "-c",
            "import skimage, os; print(os.path.dirname(skimage.__file__))",
        ])
        .output()
        .context("running python to locate scikit-image")?;
    let dir = PathBuf::from(String::from_utf8(out.stdout)?.trim()).join("data");
    // Colour photographs of different sizes and aspect ratios.
    Ok(["astronaut.png", "chelsea.png", "coffee.png", "rocket.jpg"]
        .iter()
        .map(|name| dir.join(name))
        .collect())
}

#[test]
fn hidden_states_match_onnxruntime() -> Result<()> {
    let Some(reference) = reference_setup()? else {
        return Ok(());
    };
    let encoder = Encoder::load(&reference.model_dir)?;
    let spec = encoder.spec().preprocess.clone();
    let mut prepared = Vec::new();
    for photo in skimage_photos(&reference.python)? {
        let decoded = decode_path(&photo, &DecodeOptions::default())
            .with_context(|| photo.display().to_string())?;
        prepared.push(preprocess(&decoded.rgb, &spec)?);
    }
    let side = spec.crop as usize;
    let data: Vec<f32> = prepared
        .iter()
        .flat_map(|p| p.chw.iter().copied())
        .collect();
    let pixels = Tensor::from_vec(data, (prepared.len(), 3, side, side), &Device::Cpu)?;

    let work = tempfile::tempdir()?;
    let input = work.path().join("input.npy");
    let output = work.path().join("output.npy");
    pixels.write_npy(&input)?;
    let script = PathBuf::from(env!("CARGO_MANIFEST_DIR")).join("../../tools/onnx_reference.py");
    let status = Command::new(&reference.python)
        .arg(&script)
        .arg(&reference.onnx)
        .arg(&input)
        .arg(&output)
        .status()?;
    assert!(status.success(), "onnx_reference.py failed");
    let expected = Tensor::read_npy(&output)?;

    let ours = encoder.model().forward(&pixels)?.hidden;
    assert_eq!(ours.dims(), expected.dims());
    let max_abs_error = (&ours - &expected)?
        .abs()?
        .flatten_all()?
        .max(0)?
        .to_scalar::<f32>()?;
    println!(
        "max |ours - onnxruntime| over {:?}: {max_abs_error:e}",
        ours.dims()
    );
    // The project's tolerance for the forward pass: 1e-4 max absolute error on hidden states.
    assert!(max_abs_error <= 1e-4, "max abs error {max_abs_error}");

    let ours_cls = ours.narrow(1, 0, 1)?.squeeze(1)?.to_vec2::<f32>()?;
    let expected_cls = expected.narrow(1, 0, 1)?.squeeze(1)?.to_vec2::<f32>()?;
    for (a, b) in ours_cls.iter().zip(&expected_cls) {
        let dot: f32 = a.iter().zip(b).map(|(x, y)| x * y).sum();
        let norm = |v: &[f32]| v.iter().map(|x| x * x).sum::<f32>().sqrt();
        let cosine = dot / (norm(a) * norm(b));
        println!("class-token cosine: {cosine:.7}");
        assert!(cosine >= 0.99999, "class-token cosine {cosine}");
    }
    Ok(())
}
