//! Normalisations and the element-wise fused ops of transformer exports.

use crate::ir::{DType, Dim, Shape};

use super::util::{like_input, same_as, tensor};
use super::{CostRule, Ctx, Inferred, OpDef, CONTRIB_DOMAIN};

fn batch_norm(ctx: &Ctx) -> Inferred {
    let mut outs = vec![same_as(ctx, 0)];
    for _ in 1..ctx.outputs() {
        outs.push(tensor(ctx.dtype(1).or(ctx.dtype(0)), ctx.shape(1)));
    }
    Ok(outs.into())
}

/// LayerNormalization (opset 17): Mean and InvStdDev keep the dims before `axis`, ones after.
fn layer_norm(ctx: &Ctx) -> Inferred {
    let mut outs: super::Facts = smallvec::smallvec![same_as(ctx, 0)];
    if ctx.outputs() > 1 {
        let stash = DType::from_onnx(ctx.int("stash_type", 1) as i32);
        let stat = match ctx.dims(0) {
            Some(d) => {
                let axis = ctx.axis(ctx.int("axis", -1), d.len())?;
                let mut s: Vec<Dim> = d[..axis].to_vec();
                s.extend(std::iter::repeat_n(Dim::Known(1), d.len() - axis));
                Shape::of(s)
            }
            None => Shape::unknown(),
        };
        for _ in 1..ctx.outputs() {
            outs.push(tensor(stash, stat.clone()));
        }
    }
    Ok(outs)
}

/// Contrib-domain SkipLayerNormalization family: output, mean, inv_std_var, input+skip(+bias).
fn skip_norm(ctx: &Ctx) -> Inferred {
    let mut outs = vec![same_as(ctx, 0)];
    let stat = match ctx.dims(0) {
        Some(mut d) if !d.is_empty() => {
            let n = d.len();
            d[n - 1] = Dim::Known(1);
            Shape::of(d)
        }
        _ => Shape::unknown(),
    };
    for i in 1..ctx.outputs() {
        if i == 3 || (i == 1 && ctx.outputs() == 2 && ctx.node.op_type.starts_with("SkipSimplified")) {
            outs.push(same_as(ctx, 0));
        } else {
            outs.push(tensor(Some(DType::F32), stat.clone()));
        }
    }
    Ok(outs.into())
}

macro_rules! op {
    ($dom:expr, $name:literal, $infer:expr, $cost:expr) => {
        OpDef {
            domain: $dom,
            op: $name,
            family: "norm",
            infer: $infer,
            cost: $cost,
            fold: None,
        }
    };
}

/// Normalisations take roughly this many ops per element (mean, variance, scale, shift).
const NORM_OPS: u64 = 5;

pub static OPS: &[OpDef] = &[
    op!("", "BatchNormalization", batch_norm, CostRule::PerOutput(2)),
    op!("", "LayerNormalization", layer_norm, CostRule::PerInput(NORM_OPS)),
    op!("", "InstanceNormalization", like_input, CostRule::PerInput(NORM_OPS)),
    op!("", "GroupNormalization", like_input, CostRule::PerInput(NORM_OPS)),
    op!("", "RMSNormalization", like_input, CostRule::PerInput(4)),
    op!("", "LpNormalization", like_input, CostRule::PerInput(3)),
    op!(
        "",
        "MeanVarianceNormalization",
        like_input,
        CostRule::PerInput(NORM_OPS)
    ),
    op!("", "LRN", like_input, CostRule::PerInput(NORM_OPS)),
    op!("", "RotaryEmbedding", like_input, CostRule::PerOutput(3)),
    op!(CONTRIB_DOMAIN, "RotaryEmbedding", like_input, CostRule::PerOutput(3)),
    op!(
        CONTRIB_DOMAIN,
        "SkipLayerNormalization",
        skip_norm,
        CostRule::PerInput(NORM_OPS)
    ),
    op!(
        CONTRIB_DOMAIN,
        "SkipSimplifiedLayerNormalization",
        skip_norm,
        CostRule::PerInput(4)
    ),
    op!(
        CONTRIB_DOMAIN,
        "SimplifiedLayerNormalization",
        layer_norm,
        CostRule::PerInput(4)
    ),
    op!(
        CONTRIB_DOMAIN,
        "LayerNormalization",
        layer_norm,
        CostRule::PerInput(NORM_OPS)
    ),
    op!(CONTRIB_DOMAIN, "Gelu", like_input, CostRule::PerOutput(1)),
    op!(CONTRIB_DOMAIN, "FastGelu", like_input, CostRule::PerOutput(1)),
    op!(CONTRIB_DOMAIN, "BiasGelu", like_input, CostRule::PerOutput(2)),
    op!(CONTRIB_DOMAIN, "QuickGelu", like_input, CostRule::PerOutput(1)),
    op!(CONTRIB_DOMAIN, "BiasAdd", like_input, CostRule::PerOutput(2)),
];
