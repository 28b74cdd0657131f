//! Checks against the `onnx` Python package, the ONNX project's reference implementation:
//! its data-type table and its shape inference (`onnx.shape_inference.infer_shapes`) on the
//! conformance models, with declared outputs and value_info stripped for both sides.
//! Runs where python3 and `onnx` are installed; fails under CI=true when they are not.

mod common;

use std::collections::BTreeMap;
use std::path::Path;

use common::*;
use tilecut::ir::{evaluate, DType, Dim};

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

/// A model decoded with its declared output types and all value_info removed, so that
/// tilecut's inference cannot fall back on them.
fn stripped(path: &Path) -> tilecut::onnx::load::LoadedModel {
    let bytes = std::fs::read(path).expect("read");
    let mut m = <tilecut::onnx::ModelProto as prost::Message>::decode(bytes::Bytes::from(bytes)).expect("decode");
    let g = m.graph.as_mut().expect("graph");
    for o in &mut g.output {
        o.r#type = None;
    }
    g.value_info.clear();
    let encoded = bytes::Bytes::from(prost::Message::encode_to_vec(&m));
    let dir = path.parent().expect("folder").canonicalize().expect("dir");
    tilecut::onnx::load::decode(path, encoded, dir).expect("decode")
}

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
        // Stripped the same way as the reference side.
        let loaded = stripped(&dir.join(file));
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

/// The folded value of a model's first output, and the shape and values `EVALUATE` printed
/// for it.
fn folded_and_expected(
    dir: &Path,
    file: &str,
    expected: &serde_json::Value,
) -> (tilecut::ir::ConstValue, Vec<u64>, Vec<f64>) {
    let read = tilecut::read_model(&dir.join(file), &Default::default()).expect("reads");
    let g = &read.model.graph;
    let k = g
        .value(g.outputs[0])
        .konst
        .as_deref()
        .cloned()
        .unwrap_or_else(|| panic!("{file}: not folded"));
    let list = |i: usize| expected[i].as_array().expect("list").iter();
    let dims = list(0).map(|d| d.as_u64().expect("dim")).collect();
    let values = list(1).map(|x| x.as_f64().expect("number")).collect();
    (k, dims, values)
}

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
        let (k, dims, values) = folded_and_expected(dir.path(), file, expected);
        assert_eq!(k.dims, dims, "{file}: folded shape");
        assert_eq!(k.as_floats(), values, "{file}: folded values");
    }
}

/// A tensor for the folding checks: int64, float32 or bool, little-endian in `raw_data`.
fn data(name: &str, dims: &[i64], kind: char, values: &[f64]) -> tilecut::onnx::TensorProto {
    let (data_type, raw_data): (i32, Vec<u8>) = match kind {
        'i' => (7, values.iter().flat_map(|&v| (v as i64).to_le_bytes()).collect()),
        'f' => (1, values.iter().flat_map(|&v| (v as f32).to_le_bytes()).collect()),
        _ => (9, values.iter().map(|&v| (v != 0.0) as u8).collect()),
    };
    tilecut::onnx::TensorProto {
        name: name.into(),
        dims: dims.to_vec(),
        data_type,
        raw_data: raw_data.into(),
        ..Default::default()
    }
}

/// The arithmetic exporters put on shapes and on small constants (paddings reversed with
/// Transpose, sizes rounded with Floor and Ceil after a float division, Mod for alignment,
/// boolean conditions of If) folds to the values the `onnx` package's reference evaluator
/// computes for the same one-node model: negative operands of Mod under both sign rules,
/// rounding of halves to even, the sign of zero, broadcasting, and Pow's result type
/// following its base.
#[test]
fn folded_arithmetic_and_transposes_agree_with_the_onnx_reference_evaluator() {
    if !python_onnx("folded_arithmetic_and_transposes_agree_with_the_onnx_reference_evaluator") {
        return;
    }
    let dir = tempfile::tempdir().expect("tmp");
    let halves = [-2.5, -1.5, -0.5, 0.5, 1.5, 2.5, 1.2, -1.7];
    let signed = [-7.0, 7.0, -7.0, 7.0, 5.0, 0.0];
    let divisors = [3.0, 3.0, -3.0, -3.0, 5.0, 4.0];
    let cube: Vec<f64> = (0..24).map(f64::from).collect();
    let perm = |p: &[i64]| tilecut::onnx::AttributeProto {
        name: "perm".into(),
        r#type: 7,
        ints: p.to_vec(),
        ..Default::default()
    };
    type Input<'a> = (&'a [i64], char, &'a [f64]);
    let mut cases: Vec<(String, &str, Vec<Input>, Vec<tilecut::onnx::AttributeProto>)> = Vec::new();
    for (tag, p) in [
        ("p102", Some(vec![1, 0, 2])),
        ("p201", Some(vec![2, 0, 1])),
        ("rev", None),
    ] {
        for kind in ['i', 'f'] {
            let attrs = p.as_deref().map(perm).into_iter().collect();
            cases.push((
                format!("Transpose_{tag}_{kind}"),
                "Transpose",
                vec![(&[2, 3, 4], kind, &cube)],
                attrs,
            ));
        }
    }
    for fmod in [0, 1] {
        cases.push((
            format!("Mod_i_fmod{fmod}"),
            "Mod",
            vec![(&[6], 'i', &signed), (&[6], 'i', &divisors)],
            vec![int_attr("fmod", fmod)],
        ));
    }
    cases.push((
        "Mod_f_fmod1".into(),
        "Mod",
        vec![(&[6], 'f', &signed), (&[6], 'f', &[3.0, 3.0, -3.0, -3.0, 5.0, 4.0])],
        vec![int_attr("fmod", 1)],
    ));
    cases.push((
        "Pow_ii".into(),
        "Pow",
        vec![(&[4], 'i', &[2.0, 3.0, -2.0, 5.0]), (&[4], 'i', &[3.0, 2.0, 3.0, 0.0])],
        vec![],
    ));
    cases.push((
        "Pow_ff".into(),
        "Pow",
        vec![(&[3], 'f', &[4.0, 2.0, 9.0]), (&[1], 'f', &[0.5])],
        vec![],
    ));
    cases.push((
        "Pow_if".into(),
        "Pow",
        vec![(&[4], 'i', &[2.0, 3.0, 4.0, 9.0]), (&[4], 'f', &[2.0, 0.5, 1.5, 0.5])],
        vec![],
    ));
    for op in ["Floor", "Ceil", "Round", "Sign", "Neg"] {
        cases.push((format!("{op}_f"), op, vec![(&[8], 'f', &halves)], vec![]));
    }
    cases.push(("Sign_i".into(), "Sign", vec![(&[3], 'i', &[-3.0, 0.0, 5.0])], vec![]));
    cases.push(("Floor_i".into(), "Floor", vec![(&[3], 'i', &[-3.0, 0.0, 5.0])], vec![]));
    cases.push(("Sqrt_f".into(), "Sqrt", vec![(&[3], 'f', &[4.0, 2.0, 0.25])], vec![]));
    cases.push((
        "Reciprocal_f".into(),
        "Reciprocal",
        vec![(&[3], 'f', &[4.0, -2.0, 0.25])],
        vec![],
    ));
    for op in ["GreaterOrEqual", "LessOrEqual"] {
        for kind in ['i', 'f'] {
            cases.push((
                format!("{op}_{kind}"),
                op,
                vec![
                    (&[2, 3], kind, &[1.0, 2.0, 3.0, 4.0, 5.0, 6.0]),
                    (&[3], kind, &[2.0, 2.0, 5.0]),
                ],
                vec![],
            ));
        }
    }
    let a = [0.0, 0.0, 1.0, 1.0];
    let b = [0.0, 1.0, 0.0, 1.0];
    for op in ["And", "Or", "Xor"] {
        cases.push((format!("{op}_b"), op, vec![(&[4], 'b', &a), (&[4], 'b', &b)], vec![]));
    }
    cases.push(("Not_b".into(), "Not", vec![(&[4], 'b', &b)], vec![]));
    cases.push((
        "Sum_i".into(),
        "Sum",
        vec![
            (&[2, 2], 'i', &[1.0, 2.0, 3.0, 4.0]),
            (&[2], 'i', &[10.0, 20.0]),
            (&[1], 'i', &[100.0]),
        ],
        vec![],
    ));
    for (file, op, inputs, attrs) in &cases {
        let names: Vec<String> = (0..inputs.len()).map(|i| format!("in{i}")).collect();
        let inits = inputs
            .iter()
            .zip(&names)
            .map(|((dims, kind, values), name)| data(name, dims, *kind, values))
            .collect();
        let refs: Vec<&str> = names.iter().map(String::as_str).collect();
        let mut n = node(op, &refs, &["out"]);
        n.attribute = attrs.clone();
        let mut m = model(vec![n], vec![], untyped(&["out"]), inits);
        m.opset_import[0].version = 18;
        write(dir.path(), &format!("{file}.onnx"), &m);
    }

    let out = python(EVALUATE, &[dir.path().to_str().expect("utf8")]);
    let reference: serde_json::Map<String, serde_json::Value> = serde_json::from_str(&out).expect("json");
    assert_eq!(reference.len(), cases.len());
    for (file, expected) in &reference {
        let (k, dims, values) = folded_and_expected(dir.path(), file, expected);
        assert_eq!(k.dims, dims, "{file}: folded shape");
        // Folded floats are f64, the reference computes in float32: equal to float32 precision.
        let ours = k.as_floats();
        assert_eq!(ours.len(), values.len(), "{file}");
        for (o, r) in ours.iter().zip(&values) {
            assert!(
                (o - r).abs() <= 1e-6 * r.abs().max(1.0),
                "{file}: folded {ours:?}, reference {values:?}"
            );
        }
    }
}

/// Runs a model whose input `x` is one-dimensional, at each length given, with the reference
/// evaluator; prints `{length: [shape of each output]}`.
/// Runs a model at each of several shapes of its input `x` (a JSON list of shapes) in the
/// `onnx` package's reference evaluator; prints the output shapes per run.
const RUN_AT_SHAPES: &str = r#"
import sys, json, onnx, numpy as np
from onnx.reference import ReferenceEvaluator
ev = ReferenceEvaluator(onnx.load(sys.argv[1]))
def feeds(s):
    named = s if isinstance(s, dict) else {"x": s}
    return {k: np.ones(v, dtype=np.float32) for k, v in named.items()}
print(json.dumps([[list(o.shape) for o in ev.run(None, feeds(s))] for s in json.loads(sys.argv[2])]))
"#;

/// Writes `m` at opset 18 into `dir` and reads it with tilecut: the file and each graph
/// output's dims.
fn symbolic_outputs(mut m: tilecut::onnx::ModelProto, dir: &Path, file: &str) -> (std::path::PathBuf, Vec<Vec<Dim>>) {
    m.opset_import[0].version = 18;
    let path = write(dir, file, &m);
    let read = tilecut::read_model(&path, &Default::default()).expect("reads");
    let g = &read.model.graph;
    let dims = g
        .outputs
        .iter()
        .map(|&o| g.value(o).fact.shape.dims().expect("rank").to_vec())
        .collect();
    (path, dims)
}

/// The output shapes the `onnx` package's reference evaluator computes, per shape of `x`
/// (or per map of input names to shapes).
fn reference_shapes<T: serde::Serialize>(path: &Path, inputs: &[T]) -> Vec<Vec<Vec<u64>>> {
    let arg = serde_json::to_string(inputs).expect("json");
    let out = python(RUN_AT_SHAPES, &[path.to_str().expect("utf8"), &arg]);
    serde_json::from_str(&out).expect("json")
}

/// A dim's size with each symbol given a value: None for an unknown dim, and for an
/// expression that comes out below zero.
fn size_at(d: &Dim, values: &[(&str, u64)]) -> Option<u64> {
    match d {
        Dim::Known(v) => Some(*v),
        Dim::Sym(text) => {
            evaluate(text, &|n| values.iter().find(|(name, _)| *name == n).map(|(_, v)| *v)).expect("an expression")
        }
        Dim::Unknown => None,
    }
}

/// Slices of a symbolic length T keep T in their size where the size is an expression of T:
/// to the end from a start (ends written as INT64_MAX, INT32_MAX or 10^9), with a stride,
/// to an end counted from the end (`x[1:-1]`), the whole axis backwards, and the first or
/// last k (`min(T,k)`). Each expression, evaluated at several lengths, must equal the size
/// the `onnx` package's reference evaluator gives at that length.
#[test]
fn symbolic_slices_agree_with_the_onnx_reference_evaluator_at_each_length() {
    if !python_onnx("symbolic_slices_agree_with_the_onnx_reference_evaluator_at_each_length") {
        return;
    }
    let forms: &[(i64, i64, i64)] = &[
        (0, i64::MAX, 1),
        (2, i64::MAX, 1),
        (0, 1_000_000_000, 1),
        (1, i32::MAX as i64, 3),
        (0, i64::MAX, 2),
        (-1, i64::MIN, -1),
        (-1, -i64::MAX, -2),
        (i64::MAX, i64::MIN, -1),
        (0, 5, 1),
        (-5, i64::MAX, 1),
        (0, -1, 1),
        (1, -1, 1),
        (2, -3, 2),
    ];
    let mut nodes = Vec::new();
    let mut inits = Vec::new();
    let mut outs = Vec::new();
    for (k, &(start, end, step)) in forms.iter().enumerate() {
        for (part, v) in [("s", start), ("e", end), ("a", 0), ("p", step)] {
            inits.push(i64_init(&format!("{part}{k}"), &[1], &[v]));
        }
        let ins = [
            "x".to_string(),
            format!("s{k}"),
            format!("e{k}"),
            format!("a{k}"),
            format!("p{k}"),
        ];
        let refs: Vec<&str> = ins.iter().map(String::as_str).collect();
        let out = format!("y{k}");
        nodes.push(node("Slice", &refs, &[&out]));
        outs.push(out);
    }
    let out_refs: Vec<&str> = outs.iter().map(String::as_str).collect();
    let m = model(nodes, vec![vi("x", 1, &[Dm::S("T")])], untyped(&out_refs), inits);
    let dir = tempfile::tempdir().expect("tmp");
    let (path, dims) = symbolic_outputs(m, dir.path(), "slices.onnx");
    let ours: Vec<Dim> = dims.iter().map(|d| d[0].clone()).collect();
    assert_eq!(ours[8], Dim::sym("min(T,5)"));

    let lengths = [1u64, 2, 3, 4, 5, 6, 7, 12];
    let reference = reference_shapes(&path, &lengths.map(|t| vec![t]));
    for (t, shapes) in lengths.into_iter().zip(&reference) {
        for (k, dim) in ours.iter().enumerate() {
            let want = shapes[k][0];
            let Dim::Sym(text) = dim else {
                panic!("slice {:?}: tilecut gives {dim:?}", forms[k])
            };
            let got = size_at(dim, &[("T", t)]);
            // `T-2` is below zero at T = 1, where the slice is empty: the expression then
            // evaluates to unknown, never to a wrong size.
            let (start, end, step) = forms[k];
            let taken = start.max(0) as u64 + if end < 0 && step > 0 { end.unsigned_abs() } else { 0 };
            let empty_below = step > 0 && start >= 0 && t < taken;
            if empty_below {
                assert!(
                    got.is_none() || got == Some(want),
                    "slice {:?} at T = {t}: `{text}`",
                    forms[k]
                );
            } else {
                assert_eq!(got, Some(want), "slice {:?} at T = {t}: `{text}`", forms[k]);
            }
        }
    }
}

/// Runs the reference evaluator at each pair of sizes (`input` gives x's shape for it, or a
/// map of input names to shapes) and asserts that every dim of every output, evaluated with
/// the two symbols `names` set to that pair, is the size the evaluator computes.
fn agree_at_sizes<T: serde::Serialize>(
    path: &Path,
    outs: &[&str],
    ours: &[Vec<Dim>],
    names: [&str; 2],
    sizes: &[(u64, u64)],
    input: impl Fn(u64, u64) -> T,
) {
    let reference = reference_shapes(path, &sizes.iter().map(|&(a, b)| input(a, b)).collect::<Vec<_>>());
    for (&(a, b), shapes) in sizes.iter().zip(&reference) {
        for (k, dims) in ours.iter().enumerate() {
            let got: Vec<Option<u64>> = dims
                .iter()
                .map(|d| size_at(d, &[(names[0], a), (names[1], b)]))
                .collect();
            let want: Vec<Option<u64>> = shapes[k].iter().map(|&v| Some(v)).collect();
            assert_eq!(
                got, want,
                "output {} at {} = {a}, {} = {b}",
                outs[k], names[0], names[1]
            );
        }
    }
}

/// Encoder exports slice fixed tables to the input's length: learned positions
/// (`table[:, :S]` of a 16-row table), a causal mask (`mask[:, :, :S, :S]`), and a TopK whose
/// k is `Min(S, 5)`. Each slice is `min(S,16)` (ONNX Slice clamps its end to the axis) and
/// broadcasting it against S gives S back, so the sequence keeps its length through the
/// Add and the attention scores; the TopK keeps `min(S,5)`. Every output size, evaluated at
/// several lengths, must equal the reference evaluator's.
#[test]
fn positions_and_masks_sliced_to_the_length_keep_it() {
    if !python_onnx("positions_and_masks_sliced_to_the_length_keep_it") {
        return;
    }
    let mut nodes = vec![
        node("Shape", &["x"], &["sx"]),
        node("Gather", &["sx", "index1"], &["s"]),
        node("Unsqueeze", &["s", "zero"], &["s1"]),
        node("Slice", &["table", "zero", "s1", "one"], &["pos"]),
        node("Add", &["x", "pos"], &["y"]),
        node("Transpose", &["y"], &["yt"]),
        node("MatMul", &["y", "yt"], &["scores"]),
        node("Unsqueeze", &["scores", "one"], &["scores4"]),
        node("Concat", &["s1", "s1"], &["ends"]),
        node("Slice", &["mask", "zero2", "ends", "axes23"], &["causal"]),
        node("Add", &["scores4", "causal"], &["masked"]),
        node("ReduceMax", &["y", "minus1"], &["score"]),
        node("Min", &["s1", "cap"], &["k"]),
        node("TopK", &["score", "k"], &["top", "top_index"]),
    ];
    nodes[5].attribute = vec![ints_attr("perm", &[0, 2, 1])];
    nodes[8].attribute = vec![int_attr("axis", 0)];
    nodes[11].attribute = vec![int_attr("keepdims", 0)];
    let inits = vec![
        f32_init("table", &[1, 16, 4]),
        f32_init("mask", &[1, 1, 16, 16]),
        i64_init("index1", &[], &[1]),
        i64_init("one", &[1], &[1]),
        i64_init("zero", &[1], &[0]),
        i64_init("zero2", &[2], &[0, 0]),
        i64_init("axes23", &[2], &[2, 3]),
        i64_init("minus1", &[1], &[-1]),
        i64_init("cap", &[1], &[5]),
    ];
    let outs = ["y", "masked", "top", "pos"];
    let m = model(
        nodes,
        vec![vi("x", 1, &[Dm::S("B"), Dm::S("S"), Dm::N(4)])],
        untyped(&outs),
        inits,
    );
    let dir = tempfile::tempdir().expect("tmp");
    let (path, ours) = symbolic_outputs(m, dir.path(), "positions.onnx");
    let (b, s) = (Dim::sym("B"), Dim::sym("S"));
    assert_eq!(ours[0], [b.clone(), s.clone(), Dim::Known(4)]);
    assert_eq!(ours[1], [b.clone(), Dim::Known(1), s.clone(), s]);
    assert_eq!(ours[2], [b, Dim::sym("min(S,5)")]);
    assert_eq!(ours[3], [Dim::Known(1), Dim::sym("min(S,16)"), Dim::Known(4)]);

    let sizes = [(1, 1), (2, 3), (1, 5), (3, 6), (2, 16)];
    agree_at_sizes(&path, &outs, &ours, ["B", "S"], &sizes, |b, s| vec![b, s, 4]);
}

/// Feature pyramids add an upsampled coarse map to a finer one: a stride-2 pool gives
/// `(H+1)/2` rows, upsampling by 2 gives `((H+1)/2)*2`, and the sum with the input (H rows)
/// is valid only where the two agree or one is 1. A size with a whole factor of 2 is never
/// 1, so the sum has the upsampled size, in either order of the Add's inputs. Evaluated at
/// sizes where the model runs (including H = 1, where the input's 1 broadcasts), each must
/// equal the reference evaluator's (MaxPool, Resize, Add per the ONNX operator
/// specification).
#[test]
fn upsampled_maps_added_to_finer_ones_keep_their_size() {
    if !python_onnx("upsampled_maps_added_to_finer_ones_keep_their_size") {
        return;
    }
    let mut pool = node("MaxPool", &["x"], &["p"]);
    pool.attribute = vec![
        ints_attr("kernel_shape", &[3, 3]),
        ints_attr("strides", &[2, 2]),
        ints_attr("pads", &[1, 1, 1, 1]),
    ];
    let nodes = vec![
        pool,
        node("Resize", &["p", "", "scales"], &["up"]),
        node("Add", &["up", "x"], &["sum"]),
        node("Add", &["x", "up"], &["sum2"]),
    ];
    let scales = tilecut::onnx::TensorProto {
        name: "scales".into(),
        data_type: 1,
        dims: vec![4],
        raw_data: [1f32, 1.0, 2.0, 2.0]
            .iter()
            .flat_map(|v| v.to_le_bytes())
            .collect::<Vec<u8>>()
            .into(),
        ..Default::default()
    };
    let outs = ["sum", "sum2"];
    let m = model(
        nodes,
        vec![vi("x", 1, &[Dm::N(1), Dm::N(4), Dm::S("H"), Dm::S("W")])],
        untyped(&outs),
        vec![scales],
    );
    let dir = tempfile::tempdir().expect("tmp");
    let (path, ours) = symbolic_outputs(m, dir.path(), "pyramid.onnx");
    let up = [
        Dim::Known(1),
        Dim::Known(4),
        Dim::sym("((H+1)/2)*2"),
        Dim::sym("((W+1)/2)*2"),
    ];
    assert_eq!(ours[0], up);
    assert_eq!(ours[1], up);
    let sizes = [(1, 2), (2, 4), (8, 6), (16, 16), (1, 1)];
    agree_at_sizes(&path, &outs, &ours, ["H", "W"], &sizes, |h, w| vec![1, 4, h, w]);
}

/// Pixel shuffles over a symbolic image: DepthToSpace multiplies H and W by the block and
/// divides the channels, SpaceToDepth the reverse (the spec requires H and W to be multiples
/// of the block there, so the floor division tilecut writes is exact). Each size, evaluated
/// at several sizes, must equal the reference evaluator's (DepthToSpace, SpaceToDepth per
/// the ONNX operator specification).
#[test]
fn pixel_shuffles_keep_symbolic_image_sizes() {
    if !python_onnx("pixel_shuffles_keep_symbolic_image_sizes") {
        return;
    }
    let block = |op: &str, i: &str, o: &str, b: i64| {
        let mut n = node(op, &[i], &[o]);
        n.attribute = vec![int_attr("blocksize", b)];
        n
    };
    let nodes = vec![
        block("DepthToSpace", "x", "up", 2),
        block("SpaceToDepth", "up", "back", 2),
        block("SpaceToDepth", "x", "down", 2),
        block("DepthToSpace", "down", "again", 2),
    ];
    let outs = ["up", "back", "down", "again"];
    let m = model(
        nodes,
        vec![vi("x", 1, &[Dm::N(1), Dm::N(8), Dm::S("H"), Dm::S("W")])],
        untyped(&outs),
        vec![],
    );
    let dir = tempfile::tempdir().expect("tmp");
    let (path, ours) = symbolic_outputs(m, dir.path(), "shuffles.onnx");
    assert_eq!(ours[0][1], Dim::Known(2));
    assert_eq!(ours[2][1], Dim::Known(32));
    assert!(ours.iter().flatten().all(|d| *d != Dim::Unknown), "{ours:?}");
    let sizes = [(2, 2), (4, 6), (10, 8)];
    agree_at_sizes(&path, &outs, &ours, ["H", "W"], &sizes, |h, w| vec![1, 8, h, w]);
}

/// Window attention pads a map up to a multiple of its window with pads computed from the
/// shape, `(k - W % k) % k` (Shape, Gather, Mod, Sub, Mod, Concat into Pad's pads); the
/// windows are a Reshape by the padded size over k, and the map is cropped back to H and W
/// after a roll (two Slices concatenated) and added to the input. A map cut down to a multiple
/// (`H - H % 4`), and a sequence concatenated with itself and sliced back to the length read
/// off a difference of shapes (a cache's total less its new part), keep exact sizes too.
/// Each output size, evaluated at several image sizes (multiples of 7 and 4 among them),
/// must equal the reference evaluator's.
#[test]
fn windows_padded_to_a_multiple_and_cropped_back_keep_exact_sizes() {
    if !python_onnx("windows_padded_to_a_multiple_and_cropped_back_keep_exact_sizes") {
        return;
    }
    let mut nodes = vec![
        node("Shape", &["x"], &["sx"]),
        node("Gather", &["sx", "i2"], &["h"]),
        node("Gather", &["sx", "i3"], &["w"]),
        node("Mod", &["h", "seven"], &["hm"]),
        node("Sub", &["seven", "hm"], &["hs"]),
        node("Mod", &["hs", "seven"], &["pad_b"]),
        node("Mod", &["w", "seven"], &["wm"]),
        node("Sub", &["seven", "wm"], &["ws"]),
        node("Mod", &["ws", "seven"], &["pad_r"]),
        node("Unsqueeze", &["pad_b", "zero"], &["pad_b1"]),
        node("Unsqueeze", &["pad_r", "zero"], &["pad_r1"]),
        node("Concat", &["zeros6", "pad_b1", "pad_r1"], &["pads"]),
        node("Pad", &["x", "pads"], &["padded"]),
        node("Shape", &["padded"], &["sp"]),
        node("Gather", &["sp", "i2"], &["hp"]),
        node("Gather", &["sp", "i3"], &["wp"]),
        node("Div", &["hp", "seven"], &["nh"]),
        node("Div", &["wp", "seven"], &["nw"]),
        node("Unsqueeze", &["nh", "zero"], &["nh1"]),
        node("Unsqueeze", &["nw", "zero"], &["nw1"]),
        node(
            "Concat",
            &["one_four", "nh1", "seven1", "nw1", "seven1"],
            &["window_shape"],
        ),
        node("Reshape", &["padded", "window_shape"], &["windows"]),
        node("Reshape", &["windows", "sp"], &["merged"]),
        node("Slice", &["merged", "minus3", "to_end", "axis2"], &["tail"]),
        node("Slice", &["merged", "zero", "minus3", "axis2"], &["head"]),
        node("Concat", &["tail", "head"], &["rolled"]),
        node("Unsqueeze", &["h", "zero"], &["h1"]),
        node("Unsqueeze", &["w", "zero"], &["w1"]),
        node("Concat", &["h1", "w1"], &["hw"]),
        node("Slice", &["rolled", "zero2", "hw", "axes23"], &["cropped"]),
        node("Add", &["cropped", "x"], &["y"]),
        node("Mod", &["h", "four"], &["h4"]),
        node("Sub", &["h", "h4"], &["hc"]),
        node("Unsqueeze", &["hc", "zero"], &["hc1"]),
        node("Slice", &["x", "zero", "hc1", "axis2"], &["cut"]),
        node("Concat", &["x", "x"], &["twice"]),
        node("Shape", &["twice"], &["st"]),
        node("Gather", &["st", "i2"], &["ht"]),
        node("Sub", &["ht", "h"], &["back_h"]),
        node("Unsqueeze", &["back_h", "zero"], &["back_h1"]),
        node("Slice", &["twice", "zero", "back_h1", "axis2"], &["first"]),
        node("Add", &["first", "x"], &["z"]),
    ];
    for i in [11, 20, 28] {
        nodes[i].attribute = vec![int_attr("axis", 0)];
    }
    nodes[25].attribute = vec![int_attr("axis", 2)];
    nodes[35].attribute = vec![int_attr("axis", 2)];
    let inits = vec![
        i64_init("i2", &[], &[2]),
        i64_init("i3", &[], &[3]),
        i64_init("seven", &[], &[7]),
        i64_init("four", &[], &[4]),
        i64_init("zero", &[1], &[0]),
        i64_init("zero2", &[2], &[0, 0]),
        i64_init("zeros6", &[6], &[0; 6]),
        i64_init("one_four", &[2], &[1, 4]),
        i64_init("seven1", &[1], &[7]),
        i64_init("minus3", &[1], &[-3]),
        i64_init("to_end", &[1], &[i64::MAX]),
        i64_init("axis2", &[1], &[2]),
        i64_init("axes23", &[2], &[2, 3]),
    ];
    let outs = ["padded", "windows", "rolled", "y", "cut", "twice", "z"];
    let m = model(
        nodes,
        vec![vi("x", 1, &[Dm::N(1), Dm::N(4), Dm::S("H"), Dm::S("W")])],
        untyped(&outs),
        inits,
    );
    let dir = tempfile::tempdir().expect("tmp");
    let (path, ours) = symbolic_outputs(m, dir.path(), "windows.onnx");
    let (h, w) = (Dim::sym("H"), Dim::sym("W"));
    let up = |d: &Dim| Dim::sym(&format!("(({d}+6)/7)*7"));
    assert_eq!(ours[0][2..], [up(&h), up(&w)]);
    assert_eq!(
        ours[1][2..],
        [Dim::sym("(H+6)/7"), Dim::Known(7), Dim::sym("(W+6)/7"), Dim::Known(7)]
    );
    assert_eq!(ours[2][2], up(&h), "a roll keeps the size");
    assert_eq!(ours[3][2..], [h.clone(), w.clone()], "cropped back to the input's size");
    assert_eq!(ours[4][2], Dim::sym("(H/4)*4"));
    assert_eq!(ours[5][2], Dim::sym("H*2"), "like terms collected");
    assert_eq!(ours[6][2], h, "a difference of shapes that cancels");
    let sizes = [(1, 1), (5, 9), (7, 14), (8, 3), (20, 23), (28, 12)];
    agree_at_sizes(&path, &outs, &ours, ["H", "W"], &sizes, |h, w| vec![1, 4, h, w]);
}

/// Decoders with a cache concatenate the past keys with the new ones (`P+S`) and slice a
/// mask built to the total length from the past length on, the start computed as a
/// difference of shapes (`K - Q`, the total less the new part): the rows are the new length,
/// and the mask adds to the attention scores. Learned positions sliced from the past length
/// (`table[P:P+S]` of a 64-row table) are `min(P+S,64)-(min(P,64))`, exact past the table's
/// end too. Each size, at several lengths, must equal the reference evaluator's.
#[test]
fn slices_from_a_cache_length_keep_the_new_length() {
    if !python_onnx("slices_from_a_cache_length_keep_the_new_length") {
        return;
    }
    let mut nodes = vec![
        node("Concat", &["past", "x"], &["kv"]),
        node("Shape", &["kv"], &["sk"]),
        node("Shape", &["x"], &["sx"]),
        node("Gather", &["sk", "i1"], &["k"]),
        node("Gather", &["sx", "i1"], &["q"]),
        node("Sub", &["k", "q"], &["start"]),
        node("Unsqueeze", &["start", "zero"], &["start1"]),
        node("Unsqueeze", &["k", "zero"], &["k1"]),
        node("Unsqueeze", &["q", "zero"], &["q1"]),
        node("Concat", &["k1", "k1"], &["kk"]),
        node("ConstantOfShape", &["kk"], &["mask"]),
        node("Slice", &["mask", "start1", "k1", "zero"], &["rows"]),
        node("Transpose", &["kv"], &["kvt"]),
        node("MatMul", &["x", "kvt"], &["scores"]),
        node("Add", &["scores", "rows"], &["masked"]),
        node("Add", &["start1", "q1"], &["stop1"]),
        node("Slice", &["table", "start1", "stop1", "zero"], &["pos"]),
    ];
    nodes[0].attribute = vec![int_attr("axis", 1)];
    nodes[9].attribute = vec![int_attr("axis", 0)];
    nodes[12].attribute = vec![ints_attr("perm", &[0, 2, 1])];
    let inits = vec![
        i64_init("i1", &[], &[1]),
        i64_init("zero", &[1], &[0]),
        f32_init("table", &[64, 4]),
    ];
    let outs = ["kv", "rows", "masked", "pos"];
    let m = model(
        nodes,
        vec![
            vi("past", 1, &[Dm::N(1), Dm::S("P"), Dm::N(4)]),
            vi("x", 1, &[Dm::N(1), Dm::S("S"), Dm::N(4)]),
        ],
        untyped(&outs),
        inits,
    );
    let dir = tempfile::tempdir().expect("tmp");
    let (path, ours) = symbolic_outputs(m, dir.path(), "cache.onnx");
    let (s, total) = (Dim::sym("S"), Dim::sym("P+S"));
    assert_eq!(
        ours[1],
        [s.clone(), total.clone()],
        "the mask's rows are the new length"
    );
    assert_eq!(ours[2], [Dim::Known(1), s, total]);
    assert_eq!(ours[3][0], Dim::sym("min(P+S,64)-(min(P,64))"));
    let sizes = [(0, 3), (5, 2), (62, 4), (64, 1), (70, 1)];
    agree_at_sizes(
        &path,
        &outs,
        &ours,
        ["P", "S"],
        &sizes,
        |p, s| serde_json::json!({"past": [1, p, 4], "x": [1, s, 4]}),
    );
}

/// Slice bounds concatenated from a size read off the shape and a constant -1 (the last
/// element: `x[:, :T, :-1]` written as one ends tensor) keep both meanings: the length on one
/// axis, one less than the known size on the other.
#[test]
fn slice_ends_mixing_a_length_and_minus_one() {
    if !python_onnx("slice_ends_mixing_a_length_and_minus_one") {
        return;
    }
    let mut nodes = vec![
        node("Shape", &["x"], &["sx"]),
        node("Slice", &["sx", "one", "two"], &["t"]),
        node("Concat", &["t", "minus1"], &["ends"]),
        node("Slice", &["x", "zero2", "ends", "axes12"], &["y"]),
    ];
    nodes[2].attribute = vec![int_attr("axis", 0)];
    let inits = vec![
        i64_init("one", &[1], &[1]),
        i64_init("two", &[1], &[2]),
        i64_init("minus1", &[1], &[-1]),
        i64_init("zero2", &[2], &[0, 0]),
        i64_init("axes12", &[2], &[1, 2]),
    ];
    let m = model(
        nodes,
        vec![vi("x", 1, &[Dm::S("B"), Dm::S("T"), Dm::N(5)])],
        untyped(&["y"]),
        inits,
    );
    let dir = tempfile::tempdir().expect("tmp");
    let (path, ours) = symbolic_outputs(m, dir.path(), "ends.onnx");
    assert_eq!(ours[0], [Dim::sym("B"), Dim::sym("T"), Dim::Known(4)]);
    agree_at_sizes(&path, &["y"], &ours, ["B", "T"], &[(1, 1), (2, 7)], |b, t| {
        vec![b, t, 5]
    });
}

/// A float initializer of one value (shape `[]`).
fn f32_scalar(name: &str, v: f32) -> tilecut::onnx::TensorProto {
    tilecut::onnx::TensorProto {
        name: name.into(),
        data_type: 1,
        raw_data: v.to_le_bytes().to_vec().into(),
        ..Default::default()
    }
}

/// Detection heads and position ids: `Range(s, n, k)` up to a length `n` read off a `Shape`
/// (cast to float, as exporters write it, or not) keeps the length symbolic, and so does a
/// stack of five stride-2 windows (MaxPool, kernel 3, pads 1), whose nested floor quotients
/// tilecut merges into one. Each size, evaluated at several lengths, must equal the one the
/// `onnx` package's reference evaluator computes (Range and MaxPool per the ONNX operator
/// specification).
#[test]
fn symbolic_ranges_and_strided_stacks_agree_with_the_onnx_reference_evaluator() {
    if !python_onnx("symbolic_ranges_and_strided_stacks_agree_with_the_onnx_reference_evaluator") {
        return;
    }
    let pool = |i: &str, o: &str| {
        let mut n = node("MaxPool", &[i], &[o]);
        n.attribute = vec![
            ints_attr("kernel_shape", &[3]),
            ints_attr("strides", &[2]),
            ints_attr("pads", &[1, 1]),
        ];
        n
    };
    let mut nodes = vec![
        node("Reshape", &["x", "to3"], &["x3"]),
        pool("x3", "p1"),
        pool("p1", "p2"),
        pool("p2", "p3"),
        pool("p3", "p4"),
        pool("p4", "p5"),
        node("Shape", &["x"], &["sx"]),
        node("Gather", &["sx", "zero"], &["n"]),
        node("Shape", &["p5"], &["sp"]),
        node("Gather", &["sp", "two"], &["m"]),
    ];
    let mut cast = |from: &str, to: &str| {
        let mut c = node("Cast", &[from], &[to]);
        c.attribute = vec![int_attr("to", 1)];
        nodes.push(c);
    };
    cast("n", "nf");
    cast("m", "mf");
    // (start, limit, step): integer and float forms, a start past zero, a step past one.
    let ranges: &[(&str, &str, &str)] = &[
        ("i0", "n", "i1"),
        ("f0", "nf", "f1"),
        ("i2", "n", "i1"),
        ("f1", "nf", "f3"),
        ("f0", "mf", "f1"),
    ];
    let mut outs = vec!["p5".to_string()];
    for (k, (s, l, d)) in ranges.iter().enumerate() {
        let out = format!("r{k}");
        nodes.push(node("Range", &[s, l, d], &[&out]));
        outs.push(out);
    }
    let mut inits = vec![
        i64_init("to3", &[3], &[1, 1, -1]),
        i64_init("zero", &[], &[0]),
        i64_init("two", &[], &[2]),
        i64_init("i0", &[], &[0]),
        i64_init("i1", &[], &[1]),
        i64_init("i2", &[], &[2]),
    ];
    inits.extend([f32_scalar("f0", 0.0), f32_scalar("f1", 1.0), f32_scalar("f3", 3.0)]);
    let out_refs: Vec<&str> = outs.iter().map(String::as_str).collect();
    let m = model(nodes, vec![vi("x", 1, &[Dm::S("T")])], untyped(&out_refs), inits);
    let dir = tempfile::tempdir().expect("tmp");
    let (path, dims) = symbolic_outputs(m, dir.path(), "ranges.onnx");
    let ours: Vec<Dim> = dims.iter().map(|d| d.last().cloned().expect("a dim")).collect();
    // Five stride-2 windows are one quotient, not five nested ones.
    assert_eq!(ours[0], Dim::sym("(T+31)/32"));

    let lengths = [1u64, 5, 32, 33, 100];
    let reference = reference_shapes(&path, &lengths.map(|t| vec![t]));
    for (t, shapes) in lengths.into_iter().zip(&reference) {
        for (k, dim) in ours.iter().enumerate() {
            let want = *shapes[k].last().expect("size");
            let Dim::Sym(text) = dim else {
                panic!("output {k}: tilecut gives {dim:?}")
            };
            let got = size_at(dim, &[("T", t)]);
            // `T-2` is below zero at T = 1, where the range is empty: unknown, never wrong.
            assert!(
                got == Some(want) || (got.is_none() && want == 0),
                "output {k} at T = {t}: `{text}` gives {got:?}, reference {want}"
            );
        }
    }
}

/// Exporters compute sizes from a `Shape` in arithmetic: a length cast to float, scaled by a
/// whole number, rounded and cast back (upsampling to twice the input's size), halved or
/// shortened by one in integers, offset in float and rounded up. Each size stays an expression
/// of the symbolic length T, evaluated at several lengths it must equal what the `onnx`
/// package's reference evaluator computes (Cast, Mul, Floor, Ceil, Div, Sub, Add, Range and
/// Resize with `sizes`, per the ONNX operator specification). A length scaled by 0.5 in float
/// is not a whole number before it is rounded: it stays unknown, never guessed.
#[test]
fn symbolic_size_arithmetic_agrees_with_the_onnx_reference_evaluator() {
    if !python_onnx("symbolic_size_arithmetic_agrees_with_the_onnx_reference_evaluator") {
        return;
    }
    let with_int = |mut n: tilecut::onnx::NodeProto, name: &str, v: i64| {
        n.attribute = vec![int_attr(name, v)];
        n
    };
    let cast = |from: &str, to: &str, ty: i64| with_int(node("Cast", &[from], &[to]), "to", ty);
    let nodes = vec![
        node("Shape", &["x"], &["s"]),
        node("Gather", &["s", "zero"], &["t"]),
        cast("t", "tf", 1),
        // 2T through float: Mul by 2.0, Floor, back to int64.
        node("Mul", &["tf", "f2"], &["t2"]),
        node("Floor", &["t2"], &["t2r"]),
        cast("t2r", "t2i", 7),
        node("Range", &["i0", "t2i", "i1"], &["r_double"]),
        // T//2 and T-1 in integers.
        node("Div", &["t", "i2"], &["half"]),
        node("Range", &["i0", "half", "i1"], &["r_half"]),
        node("Sub", &["t", "i1"], &["less"]),
        node("Range", &["i0", "less", "i1"], &["r_less"]),
        // T+3 through float: Add 3.0, Ceil.
        node("Add", &["tf", "f3"], &["t3"]),
        node("Ceil", &["t3"], &["t3r"]),
        node("Range", &["f0", "t3r", "f1"], &["r_more"]),
        // Nearest-neighbour upsampling of [1,1,T] to [1,1,2T] by `sizes`.
        node("Reshape", &["x", "to3"], &["x3"]),
        // Opset 18: Unsqueeze takes its axes as an input.
        node("Unsqueeze", &["t2i", "axis0"], &["t2u"]),
        with_int(node("Concat", &["ones", "t2u"], &["sizes"]), "axis", 0),
        node("Resize", &["x3", "", "", "sizes"], &["up"]),
        // T × 0.5 in float, rounded down: not a whole-number product, so not folded.
        node("Mul", &["tf", "fhalf"], &["th"]),
        node("Floor", &["th"], &["thr"]),
        node("Range", &["f0", "thr", "f1"], &["r_scaled"]),
    ];
    let inits = vec![
        i64_init("zero", &[], &[0]),
        i64_init("i0", &[], &[0]),
        i64_init("i1", &[], &[1]),
        i64_init("i2", &[], &[2]),
        i64_init("to3", &[3], &[1, 1, -1]),
        i64_init("ones", &[2], &[1, 1]),
        i64_init("axis0", &[1], &[0]),
        f32_scalar("f0", 0.0),
        f32_scalar("f1", 1.0),
        f32_scalar("f2", 2.0),
        f32_scalar("f3", 3.0),
        f32_scalar("fhalf", 0.5),
    ];
    let outs = ["r_double", "r_half", "r_less", "r_more", "up", "r_scaled"];
    let m = model(nodes, vec![vi("x", 1, &[Dm::S("T")])], untyped(&outs), inits);
    let dir = tempfile::tempdir().expect("tmp");
    let (path, dims) = symbolic_outputs(m, dir.path(), "size_arithmetic.onnx");
    let ours: Vec<Dim> = dims.iter().map(|d| d.last().cloned().expect("a dim")).collect();
    assert_eq!(ours[5], Dim::Unknown, "T × 0.5 is not guessed");

    let lengths = [1u64, 2, 7, 12];
    let reference = reference_shapes(&path, &lengths.map(|t| vec![t]));
    for (t, shapes) in lengths.into_iter().zip(&reference) {
        for (k, dim) in ours.iter().enumerate().take(5) {
            let want = *shapes[k].last().expect("size");
            let Dim::Sym(text) = dim else {
                panic!("{}: tilecut gives {dim:?}", outs[k])
            };
            let got = size_at(dim, &[("T", t)]);
            // `T-1` at T = 1 is 0, an empty range; below zero it would be unknown.
            assert_eq!(got, Some(want), "{} at T = {t}: `{text}`", outs[k]);
        }
    }
}

/// The exporters' `Expand` to a target shape with -1 for "keep this dim": the target read off
/// a `Shape` is tested `Equal` to -1 and the matches replaced by 1 (`Where`), then expanded.
/// A size is never -1, so the target keeps its symbol: [T, 4, 8], and ConstantOfShape of the
/// same target likewise; a target with a literal -1 beside the symbol (`expand(-1, T, 8)`)
/// has that element found and replaced. At each length the shapes must equal what the `onnx` package's
/// reference evaluator computes (Equal, Where, Expand, ConstantOfShape per the ONNX operator
/// specification).
#[test]
fn expand_targets_tested_against_minus_one_keep_their_symbols() {
    if !python_onnx("expand_targets_tested_against_minus_one_keep_their_symbols") {
        return;
    }
    let mut concat = node("Concat", &["lead", "four", "eight"], &["target"]);
    concat.attribute = vec![int_attr("axis", 0)];
    let mut concat2 = node("Concat", &["minus1", "lead", "eight"], &["target2"]);
    concat2.attribute = vec![int_attr("axis", 0)];
    let nodes = vec![
        node("Reshape", &["x", "to3"], &["x3"]),
        node("Shape", &["x3"], &["s"]),
        node("Slice", &["s", "start", "stop"], &["lead"]),
        concat,
        node("Equal", &["target", "minus1"], &["keep"]),
        node("Where", &["keep", "ones", "target"], &["to"]),
        node("Expand", &["x3", "to"], &["y"]),
        node("ConstantOfShape", &["target"], &["c"]),
        // The target with a literal -1 in it, as exporters write expand(-1, T, 8): that -1
        // is the one Equal finds, and becomes 1.
        concat2,
        node("Equal", &["target2", "minus1"], &["keep2"]),
        node("Where", &["keep2", "ones", "target2"], &["to2"]),
        node("Expand", &["x3", "to2"], &["y2"]),
    ];
    let inits = vec![
        i64_init("to3", &[3], &[-1, 1, 1]),
        i64_init("start", &[1], &[0]),
        i64_init("stop", &[1], &[1]),
        i64_init("four", &[1], &[4]),
        i64_init("eight", &[1], &[8]),
        i64_init("minus1", &[1], &[-1]),
        i64_init("ones", &[3], &[1, 1, 1]),
    ];
    let outs = ["y", "c", "y2"];
    let m = model(nodes, vec![vi("x", 1, &[Dm::S("T")])], untyped(&outs), inits);
    let dir = tempfile::tempdir().expect("tmp");
    let (path, ours) = symbolic_outputs(m, dir.path(), "expand_target.onnx");
    assert_eq!(ours[0], vec![Dim::sym("T"), Dim::Known(4), Dim::Known(8)]);
    // [T,1,1] expanded to [1,T,8].
    assert_eq!(ours[2], vec![Dim::sym("T"), Dim::sym("T"), Dim::Known(8)]);
    let lengths = [1u64, 3, 10];
    let reference = reference_shapes(&path, &lengths.map(|t| vec![t]));
    for (t, shapes) in lengths.into_iter().zip(&reference) {
        for (k, dims) in ours.iter().enumerate() {
            let got: Vec<Option<u64>> = dims.iter().map(|d| size_at(d, &[("T", t)])).collect();
            let want: Vec<Option<u64>> = shapes[k].iter().map(|&d| Some(d)).collect();
            assert_eq!(got, want, "{} at T = {t}", outs[k]);
        }
    }
}

/// Transformer exports with a symbolic batch B and length T: tokens flattened to [B*T, 8] and
/// back with -1 for the batch (the product counts as its factors, so -1 is B); the tokens
/// sliced from 1 to the length read off their own shape (`x[:, 1:T]`: T-1); a table of 32
/// positions sliced to the length (`positions[:T]`: min(T,32); `positions[3:T]`: min(T, 32)
/// less the start, or 0, which no dim expresses, so that axis is unknown and the other
/// kept); a Slice whose
/// start is computed from the data, with default axes: only the first axis is unknown. At
/// each (B, T) every dim tilecut gives must equal what the `onnx` package's reference
/// evaluator computes (Reshape, Slice, Add per the ONNX operator specification); at T = 40
/// the table's slices are 32 and 29 rows, not T and T-3.
#[test]
fn transformer_reshapes_and_position_slices_keep_their_symbols() {
    if !python_onnx("transformer_reshapes_and_position_slices_keep_their_symbols") {
        return;
    }
    let un = |i: &str, o: &str| node("Unsqueeze", &[i, "axis0"], &[o]);
    let cat = |ins: &[&str], o: &str| {
        let mut n = node("Concat", ins, &[o]);
        n.attribute = vec![int_attr("axis", 0)];
        n
    };
    let mut cast = node("Cast", &["peak"], &["start"]);
    cast.attribute = vec![int_attr("to", 7)];
    let mut reduce = node("ReduceMax", &["x"], &["peak3"]);
    reduce.attribute = vec![int_attr("keepdims", 0)];
    let nodes = vec![
        node("Shape", &["x"], &["s"]),
        node("Gather", &["s", "zero"], &["b"]),
        node("Gather", &["s", "one"], &["t"]),
        node("Mul", &["b", "t"], &["bt"]),
        un("bt", "btu"),
        cat(&["btu", "eight"], "flat_shape"),
        node("Reshape", &["x", "flat_shape"], &["flat"]),
        un("t", "tu"),
        cat(&["minus1", "tu", "eight"], "back_shape"),
        node("Reshape", &["flat", "back_shape"], &["back"]),
        node("Slice", &["x", "one1", "tu", "one1"], &["rest"]),
        node("Slice", &["positions", "zero1", "tu"], &["pe"]),
        node("Slice", &["positions", "three", "tu"], &["pe3"]),
        // A start read off the data (all ones: 1), default axes.
        reduce,
        node("Reshape", &["peak3", "one1"], &["peak"]),
        cast,
        node("Slice", &["x", "start", "big"], &["tail"]),
    ];
    let mut inits = vec![
        i64_init("zero", &[], &[0]),
        i64_init("one", &[], &[1]),
        i64_init("axis0", &[1], &[0]),
        i64_init("eight", &[1], &[8]),
        i64_init("minus1", &[1], &[-1]),
        i64_init("zero1", &[1], &[0]),
        i64_init("three", &[1], &[3]),
        i64_init("one1", &[1], &[1]),
        i64_init("big", &[1], &[i64::MAX]),
    ];
    inits.push(tilecut::onnx::TensorProto {
        name: "positions".into(),
        data_type: 1,
        dims: vec![32, 8],
        raw_data: vec![0u8; 32 * 8 * 4].into(),
        ..Default::default()
    });
    let outs = ["flat", "back", "rest", "pe", "pe3", "tail"];
    let m = model(
        nodes,
        vec![vi("x", 1, &[Dm::S("B"), Dm::S("T"), Dm::N(8)])],
        untyped(&outs),
        inits,
    );
    let dir = tempfile::tempdir().expect("tmp");
    let (path, ours) = symbolic_outputs(m, dir.path(), "tokens.onnx");
    assert_eq!(ours[1], vec![Dim::sym("B"), Dim::sym("T"), Dim::Known(8)]);
    assert_eq!(ours[2], vec![Dim::sym("B"), Dim::sym("T-1"), Dim::Known(8)]);
    assert_eq!(ours[3], vec![Dim::sym("min(T,32)"), Dim::Known(8)]);
    assert_eq!(ours[4], vec![Dim::Unknown, Dim::Known(8)]);
    assert_eq!(ours[5], vec![Dim::Unknown, Dim::sym("T"), Dim::Known(8)]);
    let runs: &[(u64, u64)] = &[(1, 3), (2, 5), (3, 40)];
    let reference = reference_shapes(&path, &runs.iter().map(|&(b, t)| vec![b, t, 8]).collect::<Vec<_>>());
    for (&(b, t), want) in runs.iter().zip(&reference) {
        for (k, dims) in ours.iter().enumerate() {
            for (i, d) in dims.iter().enumerate() {
                // Unknown is never wrong; only the data-dependent start and the table's
                // min(T, 32) - 3 are expected here.
                if let Some(got) = size_at(d, &[("B", b), ("T", t)]) {
                    assert_eq!(got, want[k][i], "{} dim {i} at B = {b}, T = {t}", outs[k]);
                } else {
                    assert_eq!(*d, Dim::Unknown, "{} dim {i} at B = {b}, T = {t}", outs[k]);
                }
            }
        }
    }
}

/// A shape value built by Concat from constants and a part computed from the data (here the
/// input's maximum, cast to an integer): the result's known parts still size what it shapes,
/// [2, ?, 3] from ConstantOfShape and from a Reshape to it, not rank 3 alone. The known dims
/// must equal what the `onnx` package's reference evaluator computes (Concat,
/// ConstantOfShape, Reshape per the ONNX operator specification), and the computed one is
/// unknown, never guessed.
#[test]
fn concat_keeps_the_known_parts_of_a_shape_computed_in_part_from_data() {
    if !python_onnx("concat_keeps_the_known_parts_of_a_shape_computed_in_part_from_data") {
        return;
    }
    let mut reduce = node("ReduceMax", &["x"], &["peak"]);
    reduce.attribute = vec![int_attr("keepdims", 0)];
    let mut cast = node("Cast", &["peak"], &["peak_i"]);
    cast.attribute = vec![int_attr("to", 7)];
    let mut concat = node("Concat", &["two", "middle", "three"], &["shape"]);
    concat.attribute = vec![int_attr("axis", 0)];
    let nodes = vec![
        reduce,
        cast,
        node("Reshape", &["peak_i", "one1"], &["middle"]),
        concat,
        node("ConstantOfShape", &["shape"], &["c"]),
        node("Reshape", &["c", "shape"], &["r"]),
    ];
    let inits = vec![
        i64_init("one1", &[1], &[1]),
        i64_init("two", &[1], &[2]),
        i64_init("three", &[1], &[3]),
    ];
    let outs = ["c", "r"];
    let m = model(nodes, vec![vi("x", 1, &[Dm::S("T")])], untyped(&outs), inits);
    let dir = tempfile::tempdir().expect("tmp");
    let (path, ours) = symbolic_outputs(m, dir.path(), "partial_shape.onnx");
    for dims in &ours {
        assert_eq!(*dims, vec![Dim::Known(2), Dim::Unknown, Dim::Known(3)]);
    }
    // All ones: the maximum is 1 at every length.
    let lengths = [1u64, 4];
    let reference = reference_shapes(&path, &lengths.map(|t| vec![t]));
    for shapes in &reference {
        for (k, dims) in ours.iter().enumerate() {
            for (i, d) in dims.iter().enumerate() {
                if let Dim::Known(v) = d {
                    assert_eq!(*v, shapes[k][i], "{} dim {i}", outs[k]);
                }
            }
        }
    }
}

/// Lists the models of the `onnx` package's backend test data converted from a training
/// framework and its "simple" models, each with the dims of its test inputs (by input name)
/// and of the outputs the ONNX project recorded for them (by output index), from
/// `test_data_set_0`.
const BACKEND_CASES: &str = r#"
import os, glob, json, onnx
root = os.path.join(os.path.dirname(onnx.__file__), "backend", "test", "data")
cases = []
for kind in sorted(k for k in os.listdir(root) if k not in ("node", "light", "real")):
    for d in sorted(glob.glob(os.path.join(root, kind, "*"))):
        model = os.path.join(d, "model.onnx")
        data = sorted(glob.glob(os.path.join(d, "test_data_set_0", "*.pb")))
        if not os.path.exists(model) or not data:
            continue
        g = onnx.load(model, load_external_data=False).graph
        weights = {t.name for t in g.initializer}
        names = [i.name for i in g.input if i.name not in weights]
        inputs, outputs = {}, {}
        for f in data:
            t = onnx.TensorProto()
            with open(f, "rb") as fh:
                t.ParseFromString(fh.read())
            b = os.path.basename(f)[:-3]
            k = int(b.split("_")[1])
            if b.startswith("input_") and k < len(names):
                inputs[names[k]] = list(t.dims)
            elif b.startswith("output_"):
                outputs[k] = list(t.dims)
        cases.append([model, inputs, outputs])
print(json.dumps(cases))
"#;

/// The ONNX project's backend test models converted from a training framework and its
/// "simple" models (every folder of `onnx/backend/test/data/` but `node`, `light` and
/// `real`, in the `onnx` package), with the declared output types and all value_info stripped and the inputs fixed
/// to the recorded test inputs' dims: every output dim tilecut states must be the recorded
/// output's. A dim may stay open only where the size is data (string stop words; an Expand to
/// a shape that is an input's value, fixed only with `--value`), or for the training preview
/// domain's Gradient, which tilecut does not read. Sequences built element by element (insert
/// at a position, then read one back; concatenate or stack them) must resolve.
#[test]
fn backend_test_models_give_their_recorded_output_shapes() {
    if !python_onnx("backend_test_models_give_their_recorded_output_shapes") {
        return;
    }
    // (model, input dims by name, output dims by index)
    type Dims = BTreeMap<String, Vec<u64>>;
    let cases: Vec<(String, Dims, Dims)> = serde_json::from_str(&python(BACKEND_CASES, &[])).expect("json");
    assert!(cases.len() >= 130, "only {} backend test models found", cases.len());
    let (mut agree, mut open) = (0, Vec::new());
    let mut wrong = Vec::new();
    for (model, inputs, outputs) in &cases {
        let path = Path::new(model);
        let loaded = stripped(path);
        let mut o = tilecut::Overrides::default();
        for (name, dims) in inputs {
            if !dims.is_empty() {
                let dims: Vec<String> = dims.iter().map(u64::to_string).collect();
                o.add_input(&format!("{name}={}", dims.join("x")))
                    .expect("input setting");
            }
        }
        let read = tilecut::read_loaded(&loaded, &o).expect("reads");
        let g = &read.model.graph;
        let case = path
            .parent()
            .and_then(Path::file_name)
            .and_then(|n| n.to_str())
            .unwrap_or(model);
        for (k, want) in outputs {
            let k: usize = k.parse().expect("index");
            let Some(ours) = g.value(g.outputs[k]).fact.shape.dims() else {
                open.push(format!("{case} output {k}: rank unknown"));
                continue;
            };
            let fits = ours.len() == want.len()
                && ours
                    .iter()
                    .zip(want)
                    .all(|(d, w)| !matches!(d, Dim::Known(v) if v != w));
            if !fits {
                wrong.push(format!("{case} output {k}: tilecut {ours:?}, recorded {want:?}"));
            } else if ours.iter().all(|d| matches!(d, Dim::Known(_))) {
                agree += 1;
            } else {
                open.push(format!("{case} output {k}: {ours:?}"));
            }
        }
    }
    println!(
        "backend test models: {agree} outputs agree with the recorded ones, {} left open: {open:#?}",
        open.len()
    );
    assert!(wrong.is_empty(), "{} wrong: {wrong:#?}", wrong.len());
    for o in &open {
        let allowed = ["test_strnorm", "test_expand_shape", "test_gradient"];
        assert!(
            allowed.iter().any(|a| o.starts_with(a)),
            "only data-dependent and sequence-position sizes may stay open: {o}"
        );
    }
    // An Expand to an input's value still has its rank (two from the target's length, three
    // from the data) and the data's dims other than 1: [1, 3, 1] expanded to a 2-long shape.
    assert!(
        open.iter()
            .any(|o| o == "test_expand_shape_model1 output 0: [Unknown, Known(3), Unknown]"),
        "{open:?}"
    );
    assert!(agree >= 134, "only {agree} agree");
}

/// Runs a model on zero inputs of the given shapes (`{name: shape}`) with the reference
/// evaluator; prints the shape of each output.
const RUN_ON_ZEROS: &str = r#"
import sys, json, onnx, numpy as np
from onnx.reference import ReferenceEvaluator
shapes = json.loads(sys.argv[2])
outs = ReferenceEvaluator(onnx.load(sys.argv[1])).run(None, {k: np.zeros(v, dtype=np.float32) for k, v in shapes.items()})
print(json.dumps([list(np.shape(o)) for o in outs]))
"#;

/// A model written to a folder of its own and read: its outputs' shapes as tilecut infers
/// them and as the `onnx` package's reference evaluator computes them on zeros of `shapes`
/// (a JSON object of input shapes). The folder lives as long as this.
struct OnZeros {
    _dir: tempfile::TempDir,
    path: std::path::PathBuf,
    read: tilecut::Analyzed,
    ours: Vec<Vec<u64>>,
    reference: Vec<Vec<u64>>,
}

fn on_zeros(m: &tilecut::onnx::ModelProto, shapes: &str) -> OnZeros {
    let dir = tempfile::tempdir().expect("tmp");
    let path = write(dir.path(), "model.onnx", m);
    let read = tilecut::read_model(&path, &Default::default()).expect("reads");
    let g = &read.model.graph;
    let ours = g
        .outputs
        .iter()
        .map(|&o| g.value(o).fact.shape.concrete().expect("every output sized"))
        .collect();
    let reference = serde_json::from_str(&python(RUN_ON_ZEROS, &[path.to_str().expect("utf8"), shapes])).expect("json");
    OnZeros {
        _dir: dir,
        path,
        read,
        ours,
        reference,
    }
}

/// A sequence split from a tensor in uneven pieces (SplitToSequence, scalar split 3 over 7
/// rows), read back piece by piece: its length folds to 3, the last piece has 1 row, erasing
/// the first and concatenating leaves 4 rows, and stacking the pieces of 1 row each along a
/// new axis gives 7; a tensor inserted at -1 goes before the last one. Each output's shape must be the one the `onnx` package's reference
/// evaluator computes (sequence ops per the ONNX operator specification).
#[test]
fn sequences_split_in_pieces_agree_with_the_onnx_reference_evaluator() {
    if !python_onnx("sequences_split_in_pieces_agree_with_the_onnx_reference_evaluator") {
        return;
    }
    let with = |mut n: tilecut::onnx::NodeProto, attrs: Vec<tilecut::onnx::AttributeProto>| {
        n.attribute = attrs;
        n
    };
    let nodes = vec![
        node("SplitToSequence", &["x", "three"], &["pieces"]),
        node("SequenceLength", &["pieces"], &["count"]),
        node("SequenceAt", &["pieces", "last"], &["tail"]),
        node("SequenceErase", &["pieces", "zero"], &["rest"]),
        with(
            node("ConcatFromSequence", &["rest"], &["joined"]),
            vec![int_attr("axis", 0)],
        ),
        with(
            node("SplitToSequence", &["x"], &["rows"]),
            vec![int_attr("keepdims", 0)],
        ),
        with(
            node("ConcatFromSequence", &["rows"], &["stacked"]),
            vec![int_attr("axis", 1), int_attr("new_axis", 1)],
        ),
        // [a, b], then c inserted at -1: before the last, [a, c, b].
        node("SequenceConstruct", &["a", "b"], &["ab"]),
        node("SequenceInsert", &["ab", "c", "last"], &["acb"]),
        node("SequenceAt", &["acb", "one"], &["second"]),
        node("SequenceAt", &["acb", "last"], &["final"]),
    ];
    let inits = vec![
        i64_init("three", &[], &[3]),
        i64_init("last", &[], &[-1]),
        i64_init("zero", &[], &[0]),
        i64_init("one", &[], &[1]),
    ];
    let outs = ["count", "tail", "joined", "stacked", "second", "final"];
    let inputs = vec![
        vi("x", 1, &[Dm::N(7), Dm::N(2)]),
        vi("a", 1, &[Dm::N(1), Dm::N(2)]),
        vi("b", 1, &[Dm::N(2), Dm::N(2)]),
        vi("c", 1, &[Dm::N(3), Dm::N(2)]),
    ];
    let m = model(nodes, inputs, untyped(&outs), inits);
    let z = on_zeros(&m, r#"{"x": [7, 2], "a": [1, 2], "b": [2, 2], "c": [3, 2]}"#);
    assert_eq!(z.ours, z.reference);
    let g = &z.read.model.graph;
    let count = g.value(g.outputs[0]).konst.as_deref().and_then(|c| c.try_ints());
    assert_eq!(
        count,
        Some(vec![3]),
        "the length of a sequence the graph spells out is a constant"
    );
}

/// SequenceMap (opset 17) over a sequence built from two [2, 3] tensors, with a [3, 4] tensor
/// as its additional input: per the ONNX operator specification the body sees one element
/// and the tensor as it is, and each body output becomes a sequence as long as the input.
/// The body multiplies and also reads the element's shape. Concatenating the products gives
/// [4, 4], the last one is [2, 4], each shape read is [2] and the length folds to 2; the
/// shapes must be the ones the `onnx` package's reference evaluator computes. MACs: the
/// body's MatMul, 2·3·4 = 24, once per element (MatMul convention M·K·N, README), 48.
#[test]
fn sequence_map_runs_its_body_once_per_element() {
    if !python_onnx("sequence_map_runs_its_body_once_per_element") {
        return;
    }
    let body = tilecut::onnx::GraphProto {
        node: vec![node("MatMul", &["e", "t"], &["p"]), node("Shape", &["e"], &["s"])],
        name: "per_element".into(),
        input: vec![vi("e", 1, &[Dm::S("rows"), Dm::N(3)]), untyped(&["t"]).remove(0)],
        output: untyped(&["p", "s"]),
        ..Default::default()
    };
    let mut map = node("SequenceMap", &["ab", "w"], &["products", "shapes"]);
    map.attribute = vec![tilecut::onnx::AttributeProto {
        name: "body".into(),
        r#type: 5,
        g: Some(Box::new(body)),
        ..Default::default()
    }];
    let with = |mut n: tilecut::onnx::NodeProto, attrs: Vec<tilecut::onnx::AttributeProto>| {
        n.attribute = attrs;
        n
    };
    let nodes = vec![
        node("SequenceConstruct", &["a", "b"], &["ab"]),
        map,
        with(
            node("ConcatFromSequence", &["products"], &["joined"]),
            vec![int_attr("axis", 0)],
        ),
        node("SequenceAt", &["products", "last"], &["final"]),
        node("SequenceAt", &["shapes", "last"], &["shape_read"]),
        node("SequenceLength", &["products"], &["count"]),
    ];
    let outs = ["joined", "final", "shape_read", "count"];
    let inputs = vec![
        vi("a", 1, &[Dm::N(2), Dm::N(3)]),
        vi("b", 1, &[Dm::N(2), Dm::N(3)]),
        vi("w", 1, &[Dm::N(3), Dm::N(4)]),
    ];
    let m = model(nodes, inputs, untyped(&outs), vec![i64_init("last", &[], &[-1])]);
    let z = on_zeros(&m, r#"{"a": [2, 3], "b": [2, 3], "w": [3, 4]}"#);
    assert_eq!(z.ours, z.reference);
    let g = &z.read.model.graph;
    let count = g.value(g.outputs[3]).konst.as_deref().and_then(|c| c.try_ints());
    assert_eq!(count, Some(vec![2]), "the mapped sequence is as long as its input");

    let (code, out, err) = run(&["inspect", z.path.to_str().expect("utf8"), "--format", "json"]);
    assert_eq!(code, 0, "{err}");
    let j: serde_json::Value = serde_json::from_str(&out).expect("json");
    assert!(!j["warnings"].to_string().contains("op-unknown"), "{}", j["warnings"]);
    assert_eq!(j["model"]["macs"], 48);
}

/// Builds one model per ONNX-ML op (the classical-model ops converters write), runs it in the
/// `onnx` package's reference evaluator and prints each output's shape and element type.
const ML_MODELS: &str = r#"
import sys, json, os, onnx, numpy as np
from onnx import helper as h, TensorProto as T
from onnx.reference import ReferenceEvaluator
out_dir = sys.argv[1]
F, I, S = T.FLOAT, T.INT64, T.STRING
x = np.linspace(0, 1, 12, dtype=np.float32).reshape(3, 4)
tree = dict(nodes_treeids=[0, 0, 0, 1], nodes_nodeids=[0, 1, 2, 0], nodes_featureids=[0, 0, 0, 0],
            nodes_modes=["BRANCH_LEQ", "LEAF", "LEAF", "LEAF"], nodes_values=[0.5, 0, 0, 0],
            nodes_truenodeids=[1, 0, 0, 0], nodes_falsenodeids=[2, 0, 0, 0])
cases = {
  "linear_regressor": ("LinearRegressor", [("x", F, [3, 4])], 1, {"x": x}, dict(coefficients=[0.5] * 8, targets=2)),
  "linear_regressor_one": ("LinearRegressor", [("x", F, [4])], 1, {"x": x[0]}, dict(coefficients=[0.5] * 4)),
  "linear_classifier": ("LinearClassifier", [("x", F, [3, 4])], 2, {"x": x}, dict(coefficients=[0.5] * 12, classlabels_ints=[0, 1, 2])),
  "linear_classifier_binary": ("LinearClassifier", [("x", F, [3, 4])], 2, {"x": x}, dict(coefficients=[0.5] * 4, intercepts=[0.1], classlabels_strings=["ok", "worn"])),
  "svm_classifier": ("SVMClassifier", [("x", F, [3, 4])], 2, {"x": x}, dict(classlabels_ints=[0, 1, 2], coefficients=[1.0] * 6, support_vectors=[0.5] * 12, vectors_per_class=[1, 1, 1], rho=[0.1, 0.2, 0.3], kernel_type="RBF")),
  "svm_classifier_binary": ("SVMClassifier", [("x", F, [3, 4])], 2, {"x": x}, dict(classlabels_ints=[0, 1], coefficients=[1.0] * 2, support_vectors=[0.5] * 8, vectors_per_class=[1, 1], rho=[0.1], kernel_type="RBF")),
  "svm_regressor": ("SVMRegressor", [("x", F, [3, 4])], 1, {"x": x}, dict(coefficients=[1.0], support_vectors=[0.5] * 4, n_supports=1, rho=[0.1], kernel_type="RBF")),
  "one_hot_encoder": ("OneHotEncoder", [("x", I, [3, 4])], 1, {"x": np.ones((3, 4), np.int64)}, dict(cats_int64s=[1, 2, 3])),
  "feature_vectorizer": ("FeatureVectorizer", [("a", F, [3, 2]), ("b", F, [3, 5])], 1, {"a": np.ones((3, 2), np.float32), "b": np.ones((3, 5), np.float32)}, dict(inputdimensions=[2, 5])),
  "array_feature_extractor": ("ArrayFeatureExtractor", [("x", F, [3, 4]), ("i", I, [2, 2])], 1, {"x": x, "i": np.array([[0, 1], [2, 3]], np.int64)}, {}),
  "imputer": ("Imputer", [("x", F, [3, 4])], 1, {"x": x}, dict(imputed_value_floats=[0.0], replaced_value_float=0.0)),
  "scaler": ("Scaler", [("x", F, [3, 4])], 1, {"x": x}, dict(offset=[0.5], scale=[2.0])),
  "normalizer": ("Normalizer", [("x", F, [3, 4])], 1, {"x": x}, dict(norm="L2")),
  "binarizer": ("Binarizer", [("x", F, [3, 4])], 1, {"x": x}, dict(threshold=0.5)),
  "label_encoder": ("LabelEncoder", [("x", S, [5])], 1, {"x": np.array(["a", "b", "c", "a", "z"], dtype=object)}, dict(keys_strings=["a", "b"], values_floats=[1.0, 2.0])),
  "tree_regressor": ("TreeEnsembleRegressor", [("x", F, [3, 4])], 1, {"x": x}, dict(tree, n_targets=2, target_ids=[0, 1, 0], target_nodeids=[1, 2, 0], target_treeids=[0, 0, 1], target_weights=[1.0, 2.0, 3.0])),
  "tree_classifier": ("TreeEnsembleClassifier", [("x", F, [3, 4])], 2, {"x": x}, dict(tree, classlabels_strings=["low", "mid", "high"], class_ids=[0, 1, 2], class_nodeids=[1, 2, 0], class_treeids=[0, 0, 1], class_weights=[1.0, 1.0, 1.0])),
}
result = {}
for name, (op, inputs, n_out, feeds, attrs) in cases.items():
    outs = [f"y{i}" for i in range(n_out)]
    node = h.make_node(op, [i[0] for i in inputs], outs, domain="ai.onnx.ml", **attrs)
    g = h.make_graph([node], name, [h.make_tensor_value_info(n, t, s) for n, t, s in inputs],
                     [h.make_value_info(o, onnx.TypeProto()) for o in outs])
    m = h.make_model(g, opset_imports=[h.make_opsetid("", 17), h.make_opsetid("ai.onnx.ml", 3)])
    path = os.path.join(out_dir, name + ".onnx")
    onnx.save(m, path)
    got = ReferenceEvaluator(m).run(None, feeds)
    kind = lambda a: "string" if a.dtype.kind in "OU" else str(a.dtype)
    result[name] = [[list(a.shape), kind(a)] for a in got]
print(json.dumps(result))
"#;

/// ONNX-ML ops: every output's shape and element type must be the ones the `onnx` package's
/// reference evaluator computes (ONNX-ML operator specification), also for the cases where the
/// spec's text is silent: a single example's LinearRegressor (`[targets]`), two-class scores
/// (one column per class label), and indices of rank 2 (ArrayFeatureExtractor, all of them on
/// the last axis).
#[test]
fn ml_ops_agree_with_the_onnx_reference_evaluator() {
    if !python_onnx("ml_ops_agree_with_the_onnx_reference_evaluator") {
        return;
    }
    let dir = tempfile::tempdir().expect("tmp");
    let reference: BTreeMap<String, Vec<(Vec<u64>, String)>> =
        serde_json::from_str(&python(ML_MODELS, &[dir.path().to_str().expect("utf8")])).expect("json");
    assert_eq!(reference.len(), 17);
    for (name, expected) in &reference {
        let read = read_known(&dir.path().join(format!("{name}.onnx")));
        let g = &read.model.graph;
        let ours: Vec<(Vec<u64>, String)> = g
            .outputs
            .iter()
            .map(|&o| {
                let f = &g.value(o).fact;
                let shape = f
                    .shape
                    .concrete()
                    .unwrap_or_else(|| panic!("{name}: {} unsized", f.shape));
                (shape, f.dtype.map_or("?", |d| d.name()).to_string())
            })
            .collect();
        assert_eq!(&ours, expected, "{name}");
    }
}

/// Builds DictVectorizer and CastMap models over map inputs and prints, per model, the
/// output's element type from the `onnx` package's shape inference (strict mode) and, for
/// DictVectorizer, the output shape its reference evaluator computes on a small map.
const MAP_MODELS: &str = r#"
import sys, json, os, onnx, numpy as np
from onnx import helper as h, TensorProto as T
from onnx.reference import ReferenceEvaluator
out_dir = sys.argv[1]
cases = {
  "dict_int_keys": ("DictVectorizer", T.INT64, T.FLOAT, dict(int64_vocabulary=[1, 2, 3, 7]), {1: 2.0, 7: 4.0}),
  "dict_string_keys": ("DictVectorizer", T.STRING, T.INT64, dict(string_vocabulary=["a", "b"]), {"a": np.int64(2)}),
  "cast_dense": ("CastMap", T.INT64, T.FLOAT, dict(cast_to="TO_INT64"), None),
  "cast_sparse": ("CastMap", T.INT64, T.STRING, dict(cast_to="TO_STRING", map_form="SPARSE", max_map=5), None),
}
result = {}
for name, (op, key, value, attrs, feed) in cases.items():
    node = h.make_node(op, ["m"], ["y"], domain="ai.onnx.ml", **attrs)
    m_type = h.make_map_type_proto(key, h.make_tensor_type_proto(value, None))
    g = h.make_graph([node], name, [h.make_value_info("m", m_type)], [h.make_value_info("y", onnx.TypeProto())])
    m = h.make_model(g, opset_imports=[h.make_opsetid("", 17), h.make_opsetid("ai.onnx.ml", 3)])
    onnx.save(m, os.path.join(out_dir, name + ".onnx"))
    elem = onnx.shape_inference.infer_shapes(m, strict_mode=True).graph.output[0].type.tensor_type.elem_type
    shape = list(ReferenceEvaluator(m).run(None, {"m": feed})[0].shape) if feed is not None else None
    result[name] = [elem, shape]
print(json.dumps(result))
"#;

/// ONNX-ML ops over maps. DictVectorizer: a tensor as long as its vocabulary (the shape the
/// `onnx` package's reference evaluator computes), of the map's value type (its shape
/// inference). CastMap: the element type `cast_to` names (shape inference); the length is
/// the map's (DENSE, decided by the data: a symbolic `entries@node`) or `max_map` (SPARSE), in
/// the `[1, n]` layout tilecut gives from memory of runtimes (the specification gives no rank).
#[test]
fn map_ops_agree_with_the_onnx_package() {
    if !python_onnx("map_ops_agree_with_the_onnx_package") {
        return;
    }
    let dir = tempfile::tempdir().expect("tmp");
    let reference: BTreeMap<String, (i32, Option<Vec<u64>>)> =
        serde_json::from_str(&python(MAP_MODELS, &[dir.path().to_str().expect("utf8")])).expect("json");
    assert_eq!(reference.len(), 4);
    for (name, (elem, shape)) in &reference {
        let read = read_known(&dir.path().join(format!("{name}.onnx")));
        let g = &read.model.graph;
        let f = &g.value(g.outputs[0]).fact;
        assert_eq!(f.dtype.map(|d| d.onnx_code()), Some(*elem), "{name}");
        match shape {
            Some(s) => assert_eq!(f.shape.concrete().as_ref(), Some(s), "{name}"),
            None => {
                let dims = f.shape.dims().unwrap_or_else(|| panic!("{name}: unranked"));
                assert_eq!(dims[0], Dim::Known(1), "{name}");
                let want = if name == "cast_dense" {
                    Dim::sym(&format!(
                        "entries@{}",
                        g.node(g.value(g.outputs[0]).producer.expect("made")).name
                    ))
                } else {
                    Dim::Known(5)
                };
                assert_eq!(dims[1], want, "{name}");
            }
        }
    }
}

/// Random single-op models (shapes and attributes drawn at random, for the ops of vision,
/// audio, transformer and quantized models) and random op chains over x[1, C, H, W] with H and
/// W symbolic and exporter-style shape arithmetic, random sequence chains over x[B, S, D], and
/// models with a Loop, Scan, If or a sequence, drawn by `tests/py/random_ops.py`. Where the
/// `onnx` package's two references, its reference evaluator running the model and its shape
/// inference, agree (or shape inference leaves an output open), tilecut must infer exactly the
/// evaluator's output shapes and element types, the chains' H and W fixed as `--dim` fixes
/// them. Where they disagree on a single-op model, tilecut must give one of their answers (or
/// the specification text's, where both deviate from it); the script says which cases.
#[test]
fn random_ops_and_chains_agree_with_the_onnx_references() {
    if !python_onnx("random_ops_and_chains_agree_with_the_onnx_references") {
        return;
    }
    // `TC_SEED` and `TC_ROUNDS` (a multiple of the default counts) widen a local search.
    let env = |name: &str, default: u64| std::env::var(name).ok().and_then(|v| v.parse().ok()).unwrap_or(default);
    let (seed, rounds) = (env("TC_SEED", 20261204), env("TC_ROUNDS", 1));
    let dir = tempfile::tempdir().expect("tmp");
    let out = python(
        include_str!("py/random_ops.py"),
        &[
            dir.path().to_str().expect("utf8"),
            &seed.to_string(),
            &(1600 * rounds).to_string(),
            &(240 * rounds).to_string(),
        ],
    );
    let drawn: serde_json::Value = serde_json::from_str(&out).expect("json");
    let cases = drawn["cases"].as_array().expect("cases");
    let mut failures = Vec::new();
    let (mut outputs, mut expressions) = (0, 0);
    for case in cases {
        let file = case["file"].as_str().expect("file");
        let mut overrides = tilecut::import::Overrides::default();
        for (k, v) in case["dims"].as_object().expect("dims") {
            overrides.add_dim(&format!("{k}={v}")).expect("dim");
        }
        let read = match tilecut::read_model(&dir.path().join(file), &overrides) {
            Ok(r) => r,
            Err(e) => {
                failures.push(format!("{file}: {e}"));
                continue;
            }
        };
        let g = &read.model.graph;
        let ours: Vec<(Option<Vec<u64>>, &str)> = g
            .outputs
            .iter()
            .map(|&o| {
                let fact = &g.value(o).fact;
                (fact.shape.concrete(), fact.dtype.map_or("?", |d| d.name()))
            })
            .collect();
        let expected = |outputs: &serde_json::Value| -> Vec<(Option<Vec<u64>>, String)> {
            outputs
                .as_array()
                .expect("outputs")
                .iter()
                .map(|o| {
                    let dims = o[0].as_array().expect("shape").iter().map(|d| d.as_u64().expect("dim"));
                    (Some(dims.collect()), o[1].as_str().expect("dtype").to_string())
                })
                .collect()
        };
        let matches = |want: &[(Option<Vec<u64>>, String)]| {
            want.len() == ours.len() && want.iter().zip(&ours).all(|(w, o)| w.0 == o.0 && w.1 == o.1)
        };
        outputs += ours.len();
        let mut accepted = vec![expected(&case["outputs"])];
        if let Some(alternatives) = case.get("alternatives").and_then(|a| a.as_array()) {
            accepted.extend(alternatives.iter().map(expected));
        }
        if !accepted.iter().any(|want| matches(want)) {
            failures.push(format!(
                "{file} {}: tilecut {ours:?}, accepted {accepted:?}",
                case["dims"]
            ));
        }
        // A chain read with H and W left open: what tilecut writes as an expression of them
        // must come out at this size as the evaluator's dim does; what it leaves unknown is
        // not checked here.
        let fixed: Vec<(&str, u64)> = case["dims"]
            .as_object()
            .expect("dims")
            .iter()
            .map(|(k, v)| (k.as_str(), v.as_u64().expect("size")))
            .collect();
        if fixed.is_empty() {
            continue;
        }
        let open = tilecut::read_model(&dir.path().join(file), &Default::default()).expect("reads");
        let g = &open.model.graph;
        let dims = g
            .value(g.outputs[0])
            .fact
            .shape
            .dims()
            .map(<[Dim]>::to_vec)
            .unwrap_or_default();
        let want = &accepted[0][0].0;
        for (k, d) in dims.iter().enumerate() {
            let Some(at) = size_at(d, &fixed) else { continue };
            expressions += usize::from(matches!(d, Dim::Sym(_)));
            if Some(at) != want.as_ref().and_then(|w| w.get(k).copied()) {
                failures.push(format!(
                    "{file} open: dim {k} `{d}` is {at} at {fixed:?}, reference {want:?}"
                ));
            }
        }
    }
    println!(
        "random ops and chains: {} cases, {outputs} outputs, {expressions} dims written as expressions of the open sizes, {} failures; {}",
        cases.len(),
        failures.len(),
        drawn["counts"]
    );
    assert!(failures.is_empty(), "{failures:#?}");
    assert!(cases.len() as u64 >= 1500 * rounds, "only {} cases drawn", cases.len());
}

/// Reshape's -1 beside dims copied by 0: a copied dim is the input's dim at the same place,
/// so the two cancel even where that dim is unknown (an attention head merge, `[B, ?, 2, 4]`
/// to `[0, 0, -1]`, after a slice whose length is a `min` with the sequence). The `onnx`
/// package's shape inference gives the same dims.
#[test]
fn reshape_infers_minus_one_past_unknown_copied_dims_as_onnx_shape_inference_does() {
    if !python_onnx("reshape_infers_minus_one_past_unknown_copied_dims_as_onnx_shape_inference_does") {
        return;
    }
    let dir = tempfile::tempdir().expect("tmp");
    let script = r#"
import sys, json, onnx, numpy as np
from onnx import helper, numpy_helper
shapes = {"heads": [0, 0, -1], "front": [-1, 0, 0], "keep_last": [0, -1, 4]}
res = {}
for name, target in shapes.items():
    x = helper.make_tensor_value_info("x", 1, ["B", None, 2, 4])
    y = helper.make_tensor_value_info("y", 1, None)
    t = numpy_helper.from_array(np.array(target, np.int64), "t")
    m = helper.make_model(helper.make_graph([helper.make_node("Reshape", ["x", "t"], ["y"])], "g", [x], [y], [t]),
                          opset_imports=[helper.make_opsetid("", 17)])
    p = sys.argv[1] + "/" + name + ".onnx"
    onnx.save(m, p)
    out = onnx.shape_inference.infer_shapes(m, strict_mode=True).graph.output[0].type.tensor_type.shape.dim
    res[name] = [d.dim_value if d.HasField("dim_value") else None for d in out]
print(json.dumps(res))
"#;
    let reference: BTreeMap<String, Vec<Option<u64>>> =
        serde_json::from_str(&python(script, &[dir.path().to_str().expect("utf8")])).expect("json");
    assert_eq!(reference["heads"], [None, None, Some(8)], "the reference's own answer");
    for (name, theirs) in &reference {
        let read = tilecut::read_model(&dir.path().join(format!("{name}.onnx")), &Default::default()).expect("reads");
        let g = &read.model.graph;
        let ours: Vec<Option<u64>> = g
            .value(g.outputs[0])
            .fact
            .shape
            .dims()
            .expect("rank")
            .iter()
            .map(Dim::known)
            .collect();
        assert_eq!(&ours, theirs, "{name}");
    }
}

/// Builds two models into argv[1]: `contrib.onnx`, one node per case of the contrib domain
/// (argv[2]), and `twin.onnx`, the same case written with standard ops, which the `onnx`
/// package's reference evaluator runs. Prints the twin's output shapes by name.
const CONTRIB_TWINS: &str = r#"
import sys, os, json, onnx, numpy as np
from onnx import helper as h, TensorProto as T, numpy_helper as nh
from onnx.reference import ReferenceEvaluator
out_dir, contrib = sys.argv[1], sys.argv[2]
rng = np.random.default_rng(7)
feeds, inputs, inits_c, inits_t, nodes_c, nodes_t, outs = {}, [], [], [], [], [], []
def data(name, shape, dtype=np.float32):
    a = rng.integers(-3, 4, size=shape).astype(dtype)
    feeds[name] = a
    inputs.append(h.make_tensor_value_info(name, nh.helper.np_dtype_to_tensor_dtype(a.dtype), shape))
def const(name, arr, both=True):
    inits_c.append(nh.from_array(np.asarray(arr), name))
    if both:
        inits_t.append(nh.from_array(np.asarray(arr), name))
def case(out, c_node, t_nodes):
    nodes_c.append(c_node); nodes_t.extend(t_nodes); outs.append(out)
def c(op, ins, out, **kw):
    return h.make_node(op, ins, [out], domain=contrib, name="c_" + out, **kw)
t = h.make_node

data("x", [2, 3, 5])
# Pad: pads as input, 2·rank values or [1, 2·rank].
const("pads", np.array([0, 1, 2, 0, 3, 1], np.int64))
case("pad", c("Pad", ["x", "pads"], "pad"), [t("Pad", ["x", "pads"], ["pad"])])
const("pads_row", np.array([[1, 0, 0, 1, 2, 0]], np.int64), both=False)
const("pads_flat", np.array([1, 0, 0, 1, 2, 0], np.int64), both=False)
inits_t.append(nh.from_array(np.array([1, 0, 0, 1, 2, 0], np.int64), "pads_row"))
case("pad_row", c("Pad", ["x", "pads_row"], "pad_row"), [t("Pad", ["x", "pads_row"], ["pad_row"])])
# ExpandDims: Unsqueeze at one axis, negative from the output's end.
const("ax_last", np.array(-1, np.int32), both=False)
const("ax_one", np.array(1, np.int32), both=False)
const("u_last", np.array([-1], np.int64), both=False); inits_t.append(nh.from_array(np.array([-1], np.int64), "u_last"))
inits_t.append(nh.from_array(np.array([1], np.int64), "u_one"))
case("ed_last", c("ExpandDims", ["x", "ax_last"], "ed_last"), [t("Unsqueeze", ["x", "u_last"], ["ed_last"])])
case("ed_one", c("ExpandDims", ["x", "ax_one"], "ed_one"), [t("Unsqueeze", ["x", "u_one"], ["ed_one"])])
# GatherND.
data("table", [4, 5, 6])
const("nd_idx", np.array([[0, 1], [3, 4], [2, 2]], np.int64))
case("gnd", c("GatherND", ["table", "nd_idx"], "gnd"), [t("GatherND", ["table", "nd_idx"], ["gnd"])])
# Range, with the step left out (1) and given.
const("r_start", np.array(2, np.int64)); const("r_limit", np.array(11, np.int64)); const("r_step", np.array(3, np.int64))
inits_t.append(nh.from_array(np.array(1, np.int64), "r_one"))
case("range1", c("Range", ["r_start", "r_limit"], "range1"), [t("Range", ["r_start", "r_limit", "r_one"], ["range1"])])
case("range3", c("Range", ["r_start", "r_limit", "r_step"], "range3"), [t("Range", ["r_start", "r_limit", "r_step"], ["range3"])])
# MaxpoolWithMask: MaxPool over X (the mask only zeroes values).
data("img", [1, 2, 9, 9])
data("mask", [1, 2, 9, 9], np.int32)
pool = dict(kernel_shape=[3, 3], strides=[2, 2], pads=[1, 1, 1, 1])
case("mpm", c("MaxpoolWithMask", ["img", "mask"], "mpm", **pool), [t("MaxPool", ["img"], ["mpm"], **pool)])
# NhwcFusedConv: Conv on the channels-first view, back to channels last.
data("nhwc", [1, 9, 9, 4])
const("cw", rng.standard_normal((6, 4, 3, 3)).astype(np.float32))
conv = dict(strides=[2, 2], pads=[1, 1, 1, 1])
case("nfc", c("NhwcFusedConv", ["nhwc", "cw"], "nfc", activation="Relu", **conv),
     [t("Transpose", ["nhwc"], ["nchw"], perm=[0, 3, 1, 2]), t("Conv", ["nchw", "cw"], ["nfc_t"], **conv),
      t("Transpose", ["nfc_t"], ["nfc"], perm=[0, 2, 3, 1])])
# GemmFastGelu: MatMul plus bias, then Gelu (shape of the MatMul).
data("tok", [2, 3, 8])
const("gw", rng.standard_normal((8, 5)).astype(np.float32)); const("gb", np.zeros(5, np.float32))
case("gfg", c("GemmFastGelu", ["tok", "gw", "gb"], "gfg"), [t("MatMul", ["tok", "gw"], ["gmm"]), t("Add", ["gmm", "gb"], ["gfg"])])
# MatMulInteger16 and MulInteger: the products' shapes (int32 per the contrib documentation).
data("a16", [3, 4], np.int16); data("b16", [2, 4, 2], np.int16)
case("mmi16", c("MatMulInteger16", ["a16", "b16"], "mmi16"),
     [t("Cast", ["a16"], ["a16f"], to=T.FLOAT), t("Cast", ["b16"], ["b16f"], to=T.FLOAT), t("MatMul", ["a16f", "b16f"], ["mmi16"])])
data("ma", [3, 1, 4], np.int32); data("mb", [2, 1], np.int32)
case("muli", c("MulInteger", ["ma", "", "mb"], "muli"), [t("Mul", ["ma", "mb"], ["muli"])])
# ReduceSumInteger: axes as an attribute.
data("rs", [3, 4, 5], np.int32)
inits_t.append(nh.from_array(np.array([1], np.int64), "rs_axes"))
case("rsi", c("ReduceSumInteger", ["rs"], "rsi", axes=[1], keepdims=0), [t("ReduceSum", ["rs", "rs_axes"], ["rsi"], keepdims=0)])
# BiasSoftmax: softmax of data + bias.
data("sc", [2, 3, 4]); data("sb", [2, 3, 4])
case("bsm", c("BiasSoftmax", ["sc", "sb"], "bsm", axis=-1), [t("Add", ["sc", "sb"], ["bsum"]), t("Softmax", ["bsum"], ["bsm"], axis=-1)])
# ComplexMul: the broadcast of two [..., 2] tensors.
data("za", [3, 1, 2]); data("zb", [4, 2])
case("cmul", c("ComplexMul", ["za", "zb"], "cmul"), [t("Mul", ["za", "zb"], ["cmul"])])
# CDist: distances between rows, [M, N].
data("ca", [3, 4]); data("cb", [5, 4])
inits_t.append(nh.from_array(np.array([1], np.int64), "one_ax")); inits_t.append(nh.from_array(np.array([0], np.int64), "zero_ax"))
inits_t.append(nh.from_array(np.array([-1], np.int64), "last_ax"))
case("cdist", c("CDist", ["ca", "cb"], "cdist", metric="euclidean"),
     [t("Unsqueeze", ["ca", "one_ax"], ["ca3"]), t("Unsqueeze", ["cb", "zero_ax"], ["cb3"]), t("Sub", ["ca3", "cb3"], ["cd"]),
      t("Mul", ["cd", "cd"], ["cd2"]), t("ReduceSum", ["cd2", "last_ax"], ["cds"], keepdims=0), t("Sqrt", ["cds"], ["cdist"])])
# CropAndResize: RoiAlign's output, [R, C, crop_h, crop_w].
data("fm", [1, 3, 8, 8])
const("rois", np.array([[0, 0, 4, 4], [1, 1, 7, 7]], np.float32)); const("bidx", np.array([0, 0], np.int64))
const("crop", np.array([4, 5], np.int32), both=False)
case("car", c("CropAndResize", ["fm", "rois", "bidx", "crop"], "car"),
     [t("RoiAlign", ["fm", "rois", "bidx"], ["car"], output_height=4, output_width=5)])
# FusedMatMul: A stored [M, batch, K] with transBatchA; transA and transB; TransposeMatMul.
data("fa", [4, 2, 3]); data("fb", [2, 3, 5])
case("fmm_batch", c("FusedMatMul", ["fa", "fb"], "fmm_batch", transBatchA=1),
     [t("Transpose", ["fa"], ["fa_t"], perm=[1, 0, 2]), t("MatMul", ["fa_t", "fb"], ["fmm_batch"])])
data("ta", [2, 3, 4]); data("tb", [2, 5, 3])
case("fmm_t", c("FusedMatMul", ["ta", "tb"], "fmm_t", transA=1, transB=1),
     [t("Transpose", ["ta"], ["ta_t"], perm=[0, 2, 1]), t("Transpose", ["tb"], ["tb_t"], perm=[0, 2, 1]),
      t("MatMul", ["ta_t", "tb_t"], ["fmm_t"])])
data("pb", [5, 8])
case("tmm", c("TransposeMatMul", ["tok", "pb"], "tmm", transB=1),
     [t("Transpose", ["pb"], ["pb_t"], perm=[1, 0]), t("MatMul", ["tok", "pb_t"], ["tmm"])])
# MultiHeadAttention over projected inputs: the standard Attention (opset 23) with as many
# key as query heads, past key and value in front of the new ones; outputs in the same order.
data("mq", [2, 3, 8]); data("mk", [2, 5, 8]); data("mv", [2, 5, 12])
data("mpk", [2, 2, 4, 4]); data("mpv", [2, 2, 4, 6])
nodes_c.append(h.make_node("MultiHeadAttention", ["mq", "mk", "mv", "", "", "", "mpk", "mpv"],
                           ["mha", "mha_pk", "mha_pv"], domain=contrib, name="c_mha", num_heads=2))
nodes_t.append(h.make_node("Attention", ["mq", "mk", "mv", "", "mpk", "mpv"], ["mha", "mha_pk", "mha_pv"],
                           q_num_heads=2, kv_num_heads=2))
outs.extend(["mha", "mha_pk", "mha_pv"])
# A cross-attention cache as the key and value ([B, N, L, H]), used as it is.
data("ck", [2, 2, 7, 4]); data("cv", [2, 2, 7, 6])
nodes_c.append(h.make_node("MultiHeadAttention", ["mq", "ck", "cv"], ["mha_x"], domain=contrib, name="c_mha_x", num_heads=2))
# The standard Attention takes the query in the same form as the key: [B, N, S, H], and
# gives [B, N, S, Hv] back, here brought to [B, S, N·Hv].
inits_t.append(nh.from_array(np.array([2, 3, 2, 4], np.int64), "q4_shape"))
inits_t.append(nh.from_array(np.array([2, 3, 12], np.int64), "y3_shape"))
nodes_t.extend([t("Reshape", ["mq", "q4_shape"], ["mq4"]), t("Transpose", ["mq4"], ["mq4t"], perm=[0, 2, 1, 3]),
                h.make_node("Attention", ["mq4t", "ck", "cv"], ["mha_x4"]),
                t("Transpose", ["mha_x4"], ["mha_x4t"], perm=[0, 2, 1, 3]), t("Reshape", ["mha_x4t", "y3_shape"], ["mha_x"])])
outs.append("mha_x")
# Attention with its projection and a past of keys and values stacked [2, B, N, P, H]: the
# projection, split into Q, K and V, then the standard Attention with the two halves of the
# past; the present stacked the same way.
data("ax", [2, 3, 8]); data("apast", [2, 2, 2, 4, 4])
const("aw", rng.standard_normal((8, 24)).astype(np.float32)); const("ab", np.zeros(24, np.float32))
inits_t.append(nh.from_array(np.array([8, 8, 8], np.int64), "qkv_split"))
inits_t.append(nh.from_array(np.array([0], np.int64), "ax0"))
nodes_c.append(h.make_node("Attention", ["ax", "aw", "ab", "", "apast"], ["att", "att_present"],
                           domain=contrib, name="c_att", num_heads=2, unidirectional=1))
nodes_t.extend([t("MatMul", ["ax", "aw"], ["axw"]), t("Add", ["axw", "ab"], ["axwb"]),
                t("Split", ["axwb", "qkv_split"], ["aq", "ak", "av"], axis=-1),
                t("Split", ["apast"], ["apk5", "apv5"], axis=0, num_outputs=2),
                t("Squeeze", ["apk5", "ax0"], ["apk"]), t("Squeeze", ["apv5", "ax0"], ["apv"]),
                h.make_node("Attention", ["aq", "ak", "av", "", "apk", "apv"], ["att", "apres_k", "apres_v"],
                            q_num_heads=2, kv_num_heads=2),
                t("Unsqueeze", ["apres_k", "ax0"], ["apk_u"]), t("Unsqueeze", ["apres_v", "ax0"], ["apv_u"]),
                t("Concat", ["apk_u", "apv_u"], ["att_present"], axis=0)])
outs.extend(["att", "att_present"])

def save(name, nodes, inits, opsets):
    g = h.make_graph(nodes, name, inputs, [h.make_tensor_value_info(o, 0, None) for o in outs], inits)
    m = h.make_model(g, opset_imports=opsets)
    onnx.save(m, os.path.join(out_dir, name + ".onnx"))
    return m
save("contrib", nodes_c, inits_c, [h.make_opsetid("", 23), h.make_opsetid(contrib, 1)])
twin = save("twin", nodes_t, inits_t, [h.make_opsetid("", 23)])
res = ReferenceEvaluator(twin).run(None, feeds)
print(json.dumps({o: list(r.shape) for o, r in zip(outs, res)}))
"#;

/// Contrib-domain ops that are a standard op in another form (Pad, ExpandDims as Unsqueeze,
/// GatherND, Range with its step left out, MaxpoolWithMask as MaxPool, NhwcFusedConv as Conv
/// between two transposes, GemmFastGelu and TransposeMatMul/FusedMatMul as MatMul after the
/// transposes their attributes name, the integer products, ReduceSumInteger, BiasSoftmax,
/// ComplexMul, CDist as a reduction of differences, CropAndResize as RoiAlign, and the
/// attention ops over the standard Attention of opset 23: MultiHeadAttention with a past and
/// with a cross-attention cache, Attention with its projection and stacked past): tilecut's
/// shape of each contrib node equals the output shape the `onnx` package's reference
/// evaluator computes for its standard twin on the same inputs. Which twin each op has, its
/// slots and attributes are from the contrib domain's documentation (from memory).
#[test]
fn contrib_ops_take_the_shapes_of_their_standard_twins() {
    if !python_onnx("contrib_ops_take_the_shapes_of_their_standard_twins") {
        return;
    }
    let dir = tempfile::tempdir().expect("tmp");
    let d = dir.path().to_str().expect("utf8");
    let out = python(CONTRIB_TWINS, &[d, tilecut::ops::CONTRIB_DOMAIN]);
    let reference: BTreeMap<String, Vec<u64>> = serde_json::from_str(&out).expect("json");
    assert_eq!(reference.len(), 26, "{reference:?}");
    let (code, out, err) = run(&["inspect", &format!("{d}/contrib.onnx"), "--format", "json"]);
    assert_eq!(code, 0, "{err}");
    let j: serde_json::Value = serde_json::from_str(&out).expect("json");
    let warnings = j["warnings"].to_string();
    assert!(
        !warnings.contains("op-unknown") && !warnings.contains("shape-failed"),
        "{warnings}"
    );
    let tensors = j["tensors"].as_array().expect("tensors");
    for (name, want) in &reference {
        let t = tensors
            .iter()
            .find(|t| t["name"] == name.as_str())
            .unwrap_or_else(|| panic!("{name} missing"));
        let got: Vec<u64> = t["shape"]
            .as_array()
            .unwrap_or_else(|| panic!("{name}: shape unknown"))
            .iter()
            .map(|x| x.as_u64().unwrap_or_else(|| panic!("{name}: dim {x}")))
            .collect();
        assert_eq!(&got, want, "{name}");
    }
    // The integer products are int32 (contrib documentation, from memory).
    for name in ["mmi16", "muli", "rsi"] {
        let t = tensors.iter().find(|t| t["name"] == name).expect("tensor");
        assert_eq!(t["dtype"], "int32", "{name}");
    }
}
