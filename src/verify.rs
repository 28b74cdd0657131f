//! `tilecut verify`: run the original model and the chained pieces of a split on the same
//! seeded random inputs, and compare every graph output. Engine: tract-onnx in-process, or the
//! `onnx` package's reference evaluator through python3 (`python-reference`).

use std::collections::BTreeMap;
use std::path::Path;

use serde::Serialize;
use tract_onnx::prelude::*;

use crate::ir::{DType, Fact};

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
    pub outputs: Vec<OutputCheck>,
    pub passed: bool,
}

#[derive(Clone, Copy, Debug)]
pub struct Tolerance {
    pub relative: f64,
    pub steps: f64,
}

fn random_tensor(fact: &Fact, seed: u64) -> Result<Tensor, VerifyError> {
    let shape: Vec<usize> = fact
        .shape
        .concrete()
        .ok_or_else(|| VerifyError("an input shape is not concrete; fix it with --dim or --input".into()))?
        .iter()
        .map(|&d| d as usize)
        .collect();
    let n: usize = shape.iter().product();
    let mut rng = crate::samples::Rng::new(seed);
    let t: Tensor = match fact.dtype {
        Some(DType::F32) | None => tract_ndarray::ArrayD::from_shape_vec(shape, (0..n).map(|_| rng.unit()).collect())
            .map_err(|e| VerifyError(e.to_string()))?
            .into(),
        Some(DType::Bool) => tract_ndarray::ArrayD::from_elem(shape, true).into(),
        Some(DType::I64) => {
            tract_ndarray::ArrayD::from_shape_vec(shape, (0..n).map(|_| (rng.next_u64() % 4) as i64).collect())
                .map_err(|e| VerifyError(e.to_string()))?
                .into()
        }
        Some(DType::I32) => {
            tract_ndarray::ArrayD::from_shape_vec(shape, (0..n).map(|_| (rng.next_u64() % 4) as i32).collect())
                .map_err(|e| VerifyError(e.to_string()))?
                .into()
        }
        Some(DType::I8) => {
            tract_ndarray::ArrayD::from_shape_vec(shape, (0..n).map(|_| (rng.next_u64() % 256) as u8 as i8).collect())
                .map_err(|e| VerifyError(e.to_string()))?
                .into()
        }
        Some(DType::U8) => {
            tract_ndarray::ArrayD::from_shape_vec(shape, (0..n).map(|_| (rng.next_u64() % 256) as u8).collect())
                .map_err(|e| VerifyError(e.to_string()))?
                .into()
        }
        Some(other) => {
            return Err(VerifyError(format!(
                "random inputs of type {other} are not supported by the tract engine"
            )))
        }
    };
    Ok(t)
}

fn run_tract(path: &Path, inputs: &[(String, Tensor)]) -> Result<BTreeMap<String, Tensor>, VerifyError> {
    let err = |e: anyhow::Error| {
        VerifyError(format!(
            "{}: tract could not run it: {}",
            path.display(),
            e.to_string().lines().next().unwrap_or("")
        ))
    };
    let r = std::panic::catch_unwind(|| -> TractResult<BTreeMap<String, Tensor>> {
        let mut model = tract_onnx::onnx().model_for_path(path)?;
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
        Err(_) => Err(VerifyError(format!("{}: tract panicked on it", path.display()))),
    }
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
        let e = if float {
            (p - q).abs() / p.abs().max(q.abs()).max(1e-6)
        } else {
            (p - q).abs()
        };
        worst = if e.is_nan() { f64::INFINITY } else { worst.max(e) };
    }
    let tolerance = if float { tol.relative } else { tol.steps };
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
) -> Result<VerifyReport, VerifyError> {
    let manifest: serde_json::Value = serde_json::from_str(
        &std::fs::read_to_string(dir.join("manifest.json"))
            .map_err(|e| VerifyError(format!("{}: cannot read manifest.json: {e}", dir.display())))?,
    )
    .map_err(|e| VerifyError(format!("{}: manifest.json is not valid JSON: {e}", dir.display())))?;
    let read = crate::read_model(model, overrides).map_err(|e| VerifyError(e.to_string()))?;
    let g = &read.model.graph;
    let mut inputs = Vec::new();
    for (i, id) in g.inputs.iter().enumerate() {
        let v = g.value(*id);
        inputs.push((v.name.clone(), random_tensor(&v.fact, 1000 + i as u64)?));
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
            .get(name)
            .ok_or_else(|| VerifyError(format!("the original model produced no `{name}`")))?;
        let got = env
            .get(name)
            .ok_or_else(|| VerifyError(format!("the pieces produced no `{name}`")))?;
        checks.push(compare(name, want, got, tol));
    }
    let passed = checks.iter().all(|c| c.equal);
    Ok(VerifyReport {
        engine: Engine::Tract,
        outputs: checks,
        passed,
    })
}

const REFERENCE: &str = r#"
import sys, json, os, numpy as np, onnx
from onnx.reference import ReferenceEvaluator
model, folder, rtol, steps = sys.argv[1], sys.argv[2], float(sys.argv[3]), float(sys.argv[4])
dims = json.loads(sys.argv[5])
m = onnx.load(model)
inits = {t.name for t in m.graph.initializer}
feeds = {}
for i, vi in enumerate(m.graph.input):
    if vi.name in inits:
        continue
    t = vi.type.tensor_type
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
    if a.shape != b.shape:
        res.append({"output": name, "dtype": str(a.dtype), "elements": int(a.size), "max_error": float("inf"), "tolerance": 0, "equal": False})
        continue
    af, bf = a.astype(np.float64), b.astype(np.float64)
    if np.issubdtype(a.dtype, np.floating):
        err = float(np.max(np.abs(af - bf) / np.maximum(np.maximum(np.abs(af), np.abs(bf)), 1e-6))) if a.size else 0.0
        tol = rtol
    else:
        err = float(np.max(np.abs(af - bf))) if a.size else 0.0
        tol = steps
    res.append({"output": name, "dtype": str(a.dtype), "elements": int(a.size), "max_error": err, "tolerance": tol, "equal": bool(err <= tol)})
print(json.dumps(res))
"#;

/// Verifies with the `onnx` package's reference evaluator through python3.
pub fn verify_python(
    model: &Path,
    dir: &Path,
    overrides: &crate::Overrides,
    tol: Tolerance,
) -> Result<VerifyReport, VerifyError> {
    let dims = serde_json::to_string(&overrides.dims).map_err(|e| VerifyError(e.to_string()))?;
    let out = std::process::Command::new("python3")
        .arg("-c")
        .arg(REFERENCE)
        .arg(model)
        .arg(dir)
        .arg(tol.relative.to_string())
        .arg(tol.steps.to_string())
        .arg(dims)
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
        outputs,
        passed,
    })
}
