//! `tilecut inspect`: what the reader found in a model.
//!
//! JSON shape (schema in `schemas/inspect.schema.json`, version `INSPECT_SCHEMA_VERSION`):
//! `schema_version`; `model` {path, ir_version, producer, opsets[{domain, version}], nodes,
//! nodes_in_subgraphs, functions[], params, weight_bytes, macs, ops, activation_bytes,
//! unknown_because[], needs_values[]}; `inputs[]`/`outputs[]` {name, dtype, shape}; `op_counts[]` {op, count};
//! `tensors[]` {name, dtype, shape, kind, producer, bytes}; `unknown_shapes[]` {tensor, node,
//! reason}; `warnings[]` {code, node?, tensor?, message}. A shape is an array of integers
//! (known), strings (symbolic) and nulls (unknown), or null when even the rank is unknown;
//! a figure that depends on an unknown dim is null and `unknown_because` names the dims;
//! `needs_values` names the inputs whose values size tensors or pick an If's branch and that
//! the file does not give (`--value` sets them).

use std::collections::BTreeMap;
use std::io::Write;

use serde::Serialize;
use tabled::settings::Style;
use tabled::{Table, Tabled};

use crate::diag::Diagnostic;
use crate::infer::UnknownReasons;
use crate::ir::{DType, Dim, Fact, Graph, Model, Shape, ValueKind, ValueType};

use super::{grouped, maybe};

pub const INSPECT_SCHEMA_VERSION: u32 = 1;

/// The report borrows the graph: its `tensors` list, one row per value, is written straight
/// from the IR when serialised, never built as a second tree (on a 100k-node model that tree
/// was a sixth of the run time, and the table never shows it).
#[derive(Serialize, Debug, Clone)]
pub struct InspectReport<'a> {
    pub schema_version: u32,
    pub model: ModelSummary,
    pub inputs: Vec<Port>,
    pub outputs: Vec<Port>,
    pub op_counts: Vec<OpCount>,
    pub tensors: TensorRows<'a>,
    pub unknown_shapes: UnknownShapes<'a>,
    pub warnings: Vec<Diagnostic>,
    /// Inputs declared with unknown dims, for the table's hint (`super::inputs_to_size`);
    /// the JSON shows them in `inputs[]` already.
    #[serde(skip)]
    pub inputs_to_size: Vec<String>,
}

#[derive(Serialize, Debug, Clone)]
pub struct Opset {
    pub domain: String,
    pub version: i64,
}

#[derive(Serialize, Debug, Clone)]
pub struct ModelSummary {
    pub path: String,
    pub ir_version: i64,
    pub producer: String,
    pub opsets: Vec<Opset>,
    pub nodes: usize,
    pub nodes_in_subgraphs: usize,
    pub functions: Vec<String>,
    pub params: u64,
    pub weight_bytes: u64,
    pub macs: Option<u64>,
    pub ops: Option<u64>,
    pub activation_bytes: Option<u64>,
    pub unknown_because: Vec<String>,
    pub needs_values: Vec<String>,
}

#[derive(Serialize, Debug, Clone)]
pub struct Port {
    pub name: String,
    pub dtype: Option<String>,
    pub shape: Option<JsonShape>,
}

#[derive(Serialize, Debug, Clone)]
pub struct OpCount {
    pub op: String,
    pub count: usize,
}

/// One row of `tensors[]`, borrowed from the graph.
#[derive(Serialize, Debug, Clone, PartialEq)]
pub struct TensorRow<'a> {
    pub name: &'a str,
    pub dtype: Option<std::borrow::Cow<'static, str>>,
    pub shape: Option<DimsJson<'a>>,
    pub kind: &'static str,
    pub producer: Option<&'a str>,
    pub bytes: Option<u64>,
}

/// Every value of a graph as a `tensors[]` row, produced on demand.
#[derive(Debug, Clone, Copy)]
pub struct TensorRows<'a>(pub &'a Graph);

impl<'a> TensorRows<'a> {
    pub fn len(&self) -> usize {
        self.0.values.len()
    }

    pub fn is_empty(&self) -> bool {
        self.0.values.is_empty()
    }

    pub fn iter(&self) -> impl Iterator<Item = TensorRow<'a>> + 'a {
        let g = self.0;
        g.values.iter().map(move |v| TensorRow {
            name: &v.name,
            dtype: dtype_name(&v.fact),
            shape: v.fact.shape.dims().map(DimsJson),
            kind: v.kind.as_str(),
            producer: v.producer.map(|p| g.node(p).name.as_str()),
            bytes: value_bytes(v),
        })
    }
}

impl Serialize for TensorRows<'_> {
    fn serialize<S: serde::Serializer>(&self, s: S) -> Result<S::Ok, S::Error> {
        s.collect_seq(self.iter())
    }
}

fn value_bytes(v: &crate::ir::Value) -> Option<u64> {
    v.data.as_ref().and_then(|d| d.bytes()).or_else(|| v.fact.bytes())
}

/// One row of `unknown_shapes[]`, borrowed from the graph and the inference's reasons.
#[derive(Serialize, Debug, Clone, PartialEq)]
pub struct UnknownShape<'a> {
    pub tensor: &'a str,
    pub node: Option<&'a str>,
    pub reason: &'a str,
}

/// The tensors inference left unknown (or symbolic), as rows produced on demand: a model
/// with a symbolic batch dim lists every activation here.
#[derive(Debug, Clone, Copy)]
pub struct UnknownShapes<'a> {
    graph: &'a Graph,
    reasons: &'a UnknownReasons,
}

impl<'a> UnknownShapes<'a> {
    pub fn len(&self) -> usize {
        self.reasons.len()
    }

    pub fn is_empty(&self) -> bool {
        self.reasons.is_empty()
    }

    pub fn iter(&self) -> impl Iterator<Item = UnknownShape<'a>> + 'a {
        let g = self.graph;
        self.reasons.iter().map(move |(id, why)| {
            let v = g.value(*id);
            UnknownShape {
                tensor: &v.name,
                node: v.producer.map(|p| g.node(p).name.as_str()),
                reason: why,
            }
        })
    }
}

impl Serialize for UnknownShapes<'_> {
    fn serialize<S: serde::Serializer>(&self, s: S) -> Result<S::Ok, S::Error> {
        s.collect_seq(self.iter())
    }
}

/// A shape as JSON: integers, strings for symbols, null for unknown dims.
#[derive(Debug, Clone, PartialEq)]
pub struct JsonShape(pub Vec<Dim>);

impl Serialize for JsonShape {
    fn serialize<S: serde::Serializer>(&self, s: S) -> Result<S::Ok, S::Error> {
        DimsJson(&self.0).serialize(s)
    }
}

/// Borrowed dims written as a JSON shape (see `JsonShape`).
#[derive(Debug, Clone, Copy, PartialEq)]
pub struct DimsJson<'a>(pub &'a [Dim]);

impl Serialize for DimsJson<'_> {
    fn serialize<S: serde::Serializer>(&self, s: S) -> Result<S::Ok, S::Error> {
        use serde::ser::SerializeSeq;
        let mut seq = s.serialize_seq(Some(self.0.len()))?;
        for d in self.0 {
            match d {
                Dim::Known(v) => seq.serialize_element(v)?,
                Dim::Sym(x) => seq.serialize_element(&**x)?,
                Dim::Unknown => seq.serialize_element(&None::<u64>)?,
            }
        }
        seq.end()
    }
}

pub fn shape_json(s: &Shape) -> Option<JsonShape> {
    s.dims().map(|d| JsonShape(d.to_vec()))
}

fn dtype_name(f: &Fact) -> Option<std::borrow::Cow<'static, str>> {
    use std::borrow::Cow;
    match &f.value_type {
        ValueType::Tensor => f.dtype.map(|d| Cow::Borrowed(d.name())),
        ValueType::SparseTensor => f.dtype.map(|d| Cow::Owned(format!("sparse({})", d.name()))),
        ValueType::Sequence(s) => Some(Cow::Owned(format!(
            "sequence({})",
            s.element.dtype.map(DType::name).unwrap_or("?")
        ))),
        ValueType::Optional(inner) => Some(Cow::Owned(format!(
            "optional({})",
            inner.dtype.map(DType::name).unwrap_or("?")
        ))),
        ValueType::Map(_) => Some(Cow::Borrowed("map")),
    }
}

/// True if every use of `v` is as the scale or zero point of a (De)QuantizeLinear.
fn only_quant_params(g: &Graph, v: crate::ir::ValueId) -> bool {
    let uses = g.value(v).consumers.iter().map(|&c| g.node(c));
    let mut any = false;
    for n in uses {
        any = true;
        let is_q = matches!(n.op_type.as_str(), "QuantizeLinear" | "DequantizeLinear");
        if !is_q || n.inputs.first() == Some(&Some(v)) {
            return false;
        }
    }
    any
}

/// Weights (params, bytes): stored initializers and generated constants (Constant,
/// ConstantOfShape) that are not integer shape/index data. Quantization scales and zero
/// points count as weight bytes but not as parameters. Every graph, bodies included.
/// (parameters, weight bytes) of a graph and its bodies (conventions in the README).
pub fn params_and_weight_bytes(g: &Graph) -> (u64, u64) {
    let mut w = (0, 0);
    weights(g, &mut w);
    w
}

fn weights(g: &Graph, acc: &mut (u64, u64)) {
    for (i, v) in g.values.iter().enumerate() {
        add_weight(g, i, v, acc);
    }
    for n in &g.nodes {
        for b in n.bodies() {
            weights(&b.graph, acc);
        }
    }
}

/// Adds value `i` of `g` to (parameters, weight bytes) if it is a weight.
fn add_weight(g: &Graph, i: usize, v: &crate::ir::Value, acc: &mut (u64, u64)) {
    let source = match v.kind {
        ValueKind::Initializer => true,
        ValueKind::Constant => v
            .producer
            .is_some_and(|p| matches!(g.node(p).op_type.as_str(), "Constant" | "ConstantOfShape")),
        _ => false,
    };
    if !source
        || matches!(
            v.fact.dtype,
            Some(DType::I64) | Some(DType::Bool) | Some(DType::Str) | None
        )
    {
        return;
    }
    let n = v
        .data
        .as_ref()
        .and_then(|d| d.element_count())
        .or_else(|| v.fact.shape.element_count())
        .unwrap_or(0);
    let b = v
        .data
        .as_ref()
        .and_then(|d| d.bytes())
        .or_else(|| v.fact.bytes())
        .unwrap_or(0);
    if !only_quant_params(g, crate::ir::ValueId::new(i)) {
        acc.0 = acc.0.saturating_add(n);
    }
    acc.1 = acc.1.saturating_add(b);
}

fn count_body_nodes(g: &Graph) -> usize {
    g.nodes
        .iter()
        .flat_map(|n| n.bodies().iter())
        .map(|b| b.graph.nodes.len() + count_body_nodes(&b.graph))
        .sum()
}

/// Nodes from which `build` walks the values on a thread of their own.
const PARALLEL_WALK_MIN_NODES: usize = 4096;

/// Builds the report. Pure: same model, same report.
pub fn build<'a>(model: &'a Model, diags: &[Diagnostic], reasons: &'a UnknownReasons) -> InspectReport<'a> {
    let g = &model.graph;
    let port = |id: &crate::ir::ValueId| {
        let v = g.value(*id);
        Port {
            name: v.name.to_string(),
            dtype: dtype_name(&v.fact).map(String::from),
            shape: shape_json(&v.fact.shape),
        }
    };
    // One walk over the nodes and one over the values gather every figure: on a large graph
    // each walk reads tens of megabytes, and a walk per figure read them again and again. The
    // two share nothing until their sums (all order-free) are added: a large graph's value
    // walk runs on another thread beside the node walk.
    let node_walk = || {
        // Counted by the interned (domain, op) names' addresses; labels are made once per op.
        let mut counts: crate::fastmap::FastMap<(usize, usize), (usize, &crate::ir::Node)> = Default::default();
        let mut macs = Some(0u64);
        let mut ops = Some(0u64);
        let mut because = crate::ir::NameList::new();
        let mut w = (0u64, 0u64);
        let mut body_nodes = 0usize;
        for (k, n) in g.nodes.iter().enumerate() {
            counts.entry((n.domain.addr(), n.op_type.addr())).or_insert((0, n)).0 += 1;
            for b in n.bodies() {
                body_nodes += b.graph.nodes.len() + count_body_nodes(&b.graph);
                weights(&b.graph, &mut w);
            }
            if n.folded {
                continue;
            }
            let cost = g.cost(crate::ir::NodeId::new(k));
            macs = macs.zip(cost.macs).and_then(|(a, b)| a.checked_add(b));
            ops = ops.zip(cost.ops).and_then(|(a, b)| a.checked_add(b));
            if cost.macs.is_none() || cost.ops.is_none() {
                for d in &cost.needs_dims {
                    if !because.contains(d) {
                        because.push(d.clone());
                    }
                }
            }
        }
        (counts, macs, ops, because, w, body_nodes)
    };
    let value_walk = || {
        let mut activation_bytes = Some(0u64);
        let mut because = crate::ir::NameList::new();
        let mut w = (0u64, 0u64);
        // A set: a graph can read very many names it does not define.
        let captured: std::collections::HashSet<&str> = g.captured.iter().map(|c| g.value(*c).name.as_str()).collect();
        for (i, v) in g.values.iter().enumerate() {
            add_weight(g, i, v, &mut w);
            if matches!(v.kind, ValueKind::Input | ValueKind::Activation | ValueKind::Output)
                && !captured.contains(v.name.as_str())
            {
                let bytes = value_bytes(v);
                activation_bytes = activation_bytes.zip(bytes).and_then(|(a, b)| a.checked_add(b));
                if bytes.is_none() {
                    if let Some(u) = v.fact.first_unknown() {
                        u.shape.symbols_into(&mut because);
                    }
                }
            }
        }
        (activation_bytes, because, w)
    };
    let ((counts, macs, ops, mut because, wn, body_nodes), (activation_bytes, because_v, wv)) =
        if g.nodes.len() >= PARALLEL_WALK_MIN_NODES {
            std::thread::scope(|scope| {
                let worker = std::thread::Builder::new().spawn_scoped(scope, value_walk);
                let nodes = node_walk();
                let values = match worker {
                    Ok(h) => h.join().unwrap_or_else(|p| std::panic::resume_unwind(p)),
                    // No thread could be started.
                    Err(_) => value_walk(),
                };
                (nodes, values)
            })
        } else {
            (node_walk(), value_walk())
        };
    // `add_weight` saturates, so two partial sums saturate to what one walk would have found.
    let w = (wn.0.saturating_add(wv.0), wn.1.saturating_add(wv.1));
    because.extend(because_v);
    // Re-keyed by label ("Conv", "my.domain.Op") for a stable order; "" and "ai.onnx" merge.
    let counts: BTreeMap<String, usize> =
        counts
            .into_iter()
            .map(|(_, (n, node))| (node.op_label(), n))
            .fold(BTreeMap::new(), |mut m, (label, n)| {
                *m.entry(label).or_default() += n;
                m
            });
    because.sort();
    because.dedup();
    let mut warnings = diags.to_vec();
    warnings.sort();
    warnings.dedup();
    InspectReport {
        schema_version: INSPECT_SCHEMA_VERSION,
        model: ModelSummary {
            path: model.path.display().to_string(),
            ir_version: model.ir_version,
            producer: model.producer.clone(),
            opsets: model
                .opsets
                .iter()
                .map(|(d, v)| Opset {
                    domain: if d.is_empty() { "ai.onnx".into() } else { d.clone() },
                    version: *v,
                })
                .collect(),
            nodes: g.nodes.len(),
            nodes_in_subgraphs: body_nodes,
            functions: model.functions.clone(),
            params: w.0,
            weight_bytes: w.1,
            macs,
            ops,
            activation_bytes,
            unknown_because: because.iter().map(|d| d.to_string()).collect(),
            needs_values: model.needs_values.clone(),
        },
        inputs: g.inputs.iter().map(port).collect(),
        outputs: g.outputs.iter().map(port).collect(),
        op_counts: counts.into_iter().map(|(op, count)| OpCount { op, count }).collect(),
        tensors: TensorRows(g),
        unknown_shapes: UnknownShapes { graph: g, reasons },
        warnings,
        inputs_to_size: super::inputs_to_size(g),
    }
}

pub fn render_json(r: &InspectReport, out: &mut dyn Write) -> std::io::Result<()> {
    super::write_json(r, out)
}

fn shape_text(s: &Option<JsonShape>) -> String {
    match s {
        None => "?".into(),
        Some(d) => format!("[{}]", d.0.iter().map(|x| x.to_string()).collect::<Vec<_>>().join(", ")),
    }
}

#[derive(Tabled)]
struct KeyValue {
    #[tabled(rename = "model")]
    key: String,
    #[tabled(rename = "")]
    value: String,
}

#[derive(Tabled)]
struct PortRow {
    #[tabled(rename = "port")]
    side: &'static str,
    name: String,
    dtype: String,
    shape: String,
}

#[derive(Tabled)]
struct OpRow {
    op: String,
    nodes: usize,
}

#[derive(Tabled)]
struct UnknownRow {
    tensor: String,
    node: String,
    reason: String,
}

/// Most rows a table section shows before it says how many it left out.
const TABLE_ROW_LIMIT: usize = 25;

pub fn render_table(r: &InspectReport, out: &mut dyn Write) -> std::io::Result<()> {
    let m = &r.model;
    let opsets: Vec<String> = m.opsets.iter().map(|o| format!("{} {}", o.domain, o.version)).collect();
    let mut kv = vec![
        KeyValue {
            key: "file".into(),
            value: m.path.clone(),
        },
        KeyValue {
            key: "ir version".into(),
            value: m.ir_version.to_string(),
        },
        KeyValue {
            key: "opsets".into(),
            value: opsets.join(", "),
        },
        KeyValue {
            key: "nodes".into(),
            value: format!(
                "{} (+{} in subgraphs)",
                grouped(m.nodes as u64),
                grouped(m.nodes_in_subgraphs as u64)
            ),
        },
        KeyValue {
            key: "parameters".into(),
            value: grouped(m.params),
        },
        KeyValue {
            key: "weight bytes".into(),
            value: grouped(m.weight_bytes),
        },
        KeyValue {
            key: "MACs".into(),
            value: maybe(m.macs),
        },
        KeyValue {
            key: "other ops".into(),
            value: maybe(m.ops),
        },
        KeyValue {
            key: "activation bytes".into(),
            value: maybe(m.activation_bytes),
        },
    ];
    if !m.producer.is_empty() {
        kv.insert(
            1,
            KeyValue {
                key: "producer".into(),
                value: m.producer.clone(),
            },
        );
    }
    // What fixes the unknown figures: the symbolic dims they depend on, the graph inputs
    // declared with dims the file leaves unknown (`-1`, missing), which only `--input` sizes,
    // and the inputs whose values size tensors, which only `--value` gives.
    let (inputs, values): (&[String], &[String]) =
        if m.macs.is_none() || m.ops.is_none() || m.activation_bytes.is_none() {
            (&r.inputs_to_size, &m.needs_values)
        } else {
            (&[], &[])
        };
    let fixes = super::fix_hints(&m.unknown_because, inputs, values);
    if !fixes.is_empty() {
        kv.push(KeyValue {
            key: "unknown until fixed".into(),
            value: fixes.join(" "),
        });
    }
    writeln!(out, "{}", Table::new(kv).with(Style::sharp()))?;
    let ports: Vec<PortRow> = r
        .inputs
        .iter()
        .map(|p| ("input", p))
        .chain(r.outputs.iter().map(|p| ("output", p)))
        .map(|(side, p)| PortRow {
            side,
            name: p.name.clone(),
            dtype: p.dtype.clone().unwrap_or_else(|| "?".into()),
            shape: shape_text(&p.shape),
        })
        .collect();
    writeln!(out, "{}", Table::new(ports).with(Style::sharp()))?;
    let mut ops: Vec<OpRow> = r
        .op_counts
        .iter()
        .map(|o| OpRow {
            op: o.op.clone(),
            nodes: o.count,
        })
        .collect();
    ops.sort_by(|a, b| b.nodes.cmp(&a.nodes).then_with(|| a.op.cmp(&b.op)));
    writeln!(out, "{}", Table::new(ops).with(Style::sharp()))?;
    if !r.unknown_shapes.is_empty() {
        let rows: Vec<UnknownRow> = r
            .unknown_shapes
            .iter()
            .take(TABLE_ROW_LIMIT)
            .map(|u| UnknownRow {
                tensor: u.tensor.to_string(),
                node: u.node.unwrap_or("(graph input)").to_string(),
                reason: u.reason.to_string(),
            })
            .collect();
        writeln!(out, "tensors with unknown shapes: {}", r.unknown_shapes.len())?;
        writeln!(out, "{}", Table::new(rows).with(Style::sharp()))?;
        if r.unknown_shapes.len() > TABLE_ROW_LIMIT {
            writeln!(
                out,
                "… {} more (see --format json)",
                r.unknown_shapes.len() - TABLE_ROW_LIMIT
            )?;
        }
    }
    if !r.warnings.is_empty() {
        writeln!(out, "warnings: {}", r.warnings.len())?;
        for w in r.warnings.iter().take(TABLE_ROW_LIMIT) {
            let at = match (&w.node, &w.tensor) {
                (Some(n), Some(t)) => format!(" [node {n}, tensor {t}]"),
                (Some(n), None) => format!(" [node {n}]"),
                (None, Some(t)) => format!(" [tensor {t}]"),
                (None, None) => String::new(),
            };
            writeln!(out, "  {}: {}{}", w.code, w.message, at)?;
        }
        if r.warnings.len() > TABLE_ROW_LIMIT {
            writeln!(
                out,
                "  … {} more (see --format json)",
                r.warnings.len() - TABLE_ROW_LIMIT
            )?;
        }
    }
    Ok(())
}

pub fn render_markdown(r: &InspectReport, out: &mut dyn Write) -> std::io::Result<()> {
    let m = &r.model;
    writeln!(out, "### tilecut inspect: `{}`\n", m.path)?;
    writeln!(out, "| figure | value |\n|---|---|")?;
    writeln!(
        out,
        "| nodes | {} (+{} in subgraphs) |",
        grouped(m.nodes as u64),
        grouped(m.nodes_in_subgraphs as u64)
    )?;
    writeln!(out, "| parameters | {} |", grouped(m.params))?;
    writeln!(out, "| weight bytes | {} |", grouped(m.weight_bytes))?;
    writeln!(out, "| MACs | {} |", maybe(m.macs))?;
    writeln!(out, "| activation bytes | {} |", maybe(m.activation_bytes))?;
    writeln!(out, "| tensors with unknown shapes | {} |", r.unknown_shapes.len())?;
    writeln!(out, "| warnings | {} |", r.warnings.len())
}
