//! Shape and type inference checked against the ONNX project's backend conformance models
//! (`tests/onnx-node/`, Apache-2.0, provenance in its README). Each model's graph outputs
//! declare element type and shape; we strip those declarations (and all value_info) before
//! inference, so the check cannot pass by reading the answer back from the file.

use std::path::{Path, PathBuf};

use bytes::Bytes;
use prost::Message;
use tilecut::ir::{Dim, Fact};
use tilecut::onnx::{self, ModelProto};

fn models() -> Vec<PathBuf> {
    let dir = Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/onnx-node");
    let mut v: Vec<PathBuf> = std::fs::read_dir(&dir)
        .expect("tests/onnx-node exists")
        .map(|e| e.expect("dir entry").path())
        .filter(|p| p.extension().is_some_and(|e| e == "onnx"))
        .collect();
    v.sort();
    v
}

/// The declared output facts, and the model with them stripped.
fn strip(bytes: &[u8]) -> Option<(ModelProto, Vec<Option<onnx::TypeProto>>)> {
    let mut m = ModelProto::decode(Bytes::copy_from_slice(bytes)).ok()?;
    let g = m.graph.as_mut()?;
    let declared = g.output.iter_mut().map(|o| o.r#type.take()).collect();
    g.value_info.clear();
    Some((m, declared))
}

fn declared_fact(t: &onnx::TypeProto) -> Option<(i32, Vec<Option<i64>>)> {
    use onnx::tensor_shape_proto::dimension::Value as D;
    use onnx::type_proto::Value as T;
    match &t.value {
        Some(T::TensorType(tt)) => {
            let dims = tt
                .shape
                .as_ref()?
                .dim
                .iter()
                .map(|d| match d.value {
                    Some(D::DimValue(v)) => Some(v),
                    _ => None,
                })
                .collect();
            Some((tt.elem_type, dims))
        }
        _ => None,
    }
}

enum Outcome {
    Agree,
    Unknown,
    Disagree(String),
}

fn compare(inferred: &Fact, declared: &(i32, Vec<Option<i64>>)) -> Outcome {
    let Some(dt) = inferred.dtype else {
        return Outcome::Unknown;
    };
    let Some(dims) = inferred.shape.dims() else {
        return Outcome::Unknown;
    };
    if dims.iter().any(|d| !matches!(d, Dim::Known(_))) || declared.1.iter().any(Option::is_none) {
        // A symbolic or unknown inferred dim is "not known", never counted as agreement.
        return if dims.len() == declared.1.len() && dt.onnx_code() == declared.0 {
            Outcome::Unknown
        } else {
            Outcome::Disagree(format!("rank/type {dt} {} vs {:?}", inferred.shape, declared))
        };
    }
    let ours: Vec<Option<i64>> = dims.iter().map(|d| d.known().map(|v| v as i64)).collect();
    if dt.onnx_code() == declared.0 && ours == declared.1 {
        Outcome::Agree
    } else {
        Outcome::Disagree(format!(
            "inferred {dt} {} but declared type {} dims {:?}",
            inferred.shape, declared.0, declared.1
        ))
    }
}

/// A declared output type: a tensor (its element type, and its dims when the declaration
/// has a shape), or a sequence or optional of one (ONNX IR: `TypeProto.sequence_type` and
/// `optional_type`, whose `elem_type` is itself a `TypeProto`).
enum Declared {
    Tensor(i32, Option<Vec<Option<i64>>>),
    Sequence(Box<Declared>),
    Optional(Box<Declared>),
}

fn declared_value(t: &onnx::TypeProto) -> Option<Declared> {
    use onnx::type_proto::Value as T;
    match &t.value {
        Some(T::TensorType(tt)) => Some(match declared_fact(t) {
            Some((dt, dims)) => Declared::Tensor(dt, Some(dims)),
            None => Declared::Tensor(tt.elem_type, None),
        }),
        Some(T::SequenceType(s)) => Some(Declared::Sequence(Box::new(declared_value(s.elem_type.as_deref()?)?))),
        Some(T::OptionalType(o)) => Some(Declared::Optional(Box::new(declared_value(o.elem_type.as_deref()?)?))),
        _ => None,
    }
}

/// `compare`, through sequences and optionals: the inferred value must be the same kind of
/// container, and its element (a sequence's fact for every element) must agree with the
/// declared element. A tensor declared without a shape is compared by element type alone.
fn compare_value(inferred: &Fact, declared: &Declared) -> Outcome {
    use tilecut::ir::ValueType;
    // Nothing inferred at all (the default fact) is unknown, whatever the declaration.
    if inferred.value_type == ValueType::Tensor && inferred.dtype.is_none() && inferred.shape.rank().is_none() {
        return Outcome::Unknown;
    }
    match (declared, &inferred.value_type) {
        (Declared::Tensor(dt, Some(dims)), ValueType::Tensor) => compare(inferred, &(*dt, dims.clone())),
        (Declared::Tensor(dt, None), ValueType::Tensor) => match inferred.dtype {
            None => Outcome::Unknown,
            Some(ours) if ours.onnx_code() == *dt => Outcome::Agree,
            Some(ours) => Outcome::Disagree(format!("inferred element type {ours} but declared type {dt}")),
        },
        (Declared::Sequence(e), ValueType::Sequence(s)) => compare_value(&s.element, e),
        (Declared::Optional(e), ValueType::Optional(inner)) => compare_value(inner, e),
        (_, kind) => Outcome::Disagree(format!("inferred a value of kind {kind:?}, declared another kind")),
    }
}

#[test]
fn inference_reproduces_declared_output_shapes_of_conformance_models() {
    let (mut agree, mut unknown, mut skipped) = (0usize, 0usize, 0usize);
    let mut failures = Vec::new();
    for path in models() {
        let name = path.file_name().and_then(|n| n.to_str()).unwrap_or("").to_string();
        let bytes = std::fs::read(&path).expect("readable");
        let Some((stripped, declared)) = strip(&bytes) else {
            skipped += 1;
            continue;
        };
        let model = match infer_stripped(&path, &stripped, &Default::default()) {
            Ok(m) => m,
            Err(e) => {
                failures.push(format!("{name}: {e}"));
                continue;
            }
        };
        for (k, d) in declared.iter().enumerate() {
            let Some(decl) = d.as_ref().and_then(declared_value) else {
                skipped += 1;
                continue;
            };
            let id = model.graph.outputs[k];
            match compare_value(&model.graph.value(id).fact, &decl) {
                Outcome::Agree => agree += 1,
                Outcome::Unknown => unknown += 1,
                Outcome::Disagree(why) => failures.push(format!("{name} output {k}: {why}")),
            }
        }
    }
    println!("conformance models: {agree} outputs agree, {unknown} left unknown, {skipped} without a declared tensor, sequence or optional type, {} disagree", failures.len());
    for f in &failures {
        println!("  {f}");
    }
    assert!(
        failures.is_empty(),
        "{} outputs disagree with the ONNX conformance declarations",
        failures.len()
    );
    // A floor, so that a regression that turns known shapes into unknown ones fails too.
    assert!(agree >= 1870, "only {agree} outputs agree");
}

/// The stripped model read, imported with `overrides` and inferred.
fn infer_stripped(
    path: &Path,
    stripped: &ModelProto,
    overrides: &tilecut::Overrides,
) -> Result<tilecut::ir::Model, String> {
    let encoded = Bytes::from(stripped.encode_to_vec());
    let folder = path.parent().expect("folder").canonicalize().expect("canonical");
    let loaded = tilecut::onnx::load::decode(path, encoded, folder).map_err(|e| format!("decode failed: {e}"))?;
    let (mut model, mut diags) =
        tilecut::import::import(&loaded, overrides).map_err(|e| format!("import failed: {e}"))?;
    tilecut::infer::infer(&mut model, &mut diags);
    Ok(model)
}

/// Conformance models whose output size comes from an input's value, not its shape: with
/// the declarations stripped the output is not known, and once the value is given (as
/// `--value` gives it) inference must reproduce the declared output. The values follow from
/// the declared output by the ONNX operator specification: AffineGrid's `size` is (N, C, H, W)
/// or (N, C, D, H, W) and its grid [N, H, W, 2] or [N, D, H, W, 3] (C does not appear in it;
/// 3 is used); a window op's output has `size` elements; CenterCropPad without `axes` gives a
/// tensor of dims `shape`. The expanded models reach the size through Split, an If with a
/// constant condition, Slice, Concat and ConstantOfShape (the function bodies in the spec).
#[test]
fn value_sized_models_reproduce_declared_outputs_once_the_value_is_given() {
    type FromDeclared = fn(&[i64]) -> Vec<i64>;
    let grid_2d: FromDeclared = |g| vec![g[0], 3, g[1], g[2]];
    let grid_3d: FromDeclared = |g| vec![g[0], 3, g[1], g[2], g[3]];
    let window: FromDeclared = |g| vec![g[0]];
    let crop: FromDeclared = |g| g.to_vec();
    let mut cases: Vec<(String, &str, FromDeclared)> = Vec::new();
    for stem in ["affine_grid_2d", "affine_grid_2d_align_corners"] {
        cases.push((format!("test_{stem}"), "size", grid_2d));
    }
    for stem in ["affine_grid_3d", "affine_grid_3d_align_corners"] {
        cases.push((format!("test_{stem}"), "size", grid_3d));
    }
    for kind in ["blackman", "hamming", "hann"] {
        for variant in ["", "_symmetric"] {
            cases.push((format!("test_{kind}window{variant}"), "x", window));
        }
    }
    for stem in [
        "center_crop_pad_crop",
        "center_crop_pad_pad",
        "center_crop_pad_crop_and_pad",
    ] {
        cases.push((format!("test_{stem}"), "shape", crop));
    }
    let dir = Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/onnx-node");
    let mut checked = 0;
    for (stem, input, from_declared) in &cases {
        for name in [format!("{stem}.onnx"), format!("{stem}_expanded.onnx")] {
            let path = dir.join(&name);
            let bytes = std::fs::read(&path).unwrap_or_else(|e| panic!("{name}: {e}"));
            let (stripped, declared) = strip(&bytes).expect("a model with a graph");
            let decl = declared[0]
                .as_ref()
                .and_then(declared_fact)
                .expect("a declared tensor output");
            let dims: Vec<i64> = decl.1.iter().map(|d| d.expect("declared dims are numbers")).collect();
            let output = |m: &tilecut::ir::Model| m.graph.value(m.graph.outputs[0]).fact.clone();

            let unfed = infer_stripped(&path, &stripped, &Default::default()).unwrap_or_else(|e| panic!("{name}: {e}"));
            assert!(
                matches!(compare(&output(&unfed), &decl), Outcome::Unknown),
                "{name}: the output is known without the value of `{input}`: {}",
                output(&unfed).shape
            );

            let mut overrides = tilecut::Overrides::default();
            let value: Vec<String> = from_declared(&dims).iter().map(i64::to_string).collect();
            overrides
                .add_value(&format!("{input}={}", value.join(",")))
                .expect("a valid --value");
            let fed = infer_stripped(&path, &stripped, &overrides).unwrap_or_else(|e| panic!("{name}: {e}"));
            match compare(&output(&fed), &decl) {
                Outcome::Agree => checked += 1,
                Outcome::Unknown => panic!(
                    "{name}: still unknown with {input}={}: {}",
                    value.join(","),
                    output(&fed).shape
                ),
                Outcome::Disagree(why) => panic!("{name}: {why}"),
            }
        }
    }
    assert_eq!(checked, cases.len() * 2);
}

/// The model's (MACs, other ops) as `tilecut inspect` reports them; `None` for an unknown one.
fn cost_figures(path: &Path) -> Option<(Option<u64>, Option<u64>)> {
    let out = std::process::Command::new(env!("CARGO_BIN_EXE_tilecut"))
        .args(["inspect", path.to_str()?, "--format", "json"])
        .output()
        .ok()?;
    if !out.status.success() {
        return None;
    }
    let v: serde_json::Value = serde_json::from_slice(&out.stdout).ok()?;
    Some((v["model"]["macs"].as_u64(), v["model"]["ops"].as_u64()))
}

/// Many conformance models come in pairs: `test_X` calls a fused op, `test_X_expanded` (or
/// `test_X_expanded_verNN`) is the same computation written as the op's function body from
/// the ONNX operator specification.
/// MACs are counted on the body's MatMul, Conv and Einsum nodes, so wherever both are known,
/// the fused op's MAC convention must give the body's count. For the ops whose other-ops count
/// is also defined as the body's (LinearAttention, CausalConvWithState, SwiGLU), that too.
#[test]
fn fused_ops_cost_what_their_function_bodies_cost() {
    let (mut compared, mut failures) = (0usize, Vec::new());
    for expanded in models() {
        let name = expanded.file_name().and_then(|n| n.to_str()).unwrap_or("").to_string();
        // `_expanded_verNN`: the body as the function of opset NN (newer preview ops).
        let Some(fused_name) = name.strip_suffix("_expanded.onnx").or_else(|| {
            let (stem, ver) = name.strip_suffix(".onnx")?.rsplit_once("_expanded_ver")?;
            ver.bytes().all(|b| b.is_ascii_digit()).then_some(stem)
        }) else {
            continue;
        };
        let fused = expanded.with_file_name(format!("{fused_name}.onnx"));
        let (Some(a), Some(b)) = (cost_figures(&fused), cost_figures(&expanded)) else {
            continue;
        };
        if let (Some(x), Some(y)) = (a.0, b.0) {
            compared += 1;
            if x != y {
                failures.push(format!("{fused_name}: {x} MACs fused, {y} in the function body"));
            }
        }
        let body_counted = ["linear_attention", "causal_conv_with_state", "swiglu"];
        if body_counted
            .iter()
            .any(|op| fused_name.starts_with(&format!("test_{op}")))
            && a.1 != b.1
        {
            failures.push(format!(
                "{fused_name}: other ops {:?} fused, {:?} in the body",
                a.1, b.1
            ));
        }
    }
    println!("fused vs function body: {compared} pairs with both MAC counts known");
    assert!(failures.is_empty(), "{failures:#?}");
    assert!(compared >= 440, "only {compared} pairs compared");
}

/// The optimizer updates of the training domain, on the conformance models: each output is
/// shaped as the tensor it updates (checked with the declarations above); their other ops are
/// counted per updated element from the update formulas of the ONNX operator specification
/// (Adagrad 9, Momentum 7, Nesterov momentum 9, Adam 15; README, counting conventions), no
/// MACs. Element counts are the models' declared X inputs: [1] for Adagrad, [2] for Momentum
/// and Adam, and [1] and [2] for the `_multiple` ones.
#[test]
fn optimizer_updates_count_their_ops_per_element() {
    for (model, ops) in [
        ("test_adagrad", 9),
        ("test_adagrad_multiple", 27),
        ("test_momentum", 14),
        ("test_momentum_multiple", 21),
        ("test_nesterov_momentum", 18),
        ("test_adam", 30),
        ("test_adam_multiple", 45),
    ] {
        let path = Path::new(env!("CARGO_MANIFEST_DIR")).join(format!("tests/onnx-node/{model}.onnx"));
        assert_eq!(cost_figures(&path), Some((Some(0), Some(ops))), "{model}");
    }
}
