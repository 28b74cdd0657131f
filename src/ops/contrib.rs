//! Ops of the contrib domain that runtimes' graph optimisers and quantizers write into
//! deployed models (`CONTRIB_DOMAIN`): the operator-form quantized element-wise, pooling,
//! concat and Gemm ops, fused convolutions, channels-last convolution and pooling, and the
//! fused transformer front ops. Input layouts follow that domain's published operator
//! documentation (from memory; each function says which slots it reads).

use crate::ir::{DType, Dim, Fact, Shape};

use super::elementwise::{self, SOFTMAX_OPS};
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
    Ok(smallvec::smallvec![tensor(dt, Shape::of([m.clone(), n.clone()]))])
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
    let hidden = Shape::of([ids[0].clone(), ids[1].clone(), h]);
    let mut outs = vec![
        tensor(dt, hidden.clone()),
        tensor(Some(DType::I32), Shape::of([ids[0].clone()])),
    ];
    if ctx.outputs() > 2 {
        outs.push(tensor(dt, hidden));
    }
    Ok(outs.into())
}

/// GroupQueryAttention: query [B, S, hidden] (or packed QKV when key is absent), with
/// num_heads and kv_num_heads → output [B, S, num_heads·head_size]; the present key/value
/// caches are [B, kv_num_heads, L, head_size]. L is the longer of the past cache (slot 3,
/// [B, kv_num_heads, P, head_size]) and `total_sequence_length` (slot 6, an int32 scalar):
/// a cache apart from the past holds the total, one shared with it keeps its capacity.
/// Unknown while either is. Slots from the contrib domain's documentation (from memory).
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
    let length = gqa_cache_length(ctx).map_or(Dim::Unknown, Dim::Known);
    let mut outs = vec![tensor(dt, Shape::of([q[0].clone(), q[1].clone(), out_hidden]))];
    for _ in 1..ctx.outputs() {
        outs.push(tensor(
            dt,
            Shape::of([
                q[0].clone(),
                Dim::Known(kv_heads),
                length.clone(),
                head_size.map_or(Dim::Unknown, Dim::Known),
            ]),
        ));
    }
    Ok(outs.into())
}

/// The value of `total_sequence_length` (slot 6), when known.
fn gqa_total(ctx: &Ctx) -> Option<u64> {
    match ctx.const_ints(6).as_deref() {
        Some(&[t]) => u64::try_from(t).ok(),
        _ => None,
    }
}

/// The present caches' length: max(past length, total), or the total without a past.
fn gqa_cache_length(ctx: &Ctx) -> Option<u64> {
    let total = gqa_total(ctx)?;
    if !ctx.has_input(3) {
        return Some(total);
    }
    let past = ctx.shape(3).concrete()?;
    Some((*past.get(2)?).max(total))
}

/// Q·Kᵀ and A·V of every query head over the total sequence, past cache included:
/// B·S·T·2·(num_heads·head_size), T being `total_sequence_length`'s value; unknown while it
/// is.
fn gqa_macs(ctx: &Ctx, outs: &[Fact]) -> MacsOps {
    let macs = (|| {
        let y = outs.first()?.shape.element_count()?;
        y.checked_mul(gqa_total(ctx)?)?.checked_mul(2)
    })();
    (macs, Some(0))
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
        Shape::of([x[0].clone(), x[1].clone(), half]),
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

/// DecoderMaskedMultiHeadAttention, one decoding step over a key/value buffer shared with
/// the past (its documentation, from memory): output like the query [B, S, D] (the value's
/// width when a value [B, L, Dv] is given); present key and value are the past ones (slots 5
/// and 6) written in place; the optional scores are left unknown.
fn decoder_masked_mha(ctx: &Ctx) -> Inferred {
    let dt = ctx.dtype(0);
    let out = match (ctx.dims(0), ctx.has_input(2).then(|| ctx.dims(2)).flatten()) {
        (Some(q), Some(v)) if q.len() == 3 && v.len() == 3 => Shape::of([q[0].clone(), q[1].clone(), v[2].clone()]),
        _ => ctx.shape(0),
    };
    let mut outs = vec![tensor(dt, out)];
    for slot in [5, 6] {
        let shape = if ctx.has_input(slot) {
            ctx.shape(slot)
        } else {
            Shape::unknown()
        };
        outs.push(tensor(dt, shape));
    }
    fitted(ctx, outs)
}

/// `outs` cut or filled (with unknown facts) to the node's number of outputs.
fn fitted(ctx: &Ctx, mut outs: Vec<Fact>) -> Inferred {
    let n = ctx.outputs().max(1);
    outs.truncate(n);
    outs.resize_with(n, || tensor(None, Shape::unknown()));
    Ok(outs.into())
}

/// Scores and weighted sum over the past keys and the new one, B·S·T·(D + Dv) with
/// T = past_sequence_length (slot 7's value) + S; unknown while that value is.
fn decoder_masked_mha_macs(ctx: &Ctx, outs: &[Fact]) -> MacsOps {
    let macs = (|| {
        let q = ctx.shape(0).concrete()?;
        let [b, s, d] = q[..] else { return None };
        let dv = *outs.first()?.shape.concrete()?.last()?;
        let past = match ctx.const_ints(7).as_deref() {
            Some(&[p]) => u64::try_from(p).ok()?,
            _ => return None,
        };
        let t = past.checked_add(s)?;
        b.checked_mul(s)?.checked_mul(t)?.checked_mul(d.checked_add(dv)?)
    })();
    (macs, Some(0))
}

/// Output 0 like input 0, any further outputs unknown.
fn same_first(ctx: &Ctx) -> Inferred {
    fitted(ctx, vec![tensor(ctx.dtype(0), ctx.shape(0))])
}

/// BiasDropout: output like input 0, mask of bools.
fn bias_dropout(ctx: &Ctx) -> Inferred {
    let mut outs = vec![tensor(ctx.dtype(0), ctx.shape(0))];
    if ctx.outputs() > 1 {
        outs.push(tensor(Some(DType::Bool), ctx.shape(0)));
    }
    Ok(outs.into())
}

/// `ctx` read under another opset of the standard domain: contrib ops that take a standard
/// op's inputs reuse its reading, which the opset selects (Pad's pads as input 1 from opset
/// 11, Unsqueeze's axes as input 1 from 13). A contrib node's own opset is its domain's.
fn under_opset<'a>(ctx: &Ctx<'a>, opset: i64) -> Ctx<'a> {
    Ctx {
        node: ctx.node,
        inputs: ctx.inputs.clone(),
        consts: ctx.consts.clone(),
        opset,
        body_outputs: Vec::new(),
        body_consts: Vec::new(),
        loop_trips: ctx.loop_trips,
        assumed: ctx.assumed,
    }
}

/// Pad: (data, pads, value?) with `mode`, pads an input of 2·rank values (or [1, 2·rank]):
/// the standard Pad as read from opset 11.
fn contrib_pad(ctx: &Ctx) -> Inferred {
    shape_ops::pad(&under_opset(ctx, 11))
}

/// ExpandDims: (X, axis) inserts a dim of 1 at `axis` (an int32 scalar input, negative
/// counting from the end of the output): Unsqueeze with that one axis, as read from opset 13.
fn expand_dims(ctx: &Ctx) -> Inferred {
    shape_ops::unsqueeze(&under_opset(ctx, 13))
}

/// ReduceSumInteger: ReduceSum over `axes` (an attribute) of 8-bit data, summed in int32.
fn reduce_sum_integer(ctx: &Ctx) -> Inferred {
    let mut out = reduce::reduce(ctx)?;
    for f in out.iter_mut() {
        f.dtype = Some(DType::I32);
    }
    Ok(out)
}

/// MulInteger: (A, A_zero_point?, B, B_zero_point?) → (A − a_zp)·(B − b_zp), broadcast, in
/// int32.
fn mul_integer(ctx: &Ctx) -> Inferred {
    Ok(smallvec::smallvec![tensor(
        Some(DType::I32),
        broadcast(&[ctx.shape(0), ctx.shape(2)])?
    )])
}

/// CDist: A [M, K], B [N, K] → the [M, N] distances between their rows, in A's type.
fn cdist(ctx: &Ctx) -> Inferred {
    let (Some(a), Some(b)) = (ctx.dims_ref(0), ctx.dims_ref(1)) else {
        return Err("operand rank unknown".into());
    };
    let ([m, ka], [n, kb]) = (a, b) else {
        return Err(format!("2-D operands needed, got ranks {} and {}", a.len(), b.len()));
    };
    if let (Dim::Known(x), Dim::Known(y)) = (ka, kb) {
        if x != y {
            return Err(format!("row lengths differ: {x} vs {y}"));
        }
    }
    Ok(smallvec::smallvec![tensor(
        ctx.dtype(0),
        Shape::of([m.clone(), n.clone()])
    )])
}

/// CDist: a difference, a square and an accumulation per pair of elements (one MAC each,
/// K per output), and a square root per output for the euclidean metric.
fn cdist_cost(ctx: &Ctx, outs: &[Fact]) -> MacsOps {
    let y = outs.first().and_then(|f| f.shape.element_count());
    let k = ctx.shape(0).concrete().and_then(|a| a.last().copied());
    (y.zip(k).and_then(|(y, k)| y.checked_mul(k)), y)
}

/// CropAndResize: X [N, C, H, W], rois [R, 4], batch_indices [R], crop_size [2] (int32) →
/// [R, C, crop_height, crop_width]; the crop's sizes are unknown while crop_size's values are.
fn crop_and_resize(ctx: &Ctx) -> Inferred {
    let x = ctx.dims(0).ok_or("input rank unknown")?;
    if x.len() != 4 {
        return Err(format!("input of rank {}", x.len()));
    }
    let rois = ctx.dims(1).and_then(|r| r.first().cloned()).unwrap_or(Dim::Unknown);
    let (h, w) = match ctx.const_ints(3).as_deref() {
        Some(&[h, w]) if h >= 0 && w >= 0 => (Dim::Known(h as u64), Dim::Known(w as u64)),
        Some(&[_, _]) => return Err("negative crop_size".into()),
        Some(c) => return Err(format!("crop_size of {} values, 2 needed", c.len())),
        None => (Dim::Unknown, Dim::Unknown),
    };
    Ok(smallvec::smallvec![tensor(
        ctx.dtype(0),
        Shape::of([rois, x[1].clone(), h, w])
    )])
}

/// MoE and QMoE: output 0 like the tokens (input 0, [rows, hidden] or [B, S, hidden]).
/// MACs: each token runs through `k` experts (attribute, default 1), each costing one MAC per
/// element of that expert's fully connected weights. The weights are the rank-3 inputs
/// [experts, …] after the router's probabilities (slot 1); for QMoE the 8-bit inputs among
/// them, which pack 8/`expert_weight_bits` values per byte (default 4 bits). Found by rank
/// and type, not slot, because the fc1/fc2/fc3 slots moved between the contrib domain's
/// versions of these ops (its documentation, from memory).
fn moe_macs(ctx: &Ctx, _outs: &[Fact]) -> MacsOps {
    let quantized = ctx.node.op_type.as_str() == "QMoE";
    let macs = (|| {
        let x = ctx.shape(0).concrete()?;
        let hidden = *x.last()?;
        let tokens = count(&x)?.checked_div(hidden)?;
        let k = u64::try_from(ctx.int("k", 1)).ok()?;
        let mut per_expert = 0u64;
        for i in 2..ctx.node.inputs.len() {
            let Some(w) = ctx.shape(i).concrete().filter(|w| w.len() == 3) else {
                if ctx.has_input(i) && ctx.shape(i).rank() == Some(3) {
                    return None;
                }
                continue;
            };
            let packed = matches!(ctx.dtype(i), Some(DType::U8 | DType::I8));
            if quantized != packed {
                continue;
            }
            let per_byte = if quantized {
                match ctx.int("expert_weight_bits", 4) {
                    b @ (1 | 2 | 4 | 8) => 8 / b as u64,
                    _ => return None,
                }
            } else {
                1
            };
            let elems = count(&w[1..])?.checked_mul(per_byte)?;
            per_expert = per_expert.checked_add(elems)?;
        }
        (per_expert > 0).then_some(())?;
        tokens.checked_mul(k)?.checked_mul(per_expert)
    })();
    (macs, Some(0))
}

/// BeamSearch, WhisperBeamSearch, GreedySearch and Sampling: a decoding loop around the
/// decoder graph they carry. Input 0 gives the batch (token ids [batch, length], or audio
/// features [batch, mels, frames] for the speech form); `max_length` (input 1, int32 [1])
/// the length every returned sequence is padded to, and for the beam searches
/// `num_return_sequences` (input 4) how many per batch entry. Outputs: sequences (int32)
/// [batch, num_return_sequences, max_length] for the beam searches, [batch, max_length]
/// otherwise; the beam searches' sequences_scores [batch, num_return_sequences]; the others
/// (per-step scores, filtered logits, attention maps) only with their rank where the
/// documentation gives one. Slots and outputs from the contrib domain's documentation (from
/// memory). A size read from an input whose value is not known stays unknown.
fn decoding(ctx: &Ctx) -> Inferred {
    let batch = ctx.dims(0).and_then(|d| d.first().cloned()).unwrap_or(Dim::Unknown);
    let value = |i: usize| match ctx.const_ints(i).as_deref() {
        Some(&[v]) if v >= 0 => Dim::Known(v as u64),
        _ => Dim::Unknown,
    };
    let max_length = value(1);
    let beams = matches!(ctx.node.op_type.as_str(), "BeamSearch" | "WhisperBeamSearch");
    let mut outs = Vec::with_capacity(ctx.outputs());
    if beams {
        let returned = value(4);
        outs.push(tensor(
            Some(DType::I32),
            Shape::of([batch.clone(), returned.clone(), max_length]),
        ));
        outs.push(tensor(None, Shape::of([batch, returned])));
        outs.push(tensor(None, Shape::of_rank(3)));
    } else {
        outs.push(tensor(Some(DType::I32), Shape::of([batch.clone(), max_length])));
        if ctx.node.op_type.as_str() == "Sampling" {
            outs.push(tensor(None, Shape::of([batch, Dim::Unknown])));
        }
    }
    fitted(ctx, outs)
}

/// The decoder runs once per generated token and beam, which the graph does not state.
fn decoding_cost(_ctx: &Ctx, _outs: &[Fact]) -> MacsOps {
    (None, None)
}

macro_rules! op {
    (@def $name:literal, $infer:expr, $cost:expr, $fold:expr) => {
        OpDef {
            domain: CONTRIB_DOMAIN,
            op: $name,
            family: "contrib",
            infer: $infer,
            cost: $cost,
            fold: $fold,
        }
    };
    ($name:literal, $infer:expr, $cost:expr) => {
        op!(@def $name, $infer, $cost, None)
    };
    ($name:literal, $infer:expr, $cost:expr, $fold:expr) => {
        op!(@def $name, $infer, $cost, Some($fold))
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
    op!(
        "DecoderMaskedMultiHeadAttention",
        decoder_masked_mha,
        CostRule::Custom(decoder_masked_mha_macs)
    ),
    // Contrib twins of standard ops, read as the standard op reads them.
    op!("Pad", contrib_pad, CostRule::Free),
    op!("ExpandDims", expand_dims, CostRule::Free),
    op!("GatherND", shape_ops::gather_nd, CostRule::Free),
    op!("Range", shape_ops::range, CostRule::Free, shape_ops::fold_range),
    op!("MaxpoolWithMask", conv::pool, CostRule::Custom(conv::pool_ops)),
    op!("NhwcFusedConv", nhwc_conv, CostRule::Custom(nhwc_conv_macs)),
    // Integer arithmetic of dynamically quantized graphs: zero points off, then the op.
    op!("MulInteger", mul_integer, CostRule::PerOutput(3)),
    op!("ReduceSumInteger", reduce_sum_integer, CostRule::PerInput(1)),
    // Softmax over data + bias.
    op!("BiasSoftmax", like_input, CostRule::PerOutput(SOFTMAX_OPS + 1)),
    // Complex products of [..., 2] pairs: four multiplies and two adds per pair.
    op!("ComplexMul", elementwise::binary, CostRule::PerOutput(3)),
    op!("ComplexMulConj", elementwise::binary, CostRule::PerOutput(3)),
    op!("CDist", cdist, CostRule::Custom(cdist_cost)),
    // Bilinear: four reads weighted and summed per output.
    op!("CropAndResize", crop_and_resize, CostRule::PerOutput(8)),
    op!("MoE", same_first, CostRule::Custom(moe_macs)),
    op!("QMoE", same_first, CostRule::Custom(moe_macs)),
    op!("BeamSearch", decoding, CostRule::Custom(decoding_cost)),
    op!("WhisperBeamSearch", decoding, CostRule::Custom(decoding_cost)),
    op!("GreedySearch", decoding, CostRule::Custom(decoding_cost)),
    op!("Sampling", decoding, CostRule::Custom(decoding_cost)),
];
