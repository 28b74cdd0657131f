//! Contractions: MatMul (numpy semantics), Gemm, Einsum, and attention ops.

use std::collections::BTreeMap;

use crate::ir::{DType, Dim, DimVec, Fact, Shape};

use super::util::{broadcast, broadcast_dims, count, tensor};
use super::{CostRule, Ctx, Inferred, MacsOps, OpDef, CONTRIB_DOMAIN};

/// (A, B) input slots and output dtype of each matmul-like op.
fn ab(ctx: &Ctx) -> (usize, usize, Option<DType>) {
    match ctx.node.op_type.as_str() {
        "QLinearMatMul" => (0, 3, ctx.dtype(7)),
        "MatMulInteger" | "MatMulInteger16" => (0, 1, Some(DType::I32)),
        "MatMulIntegerToFloat" | "DynamicQuantizeMatMul" => (0, 1, Some(DType::F32)),
        _ => (0, 1, ctx.dtype(0)),
    }
}

/// numpy matmul shape: 1-D operands are promoted and the added dim removed afterwards.
pub fn matmul_shape(a: &[Dim], b: &[Dim]) -> Result<DimVec, String> {
    // A 1-D operand is a row (A) or a column (B) whose added dim is dropped again: its inner
    // dim is its only one and it has no batch dims.
    let (m, ka, a_batch) = match a {
        [k] => (None, k, &[][..]),
        [batch @ .., m, k] => (Some(m), k, batch),
        [] => return Err("MatMul of a scalar".into()),
    };
    let (kb, n, b_batch) = match b {
        [k] => (k, None, &[][..]),
        [batch @ .., k, n] => (k, Some(n), batch),
        [] => return Err("MatMul of a scalar".into()),
    };
    if let (Dim::Known(x), Dim::Known(y)) = (ka, kb) {
        if x != y {
            return Err(format!("inner dims differ: {x} vs {y}"));
        }
    }
    // Multidirectional broadcasting of the batch dims, aligned at the right.
    let mut out = broadcast_dims([a_batch, b_batch].into_iter(), 2)?;
    out.extend(m.cloned());
    out.extend(n.cloned());
    Ok(out)
}

fn matmul(ctx: &Ctx) -> Inferred {
    let (ia, ib, dt) = ab(ctx);
    let (Some(a), Some(b)) = (ctx.dims_ref(ia), ctx.dims_ref(ib)) else {
        return Err("operand rank unknown".into());
    };
    Ok(smallvec::smallvec![tensor(dt, Shape::of(matmul_shape(a, b)?))])
}

fn matmul_macs(ctx: &Ctx, outs: &[Fact]) -> MacsOps {
    let (ia, _, _) = ab(ctx);
    let macs = (|| {
        let y = outs.first()?.shape.element_count()?;
        // Every dim of A known, not only the inner one: a symbolic batch dim of A that the
        // broadcast settled against B's is counted once its value is set, as any other.
        let a = ctx.dims_ref(ia)?;
        if !a.iter().all(|d| d.known().is_some()) {
            return None;
        }
        y.checked_mul(a.last()?.known()?)
    })();
    (macs, Some(0))
}

pub(super) fn gemm(ctx: &Ctx) -> Inferred {
    let (Some(a), Some(b)) = (ctx.dims(0), ctx.dims(1)) else {
        return Err("operand rank unknown".into());
    };
    if a.len() != 2 || b.len() != 2 {
        return Err(format!(
            "Gemm needs 2-D operands, got ranks {} and {}",
            a.len(),
            b.len()
        ));
    }
    let m = if ctx.int("transA", 0) != 0 {
        a[1].clone()
    } else {
        a[0].clone()
    };
    let n = if ctx.int("transB", 0) != 0 {
        b[0].clone()
    } else {
        b[1].clone()
    };
    Ok(smallvec::smallvec![tensor(ctx.dtype(0), Shape::of([m, n]))])
}

pub(super) fn gemm_macs(ctx: &Ctx, outs: &[Fact]) -> MacsOps {
    let y = outs.first().and_then(|f| f.shape.element_count());
    let macs = (|| {
        let a = ctx.shape(0).concrete()?;
        let k = if ctx.int("transA", 0) != 0 {
            a.first()?
        } else {
            a.get(1)?
        };
        y?.checked_mul(*k)
    })();
    (macs, y)
}

/// A parsed Einsum equation: one term per input, the output term; '.' stands for the ellipsis.
struct Equation {
    inputs: Vec<Vec<char>>,
    output: Vec<char>,
}

fn parse_equation(eq: &str, n_inputs: usize) -> Result<Equation, String> {
    let eq: String = eq
        .chars()
        .filter(|c| !c.is_whitespace())
        .collect::<String>()
        .replace("...", ".");
    let (lhs, rhs) = match eq.split_once("->") {
        Some((l, r)) => (l.to_string(), Some(r.to_string())),
        None => (eq.clone(), None),
    };
    let inputs: Vec<Vec<char>> = lhs.split(',').map(|t| t.chars().collect()).collect();
    if inputs.len() != n_inputs {
        return Err(format!("equation has {} terms for {} inputs", inputs.len(), n_inputs));
    }
    let output = match rhs {
        Some(r) => r.chars().collect(),
        None => {
            // Implicit mode: ellipsis first, then letters that occur once, alphabetically.
            let mut counts: BTreeMap<char, usize> = BTreeMap::new();
            for t in &inputs {
                for &c in t {
                    *counts.entry(c).or_default() += 1;
                }
            }
            let mut out = Vec::new();
            if counts.contains_key(&'.') {
                out.push('.');
            }
            out.extend(counts.iter().filter(|(c, n)| **c != '.' && **n == 1).map(|(c, _)| *c));
            out
        }
    };
    Ok(Equation { inputs, output })
}

/// An equation with each letter's size and the broadcast ellipsis dims.
type EinsumSizes = (Equation, BTreeMap<char, Dim>, Vec<Dim>);

fn einsum_sizes(ctx: &Ctx) -> Result<EinsumSizes, String> {
    let n = ctx.node.inputs.len();
    let eq = parse_equation(&ctx.string("equation").ok_or("Einsum without equation")?, n)?;
    let mut sizes: BTreeMap<char, Dim> = BTreeMap::new();
    let mut ellipsis = Shape::of(Vec::new());
    for (i, term) in eq.inputs.iter().enumerate() {
        let dims = ctx.dims(i).ok_or("operand rank unknown")?;
        let letters = term.iter().filter(|&&c| c != '.').count();
        if dims.len() < letters {
            return Err(format!(
                "operand {i} has rank {} for term of {} letters",
                dims.len(),
                letters
            ));
        }
        let ell_rank = dims.len() - letters;
        let mut pos = 0;
        for &c in term {
            if c == '.' {
                ellipsis = broadcast(&[ellipsis, Shape::of(&dims[pos..pos + ell_rank])])?;
                pos += ell_rank;
            } else {
                let d = &dims[pos];
                match sizes.get(&c) {
                    Some(Dim::Known(1)) | None => {
                        sizes.insert(c, d.clone());
                    }
                    Some(Dim::Known(_)) | Some(Dim::Sym(_)) => {}
                    Some(Dim::Unknown) => {
                        sizes.insert(c, d.clone());
                    }
                }
                pos += 1;
            }
        }
    }
    Ok((eq, sizes, ellipsis.dims().map(<[Dim]>::to_vec).unwrap_or_default()))
}

fn einsum(ctx: &Ctx) -> Inferred {
    let (eq, sizes, ell) = einsum_sizes(ctx)?;
    let mut out = Vec::new();
    for c in &eq.output {
        if *c == '.' {
            out.extend(ell.iter().cloned());
        } else {
            out.push(
                sizes
                    .get(c)
                    .cloned()
                    .ok_or_else(|| format!("output letter {c} not in any input"))?,
            );
        }
    }
    Ok(smallvec::smallvec![tensor(ctx.dtype(0), Shape::of(out))])
}

fn einsum_macs(ctx: &Ctx, _outs: &[Fact]) -> MacsOps {
    let macs = (|| {
        let (_, sizes, ell) = einsum_sizes(ctx).ok()?;
        let mut all: Vec<u64> = sizes.values().map(Dim::known).collect::<Option<_>>()?;
        all.extend(ell.iter().map(Dim::known).collect::<Option<Vec<_>>>()?);
        count(&all)
    })();
    (macs, Some(0))
}

/// ONNX Attention (opset 23): Q, K, V as 3-D [B, S, H·D] or 4-D [B, H, S, D].
fn attention(ctx: &Ctx) -> Inferred {
    let q = ctx.dims(0).ok_or("Q rank unknown")?;
    let k = ctx.dims(1).ok_or("K rank unknown")?;
    let v = ctx.dims(2).ok_or("V rank unknown")?;
    let dt = ctx.dtype(0);
    let past = if ctx.has_input(4) { ctx.dims(4) } else { None };
    let (y, kv_heads, kv_len, head_k, head_v, q_heads, q_len) = match (q.len(), k.len(), v.len()) {
        (4, 4, 4) => (
            vec![q[0].clone(), q[1].clone(), q[2].clone(), v[3].clone()],
            k[1].clone(),
            k[2].clone(),
            k[3].clone(),
            v[3].clone(),
            q[1].clone(),
            q[2].clone(),
        ),
        (3, 3, 3) => {
            let qh = ctx.opt_int("q_num_heads").ok_or("3-D Attention without q_num_heads")?;
            let kvh = ctx
                .opt_int("kv_num_heads")
                .ok_or("3-D Attention without kv_num_heads")?;
            let per = |d: &Dim, h: i64| match d {
                Dim::Known(x) if h > 0 => Dim::Known(x / h as u64),
                _ => Dim::Unknown,
            };
            let vh = per(&v[2], kvh);
            let y_last = vh.mul(&Dim::Known(qh.max(0) as u64)).unwrap_or(Dim::Unknown);
            (
                vec![q[0].clone(), q[1].clone(), y_last],
                Dim::Known(kvh.max(0) as u64),
                k[1].clone(),
                per(&k[2], kvh),
                vh,
                Dim::Known(qh.max(0) as u64),
                q[1].clone(),
            )
        }
        _ => return Err(format!("Q, K, V of ranks {}, {}, {}", q.len(), k.len(), v.len())),
    };
    let total = match &past {
        Some(p) if p.len() == 4 => p[2].add(&kv_len).unwrap_or(Dim::Unknown),
        _ => kv_len.clone(),
    };
    let mut outs = vec![tensor(dt, Shape::of(y))];
    let batch = q[0].clone();
    if ctx.outputs() > 1 {
        outs.push(tensor(
            dt,
            Shape::of([batch.clone(), kv_heads.clone(), total.clone(), head_k]),
        ));
    }
    if ctx.outputs() > 2 {
        outs.push(tensor(dt, Shape::of([batch.clone(), kv_heads, total.clone(), head_v])));
    }
    if ctx.outputs() > 3 {
        outs.push(tensor(dt, Shape::of([batch, q_heads, q_len, total])));
    }
    Ok(outs.into())
}

fn attention_macs(ctx: &Ctx, outs: &[Fact]) -> MacsOps {
    let macs = (|| {
        let y = outs.first()?.shape.element_count()?;
        let q = ctx.shape(0).concrete()?;
        let k = ctx.shape(1).concrete()?;
        // Scores: B·Hq·Sq·Skv·Dqk; weighted sum: B·Hq·Sq·Skv·Dv = |Y|·Skv.
        // With a cache, the scores span the past keys too: Skv = past + new.
        let new_kv = *k.get(if k.len() == 4 { 2 } else { 1 })?;
        let past = if ctx.has_input(4) {
            ctx.shape(4).concrete()?.get(2).copied()?
        } else {
            0
        };
        let (q_elems, skv) = (count(&q)?, new_kv.checked_add(past)?);
        q_elems.checked_mul(skv)?.checked_add(y.checked_mul(skv)?)
    })();
    (
        macs,
        outs.first()
            .and_then(|f| f.shape.element_count())
            .and_then(|y| y.checked_mul(3)),
    )
}

/// The domain of operators the ONNX project has in preview (FlexAttention).
pub const PREVIEW_DOMAIN: &str = "ai.onnx.preview";

/// FlexAttention (`ai.onnx.preview`, version 1): Q [B, Hq, L, D], K [B, Hkv, S, D] and
/// V [B, Hkv, S, Dv], all rank 4, give Y [B, Hq, L, Dv] (ONNX operator specification). Its
/// optional `score_mod` and `prob_mod` bodies each take and give the [B, Hq, L, S] scores;
/// the driver seeds them (`flex_scores`) and adds their cost once each. MACs as Attention's.
fn flex_attention(ctx: &Ctx) -> Inferred {
    let q = ctx.dims_ref(0).ok_or("Q rank unknown")?;
    let k = ctx.dims_ref(1).ok_or("K rank unknown")?;
    let v = ctx.dims_ref(2).ok_or("V rank unknown")?;
    if q.len() != 4 || k.len() != 4 || v.len() != 4 {
        return Err(format!(
            "Q, K, V of ranks {}, {}, {}; FlexAttention takes rank 4",
            q.len(),
            k.len(),
            v.len()
        ));
    }
    let y = vec![q[0].clone(), q[1].clone(), q[2].clone(), v[3].clone()];
    Ok(smallvec::smallvec![tensor(ctx.dtype(0), Shape::of(y))])
}

/// The fact a FlexAttention body's input has: the scores [B, Hq, L, S], of the element type
/// `softmax_precision` names (float32 by default, double for double inputs).
pub fn flex_scores(node: &crate::ir::Node, inputs: &[Fact]) -> Fact {
    let dims = |i: usize| inputs.get(i).and_then(|f| f.shape.dims());
    let shape = match (dims(0), dims(1)) {
        (Some(q), Some(k)) if q.len() == 4 && k.len() == 4 => {
            Shape::of([q[0].clone(), q[1].clone(), q[2].clone(), k[2].clone()])
        }
        _ => Shape::unknown(),
    };
    let dtype = match node.attr("softmax_precision") {
        Some(crate::ir::AttrValue::Int(t)) => crate::ir::DType::from_onnx(*t as i32),
        _ => match inputs.first().and_then(|f| f.dtype) {
            Some(crate::ir::DType::F64) => Some(crate::ir::DType::F64),
            _ => Some(crate::ir::DType::F32),
        },
    };
    tensor(dtype, shape)
}

/// LinearAttention (opset 27): query (B, T, Hq·dk), key (B, T, ·), value (B, T, Hkv·dv), an
/// optional past state (B, Hkv, dk, dv); the output is (B, T, Hq·dv) and the present state
/// has the past state's shape (ONNX operator specification, LinearAttention-27).
fn linear_attention(ctx: &Ctx) -> Inferred {
    let q = ctx.dims(0).ok_or("query rank unknown")?;
    let v = ctx.dims(2).ok_or("value rank unknown")?;
    if q.len() != 3 || v.len() != 3 {
        return Err(format!(
            "query and value of ranks {}, {}; expected 3 (packed heads)",
            q.len(),
            v.len()
        ));
    }
    let heads = |name: &str| -> Result<u64, String> {
        let h = ctx.opt_int(name).ok_or_else(|| format!("no `{name}`"))?;
        u64::try_from(h)
            .ok()
            .filter(|&h| h > 0)
            .ok_or_else(|| format!("`{name}` is {h}"))
    };
    linear_attention_rule(ctx)?;
    let (qh, kvh) = (heads("q_num_heads")?, heads("kv_num_heads")?);
    if qh % kvh != 0 {
        return Err(format!("q_num_heads {qh} is not a multiple of kv_num_heads {kvh}"));
    }
    let per_head = |d: &Dim, h: u64| match d {
        Dim::Known(x) if x % h == 0 => Ok(Dim::Known(x / h)),
        Dim::Known(x) => Err(format!("last dim {x} does not split into {h} heads")),
        _ => Ok(Dim::Unknown),
    };
    let (dk, dv) = (per_head(&q[2], qh)?, per_head(&v[2], kvh)?);
    let y_last = dv.mul(&Dim::Known(qh)).unwrap_or(Dim::Unknown);
    let mut outs = vec![tensor(ctx.dtype(0), Shape::of([q[0].clone(), q[1].clone(), y_last]))];
    if ctx.outputs() > 1 {
        let state = match ctx.dims(3) {
            Some(p) if ctx.has_input(3) => Shape::of(p),
            _ => Shape::of([q[0].clone(), Dim::Known(kvh), dk, dv]),
        };
        outs.push(tensor(ctx.dtype(3).or(ctx.dtype(0)), state));
    }
    Ok(outs.into())
}

/// The recurrence a LinearAttention node runs: (gated, delta). `gated_delta` by default, as
/// the operator specification has it; any other name is an error, not a guess.
fn linear_attention_rule(ctx: &Ctx) -> Result<(bool, bool), String> {
    match ctx.string("update_rule").as_deref().unwrap_or("gated_delta") {
        "linear" => Ok((false, false)),
        "gated" => Ok((true, false)),
        "delta" => Ok((false, true)),
        "gated_delta" => Ok((true, true)),
        other => Err(format!("unknown update_rule `{other}`")),
    }
}

/// Per token, counted as the operator's function body counts them (checked against the
/// conformance models' expanded forms): each KV head adds k⊗v into its dk×dv state (MACs),
/// the delta rules first take the state–key product (MACs) and subtract and scale it (2·dv
/// ops), the gated rules decay the state (dk·dv ops, plus one exp per decay element), and each
/// query head reads the state out (dk·dv MACs) and scales it (dv ops).
fn linear_attention_macs(ctx: &Ctx, _outs: &[Fact]) -> MacsOps {
    let figures = (|| {
        let q = ctx.shape(0).concrete()?;
        let v = ctx.shape(2).concrete()?;
        let qh = u64::try_from(ctx.opt_int("q_num_heads")?).ok()?;
        let kvh = u64::try_from(ctx.opt_int("kv_num_heads")?).ok()?;
        let (dk, dv) = (q.get(2)?.checked_div(qh)?, v.get(2)?.checked_div(kvh)?);
        let tokens = q.first()?.checked_mul(*q.get(1)?)?;
        let (gated, delta) = linear_attention_rule(ctx).ok()?;
        let state = kvh.checked_mul(dk)?.checked_mul(dv)?;
        let macs = state
            .checked_mul(if delta { 2 } else { 1 })?
            .checked_add(qh.checked_mul(dk)?.checked_mul(dv)?)?;
        let mut ops = state.checked_add(qh.checked_mul(dv)?)?;
        if delta {
            ops = ops.checked_add(kvh.checked_mul(dv)?.checked_mul(2)?)?;
        }
        if gated {
            let decay = ctx.shape(4).concrete()?.last().copied()?;
            ops = ops.checked_add(state)?.checked_add(decay)?;
        }
        Some((tokens.checked_mul(macs)?, tokens.checked_mul(ops)?))
    })();
    (figures.map(|f| f.0), figures.map(|f| f.1))
}

/// The contrib domain's Attention and QAttention (its documentation, from memory): input
/// [B, S, input_hidden] projected by weights [input_hidden, Dq + Dk + Dv] (three equal widths
/// unless `qkv_hidden_sizes` gives them); a past of keys and values [2, B, N, P, Dk/N]
/// (Attention's slot 4, QAttention's 8) in front of the new ones. Output [B, S, Dv]; present
/// [2, B, N, P + S, Dk/N], or the past's own shape when `past_present_share_buffer` is set.
struct ProjectedAttention {
    x: Vec<Dim>,
    widths: [Dim; 3],
    past: Option<Vec<Dim>>,
}

fn projected_attention(ctx: &Ctx) -> Result<ProjectedAttention, String> {
    let x = ctx.dims(0).ok_or("input rank unknown")?;
    if x.len() != 3 {
        return Err(format!("input of rank {}", x.len()));
    }
    let widths = match ctx.ints("qkv_hidden_sizes").as_deref() {
        Some(&[q, k, v]) if q >= 0 && k >= 0 && v >= 0 => [q, k, v].map(|w| Dim::Known(w as u64)),
        Some(_) => return Err("qkv_hidden_sizes needs three sizes".into()),
        None => {
            let w = match ctx.dims(1).as_deref() {
                Some([_, Dim::Known(n)]) if n % 3 == 0 => Dim::Known(n / 3),
                _ => Dim::Unknown,
            };
            [w.clone(), w.clone(), w]
        }
    };
    let slot = if ctx.node.op_type.as_str() == "QAttention" {
        8
    } else {
        4
    };
    let past = ctx.has_input(slot).then(|| ctx.dims(slot)).flatten();
    Ok(ProjectedAttention { x, widths, past })
}

fn ms_attention(ctx: &Ctx) -> Inferred {
    let a = projected_attention(ctx)?;
    let dt = ctx.dtype(0);
    let mut outs = vec![tensor(
        dt,
        Shape::of([a.x[0].clone(), a.x[1].clone(), a.widths[2].clone()]),
    )];
    if ctx.outputs() > 1 {
        let present = match &a.past {
            Some(p) if ctx.int("past_present_share_buffer", 0) != 0 => Shape::of(p.clone()),
            Some(p) if p.len() == 5 => {
                let total = p[3].add(&a.x[1]).ok_or("sequence overflows")?;
                Shape::of([p[0].clone(), p[1].clone(), p[2].clone(), total, p[4].clone()])
            }
            Some(_) => Shape::of_rank(5),
            None => {
                let heads = num_heads(ctx);
                let n = heads.map_or(Dim::Unknown, Dim::Known);
                let head = head_width(&a.widths[1], heads);
                Shape::of([Dim::Known(2), a.x[0].clone(), n, a.x[1].clone(), head])
            }
        };
        outs.push(tensor(dt, present));
    }
    Ok(outs.into())
}

/// QAttention: contrib Attention's shapes over (input, weight, bias, input_scale,
/// weight_scale, mask_index?, input_zp?, weight_zp?, past?), with an integer input and
/// weight; the outputs are in the bias's (float) type. Slots from the contrib domain's
/// documentation (from memory).
fn q_attention(ctx: &Ctx) -> Inferred {
    let mut outs = ms_attention(ctx)?;
    let dt = ctx.dtype(2).or(ctx.dtype(3));
    for f in outs.iter_mut() {
        f.dtype = dt;
    }
    Ok(outs)
}

/// The projection (B·S·input_hidden·(Dq + Dk + Dv)), then scores and weighted sum over
/// every head, B·S·T·(Dq + Dv), T counting the past keys (the README's Attention convention).
fn ms_attention_macs(ctx: &Ctx, _outs: &[Fact]) -> MacsOps {
    let macs = (|| {
        let a = projected_attention(ctx).ok()?;
        let x = ctx.shape(0).concrete()?;
        let w = ctx.shape(1).concrete()?;
        let proj = count(&x)?.checked_mul(*w.get(1)?)?;
        // The contrib Attention requires num_heads; the count does not depend on it.
        ctx.opt_int("num_heads")?;
        let past = match &a.past {
            Some(p) if ctx.int("past_present_share_buffer", 0) == 0 => p.get(3)?.known()?,
            // A shared buffer's length is its capacity, not the keys attended to.
            Some(_) => return None,
            None => 0,
        };
        let total = x[1].checked_add(past)?;
        let widths = a.widths[0].known()?.checked_add(a.widths[2].known()?)?;
        proj.checked_add(x[0].checked_mul(x[1])?.checked_mul(total)?.checked_mul(widths)?)
    })();
    (macs, Some(0))
}

/// The contrib domain's MultiHeadAttention over already projected inputs (its
/// documentation, from memory): query [B, S, Dq], or Q, K and V packed as [B, S, N, 3, H];
/// key [B, L, Dk], [B, N, L, H] (a cross-attention cache, used as it is) or K and V packed as
/// [B, L, N, 2, H]; value [B, L, Dv] or [B, N, L, Hv]; past key and value (slots 6 and 7)
/// [B, N, P, H] in front of a key of the first or packed form. N is `num_heads`.
struct MhaLayout {
    b: Dim,
    s: Dim,
    /// Query width N·H and value width N·Hv.
    dq: Dim,
    dv: Dim,
    /// Keys attended to: past and new.
    total: Dim,
    heads: Option<u64>,
}

fn mha_layout(ctx: &Ctx) -> Result<MhaLayout, String> {
    let q = ctx.dims(0).ok_or("query rank unknown")?;
    // Required by the documentation; only the caches' and scores' head dims need it.
    let heads = num_heads(ctx);
    let packed_width = |d: &[Dim]| d[2].mul(&d[4]).ok_or("query width overflows");
    let (b, s, dq) = match q.as_slice() {
        [b, s, dq] => (b.clone(), s.clone(), dq.clone()),
        [_, _, _, _, _] => (q[0].clone(), q[1].clone(), packed_width(&q)?),
        _ => return Err(format!("query of rank {}", q.len())),
    };
    let key = if ctx.has_input(1) { ctx.dims(1) } else { None };
    let (new_kv, cached, dv_packed) = match key.as_deref() {
        None if q.len() == 5 => (s.clone(), false, Some(dq.clone())),
        None => return Err("key rank unknown".into()),
        Some([_, l, _]) => (l.clone(), false, None),
        Some([_, _, l, _]) => (l.clone(), true, None),
        Some(k @ [_, l, _, _, _]) => (l.clone(), false, Some(packed_width(k)?)),
        Some(k) => return Err(format!("key of rank {}", k.len())),
    };
    let dv = match (dv_packed, ctx.has_input(2).then(|| ctx.dims(2)).flatten().as_deref()) {
        (Some(d), _) => d,
        (None, Some([_, _, dv])) => dv.clone(),
        (None, Some([_, nv, _, hv])) => nv.mul(hv).ok_or("value width overflows")?,
        (None, _) => dq.clone(),
    };
    let past = if cached || !ctx.has_input(6) {
        Dim::Known(0)
    } else {
        match ctx.dims(6).as_deref() {
            Some([_, _, p, _]) => p.clone(),
            _ => Dim::Unknown,
        }
    };
    let total = past.add(&new_kv).ok_or("sequence overflows")?;
    Ok(MhaLayout {
        b,
        s,
        dq,
        dv,
        total,
        heads,
    })
}

/// Output [B, S, Dv]; present key and value [B, N, past + L, H] and [B, N, past + L, Hv];
/// the optional scores output [B, N, S, past + L].
fn mha(ctx: &Ctx) -> Inferred {
    let l = mha_layout(ctx)?;
    let dt = ctx.dtype(0);
    let n = l.heads.map_or(Dim::Unknown, Dim::Known);
    let per_head = |d: &Dim| head_width(d, l.heads);
    let mut outs = vec![tensor(dt, Shape::of([l.b.clone(), l.s.clone(), l.dv.clone()]))];
    for width in [&l.dq, &l.dv].into_iter().take(ctx.outputs().saturating_sub(1)) {
        outs.push(tensor(
            dt,
            Shape::of([l.b.clone(), n.clone(), l.total.clone(), per_head(width)]),
        ));
    }
    if ctx.outputs() > 3 {
        outs.push(tensor(dt, Shape::of([l.b, n, l.s, l.total])));
    }
    Ok(outs.into())
}

/// `num_heads`, when it is a positive count.
fn num_heads(ctx: &Ctx) -> Option<u64> {
    ctx.opt_int("num_heads")
        .and_then(|n| u64::try_from(n).ok())
        .filter(|&n| n > 0)
}

/// One head's share of a width of N·H: unknown without N or when N does not divide it.
fn head_width(width: &Dim, heads: Option<u64>) -> Dim {
    match (width, heads) {
        (_, None) => Dim::Unknown,
        (Dim::Known(v), Some(h)) if v % h == 0 => Dim::Known(v / h),
        (Dim::Known(_), _) => Dim::Unknown,
        // A symbolic width is N·H: division by N is exact.
        (sym, Some(h)) => sym.div_floor(h),
    }
}

/// Scores and weighted sum over every head: B·S·T·(Dq + Dv), T counting the past keys (the
/// Attention convention of the README, H·Dqk being Dq).
fn mha_macs(ctx: &Ctx, _outs: &[Fact]) -> MacsOps {
    let macs = (|| {
        let l = mha_layout(ctx).ok()?;
        let rows = l.b.known()?.checked_mul(l.s.known()?)?.checked_mul(l.total.known()?)?;
        rows.checked_mul(l.dq.known()?.checked_add(l.dv.known()?)?)
    })();
    (macs, Some(0))
}

/// MatMulNBits and MatMulBnb4: A [..., K] by a weight of N·K values packed into bytes
/// (blocks of `bits`-wide integers, or bitsandbytes' 4-bit kinds, with their scales), whose
/// K and N are attributes: [..., N]. Slots and attributes from the contrib domain's
/// documentation (from memory).
fn matmul_nbits(ctx: &Ctx) -> Inferred {
    let a = ctx.dims(0).ok_or("A rank unknown")?;
    let n = ctx.opt_int("N").ok_or("no N attribute")?;
    let mut out = a.clone();
    let last = out.last_mut().ok_or("A is a scalar")?;
    *last = Dim::Known(n.max(0) as u64);
    Ok(smallvec::smallvec![tensor(ctx.dtype(0), Shape::of(out))])
}

/// Outputs × K, as MatMul (unpacking the weight is not counted).
fn matmul_nbits_macs(ctx: &Ctx, outs: &[Fact]) -> MacsOps {
    let macs = (|| {
        outs.first()?
            .shape
            .element_count()?
            .checked_mul(ctx.opt_int("K")?.max(0) as u64)
    })();
    (macs, Some(0))
}

/// FusedMatMul (and TransposeMatMul, its earlier name): MatMul with `transA`/`transB`
/// swapping an operand's last two dims, and `transBatchA`/`transBatchB` reading an operand
/// stored as [M, batch…, K] as [batch…, M, K] first (its first dim moved to just before the
/// last). Attributes from the contrib domain's documentation (from memory).
pub(super) fn fused_matmul(ctx: &Ctx) -> Inferred {
    let (Some(a), Some(b)) = (ctx.dims(0), ctx.dims(1)) else {
        return Err("operand rank unknown".into());
    };
    let a = as_multiplied(ctx, a, "transBatchA", "transA");
    let b = as_multiplied(ctx, b, "transBatchB", "transB");
    Ok(smallvec::smallvec![tensor(
        ctx.dtype(0),
        Shape::of(matmul_shape(&a, &b)?)
    )])
}

/// An operand of FusedMatMul as the product reads it, after its two transposes.
fn as_multiplied<T>(ctx: &Ctx, mut d: Vec<T>, batch: &str, trans: &str) -> Vec<T> {
    let n = d.len();
    if ctx.int(batch, 0) != 0 && n >= 3 {
        d[..n - 1].rotate_left(1);
    }
    if ctx.int(trans, 0) != 0 && n >= 2 {
        d.swap(n - 1, n - 2);
    }
    d
}

/// FusedMatMul's MACs: outputs × the inner dim, the last of A as the product reads it.
fn fused_matmul_macs(ctx: &Ctx, outs: &[Fact]) -> MacsOps {
    let macs = (|| {
        let y = outs.first()?.shape.element_count()?;
        let a = as_multiplied(ctx, ctx.shape(0).concrete()?, "transBatchA", "transA");
        y.checked_mul(*a.last()?)
    })();
    (macs, Some(0))
}

/// GemmFastGelu: X [… , K] × W [K, N] (+ bias [N]) → [… , N], then the tanh form of Gelu:
/// MatMul's MACs, one op per output for the Gelu and one more for the bias.
fn gemm_fast_gelu_cost(ctx: &Ctx, outs: &[Fact]) -> MacsOps {
    let (macs, _) = matmul_macs(ctx, outs);
    let per = if ctx.has_input(2) { 2 } else { 1 };
    let ops = outs
        .first()
        .and_then(|y| y.shape.element_count())
        .and_then(|n| n.checked_mul(per));
    (macs, ops)
}

macro_rules! op {
    ($dom:expr, $name:literal, $infer:expr, $cost:expr) => {
        OpDef {
            domain: $dom,
            op: $name,
            family: "matmul",
            infer: $infer,
            cost: $cost,
            fold: None,
        }
    };
}

pub static OPS: &[OpDef] = &[
    op!("", "MatMul", matmul, CostRule::Custom(matmul_macs)),
    op!("", "MatMulInteger", matmul, CostRule::Custom(matmul_macs)),
    op!("", "QLinearMatMul", matmul, CostRule::Custom(matmul_macs)),
    op!("", "Gemm", gemm, CostRule::Custom(gemm_macs)),
    op!("", "Einsum", einsum, CostRule::Custom(einsum_macs)),
    op!("", "Attention", attention, CostRule::Custom(attention_macs)),
    op!(
        PREVIEW_DOMAIN,
        "FlexAttention",
        flex_attention,
        CostRule::Custom(attention_macs)
    ),
    op!(
        "",
        "LinearAttention",
        linear_attention,
        CostRule::Custom(linear_attention_macs)
    ),
    op!(
        CONTRIB_DOMAIN,
        "Attention",
        ms_attention,
        CostRule::Custom(ms_attention_macs)
    ),
    op!(
        CONTRIB_DOMAIN,
        "QAttention",
        q_attention,
        CostRule::Custom(ms_attention_macs)
    ),
    op!(CONTRIB_DOMAIN, "MultiHeadAttention", mha, CostRule::Custom(mha_macs)),
    op!(
        CONTRIB_DOMAIN,
        "FusedMatMul",
        fused_matmul,
        CostRule::Custom(fused_matmul_macs)
    ),
    op!(
        CONTRIB_DOMAIN,
        "TransposeMatMul",
        fused_matmul,
        CostRule::Custom(fused_matmul_macs)
    ),
    op!(
        CONTRIB_DOMAIN,
        "GemmFastGelu",
        matmul,
        CostRule::Custom(gemm_fast_gelu_cost)
    ),
    op!(CONTRIB_DOMAIN, "MatMulInteger16", matmul, CostRule::Custom(matmul_macs)),
    op!(
        CONTRIB_DOMAIN,
        "MatMulNBits",
        matmul_nbits,
        CostRule::Custom(matmul_nbits_macs)
    ),
    op!(
        CONTRIB_DOMAIN,
        "MatMulBnb4",
        matmul_nbits,
        CostRule::Custom(matmul_nbits_macs)
    ),
    op!(
        CONTRIB_DOMAIN,
        "MatMulIntegerToFloat",
        matmul,
        CostRule::Custom(matmul_macs)
    ),
    op!(
        CONTRIB_DOMAIN,
        "DynamicQuantizeMatMul",
        matmul,
        CostRule::Custom(matmul_macs)
    ),
];
