//! `tilecut analyze` end to end: the audit identity of the objective, partition invariants on
//! every sample and conformance model, hand-computed figures, formats agreeing, pins, and
//! determinism.

mod common;

use std::path::{Path, PathBuf};

use common::*;
use tilecut::cut::Side;
use tilecut::rules::Candidate;

fn sample(name: &str) -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join("sample-models").join(name)
}

fn json(args: &[&str]) -> serde_json::Value {
    let (code, out, err) = run(args);
    assert_eq!(code, 0, "{args:?}: {err}");
    serde_json::from_str(&out).expect("json")
}

/// Microseconds with six decimals back to exact integer picoseconds.
fn ps(v: &serde_json::Value) -> i64 {
    (v.as_f64().unwrap_or(0.0) * 1e6).round() as i64
}

#[test]
fn objective_is_exactly_the_sum_of_the_reported_costs() {
    for (_, name) in samples() {
        for target in ["compact-array", "wide-array"] {
            let r = json(&[
                "analyze",
                sample(&name).to_str().expect("utf8"),
                "--target",
                target,
                "--format",
                "json",
                "--dim",
                "batch=1",
                "--dim",
                "frames=20",
            ]);
            let mut total: i64 = 0;
            for n in r["nodes"].as_array().expect("nodes") {
                total += match n["placement"].as_str() {
                    Some("accel") => ps(&n["accel_us"]),
                    Some("cpu") => ps(&n["cpu_us"]),
                    _ => 0,
                };
            }
            for c in r["cut_points"].as_array().expect("cuts") {
                total += ps(&c["transfer_us"]);
            }
            for p in r["partitions"].as_array().expect("parts") {
                total += ps(&p["dispatch_us"]);
            }
            assert_eq!(total, ps(&r["summary"]["objective_us"]), "{name} on {target}");
            let s = &r["summary"];
            // The mapped estimates (pipelines and swapping included) of the three plans.
            assert!(
                ps(&s["est_latency_us"]) <= ps(&s["greedy_us"]),
                "{name} on {target}: worse than greedy"
            );
            assert!(
                ps(&s["est_latency_us"]) <= ps(&s["cpu_only_latency_us"]),
                "{name} on {target}: worse than CPU only"
            );
            let bytes: u64 = r["cut_points"]
                .as_array()
                .expect("cuts")
                .iter()
                .map(|c| c["bytes"].as_u64().unwrap_or(0))
                .sum();
            assert_eq!(bytes, s["boundary_bytes"].as_u64().expect("bytes"));
        }
    }
}

fn samples() -> Vec<(usize, String)> {
    tilecut::samples::all()
        .expect("samples")
        .into_iter()
        .enumerate()
        .map(|(i, (n, _))| (i, n.to_string()))
        .collect()
}

fn check_plan(a: &tilecut::Analysis, label: &str) {
    let g = &a.read.model.graph;
    for plan in [&a.plan, &a.greedy, &a.cpu_only] {
        let n = g.nodes.len();
        let mut count = vec![0usize; n];
        for p in &plan.partitions {
            for node in &p.nodes {
                count[node.index()] += 1;
                assert_eq!(plan.side[node.index()], p.side);
            }
        }
        for (i, &c) in count.iter().enumerate() {
            let expect = usize::from(plan.side[i] != Side::Const);
            assert_eq!(c, expect, "{label}: node {} in {c} partitions", g.nodes[i].name);
            if plan.side[i] == Side::Accel {
                assert_eq!(
                    a.verdicts[i].candidate,
                    Candidate::Accel,
                    "{label}: CPU-only node {} offloaded",
                    g.nodes[i].name
                );
            }
        }
        // Partitions are numbered in execution order and every edge runs forward, so the
        // quotient is acyclic and no path can leave a partition and re-enter it.
        for (i, node) in g.nodes.iter().enumerate() {
            for v in node.all_inputs() {
                if let Some(p) = g.value(v).producer {
                    if let (Some(x), Some(y)) = (plan.partition_of[p.index()], plan.partition_of[i]) {
                        assert!(x <= y, "{label}: edge from partition {x} back to {y}");
                    }
                }
            }
        }
    }
}

#[test]
fn partition_invariants_on_every_sample_and_conformance_model() {
    let mut checked = 0;
    for (_, name) in samples() {
        for t in ["compact-array", "wide-array"] {
            let a = tilecut::analyze_stages(
                &sample(&name),
                &Default::default(),
                tilecut::target::load(t).expect("t"),
                &Default::default(),
            )
            .expect("analyzes");
            check_plan(&a, &name);
            checked += 1;
        }
    }
    let dir = Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/onnx-node");
    let mut files: Vec<PathBuf> = std::fs::read_dir(&dir)
        .expect("dir")
        .map(|e| e.expect("entry").path())
        .filter(|p| p.extension().is_some_and(|e| e == "onnx"))
        .collect();
    files.sort();
    let target = tilecut::target::load("wide-array").expect("t");
    for f in files {
        // Every conformance model the reader accepts must also analyze.
        if tilecut::read_model(&f, &Default::default()).is_err() {
            continue;
        }
        let a = tilecut::analyze_stages(&f, &Default::default(), target.clone(), &Default::default())
            .unwrap_or_else(|e| panic!("{}: {e}", f.display()));
        check_plan(&a, &f.display().to_string());
        checked += 1;
    }
    println!("partition invariants hold on {checked} model/target pairs");
    assert!(checked > 1500);
}

#[test]
fn hand_computed_figures_for_two_samples() {
    // Fruit grader, int8 QDQ, compact-array. MACs by the documented convention:
    //   conv 3→16 k3 s2 on 64×64 → 32×32: 16·32·32·(3·3·3) = 442,368
    //   depthwise 16 k3 on 32×32:           16·32·32·(1·3·3) = 147,456
    //   pointwise 16→16 on 32×32:           16·32·32·16      = 262,144
    //   conv 16→32 k3 s2 on 16×16 → 8×8:   32·8·8·(16·3·3)  = 294,912
    //   Gemm 32→5:                          5·32             =     160
    //   total 1,147,040, all on the one accelerator partition.
    // Boundary: the quantized image int8 [1,3,64,64] = 12,288 bytes in, the quantized logits
    // int8 [1,5] = 5 bytes out: 12,293 bytes, 2 transfers. Resident weights of 22,810 bytes fit
    // one 64 KiB tile: 1 tile, 1 column.
    let r = json(&[
        "analyze",
        sample("fruit_grader_qdq_int8.onnx").to_str().expect("utf8"),
        "--format",
        "json",
    ]);
    assert_eq!(r["model"]["macs"], 1_147_040);
    assert_eq!(r["summary"]["boundary_bytes"], 12_293);
    assert_eq!(r["summary"]["transfers"], 2);
    assert_eq!(r["summary"]["accel_partitions"], 1);
    assert_eq!(r["summary"]["coverage_macs"], 1.0);
    let accel: Vec<&serde_json::Value> = r["partitions"]
        .as_array()
        .expect("parts")
        .iter()
        .filter(|p| p["side"] == "accel")
        .collect();
    assert_eq!(accel[0]["macs"], 1_147_040);
    assert_eq!(
        (accel[0]["columns"].as_u64(), accel[0]["tiles"].as_u64()),
        (Some(1), Some(1))
    );
    // Vibration monitor, int16 activations, compact-array:
    //   conv 3→16 k7 s2 on 1024 → 512:  16·512·(3·7)  = 172,032
    //   conv 16→32 k5 s2 → 256:         32·256·(16·5) = 655,360
    //   conv 32→32 k3 → 256:            32·256·(32·3) = 786,432
    //   Gemm 32→4:                      4·32          =     128   → 1,613,952 MACs.
    // Boundary: the float input [1,3,1024] = 12,288 bytes (quantized on the array) and the
    // float output [1,4] = 16 bytes: 12,304 bytes.
    let r = json(&[
        "analyze",
        sample("vibration_monitor_a16w8.onnx").to_str().expect("utf8"),
        "--format",
        "json",
    ]);
    assert_eq!(r["model"]["macs"], 1_613_952);
    assert_eq!(r["summary"]["boundary_bytes"], 12_304);
    assert_eq!(r["summary"]["accel_partitions"], 1);
}

#[test]
fn formats_agree() {
    let m = sample("parcel_label_detector_qdq.onnx");
    let ms = m.to_str().expect("utf8");
    let r = json(&["analyze", ms, "--format", "json"]);
    let (_, table, _) = run(&["analyze", ms]);
    let (_, md, _) = run(&["analyze", ms, "--format", "markdown"]);
    let s = &r["summary"];
    let cov = format!("{:.1} %", s["coverage_macs"].as_f64().expect("cov") * 100.0);
    let bytes = tilecut::report::grouped(s["boundary_bytes"].as_u64().expect("b"));
    let lat = format!("{:.1}", s["est_latency_us"].as_f64().expect("lat"));
    for text in [&table, &md] {
        assert!(text.contains(&cov), "coverage {cov} missing");
        assert!(text.contains(&bytes), "bytes {bytes} missing");
        assert!(text.contains(&lat), "latency {lat} missing");
        assert!(text.contains("estimates"), "the estimate note is missing");
    }
}

#[test]
fn pins_are_honoured_or_refused_with_the_reason() {
    let m = sample("fruit_grader_qdq_int8.onnx");
    let ms = m.to_str().expect("utf8");
    let r = json(&["analyze", ms, "--format", "json", "--pin-cpu", "Conv"]);
    for n in r["nodes"]
        .as_array()
        .expect("nodes")
        .iter()
        .filter(|n| n["op"] == "Conv")
    {
        assert_eq!(n["placement"], "cpu");
    }
    let r = json(&["analyze", ms, "--format", "json", "--pin-cpu", "conv_1*"]);
    assert!(r["nodes"]
        .as_array()
        .expect("nodes")
        .iter()
        .filter(|n| n["name"].as_str().is_some_and(|s| s.starts_with("conv_1")))
        .all(|n| n["placement"] == "cpu"));
    assert_fails_cleanly(&["analyze", ms, "--pin-accel", "Softmax"], "cannot pin node");
    assert_fails_cleanly(&["analyze", ms, "--pin-cpu", "NoSuchOp"], "matches no node");
    // Pinning a capable node onto the accelerator keeps it there even where the cut would not.
    let r = json(&[
        "analyze",
        sample("fruit_grader_f32.onnx").to_str().expect("utf8"),
        "--target",
        "wide-array",
        "--format",
        "json",
        "--pin-accel",
        "conv_4",
    ]);
    assert!(r["nodes"]
        .as_array()
        .expect("nodes")
        .iter()
        .any(|n| n["name"] == "conv_4" && n["placement"] == "accel"));
}

#[test]
fn strategies_are_reported_side_by_side() {
    let r = json(&[
        "analyze",
        sample("parcel_label_detector_qdq.onnx").to_str().expect("utf8"),
        "--format",
        "json",
    ]);
    let names: Vec<&str> = r["strategies"]
        .as_array()
        .expect("s")
        .iter()
        .map(|s| s["strategy"].as_str().expect("name"))
        .collect();
    assert_eq!(names, ["mincut", "greedy", "cpu"]);
    let r = json(&[
        "analyze",
        sample("parcel_label_detector_qdq.onnx").to_str().expect("utf8"),
        "--format",
        "json",
        "--strategy",
        "cpu",
    ]);
    assert_eq!(r["summary"]["accel_partitions"], 0);
}

#[test]
fn output_is_deterministic_and_independent_of_file_node_order() {
    let m = sample("parcel_label_detector_qdq.onnx");
    let a = run(&["analyze", m.to_str().expect("utf8"), "--format", "json"]).1;
    let b = run(&["analyze", m.to_str().expect("utf8"), "--format", "json"]).1;
    assert_eq!(a, b);
    // Reverse the node order in the file: same cost, same partition structure.
    let bytes = std::fs::read(&m).expect("read");
    let mut proto = <tilecut::onnx::ModelProto as prost::Message>::decode(bytes::Bytes::from(bytes)).expect("decode");
    proto.graph.as_mut().expect("graph").node.reverse();
    let d = tempfile::tempdir().expect("tmp");
    let p = d.path().join("reversed.onnx");
    std::fs::write(&p, prost::Message::encode_to_vec(&proto)).expect("write");
    let x: serde_json::Value = serde_json::from_str(&a).expect("json");
    let y = json(&["analyze", p.to_str().expect("utf8"), "--format", "json"]);
    assert_eq!(x["summary"]["objective_us"], y["summary"]["objective_us"]);
    assert_eq!(x["summary"]["boundary_bytes"], y["summary"]["boundary_bytes"]);
    let parts = |r: &serde_json::Value| {
        let mut v: Vec<(String, Vec<String>)> = r["partitions"]
            .as_array()
            .expect("p")
            .iter()
            .map(|p| {
                let mut n: Vec<String> = p["nodes"]
                    .as_array()
                    .expect("n")
                    .iter()
                    .map(|s| s.as_str().unwrap_or("").to_string())
                    .collect();
                n.sort();
                (p["side"].as_str().unwrap_or("").to_string(), n)
            })
            .collect();
        v.sort();
        v
    };
    assert_eq!(parts(&x), parts(&y));
}

#[test]
fn bad_analyze_arguments() {
    let m = sample("fruit_grader_qdq_int8.onnx");
    let (code, _, _) = run(&["analyze", m.to_str().expect("utf8"), "--strategy", "magic"]);
    assert_eq!(code, 2);
    assert_fails_cleanly(&["analyze", "/nonexistent.onnx"], "/nonexistent.onnx");
}

#[test]
fn sample_min_cuts_agree_with_petgraph_on_the_same_network() {
    // The network built from the reported costs, solved by petgraph's Ford–Fulkerson (a
    // general-purpose reference library), gives the same min-cut value as tilecut's Dinic.
    for (_, name) in samples() {
        let a = tilecut::analyze_stages(
            &sample(&name),
            &Default::default(),
            tilecut::target::load("compact-array").expect("t"),
            &Default::default(),
        )
        .expect("analyzes");
        let g = &a.read.model.graph;
        let none = vec![false; g.nodes.len()];
        let (net, s, t) = tilecut::cut::network(g, &a.costs, &none, &none);
        let mut pg = petgraph::Graph::<(), u64>::new();
        let idx: Vec<_> = (0..net.vertices()).map(|_| pg.add_node(())).collect();
        for &(u, v, c) in net.edges() {
            pg.add_edge(idx[u as usize], idx[v as usize], c);
        }
        let (value, _) = petgraph::algo::ford_fulkerson(&pg, idx[s], idx[t]);
        assert_eq!(value, a.plan.mincut_ps, "{name}");
    }
}

#[test]
fn renaming_nodes_leaves_cost_and_structure_unchanged() {
    let m = sample("fruit_grader_qdq_int8.onnx");
    let bytes = std::fs::read(&m).expect("read");
    let mut proto = <tilecut::onnx::ModelProto as prost::Message>::decode(bytes::Bytes::from(bytes)).expect("decode");
    for (i, n) in proto.graph.as_mut().expect("graph").node.iter_mut().enumerate() {
        n.name = format!("renamed_{}", 1000 - i).into();
    }
    let d = tempfile::tempdir().expect("tmp");
    let p = d.path().join("renamed.onnx");
    std::fs::write(&p, prost::Message::encode_to_vec(&proto)).expect("write");
    let x = json(&["analyze", m.to_str().expect("utf8"), "--format", "json"]);
    let y = json(&["analyze", p.to_str().expect("utf8"), "--format", "json"]);
    for k in [
        "objective_us",
        "mincut_us",
        "boundary_bytes",
        "accel_partitions",
        "transfers",
    ] {
        assert_eq!(x["summary"][k], y["summary"][k], "{k}");
    }
    let sizes = |r: &serde_json::Value| {
        r["partitions"]
            .as_array()
            .expect("p")
            .iter()
            .map(|p| (p["side"].clone(), p["nodes"].as_array().map(|n| n.len())))
            .collect::<Vec<_>>()
    };
    assert_eq!(sizes(&x), sizes(&y));
}

#[test]
fn analyze_json_matches_the_committed_schema() {
    let schema: serde_json::Value =
        serde_json::from_str(include_str!("../schemas/analyze.schema.json")).expect("schema parses");
    let validator = jsonschema::validator_for(&schema).expect("schema compiles");
    for (_, name) in samples() {
        let path = sample(&name);
        let path = path.to_str().expect("utf8");
        // Plain, and with every what-if assumption (the `what_if` section filled in).
        for extra in [
            &[][..],
            &[
                "--assume-supported",
                "Softmax,TopK",
                "--assume-quantized",
                "--assume-waived",
                "weight-asymmetric",
            ][..],
        ] {
            let mut args = vec!["analyze", path, "--format", "json"];
            args.extend_from_slice(extra);
            let r = json(&args);
            assert_eq!(r["what_if"].is_null(), extra.is_empty(), "{name}");
            let errors: Vec<String> = validator
                .iter_errors(&r)
                .map(|e| format!("{} at {}", e, e.instance_path))
                .collect();
            assert!(errors.is_empty(), "{name} {extra:?}: {errors:?}");
        }
    }
}

/// "Fix this first": CPU-bound nodes, costliest first, each with a suggestion that names only
/// ops the target has rules for and that fits the node (checked by hand below against the
/// ONNX operator specification's definitions of the ops involved).
#[test]
fn fix_first_ranks_cpu_bound_work_with_suggestions_that_fit() {
    for (_, name) in samples() {
        for target in ["compact-array", "wide-array"] {
            let r = json(&[
                "analyze",
                sample(&name).to_str().expect("utf8"),
                "--target",
                target,
                "--format",
                "json",
            ]);
            let rows = r["fix_first"].as_array().expect("fix_first");
            let mut last = f64::INFINITY;
            for f in rows {
                assert!(
                    f["suggestion"].as_str().is_some_and(|s| !s.is_empty()),
                    "{name} {target}: no suggestion for {f}"
                );
                let cpu = f["cpu_us"].as_f64().unwrap_or(0.0);
                assert!(cpu <= last + 1e-9, "{name} {target}: not costliest first");
                last = cpu;
                // Every listed node really is on the CPU with that first blocking reason.
                for n in f["nodes"].as_array().expect("nodes") {
                    let node = r["nodes"]
                        .as_array()
                        .expect("nodes")
                        .iter()
                        .find(|x| &x["name"] == n)
                        .expect("listed node exists");
                    assert_eq!(node["placement"], "cpu");
                    let first = node["reasons"]
                        .as_array()
                        .expect("reasons")
                        .iter()
                        .find(|x| x["blocking"] == true)
                        .expect("blocked");
                    assert_eq!(first["code"], f["code"]);
                }
            }
        }
    }
    let suggestion = |model: &str, target: &str, node: &str| -> String {
        let r = json(&[
            "analyze",
            sample(model).to_str().expect("utf8"),
            "--target",
            target,
            "--format",
            "json",
        ]);
        r["fix_first"]
            .as_array()
            .expect("rows")
            .iter()
            .find(|f| f["nodes"].as_array().expect("n").iter().any(|n| n == node))
            .and_then(|f| f["suggestion"].as_str())
            .unwrap_or_else(|| panic!("{node} not in fix_first"))
            .to_string()
    };
    // gather_41 reads a constant column index: a Gather of a constant index is a Slice (ONNX
    // Gather spec) and compact-array has rules for Slice and Reshape.
    let s = suggestion("parcel_label_detector_qdq.onnx", "compact-array", "gather_41");
    assert!(s.contains("Slice"), "{s}");
    // gather_48's indices come from NonMaxSuppression at run time: no Slice for it.
    let s = suggestion("parcel_label_detector_qdq.onnx", "compact-array", "gather_48");
    assert!(!s.contains("Slice") && s.contains("--assume-supported Gather"), "{s}");
    // Gelu ≈ x·Sigmoid(1.702x): compact-array has Mul and Sigmoid rules; an approximation.
    let s = suggestion("command_word_encoder_f32.onnx", "compact-array", "gelu_47");
    assert!(s.contains("Sigmoid") && s.contains("approximation"), "{s}");
    // The encoder's ReduceMean averages over frames (axis 1 of [batch, frames, 64]), not over
    // spatial axes, so it is not a GlobalAveragePool.
    let r = json(&[
        "analyze",
        sample("command_word_encoder_f32.onnx").to_str().expect("utf8"),
        "--format",
        "json",
    ]);
    let reduce = r["fix_first"]
        .as_array()
        .expect("rows")
        .iter()
        .find(|f| f["op"] == "ReduceMean")
        .expect("ReduceMean row");
    assert!(!reduce["suggestion"].as_str().expect("s").contains("GlobalAveragePool"));
    // Float convolutions: quantize to the first integer signature of compact-array's conv rule.
    let s = suggestion("fruit_grader_f32.onnx", "compact-array", "conv_4");
    assert!(
        s.contains("int8 × int8 → int8") && s.contains("--assume-quantized"),
        "{s}"
    );
    // Symbolic dims: name them.
    let s = suggestion("command_word_encoder_f32.onnx", "wide-array", "gelu_47");
    assert!(s.contains("--dim batch=N") && s.contains("--dim frames=N"), "{s}");
}

/// A report path that cannot be written (its folder missing, or a folder itself) is refused
/// before the model is read, with nothing written.
#[test]
fn report_paths_that_cannot_be_written_are_refused_first() {
    let d = tempfile::tempdir().expect("tmp");
    let m = sample("fruit_grader_qdq_int8.onnx");
    let ms = m.to_str().expect("utf8");
    let missing = d.path().join("no-such-folder").join("report.html");
    assert_fails_cleanly(
        &["analyze", ms, "--html", missing.to_str().expect("utf8")],
        "no-such-folder does not exist",
    );
    let ds = d.path().to_str().expect("utf8");
    assert_fails_cleanly(&["analyze", ms, "--dot", ds], "--dot names a folder");
    // Checked before reading: an unreadable model is not what the error names.
    let broken = d.path().join("broken.onnx");
    std::fs::write(&broken, b"not a model").expect("write");
    assert_fails_cleanly(
        &[
            "analyze",
            broken.to_str().expect("utf8"),
            "--html",
            missing.to_str().expect("utf8"),
        ],
        "does not exist",
    );
    let n = std::fs::read_dir(d.path()).expect("dir").count();
    assert_eq!(n, 1, "nothing but the broken model in the folder");
}

/// The visual reports are written by renaming into place: naming the model as the output
/// would replace it. Refused before anything is written.
#[test]
fn report_files_never_overwrite_the_model() {
    let d = tempfile::tempdir().expect("tmp");
    let model = d.path().join("grader.onnx");
    std::fs::copy(
        Path::new(env!("CARGO_MANIFEST_DIR")).join("sample-models/fruit_grader_qdq_int8.onnx"),
        &model,
    )
    .expect("copy");
    let before = std::fs::read(&model).expect("read");
    let ms = model.to_str().expect("utf8");
    let (html, dot) = (d.path().join("report.html"), d.path().join("report.dot"));
    let via_dots = d.path().join(".").join("grader.onnx");
    let (hs, ds) = (html.to_str().expect("utf8"), dot.to_str().expect("utf8"));
    assert_fails_cleanly(&["analyze", ms, "--dot", ds, "--html", ms], "--html would overwrite");
    assert_fails_cleanly(
        &["analyze", ms, "--html", hs, "--dot", via_dots.to_str().expect("utf8")],
        "--dot would overwrite",
    );
    assert_eq!(std::fs::read(&model).expect("read"), before);
    assert!(
        !html.exists() && !dot.exists(),
        "no report is written when another output is refused"
    );
    let n = std::fs::read_dir(d.path()).expect("dir").count();
    assert_eq!(n, 1, "nothing but the model in the folder");
}

/// `analyze --target wide-array --format json` of a model built here, with `extra` settings.
fn on_wide_array(model: &Path, extra: &[&str]) -> serde_json::Value {
    let m = model.to_str().expect("utf8");
    json(&[&["analyze", m, "--target", "wide-array", "--format", "json"], extra].concat())
}

/// A float model on a target that runs floats as bf16 (wide-array's `[float] mode = "bf16"`):
/// a float tensor changes type where it enters or leaves the array, once, and tensors stay
/// bf16 from one array op to the next (README, "Cost model"). Built here: the hard-swish
/// written out as exporters write it between two convolutions, x·clip(x+3, 0, 6)/6 (common
/// practice). Figures by hand from the wide-array profile (`tilecut targets show wide-array`):
/// - Add over [1,64,32,32]: 65,536 ops (one per output element, tilecut's convention), on
///   32 tiles × 128 bf16 MACs/cycle × 1.25 GHz × 2 = 1.024e13 ops/s: 6.4 ns = 6,400 ps. When
///   each op paid its own conversion it also paid (262,144 + 262,144 bytes) ÷ 8 GB/s =
///   65.5 µs, against 17.5 µs on the CPU (524,288 bytes ÷ 30 GB/s), and the whole model
///   stayed on the CPU (280 µs there, against 386 µs with only the convolutions offloaded).
/// - x (and y), 262,144 bytes of fp32 crossing the host link: 8 µs latency + 262,144 B ÷
///   16 GB/s (16.384 µs) + 2 µs layout conversion + 262,144 B ÷ 8 GB/s (32.768 µs) =
///   59.152 µs.
/// - A tensor passed between two accelerator partitions goes out to system memory and back
///   as bf16: 2 × (8 + 16.384 + 2) µs = 52.768 µs, no type conversion.
#[test]
fn float_tensors_convert_where_they_cross_the_array_boundary_not_at_every_op() {
    let d = tempfile::tempdir().expect("tmp");
    let x = |name: &str| vi(name, 1, &[Dm::N(1), Dm::N(64), Dm::N(32), Dm::N(32)]);
    let swish = model(
        vec![
            node("Conv", &["x", "w1"], &["a"]),
            node("Add", &["a", "three"], &["h"]),
            node("Clip", &["h", "zero", "six"], &["c"]),
            node("Mul", &["a", "c"], &["m"]),
            node("Div", &["m", "six"], &["s"]),
            node("Conv", &["s", "w2"], &["y"]),
        ],
        vec![x("x")],
        vec![x("y")],
        vec![
            f32_init("w1", &[64, 64, 1, 1]),
            f32_init("w2", &[64, 64, 1, 1]),
            f32_init("three", &[]),
            f32_init("zero", &[]),
            f32_init("six", &[]),
        ],
    );
    let r = on_wide_array(&write(d.path(), "swish.onnx", &swish), &[]);
    let nodes = r["nodes"].as_array().expect("nodes");
    assert!(nodes.iter().all(|n| n["placement"] == "accel"), "{nodes:#?}");
    assert_eq!(r["summary"]["accel_partitions"], 1);
    assert_eq!(r["summary"]["transfers"], 2);
    let add = nodes.iter().find(|n| n["op"] == "Add").expect("Add");
    assert_eq!(ps(&add["accel_us"]), 6_400);
    for c in r["cut_points"].as_array().expect("cuts") {
        assert_eq!(ps(&c["transfer_us"]), 59_152_000, "{c}");
    }

    // Conv → Relu (held on the CPU) → Add(conv output, relu output) → Conv: the first
    // convolution's output goes to the CPU and, as bf16, to the second accelerator partition.
    let split = model(
        vec![
            node("Conv", &["x", "w1"], &["a"]),
            node("Relu", &["a"], &["r"]),
            node("Add", &["a", "r"], &["s"]),
            node("Conv", &["s", "w2"], &["y"]),
        ],
        vec![x("x")],
        vec![x("y")],
        vec![f32_init("w1", &[64, 64, 1, 1]), f32_init("w2", &[64, 64, 1, 1])],
    );
    let pins = ["--pin-cpu", "Relu", "--pin-accel", "Conv", "--pin-accel", "Add"];
    let r = on_wide_array(&write(d.path(), "split.onnx", &split), &pins);
    let cost = |tensor: &str, direction: &str| {
        let c = r["cut_points"]
            .as_array()
            .expect("cuts")
            .iter()
            .find(|c| c["tensor"] == tensor && c["direction"] == direction)
            .unwrap_or_else(|| panic!("no {direction} cut at {tensor}: {}", r["cut_points"]));
        ps(&c["transfer_us"])
    };
    assert_eq!(cost("a", "to_cpu"), 59_152_000);
    assert_eq!(cost("a", "accel_to_accel"), 52_768_000);
    assert_eq!(cost("r", "to_accel"), 59_152_000);
}

/// One inference's latency on the array is the partition's stages run in turns, each over all
/// the tiles (README, "Cost model", Mapping): a partition of more stages than the array has
/// tiles takes the sum of its node times, not 32 times that. Built: 40 float 1×1
/// convolutions in a chain over [1,64,8,8] on wide-array (32 compute tiles), each its own
/// stage; 40 × 16 KiB of weights fit the array's 32 × 64 KiB of local memory, so nothing
/// streams and the partition is resident (no reconfiguration). The pipeline still sets the
/// throughput: one tile a stage, two stages on some tiles.
#[test]
fn a_partition_of_more_stages_than_tiles_takes_its_node_times_in_turns() {
    let d = tempfile::tempdir().expect("tmp");
    let x = |name: &str| vi(name, 1, &[Dm::N(1), Dm::N(64), Dm::N(8), Dm::N(8)]);
    let names: Vec<String> = (0..=40).map(|i| format!("t{i}")).collect();
    let weights: Vec<String> = (0..40).map(|i| format!("w{i}")).collect();
    let nodes = (0..40)
        .map(|i| node("Conv", &[&names[i], &weights[i]], &[&names[i + 1]]))
        .collect();
    let inits = weights.iter().map(|w| f32_init(w, &[64, 64, 1, 1])).collect();
    let chain = model(nodes, vec![x("t0")], vec![x("t40")], inits);
    let r = on_wide_array(&write(d.path(), "chain.onnx", &chain), &[]);
    assert_eq!(r["summary"]["accel_partitions"], 1);
    assert_eq!(r["summary"]["resident"], true);
    let part = r["partitions"]
        .as_array()
        .expect("parts")
        .iter()
        .find(|p| p["side"] == "accel")
        .expect("an accelerator partition");
    let m = &part["mapping"];
    assert_eq!(m["stages"], 40);
    assert_eq!(m["streamed_bytes"], 0);
    let node_times: i64 = r["nodes"]
        .as_array()
        .expect("nodes")
        .iter()
        .filter(|n| n["partition"] == part["id"])
        .map(|n| ps(&n["accel_us"]))
        .sum();
    // Each 1×1 convolution: 64·8·8·64 = 262,144 MACs, 524,288 ops on 1.024e13 ops/s (32 tiles
    // × 128 bf16 MACs/cycle × 1.25 GHz × 2) = 51.2 ns.
    assert_eq!(node_times, 40 * 51_200);
    assert_eq!(ps(&m["pipeline_latency_us"]), node_times);
    assert_eq!(ps(&r["summary"]["est_latency_us"]), ps(&r["summary"]["objective_us"]));
    // Two stages share a tile: the slowest tile works 2 × 32 × 51.2 ns a round.
    let throughput = m["throughput_per_s"].as_f64().expect("throughput");
    assert!((throughput - 1e9 / (2.0 * 32.0 * 51.2)).abs() < 1.0, "{throughput}");
}
