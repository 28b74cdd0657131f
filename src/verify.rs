//! `tilecut verify`: run the original model and the chained pieces of a split on the same
//! seeded random inputs, and compare every graph output. Engine: tract-onnx in-process, or the
//! `onnx` package's reference evaluator through python3 (`python-reference`).

use std::collections::BTreeMap;
use std::path::Path;

use serde::Serialize;
use tract_onnx::prelude::*;

use crate::feeds::FeedArg;
use crate::ir::{DType, Fact, Graph, HostTensor};

#[derive(Debug, thiserror::Error)]
#[error("{0}")]
pub struct VerifyError(pub String);

#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize, clap::ValueEnum)]
#[serde(rename_all = "kebab-case")]
pub enum Engine {
    Tract,
    PythonReference,
}

#[derive(Serialize, Debug, Clone)]
pub struct OutputCheck {
    pub output: String,
    pub dtype: String,
    pub elements: usize,
    /// Largest relative error (floats) or largest difference in quantization steps (integers).
    pub max_error: f64,
    pub tolerance: f64,
    pub equal: bool,
}

#[derive(Serialize, Debug, Clone)]
pub struct VerifyReport {
    pub engine: Engine,
    /// Where each input of the original model came from.
    pub inputs: Vec<InputSource>,
    pub outputs: Vec<OutputCheck>,
    pub passed: bool,
}

#[derive(Clone, Copy, Debug)]
pub struct Tolerance {
    pub relative: f64,
    /// Float elements also pass within this absolute difference: |a − b| ≤ atol + rtol·max(|a|, |b|),
    /// as numpy's `allclose` (common practice). Without it, elements near zero turn rounding
    /// into large relative errors.
    pub absolute: f64,
    pub steps: f64,
}

impl Tolerance {
    /// The measure reported for a float element: relative to the larger magnitude plus
    /// atol/rtol, so that `measure ≤ rtol` is exactly the `allclose` condition above; with no
    /// relative tolerance, the absolute difference (against atol).
    fn float_error(&self, p: f64, q: f64) -> f64 {
        let diff = (p - q).abs();
        if self.relative > 0.0 {
            diff / (p.abs().max(q.abs()) + self.absolute / self.relative).max(f64::MIN_POSITIVE)
        } else {
            diff
        }
    }

    fn float_tolerance(&self) -> f64 {
        if self.relative > 0.0 {
            self.relative
        } else {
            self.absolute
        }
    }
}

/// Where one input's values came from.
#[derive(Serialize, Debug, Clone)]
pub struct InputSource {
    pub input: String,
    pub dtype: String,
    pub shape: Vec<u64>,
    /// The file given with `--feed`, or "seeded random (seed N)".
    pub source: String,
}

/// Seeded inputs as the tract engine draws them: uniform in [-1, 1) for floats, small
/// integers (0–3, or any byte for 8-bit types) for integers, true for booleans.
fn random_host(fact: &Fact, seed: u64) -> Result<HostTensor, VerifyError> {
    let dims = fact
        .shape
        .concrete()
        .ok_or_else(|| VerifyError("an input shape is not concrete; fix it with --dim or --input".into()))?;
    let n = dims
        .iter()
        .try_fold(1u64, |a, &d| a.checked_mul(d))
        .ok_or_else(|| VerifyError("an input's element count overflows".into()))?;
    let mut rng = crate::samples::Rng::new(seed);
    let dtype = fact.dtype.unwrap_or(DType::F32);
    let mut bytes = Vec::new();
    for _ in 0..n {
        if dtype == DType::F32 {
            bytes.extend_from_slice(&rng.unit().to_le_bytes());
            continue;
        }
        let r = rng.next_u64();
        match dtype {
            DType::Bool => bytes.push(1),
            DType::I8 | DType::U8 => bytes.push((r % 256) as u8),
            DType::I16 | DType::U16 => bytes.extend_from_slice(&((r % 4) as u16).to_le_bytes()),
            DType::I32 | DType::U32 => bytes.extend_from_slice(&((r % 4) as u32).to_le_bytes()),
            DType::I64 | DType::U64 => bytes.extend_from_slice(&(r % 4).to_le_bytes()),
            other => {
                return Err(VerifyError(format!(
                    "random inputs of type {other} are not supported by the tract engine (give them with --feed)"
                )))
            }
        }
    }
    Ok(HostTensor { dtype, dims, bytes })
}

/// An input's `--value` as host bytes of its type.
fn value_host(v: &crate::ir::Value) -> Result<HostTensor, VerifyError> {
    let (Some(k), Some(dtype)) = (v.konst.as_deref(), v.fact.dtype) else {
        return Err(VerifyError(format!("input `{}`: no value", v.name)));
    };
    let ints = k.as_ints();
    let floats = k.as_floats();
    let bytes: Vec<u8> = match dtype {
        DType::F32 => floats.iter().flat_map(|&x| (x as f32).to_le_bytes()).collect(),
        DType::F64 => floats.iter().flat_map(|&x| x.to_le_bytes()).collect(),
        DType::Bool | DType::I8 | DType::U8 => ints.iter().map(|&x| x as u8).collect(),
        DType::I16 | DType::U16 => ints.iter().flat_map(|&x| (x as u16).to_le_bytes()).collect(),
        DType::I32 | DType::U32 => ints.iter().flat_map(|&x| (x as u32).to_le_bytes()).collect(),
        DType::I64 | DType::U64 => ints.iter().flat_map(|&x| x.to_le_bytes()).collect(),
        other => {
            return Err(VerifyError(format!(
                "input `{}`: --value of type {other} is not supported by verify (give it with --feed)",
                v.name
            )))
        }
    };
    Ok(HostTensor {
        dtype,
        dims: k.dims.clone(),
        bytes,
    })
}

fn le<const N: usize>(c: &[u8]) -> [u8; N] {
    let mut a = [0u8; N];
    a.copy_from_slice(c);
    a
}

/// A host tensor as a tract tensor (the payload was checked against the shape on reading).
fn to_tract(h: &HostTensor) -> Result<Tensor, VerifyError> {
    let shape: Vec<usize> = h.dims.iter().map(|&d| d as usize).collect();
    let b = &h.bytes;
    macro_rules! typed {
        ($t:ty, $n:expr, $conv:expr) => {{
            let v: Vec<$t> = b.chunks_exact($n).map(|c| $conv(le::<$n>(c))).collect();
            tract_ndarray::ArrayD::from_shape_vec(shape, v)
                .map_err(|e| VerifyError(e.to_string()))?
                .into()
        }};
    }
    Ok(match h.dtype {
        DType::F32 => typed!(f32, 4, f32::from_le_bytes),
        DType::F64 => typed!(f64, 8, f64::from_le_bytes),
        DType::F16 => typed!(f16, 2, |a| f16::from_bits(u16::from_le_bytes(a))),
        DType::I8 => typed!(i8, 1, i8::from_le_bytes),
        DType::I16 => typed!(i16, 2, i16::from_le_bytes),
        DType::I32 => typed!(i32, 4, i32::from_le_bytes),
        DType::I64 => typed!(i64, 8, i64::from_le_bytes),
        DType::U8 => typed!(u8, 1, u8::from_le_bytes),
        DType::U16 => typed!(u16, 2, u16::from_le_bytes),
        DType::U32 => typed!(u32, 4, u32::from_le_bytes),
        DType::U64 => typed!(u64, 8, u64::from_le_bytes),
        DType::Bool => typed!(bool, 1, |a: [u8; 1]| a[0] != 0),
        other => {
            return Err(VerifyError(format!(
                "{} tensors are not supported by the tract engine",
                other.name()
            )))
        }
    })
}

/// Refuses models whose outputs depend on random draws: no two runs agree, so there is
/// nothing to compare.
fn refuse_random(model: &Path, g: &Graph) -> Result<(), VerifyError> {
    fn find(g: &Graph) -> Option<String> {
        g.nodes.iter().find_map(|n| {
            if crate::ops::is_random(&n.op_type) {
                Some(format!("{} ({})", n.name, n.op_type))
            } else {
                n.bodies().iter().find_map(|b| find(&b.graph))
            }
        })
    }
    match find(g) {
        Some(node) => Err(VerifyError(format!(
            "{}: node {node} draws random numbers, so no two runs agree; there is nothing to compare",
            model.display()
        ))),
        None => Ok(()),
    }
}

/// What both engines start from: the model read (models with random ops refused) and the
/// `--feed` files read and checked against its inputs.
fn prepare(
    model: &Path,
    overrides: &crate::Overrides,
    feeds: &[FeedArg],
) -> Result<(crate::Analyzed, Feeds), VerifyError> {
    let read = crate::read_model(model, overrides).map_err(|e| VerifyError(e.to_string()))?;
    refuse_random(model, &read.model.graph)?;
    let given = read_feeds(&read.model.graph, feeds)?;
    Ok((read, given))
}

/// Feeds by input name: (the file as given, its tensor).
pub type Feeds = BTreeMap<String, (String, HostTensor)>;

/// Reads the `--feed` files and checks each against the model's inputs: a graph input of
/// that name, the same element type, the same rank and every known dim equal.
pub fn read_feeds(g: &Graph, args: &[FeedArg]) -> Result<Feeds, VerifyError> {
    let mut out = BTreeMap::new();
    for a in args {
        let (own, t) = crate::feeds::read(&a.path).map_err(VerifyError)?;
        let shown = a.path.display().to_string();
        let name = a
            .name
            .clone()
            .or(own)
            .ok_or_else(|| VerifyError(format!("{shown}: the file names no input; give it as NAME={shown}")))?;
        let id = g
            .inputs
            .iter()
            .find(|v| g.value(**v).name == name)
            .ok_or_else(|| VerifyError(format!("{shown}: the model has no input `{name}`")))?;
        let fact = &g.value(*id).fact;
        if let Some(want) = fact.dtype {
            if want != t.dtype {
                return Err(VerifyError(format!(
                    "{shown}: input `{name}` is {}, the file holds {}",
                    want.name(),
                    t.dtype.name()
                )));
            }
        }
        if let Some(dims) = fact.shape.dims() {
            let fits =
                dims.len() == t.dims.len() && dims.iter().zip(&t.dims).all(|(d, &x)| d.known().is_none_or(|k| k == x));
            if !fits {
                return Err(VerifyError(format!(
                    "{shown}: input `{name}` has shape {}, the file holds {:?}",
                    fact.shape, t.dims
                )));
            }
        }
        if out.insert(name.clone(), (shown, t)).is_some() {
            return Err(VerifyError(format!("input `{name}` is given twice")));
        }
    }
    Ok(out)
}

/// The inputs of the original model: from the feeds where given, else seeded random.
fn inputs(g: &Graph, feeds: &Feeds) -> Result<Vec<(InputSource, HostTensor)>, VerifyError> {
    let mut out = Vec::new();
    for (i, id) in g.inputs.iter().enumerate() {
        let v = g.value(*id);
        let (source, t) = match feeds.get(v.name.as_str()) {
            Some((path, t)) => (path.clone(), t.clone()),
            None if v.konst.is_some() => ("--value".to_string(), value_host(v)?),
            None => {
                let seed = 1000 + i as u64;
                (format!("seeded random (seed {seed})"), random_host(&v.fact, seed)?)
            }
        };
        out.push((
            InputSource {
                input: v.name.to_string(),
                dtype: t.dtype.name().to_string(),
                shape: t.dims.clone(),
                source,
            },
            t,
        ));
    }
    Ok(out)
}

/// tract reads a `dim_param` as one of its own dim expressions and unifies it with what it
/// computes. Every input's fact is set from its value, so the file's symbolic dims are of no
/// use to tract, and they hurt: a declared `batch` will not unify with the 1 an input fixes
/// ("Impossible to unify Sym(batch) with Val(1)"), and names exporters write with dots or
/// function calls (`p2o.DynamicDimension.0`, `floor(height/2 - 1/2) + 1`) do not parse. For
/// tract alone, every `dim_param` is cleared to an unknown dim, in subgraphs too.
fn tract_safe_dims(g: &mut tract_onnx::pb::GraphProto) {
    use tract_onnx::pb::{tensor_shape_proto::dimension::Value as D, type_proto::Value as T};
    for vi in g
        .input
        .iter_mut()
        .chain(g.output.iter_mut())
        .chain(g.value_info.iter_mut())
    {
        let Some(T::TensorType(t)) = vi.r#type.as_mut().and_then(|t| t.value.as_mut()) else {
            continue;
        };
        for d in t.shape.iter_mut().flat_map(|s| s.dim.iter_mut()) {
            if matches!(d.value, Some(D::DimParam(_))) {
                d.value = None;
            }
        }
    }
    for a in g.node.iter_mut().flat_map(|n| n.attribute.iter_mut()) {
        for body in a.g.iter_mut().chain(a.graphs.iter_mut()) {
            tract_safe_dims(body);
        }
    }
}

/// tract's error on one line: its message and, when there is one, the innermost cause (where
/// the message alone names only the node).
fn one_line(e: &anyhow::Error) -> String {
    let first = e.to_string().lines().next().unwrap_or("").to_string();
    let root = e.root_cause().to_string();
    let root = root.lines().next().unwrap_or("");
    if root.is_empty() || root == first {
        first
    } else {
        format!("{first} ({root})")
    }
}

fn run_tract(path: &Path, inputs: &[(String, Tensor)]) -> Result<BTreeMap<String, Tensor>, VerifyError> {
    let err = |e: anyhow::Error| VerifyError(format!("{}: tract could not run it: {}", path.display(), one_line(&e)));
    let r = quietly(|| -> TractResult<BTreeMap<String, Tensor>> {
        // `model_for_path`, with the dim names cleared in between (`tract_safe_dims`).
        let onnx = tract_onnx::onnx();
        let mut proto = onnx.proto_model_for_path(path)?;
        if let Some(g) = proto.graph.as_mut() {
            tract_safe_dims(g);
        }
        let dir = path.parent().and_then(Path::to_str);
        let parsed = onnx.parse(&proto, dir)?;
        if !parsed.unresolved_inputs.is_empty() {
            anyhow::bail!("could not resolve inputs at top level: {:?}", parsed.unresolved_inputs);
        }
        let mut model = parsed.model;
        let names: Vec<String> = model
            .input_outlets()?
            .iter()
            .map(|o| model.node(o.node).name.clone())
            .collect();
        let mut feeds = TVec::new();
        for (i, name) in names.iter().enumerate() {
            let t = inputs
                .iter()
                .find(|(n, _)| n == name)
                .map(|(_, t)| t.clone())
                .ok_or_else(|| anyhow::anyhow!("no value for input {name}"))?;
            model.set_input_fact(i, InferenceFact::dt_shape(t.datum_type(), t.shape()))?;
            feeds.push(t.into_tvalue());
        }
        let out_names: Vec<String> = model
            .output_outlets()?
            .iter()
            .map(|o| {
                model
                    .outlet_label(*o)
                    .map(str::to_string)
                    .unwrap_or_else(|| model.node(o.node).name.clone())
            })
            .collect();
        let plan = model.into_optimized()?.into_runnable()?;
        let outs = plan.run(feeds)?;
        Ok(out_names
            .into_iter()
            .zip(outs.into_iter().map(|t| t.into_tensor()))
            .collect())
    });
    match r {
        Ok(Ok(m)) => Ok(m),
        Ok(Err(e)) => Err(err(e)),
        Err(why) => Err(VerifyError(format!("{}: tract panicked on it: {why}", path.display()))),
    }
}

/// Runs `f`, turning a panic in it (tract asserts on some models it cannot run) into its
/// message, without the panic report the default hook would print on stderr first: the user
/// gets tilecut's one-line error. Other threads' panics still reach the previous hook.
fn quietly<T>(f: impl FnOnce() -> T) -> Result<T, String> {
    use std::sync::Arc;
    let here = std::thread::current().id();
    let previous = Arc::new(std::panic::take_hook());
    let outer = Arc::clone(&previous);
    std::panic::set_hook(Box::new(move |info| {
        if std::thread::current().id() != here {
            outer(info);
        }
    }));
    let r = std::panic::catch_unwind(std::panic::AssertUnwindSafe(f));
    drop(std::panic::take_hook());
    if let Ok(hook) = Arc::try_unwrap(previous) {
        std::panic::set_hook(hook);
    }
    r.map_err(|payload| {
        let text = payload
            .downcast_ref::<&str>()
            .map(|s| s.to_string())
            .or_else(|| payload.downcast_ref::<String>().cloned())
            .unwrap_or_else(|| "no message".into());
        text.lines().next().unwrap_or_default().to_string()
    })
}

fn compare(name: &str, a: &Tensor, b: &Tensor, tol: Tolerance) -> OutputCheck {
    let dt = format!("{:?}", a.datum_type());
    if a.shape() != b.shape() || a.datum_type() != b.datum_type() {
        return OutputCheck {
            output: name.into(),
            dtype: dt,
            elements: a.len(),
            max_error: f64::INFINITY,
            tolerance: 0.0,
            equal: false,
        };
    }
    let (x, y) = match (a.cast_to::<f64>(), b.cast_to::<f64>()) {
        (Ok(x), Ok(y)) => (x.into_owned(), y.into_owned()),
        _ => {
            return OutputCheck {
                output: name.into(),
                dtype: dt,
                elements: a.len(),
                max_error: f64::INFINITY,
                tolerance: 0.0,
                equal: false,
            }
        }
    };
    let (xs, ys) = (x.as_slice::<f64>().unwrap_or(&[]), y.as_slice::<f64>().unwrap_or(&[]));
    let float = a.datum_type().is_float();
    let mut worst = 0f64;
    for (p, q) in xs.iter().zip(ys) {
        // NaN where both have NaN, or the same infinity, is agreement (e.g. acosh outside its
        // domain on random inputs); NaN on one side only is the worst mismatch.
        if (p.is_nan() && q.is_nan()) || (p.is_infinite() && p == q) {
            continue;
        }
        let e = if float { tol.float_error(*p, *q) } else { (p - q).abs() };
        worst = if e.is_nan() { f64::INFINITY } else { worst.max(e) };
    }
    let tolerance = if float { tol.float_tolerance() } else { tol.steps };
    OutputCheck {
        output: name.into(),
        dtype: dt,
        elements: xs.len(),
        max_error: worst,
        tolerance,
        equal: worst <= tolerance,
    }
}

/// Verifies with tract: original vs pieces in manifest order.
pub fn verify_tract(
    model: &Path,
    dir: &Path,
    overrides: &crate::Overrides,
    tol: Tolerance,
    feeds: &[FeedArg],
) -> Result<VerifyReport, VerifyError> {
    let manifest: serde_json::Value = serde_json::from_str(
        &std::fs::read_to_string(dir.join("manifest.json"))
            .map_err(|e| VerifyError(format!("{}: cannot read manifest.json: {e}", dir.display())))?,
    )
    .map_err(|e| VerifyError(format!("{}: manifest.json is not valid JSON: {e}", dir.display())))?;
    let (read, given) = prepare(model, overrides, feeds)?;
    let g = &read.model.graph;
    let fed = inputs(g, &given)?;
    let sources: Vec<InputSource> = fed.iter().map(|(s, _)| s.clone()).collect();
    let mut inputs = Vec::new();
    for (s, t) in &fed {
        inputs.push((s.input.clone(), to_tract(t)?));
    }
    let reference = run_tract(model, &inputs)?;
    let mut env: BTreeMap<String, Tensor> = inputs.into_iter().collect();
    let pieces = manifest["pieces"]
        .as_array()
        .ok_or_else(|| VerifyError("manifest.json has no pieces".into()))?;
    for p in pieces {
        let file = p["file"]
            .as_str()
            .ok_or_else(|| VerifyError("a manifest piece has no file".into()))?;
        let feeds: Vec<(String, Tensor)> = p["inputs"]
            .as_array()
            .map(|a| {
                a.iter()
                    .filter_map(|n| n.as_str())
                    .filter_map(|n| env.get(n).map(|t| (n.to_string(), t.clone())))
                    .collect()
            })
            .unwrap_or_default();
        let outs = run_tract(&dir.join(file), &feeds)?;
        env.extend(outs);
    }
    let mut checks = Vec::new();
    for o in &g.outputs {
        let name = &g.value(*o).name;
        let want = reference
            .get(name.as_str())
            .ok_or_else(|| VerifyError(format!("the original model produced no `{name}`")))?;
        let got = env
            .get(name.as_str())
            .ok_or_else(|| VerifyError(format!("the pieces produced no `{name}`")))?;
        checks.push(compare(name, want, got, tol));
    }
    let passed = checks.iter().all(|c| c.equal);
    Ok(VerifyReport {
        engine: Engine::Tract,
        inputs: sources,
        outputs: checks,
        passed,
    })
}

/// The reference-evaluator check, run by python3: `SCRIPT MODEL DIR RTOL STEPS DIMS FEEDS
/// SHAPES ATOL VALUES` prints the output checks as JSON (SHAPES: the inputs' shapes as tilecut sized them,
/// `--input` settings included; DIMS sizes what they leave symbolic); `SCRIPT --batch LIST RTOL STEPS [ATOL]` checks every
/// `[model, dir]` pair of the JSON file LIST and prints one JSON line per model (tests use
/// it to verify hundreds of splits in one process).
pub const REFERENCE: &str = r#"
import sys, json, os, numpy as np, onnx, onnx.numpy_helper
from onnx.reference import ReferenceEvaluator

def check(model, folder, rtol, steps, dims, given, shapes, atol, values={}):
    m = onnx.load(model)
    inits = {t.name for t in m.graph.initializer}
    feeds = {}
    for i, vi in enumerate(m.graph.input):
        if vi.name in inits:
            continue
        if vi.name in given:
            path = given[vi.name]
            if path.lower().endswith(".npy"):
                feeds[vi.name] = np.load(path, allow_pickle=False)
            else:
                feeds[vi.name] = onnx.numpy_helper.to_array(onnx.load_tensor(path))
            continue
        t = vi.type.tensor_type
        if vi.name in values:
            dt = onnx.helper.tensor_dtype_to_np_dtype(t.elem_type)
            feeds[vi.name] = np.array(values[vi.name], dtype=np.float64).astype(dt).reshape(shapes[vi.name])
            continue
        if vi.name in shapes:
            shape = shapes[vi.name]
        else:
            shape = [d.dim_value if d.HasField("dim_value") else dims[d.dim_param] for d in t.shape.dim]
        rng = np.random.default_rng(1000 + i)
        dt = onnx.helper.tensor_dtype_to_np_dtype(t.elem_type)
        if dt == np.bool_:
            feeds[vi.name] = np.ones(shape, dtype=dt)
        elif np.issubdtype(dt, np.integer):
            feeds[vi.name] = rng.integers(0, 4, shape).astype(dt)
        else:
            feeds[vi.name] = rng.uniform(-1, 1, shape).astype(dt)
    want = dict(zip([o.name for o in m.graph.output], ReferenceEvaluator(m).run(None, feeds)))
    env = dict(feeds)
    man = json.load(open(os.path.join(folder, "manifest.json")))
    for p in man["pieces"]:
        pm = onnx.load(os.path.join(folder, p["file"]))
        outs = ReferenceEvaluator(pm).run(None, {n: env[n] for n in p["inputs"]})
        env.update(zip([o.name for o in pm.graph.output], outs))
    res = []
    for name, a in want.items():
        b = env[name]
        a, b = np.asarray(a), np.asarray(b)
        if a.shape != b.shape:
            res.append({"output": name, "dtype": str(a.dtype), "elements": int(a.size), "max_error": float("inf"), "tolerance": 0, "equal": False})
            continue
        af, bf = a.astype(np.float64), b.astype(np.float64)
        both_nan = np.isnan(af) & np.isnan(bf)
        same_inf = np.isinf(af) & (af == bf)
        agree = both_nan | same_inf
        if np.issubdtype(a.dtype, np.floating) and rtol > 0:
            # The measure of Tolerance::float_error: e <= rtol iff |a-b| <= atol + rtol*max(|a|,|b|).
            e = np.abs(af - bf) / np.maximum(np.maximum(np.abs(af), np.abs(bf)) + atol / rtol, np.finfo(np.float64).tiny)
            tol = rtol
        elif np.issubdtype(a.dtype, np.floating):
            e = np.abs(af - bf)
            tol = atol
        else:
            e = np.abs(af - bf)
            tol = steps
        e = np.where(agree, 0.0, np.where(np.isnan(e), np.inf, e))
        err = float(np.max(e)) if a.size else 0.0
        res.append({"output": name, "dtype": str(a.dtype), "elements": int(a.size), "max_error": err, "tolerance": tol, "equal": bool(err <= tol)})
    return res

if sys.argv[1] == "--batch":
    rtol, steps = float(sys.argv[3]), float(sys.argv[4])
    atol = float(sys.argv[5]) if len(sys.argv) > 5 else 1e-6
    for model, folder in json.load(open(sys.argv[2])):
        try:
            print(json.dumps({"model": model, "results": check(model, folder, rtol, steps, {}, {}, {}, atol), "error": None}), flush=True)
        except Exception as e:
            print(json.dumps({"model": model, "results": None, "error": str(e).splitlines()[0] if str(e) else type(e).__name__}), flush=True)
else:
    model, folder, rtol, steps = sys.argv[1], sys.argv[2], float(sys.argv[3]), float(sys.argv[4])
    print(json.dumps(check(model, folder, rtol, steps, json.loads(sys.argv[5]), json.loads(sys.argv[6]), json.loads(sys.argv[7]), float(sys.argv[8]), json.loads(sys.argv[9]))))
"#;

/// Verifies with the `onnx` package's reference evaluator through python3.
pub fn verify_python(
    model: &Path,
    dir: &Path,
    overrides: &crate::Overrides,
    tol: Tolerance,
    feeds: &[FeedArg],
) -> Result<VerifyReport, VerifyError> {
    let dims = serde_json::to_string(&overrides.dims).map_err(|e| VerifyError(e.to_string()))?;
    // The files are read and checked here too, so both engines refuse the same bad feeds.
    let (read, given) = prepare(model, overrides, feeds)?;
    let paths: BTreeMap<&String, &String> = given.iter().map(|(k, (p, _))| (k, p)).collect();
    let given_json = serde_json::to_string(&paths).map_err(|e| VerifyError(e.to_string()))?;
    let sources: Vec<InputSource> = read
        .model
        .graph
        .inputs
        .iter()
        .map(|id| {
            let v = read.model.graph.value(*id);
            match given.get(v.name.as_str()) {
                Some((p, t)) => InputSource {
                    input: v.name.to_string(),
                    dtype: t.dtype.name().into(),
                    shape: t.dims.clone(),
                    source: p.clone(),
                },
                None => InputSource {
                    input: v.name.to_string(),
                    dtype: v.fact.dtype.map_or("?", DType::name).into(),
                    shape: v.fact.shape.concrete().unwrap_or_default(),
                    source: if v.konst.is_some() {
                        "--value".into()
                    } else {
                        "seeded random (numpy default_rng)".into()
                    },
                },
            }
        })
        .collect();
    // The shapes tilecut gave the inputs, so that `--input` reaches the evaluator as `--dim` does.
    let g = &read.model.graph;
    let shapes: BTreeMap<&str, Vec<u64>> = g
        .inputs
        .iter()
        .filter_map(|id| {
            let v = g.value(*id);
            Some((v.name.as_str(), v.fact.shape.concrete()?))
        })
        .collect();
    let shapes_json = serde_json::to_string(&shapes).map_err(|e| VerifyError(e.to_string()))?;
    // `--value` inputs, as numbers the script casts to the input's type.
    let values: BTreeMap<&str, Vec<f64>> = g
        .inputs
        .iter()
        .filter_map(|id| {
            let v = g.value(*id);
            Some((v.name.as_str(), v.konst.as_deref()?.as_floats()))
        })
        .collect();
    let values_json = serde_json::to_string(&values).map_err(|e| VerifyError(e.to_string()))?;
    let out = std::process::Command::new("python3")
        .arg("-c")
        .arg(REFERENCE)
        .arg(model)
        .arg(dir)
        .arg(tol.relative.to_string())
        .arg(tol.steps.to_string())
        .arg(dims)
        .arg(given_json)
        .arg(shapes_json)
        .arg(tol.absolute.to_string())
        .arg(values_json)
        .output()
        .map_err(|e| VerifyError(format!("python3 could not start: {e}")))?;
    if !out.status.success() {
        let err = String::from_utf8_lossy(&out.stderr);
        let last = err.lines().last().unwrap_or("").to_string();
        return Err(VerifyError(format!(
            "{}: the onnx reference evaluator could not run it: {last}",
            model.display()
        )));
    }
    let outputs: Vec<OutputCheck> = serde_json::from_slice::<Vec<serde_json::Value>>(&out.stdout)
        .map_err(|e| VerifyError(format!("unexpected output from python: {e}")))?
        .into_iter()
        .map(|v| OutputCheck {
            output: v["output"].as_str().unwrap_or("").into(),
            dtype: v["dtype"].as_str().unwrap_or("").into(),
            elements: v["elements"].as_u64().unwrap_or(0) as usize,
            max_error: v["max_error"].as_f64().unwrap_or(f64::INFINITY),
            tolerance: v["tolerance"].as_f64().unwrap_or(0.0),
            equal: v["equal"].as_bool().unwrap_or(false),
        })
        .collect();
    let passed = outputs.iter().all(|c| c.equal);
    Ok(VerifyReport {
        engine: Engine::PythonReference,
        inputs: sources,
        outputs,
        passed,
    })
}

#[cfg(test)]
mod tests {
    use super::Tolerance;

    /// The float measure is numpy's `allclose` condition, |a − b| ≤ atol + rtol·|b| (its
    /// documentation), in the symmetric form with max(|a|, |b|): an element passes exactly
    /// when its measure is within the reported tolerance.
    #[test]
    fn the_float_measure_is_the_allclose_condition() {
        let t = Tolerance {
            relative: 1e-5,
            absolute: 1e-6,
            steps: 1.0,
        };
        let cases = [
            (1.0, 1.0 + 9e-6),
            (1.0, 1.0 + 2e-5),
            (1e-5, 1.5e-5),
            (1e-5, 2.5e-6),
            (0.0, 9e-7),
            (0.0, 2e-6),
            (-3.0, 3.0),
        ];
        for (a, b) in cases {
            let (a, b): (f64, f64) = (a, b);
            let allclose = (a - b).abs() <= t.absolute + t.relative * a.abs().max(b.abs());
            assert_eq!(t.float_error(a, b) <= t.float_tolerance(), allclose, "{a} vs {b}");
        }
        // Near zero, rounding no longer reads as a large relative error.
        assert!(t.float_error(1e-5, 1e-5 + 2e-7) <= t.float_tolerance());
        // Without a relative tolerance, the absolute difference is held to atol.
        let abs_only = Tolerance { relative: 0.0, ..t };
        assert!(abs_only.float_error(5.0, 5.0 + 5e-7) <= abs_only.float_tolerance());
        assert!(abs_only.float_error(5.0, 5.0 + 5e-6) > abs_only.float_tolerance());
    }
}
