//! A QDQ quantizer of our own: turns a float model into the standard ONNX QDQ form.
//!
//! Semantics follow the ONNX operator specification of QuantizeLinear / DequantizeLinear
//! (opsets 13, 19, 21): `y = saturate(round(x / scale) + zero_point)` with round half to
//! even, `x = (y − zero_point) · scale`; per-axis quantization by the `axis` attribute
//! (opset 13+); blocked quantization by `block_size` with a scale whose dim on `axis` is
//! ⌈D / block_size⌉ (opset 21+); int16/uint16 and int4/uint4 types from opset 21.
//! Calibration is not the point: scales come from min/max of the weights and from a stated
//! activation range, so the structure and the types are right, not the accuracy.

use std::collections::{BTreeMap, BTreeSet};

use super::builder::{attr, f32_tensor, int_tensor};
use super::{ModelProto, NodeProto, TensorProto};
use crate::ir::DType;

/// How weights are quantized.
#[derive(Clone, Copy, Debug, PartialEq)]
pub enum WeightScheme {
    /// Symmetric int8, one scale per output channel (the default).
    PerChannel,
    /// Symmetric int8, one scale for the tensor.
    PerTensor,
    /// Asymmetric uint8 per tensor (zero point from the weight range).
    Asymmetric,
    /// Symmetric int4 in blocks of `block` along the reduction axis (opset 21).
    Int4Blocked { block: i64 },
}

/// Activation element type.
#[derive(Clone, Copy, Debug, PartialEq)]
pub enum ActType {
    U8,
    I8,
    /// Needs opset 21.
    I16,
}

#[derive(Clone, Debug)]
pub struct QuantOptions {
    pub weights: WeightScheme,
    pub activations: ActType,
    /// The stated activation range every activation is assumed to lie in.
    pub act_range: (f32, f32),
    /// Ops whose outputs keep float (no Q/DQ pair), e.g. a detector's post-processing.
    pub float_ops: BTreeSet<String>,
}

impl Default for QuantOptions {
    fn default() -> Self {
        QuantOptions {
            weights: WeightScheme::PerChannel,
            activations: ActType::U8,
            act_range: (-8.0, 8.0),
            float_ops: BTreeSet::new(),
        }
    }
}

/// Integer range of a quantized type.
pub fn qrange(dt: DType) -> (i64, i64) {
    match dt {
        DType::U8 => (0, 255),
        DType::I8 => (-128, 127),
        DType::U16 => (0, 65535),
        DType::I16 => (-32768, 32767),
        DType::I4 => (-8, 7),
        DType::U4 => (0, 15),
        _ => (-128, 127),
    }
}

/// QuantizeLinear of one value: round half to even, then saturate (ONNX spec).
pub fn quantize_value(x: f32, scale: f32, zero_point: i64, dt: DType) -> i64 {
    let (lo, hi) = qrange(dt);
    let q = (x / scale).round_ties_even() as i64 + zero_point;
    q.clamp(lo, hi)
}

/// DequantizeLinear of one value.
pub fn dequantize_value(q: i64, scale: f32, zero_point: i64) -> f32 {
    (q - zero_point) as f32 * scale
}

fn act_dtype(a: ActType) -> DType {
    match a {
        ActType::U8 => DType::U8,
        ActType::I8 => DType::I8,
        ActType::I16 => DType::I16,
    }
}

/// Scale and zero point covering [lo, hi] (0 included, as the spec's zero point must be exact).
pub fn range_params(lo: f32, hi: f32, dt: DType) -> (f32, i64) {
    let (qlo, qhi) = qrange(dt);
    let (lo, hi) = (lo.min(0.0), hi.max(0.0));
    let scale = ((hi - lo) / (qhi - qlo) as f32).max(f32::MIN_POSITIVE);
    let zp = ((qlo as f32) - lo / scale).round_ties_even() as i64;
    (scale, zp.clamp(qlo, qhi))
}

fn f32_values(t: &TensorProto) -> Option<Vec<f32>> {
    if t.data_type != DType::F32.onnx_code() {
        return None;
    }
    if !t.raw_data.is_empty() {
        if t.raw_data.len() % 4 != 0 {
            return None;
        }
        return Some(
            t.raw_data
                .chunks_exact(4)
                .map(|c| f32::from_le_bytes([c[0], c[1], c[2], c[3]]))
                .collect(),
        );
    }
    t.float_values()
}

/// The axis of output channels in each op's weight (per-channel scales go there), and the
/// reduction axis (blocked scales go along it).
fn weight_axes(node: &NodeProto, rank: usize) -> (usize, usize) {
    let trans_b = node.attribute.iter().any(|a| a.name == "transB" && a.i != 0);
    match node.op_type.as_str() {
        "Conv" => (0, 1),
        "ConvTranspose" => (1, 0),
        "Gemm" if trans_b => (0, 1),
        "Gemm" => (1, 0),
        // MatMul B is [..., K, N]: channels on the last axis, reduction on the one before.
        _ => (rank - 1, rank.saturating_sub(2)),
    }
}

/// Quantized weight: values, scales (shape), zero points, and the DQ attributes.
struct QWeight {
    dtype: DType,
    values: Vec<i64>,
    scales: Vec<f32>,
    scale_dims: Vec<i64>,
    zero_points: Vec<i64>,
    attrs: Vec<super::AttributeProto>,
    /// Per-output-channel scales when a bias can use them.
    channel_scales: Option<Vec<f32>>,
}

fn quantize_weight(w: &[f32], dims: &[i64], channel_axis: usize, reduce_axis: usize, scheme: WeightScheme) -> QWeight {
    let rank = dims.len();
    let strides: Vec<usize> = (0..rank)
        .map(|i| dims[i + 1..].iter().product::<i64>() as usize)
        .collect();
    let index_on = |flat: usize, axis: usize| (flat / strides[axis]) % dims[axis] as usize;
    match scheme {
        WeightScheme::PerTensor | WeightScheme::Asymmetric => {
            let (dt, (scale, zp)) = if scheme == WeightScheme::PerTensor {
                let m = w.iter().fold(0f32, |a, x| a.max(x.abs())).max(1e-8);
                (DType::I8, (m / 127.0, 0))
            } else {
                let lo = w.iter().copied().fold(f32::INFINITY, f32::min);
                let hi = w.iter().copied().fold(f32::NEG_INFINITY, f32::max);
                (DType::U8, range_params(lo, hi, DType::U8))
            };
            QWeight {
                dtype: dt,
                values: w.iter().map(|&x| quantize_value(x, scale, zp, dt)).collect(),
                scales: vec![scale],
                scale_dims: vec![],
                zero_points: vec![zp],
                attrs: vec![],
                channel_scales: Some(vec![scale]),
            }
        }
        WeightScheme::PerChannel => {
            let c = dims[channel_axis] as usize;
            let mut maxabs = vec![0f32; c];
            for (i, &x) in w.iter().enumerate() {
                let ch = index_on(i, channel_axis);
                maxabs[ch] = maxabs[ch].max(x.abs());
            }
            // Symmetric: zero point 0, range ±127 (−128 left unused so the range is symmetric).
            let scales: Vec<f32> = maxabs.iter().map(|m| m.max(1e-8) / 127.0).collect();
            QWeight {
                dtype: DType::I8,
                values: w
                    .iter()
                    .enumerate()
                    .map(|(i, &x)| quantize_value(x, scales[index_on(i, channel_axis)], 0, DType::I8))
                    .collect(),
                scale_dims: vec![c as i64],
                zero_points: vec![0; c],
                attrs: vec![attr::int("axis", channel_axis as i64)],
                channel_scales: Some(scales.clone()),
                scales,
            }
        }
        WeightScheme::Int4Blocked { block } => {
            let block = block.max(1);
            let mut sdims = dims.to_vec();
            sdims[reduce_axis] = (dims[reduce_axis] + block - 1) / block;
            let sstrides: Vec<usize> = (0..rank)
                .map(|i| sdims[i + 1..].iter().product::<i64>() as usize)
                .collect();
            let scale_index = |flat: usize| -> usize {
                (0..rank)
                    .map(|a| {
                        let mut p = index_on(flat, a);
                        if a == reduce_axis {
                            p /= block as usize;
                        }
                        p * sstrides[a]
                    })
                    .sum()
            };
            let n_scales: usize = sdims.iter().product::<i64>() as usize;
            let mut maxabs = vec![0f32; n_scales];
            for (i, &x) in w.iter().enumerate() {
                let s = scale_index(i);
                maxabs[s] = maxabs[s].max(x.abs());
            }
            let scales: Vec<f32> = maxabs.iter().map(|m| m.max(1e-8) / 7.0).collect();
            QWeight {
                dtype: DType::I4,
                values: w
                    .iter()
                    .enumerate()
                    .map(|(i, &x)| quantize_value(x, scales[scale_index(i)], 0, DType::I4))
                    .collect(),
                scale_dims: sdims,
                zero_points: vec![0; n_scales],
                attrs: vec![attr::int("axis", reduce_axis as i64), attr::int("block_size", block)],
                channel_scales: None,
                scales,
            }
        }
    }
}

fn dq_node(name: &str, inputs: [&str; 3], output: &str, attrs: Vec<super::AttributeProto>) -> NodeProto {
    NodeProto {
        name: name.into(),
        op_type: "DequantizeLinear".into(),
        input: inputs.iter().map(|&s| s.into()).collect(),
        output: vec![output.into()],
        attribute: attrs,
        ..Default::default()
    }
}

/// Quantizes a float model into QDQ form. Errors say what in the model prevents it.
pub fn quantize(model: &ModelProto, opts: &QuantOptions) -> Result<ModelProto, String> {
    let mut out = model.clone();
    let g = out.graph.as_mut().ok_or("model has no graph")?;
    let needed_opset = match (opts.activations, opts.weights) {
        (ActType::I16, _) | (_, WeightScheme::Int4Blocked { .. }) => 21,
        _ => 13,
    };
    for o in &mut out.opset_import {
        if crate::ir::is_default_domain(&o.domain) {
            o.version = o.version.max(needed_opset);
        }
    }
    if needed_opset >= 21 {
        out.ir_version = out.ir_version.max(10);
    }
    let inits: BTreeMap<String, TensorProto> = g.initializer.iter().map(|t| (t.name.clone(), t.clone())).collect();
    let adt = act_dtype(opts.activations);
    let (act_scale, act_zp) = range_params(opts.act_range.0, opts.act_range.1, adt);

    let mut new_inits: Vec<TensorProto> = Vec::new();
    let mut replaced: BTreeSet<String> = BTreeSet::new();
    let mut nodes: Vec<NodeProto> = Vec::new();
    let float_values: BTreeSet<String> = inits
        .iter()
        .filter(|(_, t)| t.data_type == 1)
        .map(|(n, _)| n.clone())
        .collect();

    // Float activations: graph inputs and node outputs, except of ops kept float.
    let mut activations: Vec<String> = Vec::new();
    for i in &g.input {
        let is_float = matches!(i.r#type.as_ref().and_then(|t| t.value.as_ref()), Some(super::type_proto::Value::TensorType(t)) if t.elem_type == 1);
        if is_float && !inits.contains_key(&i.name) {
            activations.push(i.name.clone());
        }
    }
    let float_ops_out = |n: &NodeProto| {
        matches!(
            n.op_type.as_str(),
            "Shape"
                | "Size"
                | "NonZero"
                | "NonMaxSuppression"
                | "ArgMax"
                | "ArgMin"
                | "Equal"
                | "Less"
                | "Greater"
                | "Not"
                | "Cast"
                | "TopK"
        )
    };
    let qdq_for = |name: &str, nodes: &mut Vec<NodeProto>, new_inits: &mut Vec<TensorProto>| {
        let s = format!("{name}_scale");
        let z = format!("{name}_zero_point");
        new_inits.push(f32_tensor(&s, &[], &[act_scale]));
        new_inits.push(int_tensor(&z, adt, &[], &[act_zp]));
        nodes.push(NodeProto {
            name: format!("{name}_quantize").into(),
            op_type: "QuantizeLinear".into(),
            input: vec![name.into(), s.as_str().into(), z.as_str().into()],
            output: vec![format!("{name}_q").into()],
            ..Default::default()
        });
        nodes.push(dq_node(
            &format!("{name}_dequantize"),
            [&format!("{name}_q"), &s, &z],
            &format!("{name}_dq"),
            vec![],
        ));
    };
    let mut quantized_acts: BTreeSet<String> = BTreeSet::new();
    for a in &activations {
        qdq_for(a, &mut nodes, &mut new_inits);
        quantized_acts.insert(a.clone());
    }
    for node in &g.node {
        let mut n = node.clone();
        let compute = matches!(n.op_type.as_str(), "Conv" | "ConvTranspose" | "Gemm" | "MatMul");
        if compute {
            let wname = n.input.get(1).map(String::from).unwrap_or_default();
            if let Some(w) = inits.get(&wname).filter(|_| float_values.contains(&wname)) {
                let values = f32_values(w).ok_or_else(|| format!("weight `{wname}` has no float32 payload"))?;
                let (ch, red) = weight_axes(&n, w.dims.len());
                let qw = quantize_weight(&values, &w.dims, ch, red, opts.weights);
                let (qn, sn, zn, dqn) = (
                    format!("{wname}_quantized"),
                    format!("{wname}_scale"),
                    format!("{wname}_zero_point"),
                    format!("{wname}_dequantized"),
                );
                new_inits.push(int_tensor(&qn, qw.dtype, &w.dims, &qw.values));
                new_inits.push(f32_tensor(&sn, &qw.scale_dims, &qw.scales));
                new_inits.push(int_tensor(&zn, qw.dtype, &qw.scale_dims, &qw.zero_points));
                nodes.push(dq_node(&format!("{wname}_dq"), [&qn, &sn, &zn], &dqn, qw.attrs.clone()));
                n.input[1] = dqn.into();
                replaced.insert(wname.clone());
                // Bias: int32 with scale = activation scale × weight scale (per channel).
                let bname = n.input.get(2).map(String::from).unwrap_or_default();
                if let (Some(b), Some(cs)) = (inits.get(&bname), qw.channel_scales.as_ref()) {
                    if let Some(bv) = f32_values(b) {
                        let bs: Vec<f32> = (0..bv.len())
                            .map(|i| act_scale * cs[if cs.len() == 1 { 0 } else { i }])
                            .collect();
                        let bq: Vec<i64> = bv
                            .iter()
                            .zip(&bs)
                            .map(|(&x, &s)| (x / s).round_ties_even().clamp(i32::MIN as f32, i32::MAX as f32) as i64)
                            .collect();
                        let (bqn, bsn, bzn, bdq) = (
                            format!("{bname}_quantized"),
                            format!("{bname}_scale"),
                            format!("{bname}_zero_point"),
                            format!("{bname}_dequantized"),
                        );
                        new_inits.push(int_tensor(&bqn, DType::I32, &b.dims, &bq));
                        new_inits.push(f32_tensor(&bsn, &b.dims, &bs));
                        new_inits.push(int_tensor(&bzn, DType::I32, &b.dims, &vec![0; bv.len()]));
                        nodes.push(dq_node(
                            &format!("{bname}_dq"),
                            [&bqn, &bsn, &bzn],
                            &bdq,
                            vec![attr::int("axis", 0)],
                        ));
                        n.input[2] = bdq.into();
                        replaced.insert(bname);
                    }
                }
            }
        }
        // Consumers read the dequantized copy of each quantized activation.
        for inp in n.input.iter_mut() {
            if quantized_acts.contains(inp.as_str()) {
                *inp = format!("{inp}_dq").into();
            }
        }
        let keep_float = opts.float_ops.contains(n.op_type.as_str()) || float_ops_out(&n);
        let outs = n.output.clone();
        nodes.push(n);
        if !keep_float {
            for o in outs.iter().filter(|o| !o.is_empty()) {
                qdq_for(o, &mut nodes, &mut new_inits);
                quantized_acts.insert(o.to_string());
            }
        }
    }
    // Graph outputs stay the float tensors the original model named.
    g.initializer.retain(|t| !replaced.contains(&t.name));
    g.initializer.extend(new_inits);
    g.node = nodes;
    g.value_info.clear();
    Ok(out)
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn quantize_rounds_half_to_even_and_saturates() {
        // ONNX spec, QuantizeLinear: "rounding to nearest ties to even", then saturation.
        assert_eq!(quantize_value(2.5, 1.0, 0, DType::I8), 2);
        assert_eq!(quantize_value(3.5, 1.0, 0, DType::I8), 4);
        assert_eq!(quantize_value(-2.5, 1.0, 0, DType::I8), -2);
        assert_eq!(quantize_value(1000.0, 1.0, 0, DType::I8), 127);
        assert_eq!(quantize_value(-1000.0, 1.0, 0, DType::U8), 0);
        assert_eq!(quantize_value(9.0, 1.0, 0, DType::I4), 7);
    }

    fn seeded(n: usize) -> Vec<f32> {
        let mut x: u64 = 0x2545f4914f6cdd1d;
        (0..n)
            .map(|_| {
                x ^= x << 13;
                x ^= x >> 7;
                x ^= x << 17;
                ((x >> 40) as f32 / (1u64 << 24) as f32) * 2.0 - 1.0
            })
            .collect()
    }

    #[test]
    fn round_trip_error_is_at_most_half_a_step() {
        // |dequantize(quantize(w)) − w| ≤ scale/2 inside the representable range (ONNX spec
        // semantics of QuantizeLinear/DequantizeLinear).
        let dims = [8i64, 4, 3, 3];
        let w = seeded(8 * 4 * 9);
        for scheme in [
            WeightScheme::PerChannel,
            WeightScheme::PerTensor,
            WeightScheme::Asymmetric,
            WeightScheme::Int4Blocked { block: 2 },
        ] {
            let q = quantize_weight(&w, &dims, 0, 1, scheme);
            let strides: Vec<usize> = (0..4).map(|i| dims[i + 1..].iter().product::<i64>() as usize).collect();
            for (i, &x) in w.iter().enumerate() {
                let si = match scheme {
                    WeightScheme::PerChannel => i / strides[0],
                    WeightScheme::Int4Blocked { block } => {
                        let pos: Vec<usize> = (0..4).map(|a| (i / strides[a]) % dims[a] as usize).collect();
                        let sd = [8usize, 4usize.div_ceil(block as usize), 3, 3];
                        ((pos[0] * sd[1] + pos[1] / block as usize) * sd[2] + pos[2]) * sd[3] + pos[3]
                    }
                    _ => 0,
                };
                let (s, z) = (q.scales[si], q.zero_points[si]);
                let back = dequantize_value(q.values[i], s, z);
                assert!(
                    (back - x).abs() <= s / 2.0 + 1e-6,
                    "{scheme:?}: {x} → {back} with scale {s}"
                );
            }
        }
    }
}
