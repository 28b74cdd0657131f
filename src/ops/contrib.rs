//! Ops of the contrib domain that runtimes' graph optimisers and quantizers write into
//! deployed models (`CONTRIB_DOMAIN`): the operator-form quantized element-wise, pooling,
//! concat and Gemm ops, fused convolutions, channels-last convolution and pooling, and the
//! fused transformer front ops. Input layouts follow that domain's published operator
//! documentation (from memory; each function says which slots it reads).

use crate::ir::{DType, Dim, Fact, Shape};

use super::util::{broadcast, count, like_input, norm_axis, tensor};
use super::{conv, matmul, reduce, shape_ops, vision, CostRule, Ctx, Inferred, MacsOps, OpDef, CONTRIB_DOMAIN};

/// QLinearAdd / QLinearMul: (A, A_scale, A_zp, B, B_scale, B_zp, C_scale, C_zp) → the
/// broadcast of A and B, in A's integer type.
fn qlinear_binary(ctx: &Ctx) -> Inferred {
    Ok(smallvec::smallvec![tensor(
        ctx.dtype(0),
        broadcast(&[ctx.shape(0), ctx.shape(3)])?
    )])
}

/// QLinearGlobalAveragePool: [N, C, D…] → [N, C, 1…], or [N, D…, C] → [N, 1…, C] with
/// `channels_last`.
fn qlinear_global_pool(ctx: &Ctx) -> Inferred {
    let x = ctx.dims(0).ok_or("input rank unknown")?;
    if x.len() < 3 {
        return Err(format!("input of rank {}", x.len()));
    }
    let out: Vec<Dim> = if ctx.int("channels_last", 0) != 0 {
        let mut o = vec![x[0].clone()];
        o.extend(std::iter::repeat_n(Dim::Known(1), x.len() - 2));
        o.push(x[x.len() - 1].clone());
        o
    } else {
        let mut o = vec![x[0].clone(), x[1].clone()];
        o.extend(std::iter::repeat_n(Dim::Known(1), x.len() - 2));
        o
    };
    Ok(smallvec::smallvec![tensor(ctx.dtype(0), Shape::of(out))])
}

/// The NCHW view of a channels-last tensor [N, D…, C], and back.
fn to_channels_first(x: &[Dim]) -> Vec<Dim> {
    let mut o = vec![x[0].clone(), x[x.len() - 1].clone()];
    o.extend(x[1..x.len() - 1].iter().cloned());
    o
}

fn to_channels_last(x: &[Dim]) -> Vec<Dim> {
    let mut o = vec![x[0].clone()];
    o.extend(x[2..].iter().cloned());
    o.push(x[1].clone());
    o
}

/// The spatial output dims of a window op over `x` in NCHW layout.
fn spatial(ctx: &Ctx, x: &[Dim], kernel: Option<Vec<u64>>, ceil_mode: bool) -> Result<Vec<Dim>, String> {
    let win = conv::window(ctx, x.len() - 2, kernel)?;
    conv::conv_spatial(ctx, x, &win, ceil_mode)
}

/// QLinearAveragePool: AveragePool over X (input 0), in X's type; `channels_last` allowed.
fn qlinear_average_pool(ctx: &Ctx) -> Inferred {
    let x = ctx.dims(0).ok_or("input rank unknown")?;
    if x.len() < 3 {
        return Err(format!("input of rank {}", x.len()));
    }
    let last = ctx.int("channels_last", 0) != 0;
    let nchw = if last { to_channels_first(&x) } else { x.clone() };
    let mut out = vec![nchw[0].clone(), nchw[1].clone()];
    out.extend(spatial(ctx, &nchw, None, ctx.int("ceil_mode", 0) != 0)?);
    let out = if last { to_channels_last(&out) } else { out };
    Ok(smallvec::smallvec![tensor(ctx.dtype(0), Shape::of(out))])
}

/// NhwcMaxPool: MaxPool over a channels-last X.
fn nhwc_max_pool(ctx: &Ctx) -> Inferred {
    let x = ctx.dims(0).ok_or("input rank unknown")?;
    if x.len() < 3 {
        return Err(format!("input of rank {}", x.len()));
    }
    let nchw = to_channels_first(&x);
    let mut out = vec![nchw[0].clone(), nchw[1].clone()];
    out.extend(spatial(ctx, &nchw, None, ctx.int("ceil_mode", 0) != 0)?);
    Ok(smallvec::smallvec![tensor(
        ctx.dtype(0),
        Shape::of(to_channels_last(&out))
    )])
}

/// NhwcConv: X [N, D…, C], W [M, C/group, k…] → [N, O…, M].
fn nhwc_conv(ctx: &Ctx) -> Inferred {
    let x = ctx.dims(0).ok_or("input rank unknown")?;
    if x.len() < 3 {
        return Err(format!("input of rank {}", x.len()));
    }
    let nchw = to_channels_first(&x);
    let w = ctx.dims(1);
    let kernel = w
        .as_ref()
        .and_then(|w| w.get(2..).map(|k| k.iter().map(Dim::known).collect::<Option<Vec<_>>>()))
        .flatten();
    let mut out = vec![
        nchw[0].clone(),
        w.as_ref().and_then(|w| w.first().cloned()).unwrap_or(Dim::Unknown),
    ];
    out.extend(spatial(ctx, &nchw, kernel, false)?);
    Ok(smallvec::smallvec![tensor(
        ctx.dtype(0),
        Shape::of(to_channels_last(&out))
    )])
}

/// QLinearConcat: (Y_scale, Y_zp, then X, X_scale, X_zp per input) → concat of the X along
/// `axis`, in Y_zp's type.
fn qlinear_concat(ctx: &Ctx) -> Inferred {
    let shapes: Vec<Option<Vec<Dim>>> = (2..ctx.node.inputs.len()).step_by(3).map(|i| ctx.dims(i)).collect();
    let shape = shape_ops::concat_shape(&shapes, ctx.int("axis", 0))?;
    Ok(smallvec::smallvec![tensor(ctx.dtype(1).or(ctx.dtype(2)), shape)])
}

/// QGemm: (A, a_scale, a_zp, B, b_scale, b_zp, C?, y_scale?, y_zp?) with transA/transB →
/// [M, N]; y_zp's type when the output is quantized, else float32.
fn qgemm(ctx: &Ctx) -> Inferred {
    let (Some(a), Some(b)) = (ctx.dims(0), ctx.dims(3)) else {
        return Err("operand rank unknown".into());
    };
    if a.len() != 2 || b.len() != 2 {
        return Err(format!("2-D operands needed, got ranks {} and {}", a.len(), b.len()));
    }
    let m = if ctx.int("transA", 0) != 0 { &a[1] } else { &a[0] };
    let n = if ctx.int("transB", 0) != 0 { &b[0] } else { &b[1] };
    let dt = if ctx.has_input(7) {
        ctx.dtype(8).or(Some(DType::U8))
    } else {
        Some(DType::F32)
    };
    Ok(smallvec::smallvec![tensor(dt, Shape::of(vec![m.clone(), n.clone()]))])
}

/// NhwcConv MACs: every output element takes (C/group)·∏kernel, W being [M, C/group, k…].
fn nhwc_conv_macs(ctx: &Ctx, outs: &[Fact]) -> MacsOps {
    let macs = (|| {
        let y = outs.first()?.shape.concrete()?;
        let w = ctx.shape(1).concrete()?;
        count(&y)?.checked_mul(count(w.get(1..)?)?)
    })();
    (macs, Some(0))
}

/// EmbedLayerNormalization: input_ids [B, S], segment_ids, word_embedding [V, H], … →
/// output [B, S, H] in the embedding's type, mask_index [B] int32, embedding_sum [B, S, H].
fn embed_layer_norm(ctx: &Ctx) -> Inferred {
    let ids = ctx.dims(0).ok_or("input_ids rank unknown")?;
    if ids.len() != 2 {
        return Err(format!("input_ids of rank {}", ids.len()));
    }
    let h = ctx.dims(2).and_then(|w| w.get(1).cloned()).unwrap_or(Dim::Unknown);
    let dt = ctx.dtype(2);
    let hidden = Shape::of(vec![ids[0].clone(), ids[1].clone(), h]);
    let mut outs = vec![
        tensor(dt, hidden.clone()),
        tensor(Some(DType::I32), Shape::of(vec![ids[0].clone()])),
    ];
    if ctx.outputs() > 2 {
        outs.push(tensor(dt, hidden));
    }
    Ok(outs.into())
}

/// GroupQueryAttention: query [B, S, hidden] (or packed QKV when key is absent), with
/// num_heads and kv_num_heads → output [B, S, num_heads·head_size]; the present key/value
/// caches are [B, kv_num_heads, total, head_size] with total known only from past + S.
fn group_query_attention(ctx: &Ctx) -> Inferred {
    let q = ctx.dims(0).ok_or("query rank unknown")?;
    if q.len() != 3 {
        return Err(format!("query of rank {}", q.len()));
    }
    let heads = ctx.int("num_heads", 0).max(0) as u64;
    let kv_heads = ctx.int("kv_num_heads", 0).max(0) as u64;
    let head_size = match &q[2] {
        Dim::Known(h) if ctx.has_input(1) && heads > 0 => Some(h / heads),
        Dim::Known(h) if heads + 2 * kv_heads > 0 => Some(h / (heads + 2 * kv_heads)),
        _ => None,
    };
    let out_hidden = head_size.map_or(Dim::Unknown, |d| Dim::Known(d * heads));
    let dt = ctx.dtype(0);
    let mut outs = vec![tensor(dt, Shape::of(vec![q[0].clone(), q[1].clone(), out_hidden]))];
    for _ in 1..ctx.outputs() {
        outs.push(tensor(
            dt,
            Shape::of(vec![
                q[0].clone(),
                Dim::Known(kv_heads),
                Dim::Unknown,
                head_size.map_or(Dim::Unknown, Dim::Known),
            ]),
        ));
    }
    Ok(outs.into())
}

/// Q·Kᵀ and A·V run over the total sequence, past cache included, which the graph does
/// not state: unknown.
fn gqa_macs(_ctx: &Ctx, _outs: &[Fact]) -> MacsOps {
    (None, None)
}

/// BiasSplitGelu: [N, HW, D] → [N, HW, D/2].
fn bias_split_gelu(ctx: &Ctx) -> Inferred {
    let x = ctx.dims(0).ok_or("input rank unknown")?;
    if x.len() != 3 {
        return Err(format!("input of rank {}", x.len()));
    }
    let half = match x[2] {
        Dim::Known(d) => Dim::Known(d / 2),
        _ => Dim::Unknown,
    };
    Ok(smallvec::smallvec![tensor(
        ctx.dtype(0),
        Shape::of(vec![x[0].clone(), x[1].clone(), half]),
    )])
}

/// QLinearWhere: (condition, X, x_scale, x_zp, Y, y_scale, y_zp, z_scale, z_zp) → the
/// broadcast of condition, X and Y, in z_zp's type (X's when z_zp is absent).
fn qlinear_where(ctx: &Ctx) -> Inferred {
    Ok(smallvec::smallvec![tensor(
        ctx.dtype(8).or(ctx.dtype(1)),
        broadcast(&[ctx.shape(0), ctx.shape(1), ctx.shape(4)])?
    )])
}

/// GatherBlockQuantized: (data, indices, scales, zero_points?) with `gather_axis` (default
/// 0), `quantize_axis` (default 1), `block_size` and `bits` (default 4) → Gather over the
/// dequantized data, in the scales' type. A `uint8` data packs 8/bits values per byte along
/// `quantize_axis` (its last axis); `int4`/`uint4` data are not packed in the shape. Slots,
/// defaults and packing from the contrib domain's documentation (from memory).
fn gather_block_quantized(ctx: &Ctx) -> Inferred {
    let dt = ctx.dtype(2);
    let (Some(mut d), Some(idx)) = (ctx.dims(0), ctx.dims(1)) else {
        return Ok(smallvec::smallvec![tensor(dt, Shape::unknown())]);
    };
    let rank = d.len();
    let bits = ctx.int("bits", 4);
    if ctx.dtype(0) == Some(DType::U8) && (1..8).contains(&bits) && 8 % bits == 0 {
        let q = norm_axis(ctx.int("quantize_axis", 1), rank).ok_or("quantize_axis out of range")?;
        d[q] = d[q].mul(&Dim::Known((8 / bits) as u64)).ok_or("packed dim overflows")?;
    }
    let axis = norm_axis(ctx.int("gather_axis", 0), rank).ok_or("gather_axis out of range")?;
    Ok(smallvec::smallvec![tensor(dt, shape_ops::gather_shape(&d, idx, axis))])
}

/// Output 0 (and every other output) like input 0: fused element-wise and normalisation ops.
fn same(ctx: &Ctx) -> Inferred {
    Ok((0..ctx.outputs().max(1))
        .map(|_| tensor(ctx.dtype(0), ctx.shape(0)))
        .collect())
}

/// BiasDropout: output like input 0, mask of bools.
fn bias_dropout(ctx: &Ctx) -> Inferred {
    let mut outs = vec![tensor(ctx.dtype(0), ctx.shape(0))];
    if ctx.outputs() > 1 {
        outs.push(tensor(Some(DType::Bool), ctx.shape(0)));
    }
    Ok(outs.into())
}

macro_rules! op {
    ($name:literal, $infer:expr, $cost:expr) => {
        OpDef {
            domain: CONTRIB_DOMAIN,
            op: $name,
            family: "contrib",
            infer: $infer,
            cost: $cost,
            fold: None,
        }
    };
}

pub static OPS: &[OpDef] = &[
    op!("QLinearAdd", qlinear_binary, CostRule::PerOutput(4)),
    op!("QLinearMul", qlinear_binary, CostRule::PerOutput(4)),
    // QLinearSigmoid, QLinearLeakyRelu, QLinearSoftmax: (X, X_scale, X_zp, Y_scale, Y_zp) →
    // X's shape and type.
    op!("QLinearSigmoid", like_input, CostRule::PerOutput(4)),
    op!("QLinearLeakyRelu", like_input, CostRule::PerOutput(3)),
    op!("QLinearSoftmax", like_input, CostRule::PerOutput(5)),
    op!("QLinearGlobalAveragePool", qlinear_global_pool, CostRule::PerInput(1)),
    op!(
        "QLinearAveragePool",
        qlinear_average_pool,
        CostRule::Custom(conv::pool_ops)
    ),
    op!("QLinearConcat", qlinear_concat, CostRule::PerOutput(2)),
    // Dequantize both operands, select, requantize.
    op!("QLinearWhere", qlinear_where, CostRule::PerOutput(5)),
    // QLinearConvTranspose: QLinearConv's slots (x, x_scale, x_zp, w, w_scale, w_zp,
    // y_scale, y_zp, B) around ConvTranspose.
    op!(
        "QLinearConvTranspose",
        conv::conv_transpose,
        CostRule::Custom(conv::conv_transpose_macs)
    ),
    // One multiply and one subtraction per element gathered.
    op!("GatherBlockQuantized", gather_block_quantized, CostRule::PerOutput(2)),
    op!("QLinearReduceMean", reduce::reduce, CostRule::PerInput(1)),
    // QGemm's A is slot 0 as in Gemm, so Gemm's count (outputs × K) applies.
    op!("QGemm", qgemm, CostRule::Custom(matmul::gemm_macs)),
    op!("FusedConv", conv::conv, CostRule::Custom(conv::conv_macs)),
    // FusedGemm: Gemm (A, B, C) with a fused activation.
    op!("FusedGemm", matmul::gemm, CostRule::Custom(matmul::gemm_macs)),
    op!("NhwcConv", nhwc_conv, CostRule::Custom(nhwc_conv_macs)),
    op!("NhwcMaxPool", nhwc_max_pool, CostRule::PerOutput(1)),
    op!("GridSample", vision::grid_sample, CostRule::PerOutput(8)),
    op!("EmbedLayerNormalization", embed_layer_norm, CostRule::PerOutput(8)),
    op!("GroupQueryAttention", group_query_attention, CostRule::Custom(gqa_macs)),
    op!("BiasSplitGelu", bias_split_gelu, CostRule::PerOutput(3)),
    op!("BiasDropout", bias_dropout, CostRule::PerOutput(2)),
    op!("GroupNorm", same, CostRule::PerInput(5)),
    op!("SkipGroupNorm", same, CostRule::PerInput(6)),
    op!("Inverse", same, CostRule::PerInput(8)),
    op!("Trilu", same, CostRule::Free),
    op!("DecoderMaskedMultiHeadAttention", same, CostRule::PerOutput(4)),
];
