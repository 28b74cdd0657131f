//! Hostile input, seeded: every conformance model and sample with random byte flips,
//! truncations and field duplication goes through the whole pipeline (read → analyze) and
//! must give a result or an error, never a panic.

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
