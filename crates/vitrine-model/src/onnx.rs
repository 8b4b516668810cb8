//! The few ONNX protobuf messages the importer reads, declared by hand with
//! the field tags of the public `onnx.proto` (unknown fields are skipped by
//! the decoder, so only what we use is declared).

use std::path::Path;

use prost::Message;

use crate::error::ModelError;

/// `TensorProto.DataType.FLOAT`.
pub const DATA_TYPE_FLOAT: i32 = 1;
/// `TensorProto.DataLocation.EXTERNAL`.
pub const DATA_LOCATION_EXTERNAL: i32 = 1;
/// `AttributeProto.AttributeType.FLOAT`.
pub const ATTRIBUTE_TYPE_FLOAT: i32 = 1;
/// `AttributeProto.AttributeType.TENSOR`.
pub const ATTRIBUTE_TYPE_TENSOR: i32 = 4;

#[derive(Clone, PartialEq, Message)]
pub struct ModelProto {
    #[prost(int64, tag = "1")]
    pub ir_version: i64,
    #[prost(message, optional, tag = "7")]
    pub graph: Option<GraphProto>,
}

#[derive(Clone, PartialEq, Message)]
pub struct GraphProto {
    #[prost(message, repeated, tag = "1")]
    pub node: Vec<NodeProto>,
    #[prost(message, repeated, tag = "5")]
    pub initializer: Vec<TensorProto>,
}

#[derive(Clone, PartialEq, Message)]
pub struct NodeProto {
    #[prost(string, repeated, tag = "1")]
    pub input: Vec<String>,
    #[prost(string, repeated, tag = "2")]
    pub output: Vec<String>,
    #[prost(string, tag = "3")]
    pub name: String,
    #[prost(string, tag = "4")]
    pub op_type: String,
    #[prost(message, repeated, tag = "5")]
    pub attribute: Vec<AttributeProto>,
}

#[derive(Clone, PartialEq, Message)]
pub struct AttributeProto {
    #[prost(string, tag = "1")]
    pub name: String,
    #[prost(float, tag = "2")]
    pub f: f32,
    #[prost(message, optional, tag = "5")]
    pub t: Option<TensorProto>,
    #[prost(int32, tag = "20")]
    pub r#type: i32,
}

#[derive(Clone, PartialEq, Message)]
pub struct StringStringEntryProto {
    #[prost(string, tag = "1")]
    pub key: String,
    #[prost(string, tag = "2")]
    pub value: String,
}

#[derive(Clone, PartialEq, Message)]
pub struct TensorProto {
    /// `onnx.proto` (proto2) declares `dims` unpacked; the decoder accepts both.
    #[prost(int64, repeated, packed = "false", tag = "1")]
    pub dims: Vec<i64>,
    #[prost(int32, tag = "2")]
    pub data_type: i32,
    #[prost(float, repeated, tag = "4")]
    pub float_data: Vec<f32>,
    #[prost(string, tag = "8")]
    pub name: String,
    #[prost(bytes = "vec", tag = "9")]
    pub raw_data: Vec<u8>,
    #[prost(message, repeated, tag = "13")]
    pub external_data: Vec<StringStringEntryProto>,
    #[prost(int32, tag = "14")]
    pub data_location: i32,
}

/// Reads and decodes an ONNX model file.
pub fn read_model(path: &Path) -> Result<ModelProto, ModelError> {
    let bytes = std::fs::read(path).map_err(|e| ModelError::io(path, e))?;
    decode_model(&bytes, path)
}

/// Decodes ONNX model bytes; `path` only names the source in errors.
pub fn decode_model(bytes: &[u8], path: &Path) -> Result<ModelProto, ModelError> {
    let not_onnx = |reason: String| ModelError::NotOnnx {
        path: path.to_path_buf(),
        reason,
    };
    let model = ModelProto::decode(bytes).map_err(|e| not_onnx(e.to_string()))?;
    // Every ONNX writer sets the IR version; a protobuf that happens to decode
    // from unrelated bytes almost never does, and never carries a graph.
    if model.ir_version <= 0 {
        return Err(not_onnx("no IR version".into()));
    }
    if model.graph.is_none() {
        return Err(not_onnx("no graph".into()));
    }
    Ok(model)
}

/// The ONNX name of a `TensorProto.DataType` code, for messages.
pub fn data_type_name(code: i32) -> String {
    let name = match code {
        0 => "UNDEFINED",
        1 => "FLOAT",
        2 => "UINT8",
        3 => "INT8",
        4 => "UINT16",
        5 => "INT16",
        6 => "INT32",
        7 => "INT64",
        8 => "STRING",
        9 => "BOOL",
        10 => "FLOAT16",
        11 => "DOUBLE",
        12 => "UINT32",
        13 => "UINT64",
        16 => "BFLOAT16",
        _ => return format!("data type {code}"),
    };
    name.to_string()
}

impl TensorProto {
    /// The dimensions as sizes; negative dimensions are malformed.
    pub fn shape(&self) -> Result<Vec<usize>, ModelError> {
        self.dims
            .iter()
            .map(|&d| {
                usize::try_from(d).map_err(|_| self.malformed(format!("negative dimension {d}")))
            })
            .collect()
    }

    /// The values of a FLOAT tensor, from `raw_data` (little-endian) or `float_data`.
    pub fn to_f32(&self) -> Result<Vec<f32>, ModelError> {
        if self.data_location == DATA_LOCATION_EXTERNAL || !self.external_data.is_empty() {
            return Err(ModelError::ExternalData {
                tensor: self.name.clone(),
            });
        }
        if self.data_type != DATA_TYPE_FLOAT {
            return Err(ModelError::UnsupportedDtype {
                tensor: self.name.clone(),
                dtype: data_type_name(self.data_type),
                expected: data_type_name(DATA_TYPE_FLOAT),
            });
        }
        let count = self
            .shape()?
            .iter()
            .try_fold(1usize, |acc, &d| acc.checked_mul(d))
            .ok_or_else(|| self.malformed("element count overflows".into()))?;
        let sizes_agree = if self.raw_data.is_empty() {
            self.float_data.len() == count
        } else {
            count.checked_mul(4) == Some(self.raw_data.len())
        };
        if !sizes_agree {
            return Err(self.malformed(format!(
                "{count} elements expected from dims {:?}, found {} bytes of raw data and {} floats",
                self.dims,
                self.raw_data.len(),
                self.float_data.len()
            )));
        }
        let values = if self.raw_data.is_empty() {
            self.float_data.clone()
        } else {
            self.raw_data
                .chunks_exact(4)
                .map(|b| f32::from_le_bytes([b[0], b[1], b[2], b[3]]))
                .collect()
        };
        Ok(values)
    }

    fn malformed(&self, reason: String) -> ModelError {
        ModelError::MalformedTensor {
            tensor: self.name.clone(),
            reason,
        }
    }
}
