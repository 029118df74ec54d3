//! The part of ONNX's `onnx.proto` (proto2, package `onnx`) that an export
//! writes, as prost messages with the field numbers of the published file.
//! Fields and messages the exporter never sets (training info, sparse
//! tensors, subgraphs, functions) are left out: a reader skips nothing it
//! needs, and unknown fields would only be skipped by it anyway.
//!
//! Scalars are `optional` as in proto2, so a value equal to the protobuf
//! default (an attribute `i = 0`, say) is still written explicitly.

/// `TensorProto.DataType` values used here.
pub mod data_type {
    pub const FLOAT: i32 = 1;
    pub const INT64: i32 = 7;
    pub const STRING: i32 = 8;
    pub const BOOL: i32 = 9;
    pub const DOUBLE: i32 = 11;
}

/// `AttributeProto.AttributeType` values used here.
pub mod attribute_type {
    pub const FLOAT: i32 = 1;
    pub const INT: i32 = 2;
    pub const STRING: i32 = 3;
    pub const TENSOR: i32 = 4;
    pub const INTS: i32 = 7;
    pub const STRINGS: i32 = 8;
}

#[derive(Clone, PartialEq, prost::Message)]
pub struct ModelProto {
    #[prost(int64, optional, tag = "1")]
    pub ir_version: Option<i64>,
    #[prost(string, optional, tag = "2")]
    pub producer_name: Option<String>,
    #[prost(string, optional, tag = "3")]
    pub producer_version: Option<String>,
    #[prost(string, optional, tag = "4")]
    pub domain: Option<String>,
    #[prost(int64, optional, tag = "5")]
    pub model_version: Option<i64>,
    #[prost(string, optional, tag = "6")]
    pub doc_string: Option<String>,
    #[prost(message, optional, tag = "7")]
    pub graph: Option<GraphProto>,
    #[prost(message, repeated, tag = "8")]
    pub opset_import: Vec<OperatorSetIdProto>,
    #[prost(message, repeated, tag = "14")]
    pub metadata_props: Vec<StringStringEntryProto>,
}

#[derive(Clone, PartialEq, prost::Message)]
pub struct OperatorSetIdProto {
    #[prost(string, optional, tag = "1")]
    pub domain: Option<String>,
    #[prost(int64, optional, tag = "2")]
    pub version: Option<i64>,
}

#[derive(Clone, PartialEq, prost::Message)]
pub struct StringStringEntryProto {
    #[prost(string, optional, tag = "1")]
    pub key: Option<String>,
    #[prost(string, optional, tag = "2")]
    pub value: Option<String>,
}

#[derive(Clone, PartialEq, prost::Message)]
pub struct GraphProto {
    #[prost(message, repeated, tag = "1")]
    pub node: Vec<NodeProto>,
    #[prost(string, optional, tag = "2")]
    pub name: Option<String>,
    #[prost(message, repeated, tag = "5")]
    pub initializer: Vec<TensorProto>,
    #[prost(string, optional, tag = "10")]
    pub doc_string: Option<String>,
    #[prost(message, repeated, tag = "11")]
    pub input: Vec<ValueInfoProto>,
    #[prost(message, repeated, tag = "12")]
    pub output: Vec<ValueInfoProto>,
}

#[derive(Clone, PartialEq, prost::Message)]
pub struct NodeProto {
    #[prost(string, repeated, tag = "1")]
    pub input: Vec<String>,
    #[prost(string, repeated, tag = "2")]
    pub output: Vec<String>,
    #[prost(string, optional, tag = "3")]
    pub name: Option<String>,
    #[prost(string, optional, tag = "4")]
    pub op_type: Option<String>,
    #[prost(message, repeated, tag = "5")]
    pub attribute: Vec<AttributeProto>,
    #[prost(string, optional, tag = "6")]
    pub doc_string: Option<String>,
    #[prost(string, optional, tag = "7")]
    pub domain: Option<String>,
}

#[derive(Clone, PartialEq, prost::Message)]
pub struct AttributeProto {
    #[prost(string, optional, tag = "1")]
    pub name: Option<String>,
    #[prost(float, optional, tag = "2")]
    pub f: Option<f32>,
    #[prost(int64, optional, tag = "3")]
    pub i: Option<i64>,
    #[prost(bytes = "vec", optional, tag = "4")]
    pub s: Option<Vec<u8>>,
    #[prost(message, optional, tag = "5")]
    pub t: Option<TensorProto>,
    #[prost(int64, repeated, tag = "8")]
    pub ints: Vec<i64>,
    #[prost(bytes = "vec", repeated, tag = "9")]
    pub strings: Vec<Vec<u8>>,
    #[prost(int32, optional, tag = "20")]
    pub r#type: Option<i32>,
}

#[derive(Clone, PartialEq, prost::Message)]
pub struct TensorProto {
    #[prost(int64, repeated, tag = "1")]
    pub dims: Vec<i64>,
    #[prost(int32, optional, tag = "2")]
    pub data_type: Option<i32>,
    #[prost(bytes = "vec", repeated, tag = "6")]
    pub string_data: Vec<Vec<u8>>,
    #[prost(string, optional, tag = "8")]
    pub name: Option<String>,
    /// Fixed-width little-endian values (IEEE 754 for floats).
    #[prost(bytes = "vec", optional, tag = "9")]
    pub raw_data: Option<Vec<u8>>,
}

#[derive(Clone, PartialEq, prost::Message)]
pub struct ValueInfoProto {
    #[prost(string, optional, tag = "1")]
    pub name: Option<String>,
    #[prost(message, optional, tag = "2")]
    pub r#type: Option<TypeProto>,
    #[prost(string, optional, tag = "3")]
    pub doc_string: Option<String>,
}

#[derive(Clone, PartialEq, prost::Message)]
pub struct TypeProto {
    #[prost(oneof = "type_proto::Value", tags = "1")]
    pub value: Option<type_proto::Value>,
}

pub mod type_proto {
    #[derive(Clone, PartialEq, prost::Oneof)]
    pub enum Value {
        #[prost(message, tag = "1")]
        TensorType(super::TensorTypeProto),
    }
}

/// `TypeProto.Tensor`.
#[derive(Clone, PartialEq, prost::Message)]
pub struct TensorTypeProto {
    #[prost(int32, optional, tag = "1")]
    pub elem_type: Option<i32>,
    #[prost(message, optional, tag = "2")]
    pub shape: Option<TensorShapeProto>,
}

#[derive(Clone, PartialEq, prost::Message)]
pub struct TensorShapeProto {
    #[prost(message, repeated, tag = "1")]
    pub dim: Vec<Dimension>,
}

/// `TensorShapeProto.Dimension`.
#[derive(Clone, PartialEq, prost::Message)]
pub struct Dimension {
    #[prost(oneof = "dimension::Value", tags = "1, 2")]
    pub value: Option<dimension::Value>,
}

pub mod dimension {
    #[derive(Clone, PartialEq, prost::Oneof)]
    pub enum Value {
        #[prost(int64, tag = "1")]
        DimValue(i64),
        #[prost(string, tag = "2")]
        DimParam(String),
    }
}
