//! The cut-finder: which capable nodes go to the accelerator and where the cuts fall.
//!
//! 1. Exact stage: the two-terminal assignment as a minimum s–t cut (Stone 1977, "Multiprocessor
//!    Scheduling with the Aid of Network Flow Algorithms", IEEE TSE), each multi-consumer tensor
//!    a hyperedge through two auxiliary vertices so its transfer is paid once (`network`).
//! 2. Partitions: a side-preferring topological order cut into same-side segments (each
//!    segment of a topological order is convex, and segments form a chain, so the quotient
//!    graph is acyclic), then split into connected components (components of a convex set are
//!    convex and independent of each other).
//! 3. Dispatch refinement (a heuristic), because a dispatch is paid per partition, not per
//!    node: an accelerator partition whose removal lowers the full objective (dispatches and
//!    accelerator-to-accelerator traffic included) is pinned to the CPU and the cut re-solved;
//!    and two accelerator partitions separated only by CPU nodes the array could run are merged
//!    (those nodes pinned to the array) when that lowers it. Every accepted step lowers a
//!    non-negative integer objective, and at most `MAX_REFINEMENT_TRIES` steps are tried, so the
//!    loop terminates. The result is never worse than `greedy` or `cpu`: the best is kept.

pub mod cost;
pub mod flow;

use std::collections::{BTreeSet, BinaryHeap};

use crate::ir::{Graph, NodeId, ValueId, ValueKind};
use crate::rules::{Candidate, Verdict};
pub use cost::Costs;
use flow::{Network, INF};

#[derive(Clone, Copy, Debug, PartialEq, Eq, PartialOrd, Ord, serde::Serialize, clap::ValueEnum)]
#[serde(rename_all = "lowercase")]
pub enum Strategy {
    /// Exact min-cut, then dispatch refinement (the default).
    Mincut,
    /// Every capable node offloaded.
    Greedy,
    /// Nothing offloaded.
    Cpu,
}

#[derive(Clone, Copy, Debug, PartialEq, Eq, PartialOrd, Ord, serde::Serialize, serde::Deserialize)]
#[serde(rename_all = "lowercase")]
pub enum Side {
    Cpu,
    Accel,
    Const,
}

/// A pin that cannot be honoured.
#[derive(Debug, thiserror::Error)]
#[error("{0}")]
pub struct PinError(pub String);

/// `--pin-cpu` / `--pin-accel` patterns: a node name, an op type, or a glob with `*`.
#[derive(Clone, Debug, Default)]
pub struct Pins {
    pub cpu: Vec<String>,
    pub accel: Vec<String>,
}

fn pin_matches(pat: &str, g: &Graph, id: NodeId) -> bool {
    let n = g.node(id);
    crate::text::glob(pat, &n.name) || n.op_type == pat
}

#[derive(Clone, Debug)]
pub struct Partition {
    pub id: usize,
    pub side: Side,
    pub nodes: Vec<NodeId>,
}

#[derive(Clone, Debug, PartialEq, Eq, PartialOrd, Ord, serde::Serialize)]
#[serde(rename_all = "snake_case")]
pub enum Direction {
    ToAccel,
    ToCpu,
    AccelToAccel,
}

#[derive(Clone, Debug)]
pub struct CutPoint {
    pub value: ValueId,
    pub producer: Option<NodeId>,
    /// Consumers on the receiving side (empty for a graph output leaving the array).
    pub consumers: Vec<NodeId>,
    /// None: a graph input (host memory).
    pub from_partition: Option<usize>,
    /// Receiving partitions; empty: a graph output (host memory).
    pub to_partitions: Vec<usize>,
    pub direction: Direction,
    pub cost_ps: u64,
}

#[derive(Clone, Debug)]
pub struct Plan {
    pub strategy: Strategy,
    pub side: Vec<Side>,
    pub partitions: Vec<Partition>,
    pub partition_of: Vec<Option<usize>>,
    pub cut_points: Vec<CutPoint>,
    /// The exact min-cut value (before dispatch refinement); for greedy/cpu, their serial cost
    /// without dispatches.
    pub mincut_ps: u64,
    /// Σ node costs on their side + Σ cut-point costs + dispatches.
    pub objective_ps: u64,
    /// Refinement steps that pinned a partition to the CPU.
    pub refinements: usize,
}

/// What the partitioner needs: which values are per-inference activations.
fn is_activation(g: &Graph, v: ValueId) -> bool {
    matches!(
        g.value(v).kind,
        ValueKind::Input | ValueKind::Activation | ValueKind::Output
    )
}

/// Builds Stone's network: s = CPU, t = accelerator. Returns (network, s, t).
pub fn network(g: &Graph, costs: &Costs, forced_cpu: &[bool], forced_accel: &[bool]) -> (Network, usize, usize) {
    let n = g.nodes.len();
    let mut net = Network::new(n + 2);
    let (s, t) = (n, n + 1);
    for i in 0..n {
        if g.nodes[i].folded {
            continue;
        }
        let accel = if forced_cpu[i] {
            INF
        } else {
            costs.accel_ps[i].unwrap_or(INF)
        };
        let cpu = if forced_accel[i] { INF } else { costs.cpu_ps[i] };
        net.add_edge(s, i, accel);
        net.add_edge(i, t, cpu);
    }
    for (vi, v) in g.values.iter().enumerate() {
        let vid = ValueId::new(vi);
        if !is_activation(g, vid) {
            continue;
        }
        let producer = match v.producer {
            Some(p) if g.node(p).folded => continue,
            Some(p) => p.index(),
            None => s,
        };
        let mut consumers: Vec<usize> = v
            .consumers
            .iter()
            .filter(|c| !g.node(**c).folded)
            .map(|c| c.index())
            .collect();
        if g.outputs.contains(&vid) {
            consumers.push(s);
        }
        consumers.sort_unstable();
        consumers.dedup();
        if consumers.is_empty() || (producer == s && consumers.iter().all(|&c| c == s)) {
            continue;
        }
        let cost = costs.transfer_ps[vi];
        let a = net.add_vertex();
        let b = net.add_vertex();
        net.add_edge(producer, a, cost);
        net.add_edge(b, producer, cost);
        for &c in &consumers {
            net.add_edge(a, c, INF);
            net.add_edge(c, b, INF);
        }
    }
    (net, s, t)
}

/// Serial cost of an assignment without dispatches: what the min cut minimises.
pub fn serial_cost(g: &Graph, costs: &Costs, side: &[Side]) -> u64 {
    let mut total: u64 = 0;
    for (i, s) in side.iter().enumerate() {
        total = total.saturating_add(match s {
            Side::Cpu => costs.cpu_ps[i],
            Side::Accel => costs.accel_ps[i].unwrap_or(INF),
            Side::Const => 0,
        });
    }
    for (vi, v) in g.values.iter().enumerate() {
        let vid = ValueId::new(vi);
        if !is_activation(g, vid) {
            continue;
        }
        let ps = match v.producer {
            Some(p) => side[p.index()],
            None => Side::Cpu,
        };
        if ps == Side::Const {
            continue;
        }
        let mut other = v.consumers.iter().any(|c| {
            let cs = side[c.index()];
            cs != Side::Const && cs != ps
        });
        if g.outputs.contains(&vid) && ps == Side::Accel {
            other = true;
        }
        if other {
            total = total.saturating_add(costs.transfer_ps[vi]);
        }
    }
    total
}

/// Cuts nodes into convex, connected partitions with an acyclic quotient (see module docs).
pub fn partitions(g: &Graph, side: &[Side]) -> (Vec<Partition>, Vec<Option<usize>>) {
    let n = g.nodes.len();
    let mut indeg = vec![0usize; n];
    let mut succ: Vec<Vec<usize>> = vec![Vec::new(); n];
    for (i, node) in g.nodes.iter().enumerate() {
        let mut preds: Vec<usize> = node
            .all_inputs()
            .iter()
            .filter_map(|v| g.value(*v).producer)
            .map(|p| p.index())
            .collect();
        preds.sort_unstable();
        preds.dedup();
        for p in preds {
            indeg[i] += 1;
            succ[p].push(i);
        }
    }
    // Ready queues per side; constants are emitted as soon as ready and belong to no partition.
    let mut ready: [BinaryHeap<std::cmp::Reverse<usize>>; 3] =
        [BinaryHeap::new(), BinaryHeap::new(), BinaryHeap::new()];
    let slot = |s: Side| match s {
        Side::Cpu => 0,
        Side::Accel => 1,
        Side::Const => 2,
    };
    for i in 0..n {
        if indeg[i] == 0 {
            ready[slot(side[i])].push(std::cmp::Reverse(i));
        }
    }
    let mut segments: Vec<(Side, Vec<usize>)> = Vec::new();
    let mut current = Side::Cpu;
    let mut emitted = 0;
    while emitted < n {
        let pick = if let Some(std::cmp::Reverse(i)) = ready[2].pop() {
            Some(i)
        } else if let Some(std::cmp::Reverse(i)) = ready[slot(current)].pop() {
            Some(i)
        } else {
            current = if current == Side::Cpu { Side::Accel } else { Side::Cpu };
            ready[slot(current)].pop().map(|r| r.0)
        };
        let Some(i) = pick else { break };
        emitted += 1;
        if side[i] != Side::Const {
            match segments.last_mut() {
                Some((s, nodes)) if *s == side[i] => nodes.push(i),
                _ => segments.push((side[i], vec![i])),
            }
        }
        for &u in &succ[i] {
            indeg[u] -= 1;
            if indeg[u] == 0 {
                ready[slot(side[u])].push(std::cmp::Reverse(u));
            }
        }
    }
    // Split each segment into connected components (undirected, inside the segment).
    let mut parts = Vec::new();
    let mut partition_of = vec![None; n];
    let mut seg_of = vec![usize::MAX; n];
    for (k, (_, nodes)) in segments.iter().enumerate() {
        for &i in nodes {
            seg_of[i] = k;
        }
    }
    for (k, (s, nodes)) in segments.iter().enumerate() {
        let mut seen: BTreeSet<usize> = BTreeSet::new();
        for &start in nodes {
            if seen.contains(&start) {
                continue;
            }
            let mut comp = vec![start];
            seen.insert(start);
            let mut stack = vec![start];
            while let Some(u) = stack.pop() {
                let node = &g.nodes[u];
                let preds = node
                    .all_inputs()
                    .into_iter()
                    .filter_map(|v| g.value(v).producer)
                    .map(|p| p.index());
                let nexts = succ[u].iter().copied();
                for w in preds.chain(nexts).collect::<Vec<_>>() {
                    if seg_of[w] == k && seen.insert(w) {
                        comp.push(w);
                        stack.push(w);
                    }
                }
            }
            comp.sort_unstable();
            let id = parts.len();
            for &c in &comp {
                partition_of[c] = Some(id);
            }
            parts.push(Partition {
                id,
                side: *s,
                nodes: comp.into_iter().map(NodeId::new).collect(),
            });
        }
    }
    (parts, partition_of)
}

/// Cut points of a partitioned assignment.
pub fn cut_points(g: &Graph, costs: &Costs, side: &[Side], partition_of: &[Option<usize>]) -> Vec<CutPoint> {
    let mut out = Vec::new();
    for (vi, v) in g.values.iter().enumerate() {
        let vid = ValueId::new(vi);
        if !is_activation(g, vid) {
            continue;
        }
        let (ps, pp) = match v.producer {
            Some(p) => (side[p.index()], partition_of[p.index()]),
            None => (Side::Cpu, None),
        };
        if ps == Side::Const {
            continue;
        }
        let is_output = g.outputs.contains(&vid);
        let live: Vec<NodeId> = v
            .consumers
            .iter()
            .copied()
            .filter(|c| side[c.index()] != Side::Const)
            .collect();
        let crossing: Vec<NodeId> = live.iter().copied().filter(|c| side[c.index()] != ps).collect();
        let mut to: Vec<usize> = crossing.iter().filter_map(|c| partition_of[c.index()]).collect();
        to.sort_unstable();
        to.dedup();
        if !crossing.is_empty() || (is_output && ps == Side::Accel) {
            out.push(CutPoint {
                value: vid,
                producer: v.producer,
                consumers: crossing,
                from_partition: pp,
                to_partitions: to,
                direction: if ps == Side::Accel {
                    Direction::ToCpu
                } else {
                    Direction::ToAccel
                },
                cost_ps: costs.transfer_ps[vi],
            });
        }
        // Accelerator to a different accelerator partition: through system memory, out and in.
        if ps == Side::Accel {
            let mut other: Vec<usize> = live
                .iter()
                .filter(|c| side[c.index()] == Side::Accel)
                .filter_map(|c| partition_of[c.index()])
                .filter(|&q| Some(q) != pp)
                .collect();
            other.sort_unstable();
            other.dedup();
            if !other.is_empty() {
                let consumers: Vec<NodeId> = live
                    .iter()
                    .copied()
                    .filter(|c| side[c.index()] == Side::Accel && partition_of[c.index()] != pp)
                    .collect();
                out.push(CutPoint {
                    value: vid,
                    producer: v.producer,
                    consumers,
                    from_partition: pp,
                    to_partitions: other,
                    direction: Direction::AccelToAccel,
                    // It stays bf16 in system memory: no conversion either way.
                    cost_ps: costs.transfer_ps[vi]
                        .saturating_sub(costs.convert_ps[vi])
                        .saturating_mul(2),
                });
            }
        }
    }
    out
}

fn finish(g: &Graph, costs: &Costs, strategy: Strategy, side: Vec<Side>, mincut_ps: u64, refinements: usize) -> Plan {
    let (parts, partition_of) = partitions(g, &side);
    let cps = cut_points(g, costs, &side, &partition_of);
    let nodes: u64 = side
        .iter()
        .enumerate()
        .map(|(i, s)| match s {
            Side::Cpu => costs.cpu_ps[i],
            Side::Accel => costs.accel_ps[i].unwrap_or(0),
            Side::Const => 0,
        })
        .fold(0, u64::saturating_add);
    let transfers: u64 = cps.iter().map(|c| c.cost_ps).fold(0, u64::saturating_add);
    let dispatches = (parts.iter().filter(|p| p.side == Side::Accel).count() as u64).saturating_mul(costs.dispatch_ps);
    Plan {
        strategy,
        side,
        partitions: parts,
        partition_of,
        cut_points: cps,
        mincut_ps,
        objective_ps: nodes.saturating_add(transfers).saturating_add(dispatches),
        refinements,
    }
}

fn resolve_pins(g: &Graph, verdicts: &[Verdict], pins: &Pins) -> Result<(Vec<bool>, Vec<bool>), PinError> {
    let n = g.nodes.len();
    let mut cpu = vec![false; n];
    let mut accel = vec![false; n];
    for pat in &pins.cpu {
        let hits: Vec<NodeId> = g.node_ids().filter(|&i| pin_matches(pat, g, i)).collect();
        if hits.is_empty() {
            return Err(PinError(format!("--pin-cpu `{pat}` matches no node name or op type")));
        }
        for i in hits {
            cpu[i.index()] = true;
        }
    }
    for pat in &pins.accel {
        let hits: Vec<NodeId> = g.node_ids().filter(|&i| pin_matches(pat, g, i)).collect();
        if hits.is_empty() {
            return Err(PinError(format!("--pin-accel `{pat}` matches no node name or op type")));
        }
        for i in hits {
            match verdicts[i.index()].candidate {
                Candidate::Accel => accel[i.index()] = true,
                Candidate::Const => {}
                Candidate::Cpu => {
                    let why = verdicts[i.index()]
                        .reasons
                        .iter()
                        .find(|r| r.blocking)
                        .map(|r| r.message.clone())
                        .unwrap_or_default();
                    return Err(PinError(format!(
                        "cannot pin node `{}` to the accelerator: {why}",
                        g.node(i).name
                    )));
                }
            }
            if cpu[i.index()] {
                return Err(PinError(format!(
                    "node `{}` is pinned to both the CPU and the accelerator",
                    g.node(i).name
                )));
            }
        }
    }
    Ok((cpu, accel))
}

fn solve(g: &Graph, costs: &Costs, forced_cpu: &[bool], forced_accel: &[bool]) -> (Vec<Side>, u64) {
    let (net, s, t) = network(g, costs, forced_cpu, forced_accel);
    let cut = flow::min_cut(&net, s, t);
    let side = (0..g.nodes.len())
        .map(|i| {
            if g.nodes[i].folded {
                Side::Const
            } else if cut.source_side[i] {
                Side::Cpu
            } else {
                Side::Accel
            }
        })
        .collect();
    (side, cut.value)
}

/// Most drops and merges the refinement tries; beyond it the plan keeps what it has.
pub const MAX_REFINEMENT_TRIES: usize = 256;

/// Plans the cut with `strategy`.
pub fn plan(g: &Graph, verdicts: &[Verdict], costs: &Costs, strategy: Strategy, pins: &Pins) -> Result<Plan, PinError> {
    Ok(plans(g, verdicts, costs, strategy, pins)?.chosen)
}

/// The plan of the chosen strategy with the two simple strategies beside it, each computed
/// once (the min-cut plan is never worse than either, so it needs them anyway).
pub struct Plans {
    pub chosen: Plan,
    pub greedy: Plan,
    pub cpu: Plan,
}

pub fn plans(
    g: &Graph,
    verdicts: &[Verdict],
    costs: &Costs,
    strategy: Strategy,
    pins: &Pins,
) -> Result<Plans, PinError> {
    let (pin_cpu, pin_accel) = resolve_pins(g, verdicts, pins)?;
    let n = g.nodes.len();
    let fixed = |want: fn(Candidate) -> bool| -> Vec<Side> {
        (0..n)
            .map(|i| {
                if g.nodes[i].folded {
                    Side::Const
                } else if pin_accel[i] || (!pin_cpu[i] && want(verdicts[i].candidate)) {
                    Side::Accel
                } else {
                    Side::Cpu
                }
            })
            .collect()
    };
    let simple = |s: Strategy, side: Vec<Side>| {
        let serial = serial_cost(g, costs, &side);
        finish(g, costs, s, side, serial, 0)
    };
    let cpu = simple(Strategy::Cpu, fixed(|_| false));
    let greedy = simple(Strategy::Greedy, fixed(|c| c == Candidate::Accel));
    let chosen = match strategy {
        Strategy::Cpu => cpu.clone(),
        Strategy::Greedy => greedy.clone(),
        Strategy::Mincut => {
            let (side, value) = solve(g, costs, &pin_cpu, &pin_accel);
            let mut best = finish(g, costs, strategy, side, value, 0);
            // A refinement step: force `nodes` to one side on top of what is forced already,
            // re-solve, and cost the plan.
            let forcing = |base: &[bool], nodes: &[NodeId]| -> Vec<bool> {
                let mut f = base.to_vec();
                for i in nodes {
                    f[i.index()] = true;
                }
                f
            };
            let attempt = |cpu: &[bool], accel: &[bool], refinements: usize| {
                finish(g, costs, strategy, solve(g, costs, cpu, accel).0, value, refinements)
            };
            let mut forced_cpu = pin_cpu.clone();
            let mut forced_accel = pin_accel.clone();
            let mut tries = 0;
            let mut rejected: BTreeSet<Vec<NodeId>> = BTreeSet::new();
            let mut rejected_merges: BTreeSet<(NodeId, NodeId)> = BTreeSet::new();
            'outer: loop {
                // Drops: a partition whose dispatch costs more than it saves goes to the CPU.
                // Cheapest-looking partitions first: fewest nodes is a fair proxy for gain.
                let mut cands: Vec<&Partition> = best
                    .partitions
                    .iter()
                    .filter(|p| p.side == Side::Accel && !rejected.contains(&p.nodes))
                    .collect();
                cands.sort_by_key(|p| (p.nodes.len(), p.id));
                for p in cands {
                    if tries >= MAX_REFINEMENT_TRIES || p.nodes.iter().any(|i| forced_accel[i.index()]) {
                        continue;
                    }
                    tries += 1;
                    let f = forcing(&forced_cpu, &p.nodes);
                    let trial = attempt(&f, &forced_accel, best.refinements + 1);
                    if trial.objective_ps < best.objective_ps {
                        forced_cpu = f;
                        best = trial;
                        continue 'outer;
                    }
                    rejected.insert(p.nodes.clone());
                }
                // Merges: two accelerator partitions separated only by CPU partitions whose
                // nodes the array could run become one, saving a dispatch and the transfers
                // between them, when that outweighs running those nodes on the array.
                let order: Vec<&Partition> = best.partitions.iter().collect();
                let accel_at: Vec<usize> = (0..order.len()).filter(|&k| order[k].side == Side::Accel).collect();
                for w in accel_at.windows(2) {
                    let (a, b) = (order[w[0]], order[w[1]]);
                    let key = (a.nodes[0], b.nodes[0]);
                    if tries >= MAX_REFINEMENT_TRIES || rejected_merges.contains(&key) {
                        continue;
                    }
                    let middle: Vec<NodeId> = order[w[0] + 1..w[1]]
                        .iter()
                        .flat_map(|p| p.nodes.iter().copied())
                        .collect();
                    let movable = !middle.is_empty()
                        && middle
                            .iter()
                            .all(|i| verdicts[i.index()].candidate == Candidate::Accel && !forced_cpu[i.index()]);
                    if !movable {
                        rejected_merges.insert(key);
                        continue;
                    }
                    tries += 1;
                    let all: Vec<NodeId> = a.nodes.iter().chain(&b.nodes).chain(&middle).copied().collect();
                    let f = forcing(&forced_accel, &all);
                    let trial = attempt(&forced_cpu, &f, best.refinements + 1);
                    if trial.objective_ps < best.objective_ps {
                        forced_accel = f;
                        best = trial;
                        continue 'outer;
                    }
                    rejected_merges.insert(key);
                }
                break;
            }
            // Never worse than the simple strategies.
            for other in [&greedy, &cpu] {
                if other.objective_ps < best.objective_ps {
                    let mut o = other.clone();
                    o.strategy = Strategy::Mincut;
                    best = o;
                }
            }
            best.mincut_ps = value;
            best
        }
    };
    Ok(Plans { chosen, greedy, cpu })
}

/// Column fitting, after mapping: when the accelerator partitions need more columns than the
/// array has, they are swapped every inference, which the cut cannot see. `mapped` gives a
/// plan's mapped latency (reconfiguration included) and whether it is resident. Each step
/// moves to the CPU the accelerator partition whose move leaves the lowest latency: while the
/// plan is not resident, even when that step alone is slower (only the last of several moves
/// may end the swapping), afterwards only while it helps. The fastest plan met is kept; at
/// most `MAX_REFINEMENT_TRIES` trials. Partitions holding a node pinned to the array stay.
pub fn fit(
    g: &Graph,
    verdicts: &[Verdict],
    costs: &Costs,
    pins: &Pins,
    base: Plan,
    mapped: &dyn Fn(&Plan) -> (u64, bool),
) -> Result<Plan, PinError> {
    let (_, pinned_accel) = resolve_pins(g, verdicts, pins)?;
    let (mut latency, mut resident) = mapped(&base);
    let mut best = (latency, base.clone());
    let mut current = base;
    let mut tries = 0;
    loop {
        let mut step: Option<(u64, bool, Plan)> = None;
        for p in current.partitions.iter().filter(|p| p.side == Side::Accel) {
            if tries >= MAX_REFINEMENT_TRIES || p.nodes.iter().any(|n| pinned_accel[n.index()]) {
                continue;
            }
            tries += 1;
            let mut side = current.side.clone();
            for n in &p.nodes {
                side[n.index()] = Side::Cpu;
            }
            let trial = finish(
                g,
                costs,
                current.strategy,
                side,
                current.mincut_ps,
                current.refinements + 1,
            );
            let (l, r) = mapped(&trial);
            if step.as_ref().is_none_or(|s| l < s.0) {
                step = Some((l, r, trial));
            }
        }
        match step {
            Some((l, r, plan)) if !resident || l < latency => {
                (latency, resident, current) = (l, r, plan);
                if latency < best.0 {
                    best = (latency, current.clone());
                }
            }
            _ => return Ok(best.1),
        }
    }
}

/// A plan whose boundaries are the user's `--cut-at` tensors: a node's level is the largest
/// number of cut tensors on a path to it, levels only grow along edges, so grouping nodes by
/// level (then by connected component) gives convex partitions in a fixed order.
pub fn plan_at(g: &Graph, base: &Plan, tensors: &[String]) -> Result<Plan, PinError> {
    let mut cut: BTreeSet<ValueId> = BTreeSet::new();
    for t in tensors {
        let v = g
            .value_by_name(t)
            .ok_or_else(|| PinError(format!("--cut-at `{t}`: no such tensor")))?;
        if g.value(v).producer.is_none() {
            return Err(PinError(format!(
                "--cut-at `{t}`: a graph input or weight cannot be a cut point"
            )));
        }
        cut.insert(v);
    }
    let n = g.nodes.len();
    let mut level = vec![0usize; n];
    for i in 0..n {
        for v in g.nodes[i].all_inputs() {
            if let Some(p) = g.value(v).producer {
                let l = level[p.index()] + usize::from(cut.contains(&v));
                level[i] = level[i].max(l);
            }
        }
    }
    // Reuse the partitioner by giving alternate levels alternate sides, then relabel: the
    // partitioner only needs "same side" to mean "same level".
    let max_level = level.iter().copied().max().unwrap_or(0);
    let mut parts = Vec::new();
    let mut partition_of = vec![None; n];
    for l in 0..=max_level {
        let side: Vec<Side> = (0..n)
            .map(|i| {
                if base.side[i] == Side::Const {
                    Side::Const
                } else if level[i] == l {
                    Side::Accel
                } else {
                    Side::Cpu
                }
            })
            .collect();
        let (ps, _) = partitions(g, &side);
        for p in ps.into_iter().filter(|p| p.side == Side::Accel) {
            let id = parts.len();
            for node in &p.nodes {
                partition_of[node.index()] = Some(id);
            }
            // A piece is the array's when the base plan put all of it there; a piece that
            // mixes sides is the CPU's, which can run anything.
            let piece_side = if p.nodes.iter().all(|n| base.side[n.index()] == Side::Accel) {
                Side::Accel
            } else {
                Side::Cpu
            };
            parts.push(Partition {
                id,
                side: piece_side,
                nodes: p.nodes,
            });
        }
    }
    let mut side: Vec<Side> = (0..n)
        .map(|i| {
            if base.side[i] == Side::Const {
                Side::Const
            } else {
                Side::Cpu
            }
        })
        .collect();
    for p in &parts {
        for node in &p.nodes {
            side[node.index()] = p.side;
        }
    }
    Ok(Plan {
        strategy: base.strategy,
        side,
        partitions: parts,
        partition_of,
        cut_points: Vec::new(),
        mincut_ps: base.mincut_ps,
        objective_ps: base.objective_ps,
        refinements: 0,
    })
}
