//! Target profiles and the rule table: profile arithmetic, verdicts on every quantizer variant
//! (expected by hand), QDQ recognition per the ONNX operator spec, and bad profiles.

mod common;

use std::path::{Path, PathBuf};

use common::*;
use tilecut::rules::Candidate;

fn sample(name: &str) -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join("sample-models").join(name)
}

/// A profile written for this test: the check values of one laptop-class design, marked as
/// common practice for that design (not universal): 20 compute tiles at 0.5 TOPS int8 each,
/// 2 input and 2 output streams per compute tile, 12 DMA channels per buffer tile, 4 per I/O
/// tile, and a compute tile that addresses its own and 3 neighbouring data memories.
const CHECK_PROFILE: &str = r#"
version = 1
name = "check-design"
[array]
columns = 5
compute_rows = 4
clock_hz = 1.0e9
[array.compute_tile]
local_memory_bytes = 65536
neighbour_memories = 3
stream_inputs = 2
stream_outputs = 2
macs_per_cycle = { int8 = 250 }
[array.buffer_tile]
capacity_bytes = 524288
dma_channels = 12
addressing_dims = 4
[array.io_tile]
dma_channels = 4
bandwidth_bytes_per_s = 4.0e9
[host]
bandwidth_bytes_per_s = 10.0e9
transfer_latency_s = 1e-5
dispatch_overhead_s = 5e-5
[cpu]
ops_per_s = { fp32 = 5.0e10 }
memory_bandwidth_bytes_per_s = 2.0e10
"#;

#[test]
fn profile_arithmetic_reproduces_the_design_totals() {
    let t = tilecut::target::parse(CHECK_PROFILE, "check.toml").expect("valid");
    assert_eq!(t.compute_tiles(), 20);
    // 2 ops per MAC × 250 MACs/cycle × 1 GHz = 0.5 TOPS per tile; × 20 tiles = 10 TOPS.
    assert!((t.tops("int8").expect("rate") - 10.0).abs() < 1e-9);
    let a = &t.file.array;
    assert_eq!((a.compute_tile.stream_inputs, a.compute_tile.stream_outputs), (2, 2));
    assert_eq!(a.buffer_tile.dma_channels, 12);
    assert_eq!(a.io_tile.dma_channels, 4);
    assert_eq!(t.addressable_bytes_per_tile(), 4 * a.compute_tile.local_memory_bytes);
}

fn verdicts(model: &str, target: &str, dims: &[&str]) -> tilecut::Analysis {
    let mut o = tilecut::Overrides::default();
    for d in dims {
        o.add_dim(d).expect("dim");
    }
    let t = tilecut::target::load(target).expect("target");
    tilecut::analyze_stages(&sample(model), &o, t, &Default::default()).expect("analyzes")
}

/// (candidate, codes of blocking reasons) of every node of op type `op`.
fn of_op(a: &tilecut::Analysis, op: &str) -> Vec<(Candidate, Vec<&'static str>)> {
    let g = &a.read.model.graph;
    g.node_ids()
        .filter(|&i| g.node(i).op_type == op)
        .map(|i| {
            let v = &a.verdicts[i.index()];
            (
                v.candidate,
                v.reasons.iter().filter(|r| r.blocking).map(|r| r.code).collect(),
            )
        })
        .collect()
}

fn all_accel(v: &[(Candidate, Vec<&'static str>)]) -> bool {
    !v.is_empty() && v.iter().all(|(c, _)| *c == Candidate::Accel)
}

fn all_blocked_by(v: &[(Candidate, Vec<&'static str>)], code: &str) -> bool {
    !v.is_empty() && v.iter().all(|(c, r)| *c == Candidate::Cpu && r.contains(&code))
}

#[test]
fn expected_verdicts_per_quantizer_variant_and_target() {
    // Written by hand from the profiles: compact-array runs int8/uint8/int16 activations with
    // symmetric int8 weights (any granularity), no blocked weights, float on the CPU;
    // wide-array adds int4 blocked weights and runs float as bf16.
    let conv = |m: &str, t: &str| of_op(&verdicts(m, t, &[]), "Conv");
    assert!(
        all_accel(&conv("fruit_grader_qdq_int8.onnx", "compact-array")),
        "per-channel int8"
    );
    assert!(
        all_accel(&conv("fruit_grader_qdq_per_tensor.onnx", "compact-array")),
        "per-tensor int8"
    );
    assert!(all_blocked_by(
        &conv("fruit_grader_qdq_asymmetric_u8.onnx", "compact-array"),
        "weight-asymmetric"
    ));
    assert!(all_blocked_by(
        &conv("fruit_grader_qdq_int4_blocked.onnx", "compact-array"),
        "weight-blocked"
    ));
    assert!(
        all_accel(&conv("fruit_grader_qdq_int4_blocked.onnx", "wide-array")),
        "int4 blocked on wide"
    );
    assert!(
        all_accel(&conv("vibration_monitor_a16w8.onnx", "compact-array")),
        "int16 × int8"
    );
    assert!(all_blocked_by(
        &conv("fruit_grader_f32.onnx", "compact-array"),
        "float-on-cpu"
    ));
    assert!(all_accel(&conv("fruit_grader_f32.onnx", "wide-array")), "float as bf16");
    // Softmax has no rule on compact-array.
    assert!(all_blocked_by(
        &of_op(&verdicts("fruit_grader_qdq_int8.onnx", "compact-array", &[]), "Softmax"),
        "no-rule"
    ));
    // The detector's post-processing stays on the CPU; its backbone convolutions do not.
    let det = verdicts("parcel_label_detector_qdq.onnx", "compact-array", &[]);
    assert!(all_blocked_by(&of_op(&det, "NonMaxSuppression"), "no-rule"));
    assert!(all_blocked_by(&of_op(&det, "TopK"), "no-rule"));
    assert!(all_accel(&of_op(&det, "Conv")));
    // Data-dependent shapes keep the Gather of selected boxes off the wide array.
    let det_wide = verdicts("parcel_label_detector_qdq.onnx", "wide-array", &[]);
    assert!(of_op(&det_wide, "Gather")
        .iter()
        .any(|(c, r)| *c == Candidate::Cpu && r.contains(&"shape-dynamic")));
    // Symbolic dims block until fixed.
    assert!(all_blocked_by(
        &of_op(&verdicts("command_word_encoder_f32.onnx", "wide-array", &[]), "MatMul"),
        "shape-dynamic"
    ));
    let fixed = verdicts("command_word_encoder_f32.onnx", "wide-array", &["batch=1", "frames=50"]);
    assert!(all_accel(&of_op(&fixed, "MatMul")), "{:?}", of_op(&fixed, "MatMul"));
    // Subgraph-carrying ops stay on the CPU.
    assert!(all_blocked_by(
        &of_op(&verdicts("night_mode_switch_if.onnx", "wide-array", &[]), "If"),
        "control-flow"
    ));
    assert!(all_blocked_by(
        &of_op(&verdicts("running_average_loop.onnx", "wide-array", &[]), "Loop"),
        "control-flow"
    ));
}

#[test]
fn qdq_parameters_are_recognised_per_the_operator_spec() {
    // ONNX operator spec, DequantizeLinear: a 1-D scale with `axis` is per-axis; a scale of
    // the input's rank with `block_size` is blocked quantization (opset 21).
    let a = verdicts("fruit_grader_qdq_int8.onnx", "compact-array", &[]);
    let g = &a.read.model.graph;
    let conv = g.node_ids().find(|&i| g.node(i).op_type == "Conv").expect("a conv");
    let e = tilecut::quant::effective(g, conv);
    let w = e.input_quant[1].as_ref().expect("weight quantized");
    assert_eq!((w.granularity(), w.axis, w.scales), ("per-channel", Some(0), 16));
    assert_eq!(w.nonzero_zero_points(), Some((0, 16)));
    assert_eq!(e.input_quant[0].as_ref().map(|q| q.granularity()), Some("per-tensor"));
    let b = verdicts("fruit_grader_qdq_int4_blocked.onnx", "wide-array", &[]);
    let g = &b.read.model.graph;
    let conv = g.node_ids().find(|&i| g.node(i).op_type == "Conv").expect("a conv");
    let w = tilecut::quant::effective(g, conv).input_quant[1]
        .clone()
        .expect("weight quantized");
    assert_eq!(
        (w.granularity(), w.block_size, w.dtype),
        ("blocked", Some(8), tilecut::ir::DType::I4)
    );
}

fn bad_profile(text: &str, needle: &str) {
    let d = tempfile::tempdir().expect("tmp");
    let p = d.path().join("bad.toml");
    std::fs::write(&p, text).expect("write");
    let model = sample("fruit_grader_qdq_int8.onnx");
    assert_fails_cleanly(
        &[
            "analyze",
            model.to_str().expect("utf8"),
            "--target",
            p.to_str().expect("utf8"),
        ],
        needle,
    );
    assert!(common::run(&[
        "analyze",
        model.to_str().expect("utf8"),
        "--target",
        p.to_str().expect("utf8")
    ])
    .2
    .contains("bad.toml"));
}

#[test]
fn bad_profiles_are_clear_errors() {
    bad_profile(&CHECK_PROFILE.replace("columns = 5", "columns = 5\ncolour = 3"), "line");
    bad_profile(
        &CHECK_PROFILE.replace("columns = 5", "columns = \"five\""),
        "line 5, column 11",
    );
    bad_profile(&CHECK_PROFILE.replace("columns = 5", "columns = 0"), "array.columns");
    bad_profile(
        &CHECK_PROFILE.replace("{ int8 = 250 }", "{ int9 = 250 }"),
        "unknown data type `int9`",
    );
    bad_profile(&CHECK_PROFILE.replace("version = 1", "version = 7"), "version");
    bad_profile(
        &CHECK_PROFILE.replace("bandwidth_bytes_per_s = 10.0e9", "bandwidth_bytes_per_s = -1.0"),
        "host.bandwidth_bytes_per_s",
    );
    let rule = |body: &str| format!("{CHECK_PROFILE}\n[[rule]]\n{body}\n");
    bad_profile(
        &rule("id = \"a\"\nwhy = \"x\"\nops = [\"Conv\"]\ntypes = [{ act = \"int7\" }]"),
        "int7",
    );
    bad_profile(
        &rule("id = \"a\"\nwhy = \"x\"\nops = [\"Conv\"]\nopsets = [20, 10]"),
        "opsets",
    );
    bad_profile(
        &rule("id = \"a\"\nwhy = \"x\"\nops = [\"Conv\"]\nweight_granularity = \"per-tensor\"\nweight_axis = 0"),
        "contradicts",
    );
    bad_profile(
        &format!(
            "{}\n[[rule]]\nid = \"a\"\nwhy = \"y\"\nops = [\"Relu\"]",
            rule("id = \"a\"\nwhy = \"x\"\nops = [\"Conv\"]")
        ),
        "used twice",
    );
    bad_profile(&rule("id = \"a\"\nwhy = \"\"\nops = [\"Conv\"]"), "why");
    bad_profile("this is = not toml [", "bad.toml");
    assert_fails_cleanly(
        &[
            "analyze",
            sample("fruit_grader_f32.onnx").to_str().expect("utf8"),
            "--target",
            "no-such-target",
        ],
        "no such built-in target",
    );
}

#[test]
fn unknown_ops_in_rules_warn() {
    let text = format!("{CHECK_PROFILE}\n[[rule]]\nid = \"a\"\nwhy = \"x\"\nops = [\"FlyingConv\"]\n");
    let t = tilecut::target::parse(&text, "warn.toml").expect("valid with a warning");
    assert!(t.warnings.iter().any(|w| w.message.contains("FlyingConv")));
}

#[test]
fn targets_lists_and_shows_builtins() {
    let (code, out, _) = run(&["targets"]);
    assert_eq!(code, 0);
    assert!(out.contains("compact-array") && out.contains("wide-array") && out.contains("TOPS"));
    let (code, out, _) = run(&["targets", "show", "compact-array"]);
    assert_eq!(code, 0);
    assert!(out.contains("ILLUSTRATIVE") && out.contains("[[rule]]"));
    // The printed template is itself a valid profile.
    tilecut::target::parse(&out, "shown.toml").expect("template parses");
    assert_fails_cleanly(&["targets", "show", "nope"], "no built-in target `nope`");
}

#[test]
fn explain_prints_verdict_bundle_and_rules() {
    let m = sample("fruit_grader_qdq_asymmetric_u8.onnx");
    let (code, out, err) = run(&["explain", m.to_str().expect("utf8"), "conv_4"]);
    assert_eq!(code, 0, "{err}");
    assert!(out.contains("weight-asymmetric") && out.contains("conv-int") && out.contains("bundle"));
    // A tensor name explains its producer.
    let (code, out, _) = run(&["explain", m.to_str().expect("utf8"), "conv_3"]);
    assert_eq!(code, 0);
    assert!(out.contains("node       conv_4"));
    assert_fails_cleanly(
        &["explain", m.to_str().expect("utf8"), "nothing"],
        "no node or tensor named `nothing`",
    );
}

#[test]
fn quantized_samples_use_types_their_opset_allows() {
    // ONNX operator spec, QuantizeLinear/DequantizeLinear: `axis` (per-axis) since opset 13;
    // int16/uint16 and int4/uint4 types and `block_size` (blocked) since opset 21; int8/uint8
    // since opset 10. Each quantized sample must import an opset that allows what it uses.
    for (file, needs) in [
        ("fruit_grader_qdq_int8.onnx", 13),
        ("fruit_grader_qdq_per_tensor.onnx", 10),
        ("fruit_grader_qdq_asymmetric_u8.onnx", 10),
        ("fruit_grader_qdq_int4_blocked.onnx", 21),
        ("vibration_monitor_a16w8.onnx", 21),
        ("parcel_label_detector_qdq.onnx", 13),
    ] {
        let a = tilecut::read_model(&sample(file), &Default::default()).expect("reads");
        assert!(
            a.model.default_opset() >= needs,
            "{file}: opset {} < {needs}",
            a.model.default_opset()
        );
        let g = &a.model.graph;
        let uses: Vec<tilecut::ir::DType> = g
            .nodes
            .iter()
            .filter(|n| n.op_type == "DequantizeLinear")
            .filter_map(|n| n.inputs[0].and_then(|v| g.value(v).fact.dtype))
            .collect();
        assert!(!uses.is_empty(), "{file} has DequantizeLinear nodes");
        for d in uses {
            use tilecut::ir::DType::*;
            let since = match d {
                I16 | U16 | I4 | U4 => 21,
                I8 | U8 | I32 => 10,
                other => panic!("{file}: unexpected quantized type {other}"),
            };
            assert!(a.model.default_opset() >= since, "{file}: {d} needs opset {since}");
        }
    }
}

#[test]
fn weight_only_quantization_and_quantized_graph_inputs() {
    use prost::Message;
    use tilecut::ir::DType;
    use tilecut::onnx::builder::{f32_tensor, int_tensor, ModelBuilder};
    let d = tempfile::tempdir().expect("tmp");
    let weights = |m: &mut ModelBuilder| {
        m.graph.initializer(int_tensor("w_q", DType::I8, &[8, 8], &[3; 64]));
        m.graph.initializer(f32_tensor("w_s", &[], &[0.05]));
        m.graph.initializer(int_tensor("w_z", DType::I8, &[], &[0]));
        m.graph.node("DequantizeLinear", &["w_q", "w_s", "w_z"], &["w"]);
    };
    // Weight-only: float activations times dequantized int8 weights stay float on compact-array.
    let mut m = ModelBuilder::new("weight_only", 17);
    m.graph.input("x", DType::F32, &[1.into(), 8.into()]);
    weights(&mut m);
    m.graph.node("MatMul", &["x", "w"], &["y"]);
    m.graph.output("y", DType::F32, &[1.into(), 8.into()]);
    let p = d.path().join("weight_only.onnx");
    std::fs::write(&p, m.build().encode_to_vec()).expect("write");
    let a = tilecut::analyze_stages(
        &p,
        &Default::default(),
        tilecut::target::load("compact-array").expect("t"),
        &Default::default(),
    )
    .expect("ok");
    let g = &a.read.model.graph;
    let mm = g.node_ids().find(|&i| g.node(i).op_type == "MatMul").expect("matmul");
    let v = &a.verdicts[mm.index()];
    assert_eq!(v.signature, "fp32 × int8 → fp32");
    assert_eq!(v.candidate, Candidate::Cpu);
    assert!(v.reasons.iter().any(|r| r.code == "float-on-cpu"));
    // A quantized (int8) graph input and output: the MatMul bundle is int8 × int8 → int8.
    let mut m = ModelBuilder::new("int8_io", 17);
    m.graph.input("xq", DType::I8, &[1.into(), 8.into()]);
    m.graph.initializer(f32_tensor("x_s", &[], &[0.1]));
    m.graph.initializer(int_tensor("x_z", DType::I8, &[], &[0]));
    m.graph.node("DequantizeLinear", &["xq", "x_s", "x_z"], &["x"]);
    weights(&mut m);
    m.graph.node("MatMul", &["x", "w"], &["y"]);
    m.graph.node("QuantizeLinear", &["y", "x_s", "x_z"], &["yq"]);
    m.graph.output("yq", DType::I8, &[1.into(), 8.into()]);
    let p = d.path().join("int8_io.onnx");
    std::fs::write(&p, m.build().encode_to_vec()).expect("write");
    let a = tilecut::analyze_stages(
        &p,
        &Default::default(),
        tilecut::target::load("compact-array").expect("t"),
        &Default::default(),
    )
    .expect("ok");
    let g = &a.read.model.graph;
    let mm = g.node_ids().find(|&i| g.node(i).op_type == "MatMul").expect("matmul");
    let v = &a.verdicts[mm.index()];
    assert_eq!(v.signature, "int8 × int8 → int8");
    assert_eq!(v.candidate, Candidate::Accel, "{:?}", v.reasons);
    assert_eq!(
        v.bundle.len(),
        3,
        "input DQ, weight DQ and output Q fold into the bundle: {:?}",
        v.bundle
    );
}

/// A scalar initializer of ONNX type `elem` (1 float32, 2 uint8, 3 int8) holding `bytes`.
fn scalar_init(name: &str, elem: i32, bytes: Vec<u8>, dims: &[i64]) -> tilecut::onnx::TensorProto {
    tilecut::onnx::TensorProto {
        name: name.into(),
        dims: dims.to_vec(),
        data_type: elem,
        raw_data: bytes::Bytes::from(bytes),
        ..Default::default()
    }
}

/// An operator-form quantized model as runtime quantizers write it: QLinearConv (standard
/// domain) followed by the contrib domain's QLinearAdd, QLinearGlobalAveragePool, QGemm and
/// QLinearSigmoid. Shapes and slots from the ONNX spec (QLinearConv) and the contrib domain's
/// documentation (from memory): every figure below is computed by hand.
#[test]
fn operator_form_contrib_ops_are_inferred_and_judged() {
    use tilecut::ops::CONTRIB_DOMAIN;
    let d = tempfile::tempdir().expect("tmp");
    let contrib = |mut n: tilecut::onnx::NodeProto| {
        n.domain = CONTRIB_DOMAIN.into();
        n
    };
    let mut conv = node("QLinearConv", &["x", "s", "zu", "w", "s", "zi", "s", "zu"], &["c"]);
    conv.attribute
        .push(tilecut::onnx::builder::attr::ints("pads", &[1, 1, 1, 1]));
    let nodes = vec![
        conv,
        contrib(node("QLinearAdd", &["c", "s", "zu", "c", "s", "zu", "s", "zu"], &["a"])),
        contrib(node("QLinearGlobalAveragePool", &["a", "s", "zu", "s", "zu"], &["p"])),
        node("Flatten", &["p"], &["f"]),
        contrib(node("QGemm", &["f", "s", "zu", "b", "s", "zi", "", "s", "zu"], &["g"])),
        contrib(node("QLinearSigmoid", &["g", "s", "zu", "s", "zu"], &["q"])),
        node("DequantizeLinear", &["q", "s", "zu"], &["y"]),
    ];
    let inits = vec![
        scalar_init("s", 1, 0.5f32.to_le_bytes().to_vec(), &[]),
        scalar_init("zu", 2, vec![0], &[]),
        scalar_init("zi", 3, vec![0], &[]),
        scalar_init("w", 3, vec![1; 8 * 3 * 3 * 3], &[8, 3, 3, 3]),
        scalar_init("b", 3, vec![1; 8 * 4], &[8, 4]),
    ];
    let mut m = model(
        nodes,
        vec![vi("x", 2, &[Dm::N(1), Dm::N(3), Dm::N(16), Dm::N(16)])],
        vec![vi("y", 1, &[Dm::N(1), Dm::N(4)])],
        inits,
    );
    m.opset_import.push(tilecut::onnx::OperatorSetIdProto {
        domain: CONTRIB_DOMAIN.into(),
        version: 1,
    });
    let path = write(d.path(), "qoperator.onnx", &m);
    let a = tilecut::analyze_stages(
        &path,
        &Default::default(),
        tilecut::target::load("compact-array").expect("target"),
        &Default::default(),
    )
    .expect("analyzes");
    let g = &a.read.model.graph;
    let shape = |t: &str| g.value(g.value_by_name(t).expect("tensor")).fact.shape.to_string();
    // QLinearConv, 3×3 kernel, pads 1: 16×16 stays 16×16, 8 output channels.
    assert_eq!(shape("c"), "[1,8,16,16]");
    assert_eq!(shape("a"), "[1,8,16,16]");
    assert_eq!(shape("p"), "[1,8,1,1]");
    assert_eq!(shape("f"), "[1,8]");
    // QGemm [1, 8] × [8, 4].
    assert_eq!(shape("g"), "[1,4]");
    assert_eq!(shape("q"), "[1,4]");
    let macs = |op: &str| {
        g.node_ids()
            .find(|&id| g.node(id).op_type == op)
            .and_then(|id| g.cost(id).macs)
            .expect("macs")
    };
    // 1·8·16·16 outputs × 3·3·3 = 55,296; QGemm 1·4 outputs × K = 8 → 32.
    assert_eq!(macs("QLinearConv"), 55_296);
    assert_eq!(macs("QGemm"), 32);
    // uint8 activations, int8 symmetric weights, per-tensor scales: every node runs on the
    // array on compact-array, the contrib ones by its `contrib-qlinear-int` rule.
    for (i, n) in g.nodes.iter().enumerate() {
        let v = &a.verdicts[i];
        assert_eq!(v.candidate, Candidate::Accel, "{}: {:?}", n.op_type, v.reasons);
        if n.domain == CONTRIB_DOMAIN {
            assert_eq!(v.rule.as_deref(), Some("contrib-qlinear-int"), "{}", n.op_type);
        }
    }
    let qg = g.nodes.iter().position(|n| n.op_type == "QGemm").expect("QGemm");
    assert_eq!(a.verdicts[qg].signature, "uint8 × int8 → uint8");
    // An asymmetric weight zero point is caught on QGemm as on QLinearConv.
    let mut m2 = m.clone();
    let gph = m2.graph.as_mut().expect("graph");
    gph.initializer.push(scalar_init("zi7", 3, vec![7], &[]));
    for n in gph.node.iter_mut().filter(|n| n.op_type == "QGemm") {
        n.input[5] = "zi7".into();
    }
    let path2 = write(d.path(), "qoperator_asym.onnx", &m2);
    let (code, out, err) = run(&["explain", path2.to_str().expect("utf8"), "QGemm_g"]);
    assert_eq!(code, 0, "{err}");
    assert!(out.contains("weight-asymmetric"), "{out}");
    // Reports label contrib-domain ops `contrib.Op`, as profiles and `--assume-supported`
    // write them (`ops::resolve_domain`).
    assert!(out.contains("contrib.QGemm"), "{out}");
    let (code, out, err) = run(&["inspect", path.to_str().expect("utf8"), "--format", "json"]);
    assert_eq!(code, 0, "{err}");
    let j: serde_json::Value = serde_json::from_str(&out).expect("json");
    let ops: Vec<&str> = j["op_counts"]
        .as_array()
        .expect("op counts")
        .iter()
        .filter_map(|c| c["op"].as_str())
        .collect();
    assert!(ops.contains(&"contrib.QLinearAdd"), "{ops:?}");
    // The opset list keeps the file's own domain text.
    assert!(ops.iter().all(|o| !o.contains(CONTRIB_DOMAIN)), "{ops:?}");
}

/// The contrib domain's quantized ops that quantized detection, OCR and language exports
/// carry beside the ones above: QLinearConvTranspose (a quantized decoder's upsampling),
/// QLinearWhere, GatherBlockQuantized (a 4-bit embedding table) and QAttention. Slots,
/// attribute defaults and the packing of 4-bit data in `uint8` follow the contrib domain's
/// documentation (from memory); ConvTranspose's output size follows the ONNX operator
/// specification (ConvTranspose: s·(in − 1) + output_padding + ((k − 1)·d + 1) − pads).
/// Every figure below is computed by hand.
#[test]
fn contrib_quantized_ops_of_real_exports_are_inferred() {
    use tilecut::onnx::builder::attr;
    use tilecut::ops::CONTRIB_DOMAIN;
    let d = tempfile::tempdir().expect("tmp");
    let contrib = |mut n: tilecut::onnx::NodeProto| {
        n.domain = CONTRIB_DOMAIN.into();
        n
    };
    let mut ct = contrib(node(
        "QLinearConvTranspose",
        &["x", "s", "zu", "w", "s", "zi", "s", "zu"],
        &["up"],
    ));
    ct.attribute.push(attr::ints("strides", &[2, 2]));
    ct.attribute.push(attr::ints("pads", &[1, 1, 1, 1]));
    ct.attribute.push(attr::ints("output_padding", &[1, 1]));
    let mut gbq = contrib(node("GatherBlockQuantized", &["table", "ids", "tscale"], &["emb"]));
    gbq.attribute.push(attr::int("block_size", 32));
    let mut qa = contrib(node("QAttention", &["e", "qw", "qb", "s", "s"], &["att"]));
    qa.attribute.push(attr::int("num_heads", 4));
    let nodes = vec![
        ct,
        contrib(node(
            "QLinearWhere",
            &["cond", "up", "s", "zu", "row", "s", "zu", "s", "zu"],
            &["sel"],
        )),
        gbq,
        qa,
    ];
    let inits = vec![
        scalar_init("s", 1, 0.5f32.to_le_bytes().to_vec(), &[]),
        scalar_init("zu", 2, vec![0], &[]),
        scalar_init("zi", 3, vec![0], &[]),
        // ConvTranspose weights are [Cin, Cout/group, kH, kW].
        scalar_init("w", 3, vec![1; 4 * 2 * 3 * 3], &[4, 2, 3, 3]),
        scalar_init("row", 2, vec![3; 16], &[16]),
        // Ten rows of 32 4-bit values, two to a byte; one scale per 32-value block.
        scalar_init("table", 2, vec![0x11; 10 * 16], &[10, 16]),
        scalar_init("tscale", 1, [0.25f32.to_le_bytes(); 10].concat(), &[10, 1]),
        scalar_init("qw", 3, vec![1; 32 * 96], &[32, 96]),
        scalar_init("qb", 1, [0f32.to_le_bytes(); 96].concat(), &[96]),
    ];
    let mut m = model(
        nodes,
        vec![
            vi("x", 2, &[Dm::N(1), Dm::N(4), Dm::N(8), Dm::N(8)]),
            vi("cond", 9, &[Dm::N(1), Dm::N(1), Dm::N(16), Dm::N(1)]),
            vi("ids", 7, &[Dm::N(2), Dm::N(3)]),
            vi("e", 2, &[Dm::N(2), Dm::N(3), Dm::N(32)]),
        ],
        untyped(&["sel", "emb", "att"]),
        inits,
    );
    m.opset_import.push(tilecut::onnx::OperatorSetIdProto {
        domain: CONTRIB_DOMAIN.into(),
        version: 1,
    });
    let path = write(d.path(), "contrib_quantized.onnx", &m);
    let read = tilecut::read_model(&path, &Default::default()).expect("reads");
    let g = &read.model.graph;
    let fact = |t: &str| {
        let f = &g.value(g.value_by_name(t).expect("tensor")).fact;
        (f.dtype.map(|d| d.name()).unwrap_or("?"), f.shape.to_string())
    };
    // 2·(8 − 1) + 1 + ((3 − 1)·1 + 1) − 2 = 16; Cout = 2·group 1; y_zero_point's uint8.
    assert_eq!(fact("up"), ("uint8", "[1,2,16,16]".to_string()));
    // [1,1,16,1], [1,2,16,16] and [16] broadcast; z_zero_point's uint8.
    assert_eq!(fact("sel"), ("uint8", "[1,2,16,16]".to_string()));
    // Rows gathered by [2, 3] ids; 16 bytes unpack to 32 values; the scales' float.
    assert_eq!(fact("emb"), ("float32", "[2,3,32]".to_string()));
    // 96 packed QKV columns: 32 per projection; the bias's float.
    assert_eq!(fact("att"), ("float32", "[2,3,32]".to_string()));
    assert!(read.unknown.is_empty(), "{:?}", read.unknown);
    let macs = |op: &str| {
        g.node_ids()
            .find(|&id| g.node(id).op_type == op)
            .and_then(|id| g.cost(id).macs)
    };
    // Every input element scatters into Cout/group·k·k outputs: (4·8·8)·(2·3·3) = 4,608.
    assert_eq!(macs("QLinearConvTranspose"), Some(4_608));
    // Projection 2·3·32 inputs × 96 columns = 18,432, plus scores and weighted sum
    // 2·B·S·S·hidden = 2·2·3·3·32 = 1,152 (the convention of contrib Attention here).
    assert_eq!(macs("QAttention"), Some(19_584));
    // Known ops: no warning names any of them as unknown.
    let (code, out, err) = run(&["inspect", path.to_str().expect("utf8"), "--format", "json"]);
    assert_eq!(code, 0, "{err}");
    let j: serde_json::Value = serde_json::from_str(&out).expect("json");
    let warnings = j["warnings"].to_string();
    assert!(!warnings.contains("not known"), "{warnings}");
    // The weight of QLinearConvTranspose is slot 3, shown where the rule table looks.
    let (code, out, err) = run(&["explain", path.to_str().expect("utf8"), "QLinearConvTranspose_up"]);
    assert_eq!(code, 0, "{err}");
    assert!(out.contains("uint8 × int8 → uint8"), "{out}");
}

/// Contrib-domain ops of optimised and generative exports, their figures computed by hand:
/// FusedMatMul with `transA` (inner dim from A's second-to-last), GemmFastGelu, the 4-bit
/// weight products MatMulNBits and MatMulBnb4, CDist, the
/// experts of MoE and QMoE (4-bit weights, two to a byte), the attention ops with a past
/// (MultiHeadAttention, Attention, GroupQueryAttention, the one-step decoder attention), and
/// the decoding loops
/// (BeamSearch, GreedySearch) around a decoder body. Slots, attributes and output layouts
/// from the contrib domain's documentation (from memory).
#[test]
fn contrib_fused_expert_and_decoding_ops_are_sized_and_costed() {
    use tilecut::ir::DType;
    use tilecut::onnx::builder::{attr, int_tensor, raw_tensor, DimSpec, GraphBuilder, ModelBuilder};
    let n = DimSpec::Fixed;
    use tilecut::ops::CONTRIB_DOMAIN;
    let dir = tempfile::tempdir().expect("tmp");
    let mut m = ModelBuilder::new("contrib_more", 18);
    m.opsets.push((CONTRIB_DOMAIN.into(), 1));
    let zeros = |name: &str, dt: DType, dims: &[i64]| {
        let n: i64 = dims.iter().product();
        raw_tensor(name, dt, dims, vec![0; n as usize * dt.bits().div_ceil(8) as usize])
    };
    let g = &mut m.graph;
    g.input("ta", DType::F32, &[n(2), n(3), n(4)]);
    g.input("tb", DType::F32, &[n(2), n(3), n(5)]);
    g.input("tok", DType::F32, &[n(2), n(3), n(8)]);
    g.input("ca", DType::F32, &[n(3), n(4)]);
    g.input("cb", DType::F32, &[n(5), n(4)]);
    g.input("router", DType::F32, &[n(6), n(4)]);
    g.input("flat", DType::F32, &[n(6), n(16)]);
    g.input("seq_tok", DType::F32, &[n(2), n(3), n(16)]);
    g.input("ids", DType::I32, &[n(3), n(7)]);
    // MultiHeadAttention: Q, K and V packed [B, S, N, 3, H]; and apart, with a past.
    g.input("qkv", DType::F32, &[n(2), n(3), n(2), n(3), n(4)]);
    g.input("mq", DType::F32, &[n(2), n(3), n(8)]);
    g.input("mk", DType::F32, &[n(2), n(5), n(8)]);
    g.input("mv", DType::F32, &[n(2), n(5), n(12)]);
    g.input("mpk", DType::F32, &[n(2), n(2), n(4), n(4)]);
    g.input("mpv", DType::F32, &[n(2), n(2), n(4), n(6)]);
    // Attention with its projection [8, 24] and a past of four keys, [2, B, N, P, H].
    g.input("ax", DType::F32, &[n(2), n(3), n(8)]);
    g.input("apast", DType::F32, &[n(2), n(2), n(2), n(4), n(4)]);
    g.initializer(zeros("aw", DType::F32, &[8, 24]));
    g.initializer(zeros("ab", DType::F32, &[24]));
    g.initializer(zeros("gw", DType::F32, &[8, 5]));
    g.initializer(zeros("gb", DType::F32, &[5]));
    // MoE: 4 experts, hidden 16, inner 32.
    g.initializer(zeros("fc1", DType::F32, &[4, 16, 32]));
    g.initializer(zeros("fc1_b", DType::F32, &[4, 32]));
    g.initializer(zeros("fc2", DType::F32, &[4, 32, 16]));
    // QMoE: the same experts in 4 bits, two values to a byte, with per-column scales.
    g.initializer(zeros("q1", DType::U8, &[4, 16, 16]));
    g.initializer(zeros("q1_s", DType::F32, &[4, 32]));
    g.initializer(zeros("q2", DType::U8, &[4, 32, 8]));
    g.initializer(zeros("q2_s", DType::F32, &[4, 16]));
    // A [8, 5] weight in 4 bits, blocks of 16 along K: MatMulNBits' [N, blocks, 16·4/8 bytes]
    // with a scale per block; MatMulBnb4's ⌈N·K/2⌉ bytes with an absmax per 16 values.
    g.initializer(zeros("nb_b", DType::U8, &[5, 1, 8]));
    g.initializer(zeros("nb_s", DType::F32, &[5]));
    g.initializer(zeros("bnb_b", DType::U8, &[20]));
    g.initializer(zeros("bnb_abs", DType::F32, &[3]));
    g.initializer(int_tensor("max_len", DType::I32, &[1], &[20]));
    g.initializer(int_tensor("beams", DType::I32, &[1], &[4]));
    g.initializer(int_tensor("returned", DType::I32, &[1], &[2]));
    let contrib = |n: &mut tilecut::onnx::NodeProto| n.domain = CONTRIB_DOMAIN.into();
    let op = g.node("FusedMatMul", &["ta", "tb"], &["fmm"]);
    contrib(op);
    op.attribute.push(attr::int("transA", 1));
    contrib(g.node("GemmFastGelu", &["tok", "gw", "gb"], &["gfg"]));
    contrib(g.node("CDist", &["ca", "cb"], &["dist"]));
    for (op, ins, out) in [
        ("MatMulNBits", ["tok", "nb_b", "nb_s"], "nbits"),
        ("MatMulBnb4", ["tok", "bnb_b", "bnb_abs"], "bnb4"),
    ] {
        let node = g.node(op, &ins, &[out]);
        contrib(node);
        for (name, v) in [("K", 8), ("N", 5), ("block_size", 16)] {
            node.attribute.push(attr::int(name, v));
        }
    }
    let op = g.node("MoE", &["seq_tok", "router", "fc1", "fc1_b", "fc2"], &["moe"]);
    contrib(op);
    op.attribute.push(attr::int("k", 2));
    contrib(g.node("QMoE", &["flat", "router", "q1", "q1_s", "", "q2", "q2_s"], &["qmoe"]));
    let op = g.node("MultiHeadAttention", &["qkv"], &["packed_att"]);
    contrib(op);
    op.attribute.push(attr::int("num_heads", 2));
    let op = g.node(
        "MultiHeadAttention",
        &["mq", "mk", "mv", "", "", "", "mpk", "mpv"],
        &["cached_att", "present_k", "present_v"],
    );
    contrib(op);
    op.attribute.push(attr::int("num_heads", 2));
    // GroupQueryAttention, 4 query and 2 key/value heads of 8, a past of 6 and a mask over
    // the 10 positions in all, whose length gives total_sequence_length (as exports compute
    // it: Shape, Gather, Cast).
    g.input("gq", DType::F32, &[n(1), n(4), n(32)]);
    g.input("gk", DType::F32, &[n(1), n(4), n(16)]);
    g.input("gpast", DType::F32, &[n(1), n(2), n(6), n(8)]);
    g.input("gmask", DType::I64, &[n(1), n(10)]);
    g.input("gseqlens", DType::I32, &[n(1)]);
    g.initializer(int_tensor("one_idx", DType::I64, &[], &[1]));
    g.node("Shape", &["gmask"], &["gmask_shape"]);
    g.node("Gather", &["gmask_shape", "one_idx"], &["gtotal64"]);
    g.node("Cast", &["gtotal64"], &["gtotal"])
        .attribute
        .push(attr::int("to", 6));
    let op = g.node(
        "GroupQueryAttention",
        &["gq", "gk", "gk", "gpast", "gpast", "gseqlens", "gtotal"],
        &["gqa", "gqa_k", "gqa_v"],
    );
    contrib(op);
    op.attribute.push(attr::int("num_heads", 4));
    op.attribute.push(attr::int("kv_num_heads", 2));
    // One decoding step over a shared 16-slot cache, 5 of them filled.
    g.input("dq", DType::F32, &[n(2), n(1), n(8)]);
    g.input("dcache", DType::F32, &[n(2), n(2), n(16), n(4)]);
    g.initializer(int_tensor("filled", DType::I32, &[1], &[5]));
    let op = g.node(
        "DecoderMaskedMultiHeadAttention",
        &["dq", "dq", "dq", "", "", "dcache", "dcache", "filled"],
        &["dstep", "dpres_k", "dpres_v"],
    );
    contrib(op);
    op.attribute.push(attr::int("num_heads", 2));
    let op = g.node("Attention", &["ax", "aw", "ab", "", "apast"], &["att", "att_present"]);
    contrib(op);
    op.attribute.push(attr::int("num_heads", 2));
    // A decoder body (one projection of 16 to 32) the loops carry.
    let mut body = GraphBuilder::new("decoder");
    body.input("h", DType::F32, &[n(1), n(16)]);
    body.output("logits", DType::F32, &[n(1), n(32)]);
    body.initializer(zeros("dw", DType::F32, &[16, 32]));
    body.node("MatMul", &["h", "dw"], &["logits"]);
    let op = g.node(
        "BeamSearch",
        &["ids", "max_len", "", "beams", "returned"],
        &["seqs", "seq_scores"],
    );
    contrib(op);
    op.attribute.push(attr::graph("decoder", body.graph.clone()));
    let op = g.node("GreedySearch", &["ids", "max_len"], &["greedy"]);
    contrib(op);
    op.attribute.push(attr::graph("decoder", body.graph));
    for o in [
        "fmm",
        "gfg",
        "dist",
        "moe",
        "qmoe",
        "packed_att",
        "cached_att",
        "present_k",
        "present_v",
        "att",
        "att_present",
        "dstep",
        "dpres_k",
        "gqa",
        "gqa_k",
        "seqs",
        "seq_scores",
        "greedy",
    ] {
        g.graph.output.push(tilecut::onnx::ValueInfoProto {
            name: o.into(),
            ..Default::default()
        });
    }
    let path = dir.path().join("contrib_more.onnx");
    std::fs::write(&path, m.encode()).expect("write");
    let read = tilecut::read_model(&path, &Default::default()).expect("reads");
    let g = &read.model.graph;
    let fact = |t: &str| {
        let f = &g.value(g.value_by_name(t).expect("tensor")).fact;
        (f.dtype.map(|d| d.name()).unwrap_or("?"), f.shape.to_string())
    };
    let cost = |op: &str| {
        let id = g.node_ids().find(|&id| g.node(id).op_type == op).expect("node");
        (g.cost(id).macs, g.cost(id).ops)
    };
    // A [2,3,4] read transposed as [2,4,3] times [2,3,5]: [2,4,5], 40 outputs × K = 3.
    assert_eq!(fact("fmm"), ("float32", "[2,4,5]".to_string()));
    assert_eq!(cost("FusedMatMul"), (Some(120), Some(0)));
    // [2,3,8] × [8,5]: 30 outputs × 8 MACs; a bias add and a Gelu per output.
    assert_eq!(fact("gfg"), ("float32", "[2,3,5]".to_string()));
    assert_eq!(cost("GemmFastGelu"), (Some(240), Some(60)));
    // The same product with the weight packed: 30 outputs × K = 8, nothing else counted.
    for (op, out) in [("MatMulNBits", "nbits"), ("MatMulBnb4", "bnb4")] {
        assert_eq!(fact(out), ("float32", "[2,3,5]".to_string()), "{op}");
        assert_eq!(cost(op), (Some(240), Some(0)), "{op}");
    }
    // 3 × 5 distances over rows of 4; a square root each.
    assert_eq!(fact("dist"), ("float32", "[3,5]".to_string()));
    assert_eq!(cost("CDist"), (Some(60), Some(15)));
    // 2·3 = 6 tokens × k = 2 experts × (16·32 + 32·16) weights each.
    assert_eq!(fact("moe"), ("float32", "[2,3,16]".to_string()));
    assert_eq!(cost("MoE").0, Some(12_288));
    // 6 tokens × 1 expert × (16·16 + 32·8) bytes × 2 values a byte.
    assert_eq!(fact("qmoe"), ("float32", "[6,16]".to_string()));
    assert_eq!(cost("QMoE").0, Some(6_144));
    // Packed: N·H = 2·4 = 8 wide; scores and weighted sum over B·S·S·(Dq + Dv) =
    // 2·3·3·(8 + 8).
    let mha_macs = |out: &str| {
        let id = g
            .node_ids()
            .find(|&id| g.node(id).outputs[0].is_some_and(|v| g.value(v).name.as_str() == out))
            .expect("node");
        g.cost(id).macs
    };
    assert_eq!(fact("packed_att"), ("float32", "[2,3,8]".to_string()));
    assert_eq!(mha_macs("packed_att"), Some(288));
    // Four past and five new keys: T = 9; 2·3·9·(8 + 12).
    assert_eq!(fact("cached_att"), ("float32", "[2,3,12]".to_string()));
    assert_eq!(fact("present_k").1, "[2,2,9,4]");
    assert_eq!(fact("present_v").1, "[2,2,9,6]");
    assert_eq!(mha_macs("cached_att"), Some(1_080));
    // Projection 2·3·8 inputs × 24 columns = 1,152; then over 4 past and 3 new keys,
    // 2·3·7·(8 + 8) = 672.
    assert_eq!(fact("att"), ("float32", "[2,3,8]".to_string()));
    assert_eq!(fact("att_present").1, "[2,2,2,7,4]");
    assert_eq!(mha_macs("att"), Some(1_824));
    // The step's output like its query; the caches written in place; 5 past keys and the
    // new one: 2·1·6·(8 + 8).
    assert_eq!(fact("dstep").1, "[2,1,8]");
    assert_eq!(fact("dpres_k").1, "[2,2,16,4]");
    assert_eq!(mha_macs("dstep"), Some(192));
    // The caches hold all 10 positions: max(6 past, 10 in all); every query head scores and
    // sums over them: 2 × (1·4·32 outputs) × 10.
    assert_eq!(fact("gqa").1, "[1,4,32]");
    assert_eq!(fact("gqa_k").1, "[1,2,10,8]");
    assert_eq!(mha_macs("gqa"), Some(2_560));
    // Batch 3, two sequences returned each, padded to max_length 20.
    assert_eq!(fact("seqs"), ("int32", "[3,2,20]".to_string()));
    assert_eq!(fact("seq_scores").1, "[3,2]");
    assert_eq!(fact("greedy"), ("int32", "[3,20]".to_string()));
    // How many tokens the loops generate is not in the graph: their cost is unknown, not 0.
    assert_eq!(cost("BeamSearch"), (None, None));
    // Every op is known to tilecut, and the decoder bodies are read (their weights count).
    let (code, out, err) = run(&["inspect", path.to_str().expect("utf8"), "--format", "json"]);
    assert_eq!(code, 0, "{err}");
    let j: serde_json::Value = serde_json::from_str(&out).expect("json");
    assert!(!j["warnings"].to_string().contains("op-unknown"), "{}", j["warnings"]);
    assert_eq!(j["model"]["nodes_in_subgraphs"], 2);
    assert!(j["model"]["macs"].is_null());
    // With the loop settings as graph inputs, the sequences' reason names the two that size
    // them, not num_beams.
    let gr = &mut m.graph.graph;
    gr.initializer
        .retain(|t| !["max_len", "beams", "returned"].contains(&t.name.as_str()));
    for name in ["max_len", "beams", "returned"] {
        gr.input
            .push(tilecut::onnx::builder::value_info(name, DType::I32, &[n(1)]));
    }
    std::fs::write(&path, m.encode()).expect("write");
    let (code, out, err) = run(&["inspect", path.to_str().expect("utf8"), "--format", "json"]);
    assert_eq!(code, 0, "{err}");
    let j: serde_json::Value = serde_json::from_str(&out).expect("json");
    let why = j["unknown_shapes"]
        .as_array()
        .expect("unknown shapes")
        .iter()
        .find(|u| u["tensor"] == "seqs")
        .map(|u| u["reason"].to_string())
        .expect("seqs unknown");
    assert!(why.contains("`max_len`") && why.contains("`returned`"), "{why}");
    assert!(!why.contains("beams"), "{why}");
    assert_eq!(j["model"]["needs_values"], serde_json::json!(["max_len", "returned"]));
}

/// Gradient (training domain, ONNX operator specification): one output per name in `xs`, the
/// gradient of `y` with respect to it, which has that tensor's shape by definition; its inputs
/// are the values of `xs` then `zs`. The backward pass it stands for is not spelled out in
/// the node, so its cost is unknown, never zero.
#[test]
fn gradient_outputs_take_the_shapes_of_what_they_differentiate() {
    use tilecut::ir::DType;
    use tilecut::onnx::builder::{DimSpec, ModelBuilder};
    let n = DimSpec::Fixed;
    let dir = tempfile::tempdir().expect("tmp");
    let mut m = ModelBuilder::new("gradient", 17);
    m.opsets.push(("ai.onnx.preview.training".into(), 1));
    let g = &mut m.graph;
    g.input("a", DType::F32, &[n(2), n(3)]);
    g.input("b", DType::F32, &[n(3)]);
    g.node("Add", &["a", "b"], &["c"]);
    let op = g.node("Gradient", &["a", "b"], &["da", "db"]);
    op.domain = "ai.onnx.preview.training".into();
    for (name, values) in [("xs", &["a", "b"][..]), ("y", &["c"][..])] {
        let mut a = tilecut::onnx::AttributeProto {
            name: name.into(),
            r#type: if values.len() == 1 { 3 } else { 8 }, // STRING, STRINGS
            ..Default::default()
        };
        if values.len() == 1 {
            a.s = bytes::Bytes::copy_from_slice(values[0].as_bytes());
        } else {
            a.rare_mut().strings = values
                .iter()
                .map(|s| bytes::Bytes::copy_from_slice(s.as_bytes()))
                .collect();
        }
        op.attribute.push(a);
    }
    for o in ["c", "da", "db"] {
        g.graph.output.push(tilecut::onnx::ValueInfoProto {
            name: o.into(),
            ..Default::default()
        });
    }
    let path = dir.path().join("gradient.onnx");
    std::fs::write(&path, m.encode()).expect("write");
    let read = read_known(&path);
    let g = &read.model.graph;
    let shape = |t: &str| g.value(g.value_by_name(t).expect("tensor")).fact.shape.to_string();
    assert_eq!(shape("da"), "[2,3]");
    assert_eq!(shape("db"), "[3]");
    let id = g.node_ids().find(|&id| g.node(id).op_type == "Gradient").expect("node");
    assert_eq!((g.cost(id).macs, g.cost(id).ops), (None, None));
}
