//! Builds small synthetic ONNX graphs named like a PyTorch export of a
//! transformers `Dinov2Model` under a `backbone` prefix, so the importer can
//! be tested without the real 97 MB file.

#![allow(dead_code)] // each test binary uses a different part of this module

use std::collections::BTreeMap;

use prost::Message;
use vitrine_model::onnx::{
    AttributeProto, GraphProto, ModelProto, NodeProto, TensorProto, ATTRIBUTE_TYPE_TENSOR,
    DATA_TYPE_FLOAT,
};

pub const HIDDEN: usize = 64;
pub const MLP: usize = 128;
pub const PATCH: usize = 2;
pub const CHANNELS: usize = 3;
pub const GRID: usize = 2;
pub const EPS: f32 = 1e-6;

/// A synthetic export plus the raw values it holds, keyed by initializer name,
/// and the name of the anonymous MatMul weight consumed by each MatMul node.
pub struct SyntheticExport {
    pub model: ModelProto,
    pub values: BTreeMap<String, (Vec<usize>, Vec<f32>)>,
    pub matmul_weight: BTreeMap<String, String>,
}

impl SyntheticExport {
    pub fn bytes(&self) -> Vec<u8> {
        self.model.encode_to_vec()
    }

    pub fn graph_mut(&mut self) -> &mut GraphProto {
        self.model
            .graph
            .as_mut()
            .expect("synthetic model has a graph")
    }

    pub fn initializer_mut(&mut self, name: &str) -> &mut TensorProto {
        self.graph_mut()
            .initializer
            .iter_mut()
            .find(|t| t.name == name)
            .unwrap_or_else(|| panic!("no initializer {name}"))
    }
}

/// Every element distinct (tensor number * 100000 + index, exact in f32), so
/// a misplaced or mis-transposed value cannot go unnoticed.
fn distinct_values(tensor_number: usize, count: usize) -> Vec<f32> {
    (0..count)
        .map(|i| ((tensor_number * 100_000 + i) as f32) * 1e-3)
        .collect()
}

fn tensor(name: &str, shape: &[usize], data: &[f32], use_raw: bool) -> TensorProto {
    TensorProto {
        dims: shape.iter().map(|&d| d as i64).collect(),
        data_type: DATA_TYPE_FLOAT,
        name: name.to_string(),
        raw_data: if use_raw {
            data.iter().flat_map(|v| v.to_le_bytes()).collect()
        } else {
            Vec::new()
        },
        float_data: if use_raw { Vec::new() } else { data.to_vec() },
        ..Default::default()
    }
}

fn node(name: &str, op_type: &str, inputs: &[&str], output: &str) -> NodeProto {
    NodeProto {
        input: inputs.iter().map(|s| s.to_string()).collect(),
        output: vec![output.to_string()],
        name: name.to_string(),
        op_type: op_type.to_string(),
        attribute: Vec::new(),
    }
}

/// A `layers`-block DINOv2 backbone, D=64 (one head), MLP 128, patch 2, 2x2
/// position grid. Tensors alternate between `raw_data` and `float_data`.
pub fn synthetic_dinov2(layers: usize) -> SyntheticExport {
    let mut values = BTreeMap::new();
    let mut matmul_weight = BTreeMap::new();
    let mut initializers = Vec::new();
    let mut nodes = Vec::new();
    let mut add = |name: &str, shape: Vec<usize>| {
        let number = initializers.len() + 1;
        let data = distinct_values(number, shape.iter().product());
        initializers.push(tensor(name, &shape, &data, number % 2 == 0));
        values.insert(name.to_string(), (shape, data));
    };

    let d = HIDDEN;
    add("backbone.embeddings.cls_token", vec![1, 1, d]);
    add(
        "backbone.embeddings.patch_embeddings.projection.weight",
        vec![d, CHANNELS, PATCH, PATCH],
    );
    add(
        "backbone.embeddings.patch_embeddings.projection.bias",
        vec![d],
    );
    add("onnx::Concat_17", vec![1, 1, d]);
    add("onnx::Reshape_18", vec![1, GRID * GRID, d]);
    nodes.push(node(
        "/backbone/embeddings/Concat_6",
        "Concat",
        &["onnx::Concat_17", "/backbone/embeddings/Reshape_2_output_0"],
        "/backbone/embeddings/Concat_6_output_0",
    ));
    nodes.push(node(
        "/backbone/embeddings/Reshape_1",
        "Reshape",
        &["onnx::Reshape_18", "/backbone/embeddings/Concat_2_output_0"],
        "/backbone/embeddings/Reshape_1_output_0",
    ));

    let mut anonymous = 100;
    for i in 0..layers {
        let p = format!("backbone.encoder.layer.{i}");
        for name in [
            "norm1.weight",
            "norm1.bias",
            "norm2.weight",
            "norm2.bias",
            "attention.attention.query.bias",
            "attention.attention.key.bias",
            "attention.attention.value.bias",
            "attention.output.dense.bias",
            "layer_scale1.lambda1",
            "layer_scale2.lambda1",
            "mlp.fc2.bias",
        ] {
            add(&format!("{p}.{name}"), vec![d]);
        }
        add(&format!("{p}.mlp.fc1.bias"), vec![MLP]);
        // Key before value before query, as in the real export: the order of
        // the anonymous names says nothing about the role.
        for (role, shape) in [
            ("attention/attention/key/MatMul", [d, d]),
            ("attention/attention/value/MatMul", [d, d]),
            ("attention/attention/query/MatMul", [d, d]),
            ("attention/output/dense/MatMul", [d, d]),
            ("mlp/fc1/MatMul", [d, MLP]),
            ("mlp/fc2/MatMul", [MLP, d]),
        ] {
            let weight = format!("onnx::MatMul_{anonymous}");
            anonymous += 1;
            add(&weight, shape.to_vec());
            let node_name = format!("/backbone/encoder/layer.{i}/{role}");
            nodes.push(node(
                &node_name,
                "MatMul",
                &[&format!("{node_name}_input"), &weight],
                &format!("{node_name}_output_0"),
            ));
            matmul_weight.insert(node_name, weight);
        }
        nodes.push(node(
            &format!("/backbone/encoder/layer.{i}/mlp/activation/Erf"),
            "Erf",
            &["x"],
            &format!("/backbone/encoder/layer.{i}/mlp/activation/Erf_output_0"),
        ));
    }
    add("backbone.layernorm.weight", vec![d]);
    add("backbone.layernorm.bias", vec![d]);

    let mut eps_constant = node(
        "/backbone/layernorm/Constant_1",
        "Constant",
        &[],
        "/backbone/layernorm/Constant_1_output_0",
    );
    eps_constant.attribute.push(AttributeProto {
        name: "value".into(),
        t: Some(tensor("", &[], &[EPS], true)),
        r#type: ATTRIBUTE_TYPE_TENSOR,
        ..Default::default()
    });
    nodes.push(eps_constant);
    nodes.push(node(
        "/backbone/layernorm/Add",
        "Add",
        &[
            "/backbone/layernorm/ReduceMean_1_output_0",
            "/backbone/layernorm/Constant_1_output_0",
        ],
        "/backbone/layernorm/Add_output_0",
    ));

    SyntheticExport {
        model: ModelProto {
            ir_version: 7,
            graph: Some(GraphProto {
                node: nodes,
                initializer: initializers,
            }),
        },
        values,
        matmul_weight,
    }
}

/// Writes a one-member zip (a stand-in wheel) holding `contents` at `entry`.
pub fn write_zip(path: &std::path::Path, entry: &str, contents: &[u8]) -> anyhow::Result<()> {
    use std::io::Write;
    let mut zip = zip::ZipWriter::new(std::fs::File::create(path)?);
    zip.start_file(entry, zip::write::SimpleFileOptions::default())?;
    zip.write_all(contents)?;
    zip.finish()?;
    Ok(())
}

/// The SHA-256 of a file according to coreutils' `sha256sum`, an
/// implementation independent of ours.
pub fn coreutils_sha256(path: &std::path::Path) -> anyhow::Result<String> {
    let out = std::process::Command::new("sha256sum").arg(path).output()?;
    anyhow::ensure!(out.status.success(), "sha256sum failed");
    let text = String::from_utf8(out.stdout)?;
    Ok(text
        .split_whitespace()
        .next()
        .unwrap_or_default()
        .to_string())
}
