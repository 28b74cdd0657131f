//! Element-wise ops: unary maps, broadcasting binary and variadic ops, comparisons, casts.

use crate::ir::{ConstData, ConstValue, DType, Dim, Shape};

use super::fold::{self, all_consts};
use super::util::{broadcast_all, same_as, tensor};
use super::{CostRule, Ctx, Inferred, OpDef};

/// Bernoulli, RandomUniformLike, RandomNormalLike: the input's shape; the `dtype`
/// attribute's type, else the input's.
fn like_with_dtype(ctx: &Ctx) -> Inferred {
    let dt = match ctx.opt_int("dtype") {
        Some(c) => DType::from_onnx(c as i32),
        None => ctx.dtype(0),
    };
    Ok(smallvec::smallvec![tensor(dt, ctx.shape(0))])
}

/// BitCast (opset 26): the same bits as the `to` type, which must be as wide (ONNX operator
/// specification, BitCast-26: "The target data type must have the same bit-width").
fn bitcast(ctx: &Ctx) -> Inferred {
    let to = ctx.opt_int("to").ok_or("BitCast without `to`")?;
    let dt = DType::from_onnx(to as i32).ok_or_else(|| format!("BitCast to unknown type code {to}"))?;
    if let Some(from) = ctx.dtype(0) {
        if from.bits() != dt.bits() {
            return Err(format!(
                "BitCast from {} ({} bits) to {} ({} bits): the widths must match",
                from.name(),
                from.bits(),
                dt.name(),
                dt.bits()
            ));
        }
    }
    Ok(smallvec::smallvec![tensor(Some(dt), ctx.shape(0))])
}

/// RandomUniform / RandomNormal: the `shape` attribute, the `dtype` attribute's type (float by
/// default, per the operator specification).
fn random(ctx: &Ctx) -> Inferred {
    let dims = ctx.ints("shape").ok_or("no `shape` attribute")?;
    let dims: Vec<u64> = dims
        .iter()
        .map(|&d| u64::try_from(d).map_err(|_| format!("negative dim {d} in `shape`")))
        .collect::<Result<_, _>>()?;
    let dt = DType::from_onnx(ctx.int("dtype", 1) as i32);
    Ok(smallvec::smallvec![tensor(dt, Shape::known(&dims))])
}

/// Multinomial: [batch, sample_size] of the `dtype` attribute's type (int32 by default, per the
/// operator specification).
fn multinomial(ctx: &Ctx) -> Inferred {
    let batch = match ctx.dims(0) {
        Some(d) if d.len() == 2 => d[0].clone(),
        Some(d) => return Err(format!("input of rank {}, expected 2", d.len())),
        None => Dim::Unknown,
    };
    let samples = u64::try_from(ctx.int("sample_size", 1)).map_err(|_| "negative sample_size")?;
    let dt = DType::from_onnx(ctx.int("dtype", 6) as i32);
    Ok(smallvec::smallvec![tensor(dt, Shape::of([batch, Dim::Known(samples)]))])
}

/// SwiGLU (opset 28): Swish(A)·B over two inputs of identical shape, no broadcasting (ONNX
/// operator specification, SwiGLU-28).
fn swiglu(ctx: &Ctx) -> Inferred {
    let (a, b) = (ctx.shape(0), ctx.shape(1));
    if let (Some(x), Some(y)) = (a.dims(), b.dims()) {
        let clash = x.len() != y.len()
            || x.iter()
                .zip(y)
                .any(|(p, q)| matches!((p.known(), q.known()), (Some(m), Some(n)) if m != n));
        if clash {
            return Err(format!("A {a} and B {b} differ; SwiGLU does not broadcast"));
        }
        // Where A's dim is not known, B's may be.
        let merged: crate::ir::DimVec = x
            .iter()
            .zip(y)
            .map(|(p, q)| {
                if p.known().is_some() || q.known().is_none() {
                    p.clone()
                } else {
                    q.clone()
                }
            })
            .collect();
        return Ok(smallvec::smallvec![tensor(
            ctx.dtype(0).or(ctx.dtype(1)),
            Shape::of(merged)
        )]);
    }
    Ok(smallvec::smallvec![tensor(
        ctx.dtype(0).or(ctx.dtype(1)),
        if a.rank().is_some() { a } else { b },
    )])
}

fn unary(ctx: &Ctx) -> Inferred {
    Ok(smallvec::smallvec![same_as(ctx, 0)])
}

fn to_bool(ctx: &Ctx) -> Inferred {
    Ok(smallvec::smallvec![tensor(Some(DType::Bool), ctx.shape(0))])
}

fn bcast_inputs(ctx: &Ctx) -> Result<Shape, String> {
    let mut shapes: smallvec::SmallVec<[&Shape; 4]> = smallvec::SmallVec::new();
    for i in (0..ctx.node.inputs.len()).filter(|&i| ctx.has_input(i)) {
        match ctx.fact(i) {
            Some(f) => shapes.push(&f.shape),
            None => return Ok(Shape::unknown()),
        }
    }
    broadcast_all(shapes.iter().copied())
}

pub(super) fn binary(ctx: &Ctx) -> Inferred {
    Ok(smallvec::smallvec![tensor(
        ctx.dtype(0).or(ctx.dtype(1)),
        bcast_inputs(ctx)?
    )])
}

fn compare(ctx: &Ctx) -> Inferred {
    Ok(smallvec::smallvec![tensor(Some(DType::Bool), bcast_inputs(ctx)?)])
}

fn prelu(ctx: &Ctx) -> Inferred {
    // Unidirectional broadcast of slope to X: the output has X's shape.
    Ok(smallvec::smallvec![same_as(ctx, 0)])
}

fn where_(ctx: &Ctx) -> Inferred {
    Ok(smallvec::smallvec![tensor(
        ctx.dtype(1).or(ctx.dtype(2)),
        bcast_inputs(ctx)?
    )])
}

fn cast(ctx: &Ctx) -> Inferred {
    let to = ctx.opt_int("to").ok_or("Cast without `to`")?;
    let dt = DType::from_onnx(to as i32).ok_or_else(|| format!("Cast to unknown type code {to}"))?;
    Ok(smallvec::smallvec![tensor(Some(dt), ctx.shape(0))])
}

fn cast_like(ctx: &Ctx) -> Inferred {
    Ok(smallvec::smallvec![tensor(ctx.dtype(1), ctx.shape(0))])
}

fn dropout(ctx: &Ctx) -> Inferred {
    let mut outs = vec![same_as(ctx, 0)];
    if ctx.outputs() > 1 {
        outs.push(tensor(Some(DType::Bool), ctx.shape(0)));
    }
    Ok(outs.into())
}

fn eye_like(ctx: &Ctx) -> Inferred {
    let dt = ctx
        .opt_int("dtype")
        .and_then(|c| DType::from_onnx(c as i32))
        .or(ctx.dtype(0));
    Ok(smallvec::smallvec![tensor(dt, ctx.shape(0))])
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

/// Sums, differences, products and quotients of shape values keep their symbols (`Shape` of
/// `[batch, T]` × 2 is `[batch*2, T*2]`): the arithmetic dim expressions have. Whole-number
/// floats take part in sums, differences and products, which are exact on them.
fn fold_symbolic(ctx: &Ctx, op: fn(&Dim, &Dim) -> Option<Dim>) -> Option<Vec<ConstValue>> {
    let c = all_consts(ctx)?;
    if c.len() != 2 {
        return None;
    }
    Some(vec![fold::dims_elementwise(&c, op, true)?])
}

fn fold_add(ctx: &Ctx) -> Option<Vec<ConstValue>> {
    fold_with(ctx, 2..=2, |a| a[0].checked_add(a[1]), |a| a[0] + a[1], false).or_else(|| fold_symbolic(ctx, Dim::add))
}
fn fold_sub(ctx: &Ctx) -> Option<Vec<ConstValue>> {
    fold_with(ctx, 2..=2, |a| a[0].checked_sub(a[1]), |a| a[0] - a[1], false).or_else(|| fold_symbolic(ctx, Dim::sub))
}
fn fold_mul(ctx: &Ctx) -> Option<Vec<ConstValue>> {
    fold_with(ctx, 2..=2, |a| a[0].checked_mul(a[1]), |a| a[0] * a[1], false).or_else(|| fold_symbolic(ctx, Dim::mul))
}
fn fold_div(ctx: &Ctx) -> Option<Vec<ConstValue>> {
    fold_with(ctx, 2..=2, |a| fold::trunc_div(a[0], a[1]), |a| a[0] / a[1], false).or_else(|| {
        // Integer division of a size by a positive constant rounds down (sizes are not
        // negative, so truncation is the floor). A float quotient is not a whole number in
        // general, and what rounds it comes later: not folded.
        if ctx.dtype(0).is_none_or(DType::is_float) {
            return None;
        }
        let c = all_consts(ctx)?;
        let quotient = |a: &Dim, b: &Dim| match b.known() {
            Some(k) if k > 0 => Some(a.div_floor(k)),
            _ => None,
        };
        Some(vec![fold::dims_elementwise(&c, quotient, false)?])
    })
}
fn fold_equal(ctx: &Ctx) -> Option<Vec<ConstValue>> {
    fold_with(
        ctx,
        2..=2,
        |a| Some((a[0] == a[1]) as i64),
        |a| (a[0] == a[1]) as i64 as f64,
        true,
    )
    .or_else(|| Some(vec![fold::dims_equal(ctx.konst(0)?, ctx.konst(1)?)?]))
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
    .or_else(|| {
        // Sizes capped by a constant (`min(T,300)`), with any number of inputs.
        let c = all_consts(ctx)?;
        Some(vec![fold::dims_elementwise(&c, Dim::lesser, true)?])
    })
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
    fold::elementwise(
        &c,
        |a| Some(if a[0] != 0 { a[1] } else { a[2] }),
        |a| if a[0] != 0.0 { a[1] } else { a[2] },
        false,
    )
    .or_else(|| fold::dims_where(c[0], c[1], c[2]))
    .map(|v| vec![v])
}
fn fold_neg(ctx: &Ctx) -> Option<Vec<ConstValue>> {
    fold_with(ctx, 1..=1, |a| a[0].checked_neg(), |a| -a[0], false)
}
fn fold_abs(ctx: &Ctx) -> Option<Vec<ConstValue>> {
    fold_with(ctx, 1..=1, |a| a[0].checked_abs(), |a| a[0].abs(), false)
}
fn fold_greater_or_equal(ctx: &Ctx) -> Option<Vec<ConstValue>> {
    fold_with(
        ctx,
        2..=2,
        |a| Some((a[0] >= a[1]) as i64),
        |a| (a[0] >= a[1]) as i64 as f64,
        true,
    )
}
fn fold_less_or_equal(ctx: &Ctx) -> Option<Vec<ConstValue>> {
    fold_with(
        ctx,
        2..=2,
        |a| Some((a[0] <= a[1]) as i64),
        |a| (a[0] <= a[1]) as i64 as f64,
        true,
    )
}
fn fold_not(ctx: &Ctx) -> Option<Vec<ConstValue>> {
    fold_with(
        ctx,
        1..=1,
        |a| Some((a[0] == 0) as i64),
        |a| (a[0] == 0.0) as i64 as f64,
        true,
    )
}
fn fold_and(ctx: &Ctx) -> Option<Vec<ConstValue>> {
    fold_with(
        ctx,
        2..=2,
        |a| Some((a[0] != 0 && a[1] != 0) as i64),
        |a| (a[0] != 0.0 && a[1] != 0.0) as i64 as f64,
        true,
    )
}
fn fold_or(ctx: &Ctx) -> Option<Vec<ConstValue>> {
    fold_with(
        ctx,
        2..=2,
        |a| Some((a[0] != 0 || a[1] != 0) as i64),
        |a| (a[0] != 0.0 || a[1] != 0.0) as i64 as f64,
        true,
    )
}
fn fold_xor(ctx: &Ctx) -> Option<Vec<ConstValue>> {
    fold_with(
        ctx,
        2..=2,
        |a| Some(((a[0] != 0) != (a[1] != 0)) as i64),
        |a| ((a[0] != 0.0) != (a[1] != 0.0)) as i64 as f64,
        true,
    )
}
fn fold_sum(ctx: &Ctx) -> Option<Vec<ConstValue>> {
    fold_with(
        ctx,
        1..=usize::MAX,
        |a| a.iter().try_fold(0i64, |s, &x| s.checked_add(x)),
        |a| a.iter().sum(),
        false,
    )
}
/// Mod per the ONNX operator specification: with `fmod` = 0 (integers only) the result takes
/// the divisor's sign, as in Python; with `fmod` = 1 the dividend's, as C's fmod.
fn fold_mod(ctx: &Ctx) -> Option<Vec<ConstValue>> {
    fn floor_mod(a: &[i64]) -> Option<i64> {
        let r = a[0].checked_rem(a[1])?;
        Some(if r != 0 && (r < 0) != (a[1] < 0) { r + a[1] } else { r })
    }
    fn trunc_mod(a: &[i64]) -> Option<i64> {
        a[0].checked_rem(a[1])
    }
    let int_op: fn(&[i64]) -> Option<i64> = if ctx.int("fmod", 0) == 1 { trunc_mod } else { floor_mod };
    // Floats are allowed only with fmod = 1, whose sign rule is C's: Rust's `%` on f64.
    fold_with(ctx, 2..=2, int_op, |a| a[0] % a[1], false).or_else(|| {
        // A size's remainder by a whole number (`W % 7` of a window pad): sizes are never
        // negative, where both sign rules agree.
        if ctx.dtype(0).is_none_or(DType::is_float) {
            return None;
        }
        let c = all_consts(ctx)?;
        let remainder = |a: &Dim, b: &Dim| a.modulo(b.known().filter(|&k| k > 0)?);
        Some(vec![fold::dims_elementwise(&c, remainder, false)?])
    })
}
/// Pow keeps the base's type (input 0), so an integer base with a float exponent folds to
/// integers, truncated as a cast would.
fn fold_pow(ctx: &Ctx) -> Option<Vec<ConstValue>> {
    let out = fold_with(
        ctx,
        2..=2,
        |a| a[0].checked_pow(u32::try_from(a[1]).ok()?),
        |a| a[0].powf(a[1]),
        false,
    )?;
    match ctx.dtype(0) {
        Some(dt) if !dt.is_float() => Some(out.iter().map(|v| cast_const(v, dt)).collect()),
        _ => Some(out),
    }
}
fn fold_floor(ctx: &Ctx) -> Option<Vec<ConstValue>> {
    fold_with(ctx, 1..=1, |a| Some(a[0]), |a| a[0].floor(), false).or_else(|| whole_sizes(ctx))
}
fn fold_ceil(ctx: &Ctx) -> Option<Vec<ConstValue>> {
    fold_with(ctx, 1..=1, |a| Some(a[0]), |a| a[0].ceil(), false).or_else(|| whole_sizes(ctx))
}
/// Round halves to even, per the ONNX operator specification.
fn fold_round(ctx: &Ctx) -> Option<Vec<ConstValue>> {
    fold_with(ctx, 1..=1, |a| Some(a[0]), |a| a[0].round_ties_even(), false).or_else(|| whole_sizes(ctx))
}

/// Rounding sizes (a shape cast to float) leaves them as they are: they are whole numbers.
fn whole_sizes(ctx: &Ctx) -> Option<Vec<ConstValue>> {
    let v = ctx.konst(0)?;
    matches!(v.data, ConstData::Dims(_)).then(|| vec![v.clone()])
}
fn fold_sqrt(ctx: &Ctx) -> Option<Vec<ConstValue>> {
    fold_with(ctx, 1..=1, |_| None, |a| a[0].sqrt(), false)
}
fn fold_reciprocal(ctx: &Ctx) -> Option<Vec<ConstValue>> {
    fold_with(ctx, 1..=1, |_| None, |a| 1.0 / a[0], false)
}
/// Sign of zero is zero (f64::signum would give 1).
fn fold_sign(ctx: &Ctx) -> Option<Vec<ConstValue>> {
    fold_with(
        ctx,
        1..=1,
        |a| Some(a[0].signum()),
        |a| if a[0] == 0.0 { 0.0 } else { a[0].signum() },
        false,
    )
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
    // A size read off a shape stays a size through a cast to any type that holds every size
    // exactly (exporters cast `Shape` results to float for `Range` and to int32): symbolic
    // sizes carry on instead of turning unknown.
    if matches!(v.data, ConstData::Dims(_))
        && matches!(
            to,
            DType::F32 | DType::F64 | DType::I32 | DType::I64 | DType::U32 | DType::U64
        )
    {
        return v.clone();
    }
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
pub(super) const SOFTMAX_OPS: u64 = 3;

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
    op!("Pow", binary, E1, fold_pow),
    op!("Mod", binary, E1, fold_mod),
    op!("BitShift", bitshift, E1),
    op!("BitwiseAnd", binary, E1),
    op!("BitwiseOr", binary, E1),
    op!("BitwiseXor", binary, E1),
    op!("BitwiseNot", unary, E1),
    op!("And", binary, E1, fold_and),
    op!("Or", binary, E1, fold_or),
    op!("Xor", binary, E1, fold_xor),
    op!("Not", unary, E1, fold_not),
    op!("Equal", compare, E1, fold_equal),
    op!("Greater", compare, E1, fold_greater),
    op!("Less", compare, E1, fold_less),
    op!("GreaterOrEqual", compare, E1, fold_greater_or_equal),
    op!("LessOrEqual", compare, E1, fold_less_or_equal),
    op!("Max", binary, E1, fold_max),
    op!("Min", binary, E1, fold_min),
    op!("Sum", binary, E1, fold_sum),
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
    op!("Sqrt", unary, E1, fold_sqrt),
    op!("Reciprocal", unary, E1, fold_reciprocal),
    op!("Neg", unary, E1, fold_neg),
    op!("Abs", unary, E1, fold_abs),
    op!("Floor", unary, E1, fold_floor),
    op!("Ceil", unary, E1, fold_ceil),
    op!("Round", unary, E1, fold_round),
    op!("Sign", unary, E1, fold_sign),
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
    op!("Bernoulli", like_with_dtype, E1),
    op!("BitCast", bitcast, CostRule::Free),
    op!("RandomUniform", random, E1),
    op!("RandomNormal", random, E1),
    op!("RandomUniformLike", like_with_dtype, E1),
    op!("RandomNormalLike", like_with_dtype, E1),
    op!("Multinomial", multinomial, E1),
    // Swish of A, times B: two per element, as its function body (Swish, Mul) counts here.
    op!("SwiGLU", swiglu, CostRule::PerOutput(2)),
    // A KV-cache write: data movement only.
    op!("TensorScatter", unary, CostRule::Free),
    op!("Trilu", unary, CostRule::Free),
    op!("ReverseSequence", unary, CostRule::Free),
    op!("EyeLike", eye_like, CostRule::Free),
    op!("Scatter", unary, CostRule::Free),
    op!("ScatterElements", unary, CostRule::Free),
    op!("ScatterND", unary, CostRule::Free),
];
