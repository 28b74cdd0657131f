//! `tilecut analyze`: verdicts, the cut, and the cost estimate, as one view model.
//!
//! JSON shape (schema `schemas/analyze.schema.json`, version `ANALYZE_SCHEMA_VERSION`):
//! `schema_version`, `estimate_note`, `model` {path, nodes, params, macs}, `target` {name,
//! source, columns, compute_tiles, tops_int8}, `strategy`, `tensors[]` {name, dtype, shape,
//! bytes, transfer_us}, `nodes[]` {name, op, outputs, placement (cpu|accel|const), partition,
//! macs, cpu_us, accel_us (null where CPU-only), rule, signature, bundle, reasons[] {code,
//! message, rule, blocking}}, `partitions[]` {id, side, nodes, macs, weight_bytes, inputs,
//! outputs, columns, tiles, dispatch_us, est_latency_us}, `cut_points[]` {tensor, producer,
//! consumers, from_partition, to_partition, to_partitions, direction, dtype, shape, bytes,
//! transfer_us}, `summary` {coverage_macs, coverage_nodes, accel_partitions, boundary_bytes,
//! transfers, objective_us, mincut_us, est_latency_us, cpu_only_latency_us, greedy_us (these
//! three null while some node's work depends on an unknown dim), unknown_cost_nodes,
//! needs_dims, needs_inputs, needs_values, columns_budget, columns_used, columns_free, resident, reconfigure_us},
//! `op_summary[]` {op, accel, cpu, const}, `blockers[]` {code, nodes, macs, example},
//! `what_if` (null unless `--assume-*` was given) {assumptions[], summary, delta
//! {coverage_macs, coverage_nodes, accel_partitions, transfers, boundary_bytes,
//! est_latency_us}, moved_to_accel[], moved_to_cpu[]}, `warnings[]`.
//! Times are microseconds derived from integer picoseconds (six decimals are exact).

use std::collections::BTreeMap;
use std::io::Write;

use serde::Serialize;
use tabled::settings::Style;
use tabled::{Table, Tabled};

use crate::cut::{Direction, Plan, Side};
use crate::diag::Diagnostic;
use crate::ir::{Model, ValueKind};
use crate::rules::{Candidate, Reason, Verdict};
use crate::target::Target;

use super::inspect::{shape_json, JsonShape};
use super::term::{Paint, Tone};
use super::{grouped, maybe, pct};

pub const ANALYZE_SCHEMA_VERSION: u32 = 2;

pub const ESTIMATE_NOTE: &str =
    "Latency and column figures are estimates from tilecut's cost model (README, \"Cost model\"), not measurements.";

#[derive(Serialize, Debug, Clone)]
pub struct AnalyzeReport {
    pub schema_version: u32,
    pub estimate_note: &'static str,
    pub model: ModelRef,
    pub target: TargetRef,
    pub strategy: crate::cut::Strategy,
    pub tensors: Vec<TensorCost>,
    pub nodes: Vec<NodeRow>,
    pub partitions: Vec<PartitionRow>,
    pub cut_points: Vec<CutRow>,
    pub summary: Summary,
    pub strategies: Vec<StrategyRow>,
    pub op_summary: Vec<OpRow>,
    pub blockers: Vec<Blocker>,
    /// CPU-bound nodes grouped by op and first blocking reason, the costliest first, each
    /// with a concrete suggestion.
    pub fix_first: Vec<FixRow>,
    /// The figures under `--assume-*` assumptions, beside the real ones above.
    pub what_if: Option<WhatIfReport>,
    pub warnings: Vec<Diagnostic>,
}

/// A what-if scenario next to the real analysis.
#[derive(Serialize, Debug, Clone)]
pub struct WhatIfReport {
    /// The assumptions in words (`assume-supported Softmax`, `assume-quantized`, …).
    pub assumptions: Vec<String>,
    pub summary: Summary,
    /// Assumed minus real, per figure (null where either side is unknown).
    pub delta: Delta,
    /// Nodes that run on the accelerator only under the assumptions, and the reverse.
    pub moved_to_accel: Vec<String>,
    pub moved_to_cpu: Vec<String>,
}

#[derive(Serialize, Debug, Clone, PartialEq)]
pub struct Delta {
    pub coverage_macs: Option<f64>,
    pub coverage_nodes: f64,
    pub accel_partitions: i64,
    pub transfers: i64,
    pub boundary_bytes: i64,
    pub est_latency_us: Option<f64>,
}

/// Assumed minus real.
pub fn delta(real: &Summary, assumed: &Summary) -> Delta {
    let both = |a: Option<f64>, b: Option<f64>| Some(b? - a?);
    Delta {
        coverage_macs: both(real.coverage_macs, assumed.coverage_macs),
        coverage_nodes: assumed.coverage_nodes - real.coverage_nodes,
        accel_partitions: assumed.accel_partitions as i64 - real.accel_partitions as i64,
        transfers: assumed.transfers as i64 - real.transfers as i64,
        boundary_bytes: assumed.boundary_bytes as i64 - real.boundary_bytes as i64,
        est_latency_us: both(real.est_latency_us, assumed.est_latency_us),
    }
}

/// The what-if section from the real report and the stages under the assumptions (only their
/// summary and placements are needed, not a whole second report).
pub fn what_if(real: &AnalyzeReport, assumed: &Inputs, w: &crate::WhatIf) -> WhatIfReport {
    let mut to_accel = Vec::new();
    let mut to_cpu = Vec::new();
    for (r, a) in real.nodes.iter().zip(&assumed.plan.side) {
        match (r.placement, a) {
            (Side::Cpu, Side::Accel) => to_accel.push(r.name.clone()),
            (Side::Accel, Side::Cpu) => to_cpu.push(r.name.clone()),
            _ => {}
        }
    }
    let summary = summary(assumed);
    WhatIfReport {
        assumptions: w.describe(),
        delta: delta(&real.summary, &summary),
        summary,
        moved_to_accel: to_accel,
        moved_to_cpu: to_cpu,
    }
}

#[derive(Serialize, Debug, Clone)]
pub struct ModelRef {
    pub path: String,
    pub nodes: usize,
    pub params: u64,
    pub macs: Option<u64>,
}

#[derive(Serialize, Debug, Clone)]
pub struct TargetRef {
    pub name: String,
    pub source: String,
    pub columns: u32,
    pub compute_tiles: u64,
    pub tops_int8: Option<f64>,
}

#[derive(Serialize, Debug, Clone)]
pub struct TensorCost {
    pub name: String,
    pub dtype: Option<String>,
    pub shape: Option<JsonShape>,
    pub bytes: Option<u64>,
    pub transfer_us: f64,
}

#[derive(Serialize, Debug, Clone)]
pub struct NodeRow {
    pub name: String,
    pub op: String,
    pub outputs: Vec<String>,
    pub placement: Side,
    pub partition: Option<usize>,
    pub macs: Option<u64>,
    pub cpu_us: f64,
    pub accel_us: Option<f64>,
    pub rule: Option<String>,
    pub signature: String,
    pub bundle: Vec<String>,
    pub reasons: Vec<Reason>,
}

#[derive(Serialize, Debug, Clone)]
pub struct PartitionRow {
    pub id: usize,
    pub side: Side,
    pub nodes: Vec<String>,
    pub macs: u64,
    pub weight_bytes: u64,
    pub inputs: Vec<String>,
    pub outputs: Vec<String>,
    /// Estimated columns and compute tiles the partition needs (accelerator partitions).
    pub columns: Option<u64>,
    pub tiles: Option<u64>,
    pub dispatch_us: f64,
    pub est_latency_us: f64,
    /// How an accelerator partition occupies the array (null for CPU partitions).
    pub mapping: Option<MappingRow>,
}

#[derive(Serialize, Debug, Clone)]
pub struct MappingRow {
    pub stages: usize,
    pub bound: crate::map::Bound,
    pub local_bytes: u64,
    pub buffer_bytes: u64,
    pub streamed_bytes: u64,
    pub skip_buffer_bytes: u64,
    pub routed_streams: u64,
    pub dma_channels_needed: u64,
    pub pipeline_latency_us: f64,
    pub throughput_per_s: f64,
    pub fits: bool,
}

#[derive(Serialize, Debug, Clone)]
pub struct CutRow {
    pub tensor: String,
    pub producer: Option<String>,
    pub consumers: Vec<String>,
    pub from_partition: Option<usize>,
    pub to_partition: Option<usize>,
    pub to_partitions: Vec<usize>,
    pub direction: Direction,
    pub dtype: Option<String>,
    pub shape: Option<JsonShape>,
    pub bytes: Option<u64>,
    pub transfer_us: f64,
}

#[derive(Serialize, Debug, Clone)]
pub struct Summary {
    /// MACs of every node that runs per inference (null when some are unknown), and of those
    /// placed on the accelerator.
    pub macs: Option<u64>,
    pub accel_macs: u64,
    pub coverage_macs: Option<f64>,
    pub coverage_nodes: f64,
    pub accel_partitions: usize,
    pub boundary_bytes: u64,
    pub transfers: usize,
    pub objective_us: f64,
    pub mincut_us: f64,
    /// Estimated latencies; None (null) while some node's work depends on an unknown dim.
    pub est_latency_us: Option<f64>,
    pub cpu_only_latency_us: Option<f64>,
    pub greedy_us: Option<f64>,
    /// Nodes whose work depends on unknown dims (costed as zero work): fix them with --dim.
    pub unknown_cost_nodes: usize,
    /// The symbolic dims that would make the unknown figures known.
    pub needs_dims: Vec<String>,
    /// When figures are unknown, the graph inputs the file declares with unknown dims (`-1`,
    /// missing, `?`): `--input` sizes them.
    pub needs_inputs: Vec<String>,
    /// Inputs whose values size tensors or pick an If's branch, which `--value` gives.
    pub needs_values: Vec<String>,
    /// Columns the accelerator partitions need, of the budget, and how many stay free.
    pub columns_budget: u64,
    pub columns_used: u64,
    pub columns_free: u64,
    /// Whether all accelerator partitions fit on the array at once (else swapped per inference).
    pub resident: bool,
    pub reconfigure_us: f64,
}

#[derive(Serialize, Debug, Clone)]
pub struct StrategyRow {
    pub strategy: crate::cut::Strategy,
    pub objective_us: f64,
    pub accel_partitions: usize,
}

#[derive(Serialize, Debug, Clone)]
pub struct OpRow {
    pub op: String,
    pub accel: usize,
    pub cpu: usize,
    #[serde(rename = "const")]
    pub konst: usize,
}

#[derive(Serialize, Debug, Clone)]
pub struct Blocker {
    pub code: String,
    pub nodes: usize,
    /// MACs this reason keeps off the accelerator.
    pub macs: u64,
    pub example: String,
}

/// One "fix this first" entry: nodes of one op kept on the CPU by the same first reason.
#[derive(Serialize, Debug, Clone)]
pub struct FixRow {
    pub op: String,
    pub code: String,
    pub nodes: Vec<String>,
    /// Their estimated time on the CPU per inference (what keeping them there costs); null
    /// when some of them depend on unknown dims.
    pub cpu_us: Option<f64>,
    pub macs: u64,
    /// The first node's blocking reason.
    pub reason: String,
    pub suggestion: Option<String>,
}

fn fix_first(i: &Inputs) -> Vec<FixRow> {
    let g = &i.model.graph;
    // Grouped by op, first reason and suggestion: nodes of one op may need different changes.
    type Key = (String, &'static str, Option<String>);
    type Group = (Vec<String>, u64, u64, String, bool);
    let mut groups: BTreeMap<Key, Group> = BTreeMap::new();
    for (k, n) in g.nodes.iter().enumerate() {
        let v = &i.verdicts[k];
        if v.candidate != Candidate::Cpu || i.plan.side[k] != Side::Cpu {
            continue;
        }
        let Some(first) = v.reasons.iter().find(|r| r.blocking) else {
            continue;
        };
        let label = n.op_label();
        let suggestion = crate::suggest::suggest(g, crate::ir::NodeId::new(k), v, i.target);
        let e = groups
            .entry((label, first.code, suggestion))
            .or_insert_with(|| (Vec::new(), 0, 0, first.message.clone(), true));
        e.0.push(n.name.to_string());
        e.1 = e.1.saturating_add(i.costs.cpu_ps[k]);
        let cost = g.cost(crate::ir::NodeId::new(k));
        e.2 = e.2.saturating_add(cost.macs.unwrap_or(0));
        e.4 &= cost.macs.is_some() && cost.ops.is_some();
    }
    let mut rows: Vec<(u64, FixRow)> = groups
        .into_iter()
        .map(|((op, code, suggestion), (nodes, ps, macs, reason, known))| {
            (
                ps,
                FixRow {
                    op,
                    code: code.to_string(),
                    nodes,
                    cpu_us: known.then(|| us(ps)),
                    macs,
                    reason,
                    suggestion,
                },
            )
        })
        .collect();
    rows.sort_by(|(pa, a), (pb, b)| {
        pb.cmp(pa)
            .then(b.macs.cmp(&a.macs))
            .then(a.op.cmp(&b.op))
            .then(a.code.cmp(&b.code))
            .then(a.suggestion.cmp(&b.suggestion))
    });
    rows.into_iter().map(|(_, r)| r).collect()
}

pub fn us(ps: u64) -> f64 {
    ps as f64 / 1e6
}

/// Everything `build` needs.
pub struct Inputs<'a> {
    pub model: &'a Model,
    pub target: &'a Target,
    pub verdicts: &'a [Verdict],
    pub costs: &'a crate::cut::Costs,
    pub plan: &'a Plan,
    pub greedy: &'a Plan,
    pub cpu_only: &'a Plan,
    pub array: &'a crate::map::ArrayUse,
    /// The greedy plan's mapping: its latency is estimated the same way as the chosen plan's.
    pub greedy_array: &'a crate::map::ArrayUse,
    pub params: u64,
    pub warnings: Vec<Diagnostic>,
}

fn est_latency_us(i: &Inputs) -> f64 {
    us(crate::map::est_latency_ps(i.plan, i.costs, i.array))
}

/// The summary figures alone: what `build` reports, and what the survey compares scenarios by.
pub fn summary(i: &Inputs) -> Summary {
    let g = &i.model.graph;
    let plan = i.plan;
    let (mut total_macs, mut accel_macs, mut macs_known) = (0u64, 0u64, true);
    let (mut live, mut accel_nodes) = (0usize, 0usize);
    for k in 0..g.nodes.len() {
        let side = plan.side[k];
        if side == Side::Const {
            continue;
        }
        live += 1;
        let macs = g.cost(crate::ir::NodeId::new(k)).macs;
        match macs {
            Some(m) => total_macs = total_macs.saturating_add(m),
            None => macs_known = false,
        }
        if side == Side::Accel {
            accel_nodes += 1;
            accel_macs = accel_macs.saturating_add(macs.unwrap_or(0));
        }
    }
    let boundary_bytes: u64 = plan
        .cut_points
        .iter()
        .map(|c| i.costs.bytes[c.value.index()].unwrap_or(0))
        .fold(0, u64::saturating_add);
    let known = i.costs.unknown_work.is_empty();
    let mut needs_dims: Vec<String> = i
        .costs
        .unknown_work
        .iter()
        .flat_map(|n| g.cost(*n).needs_dims.iter().map(|d| d.to_string()))
        .collect();
    needs_dims.sort();
    needs_dims.dedup();
    let needs_inputs = if known { Vec::new() } else { super::inputs_to_size(g) };
    let needs_values = if known {
        Vec::new()
    } else {
        i.model.needs_values.clone()
    };
    Summary {
        macs: macs_known.then_some(total_macs),
        accel_macs,
        coverage_macs: (macs_known && total_macs > 0).then(|| accel_macs as f64 / total_macs as f64),
        coverage_nodes: if live > 0 {
            accel_nodes as f64 / live as f64
        } else {
            0.0
        },
        accel_partitions: plan.partitions.iter().filter(|p| p.side == Side::Accel).count(),
        boundary_bytes,
        transfers: plan.cut_points.len(),
        objective_us: us(plan.objective_ps),
        mincut_us: us(plan.mincut_ps),
        est_latency_us: known.then(|| est_latency_us(i)),
        cpu_only_latency_us: known.then(|| us(i.cpu_only.objective_ps)),
        greedy_us: known.then(|| us(crate::map::est_latency_ps(i.greedy, i.costs, i.greedy_array))),
        unknown_cost_nodes: i.costs.unknown_work.len(),
        needs_dims,
        needs_inputs,
        needs_values,
        columns_budget: i.array.columns_budget,
        columns_used: i.array.columns_used,
        columns_free: i.array.columns_free,
        resident: i.array.resident,
        reconfigure_us: us(i.array.reconfigure_ps),
    }
}

pub fn build(i: &Inputs) -> AnalyzeReport {
    let g = &i.model.graph;
    let plan = i.plan;
    let tensors = g
        .values
        .iter()
        .enumerate()
        .filter(|(_, v)| matches!(v.kind, ValueKind::Input | ValueKind::Activation | ValueKind::Output))
        .map(|(k, v)| TensorCost {
            name: v.name.to_string(),
            dtype: v.fact.dtype.map(|d| d.name().to_string()),
            shape: shape_json(&v.fact.shape),
            bytes: i.costs.bytes[k],
            transfer_us: us(i.costs.transfer_ps[k]),
        })
        .collect();
    let mut nodes = Vec::with_capacity(g.nodes.len());
    let mut ops: BTreeMap<String, (usize, usize, usize)> = BTreeMap::new();
    let mut blockers: BTreeMap<&'static str, (usize, u64, String)> = BTreeMap::new();
    for (k, n) in g.nodes.iter().enumerate() {
        let v = &i.verdicts[k];
        let side = plan.side[k];
        let cost = g.cost(crate::ir::NodeId::new(k));
        let label = n.op_label();
        let e = ops.entry(label).or_default();
        match side {
            Side::Accel => e.0 += 1,
            Side::Cpu => e.1 += 1,
            Side::Const => e.2 += 1,
        }
        if v.candidate == Candidate::Cpu {
            for r in v.reasons.iter().filter(|r| r.blocking) {
                let b = blockers.entry(r.code).or_insert((0, 0, r.message.clone()));
                b.0 += 1;
                b.1 = b.1.saturating_add(cost.macs.unwrap_or(0));
            }
        }
        nodes.push(NodeRow {
            name: n.name.to_string(),
            op: n.op_type.to_string(),
            outputs: n
                .outputs
                .iter()
                .flatten()
                .map(|o| g.value(*o).name.to_string())
                .collect(),
            placement: side,
            partition: plan.partition_of[k],
            macs: cost.macs,
            cpu_us: us(i.costs.cpu_ps[k]),
            accel_us: i.costs.accel_ps[k].map(us),
            rule: v.rule.clone(),
            signature: v.signature.clone(),
            bundle: v.bundle.clone(),
            reasons: v.reasons.clone(),
        });
    }
    let t = i.target;
    let partitions = plan
        .partitions
        .iter()
        .map(|p| {
            let members: std::collections::BTreeSet<usize> = p.nodes.iter().map(|n| n.index()).collect();
            let mut ins = Vec::new();
            let mut outs = Vec::new();
            for n in &p.nodes {
                for v in g.node(*n).all_inputs() {
                    let val = g.value(v);
                    if !matches!(val.kind, ValueKind::Initializer | ValueKind::Constant)
                        && val.producer.is_none_or(|q| !members.contains(&q.index()))
                        && !ins.iter().any(|x| *x == val.name)
                    {
                        ins.push(val.name.to_string());
                    }
                }
                for v in g.node(*n).outputs.iter().flatten() {
                    let val = g.value(*v);
                    if (val.consumers.iter().any(|c| !members.contains(&c.index())) || g.outputs.contains(v))
                        && !outs.iter().any(|x| *x == val.name)
                    {
                        outs.push(val.name.to_string());
                    }
                }
            }
            let macs: u64 = p
                .nodes
                .iter()
                .map(|n| g.cost(*n).macs.unwrap_or(0))
                .fold(0, u64::saturating_add);
            let wb = crate::cut::cost::weight_bytes(g, i.costs, &p.nodes);
            let node_ps: u64 = p
                .nodes
                .iter()
                .map(|n| {
                    if p.side == Side::Accel {
                        i.costs.accel_ps[n.index()].unwrap_or(0)
                    } else {
                        i.costs.cpu_ps[n.index()]
                    }
                })
                .fold(0, u64::saturating_add);
            let m = i.array.mappings.iter().find(|m| m.partition == p.id);
            let (columns, tiles, dispatch) = match m {
                Some(m) if p.side == Side::Accel => (Some(m.columns), Some(m.tiles), i.costs.dispatch_ps),
                _ => (None, None, 0),
            };
            let node_ps = match m {
                Some(m) if p.side == Side::Accel => m.latency_ps,
                _ => node_ps,
            };
            PartitionRow {
                id: p.id,
                side: p.side,
                nodes: p.nodes.iter().map(|n| g.node(*n).name.to_string()).collect(),
                macs,
                weight_bytes: wb,
                inputs: ins,
                outputs: outs,
                columns,
                tiles,
                dispatch_us: us(dispatch),
                est_latency_us: us(node_ps.saturating_add(dispatch)),
                mapping: m.filter(|_| p.side == Side::Accel).map(|m| MappingRow {
                    stages: m.stages.len(),
                    bound: m.bound,
                    local_bytes: m.local_bytes,
                    buffer_bytes: m.buffer_bytes,
                    streamed_bytes: m.streamed_bytes,
                    skip_buffer_bytes: m.skip_buffer_bytes,
                    routed_streams: m.routed_streams,
                    dma_channels_needed: m.dma_channels_needed,
                    pipeline_latency_us: us(m.latency_ps),
                    throughput_per_s: m.throughput_per_s,
                    fits: m.fits,
                }),
            }
        })
        .collect();
    let cut_points: Vec<CutRow> = plan
        .cut_points
        .iter()
        .map(|c| {
            let v = g.value(c.value);
            CutRow {
                tensor: v.name.to_string(),
                producer: c.producer.map(|p| g.node(p).name.to_string()),
                consumers: c.consumers.iter().map(|n| g.node(*n).name.to_string()).collect(),
                from_partition: c.from_partition,
                to_partition: c.to_partitions.first().copied(),
                to_partitions: c.to_partitions.clone(),
                direction: c.direction.clone(),
                dtype: v.fact.dtype.map(|d| d.name().to_string()),
                shape: shape_json(&v.fact.shape),
                bytes: i.costs.bytes[c.value.index()],
                transfer_us: us(c.cost_ps),
            }
        })
        .collect();
    let mut blockers: Vec<Blocker> = blockers
        .into_iter()
        .map(|(code, (n, m, ex))| Blocker {
            code: code.to_string(),
            nodes: n,
            macs: m,
            example: ex,
        })
        .collect();
    blockers.sort_by(|a, b| {
        b.macs
            .cmp(&a.macs)
            .then(b.nodes.cmp(&a.nodes))
            .then(a.code.cmp(&b.code))
    });
    let strategies = [i.plan, i.greedy, i.cpu_only]
        .iter()
        .map(|p| StrategyRow {
            strategy: p.strategy,
            objective_us: us(p.objective_ps),
            accel_partitions: p.partitions.iter().filter(|q| q.side == Side::Accel).count(),
        })
        .collect();
    let mut warnings = i.warnings.clone();
    warnings.sort();
    warnings.dedup();
    let summary = summary(i);
    AnalyzeReport {
        schema_version: ANALYZE_SCHEMA_VERSION,
        estimate_note: ESTIMATE_NOTE,
        model: ModelRef {
            path: i.model.path.display().to_string(),
            nodes: g.nodes.len(),
            params: i.params,
            macs: summary.macs,
        },
        target: TargetRef {
            name: t.name().to_string(),
            source: t.source.clone(),
            columns: t.file.array.columns,
            compute_tiles: t.compute_tiles(),
            tops_int8: t.tops("int8"),
        },
        strategy: plan.strategy,
        tensors,
        nodes,
        partitions,
        summary,
        cut_points,
        strategies,
        op_summary: ops
            .into_iter()
            .map(|(op, (a, c, k))| OpRow {
                op,
                accel: a,
                cpu: c,
                konst: k,
            })
            .collect(),
        blockers,
        fix_first: fix_first(i),
        what_if: None,
        warnings,
    }
}

pub fn render_json(r: &AnalyzeReport, out: &mut dyn Write) -> std::io::Result<()> {
    super::write_json(r, out)
}

/// A latency for tables: µs, or why it is unknown.
fn micros(x: Option<f64>, s: &Summary) -> String {
    match x {
        Some(v) => format!("{v:.1} µs"),
        None => match fix_hints(s) {
            Some(fix) => format!("unknown (fix {fix})"),
            None => "unknown (some shapes are unknown)".into(),
        },
    }
}

/// The `--dim`s (and kin) and `--input`s that would make the unknown figures known.
fn fix_hints(s: &Summary) -> Option<String> {
    let hints = super::fix_hints(&s.needs_dims, &s.needs_inputs, &s.needs_values);
    (!hints.is_empty()).then(|| hints.join(" "))
}

/// Node coverage, and a warning beside it when some nodes' work is unknown: the cut then
/// sees them as free and has nothing to gain by moving them, so a low figure says more about
/// the missing dims than about the target.
fn node_coverage(s: &Summary) -> String {
    let share = pct(Some(s.coverage_nodes));
    match unknown_cost_note(s) {
        Some(note) => format!("{share} ({note})"),
        None => share,
    }
}

/// "cut with N nodes of unknown cost: fix --dim … for a real plan", when there are such nodes.
pub(crate) fn unknown_cost_note(s: &Summary) -> Option<String> {
    match (s.unknown_cost_nodes, fix_hints(s)) {
        (0, _) => None,
        (n, None) => Some(format!("cut with {n} nodes of unknown cost")),
        (n, Some(fix)) => Some(format!("cut with {n} nodes of unknown cost: fix {fix} for a real plan")),
    }
}

fn signed_pct(x: Option<f64>) -> String {
    x.map(|v| format!("{:+.1} pt", v * 100.0))
        .unwrap_or_else(|| "unknown".into())
}

fn signed_us(x: Option<f64>) -> String {
    x.map(|v| format!("{v:+.1} µs")).unwrap_or_else(|| "unknown".into())
}

/// Rows of the what-if comparison: (figure, real, assumed, change).
fn what_if_rows(s: &Summary, w: &WhatIfReport) -> Vec<[String; 4]> {
    let a = &w.summary;
    let d = &w.delta;
    vec![
        [
            "coverage by MACs".into(),
            pct(s.coverage_macs),
            pct(a.coverage_macs),
            signed_pct(d.coverage_macs),
        ],
        [
            "coverage by nodes".into(),
            pct(Some(s.coverage_nodes)),
            pct(Some(a.coverage_nodes)),
            signed_pct(Some(d.coverage_nodes)),
        ],
        [
            "accelerator partitions".into(),
            s.accel_partitions.to_string(),
            a.accel_partitions.to_string(),
            format!("{:+}", d.accel_partitions),
        ],
        [
            "boundary crossings".into(),
            s.transfers.to_string(),
            a.transfers.to_string(),
            format!("{:+}", d.transfers),
        ],
        [
            "boundary bytes".into(),
            grouped(s.boundary_bytes),
            grouped(a.boundary_bytes),
            format!("{:+}", d.boundary_bytes),
        ],
        [
            "est. latency".into(),
            micros(s.est_latency_us, s),
            micros(a.est_latency_us, a),
            signed_us(d.est_latency_us),
        ],
    ]
}

#[derive(Tabled)]
struct WhatIfTable {
    figure: String,
    real: String,
    #[tabled(rename = "under the assumptions")]
    assumed: String,
    change: String,
}

#[derive(Tabled)]
struct Kv {
    #[tabled(rename = "analysis")]
    k: String,
    #[tabled(rename = "")]
    v: String,
}

#[derive(Tabled)]
struct PartRow {
    id: usize,
    side: String,
    nodes: usize,
    #[tabled(rename = "MACs")]
    macs: String,
    #[tabled(rename = "weights B")]
    weights: String,
    #[tabled(rename = "cols/tiles")]
    cols: String,
    #[tabled(rename = "est. µs")]
    latency: String,
    #[tabled(rename = "bound / fits")]
    bound: String,
}

#[derive(Tabled)]
struct CutTable {
    tensor: String,
    direction: String,
    #[tabled(rename = "from→to")]
    route: String,
    bytes: String,
    #[tabled(rename = "µs")]
    cost: String,
}

#[derive(Tabled)]
struct FixTable {
    op: String,
    nodes: usize,
    #[tabled(rename = "CPU µs")]
    cpu: String,
    #[tabled(rename = "MACs")]
    macs: String,
    why: String,
    #[tabled(rename = "what to change")]
    change: String,
}

/// Column width the long text columns wrap at.
const WRAP: usize = 60;

#[derive(Tabled)]
struct OpTable {
    op: String,
    accel: usize,
    cpu: usize,
    #[tabled(rename = "const")]
    konst: usize,
}

fn strategy_name(s: crate::cut::Strategy) -> &'static str {
    match s {
        crate::cut::Strategy::Mincut => "min-cut",
        crate::cut::Strategy::Greedy => "greedy",
        crate::cut::Strategy::Cpu => "CPU-only",
    }
}

fn side_name(s: Side) -> &'static str {
    match s {
        Side::Accel => "accel",
        Side::Cpu => "cpu",
        Side::Const => "const",
    }
}

fn route(c: &CutRow) -> String {
    let from = c
        .from_partition
        .map(|p| format!("P{p}"))
        .unwrap_or_else(|| "host".into());
    let to = if c.to_partitions.is_empty() {
        "host".to_string()
    } else {
        c.to_partitions
            .iter()
            .map(|p| format!("P{p}"))
            .collect::<Vec<_>>()
            .join(",")
    };
    format!("{from}→{to}")
}

/// Rows a table section shows before it says how many it left out.
const ROWS: usize = 20;

pub fn render_table(r: &AnalyzeReport, out: &mut dyn Write, paint: Paint) -> std::io::Result<()> {
    let s = &r.summary;
    let kv = vec![
        Kv {
            k: "model".into(),
            v: format!("{} ({} nodes)", r.model.path, r.model.nodes),
        },
        Kv {
            k: "target".into(),
            v: format!(
                "{} ({} columns, {} compute tiles)",
                r.target.name, r.target.columns, r.target.compute_tiles
            ),
        },
        Kv {
            k: "coverage by MACs".into(),
            v: pct(s.coverage_macs),
        },
        Kv {
            k: "coverage by nodes".into(),
            v: node_coverage(s),
        },
        Kv {
            k: "accelerator partitions".into(),
            v: s.accel_partitions.to_string(),
        },
        Kv {
            k: "boundary crossings".into(),
            v: format!("{} ({} bytes per inference)", s.transfers, grouped(s.boundary_bytes)),
        },
        Kv {
            k: "array columns (est.)".into(),
            v: format!(
                "{} of {} used, {} free for other workloads{}",
                s.columns_used,
                s.columns_budget,
                s.columns_free,
                if s.resident {
                    String::new()
                } else {
                    format!("; not resident: swapped per inference (+{:.1} µs)", s.reconfigure_us)
                }
            ),
        },
        Kv {
            k: format!("est. latency ({} plan)", strategy_name(r.strategy)),
            v: micros(s.est_latency_us, s),
        },
        Kv {
            k: "est. latency, greedy offload".into(),
            v: micros(s.greedy_us, s),
        },
        Kv {
            k: "est. latency, CPU only".into(),
            v: micros(s.cpu_only_latency_us, s),
        },
    ];
    writeln!(out, "{}", Table::new(kv).with(Style::sharp()))?;
    let parts: Vec<PartRow> = r
        .partitions
        .iter()
        .map(|p| PartRow {
            id: p.id,
            side: paint.paint(
                if p.side == Side::Accel { Tone::Good } else { Tone::Warn },
                side_name(p.side),
            ),
            nodes: p.nodes.len(),
            macs: grouped(p.macs),
            weights: grouped(p.weight_bytes),
            cols: match (p.columns, p.tiles) {
                (Some(c), Some(t)) => format!("{c}/{t}"),
                _ => "-".into(),
            },
            latency: format!("{:.1}", p.est_latency_us),
            bound: match &p.mapping {
                Some(m) => {
                    let bound = m.bound.as_str().to_string();
                    if m.fits {
                        bound
                    } else {
                        paint.paint(Tone::Bad, &format!("{bound} / does not fit"))
                    }
                }
                None => "-".into(),
            },
        })
        .collect();
    writeln!(out, "{}", paint.paint(Tone::Strong, "partitions in execution order:"))?;
    writeln!(out, "{}", Table::new(parts).with(Style::sharp()))?;
    if !r.cut_points.is_empty() {
        let cuts: Vec<CutTable> = r
            .cut_points
            .iter()
            .take(ROWS)
            .map(|c| CutTable {
                tensor: c.tensor.clone(),
                direction: format!("{:?}", c.direction).to_lowercase(),
                route: route(c),
                bytes: maybe(c.bytes),
                cost: format!("{:.2}", c.transfer_us),
            })
            .collect();
        writeln!(out, "{}", paint.paint(Tone::Strong, "cut points:"))?;
        writeln!(out, "{}", Table::new(cuts).with(Style::sharp()))?;
        if r.cut_points.len() > ROWS {
            writeln!(
                out,
                "… {} more cut points (see --format json)",
                r.cut_points.len() - ROWS
            )?;
        }
    }
    let ops: Vec<OpTable> = r
        .op_summary
        .iter()
        .map(|o| OpTable {
            op: o.op.clone(),
            accel: o.accel,
            cpu: o.cpu,
            konst: o.konst,
        })
        .collect();
    writeln!(out, "{}", Table::new(ops).with(Style::sharp()))?;
    if !r.fix_first.is_empty() {
        let rows: Vec<FixTable> = r
            .fix_first
            .iter()
            .take(ROWS)
            .map(|f| FixTable {
                op: f.op.clone(),
                nodes: f.nodes.len(),
                cpu: f.cpu_us.map_or_else(|| "unknown".into(), |v| format!("{v:.1}")),
                macs: grouped(f.macs),
                why: format!("{}: {}", f.code, f.reason),
                change: f.suggestion.clone().unwrap_or_default(),
            })
            .collect();
        writeln!(
            out,
            "{}",
            paint.paint(Tone::Strong, "fix these first (CPU-bound work, costliest first):")
        )?;
        writeln!(
            out,
            "{}",
            Table::new(rows).with(Style::sharp()).with(
                tabled::settings::Modify::new(tabled::settings::object::Columns::new(4..6))
                    .with(tabled::settings::Width::wrap(WRAP).keep_words(true))
            )
        )?;
        if r.fix_first.len() > ROWS {
            writeln!(out, "… {} more (see --format json)", r.fix_first.len() - ROWS)?;
        }
    }
    if let Some(w) = &r.what_if {
        writeln!(
            out,
            "{}",
            paint.paint(Tone::Strong, &format!("what-if ({}):", w.assumptions.join(", ")))
        )?;
        let rows: Vec<WhatIfTable> = what_if_rows(s, w)
            .into_iter()
            .map(|[figure, real, assumed, change]| WhatIfTable {
                figure,
                real,
                assumed,
                change,
            })
            .collect();
        writeln!(out, "{}", Table::new(rows).with(Style::sharp()))?;
        if !w.moved_to_accel.is_empty() {
            writeln!(
                out,
                "moved to the accelerator under the assumptions: {}",
                shortlist(&w.moved_to_accel)
            )?;
        }
    }
    for w in &r.warnings {
        writeln!(out, "{} {}: {}", paint.paint(Tone::Warn, "warning:"), w.code, w.message)?;
    }
    writeln!(out, "{}", paint.paint(Tone::Dim, r.estimate_note))
}

/// The first few names and how many more.
fn shortlist(names: &[String]) -> String {
    let shown: Vec<&str> = names.iter().take(8).map(String::as_str).collect();
    if names.len() > shown.len() {
        format!("{} and {} more", shown.join(", "), names.len() - shown.len())
    } else {
        shown.join(", ")
    }
}

pub fn render_markdown(r: &AnalyzeReport, out: &mut dyn Write) -> std::io::Result<()> {
    let s = &r.summary;
    writeln!(out, "### tilecut: `{}` on `{}`\n", r.model.path, r.target.name)?;
    writeln!(out, "| figure | value |\n|---|---|")?;
    writeln!(out, "| coverage by MACs | {} |", pct(s.coverage_macs))?;
    writeln!(out, "| coverage by nodes | {} |", node_coverage(s))?;
    writeln!(out, "| accelerator partitions | {} |", s.accel_partitions)?;
    writeln!(
        out,
        "| boundary crossings | {} ({} bytes per inference) |",
        s.transfers,
        grouped(s.boundary_bytes)
    )?;
    writeln!(
        out,
        "| est. latency ({} plan / greedy / CPU only) | {} / {} / {} |",
        strategy_name(r.strategy),
        micros(s.est_latency_us, s),
        micros(s.greedy_us, s),
        micros(s.cpu_only_latency_us, s)
    )?;
    if !r.fix_first.is_empty() {
        writeln!(out, "\n**Fix these first** (CPU-bound work, costliest first)\n")?;
        writeln!(
            out,
            "| op | nodes | CPU µs | MACs | why | what to change |\n|---|---|---|---|---|---|"
        )?;
        for f in r.fix_first.iter().take(ROWS) {
            writeln!(
                out,
                "| `{}` | {} | {} | {} | `{}`: {} | {} |",
                f.op,
                f.nodes.len(),
                f.cpu_us.map_or_else(|| "unknown".into(), |v| format!("{v:.1}")),
                grouped(f.macs),
                f.code,
                f.reason.replace('|', "\\|"),
                f.suggestion.as_deref().unwrap_or("").replace('|', "\\|")
            )?;
        }
    }
    if let Some(w) = &r.what_if {
        writeln!(out, "\n**What-if: {}**\n", w.assumptions.join(", "))?;
        writeln!(
            out,
            "| figure | real | under the assumptions | change |\n|---|---|---|---|"
        )?;
        for [f, a, b, c] in what_if_rows(s, w) {
            writeln!(out, "| {f} | {a} | {b} | {c} |")?;
        }
    }
    writeln!(out, "\n_{}_", r.estimate_note)
}
