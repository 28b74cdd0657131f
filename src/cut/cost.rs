//! The cost model: per-node time on each side (a roofline estimate), per-tensor transfer
//! cost, per-partition dispatch cost, all in integer picoseconds so sums are exact.
//!
//! Assumptions (also in the README): CPU time = max(work ÷ the CPU's rate for the node's
//! type, bytes read and written ÷ CPU memory bandwidth); accelerator time = work ÷ (all
//! compute tiles × their per-type rate) for compute ops, bytes ÷ (columns × I/O-tile
//! bandwidth) for data movement; work = 2 × MACs + other ops. Transfer = latency + bytes ÷
//! host bandwidth + layout conversion, plus, for a float tensor when the array runs floats
//! as bf16, its bytes ÷ the conversion rate: the type changes where a tensor enters or leaves
//! the array, and tensors stay bf16 from one array op to the next. Weights are loaded once
//! and never counted per inference.

use crate::ir::{DType, Graph, NodeId, ValueKind};
use crate::rules::{Candidate, Verdict};
use crate::target::{type_name, Target};

pub const PS_PER_S: f64 = 1e12;

fn ps(seconds: f64) -> u64 {
    if seconds.is_finite() && seconds > 0.0 {
        (seconds * PS_PER_S).round().min(u64::MAX as f64 / 8.0) as u64
    } else {
        0
    }
}

/// Costs of every node and value of the main graph.
#[derive(Clone, Debug)]
pub struct Costs {
    pub cpu_ps: Vec<u64>,
    /// None where the node cannot run on the accelerator.
    pub accel_ps: Vec<Option<u64>>,
    /// Per value: what crossing the CPU/accelerator boundary costs once, `convert_ps`
    /// included.
    pub transfer_ps: Vec<u64>,
    /// Per value: the part of `transfer_ps` that converts a float tensor to or from bf16
    /// (zero unless the target runs floats as bf16). A tensor passed between two accelerator
    /// partitions through system memory stays bf16 and does not pay it.
    pub convert_ps: Vec<u64>,
    /// Per value: bytes of one instance (None if unknown).
    pub bytes: Vec<Option<u64>>,
    pub dispatch_ps: u64,
    /// Nodes whose work is unknown (symbolic dims): costed as zero work.
    pub unknown_work: Vec<NodeId>,
}

/// The data type whose rate applies to a node: its effective activation type (the assumed one
/// under `--assume-quantized`).
fn node_type(v: &Verdict) -> Option<DType> {
    v.quantized_as.map(|q| q.act).or(v.rate_type)
}

/// Bytes of one instance of every value, and whether it is moved as a float tensor other
/// than bf16 (so that the array converts it where it enters or leaves); under
/// `--assume-quantized`, float tensors that an assumed-quantized node writes, reads as
/// weights, or alone consumes take the assumed type's size and type (a quantized model would
/// store and move them so).
pub fn value_bytes(g: &Graph, verdicts: &[Verdict]) -> (Vec<Option<u64>>, Vec<bool>) {
    let mut bytes: Vec<Option<u64>> = g.values.iter().map(|v| v.fact.bytes()).collect();
    let mut float: Vec<bool> = g
        .values
        .iter()
        .map(|v| crate::infer::is_tensor(&v.fact) && v.fact.dtype.is_some_and(|d| d.is_float() && d != DType::BF16))
        .collect();
    if verdicts.iter().all(|v| v.quantized_as.is_none()) {
        return (bytes, float);
    }
    let mut resize = |bytes: &mut Vec<Option<u64>>, v: crate::ir::ValueId, to: DType| {
        let val = g.value(v);
        // A sequence keeps its elements' sizes: its own shape is not a tensor's.
        if crate::infer::is_tensor(&val.fact) && val.fact.dtype.is_some_and(DType::is_float) {
            bytes[v.index()] = val.fact.shape.element_count().and_then(|n| to.bytes_for(n));
            float[v.index()] = to.is_float() && to != DType::BF16;
        }
    };
    for (i, n) in g.nodes.iter().enumerate() {
        let Some(q) = verdicts[i].quantized_as else { continue };
        for o in n.outputs.iter().flatten() {
            resize(&mut bytes, *o, q.out);
        }
        for v in n.inputs.iter().flatten() {
            let val = g.value(*v);
            if matches!(val.kind, ValueKind::Initializer | ValueKind::Constant) {
                if let Some(w) = q.weight {
                    resize(&mut bytes, *v, w);
                }
            } else if val
                .consumers
                .iter()
                .all(|c| g.node(*c).folded || verdicts[c.index()].quantized_as.is_some())
            {
                resize(&mut bytes, *v, q.act);
            }
        }
    }
    (bytes, float)
}

/// Bytes of the weights (initializers and constants) `nodes` read, each counted once.
pub fn weight_bytes(g: &Graph, costs: &Costs, nodes: &[NodeId]) -> u64 {
    let mut seen = std::collections::BTreeSet::new();
    let mut total = 0u64;
    for n in nodes {
        for v in g.node(*n).all_inputs() {
            let val = g.value(v);
            if matches!(val.kind, ValueKind::Initializer | ValueKind::Constant) && seen.insert(v) {
                let b = costs.bytes[v.index()].or_else(|| val.data.as_ref().and_then(|d| d.bytes()));
                total = total.saturating_add(b.unwrap_or(0));
            }
        }
    }
    total
}

pub fn costs(g: &Graph, verdicts: &[Verdict], target: &Target) -> Costs {
    let f = &target.file;
    let (bytes, float) = value_bytes(g, verdicts);
    let convert_ps: Vec<u64> = bytes
        .iter()
        .zip(&float)
        .map(|(b, &is_float)| {
            if is_float && target.floats_as_bf16() {
                ps(b.unwrap_or(0) as f64 / f.float.conversion_bytes_per_s)
            } else {
                0
            }
        })
        .collect();
    let transfer_ps: Vec<u64> = bytes
        .iter()
        .zip(&convert_ps)
        .map(|(b, &convert)| {
            ps(f.host.transfer_latency_s
                + b.unwrap_or(0) as f64 / f.host.bandwidth_bytes_per_s
                + f.host.layout_conversion_s)
            .saturating_add(convert)
        })
        .collect();
    let mut cpu_ps = Vec::with_capacity(g.nodes.len());
    let mut accel_ps = Vec::with_capacity(g.nodes.len());
    let mut unknown_work = Vec::new();
    let array_io = f.array.columns as f64 * f.array.io_tile.bandwidth_bytes_per_s;
    for (i, n) in g.nodes.iter().enumerate() {
        let id = NodeId::new(i);
        if n.folded {
            cpu_ps.push(0);
            accel_ps.push(Some(0));
            continue;
        }
        let cost = g.cost(id);
        let work = match (cost.macs, cost.ops) {
            (Some(m), Some(o)) => m.saturating_mul(2).saturating_add(o) as f64,
            _ => {
                unknown_work.push(id);
                0.0
            }
        };
        // Per-inference bytes: activations in and out (weights are resident).
        let moved: u64 = n
            .all_inputs()
            .iter()
            .chain(n.outputs.iter().flatten())
            .filter(|v| !matches!(g.value(**v).kind, ValueKind::Initializer | ValueKind::Constant))
            .filter_map(|v| bytes[v.index()])
            .fold(0, u64::saturating_add);
        let dt = node_type(&verdicts[i]);
        let tname = dt.map(type_name).unwrap_or("fp32");
        let cpu = (work / target.cpu_ops_per_s(tname)).max(moved as f64 / f.cpu.memory_bandwidth_bytes_per_s);
        cpu_ps.push(ps(cpu));
        let v = &verdicts[i];
        let accel = match v.candidate {
            Candidate::Cpu => None,
            Candidate::Const => Some(0),
            Candidate::Accel => {
                let is_move = work == 0.0 && cost.macs == Some(0);
                if is_move {
                    Some(ps(moved as f64 / array_io))
                } else {
                    let is_float = dt.is_some_and(DType::is_float)
                        && !matches!(n.op_type.as_str(), "QuantizeLinear" | "DequantizeLinear");
                    let rate_type = if is_float { "bf16" } else { tname };
                    let rate = target
                        .tile_macs_per_s(rate_type)
                        .or_else(|| target.tile_macs_per_s("int8"))
                        .unwrap_or(1.0)
                        * 2.0
                        * target.compute_tiles() as f64;
                    Some(ps(work / rate))
                }
            }
        };
        accel_ps.push(accel);
    }
    Costs {
        cpu_ps,
        accel_ps,
        transfer_ps,
        convert_ps,
        bytes,
        dispatch_ps: ps(f.host.dispatch_overhead_s),
        unknown_work,
    }
}
