//! Helpers shared by the integration tests: building small models as protobuf in code.
#![allow(dead_code)]

use std::path::{Path, PathBuf};
use std::process::Command;

use prost::Message;
use tilecut::onnx::{self, tensor_shape_proto::dimension::Value as D, type_proto, ModelProto, TensorProto};

pub fn bin() -> Command {
    Command::new(env!("CARGO_BIN_EXE_tilecut"))
}

pub fn conformance(name: &str) -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/onnx-node").join(name)
}

pub enum Dm {
    N(i64),
    S(&'static str),
}

pub fn vi(name: &str, elem: i32, dims: &[Dm]) -> onnx::ValueInfoProto {
    let dim = dims
        .iter()
        .map(|d| onnx::tensor_shape_proto::Dimension {
            value: Some(match d {
                Dm::N(v) => D::DimValue(*v),
                Dm::S(s) => D::DimParam(s.to_string()),
            }),
            denotation: String::new(),
        })
        .collect();
    onnx::ValueInfoProto {
        name: name.into(),
        r#type: Some(onnx::TypeProto {
            value: Some(type_proto::Value::TensorType(type_proto::Tensor {
                elem_type: elem,
                shape: Some(onnx::TensorShapeProto { dim }),
            })),
            denotation: String::new(),
        }),
        ..Default::default()
    }
}

/// Value infos with a name only: graph outputs (or body ports) that declare no type, so that
/// nothing falls back on a declaration.
pub fn untyped(names: &[&str]) -> Vec<onnx::ValueInfoProto> {
    names
        .iter()
        .map(|&n| onnx::ValueInfoProto {
            name: n.into(),
            ..Default::default()
        })
        .collect()
}

pub fn node(op: &str, inputs: &[&str], outputs: &[&str]) -> onnx::NodeProto {
    onnx::NodeProto {
        op_type: op.into(),
        name: format!("{op}_{}", outputs.first().copied().unwrap_or("")).into(),
        input: inputs.iter().map(|&s| s.into()).collect(),
        output: outputs.iter().map(|&s| s.into()).collect(),
        ..Default::default()
    }
}

pub fn model(
    nodes: Vec<onnx::NodeProto>,
    inputs: Vec<onnx::ValueInfoProto>,
    outputs: Vec<onnx::ValueInfoProto>,
    inits: Vec<TensorProto>,
) -> ModelProto {
    ModelProto {
        ir_version: 8,
        opset_import: vec![onnx::OperatorSetIdProto {
            domain: String::new(),
            version: 17,
        }],
        graph: Some(onnx::GraphProto {
            node: nodes,
            name: "g".into(),
            input: inputs,
            output: outputs,
            initializer: inits,
            ..Default::default()
        }),
        ..Default::default()
    }
}

pub fn f32_init(name: &str, dims: &[i64]) -> TensorProto {
    let n: i64 = dims.iter().product();
    TensorProto {
        name: name.into(),
        dims: dims.to_vec(),
        data_type: 1,
        raw_data: bytes::Bytes::from(vec![0u8; (n * 4) as usize]),
        ..Default::default()
    }
}

/// An int64 initializer, little-endian in `raw_data` as the ONNX IR stores it.
pub fn i64_init(name: &str, dims: &[i64], values: &[i64]) -> TensorProto {
    TensorProto {
        name: name.into(),
        dims: dims.to_vec(),
        data_type: 7,
        raw_data: values.iter().flat_map(|x| x.to_le_bytes()).collect(),
        ..Default::default()
    }
}

/// An integer attribute (`AttributeProto.type` INT).
pub fn int_attr(name: &str, value: i64) -> onnx::AttributeProto {
    onnx::AttributeProto {
        name: name.into(),
        r#type: 2,
        i: value,
        ..Default::default()
    }
}

/// An integer-list attribute (`AttributeProto.type` INTS).
pub fn ints_attr(name: &str, values: &[i64]) -> onnx::AttributeProto {
    onnx::AttributeProto {
        name: name.into(),
        r#type: 7,
        ints: values.to_vec(),
        ..Default::default()
    }
}

pub fn write(dir: &Path, name: &str, m: &ModelProto) -> PathBuf {
    let p = dir.join(name);
    std::fs::write(&p, m.encode_to_vec()).expect("write model");
    p
}

/// Runs tilecut and returns (exit code, stdout, stderr).
pub fn run(args: &[&str]) -> (i32, String, String) {
    let out = bin().args(args).output().expect("tilecut runs");
    (
        out.status.code().unwrap_or(-1),
        String::from_utf8_lossy(&out.stdout).into_owned(),
        String::from_utf8_lossy(&out.stderr).into_owned(),
    )
}

/// Asserts a clean failure: exit 2, one line on stderr naming `needle`, nothing on stdout.
pub fn assert_fails_cleanly(args: &[&str], needle: &str) {
    let (code, out, err) = run(args);
    assert_eq!(code, 2, "exit code for {args:?}: stderr {err}");
    assert!(out.is_empty(), "stdout must stay empty on error, got {out}");
    assert_eq!(err.trim_end().lines().count(), 1, "one-line error expected, got {err}");
    assert!(!err.contains("panicked"), "panic: {err}");
    assert!(err.contains(needle), "error should mention `{needle}`: {err}");
}

/// Whether Python's `onnx` package can be used. Under `CI=true` its absence is a failure,
/// elsewhere the caller skips and says so.
pub fn python_onnx(test: &str) -> bool {
    let ok = Command::new("python3")
        .args(["-c", "import onnx, numpy"])
        .output()
        .map(|o| o.status.success())
        .unwrap_or(false);
    if !ok {
        if std::env::var("CI").is_ok_and(|v| v == "true") {
            panic!("{test}: python3 with the `onnx` package is required under CI=true (.ci/run installs it)");
        }
        println!("SKIPPED {test}: python3 with the `onnx` package is not installed (pip install onnx numpy)");
    }
    ok
}

/// Runs a Python script with arguments and returns its stdout.
pub fn python(script: &str, args: &[&str]) -> String {
    let out = Command::new("python3")
        .arg("-c")
        .arg(script)
        .args(args)
        .output()
        .expect("python3 runs");
    assert!(
        out.status.success(),
        "python failed: {}",
        String::from_utf8_lossy(&out.stderr)
    );
    String::from_utf8_lossy(&out.stdout).into_owned()
}

/// The name tilecut gives the kept-box count of the NonMaxSuppression in `nms_head`.
pub const NMS_KEPT: &str = "selected@nms";

/// A detector's head after suppression (a parcel-label camera): NonMaxSuppression keeps up to
/// 20 of 100 boxes, Gather picks the kept boxes by the index column, and a MatMul embeds each
/// kept box (4 → 8). How many boxes are kept depends on the data.
pub fn nms_head(dir: &Path) -> PathBuf {
    let mut gather_ids = node("Gather", &["sel", "col"], &["picked"]);
    gather_ids.attribute.push(int_attr("axis", 1));
    let mut gather_boxes = node("Gather", &["b2", "ids"], &["kept"]);
    gather_boxes.attribute.push(int_attr("axis", 0));
    let mut nms = node("NonMaxSuppression", &["boxes", "scores", "maxout"], &["sel"]);
    nms.name = "nms".into();
    let nodes = vec![
        nms,
        gather_ids,
        node("Squeeze", &["picked", "one"], &["ids"]),
        node("Squeeze", &["boxes", "zero"], &["b2"]),
        gather_boxes,
        node("MatMul", &["kept", "w"], &["feat"]),
    ];
    let inits = vec![
        i64_init("maxout", &[1], &[20]),
        i64_init("col", &[1], &[2]),
        i64_init("zero", &[1], &[0]),
        i64_init("one", &[1], &[1]),
        f32_init("w", &[4, 8]),
    ];
    let m = model(
        nodes,
        vec![
            vi("boxes", 1, &[Dm::N(1), Dm::N(100), Dm::N(4)]),
            vi("scores", 1, &[Dm::N(1), Dm::N(1), Dm::N(100)]),
        ],
        untyped(&["feat"]),
        inits,
    );
    write(dir, "label_head.onnx", &m)
}

/// A model whose main graph calls a model-local function `local.fn.ScaleShift` (y = x·s + b:
/// a Mul then an Add inside the function), followed by a Relu.
pub fn function_model(dir: &Path) -> PathBuf {
    use tilecut::onnx::{FunctionProto, OperatorSetIdProto};
    let mut m = model(
        vec![
            {
                let mut n = node("ScaleShift", &["x", "s", "b"], &["y"]);
                n.name = "ss".into();
                n.domain = "local.fn".into();
                n
            },
            node("Relu", &["y"], &["z"]),
        ],
        vec![vi("x", 1, &[Dm::N(1), Dm::N(8)])],
        vec![vi("z", 1, &[Dm::N(1), Dm::N(8)])],
        vec![f32_init("s", &[8]), f32_init("b", &[8])],
    );
    m.opset_import.push(OperatorSetIdProto {
        domain: "local.fn".into(),
        version: 1,
    });
    m.functions.push(FunctionProto {
        name: "ScaleShift".into(),
        domain: "local.fn".into(),
        input: vec!["x".into(), "s".into(), "b".into()],
        output: vec!["y".into()],
        node: vec![node("Mul", &["x", "s"], &["t"]), node("Add", &["t", "b"], &["y"])],
        opset_import: vec![OperatorSetIdProto {
            domain: String::new(),
            version: 17,
        }],
        ..Default::default()
    });
    write(dir, "scale_shift.onnx", &m)
}

/// Reads, imports and infers a model, which must know every op it has and size what each
/// op's rule gives (no `op-unknown` or `shape-failed` finding).
pub fn read_known(path: &Path) -> tilecut::Analyzed {
    let read = tilecut::read_model(path, &Default::default()).expect("reads");
    assert!(
        !read
            .diags
            .iter()
            .any(|d| d.code == "op-unknown" || d.code == "shape-failed"),
        "{}: {:?}",
        path.display(),
        read.diags
    );
    read
}
