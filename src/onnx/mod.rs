//! The ONNX wire format: generated message types, the hand-written `TensorProto`,
//! `NodeProto`, `AttributeProto` and `GraphProto`, and loading a model file by memory map. The only module that names protobuf types.

pub mod attr;
pub mod builder;
pub mod feed;
pub mod graph;
pub mod load;
pub mod node;
pub mod qdq;
pub mod split;
pub mod tensor;
pub mod text;

#[allow(clippy::all, missing_docs)]
mod generated {
    include!(concat!(env!("OUT_DIR"), "/onnx.rs"));
}

pub use attr::AttributeProto;
pub use generated::*;
pub use graph::GraphProto;
pub use node::NodeProto;
pub use tensor::TensorProto;
pub use text::ProtoStr;
