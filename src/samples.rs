//! The sample models, in scenarios of our own, built from code so that regenerating them
//! reproduces the committed files byte for byte (`tilecut dev samples DIR`). Weights are
//! seeded pseudo-random numbers: the graphs, types and shapes are what matter.

use std::collections::BTreeSet;

use crate::ir::DType;
use crate::onnx::builder::{attr, f32_tensor, i64_tensor, DimSpec, GraphBuilder, ModelBuilder};
use crate::onnx::qdq::{self, ActType, QuantOptions, WeightScheme};
use crate::onnx::ModelProto;

/// splitmix64: a tiny, fixed, well-known generator, so weights never depend on a library.
pub struct Rng(u64);

impl Rng {
    pub fn new(seed: u64) -> Rng {
        Rng(seed)
    }

    pub fn next_u64(&mut self) -> u64 {
        self.0 = self.0.wrapping_add(0x9e37_79b9_7f4a_7c15);
        let mut z = self.0;
        z = (z ^ (z >> 30)).wrapping_mul(0xbf58_476d_1ce4_e5b9);
        z = (z ^ (z >> 27)).wrapping_mul(0x94d0_49bb_1331_11eb);
        z ^ (z >> 31)
    }

    /// Uniform in [-1, 1).
    pub fn unit(&mut self) -> f32 {
        ((self.next_u64() >> 40) as f32 / (1u64 << 24) as f32) * 2.0 - 1.0
    }

    pub fn weights(&mut self, n: usize, scale: f32) -> Vec<f32> {
        (0..n).map(|_| self.unit() * scale).collect()
    }
}

/// A graph under construction plus a weight generator.
pub struct Net {
    pub g: GraphBuilder,
    rng: Rng,
}

impl Net {
    pub fn new(name: &str, seed: u64) -> Net {
        Net {
            g: GraphBuilder::new(name),
            rng: Rng::new(seed),
        }
    }

    fn weight(&mut self, stem: &str, dims: &[i64]) -> String {
        let n: i64 = dims.iter().product();
        let fan_in: i64 = dims.iter().skip(1).product::<i64>().max(1);
        let name = self.g.fresh(stem);
        let w = self.rng.weights(n as usize, 1.0 / (fan_in as f32).sqrt());
        self.g.initializer(f32_tensor(&name, dims, &w));
        name
    }

    fn constant_f32(&mut self, stem: &str, dims: &[i64], v: &[f32]) -> String {
        let name = self.g.fresh(stem);
        self.g.initializer(f32_tensor(&name, dims, v));
        name
    }

    fn constant_i64(&mut self, stem: &str, v: &[i64]) -> String {
        let name = self.g.fresh(stem);
        self.g.initializer(i64_tensor(&name, &[v.len() as i64], v));
        name
    }

    fn op(&mut self, op: &str, inputs: &[&str], stem: &str) -> String {
        let out = self.g.fresh(stem);
        self.g.node(op, inputs, &[&out]);
        out
    }

    fn last_attr(&mut self, a: crate::onnx::AttributeProto) {
        if let Some(n) = self.g.graph.node.last_mut() {
            n.attribute.push(a);
        }
    }

    /// 2-D (`k` is one number) or 1-D convolution with bias; `spatial` is 1 or 2.
    #[allow(clippy::too_many_arguments)]
    pub fn conv(
        &mut self,
        x: &str,
        cin: i64,
        cout: i64,
        k: i64,
        stride: i64,
        pad: i64,
        group: i64,
        spatial: usize,
    ) -> String {
        let mut wd = vec![cout, cin / group];
        wd.extend(std::iter::repeat_n(k, spatial));
        let w = self.weight("conv_w", &wd);
        let b = self.weight("conv_b", &[cout]);
        let y = self.op("Conv", &[x, &w, &b], "conv");
        self.last_attr(attr::ints("kernel_shape", &vec![k; spatial]));
        self.last_attr(attr::ints("strides", &vec![stride; spatial]));
        self.last_attr(attr::ints("pads", &vec![pad; 2 * spatial]));
        if group != 1 {
            self.last_attr(attr::int("group", group));
        }
        y
    }

    pub fn relu(&mut self, x: &str) -> String {
        self.op("Relu", &[x], "relu")
    }

    pub fn gemm(&mut self, x: &str, i: i64, o: i64) -> String {
        let w = self.weight("fc_w", &[o, i]);
        let b = self.weight("fc_b", &[o]);
        let y = self.op("Gemm", &[x, &w, &b], "fc");
        self.last_attr(attr::int("transB", 1));
        y
    }

    pub fn linear(&mut self, x: &str, i: i64, o: i64, bias: bool) -> String {
        let w = self.weight("proj_w", &[i, o]);
        let y = self.op("MatMul", &[x, &w], "proj");
        if bias {
            let b = self.weight("proj_b", &[o]);
            return self.op("Add", &[&y, &b], "bias");
        }
        y
    }

    pub fn layer_norm(&mut self, x: &str, dim: i64) -> String {
        let gamma = self.constant_f32("ln_gamma", &[dim], &vec![1.0; dim as usize]);
        let beta = self.constant_f32("ln_beta", &[dim], &vec![0.0; dim as usize]);
        let y = self.op("LayerNormalization", &[x, &gamma, &beta], "ln");
        self.last_attr(attr::int("axis", -1));
        y
    }
}

fn finish(net: Net, opset: i64, doc: &str) -> ModelBuilder {
    let mut m = ModelBuilder::new(&net.g.graph.name.clone(), opset);
    m.graph = net.g;
    m.doc = doc.into();
    m
}

/// Sample 1: Fruit-grading line camera: a small CNN grading fruit into five classes.
pub fn fruit_grader_f32() -> ModelProto {
    let mut n = Net::new("fruit_grader", 0x5eed_0001);
    n.g.input("image", DType::F32, &[1.into(), 3.into(), 64.into(), 64.into()]);
    let c1 = n.conv("image", 3, 16, 3, 2, 1, 1, 2);
    let c1 = n.relu(&c1);
    let d1 = n.conv(&c1, 16, 16, 3, 1, 1, 16, 2);
    let d1 = n.relu(&d1);
    let p1 = n.conv(&d1, 16, 16, 1, 1, 0, 1, 2);
    let r1 = n.op("Add", &[&p1, &c1], "residual");
    let r1 = n.relu(&r1);
    let mp = n.op("MaxPool", &[&r1], "pool");
    n.last_attr(attr::ints("kernel_shape", &[2, 2]));
    n.last_attr(attr::ints("strides", &[2, 2]));
    let c2 = n.conv(&mp, 16, 32, 3, 2, 1, 1, 2);
    let c2 = n.relu(&c2);
    let gap = n.op("GlobalAveragePool", &[&c2], "gap");
    let flat = n.op("Flatten", &[&gap], "flat");
    let logits = n.gemm(&flat, 32, 5);
    n.g.node("Softmax", &[&logits], &["grade"])
        .attribute
        .push(attr::int("axis", 1));
    n.g.output("grade", DType::F32, &[1.into(), 5.into()]);
    finish(
        n,
        17,
        "Fruit-grading line camera: grades each fruit into five quality classes.",
    )
    .build()
}

pub fn fruit_grader_qdq_int8() -> Result<ModelProto, String> {
    let opts = QuantOptions {
        weights: WeightScheme::PerChannel,
        activations: ActType::I8,
        ..Default::default()
    };
    qdq::quantize(&fruit_grader_f32(), &opts)
}

/// The fruit grader under the quantizer's other weight schemes (per-tensor symmetric int8,
/// asymmetric uint8, int4 blocked along input channels), for the rule table's checks.
pub fn fruit_grader_variant(weights: WeightScheme, activations: ActType) -> Result<ModelProto, String> {
    qdq::quantize(
        &fruit_grader_f32(),
        &QuantOptions {
            weights,
            activations,
            ..Default::default()
        },
    )
}

/// Sample 2: Vibration monitor: 1-D convolutions over a 3-axis accelerometer window; int16
/// activations with int8 weights (opset 21).
pub fn vibration_monitor_f32() -> ModelProto {
    let mut n = Net::new("vibration_monitor", 0x5eed_0002);
    n.g.input("accel", DType::F32, &[1.into(), 3.into(), 1024.into()]);
    let a = n.conv("accel", 3, 16, 7, 2, 3, 1, 1);
    let a = n.relu(&a);
    let b = n.conv(&a, 16, 32, 5, 2, 2, 1, 1);
    let b = n.relu(&b);
    let c = n.conv(&b, 32, 32, 3, 1, 1, 1, 1);
    let c = n.relu(&c);
    let gap = n.op("GlobalAveragePool", &[&c], "gap");
    let flat = n.op("Flatten", &[&gap], "flat");
    let logits = n.gemm(&flat, 32, 4);
    n.g.node("Identity", &[&logits], &["condition"]);
    n.g.output("condition", DType::F32, &[1.into(), 4.into()]);
    finish(
        n,
        21,
        "Vibration monitor: classifies a machine's condition from accelerometer windows.",
    )
    .build()
}

pub fn vibration_monitor_a16w8() -> Result<ModelProto, String> {
    let opts = QuantOptions {
        weights: WeightScheme::PerChannel,
        activations: ActType::I16,
        ..Default::default()
    };
    qdq::quantize(&vibration_monitor_f32(), &opts)
}

/// Sample 3: Parcel-label detector: an int8 QDQ backbone whose head ends in NonMaxSuppression,
/// TopK and data-dependent Gathers, so it must split between accelerator and CPU.
pub fn parcel_label_detector_f32() -> ModelProto {
    let mut n = Net::new("parcel_label_detector", 0x5eed_0003);
    n.g.input("frame", DType::F32, &[1.into(), 3.into(), 96.into(), 96.into()]);
    let a = n.conv("frame", 3, 16, 3, 2, 1, 1, 2);
    let a = n.relu(&a);
    let b = n.conv(&a, 16, 32, 3, 2, 1, 1, 2);
    let b = n.relu(&b);
    let c = n.conv(&b, 32, 32, 3, 2, 1, 1, 2);
    let c = n.relu(&c);
    // Box head: [1, 4, 12, 12] → [1, 144, 4].
    let bx = n.conv(&c, 32, 4, 1, 1, 0, 1, 2);
    let shape_b = n.constant_i64("boxes_shape", &[1, 4, 144]);
    let bx = n.op("Reshape", &[&bx, &shape_b], "boxes_flat");
    n.g.node("Transpose", &[&bx], &["boxes"])
        .attribute
        .push(attr::ints("perm", &[0, 2, 1]));
    // Score head: [1, 1, 12, 12] → [1, 1, 144].
    let sc = n.conv(&c, 32, 1, 1, 1, 0, 1, 2);
    let sc = n.op("Sigmoid", &[&sc], "score_map");
    let shape_s = n.constant_i64("scores_shape", &[1, 1, 144]);
    n.g.node("Reshape", &[&sc, &shape_s], &["scores"]);
    // Post-processing on the CPU: suppression and selection with data-dependent sizes.
    let max_out = n.constant_i64("max_boxes", &[16]);
    let iou = n.constant_f32("iou_threshold", &[1], &[0.5]);
    let thr = n.constant_f32("score_threshold", &[1], &[0.3]);
    n.g.node(
        "NonMaxSuppression",
        &["boxes", "scores", &max_out, &iou, &thr],
        &["selected"],
    );
    let col = n.constant_i64("box_column", &[2]);
    let idx = n.op("Gather", &["selected", &col], "selected_col");
    n.last_attr(attr::int("axis", 1));
    let axes1 = n.constant_i64("axes1", &[1]);
    let idx = n.op("Squeeze", &[&idx, &axes1], "box_index");
    let axes0 = n.constant_i64("axes0", &[0]);
    let all_boxes = n.op("Squeeze", &["boxes", &axes0], "all_boxes");
    n.g.node("Gather", &[&all_boxes, &idx], &["label_boxes"])
        .attribute
        .push(attr::int("axis", 0));
    let flat_shape = n.constant_i64("flat_scores_shape", &[144]);
    let flat = n.op("Reshape", &["scores", &flat_shape], "flat_scores");
    let k = n.constant_i64("top_k", &[8]);
    n.g.node("TopK", &[&flat, &k], &["top_scores", "top_index"]);
    n.g.output("label_boxes", DType::F32, &[DimSpec::Named("labels".into()), 4.into()]);
    n.g.output("top_scores", DType::F32, &[8.into()]);
    finish(
        n,
        17,
        "Parcel-label detector: finds address labels on parcels on a conveyor.",
    )
    .build()
}

pub fn parcel_label_detector_qdq() -> Result<ModelProto, String> {
    let float_ops: BTreeSet<String> = ["NonMaxSuppression", "Gather", "Squeeze", "TopK", "Reshape", "Transpose"]
        .iter()
        .map(|s| s.to_string())
        .collect();
    let opts = QuantOptions {
        weights: WeightScheme::PerChannel,
        activations: ActType::I8,
        float_ops,
        ..Default::default()
    };
    qdq::quantize(&parcel_label_detector_f32(), &opts)
}

/// Sample 4: Command-word encoder: a one-block transformer over audio features with a symbolic batch
/// and frame count, float32 (opset 20 for Gelu).
pub fn command_word_encoder() -> ModelProto {
    let mut n = Net::new("command_word_encoder", 0x5eed_0004);
    n.g.input("features", DType::F32, &["batch".into(), "frames".into(), 40.into()]);
    let h = n.linear("features", 40, 64, true);
    let ln1 = n.layer_norm(&h, 64);
    let q = n.linear(&ln1, 64, 64, false);
    let k = n.linear(&ln1, 64, 64, false);
    let v = n.linear(&ln1, 64, 64, false);
    let kt = n.op("Transpose", &[&k], "keys_t");
    n.last_attr(attr::ints("perm", &[0, 2, 1]));
    let s = n.op("MatMul", &[&q, &kt], "scores");
    let scale = n.constant_f32("attn_scale", &[], &[0.125]);
    let s = n.op("Mul", &[&s, &scale], "scaled");
    let a = n.op("Softmax", &[&s], "attn");
    n.last_attr(attr::int("axis", -1));
    let o = n.op("MatMul", &[&a, &v], "context");
    let o = n.linear(&o, 64, 64, false);
    let h2 = n.op("Add", &[&h, &o], "residual1");
    let ln2 = n.layer_norm(&h2, 64);
    let f = n.linear(&ln2, 64, 128, true);
    let f = n.op("Gelu", &[&f], "gelu");
    let f = n.linear(&f, 128, 64, true);
    let h3 = n.op("Add", &[&h2, &f], "residual2");
    let axes = n.constant_i64("pool_axes", &[1]);
    let pooled = n.op("ReduceMean", &[&h3, &axes], "pooled");
    n.last_attr(attr::int("keepdims", 0));
    let w = n.weight("cls_w", &[64, 12]);
    let b = n.weight("cls_b", &[12]);
    n.g.node("Gemm", &[&pooled, &w, &b], &["command_logits"]);
    n.g.output("command_logits", DType::F32, &["batch".into(), 12.into()]);
    finish(
        n,
        20,
        "Command-word encoder: recognises twelve spoken command words on a handheld scanner.",
    )
    .build()
}

/// Sample 5a: Night-mode switch: an If picks one of two convolution branches; the branches read
/// weights from the outer graph.
pub fn night_mode_switch() -> ModelProto {
    let mut n = Net::new("night_mode_switch", 0x5eed_0005);
    n.g.input("frame", DType::F32, &[1.into(), 3.into(), 32.into(), 32.into()]);
    n.g.input("is_night", DType::Bool, &[]);
    let w = n.weight("branch_w", &[8, 3, 3, 3]);
    let gain = n.constant_f32("night_gain", &[], &[2.0]);
    let branch = |name: &str, boosted: bool| {
        let mut b = GraphBuilder::new(name);
        let mut x = "frame".to_string();
        if boosted {
            b.node("Mul", &["frame", &gain], &[&format!("{name}_boosted")]);
            x = format!("{name}_boosted");
        }
        let conv = b.node("Conv", &[&x, &w], &[&format!("{name}_conv")]);
        conv.attribute.push(attr::ints("pads", &[1, 1, 1, 1]));
        b.node("Relu", &[&format!("{name}_conv")], &[&format!("{name}_out")]);
        b.output(
            &format!("{name}_out"),
            DType::F32,
            &[1.into(), 8.into(), 32.into(), 32.into()],
        );
        b.graph
    };
    let then_g = branch("night", true);
    let else_g = branch("day", false);
    let node = n.g.node("If", &["is_night"], &["features"]);
    node.attribute.push(attr::graph("then_branch", then_g));
    node.attribute.push(attr::graph("else_branch", else_g));
    let gap = n.op("GlobalAveragePool", &["features"], "gap");
    let flat = n.op("Flatten", &[&gap], "flat");
    let logits = n.gemm(&flat, 8, 2);
    n.g.node("Identity", &[&logits], &["presence"]);
    n.g.output("presence", DType::F32, &[1.into(), 2.into()]);
    finish(
        n,
        17,
        "Night-mode switch: a doorway presence sensor with a low-light branch.",
    )
    .build()
}

/// Sample 5b: Running average: a Loop with a constant trip count smooths a feature window.
pub fn running_average_loop() -> ModelProto {
    let mut n = Net::new("running_average_loop", 0x5eed_0006);
    // Rank-1 state: Loop scan outputs of rank 1 stack to [trips, 16] in every reading of the
    // spec (implementations differ on whether higher ranks stack or concatenate).
    n.g.input("window", DType::F32, &[16.into()]);
    let w = n.weight("mix_w", &[16, 16]);
    let half = n.constant_f32("half", &[], &[0.5]);
    let trips = n.g.fresh("trips");
    n.g.initializer(i64_tensor(&trips, &[], &[4]));
    let cond = n.g.fresh("keep_going");
    n.g.initializer(crate::onnx::builder::int_tensor(&cond, DType::Bool, &[], &[1]));
    let mut body = GraphBuilder::new("smooth_step");
    body.input("iteration", DType::I64, &[]);
    body.input("cond_in", DType::Bool, &[]);
    body.input("state", DType::F32, &[16.into()]);
    body.node("Identity", &["cond_in"], &["cond_out"]);
    body.node("MatMul", &["window", &w], &["mixed"]);
    body.node("Add", &["state", "mixed"], &["summed"]);
    body.node("Mul", &["summed", &half], &["next_state"]);
    body.node("Identity", &["next_state"], &["step_record"]);
    body.output("cond_out", DType::Bool, &[]);
    body.output("next_state", DType::F32, &[16.into()]);
    body.output("step_record", DType::F32, &[16.into()]);
    let node = n.g.node("Loop", &[&trips, &cond, "window"], &["smoothed", "history"]);
    node.attribute.push(attr::graph("body", body.graph));
    n.g.output("smoothed", DType::F32, &[16.into()]);
    n.g.output("history", DType::F32, &[4.into(), 16.into()]);
    finish(
        n,
        17,
        "Running average: smooths a temperature-probe feature window over four steps.",
    )
    .build()
}

/// Every sample, by file name.
pub fn all() -> Result<Vec<(&'static str, ModelProto)>, String> {
    Ok(vec![
        ("fruit_grader_f32.onnx", fruit_grader_f32()),
        ("fruit_grader_qdq_int8.onnx", fruit_grader_qdq_int8()?),
        (
            "fruit_grader_qdq_per_tensor.onnx",
            fruit_grader_variant(WeightScheme::PerTensor, ActType::I8)?,
        ),
        (
            "fruit_grader_qdq_asymmetric_u8.onnx",
            fruit_grader_variant(WeightScheme::Asymmetric, ActType::U8)?,
        ),
        (
            "fruit_grader_qdq_int4_blocked.onnx",
            fruit_grader_variant(WeightScheme::Int4Blocked { block: 8 }, ActType::I8)?,
        ),
        ("vibration_monitor_a16w8.onnx", vibration_monitor_a16w8()?),
        ("parcel_label_detector_qdq.onnx", parcel_label_detector_qdq()?),
        ("command_word_encoder_f32.onnx", command_word_encoder()),
        ("night_mode_switch_if.onnx", night_mode_switch()),
        ("running_average_loop.onnx", running_average_loop()),
    ])
}
