//! The subset of the ONNX protobuf messages an exported policy uses, as `prost`
//! messages.
//!
//! Field numbers and types follow `onnx/onnx.proto` of the ONNX project (checked against
//! the copy shipped with the `onnx` 1.23 Python package). Only the fields mnemon writes
//! are declared; protobuf readers skip nothing they need, and a `oneof` is declared as
//! its member fields (the same bytes on the wire).

/// `TensorProto.DataType.FLOAT`.
pub const FLOAT: i32 = 1;
/// `TensorProto.DataType.INT64`.
pub const INT64: i32 = 7;
/// `AttributeProto.AttributeType.FLOAT`.
pub const ATTR_FLOAT: i32 = 1;
/// `AttributeProto.AttributeType.INT`.
pub const ATTR_INT: i32 = 2;
/// `AttributeProto.AttributeType.INTS`.
pub const ATTR_INTS: i32 = 7;

/// `ModelProto`: the file's top-level message.
#[derive(Clone, PartialEq, prost::Message)]
pub struct ModelProto {
    /// Version of the IR (file format).
    #[prost(int64, tag = "1")]
    pub ir_version: i64,
    /// Tool that wrote the model.
    #[prost(string, tag = "2")]
    pub producer_name: String,
    /// Its version.
    #[prost(string, tag = "3")]
    pub producer_version: String,
    /// Reverse-DNS style namespace of the model.
    #[prost(string, tag = "4")]
    pub domain: String,
    /// Version of the model itself.
    #[prost(int64, tag = "5")]
    pub model_version: i64,
    /// Human-readable description.
    #[prost(string, tag = "6")]
    pub doc_string: String,
    /// The computation.
    #[prost(message, optional, tag = "7")]
    pub graph: Option<GraphProto>,
    /// Operator sets the graph uses.
    #[prost(message, repeated, tag = "8")]
    pub opset_import: Vec<OperatorSetIdProto>,
    /// Free-form key/value metadata.
    #[prost(message, repeated, tag = "14")]
    pub metadata_props: Vec<StringStringEntryProto>,
}

/// `OperatorSetIdProto`.
#[derive(Clone, PartialEq, prost::Message)]
pub struct OperatorSetIdProto {
    /// Empty for the default `ai.onnx` domain.
    #[prost(string, tag = "1")]
    pub domain: String,
    /// Opset version.
    #[prost(int64, tag = "2")]
    pub version: i64,
}

/// `StringStringEntryProto`.
#[derive(Clone, PartialEq, prost::Message)]
pub struct StringStringEntryProto {
    /// Key.
    #[prost(string, tag = "1")]
    pub key: String,
    /// Value.
    #[prost(string, tag = "2")]
    pub value: String,
}

/// `GraphProto`.
#[derive(Clone, PartialEq, prost::Message)]
pub struct GraphProto {
    /// Nodes in topological order.
    #[prost(message, repeated, tag = "1")]
    pub node: Vec<NodeProto>,
    /// Graph name.
    #[prost(string, tag = "2")]
    pub name: String,
    /// Constant tensors (weights).
    #[prost(message, repeated, tag = "5")]
    pub initializer: Vec<TensorProto>,
    /// Description.
    #[prost(string, tag = "10")]
    pub doc_string: String,
    /// Graph inputs.
    #[prost(message, repeated, tag = "11")]
    pub input: Vec<ValueInfoProto>,
    /// Graph outputs.
    #[prost(message, repeated, tag = "12")]
    pub output: Vec<ValueInfoProto>,
}

/// `NodeProto`: one operator application.
#[derive(Clone, PartialEq, prost::Message)]
pub struct NodeProto {
    /// Input value names.
    #[prost(string, repeated, tag = "1")]
    pub input: Vec<String>,
    /// Output value names.
    #[prost(string, repeated, tag = "2")]
    pub output: Vec<String>,
    /// Node name.
    #[prost(string, tag = "3")]
    pub name: String,
    /// Operator, e.g. `Gemm`.
    #[prost(string, tag = "4")]
    pub op_type: String,
    /// Attributes.
    #[prost(message, repeated, tag = "5")]
    pub attribute: Vec<AttributeProto>,
    /// Operator domain (empty = `ai.onnx`).
    #[prost(string, tag = "7")]
    pub domain: String,
}

/// `AttributeProto` (the kinds mnemon writes: float, int, ints).
#[derive(Clone, PartialEq, prost::Message)]
pub struct AttributeProto {
    /// Attribute name.
    #[prost(string, tag = "1")]
    pub name: String,
    /// A float value.
    #[prost(float, tag = "2")]
    pub f: f32,
    /// An integer value.
    #[prost(int64, tag = "3")]
    pub i: i64,
    /// A list of integers.
    #[prost(int64, repeated, tag = "8")]
    pub ints: Vec<i64>,
    /// `AttributeType` discriminator.
    #[prost(int32, tag = "20")]
    pub r#type: i32,
}

/// `TensorProto` (dense, data in `raw_data`, little-endian).
#[derive(Clone, PartialEq, prost::Message)]
pub struct TensorProto {
    /// Shape.
    #[prost(int64, repeated, tag = "1")]
    pub dims: Vec<i64>,
    /// `DataType`.
    #[prost(int32, tag = "2")]
    pub data_type: i32,
    /// Value name.
    #[prost(string, tag = "8")]
    pub name: String,
    /// Row-major little-endian bytes.
    #[prost(bytes = "vec", tag = "9")]
    pub raw_data: Vec<u8>,
}

/// `ValueInfoProto`: a graph input or output.
#[derive(Clone, PartialEq, prost::Message)]
pub struct ValueInfoProto {
    /// Value name.
    #[prost(string, tag = "1")]
    pub name: String,
    /// Its type.
    #[prost(message, optional, tag = "2")]
    pub r#type: Option<TypeProto>,
    /// Description.
    #[prost(string, tag = "3")]
    pub doc_string: String,
}

/// `TypeProto` (only the tensor member of its `oneof`).
#[derive(Clone, PartialEq, prost::Message)]
pub struct TypeProto {
    /// A tensor type.
    #[prost(message, optional, tag = "1")]
    pub tensor_type: Option<TensorTypeProto>,
}

/// `TypeProto.Tensor`.
#[derive(Clone, PartialEq, prost::Message)]
pub struct TensorTypeProto {
    /// `DataType` of the elements.
    #[prost(int32, tag = "1")]
    pub elem_type: i32,
    /// Shape.
    #[prost(message, optional, tag = "2")]
    pub shape: Option<TensorShapeProto>,
}

/// `TensorShapeProto`.
#[derive(Clone, PartialEq, prost::Message)]
pub struct TensorShapeProto {
    /// Dimensions.
    #[prost(message, repeated, tag = "1")]
    pub dim: Vec<Dimension>,
}

/// `TensorShapeProto.Dimension`: a fixed size or a symbolic name (`oneof value`).
#[derive(Clone, PartialEq, prost::Message)]
pub struct Dimension {
    /// A fixed size.
    #[prost(int64, optional, tag = "1")]
    pub dim_value: Option<i64>,
    /// A symbolic size such as `batch`.
    #[prost(string, optional, tag = "2")]
    pub dim_param: Option<String>,
}
