//! Mapping accelerator partitions onto the array, as spatial pipelines (an estimate).
//!
//! Each partition's nodes, in execution order, form a chain. Stages start at every node that
//! does MAC work; the element-wise, quantize and data-movement nodes after it fuse into its
//! stage. For those stage boundaries, the tiles are shared out so that the slowest stage is as
//! fast as possible: the chains-on-chains partitioning problem (Bokhari, "Partitioning
//! Problems in Parallel, Pipelined, and Distributed Computing", IEEE Trans. Computers 1988;
//! Pinar & Aykanat, "Fast optimal load balancing algorithms for 1D partitioning", JPDC 2004)
//! generalised to several tiles per stage, solved exactly for the fixed boundaries by binary
//! search on the bottleneck (a stage of work W on p tiles takes W/p; its weights must fit in
//! its tiles' local memories). Memory that does not fit goes to the columns' buffer tiles, and
//! beyond them streams from system memory every inference at the I/O tiles' bandwidth.
//!
//! The pipeline gives the throughput (its slowest stage) and the memory figures. The latency
//! of one inference is its stages run in turns, each over all the tiles the budget allows (as
//! the cost model times an accelerator node before mapping), plus the weights streamed: one
//! inference through the pipeline would take the sum of its stage times, never less, since a
//! stage there has only some of the tiles. A pipeline of many stages on a tile or two each is
//! built for throughput, not for the latency of one inference.

use serde::Serialize;

use crate::cut::{Costs, Plan, Side};
use crate::ir::{Graph, NodeId, ValueKind};
use crate::target::Target;

/// What limits a partition's mapping.
#[derive(Serialize, Debug, Clone, Copy, PartialEq, Eq)]
#[serde(rename_all = "kebab-case")]
pub enum Bound {
    Compute,
    LocalMemory,
    BufferTileCapacity,
    IoBandwidth,
    StreamPorts,
}

impl Bound {
    /// The name used in JSON (kebab-case) and tables.
    pub fn as_str(self) -> &'static str {
        match self {
            Bound::Compute => "compute",
            Bound::LocalMemory => "local-memory",
            Bound::BufferTileCapacity => "buffer-tile-capacity",
            Bound::IoBandwidth => "io-bandwidth",
            Bound::StreamPorts => "stream-ports",
        }
    }
}

#[derive(Serialize, Debug, Clone)]
pub struct Stage {
    pub nodes: Vec<String>,
    pub tiles: u64,
    pub work_ps_one_tile: u64,
    pub weight_bytes: u64,
}

#[derive(Serialize, Debug, Clone)]
pub struct Mapping {
    pub partition: usize,
    pub stages: Vec<Stage>,
    /// Tiles and columns the partition needs at least (enough to hold its weights in local
    /// memory); latency and throughput assume it may use the whole column budget.
    pub tiles: u64,
    pub columns: u64,
    /// Weights held in compute tiles' local memories.
    pub local_bytes: u64,
    /// Weights and skip-connection buffers placed in buffer tiles.
    pub buffer_bytes: u64,
    /// Weights streamed from system memory every inference.
    pub streamed_bytes: u64,
    /// Activations buffered for tensors that skip stages (residuals), double-buffered.
    pub skip_buffer_bytes: u64,
    /// Streams that need buffer-tile routing (fan-in or fan-out above the tile's ports).
    pub routed_streams: u64,
    pub dma_channels_needed: u64,
    pub bound: Bound,
    /// Latency of one inference, its stages in turns over all the budget's tiles (module
    /// docs), and the pipeline's steady-state throughput.
    pub latency_ps: u64,
    pub throughput_per_s: f64,
    /// False when the weights exceed all on-array memory (they then stream).
    pub fits: bool,
}

#[derive(Serialize, Debug, Clone)]
pub struct ArrayUse {
    pub mappings: Vec<Mapping>,
    pub columns_budget: u64,
    pub columns_used: u64,
    pub columns_free: u64,
    /// All accelerator partitions resident at once; otherwise swapped per inference.
    pub resident: bool,
    pub reconfigure_ps: u64,
}

/// Tiles each stage needs at bottleneck `b` (ps), or None if over `budget`.
fn tiles_at(work: &[u64], min_tiles: &[u64], b: u64, budget: u64) -> Option<Vec<u64>> {
    let mut out = Vec::with_capacity(work.len());
    let mut sum = 0u64;
    for (w, m) in work.iter().zip(min_tiles) {
        let p = w.div_ceil(b.max(1)).max(*m).max(1);
        sum = sum.saturating_add(p);
        if sum > budget {
            return None;
        }
        out.push(p);
    }
    Some(out)
}

fn map_partition(g: &Graph, costs: &Costs, t: &Target, id: usize, nodes: &[NodeId], budget_tiles: u64) -> Mapping {
    let f = &t.file.array;
    let all_tiles = t.compute_tiles().max(1);
    // Stages: a new one at each MAC-carrying node.
    let mut groups: Vec<Vec<NodeId>> = Vec::new();
    for &n in nodes {
        let starts = g.cost(n).macs.is_some_and(|m| m > 0) || groups.is_empty();
        if starts {
            groups.push(vec![n]);
        } else if let Some(last) = groups.last_mut() {
            last.push(n);
        }
    }
    // accel_ps assumes every tile works on the node; one tile takes all_tiles × as long.
    let work: Vec<u64> = groups
        .iter()
        .map(|s| {
            s.iter()
                .map(|n| costs.accel_ps[n.index()].unwrap_or(0).saturating_mul(all_tiles))
                .fold(0, u64::saturating_add)
        })
        .collect();
    let wbytes: Vec<u64> = groups
        .iter()
        .map(|s| crate::cut::cost::weight_bytes(g, costs, s))
        .collect();
    let local = f.compute_tile.local_memory_bytes.max(1);
    let mem_tiles: Vec<u64> = wbytes.iter().map(|b| b.div_ceil(local)).collect();
    let total_weights: u64 = wbytes.iter().fold(0, |a, &b| a.saturating_add(b));
    let budget = budget_tiles.max(1);
    // Binary search on the bottleneck with memory-driven minimum tiles; if even one tile per
    // stage plus memory does not fit, drop the memory minimum (weights then go to buffer tiles).
    let mut min_tiles = mem_tiles.clone();
    let mut bound = Bound::Compute;
    if tiles_at(&work, &min_tiles, u64::MAX / 4, budget).is_none() {
        min_tiles = vec![1; work.len()];
        bound = Bound::LocalMemory;
    }
    let stages_fit = tiles_at(&work, &min_tiles, u64::MAX / 4, budget).is_some();
    let tiles: Vec<u64> = if stages_fit {
        let (mut lo, mut hi) = (1u64, work.iter().copied().max().unwrap_or(1).max(1));
        while lo < hi {
            let mid = lo + (hi - lo) / 2;
            if tiles_at(&work, &min_tiles, mid, budget).is_some() {
                hi = mid;
            } else {
                lo = mid + 1;
            }
        }
        tiles_at(&work, &min_tiles, lo, budget).unwrap_or_else(|| vec![1; work.len()])
    } else {
        // More stages than tiles: stages share tiles round-robin (time-multiplexed).
        vec![1; work.len()]
    };
    let used_tiles: u64 = if stages_fit {
        tiles.iter().fold(0, |a, &b| a.saturating_add(b))
    } else {
        budget
    };
    let stage_ps: Vec<u64> = work.iter().zip(&tiles).map(|(w, p)| w / p.max(&1)).collect();
    let share = if stages_fit {
        1
    } else {
        (work.len() as u64).div_ceil(budget)
    };
    let slowest = stage_ps.iter().copied().max().unwrap_or(0).saturating_mul(share);
    // The stages in turns, each over every tile of the budget (module docs).
    let mut latency: u64 = work.iter().map(|w| w / budget).fold(0, u64::saturating_add);
    // Memory levels.
    let local_capacity = used_tiles * local;
    let buffer_capacity = used_tiles.div_ceil(f.compute_rows as u64).max(1) * f.buffer_tile.capacity_bytes;
    let local_bytes = total_weights.min(local_capacity);
    let rest = total_weights - local_bytes;
    let buffer_bytes = rest.min(buffer_capacity);
    let streamed = rest - buffer_bytes;
    if rest > 0 && bound == Bound::Compute {
        bound = Bound::LocalMemory;
    }
    if buffer_bytes > 0 {
        bound = Bound::BufferTileCapacity;
    }
    let fits = total_weights <= t.total_array_bytes();
    if streamed > 0 {
        let io = f.columns as f64 * f.io_tile.bandwidth_bytes_per_s;
        latency = latency.saturating_add((streamed as f64 / io * 1e12) as u64);
        bound = Bound::IoBandwidth;
    }
    // Skip connections: tensors consumed by a stage other than the next are buffered (double).
    let stage_index: std::collections::HashMap<NodeId, usize> = groups
        .iter()
        .enumerate()
        .flat_map(|(k, s)| s.iter().map(move |n| (*n, k)))
        .collect();
    let stage_of = |n: NodeId| stage_index.get(&n).copied();
    let mut skip = 0u64;
    let mut routed = 0u64;
    for (k, s) in groups.iter().enumerate() {
        let mut fan_in = std::collections::BTreeSet::new();
        for n in s {
            for v in g.node(*n).all_inputs() {
                let val = g.value(v);
                if matches!(val.kind, ValueKind::Initializer | ValueKind::Constant) {
                    continue;
                }
                match val.producer.and_then(stage_of) {
                    Some(p) if p == k => {}
                    Some(p) => {
                        fan_in.insert(p);
                        if p + 1 < k {
                            skip = skip.saturating_add(2 * costs.bytes[v.index()].unwrap_or(0));
                        }
                    }
                    None => {
                        fan_in.insert(usize::MAX - v.index());
                    }
                }
            }
        }
        if fan_in.len() as u64 > f.compute_tile.stream_inputs as u64 {
            routed += fan_in.len() as u64 - f.compute_tile.stream_inputs as u64;
        }
    }
    // What the partition needs at least: enough tiles to hold its weights in local memory
    // (its stages may then share tiles, time-multiplexed).
    let need_tiles: u64 = total_weights.div_ceil(local).clamp(1, budget);
    let columns = need_tiles.div_ceil(f.compute_rows as u64).max(1);
    // Each routed stream and each column's input and output use buffer-tile DMA channels.
    let dma = routed + 2 * columns;
    if routed > 0 && bound == Bound::Compute {
        bound = Bound::StreamPorts;
    }
    Mapping {
        partition: id,
        stages: groups
            .iter()
            .zip(&tiles)
            .zip(&work)
            .zip(&wbytes)
            .map(|(((s, p), w), b)| Stage {
                nodes: s.iter().map(|n| g.node(*n).name.to_string()).collect(),
                tiles: *p,
                work_ps_one_tile: *w,
                weight_bytes: *b,
            })
            .collect(),
        tiles: need_tiles,
        columns,
        local_bytes,
        buffer_bytes,
        streamed_bytes: streamed,
        skip_buffer_bytes: skip,
        routed_streams: routed,
        dma_channels_needed: dma,
        bound,
        latency_ps: latency,
        throughput_per_s: if slowest > 0 { 1e12 / slowest as f64 } else { 0.0 },
        fits,
    }
}

/// Maps every accelerator partition of `plan`; `columns` caps the budget (`--columns`).
pub fn map(g: &Graph, costs: &Costs, plan: &Plan, t: &Target, columns: Option<u32>) -> ArrayUse {
    let budget_cols = columns.unwrap_or(t.file.array.columns).min(t.file.array.columns).max(1) as u64;
    let budget_tiles = budget_cols * t.file.array.compute_rows as u64;
    let mappings: Vec<Mapping> = plan
        .partitions
        .iter()
        .filter(|p| p.side == Side::Accel)
        .map(|p| map_partition(g, costs, t, p.id, &p.nodes, budget_tiles))
        .collect();
    let used: u64 = mappings.iter().map(|m| m.columns).fold(0, u64::saturating_add);
    let resident = used <= budget_cols;
    let reconfigure_ps = if resident || mappings.len() < 2 {
        0
    } else {
        (t.file.array.reconfigure_s * 1e12) as u64 * mappings.len() as u64
    };
    ArrayUse {
        columns_budget: budget_cols,
        columns_used: used.min(budget_cols),
        columns_free: budget_cols.saturating_sub(used),
        resident,
        reconfigure_ps,
        mappings,
    }
}

/// The latency estimate after mapping: the serial objective with each accelerator partition's
/// node times replaced by its mapped latency, plus reconfiguration when not resident.
pub fn est_latency_ps(plan: &Plan, costs: &Costs, array: &ArrayUse) -> u64 {
    let mut ps = plan.objective_ps;
    for p in plan.partitions.iter().filter(|p| p.side == Side::Accel) {
        let serial: u64 = p
            .nodes
            .iter()
            .map(|n| costs.accel_ps[n.index()].unwrap_or(0))
            .fold(0, u64::saturating_add);
        if let Some(m) = array.mappings.iter().find(|m| m.partition == p.id) {
            ps = ps.saturating_sub(serial).saturating_add(m.latency_ps);
        }
    }
    ps.saturating_add(array.reconfigure_ps)
}
