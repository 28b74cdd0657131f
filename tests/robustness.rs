//! Hostile input, seeded: every conformance model and sample with random byte flips,
//! truncations and field duplication goes through the whole pipeline (read → analyze) and
//! must give a result or an error, never a panic; so must the same models with their
//! structure changed (ops swapped, attributes, dims and stored values set to edge values).

use std::path::{Path, PathBuf};

use tilecut::samples::Rng;

fn corpus() -> Vec<PathBuf> {
    let root = Path::new(env!("CARGO_MANIFEST_DIR"));
    let mut v = Vec::new();
    for dir in ["tests/onnx-node", "sample-models", "tests/light"] {
        for e in std::fs::read_dir(root.join(dir)).expect("dir") {
            let p = e.expect("entry").path();
            if p.extension().is_some_and(|x| x == "onnx") {
                v.push(p);
            }
        }
    }
    v.sort();
    v
}

#[test]
fn mutated_models_never_panic() {
    let files = corpus();
    let mut rng = Rng::new(0xbad5eed);
    let target = tilecut::target::load("wide-array").expect("target");
    let dir = tempfile::tempdir().expect("tmp");
    let mut runs = 0;
    for (k, f) in files.iter().enumerate() {
        // Every 3rd conformance model, all samples and light models.
        if k % 3 != 0 && f.to_string_lossy().contains("onnx-node") {
            continue;
        }
        let bytes = std::fs::read(f).expect("read");
        if bytes.len() > 2 << 20 {
            continue;
        }
        for round in 0..3 {
            let mut b = bytes.clone();
            match round {
                0 => {
                    for _ in 0..1 + rng.next_u64() % 8 {
                        let i = (rng.next_u64() % b.len() as u64) as usize;
                        b[i] ^= 1 << (rng.next_u64() % 8);
                    }
                }
                1 => b.truncate((rng.next_u64() % b.len() as u64) as usize),
                _ => {
                    let i = (rng.next_u64() % b.len() as u64) as usize;
                    let chunk: Vec<u8> = b[i..].iter().take(64).copied().collect();
                    b.splice(i..i, chunk);
                }
            }
            let p = dir.path().join("m.onnx");
            std::fs::write(&p, &b).expect("write");
            let result = std::panic::catch_unwind(|| {
                let _ = tilecut::analyze_stages(&p, &Default::default(), target.clone(), &Default::default())
                    .map(|a| a.report());
            });
            assert!(result.is_ok(), "panic on a mutation of {} (round {round})", f.display());
            runs += 1;
        }
    }
    println!("{runs} mutated models analyzed without a panic");
}

/// Every registered op with random ranks, dims and hostile attribute values.
#[test]
fn every_op_survives_random_shapes_and_attributes() {
    use prost::Message;
    use tilecut::ir::DType;
    use tilecut::onnx::builder::{attr, i64_tensor, DimSpec, ModelBuilder};
    let mut rng = Rng::new(31337);
    let target = tilecut::target::load("compact-array").expect("target");
    let dir = tempfile::tempdir().expect("tmp");
    let mut runs = 0;
    for def in tilecut::ops::registry().iter().flat_map(|t| t.iter()) {
        for _ in 0..30 {
            let opset = [7, 11, 13, 17, 18, 21, 23][(rng.next_u64() % 7) as usize];
            let mut m = ModelBuilder::new("fuzz", opset);
            if !def.domain.is_empty() {
                m.opsets.push((def.domain.to_string(), 1));
            }
            let n_in = 1 + (rng.next_u64() % 4) as usize;
            let mut names = Vec::new();
            for i in 0..n_in {
                let rank = (rng.next_u64() % 5) as usize;
                let dims: Vec<DimSpec> = (0..rank)
                    .map(|_| {
                        if rng.next_u64() % 6 == 0 {
                            // Plain symbols, and the expressions files write (sums with spaces)
                            // or that only look like one (a slash in a name).
                            let texts = [
                                "n",
                                "n",
                                "n + 1",
                                "2 * (n + m)",
                                "N/A",
                                "n/2",
                                "(n",
                                "n - 9",
                                "(n - 1)//2 + 1",
                            ];
                            DimSpec::Named(texts[(rng.next_u64() % 9) as usize].into())
                        } else {
                            DimSpec::Fixed((rng.next_u64() % 6) as i64)
                        }
                    })
                    .collect();
                let name = format!("x{i}");
                if rng.next_u64() % 3 == 0 {
                    // A small integer constant input (shapes, axes, pads, sizes...).
                    let vals: Vec<i64> = (0..rng.next_u64() % 5)
                        .map(|_| (rng.next_u64() % 9) as i64 - 3)
                        .collect();
                    m.graph.initializer(i64_tensor(&name, &[vals.len() as i64], &vals));
                } else {
                    m.graph.input(&name, DType::F32, &dims);
                }
                names.push(name);
            }
            let refs: Vec<&str> = names.iter().map(|s| s.as_str()).collect();
            let n_out = 1 + (rng.next_u64() % 3) as usize;
            let outs: Vec<String> = (0..n_out).map(|i| format!("y{i}")).collect();
            let orefs: Vec<&str> = outs.iter().map(|s| s.as_str()).collect();
            let node = m.graph.node(def.op, &refs, &orefs);
            node.domain = def.domain.into();
            let r = |rng: &mut Rng| (rng.next_u64() % 11) as i64 - 5;
            for a in [
                "axis",
                "group",
                "keepdims",
                "k",
                "blocksize",
                "hidden_size",
                "transA",
                "transB",
                "to",
                "num_outputs",
                "ceil_mode",
                "batch_dims",
            ] {
                if rng.next_u64() % 3 == 0 {
                    node.attribute.push(attr::int(a, r(&mut rng)));
                }
            }
            for a in [
                "kernel_shape",
                "strides",
                "pads",
                "dilations",
                "perm",
                "axes",
                "split",
                "starts",
                "ends",
                "output_shape",
                "output_padding",
            ] {
                if rng.next_u64() % 3 == 0 {
                    let v: Vec<i64> = (0..rng.next_u64() % 6).map(|_| r(&mut rng)).collect();
                    node.attribute.push(attr::ints(a, &v));
                }
            }
            if rng.next_u64() % 4 == 0 {
                node.attribute.push(attr::string(
                    "auto_pad",
                    ["SAME_UPPER", "VALID", "NOTSET", "bogus"][(rng.next_u64() % 4) as usize],
                ));
            }
            if rng.next_u64() % 4 == 0 {
                node.attribute.push(attr::string(
                    "equation",
                    ["ij,jk->ik", "...ii->...i", "a,b", ",", "->"][(rng.next_u64() % 5) as usize],
                ));
            }
            // Declared output shapes, random too: where inference leaves a shape unknown the
            // declaration completes it, and the cost rules then run on it.
            for o in &outs {
                let rank = (rng.next_u64() % 5) as usize;
                let dims: Vec<DimSpec> = (0..rank).map(|_| DimSpec::Fixed((rng.next_u64() % 6) as i64)).collect();
                m.graph.output(o, DType::F32, &dims);
            }
            let p = dir.path().join("op.onnx");
            std::fs::write(&p, m.build().encode_to_vec()).expect("write");
            let result = std::panic::catch_unwind(|| {
                let _ = tilecut::analyze_stages(&p, &Default::default(), target.clone(), &Default::default())
                    .map(|a| a.report());
            });
            assert!(result.is_ok(), "panic on op {} (opset {opset})", def.op);
            runs += 1;
        }
    }
    println!("{runs} random single-op models analyzed without a panic");
}

/// Values that break arithmetic on dims, axes and counts: zero, negatives, the 32- and 64-bit
/// edges, and a large ordinary number.
const EDGES: [i64; 13] = [
    0,
    -1,
    -2,
    1,
    2,
    3,
    7,
    1 << 31,
    -(1 << 31),
    1 << 62,
    i64::MIN,
    i64::MAX,
    100_000,
];

/// One structure-aware change to a decoded model: a node becomes another registered op, an
/// attribute or declared dim takes an edge value, a stored tensor changes its dims, type or
/// values, a node is rewired or removed, or the opset moves. Byte flips (above) mostly stop
/// at the decoder; these reach inference and costing with shapes and values real files carry.
/// This is how a deployed model with one initializer dim changed to 2^31 was found to make a
/// Reshape ask for 32 GB, and a backward Slice of an empty axis to panic.
fn mutate(m: &mut tilecut::onnx::ModelProto, ops: &[(&str, &str)], rng: &mut Rng) {
    use tilecut::onnx::tensor_shape_proto::dimension::Value as D;
    use tilecut::onnx::type_proto::Value as T;
    let pick = |rng: &mut Rng, n: usize| (rng.next_u64() % n.max(1) as u64) as usize;
    let edge = |rng: &mut Rng| EDGES[(rng.next_u64() % EDGES.len() as u64) as usize];
    let Some(g) = m.graph.as_mut() else { return };
    let g = some_graph(g, rng);
    let names: Vec<String> = g
        .node
        .iter()
        .flat_map(|n| n.output.iter().map(|o| o.to_string()))
        .chain(g.input.iter().map(|i| i.name.to_string()))
        .chain(g.initializer.iter().map(|t| t.name.clone()))
        .chain(["".to_string()])
        .collect();
    match rng.next_u64() % 8 {
        0 if !g.node.is_empty() => {
            let k = pick(rng, g.node.len());
            let (domain, op) = ops[pick(rng, ops.len())];
            g.node[k].op_type = op.into();
            g.node[k].domain = domain.into();
        }
        1 if !g.node.is_empty() => {
            let k = pick(rng, g.node.len());
            let n = &mut g.node[k];
            if n.attribute.is_empty() {
                let names = ["axis", "axes", "perm", "pads", "group", "kernel_shape", "k", "to"];
                let a = tilecut::onnx::AttributeProto {
                    name: names[pick(rng, names.len())].into(),
                    r#type: 7,
                    ints: (0..pick(rng, 5)).map(|_| edge(rng)).collect(),
                    ..Default::default()
                };
                n.attribute.push(a);
            } else {
                let j = pick(rng, n.attribute.len());
                let v = edge(rng);
                let a = &mut n.attribute[j];
                if a.ints.is_empty() {
                    a.i = v;
                } else {
                    let i = pick(rng, a.ints.len());
                    a.ints[i] = v;
                }
            }
        }
        2 => {
            let declared: Vec<&mut tilecut::onnx::ValueInfoProto> = g
                .input
                .iter_mut()
                .chain(g.output.iter_mut())
                .chain(g.value_info.iter_mut())
                .collect();
            let n = declared.len();
            if let Some(v) = declared.into_iter().nth(pick(rng, n)) {
                if let Some(T::TensorType(t)) = v.r#type.as_mut().and_then(|t| t.value.as_mut()) {
                    match t.shape.as_mut().filter(|s| !s.dim.is_empty()) {
                        Some(s) => {
                            let i = pick(rng, s.dim.len());
                            s.dim[i].value = Some(match rng.next_u64() % 3 {
                                0 => D::DimParam(["n", "2*n+1", "a b", ""][pick(rng, 4)].into()),
                                _ => D::DimValue(edge(rng).max(-1)),
                            });
                        }
                        None => t.elem_type = [0, 1, 7, 16, 22, 23, 99][pick(rng, 7)],
                    }
                }
            }
        }
        3 if !g.initializer.is_empty() => {
            let k = pick(rng, g.initializer.len());
            let t = &mut g.initializer[k];
            match rng.next_u64() % 3 {
                0 if !t.dims.is_empty() => {
                    let i = pick(rng, t.dims.len());
                    t.dims[i] = edge(rng).max(0);
                }
                1 => t.data_type = [0, 1, 2, 6, 7, 10, 16, 22, 99][pick(rng, 9)],
                _ => {
                    // Edge values as a small int64 tensor: shapes, axes, pads, sizes, counts.
                    let vals: Vec<i64> = (0..1 + pick(rng, 4)).map(|_| edge(rng)).collect();
                    t.dims = vec![vals.len() as i64];
                    t.data_type = 7;
                    t.raw_data = vals.iter().flat_map(|v| v.to_le_bytes()).collect::<Vec<u8>>().into();
                    t.float_data = Default::default();
                    t.int64_data = Default::default();
                    t.int32_data = Default::default();
                }
            }
        }
        4 if !g.node.is_empty() => {
            let k = pick(rng, g.node.len());
            let name = names[pick(rng, names.len())].as_str().into();
            let n = &mut g.node[k];
            if n.input.is_empty() || rng.next_u64() % 3 == 0 {
                n.input.push(name);
            } else {
                let i = pick(rng, n.input.len());
                n.input[i] = name;
            }
        }
        5 if g.node.len() > 1 => {
            let k = pick(rng, g.node.len());
            g.node.remove(k);
        }
        6 if !g.node.is_empty() => {
            let k = pick(rng, g.node.len());
            let n = &mut g.node[k];
            if !n.input.is_empty() {
                let i = pick(rng, n.input.len());
                n.input.remove(i);
            }
        }
        _ => {
            if let Some(o) = m.opset_import.first_mut().filter(|_| rng.next_u64() % 2 == 0) {
                o.version = [1, 7, 11, 13, 17, 21, 23, 0, -1][pick(rng, 9)];
            }
        }
    }
}

/// `g` or, half the time when it has any, one of its subgraphs (If branches, Loop and Scan
/// bodies), chosen the same way in turn.
fn some_graph<'g>(g: &'g mut tilecut::onnx::GraphProto, rng: &mut Rng) -> &'g mut tilecut::onnx::GraphProto {
    let places: Vec<(usize, usize)> = g
        .node
        .iter()
        .enumerate()
        .flat_map(|(i, n)| {
            n.attribute
                .iter()
                .enumerate()
                .filter(|(_, a)| a.g.is_some())
                .map(move |(j, _)| (i, j))
        })
        .collect();
    if places.is_empty() || rng.next_u64() % 2 == 0 {
        return g;
    }
    let (i, j) = places[(rng.next_u64() % places.len() as u64) as usize];
    let body = g.node[i].attribute[j].g.as_deref_mut().expect("a graph attribute");
    some_graph(body, rng)
}

#[test]
fn structurally_mutated_models_never_panic() {
    use prost::Message;
    let ops: Vec<(&str, &str)> = tilecut::ops::registry()
        .iter()
        .flat_map(|t| t.iter())
        .map(|d| (d.domain, d.op))
        .collect();
    let seed = std::env::var("TC_SEED")
        .ok()
        .and_then(|v| v.parse().ok())
        .unwrap_or(0x005e_ed0f_5a5e);
    let mut rng = Rng::new(seed);
    let target = tilecut::target::load("compact-array").expect("target");
    let dir = tempfile::tempdir().expect("tmp");
    let mut runs = 0;
    for f in corpus() {
        let bytes = std::fs::read(&f).expect("read");
        let Ok(original) = tilecut::onnx::ModelProto::decode(bytes.as_slice()) else {
            continue;
        };
        let rounds: usize = std::env::var("TC_ROUNDS")
            .ok()
            .and_then(|v| v.parse().ok())
            .unwrap_or(12);
        for round in 0..rounds {
            let mut m = original.clone();
            for _ in 0..1 + rng.next_u64() % 4 {
                mutate(&mut m, &ops, &mut rng);
            }
            let p = dir.path().join("m.onnx");
            std::fs::write(&p, m.encode_to_vec()).expect("write");
            let result = std::panic::catch_unwind(|| {
                let _ = tilecut::analyze_stages(&p, &Default::default(), target.clone(), &Default::default())
                    .map(|a| a.report());
            });
            assert!(
                result.is_ok(),
                "panic on a structural mutation of {} (round {round})",
                f.display()
            );
            runs += 1;
        }
    }
    println!("{runs} structurally mutated models analyzed without a panic");
}
