//! Generates the ONNX wire types from `proto/onnx.proto` with a pure-Rust protobuf compiler
//! (protox), so a fresh machine needs no system `protoc`.

fn main() -> Result<(), Box<dyn std::error::Error>> {
    println!("cargo:rerun-if-changed=proto/onnx.proto");
    let descriptors = protox::compile(["proto/onnx.proto"], ["proto"])?;
    let mut config = prost_build::Config::new();
    // Every `bytes` field decodes as a slice of the mapped file instead of a copy.
    config.bytes(["."]);
    config.extern_path(".onnx.TensorProto", "crate::onnx::tensor::TensorProto");
    config.extern_path(".onnx.NodeProto", "crate::onnx::node::NodeProto");
    config.extern_path(".onnx.GraphProto", "crate::onnx::graph::GraphProto");
    // Rare, large message fields are boxed so that every attribute (most are one int or a
    // short list) does not carry a tensor, a graph and a sparse tensor inline: unboxed, an
    // AttributeProto is 1.7 KB and the decoded tree of a 100k-node model is mostly them.
    for field in [
        ".onnx.AttributeProto.t",
        ".onnx.AttributeProto.g",
        ".onnx.AttributeProto.sparse_tensor",
        ".onnx.AttributeProto.tp",
    ] {
        config.boxed(field);
    }
    config.compile_fds(descriptors)?;
    Ok(())
}
