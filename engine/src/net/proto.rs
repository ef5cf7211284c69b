//! The subset of the ONNX protobuf schema (the open standard's `onnx.proto`, IR
//! version 3 and later) that the loader reads, written by hand with `prost` derives.
//!
//! Field numbers follow the standard's schema. Everything not declared here —
//! subgraph attributes, sparse tensors, training info, metadata, functions — is an
//! unknown field to `prost` and is skipped while decoding, so newer models still
//! decode. Subgraphs (`AttributeProto.g`) are deliberately not declared: the loader
//! supports no control-flow operators, and not declaring them keeps decoding flat.

/// `ModelProto`: the top-level message of an `.onnx` file.
#[derive(Clone, PartialEq, prost::Message)]
pub struct ModelProto {
    #[prost(int64, tag = "1")]
    pub ir_version: i64,
    #[prost(message, repeated, tag = "8")]
    pub opset_import: Vec<OperatorSetIdProto>,
    #[prost(string, tag = "2")]
    pub producer_name: String,
    #[prost(message, optional, tag = "7")]
    pub graph: Option<GraphProto>,
}

/// `OperatorSetIdProto`: which operator set (domain and version) the model uses.
#[derive(Clone, PartialEq, prost::Message)]
pub struct OperatorSetIdProto {
    #[prost(string, tag = "1")]
    pub domain: String,
    #[prost(int64, tag = "2")]
    pub version: i64,
}

/// `GraphProto`: nodes, constant tensors (initializers), inputs and outputs.
#[derive(Clone, PartialEq, prost::Message)]
pub struct GraphProto {
    #[prost(message, repeated, tag = "1")]
    pub node: Vec<NodeProto>,
    #[prost(string, tag = "2")]
    pub name: String,
    #[prost(message, repeated, tag = "5")]
    pub initializer: Vec<TensorProto>,
    #[prost(message, repeated, tag = "11")]
    pub input: Vec<ValueInfoProto>,
    #[prost(message, repeated, tag = "12")]
    pub output: Vec<ValueInfoProto>,
}

/// `NodeProto`: one operator application.
#[derive(Clone, PartialEq, prost::Message)]
pub struct NodeProto {
    #[prost(string, repeated, tag = "1")]
    pub input: Vec<String>,
    #[prost(string, repeated, tag = "2")]
    pub output: Vec<String>,
    #[prost(string, tag = "3")]
    pub name: String,
    #[prost(string, tag = "4")]
    pub op_type: String,
    #[prost(string, tag = "7")]
    pub domain: String,
    #[prost(message, repeated, tag = "5")]
    pub attribute: Vec<AttributeProto>,
}

/// `AttributeProto.AttributeType` values used here.
pub mod attribute_type {
    pub const FLOAT: i32 = 1;
    pub const INT: i32 = 2;
    pub const TENSOR: i32 = 4;
    pub const FLOATS: i32 = 6;
    pub const INTS: i32 = 7;
}

/// `AttributeProto`: a named attribute of a node.
#[derive(Clone, PartialEq, prost::Message)]
pub struct AttributeProto {
    #[prost(string, tag = "1")]
    pub name: String,
    #[prost(int32, tag = "20")]
    pub r#type: i32,
    #[prost(float, tag = "2")]
    pub f: f32,
    #[prost(int64, tag = "3")]
    pub i: i64,
    #[prost(bytes = "vec", tag = "4")]
    pub s: Vec<u8>,
    #[prost(message, optional, tag = "5")]
    pub t: Option<TensorProto>,
    #[prost(float, repeated, tag = "7")]
    pub floats: Vec<f32>,
    #[prost(int64, repeated, tag = "8")]
    pub ints: Vec<i64>,
}

/// `TensorProto.DataType` values used here.
pub mod data_type {
    pub const FLOAT: i32 = 1;
    pub const INT32: i32 = 6;
    pub const INT64: i32 = 7;
    pub const DOUBLE: i32 = 11;

    /// The standard's name of a data type code, for error messages.
    pub fn name(code: i32) -> &'static str {
        match code {
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
            14 => "COMPLEX64",
            15 => "COMPLEX128",
            16 => "BFLOAT16",
            _ => "an unknown data type",
        }
    }
}

/// `TensorProto`: a constant tensor (initializer or `Constant` value).
#[derive(Clone, PartialEq, prost::Message)]
pub struct TensorProto {
    #[prost(int64, repeated, tag = "1")]
    pub dims: Vec<i64>,
    #[prost(int32, tag = "2")]
    pub data_type: i32,
    #[prost(float, repeated, tag = "4")]
    pub float_data: Vec<f32>,
    #[prost(int32, repeated, tag = "5")]
    pub int32_data: Vec<i32>,
    #[prost(int64, repeated, tag = "7")]
    pub int64_data: Vec<i64>,
    #[prost(string, tag = "8")]
    pub name: String,
    #[prost(bytes = "vec", tag = "9")]
    pub raw_data: Vec<u8>,
    #[prost(double, repeated, tag = "10")]
    pub double_data: Vec<f64>,
    /// 1 = EXTERNAL: the data lives in another file (not supported).
    #[prost(int32, tag = "14")]
    pub data_location: i32,
}

/// `ValueInfoProto`: name and type of a graph input or output.
#[derive(Clone, PartialEq, prost::Message)]
pub struct ValueInfoProto {
    #[prost(string, tag = "1")]
    pub name: String,
    #[prost(message, optional, tag = "2")]
    pub r#type: Option<TypeProto>,
}

/// `TypeProto`; only the tensor branch of its `oneof` is read (the others are skipped).
#[derive(Clone, PartialEq, prost::Message)]
pub struct TypeProto {
    #[prost(message, optional, tag = "1")]
    pub tensor_type: Option<TypeProtoTensor>,
}

/// `TypeProto.Tensor`: element type and (optional) shape.
#[derive(Clone, PartialEq, prost::Message)]
pub struct TypeProtoTensor {
    #[prost(int32, tag = "1")]
    pub elem_type: i32,
    #[prost(message, optional, tag = "2")]
    pub shape: Option<TensorShapeProto>,
}

/// `TensorShapeProto`.
#[derive(Clone, PartialEq, prost::Message)]
pub struct TensorShapeProto {
    #[prost(message, repeated, tag = "1")]
    pub dim: Vec<Dimension>,
}

/// `TensorShapeProto.Dimension`: a fixed size or a symbolic name (e.g. a batch size).
#[derive(Clone, PartialEq, prost::Message)]
pub struct Dimension {
    #[prost(oneof = "DimensionValue", tags = "1, 2")]
    pub value: Option<DimensionValue>,
}

/// The `oneof value` of a dimension.
#[derive(Clone, PartialEq, prost::Oneof)]
pub enum DimensionValue {
    #[prost(int64, tag = "1")]
    DimValue(i64),
    #[prost(string, tag = "2")]
    DimParam(String),
}
