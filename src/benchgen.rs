//! Synthetic models for benchmarks, generated on demand and never committed: a
//! transformer-like stack of any node count, and a modest graph carrying about 1 GB of float
//! weights, inline or as external data.

use std::path::Path;

use bytes::Bytes;

use crate::ir::DType;
use crate::onnx::builder::{attr, f32_tensor, i64_tensor, raw_tensor, write_atomic, ModelBuilder};
use crate::onnx::{StringStringEntryProto, TensorProto};

/// Nodes per block of the stack model.
const NODES_PER_BLOCK: usize = 12;

/// A stack of transformer-like blocks with about `nodes` nodes, hidden size 64, symbolic
/// batch: LayerNormalization, MatMuls, Reshape/Transpose into heads, Softmax, residual Add.
pub fn stack(nodes: usize) -> ModelBuilder {
    let mut m = ModelBuilder::new("stack", 20);
    let g = &mut m.graph;
    g.input("x", DType::F32, &["batch".into(), 32.into(), 64.into()]);
    let w = vec![0.01f32; 64 * 64];
    let mut x = "x".to_string();
    let blocks = nodes.div_ceil(NODES_PER_BLOCK).max(1);
    g.initializer(f32_tensor("gamma", &[64], &[1.0; 64]));
    g.initializer(f32_tensor("beta", &[64], &[0.0; 64]));
    g.initializer(i64_tensor("heads_shape", &[4], &[0, 32, 4, 16]));
    g.initializer(i64_tensor("merge_shape", &[3], &[0, 32, 64]));
    // Weights are shared by every block: the benchmark measures graph size, not weight size.
    let (wq, wo) = ("wq".to_string(), "wo".to_string());
    g.initializer(f32_tensor(&wq, &[64, 64], &w));
    g.initializer(f32_tensor(&wo, &[64, 64], &w));
    for b in 0..blocks {
        let t = |s: &str| format!("b{b}.{s}");
        g.node("LayerNormalization", &[&x, "gamma", "beta"], &[&t("ln")])
            .attribute
            .push(attr::int("axis", -1));
        g.node("MatMul", &[&t("ln"), &wq], &[&t("q")]);
        g.node("Reshape", &[&t("q"), "heads_shape"], &[&t("qh")]);
        g.node("Transpose", &[&t("qh")], &[&t("qt")])
            .attribute
            .push(attr::ints("perm", &[0, 2, 1, 3]));
        g.node("Transpose", &[&t("qh")], &[&t("kt")])
            .attribute
            .push(attr::ints("perm", &[0, 2, 3, 1]));
        g.node("MatMul", &[&t("qt"), &t("kt")], &[&t("s")]);
        g.node("Softmax", &[&t("s")], &[&t("a")])
            .attribute
            .push(attr::int("axis", -1));
        g.node("MatMul", &[&t("a"), &t("qt")], &[&t("c")]);
        g.node("Transpose", &[&t("c")], &[&t("ct")])
            .attribute
            .push(attr::ints("perm", &[0, 2, 1, 3]));
        g.node("Reshape", &[&t("ct"), "merge_shape"], &[&t("cm")]);
        g.node("MatMul", &[&t("cm"), &wo], &[&t("o")]);
        g.node("Add", &[&x, &t("o")], &[&t("y")]);
        x = t("y");
    }
    g.node("Identity", &[&x], &["out"]);
    g.output("out", DType::F32, &["batch".into(), 32.into(), 64.into()]);
    m
}

/// About `bytes` of float weights in 64 MiB MatMul layers [4096, 4096]. With `external`, the
/// payloads go to `<stem>.bin` beside the model instead of inline.
pub fn heavy(bytes: u64, dir: &Path, stem: &str, external: bool) -> std::io::Result<()> {
    const SIDE: i64 = 4096;
    let layer = (SIDE * SIDE * 4) as u64;
    let layers = bytes.div_ceil(layer).max(1);
    let mut m = ModelBuilder::new("heavy", 17);
    m.graph.input("x", DType::F32, &[1.into(), SIDE.into()]);
    let payload = Bytes::from(vec![0u8; layer as usize]);
    let bin_name = format!("{stem}.bin");
    let mut bin = if external {
        Some(std::fs::File::create(dir.join(&bin_name))?)
    } else {
        None
    };
    let mut x = "x".to_string();
    for l in 0..layers {
        let name = format!("w{l}");
        let mut t: TensorProto = raw_tensor(&name, DType::F32, &[SIDE, SIDE], Vec::new());
        if let Some(f) = bin.as_mut() {
            use std::io::Write;
            f.write_all(&payload)?;
            t.data_location = 1;
            t.external_data = vec![
                StringStringEntryProto {
                    key: "location".into(),
                    value: bin_name.clone(),
                },
                StringStringEntryProto {
                    key: "offset".into(),
                    value: (l * layer).to_string(),
                },
                StringStringEntryProto {
                    key: "length".into(),
                    value: layer.to_string(),
                },
            ];
        } else {
            t.raw_data = payload.clone();
        }
        m.graph.initializer(t);
        let y = format!("h{l}");
        m.graph.node("MatMul", &[&x, &name], &[&y]);
        x = y;
    }
    m.graph.node("Relu", &[&x], &["out"]);
    m.graph.output("out", DType::F32, &[1.into(), SIDE.into()]);
    write_atomic(&dir.join(format!("{stem}.onnx")), &m.encode())
}
