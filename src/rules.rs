//! Judging nodes against a target's rule table: every node gets a placement candidate
//! (accelerator-capable, CPU-only, or a folded constant), its quantized bundle, and the
//! complete list of reasons, each with a stable code and the rule that decided it.

use serde::Serialize;

use crate::ir::{AttrValue, DType, Dim, Graph, Node, NodeId, ValueKind};
use crate::quant::{self, Effective, QuantParams};
use crate::target::schema::{MovementSpec, RuleSpec};
use crate::target::{type_name, type_of, Target};

/// Where a node may run.
#[derive(Clone, Copy, Debug, PartialEq, Eq, PartialOrd, Ord, Serialize)]
#[serde(rename_all = "lowercase")]
pub enum Candidate {
    /// The array can run it.
    Accel,
    /// Only the CPU can.
    Cpu,
    /// Folded into weights: runs nowhere per inference.
    Const,
}

/// Reason codes, all in one place so they stay unique and stable.
pub mod reason {
    pub const NO_RULE: &str = "no-rule";
    pub const OPSET: &str = "opset-range";
    pub const TYPES: &str = "types-unsupported";
    pub const FLOAT_ON_CPU: &str = "float-on-cpu";
    pub const FLOAT_AS_BF16: &str = "float-as-bf16";
    pub const WEIGHT_GRANULARITY: &str = "weight-granularity";
    pub const WEIGHT_AXIS: &str = "weight-axis";
    pub const WEIGHT_ASYMMETRIC: &str = "weight-asymmetric";
    pub const WEIGHT_BLOCKED: &str = "weight-blocked";
    pub const ACT_PER_AXIS: &str = "activation-per-axis";
    pub const SCALE_POW2: &str = "scale-not-pow2";
    pub const DYNAMIC_QUANT: &str = "quant-dynamic";
    pub const KERNEL: &str = "kernel-too-large";
    pub const STRIDE: &str = "stride-too-large";
    pub const DILATION: &str = "dilation-too-large";
    pub const GROUP: &str = "group-form";
    pub const ATTR: &str = "attr-value";
    pub const DYNAMIC_SHAPE: &str = "shape-dynamic";
    pub const RANK: &str = "rank-too-high";
    pub const DIM: &str = "dim-too-large";
    pub const CHANNEL_PAD: &str = "channel-padding";
    pub const CONTROL_FLOW: &str = "control-flow";
    pub const UNKNOWN_TYPES: &str = "types-unknown";
    pub const MOVEMENT: &str = "moved-by-dma";
    pub const ACCEPTED: &str = "accepted";
    pub const ASSUMED_QUANTIZED: &str = "assumed-quantized";

    /// Codes a what-if may waive: quantization schemes, attribute and shape limits, types.
    /// `no-rule` is lifted by assuming the op supported, `shape-dynamic` by fixing the dim,
    /// `float-on-cpu` by assuming quantization; control flow and unknown types cannot be.
    pub const WAIVABLE: &[&str] = &[
        OPSET,
        TYPES,
        WEIGHT_GRANULARITY,
        WEIGHT_AXIS,
        WEIGHT_ASYMMETRIC,
        WEIGHT_BLOCKED,
        ACT_PER_AXIS,
        SCALE_POW2,
        DYNAMIC_QUANT,
        KERNEL,
        STRIDE,
        DILATION,
        GROUP,
        ATTR,
        RANK,
        DIM,
    ];
}

/// What-if assumptions the judge honours (op support is assumed through the target instead:
/// `Target::with_assumed_ops`).
#[derive(Clone, Debug, Default, PartialEq, Eq)]
pub struct Assumptions {
    /// Float compute ops are judged as if quantized to the first integer signature of the
    /// target's rule for them.
    pub quantized: bool,
    /// Reason codes (from `reason::WAIVABLE`) that no longer block.
    pub waived: std::collections::BTreeSet<&'static str>,
}

impl Assumptions {
    pub fn is_empty(&self) -> bool {
        !self.quantized && self.waived.is_empty()
    }
}

/// The types a node is assumed to run on under `--assume-quantized`.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub struct QuantizedAs {
    pub act: DType,
    pub weight: Option<DType>,
    pub out: DType,
}

/// One reason: what was found, what to change, and which profile entry decided it.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct Reason {
    pub code: &'static str,
    pub message: String,
    pub rule: Option<String>,
    /// False for notes that do not keep the node off the array.
    pub blocking: bool,
}

#[derive(Clone, Debug, Serialize)]
pub struct Verdict {
    pub candidate: Candidate,
    /// The rule that accepted the node, or that came closest to it.
    pub rule: Option<String>,
    pub reasons: Vec<Reason>,
    /// Effective type signature, e.g. "int8 × int8 → int8".
    pub signature: String,
    /// Names of the Q/DQ nodes folded into this node's bundle.
    pub bundle: Vec<String>,
    /// Set when the verdict assumes the node quantized (`--assume-quantized`).
    #[serde(skip)]
    pub quantized_as: Option<QuantizedAs>,
    /// The effective type whose compute rate applies (first input's, else first output's):
    /// kept so that costing need not fold the Q/DQ bundle again.
    #[serde(skip)]
    pub rate_type: Option<DType>,
}

fn block(code: &'static str, rule: &str, message: String) -> Reason {
    Reason {
        code,
        message,
        rule: Some(rule.to_string()),
        blocking: true,
    }
}

fn note(code: &'static str, rule: &str, message: String) -> Reason {
    Reason {
        code,
        message,
        rule: Some(rule.to_string()),
        blocking: false,
    }
}

/// Ops whose slot 1 is a weight.
fn has_weight(op: &str) -> bool {
    matches!(
        op,
        "Conv"
            | "ConvTranspose"
            | "Gemm"
            | "MatMul"
            | "QLinearConv"
            | "QLinearMatMul"
            | "ConvInteger"
            | "MatMulInteger"
            | "QGemm"
            | "QLinearConvTranspose"
            | "FusedConv"
            | "FusedGemm"
            | "NhwcConv"
            | "DeformConv"
    )
}

fn tname(d: Option<DType>) -> String {
    d.map(type_name).unwrap_or("?").to_string()
}

fn signature(node: &Node, e: &Effective) -> String {
    let act = tname(e.inputs.first().copied().flatten());
    let out = tname(e.outputs.first().copied().flatten());
    if has_weight(&node.op_type) {
        format!("{act} × {} → {out}", tname(e.inputs.get(1).copied().flatten()))
    } else {
        format!("{act} → {out}")
    }
}

/// Judges every node of the main graph.
pub fn judge(g: &Graph, opsets: &std::collections::BTreeMap<String, i64>, target: &Target) -> Vec<Verdict> {
    judge_with(g, opsets, target, &Assumptions::default())
}

/// Judges every node under what-if assumptions.
pub fn judge_with(
    g: &Graph,
    opsets: &std::collections::BTreeMap<String, i64>,
    target: &Target,
    assume: &Assumptions,
) -> Vec<Verdict> {
    g.node_ids()
        .map(|id| judge_node(g, id, opsets, target, assume))
        .collect()
}

/// Turns blocking reasons whose code is waived into notes that say so.
fn waive(reasons: &mut [Reason], assume: &Assumptions) {
    for r in reasons.iter_mut() {
        if r.blocking && assume.waived.contains(r.code) {
            r.blocking = false;
            r.message = format!("{} (waived by the what-if: --assume-waived {})", r.message, r.code);
        }
    }
}

pub fn judge_node(
    g: &Graph,
    id: NodeId,
    opsets: &std::collections::BTreeMap<String, i64>,
    target: &Target,
    assume: &Assumptions,
) -> Verdict {
    let node = g.node(id);
    let e = quant::effective(g, id);
    let sig = signature(node, &e);
    let rate_type = e
        .inputs
        .first()
        .copied()
        .flatten()
        .or_else(|| e.outputs.first().copied().flatten());
    let bundle: Vec<String> = e.bundle.iter().map(|b| g.node(*b).name.to_string()).collect();
    if node.folded {
        return Verdict {
            candidate: Candidate::Const,
            rule: None,
            reasons: Vec::new(),
            signature: sig,
            bundle,
            quantized_as: None,
            rate_type,
        };
    }
    let cpu = |reasons: Vec<Reason>, rule: Option<String>| Verdict {
        candidate: Candidate::Cpu,
        rule,
        reasons,
        signature: sig.clone(),
        bundle: bundle.clone(),
        quantized_as: None,
        rate_type,
    };
    if !node.bodies().is_empty() {
        return cpu(
            vec![Reason {
                code: reason::CONTROL_FLOW,
                message: format!(
                    "{} carries subgraphs; the array runs static dataflow, so it stays on the CPU",
                    node.op_type
                ),
                rule: None,
                blocking: true,
            }],
            None,
        );
    }
    let opset = crate::ir::opset_of(opsets, &node.domain);
    if let Some(m) = target
        .file
        .movement
        .iter()
        .find(|m| m.ops.iter().any(|o| o == &node.op_type) && node.is_default_domain())
    {
        let mut reasons = check_movement(g, node, m);
        waive(&mut reasons, assume);
        let ok = reasons.iter().all(|r| !r.blocking);
        let mut v = cpu(reasons, Some(m.id.clone()));
        if ok {
            v.candidate = Candidate::Accel;
        }
        return v;
    }
    let rules: Vec<&RuleSpec> = target
        .file
        .rules
        .iter()
        .filter(|r| crate::ops::node_in_domain(node, &r.domain) && r.ops.iter().any(|o| o == &node.op_type))
        .collect();
    if rules.is_empty() {
        let q = node.op_label();
        return cpu(
            vec![Reason {
                code: reason::NO_RULE,
                message: format!("target `{}` has no rule for {q}; it runs on the CPU", target.name()),
                rule: None,
                blocking: true,
            }],
            None,
        );
    }
    let mut best: Option<(usize, &RuleSpec, Vec<Reason>)> = None;
    for r in rules {
        let (mut reasons, quantized_as) = check_rule(g, node, &e, r, opset, target, assume);
        waive(&mut reasons, assume);
        let blocking = reasons.iter().filter(|x| x.blocking).count();
        if blocking == 0 {
            let mut reasons = reasons;
            if reasons.is_empty() {
                reasons.push(note(
                    reason::ACCEPTED,
                    &r.id,
                    format!("{sig} accepted by rule `{}`", r.id),
                ));
            }
            return Verdict {
                candidate: Candidate::Accel,
                rule: Some(r.id.clone()),
                reasons,
                signature: sig.clone(),
                bundle: bundle.clone(),
                quantized_as,
                rate_type,
            };
        }
        if best.as_ref().is_none_or(|(b, _, _)| blocking < *b) {
            best = Some((blocking, r, reasons));
        }
    }
    let (_, r, reasons) = best.expect("at least one rule was evaluated");
    cpu(reasons, Some(r.id.clone()))
}

fn check_movement(g: &Graph, node: &Node, m: &MovementSpec) -> Vec<Reason> {
    let mut out = static_shape_reasons(g, node, &m.id);
    if let Some(max) = m.max_rank {
        for v in node.inputs.iter().flatten().chain(node.outputs.iter().flatten()) {
            if g.value(*v).fact.shape.rank().is_some_and(|r| r > max) {
                out.push(block(
                    reason::RANK,
                    &m.id,
                    format!("rank above {max}: the DMA addresses at most {max} dimensions"),
                ));
                break;
            }
        }
    }
    if out.iter().all(|r| !r.blocking) {
        out.push(note(
            reason::MOVEMENT,
            &m.id,
            format!(
                "pure data movement ({}), done by {}",
                node.op_type,
                if m.how == "dma" {
                    "the buffer tile's DMA"
                } else {
                    "a compute tile"
                }
            ),
        ));
    }
    out
}

fn static_shape_reasons(g: &Graph, node: &Node, rule: &str) -> Vec<Reason> {
    let mut syms: Vec<String> = Vec::new();
    let mut unknown = false;
    for v in node.inputs.iter().flatten().chain(node.outputs.iter().flatten()) {
        let val = g.value(*v);
        if matches!(val.kind, ValueKind::Initializer | ValueKind::Constant) {
            continue;
        }
        match val.fact.shape.dims() {
            None => unknown = true,
            Some(d) => {
                for x in d {
                    match x {
                        Dim::Known(_) => {}
                        Dim::Sym(_) => syms.extend(x.symbols()),
                        Dim::Unknown => unknown = true,
                    }
                }
            }
        }
    }
    syms.sort();
    syms.dedup();
    let mut out = Vec::new();
    if !syms.is_empty() {
        // A Loop's trip count (`trips@node`) is fixed with `--loop-trips`, not assumed with
        // `--dim`: it takes the symbolic branch below, whose hints say so.
        let data_dependent: Vec<&String> = syms.iter().filter(|s| crate::ir::is_data_dependent(s)).collect();
        let msg = if !data_dependent.is_empty() {
            format!(
                "shape depends on data at run time ({}); the array needs static shapes (to judge it padded to a fixed count: {})",
                data_dependent.iter().map(|s| s.as_str()).collect::<Vec<_>>().join(", "),
                data_dependent
                    .iter()
                    .map(|s| format!("--dim {s}=N"))
                    .collect::<Vec<_>>()
                    .join(" ")
            )
        } else {
            format!(
                "symbolic dims {}; fix them with {}",
                syms.join(", "),
                syms.iter()
                    .map(|s| crate::text::fix_hint(s))
                    .collect::<Vec<_>>()
                    .join(" ")
            )
        };
        out.push(block(reason::DYNAMIC_SHAPE, rule, msg));
    } else if unknown {
        out.push(block(
            reason::DYNAMIC_SHAPE,
            rule,
            "a tensor's shape is unknown; the array needs static shapes (fix input shapes with --input)".into(),
        ));
    }
    out
}

fn attr_ints(node: &Node, name: &str) -> Option<Vec<i64>> {
    match node.attr(name) {
        Some(AttrValue::Ints(v)) => Some(v.clone()),
        _ => None,
    }
}

/// The first integer type signature of a rule, for `--assume-quantized`.
fn first_integer_signature(r: &RuleSpec, weighted: bool) -> Option<QuantizedAs> {
    r.types.iter().find_map(|t| {
        let act = type_of(&t.act)?;
        let out = t.out.as_deref().map_or(Some(act), type_of)?;
        let weight = match (&t.weight, weighted) {
            (Some(w), true) => Some(type_of(w)?),
            _ => None,
        };
        let integer = |d: DType| !d.is_float();
        (integer(act) && integer(out) && weight.is_none_or(integer)).then_some(QuantizedAs { act, weight, out })
    })
}

fn check_rule(
    g: &Graph,
    node: &Node,
    e: &Effective,
    r: &RuleSpec,
    opset: i64,
    target: &Target,
    assume: &Assumptions,
) -> (Vec<Reason>, Option<QuantizedAs>) {
    let mut out = Vec::new();
    let mut quantized_as = None;
    if let Some([lo, hi]) = r.opsets {
        if opset < lo || opset > hi {
            out.push(block(
                reason::OPSET,
                &r.id,
                format!("opset {opset} is outside the rule's range {lo}–{hi}"),
            ));
        }
    }
    if r.static_shapes {
        out.extend(static_shape_reasons(g, node, &r.id));
    }
    // Shape limits.
    for v in node.inputs.iter().flatten().chain(node.outputs.iter().flatten()) {
        let f = &g.value(*v).fact;
        if let (Some(max), Some(rank)) = (r.max_rank, f.shape.rank()) {
            if rank > max {
                out.push(block(
                    reason::RANK,
                    &r.id,
                    format!(
                        "tensor `{}` has rank {rank}; the target handles at most {max}",
                        g.value(*v).name
                    ),
                ));
                break;
            }
        }
        if let (Some(max), Some(d)) = (r.max_dim, f.shape.concrete()) {
            if let Some(&big) = d.iter().find(|&&x| x > max) {
                out.push(block(
                    reason::DIM,
                    &r.id,
                    format!(
                        "tensor `{}` has a dim of {big}; the target handles at most {max}",
                        g.value(*v).name
                    ),
                ));
                break;
            }
        }
    }
    // Types.
    let act = e.inputs.first().copied().flatten();
    let weight = if has_weight(&node.op_type) {
        e.inputs.get(1).copied().flatten()
    } else {
        None
    };
    let outp = e.outputs.first().copied().flatten();
    let as_bf16 = |d: Option<DType>| match d {
        Some(DType::F32) | Some(DType::F16) if target.floats_as_bf16() => Some(DType::BF16),
        other => other,
    };
    let is_float = act.is_some_and(DType::is_float) && outp.is_some_and(DType::is_float);
    let assumed = if is_float && assume.quantized {
        first_integer_signature(r, has_weight(&node.op_type))
    } else {
        None
    };
    let (ma, mw, mo) = if let Some(q) = assumed {
        quantized_as = Some(q);
        out.push(note(
            reason::ASSUMED_QUANTIZED,
            &r.id,
            format!(
                "judged as if quantized to {} (what-if: --assume-quantized)",
                match q.weight {
                    Some(w) => format!("{} × {} → {}", type_name(q.act), type_name(w), type_name(q.out)),
                    None => format!("{} → {}", type_name(q.act), type_name(q.out)),
                }
            ),
        ));
        (Some(q.act), q.weight, Some(q.out))
    } else if is_float {
        (as_bf16(act), as_bf16(weight), as_bf16(outp))
    } else {
        (act, weight, outp)
    };
    if !r.types.is_empty() {
        if act.is_none() || outp.is_none() {
            out.push(block(
                reason::UNKNOWN_TYPES,
                &r.id,
                "element types unknown (shape inference could not type this node)".into(),
            ));
        } else {
            let matches = r.types.iter().any(|t| {
                type_of(&t.act) == ma
                    && t.out.as_ref().is_none_or(|o| type_of(o) == mo)
                    && (!has_weight(&node.op_type) || t.weight.as_ref().is_none_or(|w| type_of(w) == mw))
            });
            if !matches {
                let allowed: Vec<String> = r
                    .types
                    .iter()
                    .map(|t| match (&t.weight, &t.out) {
                        (Some(w), Some(o)) if has_weight(&node.op_type) => format!("{} × {w} → {o}", t.act),
                        (_, Some(o)) => format!("{} → {o}", t.act),
                        _ => t.act.clone(),
                    })
                    .collect();
                let sig = signature(node, e);
                if is_float && !target.floats_as_bf16() && assumed.is_none() {
                    out.push(block(
                        reason::FLOAT_ON_CPU,
                        &r.id,
                        format!(
                            "{sig} is float; target `{}` keeps float ops on the CPU: quantize it (QDQ, e.g. {})",
                            target.name(),
                            allowed.first().cloned().unwrap_or_default()
                        ),
                    ));
                } else {
                    out.push(block(
                        reason::TYPES,
                        &r.id,
                        format!("{sig} is not among the rule's signatures ({})", allowed.join(", ")),
                    ));
                }
            } else if is_float && assumed.is_none() && target.floats_as_bf16() && act != Some(DType::BF16) {
                out.push(note(
                    reason::FLOAT_AS_BF16,
                    &r.id,
                    format!("runs as bf16 after converting from {}", tname(act)),
                ));
            }
        }
    }
    // Quantization scheme.
    let wq: Option<&QuantParams> = e
        .input_quant
        .get(1)
        .and_then(|q| q.as_ref())
        .filter(|_| has_weight(&node.op_type));
    if let Some(q) = wq {
        if q.block_size.is_some() && !r.blocked_weights {
            out.push(block(
                reason::WEIGHT_BLOCKED,
                &r.id,
                format!(
                    "weights are blocked-quantized (block size {}); this target needs per-tensor or per-channel scales",
                    q.block_size.unwrap_or(0)
                ),
            ));
        }
        match r.weight_granularity.as_deref() {
            Some("per-channel") if q.axis.is_none() => out.push(block(
                reason::WEIGHT_GRANULARITY,
                &r.id,
                "weights are quantized per tensor; this target needs per-channel weight scales".into(),
            )),
            Some("per-tensor") if q.axis.is_some() && q.block_size.is_none() => out.push(block(
                reason::WEIGHT_GRANULARITY,
                &r.id,
                format!(
                    "weights are quantized per channel ({} scales); this target needs one scale per tensor",
                    q.scales
                ),
            )),
            _ => {}
        }
        if let (Some(want), Some(have), None) = (r.weight_axis, q.axis, q.block_size) {
            if want != have {
                out.push(block(
                    reason::WEIGHT_AXIS,
                    &r.id,
                    format!("weight scales run along axis {have}; this target needs axis {want}"),
                ));
            }
        }
        if r.symmetric_weights {
            if let Some((bad, total)) = q.nonzero_zero_points() {
                if bad > 0 {
                    out.push(block(
                        reason::WEIGHT_ASYMMETRIC,
                        &r.id,
                        format!("weight zero point is non-zero on {bad} of {total} channel(s); this target needs symmetric weights"),
                    ));
                }
            }
        }
    }
    let mut quants: Vec<&QuantParams> = e.input_quant.iter().flatten().collect();
    quants.extend(e.output_quant.iter().flatten());
    if quants.iter().any(|q| q.dynamic) {
        out.push(block(reason::DYNAMIC_QUANT, &r.id, "activation scales are computed at run time (DynamicQuantizeLinear); the array needs static scales: quantize statically (QDQ)".into()));
    }
    if r.per_tensor_activations {
        let act_q = e.input_quant.first().and_then(|q| q.as_ref());
        let out_q = e.output_quant.first().and_then(|q| q.as_ref());
        if act_q.into_iter().chain(out_q).any(|q| q.axis.is_some()) {
            out.push(block(
                reason::ACT_PER_AXIS,
                &r.id,
                "activations are quantized per axis; this target needs per-tensor activation scales".into(),
            ));
        }
    }
    if r.pow2_scales {
        let (bad, total) = quants
            .iter()
            .filter_map(|q| q.non_pow2_scales())
            .fold((0, 0), |a, b| (a.0 + b.0, a.1 + b.1));
        if bad > 0 {
            out.push(block(
                reason::SCALE_POW2,
                &r.id,
                format!("{bad} of {total} scale(s) are not powers of two; this target needs power-of-two scales"),
            ));
        }
    }
    // Attributes.
    let spatial_kernel: Option<Vec<i64>> = attr_ints(node, "kernel_shape").or_else(|| {
        // Only convs have a spatial kernel (filter below), so QLinearMatMul and QGemm,
        // whose weight is slot 3 too, never reach the check.
        let slot = if crate::ops::weight_in_slot_3(&node.op_type) {
            3
        } else {
            1
        };
        node.inputs
            .get(slot)
            .copied()
            .flatten()
            .and_then(|w| g.value(w).fact.shape.concrete())
            .filter(|_| node.op_type.contains("Conv"))
            .map(|d| d.iter().skip(2).map(|&x| x as i64).collect())
    });
    if let (Some(max), Some(k)) = (r.kernel_max, &spatial_kernel) {
        if let Some(&big) = k.iter().find(|&&x| x > max as i64) {
            out.push(block(
                reason::KERNEL,
                &r.id,
                format!("kernel size {big} exceeds the target's {max}; split it into smaller kernels"),
            ));
        }
    }
    if let (Some(max), Some(s)) = (r.stride_max, attr_ints(node, "strides")) {
        if let Some(&big) = s.iter().find(|&&x| x > max as i64) {
            out.push(block(
                reason::STRIDE,
                &r.id,
                format!("stride {big} exceeds the target's {max}"),
            ));
        }
    }
    if let (Some(max), Some(d)) = (r.dilation_max, attr_ints(node, "dilations")) {
        if let Some(&big) = d.iter().find(|&&x| x > max as i64) {
            out.push(block(
                reason::DILATION,
                &r.id,
                format!("dilation {big} exceeds the target's {max}"),
            ));
        }
    }
    if let Some(forms) = &r.groups {
        let group = match node.attr("group") {
            Some(AttrValue::Int(g)) => *g,
            _ => 1,
        };
        let cin = node
            .inputs
            .first()
            .copied()
            .flatten()
            .and_then(|x| g.value(x).fact.shape.dims().and_then(|d| d.get(1).and_then(Dim::known)));
        let form = if group == 1 {
            "regular"
        } else if cin == Some(group as u64) {
            "depthwise"
        } else {
            "grouped"
        };
        if !forms.iter().any(|f| f == form) {
            out.push(block(
                reason::GROUP,
                &r.id,
                format!(
                    "{form} convolution (group {group}); the target runs {}",
                    forms.join(" and ")
                ),
            ));
        }
    }
    for a in &r.attrs {
        let value: Option<toml::Value> = match node.attr(&a.name) {
            Some(AttrValue::Int(i)) => Some(toml::Value::Integer(*i)),
            Some(AttrValue::String(s)) => Some(toml::Value::String(s.clone())),
            Some(AttrValue::Float(f)) => Some(toml::Value::Float(*f as f64)),
            _ => a.default.clone(),
        };
        if let Some(v) = value {
            // Axis attributes also match their negative/positive twin for the known rank.
            let rank = node
                .inputs
                .first()
                .copied()
                .flatten()
                .and_then(|x| g.value(x).fact.shape.rank())
                .unwrap_or(0) as i64;
            let ok = a.allowed.iter().any(|x| {
                x == &v || (a.name == "axis" && matches!((x, &v), (toml::Value::Integer(p), toml::Value::Integer(q)) if (p - q).abs() == rank && rank > 0))
            });
            if !ok {
                let allowed: Vec<String> = a.allowed.iter().map(|x| x.to_string()).collect();
                out.push(block(
                    reason::ATTR,
                    &r.id,
                    format!("{} = {v} is not supported (allowed: {})", a.name, allowed.join(", ")),
                ));
            }
        }
    }
    // Channel alignment: an efficiency note with the padding waste.
    if let Some(align) = r.channel_align {
        let channels: Vec<u64> = if node.op_type.contains("Conv") {
            let cout = node
                .outputs
                .first()
                .copied()
                .flatten()
                .and_then(|y| g.value(y).fact.shape.dims().and_then(|d| d.get(1).and_then(Dim::known)));
            let cin = node
                .inputs
                .first()
                .copied()
                .flatten()
                .and_then(|x| g.value(x).fact.shape.dims().and_then(|d| d.get(1).and_then(Dim::known)));
            [cin, cout].into_iter().flatten().collect()
        } else {
            node.outputs
                .first()
                .copied()
                .flatten()
                .and_then(|y| g.value(y).fact.shape.dims().and_then(|d| d.last().and_then(Dim::known)))
                .into_iter()
                .collect()
        };
        let waste: Vec<String> = channels
            .iter()
            .filter(|&&c| c % align != 0)
            .map(|&c| {
                let padded = c.div_ceil(align) * align;
                format!(
                    "{c} → {padded} ({:.0} % padding)",
                    100.0 * (padded - c) as f64 / padded as f64
                )
            })
            .collect();
        if !waste.is_empty() {
            out.push(note(
                reason::CHANNEL_PAD,
                &r.id,
                format!("channels padded to multiples of {align}: {}", waste.join(", ")),
            ));
        }
    }
    (out, quantized_as)
}
