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

/// Evaluates every model in a folder with the `onnx` package's reference evaluator (no inputs:
/// every value is an initializer) and prints each first output's shape and values.
const EVALUATE: &str = r#"
import sys, json, glob, os, onnx
from onnx.reference import ReferenceEvaluator
res = {}
for p in sorted(glob.glob(os.path.join(sys.argv[1], "*.onnx"))):
    out = ReferenceEvaluator(onnx.load(p)).run(None, {})[0]
    res[os.path.basename(p)] = [list(out.shape), [float(x) for x in out.flatten()]]
print(json.dumps(res))
"#;

/// Shape arithmetic folds ReduceMin/Max/Sum/Prod of constants (exporters compute TopK's `k`
/// as `min(dim, limit)` this way). Each folded value must equal what the `onnx` package's
/// reference evaluator computes for the same model: integers and floats, kept and dropped
/// axes, negative axes, all axes by default, and `noop_with_empty_axes`.
#[test]
fn folded_reductions_agree_with_the_onnx_reference_evaluator() {
    if !python_onnx("folded_reductions_agree_with_the_onnx_reference_evaluator") {
        return;
    }
    let dir = tempfile::tempdir().expect("tmp");
    // The data of the operator specification's ReduceMin examples, as int64 and as float.
    let ints: Vec<i64> = vec![5, 1, 20, 2, 30, 1, 40, 2, 55, 1, 60, 2];
    let mut written = 0;
    for op in ["ReduceMin", "ReduceMax", "ReduceSum", "ReduceProd"] {
        for (tag, axes) in [
            ("all", None),
            ("a1", Some(vec![1])),
            ("neg", Some(vec![-1])),
            ("a02", Some(vec![0, 2])),
        ] {
            for keep in [0, 1] {
                for float in [false, true] {
                    let mut data = i64_init("data", &[3, 2, 2], &ints);
                    if float {
                        data.data_type = 1;
                        data.raw_data = ints.iter().flat_map(|&v| (v as f32).to_le_bytes()).collect();
                    }
                    let mut inits = vec![data];
                    let mut n = node(op, &["data"], &["out"]);
                    if let Some(a) = &axes {
                        inits.push(i64_init("axes", &[a.len() as i64], a));
                        n.input.push("axes".into());
                    }
                    n.attribute.push(int_attr("keepdims", keep));
                    let mut m = model(vec![n], vec![], untyped(&["out"]), inits);
                    m.opset_import[0].version = 18;
                    let file = format!("{op}_{tag}_k{keep}_{}.onnx", if float { "f" } else { "i" });
                    write(dir.path(), &file, &m);
                    written += 1;
                }
            }
        }
    }
    // noop_with_empty_axes: no axes, the data passes through unchanged.
    let mut n = node("ReduceSum", &["data"], &["out"]);
    n.attribute.push(int_attr("noop_with_empty_axes", 1));
    let data = i64_init("data", &[3, 2, 2], &ints);
    let mut m = model(vec![n], vec![], untyped(&["out"]), vec![data]);
    m.opset_import[0].version = 18;
    write(dir.path(), "noop.onnx", &m);
    written += 1;

    let out = python(EVALUATE, &[dir.path().to_str().expect("utf8")]);
    let reference: serde_json::Map<String, serde_json::Value> = serde_json::from_str(&out).expect("json");
    assert_eq!(reference.len(), written);
    for (file, expected) in &reference {
        let read = tilecut::read_model(&dir.path().join(file), &Default::default()).expect("reads");
        let g = &read.model.graph;
        let v = g.value(g.outputs[0]);
        let k = v
            .konst
            .as_deref()
            .unwrap_or_else(|| panic!("{file}: the reduction was not folded"));
        let dims: Vec<u64> = expected[0]
            .as_array()
            .expect("dims")
            .iter()
            .map(|d| d.as_u64().expect("dim"))
            .collect();
        let values: Vec<f64> = expected[1]
            .as_array()
            .expect("values")
            .iter()
            .map(|x| x.as_f64().expect("number"))
            .collect();
        assert_eq!(k.dims, dims, "{file}: folded shape");
        assert_eq!(k.as_floats(), values, "{file}: folded values");
    }
}
