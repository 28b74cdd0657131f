//! The cut-finder's exact stage against brute force on thousands of random small DAGs
//! (seeded), Dinic's max-flow against petgraph's Ford–Fulkerson (a general-purpose reference
//! library), and the partition invariants.

use bytes::Bytes;
use prost::Message;
use tilecut::cut::{self, flow, Costs, Side};
use tilecut::ir::{DType, Graph, NodeId};
use tilecut::onnx::builder::{DimSpec, ModelBuilder};
use tilecut::samples::Rng;

/// A random DAG of `n` Add/Relu nodes over a [4]-float input, tensors with several consumers.
fn random_graph(rng: &mut Rng, n: usize) -> Graph {
    let mut m = ModelBuilder::new("random", 17);
    m.graph.input("x", DType::F32, &[DimSpec::Fixed(4)]);
    let mut tensors = vec!["x".to_string()];
    for i in 0..n {
        let pick = |rng: &mut Rng, t: &Vec<String>| t[(rng.next_u64() % t.len() as u64) as usize].clone();
        let out = format!("t{i}");
        if rng.next_u64() % 2 == 0 && tensors.len() > 1 {
            let (a, b) = (pick(rng, &tensors), pick(rng, &tensors));
            m.graph.node("Add", &[&a, &b], &[&out]);
        } else {
            let a = pick(rng, &tensors);
            m.graph.node("Relu", &[&a], &[&out]);
        }
        tensors.push(out);
    }
    // One or two graph outputs.
    let last = tensors.last().cloned().unwrap_or_default();
    m.graph.output(&last, DType::F32, &[DimSpec::Fixed(4)]);
    if n > 3 && rng.next_u64() % 2 == 0 {
        let mid = tensors[n / 2].clone();
        if mid != last && mid != "x" {
            m.graph.output(&mid, DType::F32, &[DimSpec::Fixed(4)]);
        }
    }
    let bytes = Bytes::from(m.build().encode_to_vec());
    let loaded =
        tilecut::onnx::load::decode(std::path::Path::new("random.onnx"), bytes, std::env::temp_dir()).expect("decodes");
    let (mut model, mut diags) = tilecut::import::import(&loaded, &Default::default()).expect("imports");
    tilecut::infer::infer(&mut model, &mut diags);
    model.graph
}

fn random_costs(rng: &mut Rng, g: &Graph) -> Costs {
    let n = g.nodes.len();
    Costs {
        cpu_ps: (0..n).map(|_| rng.next_u64() % 1000).collect(),
        accel_ps: (0..n)
            .map(|_| {
                if rng.next_u64() % 4 == 0 {
                    None
                } else {
                    Some(rng.next_u64() % 1000)
                }
            })
            .collect(),
        transfer_ps: g.values.iter().map(|_| rng.next_u64() % 600).collect(),
        bytes: g.values.iter().map(|_| Some(16)).collect(),
        dispatch_ps: 0,
        unknown_work: Vec::new(),
    }
}

fn brute_force(g: &Graph, costs: &Costs) -> u64 {
    let n = g.nodes.len();
    let mut best = u64::MAX;
    for mask in 0u32..(1 << n) {
        let side: Vec<Side> = (0..n)
            .map(|i| if mask & (1 << i) != 0 { Side::Accel } else { Side::Cpu })
            .collect();
        if side
            .iter()
            .enumerate()
            .any(|(i, s)| *s == Side::Accel && costs.accel_ps[i].is_none())
        {
            continue;
        }
        best = best.min(cut::serial_cost(g, costs, &side));
    }
    best
}

#[test]
fn min_cut_equals_brute_force_on_random_dags() {
    let mut rng = Rng::new(20261202);
    let mut checked = 0;
    for case in 0..2500 {
        let n = if case % 50 == 0 {
            13 + (case / 50) % 4
        } else {
            1 + (rng.next_u64() % 12) as usize
        };
        let g = random_graph(&mut rng, n);
        let costs = random_costs(&mut rng, &g);
        let none = vec![false; g.nodes.len()];
        let (net, s, t) = cut::network(&g, &costs, &none, &none);
        let c = flow::min_cut(&net, s, t);
        let exact = brute_force(&g, &costs);
        assert_eq!(
            c.value, exact,
            "case {case}: min cut {} vs brute force {exact} ({n} nodes)",
            c.value
        );
        // The cut's own assignment costs exactly its value.
        let side: Vec<Side> = (0..g.nodes.len())
            .map(|i| if c.source_side[i] { Side::Cpu } else { Side::Accel })
            .collect();
        assert_eq!(cut::serial_cost(&g, &costs, &side), c.value, "case {case}");
        checked += 1;
    }
    println!("min-cut = brute force on {checked} random DAGs");
}

#[test]
fn dinic_matches_petgraph_ford_fulkerson() {
    let mut rng = Rng::new(7);
    for case in 0..300 {
        let n = 2 + (rng.next_u64() % 30) as usize;
        let mut ours = flow::Network::new(n);
        let mut theirs = petgraph::Graph::<(), u64>::new();
        let idx: Vec<_> = (0..n).map(|_| theirs.add_node(())).collect();
        for _ in 0..(rng.next_u64() % (4 * n as u64) + 1) {
            let (u, v) = (
                (rng.next_u64() % n as u64) as usize,
                (rng.next_u64() % n as u64) as usize,
            );
            let c = rng.next_u64() % 100;
            if u == v || c == 0 {
                continue;
            }
            ours.add_edge(u, v, c);
            theirs.add_edge(idx[u], idx[v], c);
        }
        let a = flow::min_cut(&ours, 0, n - 1).value;
        let (b, _) = petgraph::algo::ford_fulkerson(&theirs, idx[0], idx[n - 1]);
        assert_eq!(a, b, "case {case}");
    }
}

/// Partition invariants: every live node in exactly one partition, each partition connected
/// and convex, the quotient graph acyclic.
pub fn check_partitions(g: &Graph, side: &[Side], parts: &[cut::Partition], partition_of: &[Option<usize>]) {
    let n = g.nodes.len();
    for i in 0..n {
        match side[i] {
            Side::Const => assert!(partition_of[i].is_none()),
            _ => {
                let p = partition_of[i].expect("every live node has a partition");
                assert!(parts[p].nodes.contains(&NodeId(i as u32)));
                assert_eq!(parts[p].side, side[i]);
            }
        }
    }
    let total: usize = parts.iter().map(|p| p.nodes.len()).sum();
    assert_eq!(total, side.iter().filter(|s| **s != Side::Const).count());
    // Quotient acyclic ⇔ a topological order of partitions exists; partitions are numbered in
    // execution order, so every edge must go from a lower or equal id to a higher or equal one.
    for (i, node) in g.nodes.iter().enumerate() {
        for v in node.all_inputs() {
            if let Some(p) = g.value(v).producer {
                if let (Some(a), Some(b)) = (partition_of[p.index()], partition_of[i]) {
                    assert!(a <= b, "edge from partition {a} back to {b}");
                }
            }
        }
    }
    // With ids in execution order and edges only forward, a path that leaves partition P
    // enters partitions with larger ids and can never come back: every partition is convex.
}

#[test]
fn partitions_are_convex_connected_and_ordered_on_random_dags() {
    let mut rng = Rng::new(99);
    for _ in 0..500 {
        let n = 1 + (rng.next_u64() % 40) as usize;
        let g = random_graph(&mut rng, n);
        let side: Vec<Side> = (0..g.nodes.len())
            .map(|_| {
                if rng.next_u64() % 2 == 0 {
                    Side::Cpu
                } else {
                    Side::Accel
                }
            })
            .collect();
        let (parts, of) = cut::partitions(&g, &side);
        check_partitions(&g, &side, &parts, &of);
        // Connected: inside a partition, every node reaches every other one undirected.
        for p in &parts {
            let members: std::collections::BTreeSet<usize> = p.nodes.iter().map(|n| n.index()).collect();
            let mut seen = std::collections::BTreeSet::new();
            let mut stack = vec![p.nodes[0].index()];
            seen.insert(p.nodes[0].index());
            while let Some(u) = stack.pop() {
                let node = &g.nodes[u];
                let mut nb: Vec<usize> = node
                    .all_inputs()
                    .iter()
                    .filter_map(|v| g.value(*v).producer)
                    .map(|x| x.index())
                    .collect();
                for o in node.outputs.iter().flatten() {
                    nb.extend(g.value(*o).consumers.iter().map(|c| c.index()));
                }
                for w in nb {
                    if members.contains(&w) && seen.insert(w) {
                        stack.push(w);
                    }
                }
            }
            assert_eq!(seen.len(), members.len(), "partition {} is not connected", p.id);
        }
    }
}
