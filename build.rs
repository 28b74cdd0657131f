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
    config.extern_path(".onnx.AttributeProto", "crate::onnx::attr::AttributeProto");
    config.compile_fds(descriptors)?;
    Ok(())
}
