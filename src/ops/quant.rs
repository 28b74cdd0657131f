//! Quantization ops: QuantizeLinear / DequantizeLinear (per-tensor, per-axis, blocked) and
//! DynamicQuantizeLinear, per the ONNX operator specification of each.

use crate::ir::{DType, Shape};

use super::util::tensor;
use super::{CostRule, Ctx, Inferred, OpDef, CONTRIB_DOMAIN};

/// QuantizeLinear: y has x's shape; its type is y_zero_point's, else `output_dtype`
/// (opset 21+), else uint8 (ONNX spec, QuantizeLinear).
fn quantize(ctx: &Ctx) -> Inferred {
    let dt = if ctx.has_input(2) && ctx.dtype(2).is_some() {
        ctx.dtype(2)
    } else {
        match ctx.opt_int("output_dtype").filter(|&c| c != 0) {
            Some(c) => Some(DType::from_onnx(c as i32).ok_or_else(|| format!("unknown output_dtype {c}"))?),
            None if ctx.has_input(2) => None,
            None => Some(DType::U8),
        }
    };
    Ok(smallvec::smallvec![tensor(dt, ctx.shape(0))])
}

/// DequantizeLinear: y has x's shape and x_scale's type (opset 23 adds `output_dtype`).
fn dequantize(ctx: &Ctx) -> Inferred {
    let dt = match ctx.opt_int("output_dtype").filter(|&c| c != 0) {
        Some(c) => DType::from_onnx(c as i32),
        None => ctx.dtype(1).or(Some(DType::F32)),
    };
    Ok(smallvec::smallvec![tensor(dt, ctx.shape(0))])
}

fn dynamic_quantize(ctx: &Ctx) -> Inferred {
    Ok(smallvec::smallvec![
        tensor(Some(DType::U8), ctx.shape(0)),
        tensor(Some(DType::F32), Shape::scalar()),
        tensor(Some(DType::U8), Shape::scalar()),
    ])
}

macro_rules! op {
    ($dom:expr, $name:literal, $infer:expr, $cost:expr) => {
        OpDef {
            domain: $dom,
            op: $name,
            family: "quant",
            infer: $infer,
            cost: $cost,
            fold: None,
        }
    };
}

pub static OPS: &[OpDef] = &[
    op!("", "QuantizeLinear", quantize, CostRule::PerOutput(2)),
    op!("", "DequantizeLinear", dequantize, CostRule::PerOutput(2)),
    op!("", "DynamicQuantizeLinear", dynamic_quantize, CostRule::PerInput(3)),
    op!(CONTRIB_DOMAIN, "QuantizeLinear", quantize, CostRule::PerOutput(2)),
    op!(CONTRIB_DOMAIN, "DequantizeLinear", dequantize, CostRule::PerOutput(2)),
];
