//! Quantization recognition: the standard QDQ form grouped into bundles (DequantizeLinear on
//! the inputs → compute op → QuantizeLinear on the output) and the operator form (QLinear*,
//! *Integer), so each node is judged by its effective types and quantization parameters.

use crate::ir::{AttrValue, DType, Graph, Node, NodeId, ValueId};

/// Quantization parameters of one quantized tensor.
#[derive(Clone, Debug, PartialEq)]
pub struct QuantParams {
    /// The integer type.
    pub dtype: DType,
    /// `Some(axis)` for per-axis scales, `None` for per-tensor.
    pub axis: Option<i64>,
    /// Blocked quantization (opset 21 `block_size`).
    pub block_size: Option<i64>,
    /// Number of scales.
    pub scales: usize,
    /// Zero points, when they are small constants.
    pub zero_points: Option<Vec<i64>>,
    /// Scales, when they are small constants.
    pub scale_values: Option<Vec<f64>>,
    /// Scales computed at run time (DynamicQuantizeLinear).
    pub dynamic: bool,
}

impl QuantParams {
    pub fn granularity(&self) -> &'static str {
        match (self.block_size, self.axis) {
            (Some(_), _) => "blocked",
            (None, Some(_)) => "per-channel",
            (None, None) => "per-tensor",
        }
    }

    /// How many zero points are non-zero, of how many (None if unknown).
    pub fn nonzero_zero_points(&self) -> Option<(usize, usize)> {
        let z = self.zero_points.as_ref()?;
        Some((z.iter().filter(|&&v| v != 0).count(), z.len()))
    }

    /// How many scales are not powers of two (None if unknown).
    pub fn non_pow2_scales(&self) -> Option<(usize, usize)> {
        let s = self.scale_values.as_ref()?;
        let bad = s.iter().filter(|&&x| !(x > 0.0 && x.log2().fract() == 0.0)).count();
        Some((bad, s.len()))
    }
}

/// Effective types of a node: what the computation runs on once Q/DQ are folded in.
#[derive(Clone, Debug, Default)]
pub struct Effective {
    /// Per input slot: effective element type.
    pub inputs: Vec<Option<DType>>,
    /// Per input slot: quantization parameters, when the slot is quantized.
    pub input_quant: Vec<Option<QuantParams>>,
    pub outputs: Vec<Option<DType>>,
    pub output_quant: Vec<Option<QuantParams>>,
    /// The Q/DQ nodes folded into this node's bundle.
    pub bundle: Vec<NodeId>,
}

fn is_dq(n: &Node) -> bool {
    n.op_type == "DequantizeLinear" && (n.is_default_domain() || n.domain == crate::ops::CONTRIB_DOMAIN)
}

fn is_q(n: &Node) -> bool {
    n.op_type == "QuantizeLinear" && (n.is_default_domain() || n.domain == crate::ops::CONTRIB_DOMAIN)
}

/// Quantization parameters of a scale/zero-point pair, with the quantized type `dtype`.
fn params(g: &Graph, node: &Node, scale: Option<ValueId>, zp: Option<ValueId>, dtype: DType) -> QuantParams {
    let sf = scale.map(|s| g.value(s));
    let scales = sf.and_then(|v| v.fact.shape.element_count()).unwrap_or(1) as usize;
    let rank = sf.and_then(|v| v.fact.shape.rank()).unwrap_or(0);
    let block = match node.attr("block_size") {
        Some(AttrValue::Int(b)) if *b > 0 => Some(*b),
        _ => None,
    };
    let axis = match node.attr("axis") {
        Some(AttrValue::Int(a)) => *a,
        _ => 1,
    };
    // Per-axis when the scale is a 1-D tensor of more than one element (ONNX spec).
    let per_axis = block.is_none() && rank >= 1 && scales > 1;
    let dynamic = sf
        .and_then(|v| v.producer)
        .is_some_and(|p| g.node(p).op_type == "DynamicQuantizeLinear");
    QuantParams {
        dtype,
        axis: if per_axis || block.is_some() { Some(axis) } else { None },
        block_size: block,
        scales,
        zero_points: zp.and_then(|z| g.value(z).konst.as_ref()).and_then(|c| c.try_ints()),
        scale_values: sf.and_then(|v| v.konst.as_ref()).map(|c| c.as_floats()),
        dynamic,
    }
}

/// Effective types and bundle of `id`.
pub fn effective(g: &Graph, id: NodeId) -> Effective {
    let node = g.node(id);
    let mut e = Effective::default();
    for slot in &node.inputs {
        let Some(v) = slot else {
            e.inputs.push(None);
            e.input_quant.push(None);
            continue;
        };
        let val = g.value(*v);
        let mut dt = val.fact.dtype;
        let mut q = None;
        if let Some(p) = val.producer {
            let pn = g.node(p);
            if is_dq(pn) && !is_dq(node) && !is_q(node) {
                let x = pn.inputs.first().copied().flatten();
                let xdt = x.and_then(|x| g.value(x).fact.dtype);
                if let Some(xdt) = xdt {
                    dt = Some(xdt);
                    q = Some(params(
                        g,
                        pn,
                        pn.inputs.get(1).copied().flatten(),
                        pn.inputs.get(2).copied().flatten(),
                        xdt,
                    ));
                    e.bundle.push(p);
                }
            } else if pn.op_type == "DynamicQuantizeLinear" {
                if let Some(xdt) = dt {
                    let mut qp = params(g, pn, None, None, xdt);
                    qp.dynamic = true;
                    q = Some(qp);
                }
            }
        }
        e.inputs.push(dt);
        e.input_quant.push(q);
    }
    for slot in &node.outputs {
        let Some(v) = slot else {
            e.outputs.push(None);
            e.output_quant.push(None);
            continue;
        };
        let val = g.value(*v);
        let mut dt = val.fact.dtype;
        let mut q = None;
        if !is_dq(node) && !is_q(node) {
            // A QuantizeLinear reading this output requantizes it: the bundle's output type.
            if let Some(&c) = val.consumers.iter().find(|&&c| is_q(g.node(c))) {
                let cn = g.node(c);
                if let Some(y) = cn.outputs.first().copied().flatten() {
                    if let Some(ydt) = g.value(y).fact.dtype {
                        dt = Some(ydt);
                        q = Some(params(
                            g,
                            cn,
                            cn.inputs.get(1).copied().flatten(),
                            cn.inputs.get(2).copied().flatten(),
                            ydt,
                        ));
                        e.bundle.push(c);
                    }
                }
            }
        }
        e.outputs.push(dt);
        e.output_quant.push(q);
    }
    operator_form(g, node, &mut e);
    e
}

/// Where an operator-form quantized op keeps its scales: (x, x_scale, x_zp) for the first
/// input, then (y_scale, y_zp) for the output. QLinearConv/QLinearMatMul per the ONNX spec;
/// the contrib-domain QLinear ops and QGemm per that domain's documentation (from memory).
fn scale_slots(node: &Node) -> Option<(usize, usize)> {
    let contrib = node.domain == crate::ops::CONTRIB_DOMAIN;
    Some(match node.op_type.as_str() {
        "QLinearConv" | "QLinearMatMul" => (1, 6),
        "QGemm" if contrib => (1, 7),
        "QLinearConvTranspose" if contrib => (1, 6),
        "QLinearAdd" | "QLinearMul" if contrib => (1, 6),
        "QLinearSigmoid"
        | "QLinearLeakyRelu"
        | "QLinearSoftmax"
        | "QLinearGlobalAveragePool"
        | "QLinearAveragePool"
        | "QLinearReduceMean"
            if contrib =>
        {
            (1, 3)
        }
        _ => return None,
    })
}

/// Operator-form quantized ops carry their scales as inputs; the weight of QLinearConv,
/// QLinearMatMul, QGemm and QLinearConvTranspose is slot 3 and is presented in slot 1, where
/// the rule table looks.
fn operator_form(g: &Graph, node: &Node, e: &mut Effective) {
    let Some((x_scale, y_scale)) = scale_slots(node) else {
        return;
    };
    let slot = |i: usize| node.inputs.get(i).copied().flatten();
    let dt = |i: usize| slot(i).and_then(|v| g.value(v).fact.dtype);
    if !crate::ops::weight_in_slot_3(&node.op_type) {
        if let (Some(x), Some(q)) = (dt(0), e.input_quant.get_mut(0)) {
            *q = Some(params(g, node, slot(x_scale), slot(x_scale + 1), x));
        }
        if let (Some(y), Some(o)) = (dt(0), e.output_quant.get_mut(0)) {
            *o = Some(params(g, node, slot(y_scale), slot(y_scale + 1), y));
        }
        return;
    }
    if let (Some(x), Some(q)) = (dt(0), e.input_quant.get_mut(0)) {
        *q = Some(params(g, node, slot(1), slot(2), x));
    }
    if let Some(w) = dt(3) {
        let mut p = params(g, node, slot(4), slot(5), w);
        if p.scales > 1 {
            p.axis = Some(0);
        }
        // Present the weight in slot 1, where the rule table looks for it.
        if e.inputs.len() > 1 {
            e.inputs[1] = Some(w);
            e.input_quant[1] = Some(p);
        }
    }
    if let (Some(y), Some(o)) = (dt(y_scale + 1), e.output_quant.get_mut(0)) {
        *o = Some(params(g, node, slot(y_scale), slot(y_scale + 1), y));
    }
}
