//! Reductions and arg-reductions: axes by attribute or (newer opsets) by input.

use crate::ir::{DType, Dim, Shape};

use super::util::{norm_axis, tensor};
use super::{CostRule, Ctx, Inferred, OpDef};

/// The opset from which each reduction takes `axes` as an input instead of an attribute.
fn axes_input_since(op: &str) -> i64 {
    if op == "ReduceSum" {
        13
    } else {
        18
    }
}

pub(super) fn reduce(ctx: &Ctx) -> Inferred {
    let keep = ctx.int("keepdims", 1) != 0;
    let dt = ctx.dtype(0);
    let Some(dims) = ctx.dims(0) else {
        return Ok(vec![tensor(dt, Shape::unknown())]);
    };
    let axes: Option<Vec<i64>> = if ctx.opset >= axes_input_since(&ctx.node.op_type) {
        if ctx.has_input(1) {
            match ctx.const_ints(1) {
                Some(a) => Some(a),
                None => {
                    let shape = if keep {
                        Shape::of_rank(dims.len())
                    } else {
                        Shape::unknown()
                    };
                    return Ok(vec![tensor(dt, shape)]);
                }
            }
        } else {
            None
        }
    } else {
        ctx.ints("axes")
    };
    let axes = match axes {
        Some(a) if !a.is_empty() => a,
        _ if ctx.int("noop_with_empty_axes", 0) != 0 => return Ok(vec![tensor(dt, Shape::of(dims))]),
        _ => (0..dims.len() as i64).collect(),
    };
    let mut reduced = vec![false; dims.len()];
    for a in axes {
        reduced[ctx.axis(a, dims.len())?] = true;
    }
    let out: Vec<Dim> = dims
        .iter()
        .zip(&reduced)
        .filter_map(|(d, &r)| match (r, keep) {
            (true, true) => Some(Dim::Known(1)),
            (true, false) => None,
            (false, _) => Some(d.clone()),
        })
        .collect();
    Ok(vec![tensor(dt, Shape::of(out))])
}

fn arg_reduce(ctx: &Ctx) -> Inferred {
    let keep = ctx.int("keepdims", 1) != 0;
    let Some(dims) = ctx.dims(0) else {
        return Ok(vec![tensor(Some(DType::I64), Shape::unknown())]);
    };
    let axis = norm_axis(ctx.int("axis", 0), dims.len()).ok_or("axis out of range")?;
    let mut out = dims;
    if keep {
        out[axis] = Dim::Known(1);
    } else {
        out.remove(axis);
    }
    Ok(vec![tensor(Some(DType::I64), Shape::of(out))])
}

macro_rules! op {
    ($name:literal, $infer:expr) => {
        OpDef {
            domain: "",
            op: $name,
            family: "reduce",
            infer: $infer,
            cost: CostRule::PerInput(1),
            fold: None,
        }
    };
}

pub static OPS: &[OpDef] = &[
    op!("ReduceSum", reduce),
    op!("ReduceMean", reduce),
    op!("ReduceMax", reduce),
    op!("ReduceMin", reduce),
    op!("ReduceProd", reduce),
    op!("ReduceL1", reduce),
    op!("ReduceL2", reduce),
    op!("ReduceLogSum", reduce),
    op!("ReduceLogSumExp", reduce),
    op!("ReduceSumSquare", reduce),
    op!("ArgMax", arg_reduce),
    op!("ArgMin", arg_reduce),
];
