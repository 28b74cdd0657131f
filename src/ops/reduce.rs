//! Reductions and arg-reductions: axes by attribute or (newer opsets) by input.

use crate::ir::{ConstValue, DType, Dim, Shape};

use super::fold;
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

/// Which axes a reduction removes, as the operator specification reads them: by attribute
/// before the opset that made `axes` an input, by input after; no axes means all of them
/// unless `noop_with_empty_axes` is set.
enum Axes {
    /// Reduce these (a flag per input axis).
    Reduce(Vec<bool>),
    /// `noop_with_empty_axes` with no axes: the input passes through.
    Identity,
    /// The axes are an input whose values are not known.
    Unknown,
}

fn reduced_axes(ctx: &Ctx, rank: usize) -> Result<Axes, String> {
    let axes: Option<Vec<i64>> = if ctx.opset >= axes_input_since(&ctx.node.op_type) {
        if ctx.has_input(1) {
            match ctx.const_ints(1) {
                Some(a) => Some(a),
                // Values unknown, but an axes tensor of shape [0] is empty whatever it holds.
                None if ctx.shape(1).concrete().is_some_and(|d| d == [0]) => Some(Vec::new()),
                None => return Ok(Axes::Unknown),
            }
        } else {
            None
        }
    } else {
        ctx.ints("axes")
    };
    let axes = match axes {
        Some(a) if !a.is_empty() => a,
        _ if ctx.int("noop_with_empty_axes", 0) != 0 => return Ok(Axes::Identity),
        _ => (0..rank as i64).collect(),
    };
    let mut reduced = vec![false; rank];
    for a in axes {
        reduced[ctx.axis(a, rank)?] = true;
    }
    Ok(Axes::Reduce(reduced))
}

pub(super) fn reduce(ctx: &Ctx) -> Inferred {
    let keep = ctx.int("keepdims", 1) != 0;
    let dt = ctx.dtype(0);
    let Some(dims) = ctx.dims(0) else {
        return Ok(smallvec::smallvec![tensor(dt, Shape::unknown())]);
    };
    let reduced = match reduced_axes(ctx, dims.len())? {
        Axes::Reduce(r) => r,
        Axes::Identity => return Ok(smallvec::smallvec![tensor(dt, Shape::of(dims))]),
        Axes::Unknown if keep => return Ok(smallvec::smallvec![tensor(dt, Shape::of_rank(dims.len()))]),
        Axes::Unknown => return Ok(smallvec::smallvec![tensor(dt, Shape::unknown())]),
    };
    let out: Vec<Dim> = dims
        .iter()
        .zip(&reduced)
        .filter_map(|(d, &r)| match (r, keep) {
            (true, true) => Some(Dim::Known(1)),
            (true, false) => None,
            (false, _) => Some(d.clone()),
        })
        .collect();
    Ok(smallvec::smallvec![tensor(dt, Shape::of(out))])
}

/// Folds ReduceMin, ReduceMax, ReduceSum and ReduceProd of a small constant: exporters compute
/// TopK's `k` as the smaller of a shape dim and a limit this way.
fn fold_reduce(ctx: &Ctx) -> Option<Vec<ConstValue>> {
    let data = ctx.konst(0)?;
    let keep = ctx.int("keepdims", 1) != 0;
    let reduced = match reduced_axes(ctx, data.dims.len()).ok()? {
        Axes::Reduce(r) => r,
        Axes::Identity => return Some(vec![data.clone()]),
        Axes::Unknown => return None,
    };
    let ops: fold::ReduceOps = match ctx.node.op_type.as_str() {
        "ReduceMin" => (|a, b| Some(a.min(b)), f64::min),
        "ReduceMax" => (|a, b| Some(a.max(b)), f64::max),
        "ReduceSum" => (i64::checked_add, |a, b| a + b),
        "ReduceProd" => (i64::checked_mul, |a, b| a * b),
        _ => return None,
    };
    Some(vec![fold::reduce(data, &reduced, keep, ops)?])
}

fn arg_reduce(ctx: &Ctx) -> Inferred {
    let keep = ctx.int("keepdims", 1) != 0;
    let Some(dims) = ctx.dims(0) else {
        return Ok(smallvec::smallvec![tensor(Some(DType::I64), Shape::unknown())]);
    };
    let axis = norm_axis(ctx.int("axis", 0), dims.len()).ok_or("axis out of range")?;
    let mut out = dims;
    if keep {
        out[axis] = Dim::Known(1);
    } else {
        out.remove(axis);
    }
    Ok(smallvec::smallvec![tensor(Some(DType::I64), Shape::of(out))])
}

/// SoftmaxCrossEntropyLoss (opset 12) and NegativeLogLikelihoodLoss (opset 12): scores
/// (N, C, d1…dk) and labels (N, d1…dk). The loss is a scalar under the `mean` (default) and
/// `sum` reductions and the labels' shape under `none`; the optional second output of the
/// softmax form (log-probabilities) has the scores' shape (ONNX operator specification).
fn loss(ctx: &Ctx) -> Inferred {
    let reduction = ctx.string("reduction").unwrap_or_else(|| "mean".to_string());
    let loss_shape = match reduction.as_str() {
        "mean" | "sum" => Shape::scalar(),
        "none" => match (ctx.dims(1), ctx.dims(0)) {
            (Some(t), _) => Shape::of(t),
            // Without the labels' shape: the scores' with the class axis removed.
            (None, Some(x)) if x.len() >= 2 => {
                let mut d = x;
                d.remove(1);
                Shape::of(d)
            }
            _ => Shape::unknown(),
        },
        other => return Err(format!("unknown reduction `{other}`")),
    };
    let mut outs = vec![tensor(ctx.dtype(0), loss_shape)];
    if ctx.outputs() > 1 {
        outs.push(tensor(ctx.dtype(0), ctx.shape(0)));
    }
    Ok(outs.into())
}

macro_rules! op {
    ($name:literal, $infer:expr) => {
        op!($name, $infer, None)
    };
    ($name:literal, $infer:expr, $fold:expr) => {
        OpDef {
            domain: "",
            op: $name,
            family: "reduce",
            infer: $infer,
            cost: CostRule::PerInput(1),
            fold: $fold,
        }
    };
}

pub static OPS: &[OpDef] = &[
    op!("ReduceSum", reduce, Some(fold_reduce)),
    op!("ReduceMean", reduce),
    op!("ReduceMax", reduce, Some(fold_reduce)),
    op!("ReduceMin", reduce, Some(fold_reduce)),
    op!("ReduceProd", reduce, Some(fold_reduce)),
    op!("ReduceL1", reduce),
    op!("ReduceL2", reduce),
    op!("ReduceLogSum", reduce),
    op!("ReduceLogSumExp", reduce),
    op!("ReduceSumSquare", reduce),
    op!("ArgMax", arg_reduce),
    op!("ArgMin", arg_reduce),
    OpDef {
        domain: "",
        op: "SoftmaxCrossEntropyLoss",
        family: "reduce",
        infer: loss,
        // Softmax, log and the pick: counted like a softmax, per score.
        cost: CostRule::PerInput(super::elementwise::SOFTMAX_OPS),
        fold: None,
    },
    op!("NegativeLogLikelihoodLoss", loss),
];
