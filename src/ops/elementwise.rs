//! Element-wise ops: unary maps, broadcasting binary and variadic ops, comparisons, casts.

use crate::ir::{ConstData, ConstValue, DType, Shape};

use super::fold::{self, all_consts};
use super::util::{broadcast, same_as, tensor};
use super::{CostRule, Ctx, Inferred, OpDef};

/// Bernoulli: the input's shape; the `dtype` attribute's type, else the input's.
fn bernoulli(ctx: &Ctx) -> Inferred {
    let dt = match ctx.opt_int("dtype") {
        Some(c) => DType::from_onnx(c as i32),
        None => ctx.dtype(0),
    };
    Ok(vec![tensor(dt, ctx.shape(0))])
}

fn unary(ctx: &Ctx) -> Inferred {
    let mut outs = vec![same_as(ctx, 0)];
    outs.truncate(ctx.outputs().max(1));
    Ok(outs)
}

fn to_bool(ctx: &Ctx) -> Inferred {
    Ok(vec![tensor(Some(DType::Bool), ctx.shape(0))])
}

fn bcast_inputs(ctx: &Ctx) -> Result<Shape, String> {
    let shapes: Vec<Shape> = (0..ctx.node.inputs.len())
        .filter(|&i| ctx.has_input(i))
        .map(|i| ctx.shape(i))
        .collect();
    broadcast(&shapes)
}

fn binary(ctx: &Ctx) -> Inferred {
    Ok(vec![tensor(ctx.dtype(0).or(ctx.dtype(1)), bcast_inputs(ctx)?)])
}

fn compare(ctx: &Ctx) -> Inferred {
    Ok(vec![tensor(Some(DType::Bool), bcast_inputs(ctx)?)])
}

fn prelu(ctx: &Ctx) -> Inferred {
    // Unidirectional broadcast of slope to X: the output has X's shape.
    Ok(vec![same_as(ctx, 0)])
}

fn where_(ctx: &Ctx) -> Inferred {
    Ok(vec![tensor(ctx.dtype(1).or(ctx.dtype(2)), bcast_inputs(ctx)?)])
}

fn cast(ctx: &Ctx) -> Inferred {
    let to = ctx.opt_int("to").ok_or("Cast without `to`")?;
    let dt = DType::from_onnx(to as i32).ok_or_else(|| format!("Cast to unknown type code {to}"))?;
    Ok(vec![tensor(Some(dt), ctx.shape(0))])
}

fn cast_like(ctx: &Ctx) -> Inferred {
    Ok(vec![tensor(ctx.dtype(1), ctx.shape(0))])
}

fn dropout(ctx: &Ctx) -> Inferred {
    let mut outs = vec![same_as(ctx, 0)];
    if ctx.outputs() > 1 {
        outs.push(tensor(Some(DType::Bool), ctx.shape(0)));
    }
    Ok(outs)
}

fn eye_like(ctx: &Ctx) -> Inferred {
    let dt = ctx
        .opt_int("dtype")
        .and_then(|c| DType::from_onnx(c as i32))
        .or(ctx.dtype(0));
    Ok(vec![tensor(dt, ctx.shape(0))])
}

fn fold_with(
    ctx: &Ctx,
    arity: std::ops::RangeInclusive<usize>,
    int_op: fn(&[i64]) -> Option<i64>,
    float_op: fn(&[f64]) -> f64,
    boolean: bool,
) -> Option<Vec<ConstValue>> {
    let c = all_consts(ctx)?;
    if !arity.contains(&c.len()) {
        return None;
    }
    Some(vec![fold::elementwise(&c, int_op, float_op, boolean)?])
}

fn fold_add(ctx: &Ctx) -> Option<Vec<ConstValue>> {
    fold_with(ctx, 2..=2, |a| a[0].checked_add(a[1]), |a| a[0] + a[1], false)
}
fn fold_sub(ctx: &Ctx) -> Option<Vec<ConstValue>> {
    fold_with(ctx, 2..=2, |a| a[0].checked_sub(a[1]), |a| a[0] - a[1], false)
}
fn fold_mul(ctx: &Ctx) -> Option<Vec<ConstValue>> {
    fold_with(ctx, 2..=2, |a| a[0].checked_mul(a[1]), |a| a[0] * a[1], false)
}
fn fold_div(ctx: &Ctx) -> Option<Vec<ConstValue>> {
    fold_with(ctx, 2..=2, |a| fold::trunc_div(a[0], a[1]), |a| a[0] / a[1], false)
}
fn fold_equal(ctx: &Ctx) -> Option<Vec<ConstValue>> {
    fold_with(
        ctx,
        2..=2,
        |a| Some((a[0] == a[1]) as i64),
        |a| (a[0] == a[1]) as i64 as f64,
        true,
    )
}
fn fold_less(ctx: &Ctx) -> Option<Vec<ConstValue>> {
    fold_with(
        ctx,
        2..=2,
        |a| Some((a[0] < a[1]) as i64),
        |a| (a[0] < a[1]) as i64 as f64,
        true,
    )
}
fn fold_greater(ctx: &Ctx) -> Option<Vec<ConstValue>> {
    fold_with(
        ctx,
        2..=2,
        |a| Some((a[0] > a[1]) as i64),
        |a| (a[0] > a[1]) as i64 as f64,
        true,
    )
}
fn fold_min(ctx: &Ctx) -> Option<Vec<ConstValue>> {
    fold_with(
        ctx,
        1..=usize::MAX,
        |a| a.iter().copied().min(),
        |a| a.iter().copied().fold(f64::INFINITY, f64::min),
        false,
    )
}
fn fold_max(ctx: &Ctx) -> Option<Vec<ConstValue>> {
    fold_with(
        ctx,
        1..=usize::MAX,
        |a| a.iter().copied().max(),
        |a| a.iter().copied().fold(f64::NEG_INFINITY, f64::max),
        false,
    )
}
fn fold_where(ctx: &Ctx) -> Option<Vec<ConstValue>> {
    let c = all_consts(ctx)?;
    if c.len() != 3 {
        return None;
    }
    Some(vec![fold::elementwise(
        &c,
        |a| Some(if a[0] != 0 { a[1] } else { a[2] }),
        |a| if a[0] != 0.0 { a[1] } else { a[2] },
        false,
    )?])
}
fn fold_neg(ctx: &Ctx) -> Option<Vec<ConstValue>> {
    fold_with(ctx, 1..=1, |a| a[0].checked_neg(), |a| -a[0], false)
}
fn fold_abs(ctx: &Ctx) -> Option<Vec<ConstValue>> {
    fold_with(ctx, 1..=1, |a| a[0].checked_abs(), |a| a[0].abs(), false)
}
fn fold_identity(ctx: &Ctx) -> Option<Vec<ConstValue>> {
    Some(vec![ctx.konst(0)?.clone()])
}
fn fold_cast(ctx: &Ctx) -> Option<Vec<ConstValue>> {
    let v = ctx.konst(0)?;
    let to = DType::from_onnx(ctx.opt_int("to")? as i32)?;
    Some(vec![cast_const(v, to)])
}
fn fold_cast_like(ctx: &Ctx) -> Option<Vec<ConstValue>> {
    Some(vec![cast_const(ctx.konst(0)?, ctx.dtype(1)?)])
}

fn cast_const(v: &ConstValue, to: DType) -> ConstValue {
    if to.is_float() {
        ConstValue::floats(v.dims.clone(), v.as_floats())
    } else if to == DType::Bool {
        ConstValue::ints(
            v.dims.clone(),
            v.as_floats().iter().map(|x| (*x != 0.0) as i64).collect(),
        )
    } else {
        match &v.data {
            ConstData::Float(f) => ConstValue::ints(v.dims.clone(), f.iter().map(|x| x.trunc() as i64).collect()),
            _ => v.clone(),
        }
    }
}

fn shrink_or_same(ctx: &Ctx) -> Inferred {
    unary(ctx)
}

fn bitshift(ctx: &Ctx) -> Inferred {
    binary(ctx)
}

/// Softmax-like ops are a few ops per element; exact counts vary by implementation.
const SOFTMAX_OPS: u64 = 3;

macro_rules! op {
    ($name:literal, $infer:expr, $cost:expr) => {
        OpDef {
            domain: "",
            op: $name,
            family: "elementwise",
            infer: $infer,
            cost: $cost,
            fold: None,
        }
    };
    ($name:literal, $infer:expr, $cost:expr, $fold:expr) => {
        OpDef {
            domain: "",
            op: $name,
            family: "elementwise",
            infer: $infer,
            cost: $cost,
            fold: Some($fold),
        }
    };
}

const E1: CostRule = CostRule::PerOutput(1);

pub static OPS: &[OpDef] = &[
    op!("Add", binary, E1, fold_add),
    op!("Sub", binary, E1, fold_sub),
    op!("Mul", binary, E1, fold_mul),
    op!("Div", binary, E1, fold_div),
    op!("Pow", binary, E1),
    op!("Mod", binary, E1),
    op!("BitShift", bitshift, E1),
    op!("BitwiseAnd", binary, E1),
    op!("BitwiseOr", binary, E1),
    op!("BitwiseXor", binary, E1),
    op!("BitwiseNot", unary, E1),
    op!("And", binary, E1),
    op!("Or", binary, E1),
    op!("Xor", binary, E1),
    op!("Not", unary, E1),
    op!("Equal", compare, E1, fold_equal),
    op!("Greater", compare, E1, fold_greater),
    op!("Less", compare, E1, fold_less),
    op!("GreaterOrEqual", compare, E1),
    op!("LessOrEqual", compare, E1),
    op!("Max", binary, E1, fold_max),
    op!("Min", binary, E1, fold_min),
    op!("Sum", binary, E1),
    op!("Mean", binary, E1),
    op!("Where", where_, E1, fold_where),
    op!("PRelu", prelu, E1),
    op!("Clip", unary, E1),
    op!("Cast", cast, CostRule::Free, fold_cast),
    op!("CastLike", cast_like, CostRule::Free, fold_cast_like),
    op!("Identity", unary, CostRule::Free, fold_identity),
    op!("Dropout", dropout, CostRule::Free),
    op!("IsNaN", to_bool, E1),
    op!("IsInf", to_bool, E1),
    op!("Relu", unary, E1),
    op!("LeakyRelu", unary, E1),
    op!("Elu", unary, E1),
    op!("Selu", unary, E1),
    op!("Celu", unary, E1),
    op!("Sigmoid", unary, E1),
    op!("HardSigmoid", unary, E1),
    op!("HardSwish", unary, E1),
    op!("Tanh", unary, E1),
    op!("Softplus", unary, E1),
    op!("Softsign", unary, E1),
    op!("Gelu", unary, E1),
    op!("Mish", unary, E1),
    op!("Swish", unary, E1),
    op!("ThresholdedRelu", unary, E1),
    op!("Shrink", shrink_or_same, E1),
    op!("Exp", unary, E1),
    op!("Log", unary, E1),
    op!("Sqrt", unary, E1),
    op!("Reciprocal", unary, E1),
    op!("Neg", unary, E1, fold_neg),
    op!("Abs", unary, E1, fold_abs),
    op!("Floor", unary, E1),
    op!("Ceil", unary, E1),
    op!("Round", unary, E1),
    op!("Sign", unary, E1),
    op!("Erf", unary, E1),
    op!("Sin", unary, E1),
    op!("Cos", unary, E1),
    op!("Tan", unary, E1),
    op!("Asin", unary, E1),
    op!("Acos", unary, E1),
    op!("Atan", unary, E1),
    op!("Sinh", unary, E1),
    op!("Cosh", unary, E1),
    op!("Asinh", unary, E1),
    op!("Acosh", unary, E1),
    op!("Atanh", unary, E1),
    op!("Softmax", unary, CostRule::PerOutput(SOFTMAX_OPS)),
    op!("LogSoftmax", unary, CostRule::PerOutput(SOFTMAX_OPS)),
    op!("Hardmax", unary, E1),
    op!("CumSum", unary, E1),
    op!("CumProd", unary, E1),
    op!("Bernoulli", bernoulli, E1),
    op!("Trilu", unary, CostRule::Free),
    op!("ReverseSequence", unary, CostRule::Free),
    op!("EyeLike", eye_like, CostRule::Free),
    op!("Scatter", unary, CostRule::Free),
    op!("ScatterElements", unary, CostRule::Free),
    op!("ScatterND", unary, CostRule::Free),
];
