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
        convert_ps: vec![0; g.values.len()],
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
                assert!(parts[p].nodes.contains(&NodeId::new(i)));
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

/// A profile written for this test (made-up numbers): a slow I/O tile makes data movement on
/// the array dear, a fast host link makes transfers cheap, and a dispatch costs 1 ms.
const MERGE_PROFILE: &str = r#"
version = 1
name = "merge-check"
[array]
columns = 1
compute_rows = 4
clock_hz = 1.0e9
[array.compute_tile]
local_memory_bytes = 4194304
neighbour_memories = 0
stream_inputs = 2
stream_outputs = 2
macs_per_cycle = { int8 = 256 }
[array.buffer_tile]
capacity_bytes = 4194304
dma_channels = 12
addressing_dims = 4
[array.io_tile]
dma_channels = 4
bandwidth_bytes_per_s = 2.56e8
[host]
bandwidth_bytes_per_s = 1.0e12
transfer_latency_s = 1e-6
dispatch_overhead_s = 1e-3
[cpu]
ops_per_s = { fp32 = 1.0e9, int8 = 1.0e9 }
memory_bandwidth_bytes_per_s = 2.0e10
[[rule]]
id = "qmatmul"
why = "test: int8 matrix products"
ops = ["QLinearMatMul"]
types = [{ act = "int8", weight = "int8", out = "int8" }]
[[movement]]
id = "move"
why = "test: transposes by DMA"
ops = ["Transpose"]
how = "dma"
"#;

/// The start of a model of int8 matrix products: the input `x` (int8 64×1024) and the scale
/// `s` and zero point `z` every QLinearMatMul of the test shares.
fn int8_products(name: &str) -> tilecut::onnx::builder::ModelBuilder {
    use tilecut::onnx::builder::{raw_tensor, ModelBuilder};
    let mut m = ModelBuilder::new(name, 17);
    m.graph
        .input("x", DType::I8, &[DimSpec::Fixed(64), DimSpec::Fixed(1024)]);
    m.graph
        .initializer(raw_tensor("s", DType::F32, &[], 0.5f32.to_le_bytes().to_vec()));
    m.graph.initializer(raw_tensor("z", DType::I8, &[], vec![0]));
    m
}

/// Two heavy int8 matrix products with a transpose between them. Alone, the exact cut puts the
/// transpose on the CPU: on this array moving 2 × 64 KiB through the I/O tile takes 0.5 ms,
/// while the CPU does it in 6.6 µs plus two 1 µs transfers (the cut does not see dispatches).
/// That leaves two accelerator partitions and two 1 ms dispatches; running the transpose on the
/// array instead costs 0.5 ms and saves one dispatch, so the refinement must merge them.
/// (Dropping either product to the CPU would cost 134 ms: 2·64·1024·1024 ops at 1 GOPS.)
#[test]
fn refinement_merges_partitions_when_a_dispatch_outweighs_the_work_between() {
    use tilecut::onnx::builder::raw_tensor;
    let mut m = int8_products("merge");
    m.graph
        .initializer(raw_tensor("w1", DType::I8, &[1024, 1024], vec![1; 1024 * 1024]));
    m.graph
        .initializer(raw_tensor("w2", DType::I8, &[64, 1024], vec![1; 64 * 1024]));
    m.graph
        .node("QLinearMatMul", &["x", "s", "z", "w1", "s", "z", "s", "z"], &["a"]);
    m.graph
        .node("Transpose", &["a"], &["t"])
        .attribute
        .push(tilecut::onnx::builder::attr::ints("perm", &[1, 0]));
    m.graph
        .node("QLinearMatMul", &["t", "s", "z", "w2", "s", "z", "s", "z"], &["u"]);
    // A last transpose that belongs on the CPU (greedy offload would pay 8 ms moving 2 MiB
    // through the I/O tile), so the plan cannot be the greedy one.
    m.graph
        .node("Transpose", &["u"], &["y"])
        .attribute
        .push(tilecut::onnx::builder::attr::ints("perm", &[1, 0]));
    m.graph
        .output("y", DType::I8, &[DimSpec::Fixed(1024), DimSpec::Fixed(1024)]);
    let d = tempfile::tempdir().expect("tmp");
    let model = d.path().join("merge.onnx");
    std::fs::write(&model, m.build().encode_to_vec()).expect("write");
    let target = tilecut::target::parse(MERGE_PROFILE, "merge.toml").expect("profile");
    let a = tilecut::analyze_stages(&model, &Default::default(), target, &Default::default()).expect("analyzes");
    let g = &a.read.model.graph;
    let side = |output: &str| {
        let i = g
            .nodes
            .iter()
            .position(|n| n.outputs.iter().flatten().any(|o| g.value(*o).name == output))
            .expect("node");
        a.plan.side[i]
    };
    // The exact stage alone: the transpose on the CPU, two accelerator partitions.
    let (exact, _) = {
        let (net, s, t) = cut::network(g, &a.costs, &vec![false; g.nodes.len()], &vec![false; g.nodes.len()]);
        let c = flow::min_cut(&net, s, t);
        let ti = g
            .nodes
            .iter()
            .position(|n| n.op_type == "Transpose")
            .expect("transpose");
        (c.source_side[ti], c.value)
    };
    assert!(exact, "the exact cut keeps the transpose on the CPU");
    // After refinement: the first transpose joins the products in one partition, the last
    // stays on the CPU; better than greedy offload and than the exact cut's two dispatches.
    assert_eq!(side("t"), Side::Accel);
    assert_eq!(side("y"), Side::Cpu);
    let accel = a.plan.partitions.iter().filter(|p| p.side == Side::Accel).count();
    assert_eq!(accel, 1, "merged into one dispatch");
    assert!(a.plan.objective_ps < a.greedy.objective_ps);
    assert!(a.plan.refinements >= 1);
}

/// Four heavy int8 matrix products, each between CPU-only Neg nodes: the exact cut offloads all
/// four, one partition each. With a budget of two columns they are swapped through the array
/// every inference at 0.1 s each (made-up numbers). Running two of the products on the CPU costs
/// 67 ms apiece (64·1024·1024 ops at 1 GOPS) and lets the other two stay resident, so column
/// fitting must keep exactly two partitions, and the mapped estimate must beat the unfitted
/// plan's, the greedy plan's and the CPU-only plan's.
#[test]
fn column_fitting_drops_partitions_that_cost_more_to_swap_than_they_save() {
    use tilecut::onnx::builder::raw_tensor;
    let profile = MERGE_PROFILE
        .replace("columns = 1\n", "columns = 2\nreconfigure_s = 0.1\n")
        .replace("dispatch_overhead_s = 1e-3", "dispatch_overhead_s = 1e-6");
    let target = || tilecut::target::parse(&profile, "fit.toml").expect("profile");
    let mut m = int8_products("fit");
    let mut prev = "x".to_string();
    for k in 0..4 {
        let w = format!("w{k}");
        m.graph
            .initializer(raw_tensor(&w, DType::I8, &[1024, 1024], vec![1; 1024 * 1024]));
        let a = format!("a{k}");
        m.graph
            .node("QLinearMatMul", &[&prev, "s", "z", &w, "s", "z", "s", "z"], &[&a]);
        prev = if k < 3 {
            let n = format!("n{k}");
            m.graph.node("Neg", &[&a], &[&n]);
            n
        } else {
            a
        };
    }
    m.graph
        .output(&prev, DType::I8, &[DimSpec::Fixed(64), DimSpec::Fixed(1024)]);
    let d = tempfile::tempdir().expect("tmp");
    let model = d.path().join("fit.onnx");
    std::fs::write(&model, m.build().encode_to_vec()).expect("write");

    let a = tilecut::analyze_stages(&model, &Default::default(), target(), &Default::default()).expect("analyzes");
    let accel = a.plan.partitions.iter().filter(|p| p.side == Side::Accel).count();
    assert_eq!(accel, 2, "two partitions kept");
    assert!(a.array.resident);
    let s = a.summary(&a.read);
    let est = s.est_latency_us.expect("known");
    assert!(est <= s.greedy_us.expect("known") && est <= s.cpu_only_latency_us.expect("known"));
    // The unfitted plan: the exact cut's four partitions, swapped (0.4 s of reconfiguration).
    let unfitted = tilecut::map::map(&a.read.model.graph, &a.costs, &a.greedy, &a.target, None);
    assert!(!unfitted.resident);
    let unfitted_us = tilecut::map::est_latency_ps(&a.greedy, &a.costs, &unfitted) as f64 / 1e6;
    assert!(est < unfitted_us, "{est} µs against {unfitted_us} µs unfitted");
    assert!(s.reconfigure_us == 0.0);
}
