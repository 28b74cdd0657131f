//! Checks against the `onnx` Python package, the ONNX project's reference implementation:
//! its data-type table and its shape inference (`onnx.shape_inference.infer_shapes`) on the
//! conformance models, with declared outputs and value_info stripped for both sides.
//! Runs where python3 and `onnx` are installed; fails under CI=true when they are not.

mod common;

use std::path::Path;

use common::*;
use tilecut::ir::DType;

#[test]
fn data_type_codes_match_the_onnx_package() {
    if !python_onnx("data_type_codes_match_the_onnx_package") {
        return;
    }
    let out = python(
        "import onnx\nfor n, c in onnx.TensorProto.DataType.items():\n    print(n, c)",
        &[],
    );
    let mut checked = 0;
    for line in out.lines() {
        let (name, code) = line.split_once(' ').expect("name code");
        let code: i32 = code.parse().expect("int");
        if code == 0 {
            continue;
        }
        let ours = DType::from_onnx(code).unwrap_or_else(|| panic!("tilecut lacks {name} ({code})"));
        // The package spells float32 FLOAT and float64 DOUBLE; the rest match lower-cased.
        let normalized = match name.to_lowercase().as_str() {
            "float" => "float32".to_string(),
            "double" => "float64".to_string(),
            other => other.to_string(),
        };
        assert_eq!(ours.name(), normalized, "code {code}");
        checked += 1;
    }
    assert!(checked >= 26);
}

const INFER: &str = r#"
import sys, json, glob, os, onnx
from onnx import shape_inference
res = {}
for p in sorted(glob.glob(os.path.join(sys.argv[1], "*.onnx"))):
    try:
        m = onnx.load(p)
        for o in m.graph.output:
            o.type.Clear()
        del m.graph.value_info[:]
        inf = shape_inference.infer_shapes(m, strict_mode=False)
        outs = []
        for o in inf.graph.output:
            t = o.type.tensor_type
            if not o.type.HasField("tensor_type") or not t.HasField("shape") or t.elem_type == 0:
                outs.append(None)
                continue
            dims = [d.dim_value if d.HasField("dim_value") else None for d in t.shape.dim]
            outs.append([t.elem_type, dims])
        res[os.path.basename(p)] = outs
    except Exception as e:
        res[os.path.basename(p)] = "error: " + str(e).splitlines()[0][:100]
print(json.dumps(res))
"#;

#[test]
fn inferred_output_shapes_agree_with_onnx_shape_inference() {
    if !python_onnx("inferred_output_shapes_agree_with_onnx_shape_inference") {
        return;
    }
    let dir = Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/onnx-node");
    let out = python(INFER, &[dir.to_str().expect("utf8")]);
    let reference: serde_json::Map<String, serde_json::Value> = serde_json::from_str(&out).expect("json");
    let (mut agree, mut compared) = (0, 0);
    let mut disagreements = Vec::new();
    for (file, outs) in &reference {
        let Some(outs) = outs.as_array() else { continue };
        let path = dir.join(file);
        // Strip the same way as the reference side.
        let bytes = std::fs::read(&path).expect("read");
        let mut m = <tilecut::onnx::ModelProto as prost::Message>::decode(bytes::Bytes::from(bytes)).expect("decode");
        let g = m.graph.as_mut().expect("graph");
        for o in &mut g.output {
            o.r#type = None;
        }
        g.value_info.clear();
        let encoded = bytes::Bytes::from(prost::Message::encode_to_vec(&m));
        let loaded = tilecut::onnx::load::decode(&path, encoded, dir.canonicalize().expect("dir")).expect("decode");
        let (mut model, mut diags) = tilecut::import::import(&loaded, &Default::default()).expect("import");
        tilecut::infer::infer(&mut model, &mut diags);
        for (k, o) in outs.iter().enumerate() {
            let Some(arr) = o.as_array() else { continue };
            let code = arr[0].as_i64().expect("code") as i32;
            let dims: Vec<Option<u64>> = arr[1].as_array().expect("dims").iter().map(|d| d.as_u64()).collect();
            if dims.iter().any(Option::is_none) {
                continue;
            }
            let fact = &model.graph.value(model.graph.outputs[k]).fact;
            let Some(ours) = fact.shape.concrete() else { continue };
            let Some(dt) = fact.dtype else { continue };
            compared += 1;
            let theirs: Vec<u64> = dims.into_iter().flatten().collect();
            if ours == theirs && dt.onnx_code() == code {
                agree += 1;
            } else {
                disagreements.push(format!(
                    "{file} output {k}: tilecut {dt} {ours:?}, onnx {code} {theirs:?}"
                ));
            }
        }
    }
    println!("onnx shape inference cross-check: {agree} of {compared} outputs known to both agree");
    assert!(
        disagreements.is_empty(),
        "{} disagreements: {disagreements:#?}",
        disagreements.len()
    );
    assert!(compared >= 1000, "only {compared} outputs compared");
}
