//! Exporting the cut: one standalone ONNX model per partition, plus a manifest of the wiring.
//!
//! Pieces copy the original nodes, attributes and subgraphs as they are in the file; each takes
//! only the initializers and constants it uses (copied as stored bytes, never decoded and
//! re-encoded element by element; a weight used by two pieces is copied into both), the
//! model-local functions it calls, the original opset imports, and value_info for its internal
//! tensors. Initializers stored as external data, or pieces whose inline weights would exceed
//! the protobuf size limit, get an external data file of their own inside the output folder.

use std::collections::{BTreeMap, BTreeSet, HashMap};
use std::io::Write;
use std::path::{Path, PathBuf};

use bytes::Bytes;
use prost::Message;
use serde::Serialize;

use super::builder::value_info_fact;
use super::load::LoadedModel;
use super::{GraphProto, ModelProto, StringStringEntryProto, TensorProto};
use crate::cut::{Plan, Side};
use crate::ir::{Graph, NodeId, ValueKind};

/// Inline weights above this go to an external file (protobuf messages are limited to 2 GiB).
pub const INLINE_LIMIT: u64 = 1 << 30;

pub const MANIFEST_VERSION: u32 = 1;

#[derive(Serialize, Debug, Clone)]
pub struct PieceEntry {
    pub id: usize,
    pub file: String,
    pub side: Side,
    pub inputs: Vec<String>,
    pub outputs: Vec<String>,
    pub external_data: Option<String>,
}

#[derive(Serialize, Debug, Clone)]
pub struct Wire {
    pub tensor: String,
    /// "graph-input" or a piece id.
    pub from: String,
    /// Piece ids, and "graph-output" where the tensor is an output of the original model.
    pub to: Vec<String>,
}

#[derive(Serialize, Debug, Clone)]
pub struct Manifest {
    pub schema_version: u32,
    pub model: String,
    pub execution_order: Vec<usize>,
    pub pieces: Vec<PieceEntry>,
    pub graph_inputs: Vec<String>,
    pub graph_outputs: Vec<String>,
    pub wiring: Vec<Wire>,
}

/// A file to write: name inside the output folder and its content.
pub struct OutFile {
    pub name: String,
    pub content: Vec<Chunk>,
}

/// A piece of a file's content. External weights are copied from their file when the output
/// is written, range by range, so a split of a model with gigabytes of weights never holds
/// them in memory.
pub enum Chunk {
    Bytes(Bytes),
    /// `len` bytes of `path` from `offset`.
    FileRange {
        path: PathBuf,
        offset: u64,
        len: u64,
    },
    Zeros(u64),
}

impl OutFile {
    pub fn from_bytes(name: impl Into<String>, bytes: Vec<u8>) -> OutFile {
        OutFile {
            name: name.into(),
            content: vec![Chunk::Bytes(Bytes::from(bytes))],
        }
    }

    /// Writes the content, copying file ranges in bounded memory; a range that the source
    /// file does not hold in full is an error, never a short file.
    pub fn write_to(&self, out: &mut dyn Write) -> std::io::Result<()> {
        use std::io::{Read, Seek, SeekFrom};
        for c in &self.content {
            match c {
                Chunk::Bytes(b) => out.write_all(b)?,
                Chunk::Zeros(n) => std::io::copy(&mut std::io::repeat(0).take(*n), out).map(|_| ())?,
                Chunk::FileRange { path, offset, len } => {
                    let mut f = std::fs::File::open(path)?;
                    f.seek(SeekFrom::Start(*offset))?;
                    let copied = std::io::copy(&mut f.take(*len), out)?;
                    if copied != *len {
                        return Err(std::io::Error::new(
                            std::io::ErrorKind::UnexpectedEof,
                            format!(
                                "{} holds {copied} of the {len} bytes at offset {offset}",
                                path.display()
                            ),
                        ));
                    }
                }
            }
        }
        Ok(())
    }
}

#[derive(Debug, thiserror::Error)]
#[error("{0}")]
pub struct SplitError(pub String);

/// The nodes a piece copies (its own plus the constant-producing nodes it depends on) and
/// the folded values it stores as initializers instead: a constant computed from an activation
/// (a `Shape` of a tensor whose shape is known) is materialised, since copying its producer
/// would make the piece read that activation.
fn piece_nodes(
    g: &Graph,
    plan: &Plan,
    nodes: &[NodeId],
) -> Result<(Vec<NodeId>, BTreeSet<crate::ir::ValueId>), SplitError> {
    let is_weight = |v: crate::ir::ValueId| matches!(g.value(v).kind, ValueKind::Initializer | ValueKind::Constant);
    let mut want: BTreeSet<NodeId> = nodes.iter().copied().collect();
    let mut materialize = BTreeSet::new();
    let mut stack: Vec<NodeId> = nodes.to_vec();
    while let Some(n) = stack.pop() {
        for v in g.node(n).all_inputs() {
            let Some(p) = g.value(v).producer else { continue };
            if plan.side[p.index()] != Side::Const || want.contains(&p) {
                continue;
            }
            if g.node(p).all_inputs().into_iter().all(is_weight) {
                want.insert(p);
                stack.push(p);
            } else if g.value(v).konst.as_ref().is_some_and(|k| {
                use crate::ir::DType;
                let dt = g.value(v).fact.dtype;
                (k.try_ints().is_some() && dt.is_some_and(|d| d.is_integer() || d == DType::Bool))
                    || (k.is_numeric() && matches!(dt, Some(DType::F32 | DType::F64 | DType::F16 | DType::BF16)))
            }) {
                materialize.insert(v);
            } else {
                return Err(SplitError(format!(
                    "tensor `{}` is folded from an activation and has no value to store",
                    g.value(v).name
                )));
            }
        }
    }
    Ok((want.into_iter().collect(), materialize))
}

fn const_tensor(name: &str, fact: &crate::ir::Fact, k: &crate::ir::ConstValue) -> TensorProto {
    use crate::ir::DType;
    let dims: Vec<i64> = k.dims.iter().map(|&d| d as i64).collect();
    let floats = |f: &dyn Fn(f64) -> Vec<u8>| -> Vec<u8> { k.as_floats().iter().flat_map(|&x| f(x)).collect() };
    match fact.dtype {
        Some(DType::F32) => {
            let v: Vec<f32> = k.as_floats().iter().map(|&x| x as f32).collect();
            super::builder::f32_tensor(name, &dims, &v)
        }
        Some(d @ DType::F64) => super::builder::raw_tensor(name, d, &dims, floats(&|x| x.to_le_bytes().to_vec())),
        Some(d @ DType::F16) => super::builder::raw_tensor(
            name,
            d,
            &dims,
            floats(&|x| crate::values::f64_to_f16_bits(x).to_le_bytes().to_vec()),
        ),
        Some(d @ DType::BF16) => super::builder::raw_tensor(
            name,
            d,
            &dims,
            floats(&|x| crate::values::f64_to_bf16_bits(x).to_le_bytes().to_vec()),
        ),
        Some(d) => super::builder::int_tensor(name, d, &dims, &k.as_ints()),
        None => super::builder::i64_tensor(name, &dims, &k.as_ints()),
    }
}

/// Builds the pieces and the manifest for `plan` (files not yet written).
pub fn build(loaded: &LoadedModel, g: &Graph, plan: &Plan) -> Result<(Vec<OutFile>, Manifest), SplitError> {
    let proto_graph = loaded
        .proto
        .graph
        .as_ref()
        .ok_or_else(|| SplitError("model has no graph".into()))?;
    // A function call whose expanded nodes fall into different partitions cannot be copied
    // whole: its body is written inline instead (the expanded nodes, as the IR names them).
    let mut call_parts: BTreeMap<usize, BTreeSet<usize>> = BTreeMap::new();
    for (i, n) in g.nodes.iter().enumerate() {
        if let (Some(_), Some(p)) = (n.from_function(), plan.partition_of[i]) {
            call_parts.entry(n.source_index as usize).or_default().insert(p);
        }
    }
    let inlined_calls: BTreeSet<usize> = call_parts
        .into_iter()
        .filter(|(_, parts)| parts.len() > 1)
        .map(|(call, _)| call)
        .collect();
    let expanded: HashMap<String, super::NodeProto> = if inlined_calls.is_empty() {
        HashMap::new()
    } else {
        crate::import::expanded_main_nodes(loaded)
            .map_err(|e| SplitError(e.to_string()))?
            .into_iter()
            .filter_map(|n| {
                n.output
                    .iter()
                    .find(|o| !o.is_empty())
                    .map(String::from)
                    .map(|o| (o, n))
            })
            .collect()
    };
    let inits: HashMap<&str, &TensorProto> = proto_graph.initializer.iter().map(|t| (t.name.as_str(), t)).collect();
    let value_of: HashMap<&str, crate::ir::ValueId> = g
        .values
        .iter()
        .enumerate()
        .map(|(i, v)| (v.name.as_str(), crate::ir::ValueId::new(i)))
        .collect();
    let graph_outputs: BTreeSet<&str> = g.outputs.iter().map(|o| g.value(*o).name.as_str()).collect();
    let mut files = Vec::new();
    let mut entries = Vec::new();
    let mut produced_by: BTreeMap<String, usize> = BTreeMap::new();
    let mut consumed_by: BTreeMap<String, BTreeSet<usize>> = BTreeMap::new();
    // Graph outputs that fold to constants leave from the last piece, which copies their producers.
    let const_outputs: Vec<NodeId> = g
        .outputs
        .iter()
        .filter_map(|o| g.value(*o).producer)
        .filter(|p| plan.side[p.index()] == Side::Const)
        .collect();
    // A model that folds entirely to constants still gets one (CPU) piece that emits them.
    let fallback = [crate::cut::Partition {
        id: 0,
        side: Side::Cpu,
        nodes: Vec::new(),
    }];
    let parts: &[crate::cut::Partition] = if plan.partitions.is_empty() {
        &fallback
    } else {
        &plan.partitions
    };
    let last = parts.len().saturating_sub(1);
    for (k, part) in parts.iter().enumerate() {
        let mut seeds = part.nodes.clone();
        if k == last {
            seeds.extend(const_outputs.iter().copied());
        }
        let (nodes, materialize) = piece_nodes(g, plan, &seeds)?;
        let materialized: BTreeSet<String> = materialize.iter().map(|v| g.value(*v).name.to_string()).collect();
        let members: BTreeSet<NodeId> = nodes.iter().copied().collect();
        let own: BTreeSet<NodeId> = part.nodes.iter().copied().collect();
        // Proto nodes in IR (topological) order, each file node once.
        let mut seen = BTreeSet::new();
        let mut proto_nodes = Vec::new();
        let mut inlined_here = false;
        for n in &nodes {
            let node = g.node(*n);
            let src = node.source_index as usize;
            if node.from_function().is_some() && inlined_calls.contains(&src) {
                let first = node
                    .outputs
                    .iter()
                    .flatten()
                    .map(|v| g.value(*v).name.as_str())
                    .next()
                    .unwrap_or("");
                let pn = expanded.get(first).ok_or_else(|| {
                    SplitError(format!(
                        "node `{}` of function call `{}` has no output to export it by",
                        node.name,
                        node.from_function().cloned().unwrap_or_default()
                    ))
                })?;
                proto_nodes.push(pn.clone());
                inlined_here = true;
            } else if seen.insert(src) {
                let pn = proto_graph
                    .node
                    .get(src)
                    .ok_or_else(|| SplitError(format!("node index {src} out of range")))?;
                proto_nodes.push(pn.clone());
            }
        }
        let produced: BTreeSet<String> = proto_nodes
            .iter()
            .flat_map(|n| n.output.iter().filter(|o| !o.is_empty()).map(String::from))
            .collect();
        let mut reads: Vec<String> = Vec::new();
        for n in &nodes {
            for v in g.node(*n).all_inputs() {
                let name = g.value(v).name.to_string();
                if !produced.contains(&name) && !reads.contains(&name) {
                    reads.push(name);
                }
            }
        }
        let mut graph = GraphProto {
            name: format!("piece_{}", part.id),
            ..Default::default()
        };
        let mut inputs = Vec::new();
        let mut ext_name = None;
        let mut ext_chunks: Vec<Chunk> = Vec::new();
        let mut ext_len: u64 = 0;
        let mut copied = Vec::new();
        for name in &reads {
            if materialized.contains(name) {
                continue;
            }
            if let Some(t) = inits.get(name.as_str()) {
                copied.push((*t).clone());
                continue;
            }
            let Some(&vid) = value_of.get(name.as_str()) else {
                continue;
            };
            graph.input.push(value_info_fact(name, &g.value(vid).fact));
            inputs.push(name.clone());
            consumed_by.entry(name.clone()).or_default().insert(part.id);
        }
        for v in &materialize {
            let val = g.value(*v);
            if let Some(k) = &val.konst {
                copied.push(const_tensor(&val.name, &val.fact, k));
            }
        }
        let inline: u64 = copied.iter().map(|t| t.raw_data.len() as u64).sum();
        let externalize = inline > INLINE_LIMIT || copied.iter().any(|t| t.is_external());
        for mut t in copied {
            if externalize {
                let (chunk, len) = if t.is_external() {
                    let get = |k: &str| t.external_data.iter().find(|e| e.key == k).map(|e| e.value.clone());
                    let location = get("location").unwrap_or_default();
                    let (path, present) = super::load::resolve_external(&loaded.dir, &location).map_err(SplitError)?;
                    if !present {
                        return Err(SplitError(format!(
                            "external data `{location}` of `{}` is missing; cannot copy it",
                            t.name
                        )));
                    }
                    let offset = get("offset").and_then(|s| s.parse().ok()).unwrap_or(0);
                    let size = std::fs::metadata(&path)
                        .map_err(|e| SplitError(format!("{}: cannot read: {e}", path.display())))?
                        .len();
                    let len = match get("length").and_then(|s| s.parse().ok()) {
                        Some(l) => l,
                        None => size.saturating_sub(offset),
                    };
                    if offset.checked_add(len).is_none_or(|end| end > size) {
                        return Err(SplitError(format!(
                            "{}: `{}` needs bytes {offset}..{} but the file has {size}",
                            path.display(),
                            t.name,
                            offset.saturating_add(len)
                        )));
                    }
                    (Chunk::FileRange { path, offset, len }, len)
                } else {
                    let len = t.raw_data.len() as u64;
                    (Chunk::Bytes(t.raw_data.clone()), len)
                };
                let file = format!("piece_{}.data", part.id);
                // Keep offsets aligned to 64 bytes, as external-data writers commonly do.
                let pad = (64 - ext_len % 64) % 64;
                if pad > 0 {
                    ext_chunks.push(Chunk::Zeros(pad));
                    ext_len += pad;
                }
                let offset = ext_len;
                ext_chunks.push(chunk);
                ext_len += len;
                t.raw_data = Bytes::new();
                t.data_location = 1;
                t.external_data = vec![
                    StringStringEntryProto {
                        key: "location".into(),
                        value: file.clone(),
                    },
                    StringStringEntryProto {
                        key: "offset".into(),
                        value: offset.to_string(),
                    },
                    StringStringEntryProto {
                        key: "length".into(),
                        value: len.to_string(),
                    },
                ];
                ext_name = Some(file);
            }
            graph.initializer.push(t);
        }
        let mut outputs = Vec::new();
        for n in &nodes {
            let carries_const_output = k == last && const_outputs.contains(n);
            if !own.contains(n) && !carries_const_output {
                continue;
            }
            for v in g.node(*n).outputs.iter().flatten() {
                let val = g.value(*v);
                let outside = val
                    .consumers
                    .iter()
                    .any(|c| !members.contains(c) && plan.side[c.index()] != Side::Const);
                if outside || graph_outputs.contains(val.name.as_str()) {
                    graph.output.push(value_info_fact(&val.name, &val.fact));
                    outputs.push(val.name.to_string());
                    produced_by.insert(val.name.to_string(), part.id);
                }
            }
        }
        for n in &nodes {
            for v in g.node(*n).outputs.iter().flatten() {
                let val = g.value(*v);
                if !outputs.iter().any(|o| *o == val.name)
                    && matches!(val.kind, ValueKind::Activation | ValueKind::Constant)
                {
                    graph.value_info.push(value_info_fact(&val.name, &val.fact));
                }
            }
        }
        graph.node = proto_nodes;
        let called: BTreeSet<(String, String)> = graph
            .node
            .iter()
            .map(|n| (n.domain.to_string(), n.op_type.to_string()))
            .collect();
        // Inlined function bodies may use domains only the functions import.
        let mut opset_import = loaded.proto.opset_import.clone();
        if inlined_here {
            for f in &loaded.proto.functions {
                for o in &f.opset_import {
                    if !opset_import.iter().any(|x| x.domain == o.domain) {
                        opset_import.push(o.clone());
                    }
                }
            }
        }
        let model = ModelProto {
            ir_version: loaded.proto.ir_version,
            opset_import,
            producer_name: "tilecut split".into(),
            producer_version: env!("CARGO_PKG_VERSION").into(),
            graph: Some(graph),
            functions: loaded
                .proto
                .functions
                .iter()
                .filter(|f| called.contains(&(f.domain.clone(), f.name.clone())))
                .cloned()
                .collect(),
            ..Default::default()
        };
        let file = format!(
            "piece_{}_{}.onnx",
            part.id,
            if part.side == Side::Accel { "accel" } else { "cpu" }
        );
        files.push(OutFile::from_bytes(file.clone(), model.encode_to_vec()));
        if let Some(e) = &ext_name {
            files.push(OutFile {
                name: e.clone(),
                content: std::mem::take(&mut ext_chunks),
            });
        }
        entries.push(PieceEntry {
            id: part.id,
            file,
            side: part.side,
            inputs,
            outputs,
            external_data: ext_name,
        });
    }
    let graph_inputs: Vec<String> = g.inputs.iter().map(|i| g.value(*i).name.to_string()).collect();
    let mut wiring = Vec::new();
    let mut names: BTreeSet<String> = consumed_by.keys().cloned().collect();
    names.extend(produced_by.keys().cloned());
    for t in names {
        let from = if graph_inputs.contains(&t) {
            "graph-input".to_string()
        } else {
            produced_by
                .get(&t)
                .map(|p| p.to_string())
                .unwrap_or_else(|| "graph-input".into())
        };
        let mut to: Vec<String> = consumed_by
            .get(&t)
            .map(|s| s.iter().map(|p| p.to_string()).collect())
            .unwrap_or_default();
        if graph_outputs.contains(t.as_str()) {
            to.push("graph-output".into());
        }
        wiring.push(Wire { tensor: t, from, to });
    }
    let manifest = Manifest {
        schema_version: MANIFEST_VERSION,
        model: loaded.path.display().to_string(),
        execution_order: parts.iter().map(|p| p.id).collect(),
        pieces: entries,
        graph_inputs,
        graph_outputs: graph_outputs.iter().map(|s| s.to_string()).collect(),
        wiring,
    };
    Ok((files, manifest))
}

/// Where files go; tests inject one that fails midway.
pub trait Sink {
    fn put(&mut self, dir: &Path, file: &OutFile) -> std::io::Result<()>;
}

pub struct FileSink;

impl Sink for FileSink {
    fn put(&mut self, dir: &Path, file: &OutFile) -> std::io::Result<()> {
        let f = std::fs::File::create(dir.join(&file.name))?;
        let mut w = std::io::BufWriter::with_capacity(1 << 20, f);
        file.write_to(&mut w)?;
        w.into_inner().map_err(|e| e.into_error())?.sync_all()
    }
}

/// Writes the pieces and the manifest into `out` atomically: everything goes to a temporary
/// sibling folder that is renamed into place at the end, so a failure leaves no partial
/// folder. An existing non-empty `out` is refused unless `force`.
pub fn write(
    out: &Path,
    files: &[OutFile],
    manifest: &Manifest,
    force: bool,
    sink: &mut dyn Sink,
) -> Result<(), SplitError> {
    let shown = out.display().to_string();
    if out.exists() {
        if !out.is_dir() {
            return Err(SplitError(format!("{shown}: exists and is not a folder")));
        }
        let non_empty = std::fs::read_dir(out).map(|mut d| d.next().is_some()).unwrap_or(true);
        if non_empty && !force {
            return Err(SplitError(format!(
                "{shown}: folder exists and is not empty (use --force to replace it)"
            )));
        }
    }
    let parent = out
        .parent()
        .filter(|p| !p.as_os_str().is_empty())
        .unwrap_or(Path::new("."));
    let name = out
        .file_name()
        .map(|n| n.to_string_lossy().into_owned())
        .unwrap_or_else(|| "split".into());
    let tmp: PathBuf = parent.join(format!(".{name}.tilecut-tmp-{}", std::process::id()));
    let _ = std::fs::remove_dir_all(&tmp);
    std::fs::create_dir_all(&tmp).map_err(|e| SplitError(format!("{}: cannot create: {e}", tmp.display())))?;
    let result = (|| -> Result<(), SplitError> {
        for f in files {
            sink.put(&tmp, f)
                .map_err(|e| SplitError(format!("{}: cannot write: {e}", tmp.join(&f.name).display())))?;
        }
        let m = serde_json::to_vec_pretty(manifest).map_err(|e| SplitError(e.to_string()))?;
        sink.put(&tmp, &OutFile::from_bytes("manifest.json", m))
            .map_err(|e| SplitError(format!("{}: cannot write: {e}", tmp.join("manifest.json").display())))?;
        if out.exists() {
            let old = parent.join(format!(".{name}.tilecut-old-{}", std::process::id()));
            std::fs::rename(out, &old).map_err(|e| SplitError(format!("{shown}: cannot replace: {e}")))?;
            std::fs::rename(&tmp, out).map_err(|e| SplitError(format!("{shown}: cannot move into place: {e}")))?;
            let _ = std::fs::remove_dir_all(&old);
        } else {
            std::fs::rename(&tmp, out).map_err(|e| SplitError(format!("{shown}: cannot move into place: {e}")))?;
        }
        Ok(())
    })();
    if result.is_err() {
        let _ = std::fs::remove_dir_all(&tmp);
    }
    result
}
