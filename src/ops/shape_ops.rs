//! Shape and data-movement ops, with constant folding for the shape arithmetic exporters
//! emit (Shape → Gather → Unsqueeze → Concat → Reshape and friends).

use crate::ir::rank_within_limit;
use crate::ir::{AttrValue, ConstData, ConstValue, DType, Dim, DimVec, Shape};
use crate::values;

use super::fold::{self, MAX_FOLD_ELEMENTS};
use super::util::{broadcast, count, norm_axis, norm_insert_axis, product, signed_size, tensor};
use super::{CostRule, Ctx, Inferred, OpDef};

use super::fold::INFER_MARK;

fn i64_shape(n: usize) -> Shape {
    Shape::known(&[n as u64])
}

// ---- Constant, ConstantOfShape, Shape, Size, Range ------------------------------------

fn constant_value(ctx: &Ctx) -> Option<(Option<DType>, Vec<u64>, Option<ConstValue>)> {
    for a in &ctx.node.attrs {
        let r = match (a.name.as_str(), &a.value) {
            ("value", AttrValue::Tensor(t)) => (t.dtype, t.dims.clone(), values::decode(t)),
            ("value_float", AttrValue::Float(f)) => (
                Some(DType::F32),
                vec![],
                Some(ConstValue::floats(vec![], vec![*f as f64])),
            ),
            ("value_floats", AttrValue::Floats(f)) => (
                Some(DType::F32),
                vec![f.len() as u64],
                Some(ConstValue::floats(
                    vec![f.len() as u64],
                    f.iter().map(|x| *x as f64).collect(),
                )),
            ),
            ("value_int", AttrValue::Int(i)) => (Some(DType::I64), vec![], Some(ConstValue::ints(vec![], vec![*i]))),
            ("value_ints", AttrValue::Ints(v)) => (
                Some(DType::I64),
                vec![v.len() as u64],
                Some(ConstValue::ints(vec![v.len() as u64], v.clone())),
            ),
            ("value_string", _) => (Some(DType::Str), vec![], None),
            ("value_strings", AttrValue::Strings(v)) => (Some(DType::Str), vec![v.len() as u64], None),
            _ => continue,
        };
        return Some(r);
    }
    None
}

fn constant(ctx: &Ctx) -> Inferred {
    let (dt, dims, _) = constant_value(ctx).ok_or("Constant without a value attribute tilecut reads")?;
    Ok(smallvec::smallvec![tensor(dt, Shape::known(&dims))])
}

fn fold_constant(ctx: &Ctx) -> Option<Vec<ConstValue>> {
    Some(vec![constant_value(ctx)?.2?])
}

fn constant_of_shape(ctx: &Ctx) -> Inferred {
    let dt = match ctx.node.attr("value") {
        Some(AttrValue::Tensor(t)) => t.dtype,
        _ => Some(DType::F32),
    };
    let shape = match ctx.konst(0) {
        Some(c) => Shape::of(c.as_dims()),
        None => match ctx.shape(0).concrete() {
            Some(s) if s.len() == 1 => Shape::of_rank(rank_within_limit(s[0])?),
            _ => Shape::unknown(),
        },
    };
    Ok(smallvec::smallvec![tensor(dt, shape)])
}

fn fold_constant_of_shape(ctx: &Ctx) -> Option<Vec<ConstValue>> {
    let dims: Vec<u64> = ctx
        .const_ints(0)?
        .iter()
        .map(|&d| u64::try_from(d).ok())
        .collect::<Option<_>>()?;
    let n = count(&dims)?;
    if n > MAX_FOLD_ELEMENTS {
        return None;
    }
    let fill = match ctx.node.attr("value") {
        Some(AttrValue::Tensor(t)) => values::decode(t)?.as_floats().first().copied().unwrap_or(0.0),
        _ => 0.0,
    };
    let is_float = match ctx.node.attr("value") {
        Some(AttrValue::Tensor(t)) => t.dtype.is_none_or(DType::is_float),
        _ => true,
    };
    Some(vec![if is_float {
        ConstValue::floats(dims, vec![fill; n as usize])
    } else {
        ConstValue::ints(dims, vec![fill as i64; n as usize])
    }])
}

/// Shape's `start`/`end` (opset 15), clamped as the spec says.
fn shape_range(ctx: &Ctx, rank: usize) -> (usize, usize) {
    let r = rank as i64;
    let clamp = |v: i64| (if v < 0 { v + r } else { v }).clamp(0, r) as usize;
    let start = clamp(ctx.int("start", 0));
    let end = clamp(ctx.int("end", r));
    (start, end.max(start))
}

fn shape(ctx: &Ctx) -> Inferred {
    let shape = match ctx.dims(0) {
        Some(d) => {
            let (s, e) = shape_range(ctx, d.len());
            i64_shape(e - s)
        }
        None => Shape::of_rank(1),
    };
    Ok(smallvec::smallvec![tensor(Some(DType::I64), shape)])
}

fn fold_shape(ctx: &Ctx) -> Option<Vec<ConstValue>> {
    let d = ctx.dims(0)?;
    let (s, e) = shape_range(ctx, d.len());
    let part = d[s..e].to_vec();
    let dims = vec![part.len() as u64];
    Some(vec![match part.iter().map(Dim::known).collect::<Option<Vec<u64>>>() {
        Some(k) => ConstValue::ints(dims, k.into_iter().map(|x| x as i64).collect()),
        None => ConstValue {
            dims,
            data: ConstData::Dims(part),
        },
    }])
}

fn size(_ctx: &Ctx) -> Inferred {
    Ok(smallvec::smallvec![tensor(Some(DType::I64), Shape::scalar())])
}

fn fold_size(ctx: &Ctx) -> Option<Vec<ConstValue>> {
    Some(vec![ConstValue::ints(
        vec![],
        vec![i64::try_from(ctx.shape(0).element_count()?).ok()?],
    )])
}

/// Range's step: input 2, which the contrib domain's Range may leave out for a step of 1
/// (its documentation, from memory); the standard Range requires it.
fn range_step(ctx: &Ctx) -> Option<f64> {
    if !ctx.has_input(2) && ctx.node.domain.as_str() == super::CONTRIB_DOMAIN {
        return Some(1.0);
    }
    ctx.konst(2)?.as_floats().first().copied()
}

fn range_len(ctx: &Ctx) -> Option<u64> {
    let (s, l) = (ctx.konst(0)?, ctx.konst(1)?);
    let (s, l, d) = (*s.as_floats().first()?, *l.as_floats().first()?, range_step(ctx)?);
    if d == 0.0 || !s.is_finite() || !l.is_finite() {
        return None;
    }
    Some(((l - s) / d).ceil().max(0.0) as u64)
}

/// `Range(s, n, k)` with `n` a symbolic size (read off a `Shape`, perhaps cast to float) and
/// `s`, `k` whole numbers, `k` positive: exporters make position ids and detection grids this
/// way. Per the ONNX Range specification the output holds ceil((n - s) / k) elements, which
/// is `n-s` for a step of one and `(n-s+k-1)/k` otherwise, whatever `n` is.
fn range_symbolic(ctx: &Ctx) -> Option<Dim> {
    let whole = |x: f64| (x.fract() == 0.0 && x.abs() < 1e15).then_some(x as i64);
    let start = match ctx.konst(0)?.as_floats().as_slice() {
        [x] => whole(*x)?,
        _ => return None,
    };
    let step = whole(range_step(ctx)?)?;
    if start < 0 || step <= 0 {
        return None;
    }
    let limit = match &ctx.konst(1)?.data {
        ConstData::Dims(v) => match v.as_slice() {
            [sym @ Dim::Sym(_)] => sym.clone(),
            _ => return None,
        },
        _ => return None,
    };
    let span = limit.offset(start.checked_neg()?);
    let len = if step == 1 {
        span
    } else {
        span.offset(step - 1).div_floor(step as u64)
    };
    (len != Dim::Unknown).then_some(len)
}

pub(super) fn range(ctx: &Ctx) -> Inferred {
    let shape = match (range_len(ctx), range_symbolic(ctx)) {
        (Some(n), _) => Shape::known(&[n]),
        (None, Some(sym)) => Shape::of([sym]),
        (None, None) => Shape::of_rank(1),
    };
    Ok(smallvec::smallvec![tensor(ctx.dtype(0), shape)])
}

pub(super) fn fold_range(ctx: &Ctx) -> Option<Vec<ConstValue>> {
    let n = range_len(ctx)?;
    if n > MAX_FOLD_ELEMENTS {
        return None;
    }
    let s = ctx.konst(0)?;
    let (start, delta) = (*s.as_floats().first()?, range_step(ctx)?);
    let v: Vec<f64> = (0..n).map(|i| start + i as f64 * delta).collect();
    Some(vec![super::util::const_like(s, vec![n], v)])
}

// ---- Reshape, Flatten, Transpose, Squeeze, Unsqueeze ----------------------------------

/// Reshape with 0 (copy, unless allowzero) and -1 (infer) per the spec; symbolic sizes are
/// carried through when the inferred dim's factors cancel.
fn reshape_dims(input: Option<&[Dim]>, target: &[Dim], raw: &[i64], allowzero: bool) -> Result<DimVec, String> {
    let mut out = DimVec::with_capacity(raw.len());
    let mut copied: smallvec::SmallVec<[bool; 6]> = smallvec::smallvec![false; raw.len()];
    let mut infer_at = None;
    for (i, (&r, t)) in raw.iter().zip(target).enumerate() {
        if r == 0 && !allowzero && matches!(t, Dim::Known(0)) {
            let d = input.and_then(|d| d.get(i).cloned());
            copied[i] = d.is_some();
            out.push(d.unwrap_or(Dim::Unknown));
        } else if r == -1 {
            if infer_at.is_some() {
                return Err("shape has more than one -1".into());
            }
            infer_at = Some(i);
            out.push(Dim::Unknown);
        } else if r < -1 {
            return Err(format!("shape value {r} is invalid"));
        } else {
            out.push(t.clone());
        }
    }
    if let (Some(at), Some(input)) = (infer_at, input) {
        out[at] = infer_dim(input, &out, at, &copied);
    }
    Ok(out)
}

/// The -1 dim of a reshape: ∏input / ∏(other output dims), cancelling equal symbols. A
/// product dim (`B*S`, `64*T`) counts as its factors, so that `[B*S, 64]` reshaped to
/// `[-1, S, 64]` gives `B`. A dim copied by a 0 is the input's dim at the same place, so the
/// two cancel whatever they are: `[B, ?, 2, 4]` reshaped to `[0, 0, -1]` gives 8 with the
/// second dim unknown (as `onnx.shape_inference` does).
fn infer_dim(input: &[Dim], out: &[Dim], at: usize, copied: &[bool]) -> Dim {
    let mut num: u64 = 1;
    let mut syms: Vec<Dim> = Vec::new();
    for (i, d) in input.iter().enumerate() {
        if copied.get(i) == Some(&true) {
            continue;
        }
        let Some((k, fs)) = factors(d) else {
            return Dim::Unknown;
        };
        let Some(x) = num.checked_mul(k) else {
            return Dim::Unknown;
        };
        num = x;
        syms.extend(fs);
    }
    let mut den: u64 = 1;
    for (i, d) in out.iter().enumerate() {
        if i == at || copied[i] {
            continue;
        }
        let Some((k, fs)) = factors(d) else {
            return Dim::Unknown;
        };
        let Some(x) = den.checked_mul(k) else {
            return Dim::Unknown;
        };
        den = x;
        for f in fs {
            match syms.iter().position(|s| *s == f) {
                Some(p) => {
                    syms.remove(p);
                }
                None => return Dim::Unknown,
            }
        }
    }
    if den == 0 || num % den != 0 {
        return if num == 0 { Dim::Known(0) } else { Dim::Unknown };
    }
    let mut d = Dim::Known(num / den);
    for s in syms {
        d = d.mul(&s).unwrap_or(Dim::Unknown);
    }
    d
}

/// A dim as a whole number times symbols: a known size, one symbol or expression, or a
/// plain product of them (`64*S`, `B*S`). None for an unknown dim. A name with `@` (a size
/// named after its node, which may hold any character) is one factor.
fn factors(d: &Dim) -> Option<(u64, Vec<Dim>)> {
    match d {
        Dim::Known(v) => Some((*v, Vec::new())),
        Dim::Unknown => None,
        Dim::Sym(s) if s.contains(['@', '(', '+', '-', '/', '%']) || !s.contains('*') => Some((1, vec![d.clone()])),
        Dim::Sym(s) => {
            let mut k = 1u64;
            let mut fs = Vec::new();
            for part in s.split('*') {
                match part.parse::<u64>() {
                    Ok(v) => k = k.checked_mul(v)?,
                    Err(_) if part.is_empty() => return Some((1, vec![d.clone()])),
                    Err(_) => fs.push(Dim::sym(part)),
                }
            }
            Some((k, fs))
        }
    }
}

fn reshape(ctx: &Ctx) -> Inferred {
    // Each entry of the shape value as a dim, and as the number that says what it does
    // (0 copies, -1 infers). On the stack: every Reshape of a model passes through here.
    let mut target = DimVec::new();
    let mut literal: smallvec::SmallVec<[i64; 6]> = smallvec::SmallVec::new();
    let as_dim = |x: i64| if x >= 0 { Dim::Known(x as u64) } else { Dim::Unknown };
    if ctx.opset >= 5 {
        match ctx.konst(1) {
            Some(c) => match &c.data {
                // In a shape value, only the marker is "infer"; symbolic and unknown dims are sizes.
                ConstData::Dims(d) => {
                    target.extend(d.iter().cloned());
                    literal.extend(d.iter().map(|x| match x {
                        Dim::Known(v) => *v as i64,
                        Dim::Sym(s) if &**s == INFER_MARK => -1,
                        _ => 1,
                    }));
                }
                ConstData::Int(v) => {
                    target.extend(v.iter().map(|&x| as_dim(x)));
                    literal.extend_from_slice(v);
                }
                ConstData::Float(v) => {
                    target.extend(v.iter().map(|&x| as_dim(x as i64)));
                    literal.extend(v.iter().map(|&x| x as i64));
                }
            },
            None => {
                let shape = match ctx.shape(1).concrete().and_then(|s| s.first().copied()) {
                    Some(len) => Shape::of_rank(rank_within_limit(len)?),
                    None => Shape::unknown(),
                };
                return Ok(smallvec::smallvec![tensor(ctx.dtype(0), shape)]);
            }
        }
    } else {
        let s = ctx.ints_ref("shape").ok_or("Reshape-1 without shape attribute")?;
        target.extend(s.iter().map(|&x| as_dim(x)));
        literal.extend_from_slice(s);
    }
    let dims = reshape_dims(ctx.dims_ref(0), &target, &literal, ctx.int("allowzero", 0) != 0)?;
    Ok(smallvec::smallvec![tensor(ctx.dtype(0), Shape::of(dims))])
}

fn fold_reshape(ctx: &Ctx) -> Option<Vec<ConstValue>> {
    let data = ctx.konst(0)?;
    let outs = reshape(ctx).ok()?;
    let dims = outs.first()?.shape.concrete()?;
    if count(&dims)? != data.len() as u64 {
        return None;
    }
    let idx: Vec<usize> = (0..data.len()).collect();
    Some(vec![data.pick(dims, &idx)])
}

fn flatten(ctx: &Ctx) -> Inferred {
    let Some(d) = ctx.dims(0) else {
        return Ok(smallvec::smallvec![tensor(ctx.dtype(0), Shape::of_rank(2))]);
    };
    // Flatten's axis lies in [-r, r]; a negative one counts from the end (r + axis).
    let (r, a) = (d.len() as i64, ctx.int("axis", 1));
    let axis = if a < 0 { a + r } else { a };
    if !(0..=r).contains(&axis) {
        return Err(format!("axis {a} out of range for rank {r}"));
    }
    let axis = axis as usize;
    Ok(smallvec::smallvec![tensor(
        ctx.dtype(0),
        Shape::of([product(&d[..axis])?, product(&d[axis..])?]),
    )])
}

fn transpose(ctx: &Ctx) -> Inferred {
    let Some(d) = ctx.dims_ref(0) else {
        return Ok(smallvec::smallvec![tensor(ctx.dtype(0), Shape::unknown())]);
    };
    let out = match ctx.ints_ref("perm") {
        Some(perm) => {
            if perm.len() != d.len() {
                return Err(format!("perm has {} entries for rank {}", perm.len(), d.len()));
            }
            perm.iter()
                .map(|&p| {
                    norm_axis(p, d.len())
                        .map(|a| d[a].clone())
                        .ok_or("perm entry out of range")
                })
                .collect::<Result<DimVec, _>>()?
        }
        // No `perm`: the dims reversed.
        None => d.iter().rev().cloned().collect(),
    };
    Ok(smallvec::smallvec![tensor(ctx.dtype(0), Shape::of(out))])
}

fn fold_transpose(ctx: &Ctx) -> Option<Vec<ConstValue>> {
    let data = ctx.konst(0)?;
    let rank = data.dims.len();
    let perm: Vec<usize> = match ctx.ints("perm") {
        Some(p) => p.iter().map(|&a| norm_axis(a, rank)).collect::<Option<_>>()?,
        None => (0..rank).rev().collect(),
    };
    if perm.len() != rank {
        return None;
    }
    Some(vec![fold::transpose(data, &perm)?])
}

/// Axes from the attribute (before `since`) or from input 1.
fn axes(ctx: &Ctx, since: i64) -> Result<Option<Vec<i64>>, ()> {
    if ctx.opset >= since {
        if !ctx.has_input(1) {
            return Ok(None);
        }
        ctx.const_ints(1).map(Some).ok_or(())
    } else {
        Ok(ctx.ints("axes"))
    }
}

fn squeeze(ctx: &Ctx) -> Inferred {
    let dt = ctx.dtype(0);
    let Some(d) = ctx.dims(0) else {
        return Ok(smallvec::smallvec![tensor(dt, Shape::unknown())]);
    };
    let Ok(axes) = axes(ctx, 13) else {
        return Ok(smallvec::smallvec![tensor(dt, Shape::unknown())]);
    };
    let out: DimVec = match axes {
        Some(a) => {
            let mut drop = vec![false; d.len()];
            for x in a {
                let i = norm_axis(x, d.len()).ok_or("axis out of range")?;
                if let Dim::Known(v) = d[i] {
                    if v != 1 {
                        return Err(format!("cannot squeeze axis {i} of size {v}"));
                    }
                }
                drop[i] = true;
            }
            d.iter().zip(drop).filter(|(_, x)| !x).map(|(v, _)| v.clone()).collect()
        }
        None => {
            if d.iter().any(|x| !matches!(x, Dim::Known(_))) {
                return Ok(smallvec::smallvec![tensor(dt, Shape::unknown())]);
            }
            d.into_iter().filter(|x| *x != Dim::Known(1)).collect()
        }
    };
    Ok(smallvec::smallvec![tensor(dt, Shape::of(out))])
}

pub(super) fn unsqueeze(ctx: &Ctx) -> Inferred {
    let dt = ctx.dtype(0);
    let Some(d) = ctx.dims(0) else {
        return Ok(smallvec::smallvec![tensor(dt, Shape::unknown())]);
    };
    let a = match axes(ctx, 13) {
        Ok(Some(a)) => a,
        Ok(None) => return Err("Unsqueeze without axes".into()),
        Err(()) => return Ok(smallvec::smallvec![tensor(dt, Shape::unknown())]),
    };
    let rank = d.len() + a.len();
    let mut out: Vec<Option<Dim>> = vec![None; rank];
    for x in &a {
        let i = norm_axis(*x, rank).ok_or("axis out of range")?;
        out[i] = Some(Dim::Known(1));
    }
    let mut it = d.into_iter();
    let out: DimVec = out
        .into_iter()
        .map(|o| o.or_else(|| it.next()).unwrap_or(Dim::Unknown))
        .collect();
    Ok(smallvec::smallvec![tensor(dt, Shape::of(out))])
}

fn fold_same_data(ctx: &Ctx) -> Option<Vec<ConstValue>> {
    let data = ctx.konst(0)?;
    let out = (super::lookup(&ctx.node.domain, &ctx.node.op_type)?.infer)(ctx).ok()?;
    let dims = out.first()?.shape.concrete()?;
    if count(&dims)? != data.len() as u64 {
        return None;
    }
    let idx: Vec<usize> = (0..data.len()).collect();
    Some(vec![data.pick(dims, &idx)])
}

// ---- Concat, Split, Slice, Gather ------------------------------------------------------

fn concat(ctx: &Ctx) -> Inferred {
    let n = ctx.node.inputs.len();
    let shapes: Vec<Option<Vec<Dim>>> = (0..n).filter(|&i| ctx.has_input(i)).map(|i| ctx.dims(i)).collect();
    let dt = (0..n).find_map(|i| ctx.dtype(i));
    Ok(smallvec::smallvec![tensor(
        dt,
        concat_shape(&shapes, ctx.int("axis", 0))?
    )])
}

/// The shape of a concatenation along `axis`: the other dims from whichever input knows them,
/// the axis the sum of the inputs' (unknown if any input's is).
pub(super) fn concat_shape(shapes: &[Option<Vec<Dim>>], axis: i64) -> Result<Shape, String> {
    let Some(rank) = shapes.iter().flatten().map(Vec::len).next() else {
        return Ok(Shape::unknown());
    };
    let axis = norm_axis(axis, rank).ok_or("axis out of range")?;
    let mut out: DimVec = smallvec::smallvec![Dim::Unknown; rank];
    let mut total = Dim::Known(0);
    for s in shapes {
        let Some(s) = s else {
            total = Dim::Unknown;
            continue;
        };
        if s.len() != rank {
            return Err("inputs of different ranks".into());
        }
        for (i, d) in s.iter().enumerate() {
            if i != axis && out[i] == Dim::Unknown {
                out[i] = d.clone();
            }
        }
        total = total.add(&s[axis]).ok_or("dim overflow")?;
    }
    out[axis] = total;
    Ok(Shape::of(out))
}

fn fold_concat(ctx: &Ctx) -> Option<Vec<ConstValue>> {
    // A part computed from the data, of a known short length, is that many unknown sizes: the
    // known parts beside it still size what the result shapes ([2, ?, 3], not rank 3 alone).
    let unknown_part = |i: usize| -> Option<ConstValue> {
        match (ctx.dtype(i), ctx.dims(i).as_deref()) {
            (Some(DType::I64 | DType::I32), Some([Dim::Known(n)])) if *n <= MAX_UNKNOWN_PART => Some(ConstValue {
                dims: vec![*n],
                data: ConstData::Dims(vec![Dim::Unknown; *n as usize]),
            }),
            _ => None,
        }
    };
    // Concats of activations are the common case: nothing to fold, nothing allocated.
    if !(0..ctx.node.inputs.len()).any(|i| ctx.konst(i).is_some()) {
        return None;
    }
    let parts: Vec<std::borrow::Cow<ConstValue>> = (0..ctx.node.inputs.len())
        .filter(|&i| ctx.has_input(i))
        .map(|i| match ctx.konst(i) {
            Some(c) => Some(std::borrow::Cow::Borrowed(c)),
            None => unknown_part(i).map(std::borrow::Cow::Owned),
        })
        .collect::<Option<_>>()?;
    if parts.iter().any(|p| p.dims.len() != 1) {
        return None;
    }
    let any_dims = parts.iter().any(|p| matches!(p.data, ConstData::Dims(_)));
    let any_float = parts.iter().any(|p| matches!(p.data, ConstData::Float(_)));
    let n: usize = parts.iter().map(|p| p.len()).sum();
    let dims = vec![n as u64];
    Some(vec![if any_dims {
        // A literal -1 next to symbolic sizes keeps its meaning for Reshape through a marker.
        let dims_of = |p: &ConstValue| -> Vec<Dim> {
            match &p.data {
                ConstData::Dims(d) => d.clone(),
                _ => p
                    .as_ints()
                    .into_iter()
                    .map(|x| {
                        if x == -1 {
                            Dim::sym(INFER_MARK)
                        } else if x >= 0 {
                            Dim::Known(x as u64)
                        } else {
                            Dim::Unknown
                        }
                    })
                    .collect(),
            }
        };
        ConstValue {
            dims,
            data: ConstData::Dims(parts.iter().flat_map(|p| dims_of(p)).collect()),
        }
    } else if any_float {
        ConstValue::floats(dims, parts.iter().flat_map(|p| p.as_floats()).collect())
    } else {
        ConstValue::ints(dims, parts.iter().flat_map(|p| p.as_ints()).collect())
    }])
}

/// The longest part of a shape value computed from the data that `Concat` still folds.
const MAX_UNKNOWN_PART: u64 = 8;

fn split(ctx: &Ctx) -> Inferred {
    let dt = ctx.dtype(0);
    let n = ctx.outputs();
    let Some(d) = ctx.dims(0) else {
        return Ok(smallvec::smallvec![tensor(dt, Shape::unknown()); n]);
    };
    let axis = norm_axis(ctx.int("axis", 0), d.len()).ok_or("axis out of range")?;
    let sizes: Option<Vec<i64>> = if ctx.opset >= 13 {
        if ctx.has_input(1) {
            match ctx.const_ints(1) {
                Some(s) => Some(s),
                None => {
                    let mut s = d.clone();
                    s[axis] = Dim::Unknown;
                    return Ok(smallvec::smallvec![tensor(dt, Shape::of(s)); n]);
                }
            }
        } else {
            None
        }
    } else {
        ctx.ints("split")
    };
    let parts: Vec<Dim> = match sizes {
        Some(s) => {
            if s.len() != n {
                return Err(format!("split has {} sizes for {} outputs", s.len(), n));
            }
            s.iter().map(|&x| Dim::Known(x.max(0) as u64)).collect()
        }
        None => match &d[axis] {
            Dim::Known(total) => {
                let k = ctx
                    .opt_int("num_outputs")
                    .map(|x| x.max(1) as u64)
                    .unwrap_or(n as u64)
                    .max(1);
                // opset 18: chunks of ceil(total / k), the last one smaller.
                let chunk = total.div_ceil(k);
                (0..n as u64)
                    .map(|i| Dim::Known(chunk.min(total.saturating_sub(i.saturating_mul(chunk)))))
                    .collect()
            }
            _ => vec![Dim::Unknown; n],
        },
    };
    Ok(parts
        .into_iter()
        .map(|p| {
            let mut s = d.clone();
            s[axis] = p;
            tensor(dt, Shape::of(s))
        })
        .collect())
}

/// A slice's start or end: a number, or a size known only as a symbol (read off a `Shape`,
/// or computed from such sizes: a cache's length).
enum End {
    At(i64),
    Size(Dim),
}

/// Slice parameters: (starts, ends, axes, steps), from attributes (opset < 10) or inputs.
type SliceParams = (Vec<End>, Vec<End>, Option<Vec<i64>>, Option<Vec<i64>>);

fn slice_params(ctx: &Ctx) -> Option<SliceParams> {
    if ctx.opset < 10 {
        let at = |v: Vec<i64>| v.into_iter().map(End::At).collect();
        return Some((at(ctx.ints("starts")?), at(ctx.ints("ends")?), ctx.ints("axes"), None));
    }
    let opt = |i: usize| {
        if ctx.has_input(i) {
            ctx.const_ints(i).map(Some)
        } else {
            Some(None)
        }
    };
    let bounds = |i: usize| -> Option<Vec<End>> {
        let c = ctx.konst(i)?;
        Some(match c.try_ints() {
            Some(v) => v.into_iter().map(End::At).collect(),
            None => match &c.data {
                ConstData::Dims(d) => d
                    .iter()
                    .map(|x| match x {
                        // A -1 kept beside symbolic sizes (`fold::INFER_MARK`) is the index -1.
                        Dim::Sym(s) if &**s == INFER_MARK => End::At(-1),
                        Dim::Known(k) => i64::try_from(*k).map_or_else(|_| End::Size(x.clone()), End::At),
                        _ => End::Size(x.clone()),
                    })
                    .collect(),
                _ => return None,
            },
        })
    };
    Some((bounds(1)?, bounds(2)?, opt(3)?, opt(4)?))
}

/// One sliced axis: its clamped (start, end, step) where the axis size is known, per the
/// Slice specification, or else the output size as far as it can be told.
enum AxisSpan {
    Clamped(i64, i64, i64),
    Open(Dim),
}

fn slice_ranges(ctx: &Ctx, d: &[Dim]) -> Result<Option<Vec<(usize, AxisSpan)>>, String> {
    let Some((starts, ends, axes, steps)) = slice_params(ctx) else {
        return Ok(None);
    };
    let axes = axes.unwrap_or_else(|| (0..starts.len() as i64).collect());
    let steps = steps.unwrap_or_else(|| vec![1; starts.len()]);
    if ends.len() != starts.len() || axes.len() != starts.len() || steps.len() != starts.len() {
        return Err("starts, ends, axes and steps differ in length".into());
    }
    let mut out = Vec::new();
    for i in 0..starts.len() {
        let axis = norm_axis(axes[i], d.len()).ok_or("axis out of range")?;
        let step = steps[i];
        if step == 0 {
            return Err("step 0".into());
        }
        let start = match &starts[i] {
            End::At(s) => *s,
            End::Size(from) => {
                out.push((axis, AxisSpan::Open(span_from_size(&d[axis], from, &ends[i], step))));
                continue;
            }
        };
        let end = match &ends[i] {
            End::At(e) => *e,
            End::Size(size) => {
                out.push((axis, AxisSpan::Open(sized_span(&d[axis], start, size, step))));
                continue;
            }
        };
        let Dim::Known(dim) = d[axis] else {
            out.push((axis, AxisSpan::Open(open_span(&d[axis], start, end, step))));
            continue;
        };
        // Slice's starts and ends are int64: an axis beyond them (a product of hostile
        // sizes) cannot be sliced as the specification reads.
        let dim = signed_size(axis, dim)?;
        let fix = |v: i64| if v < 0 { v.saturating_add(dim) } else { v };
        let (s, e) = (fix(start), fix(end));
        let (s, e) = if step > 0 {
            (s.clamp(0, dim), e.clamp(0, dim))
        } else if dim == 0 {
            // The spec's clamp to [0, dim-1] has no room on an empty axis: nothing is taken.
            (0, 0)
        } else {
            (s.clamp(0, dim - 1), e.clamp(-1, dim - 1))
        };
        out.push((axis, AxisSpan::Clamped(s, e, step)));
    }
    Ok(Some(out))
}

/// The output size of a forward slice from a fixed start to an end that is a symbolic size:
/// up to the axis's own size when the end is that size (`x[:, 2:T]` of a length T, exactly
/// T-2); from the first element, the smaller of the two (`positions[:T]` of a 512-row table
/// is `min(T,512)`, which broadcasting against T gives back as T: `Dim::caps`); empty when
/// the start is past the axis. A later start on a fixed axis (`min(T,K)` less the start,
/// or 0) stays unknown until T is fixed, then is computed exactly.
fn sized_span(axis: &Dim, start: i64, end: &Dim, step: i64) -> Dim {
    let Ok(stride) = u64::try_from(step) else {
        return Dim::Unknown;
    };
    match axis {
        Dim::Known(k) if start >= 0 && u64::try_from(start).is_ok_and(|s| s >= *k) => Dim::Known(0),
        Dim::Sym(_) if axis == end && start >= 0 => end.offset(-start).offset(step - 1).div_floor(stride),
        _ if start == 0 && step == 1 => end.lesser(axis).unwrap_or(Dim::Unknown),
        _ => Dim::Unknown,
    }
}

/// The output size of a forward slice whose start is a symbolic size (a cache's past length:
/// `mask[:, :, P:P+S]`): the end clamped to the axis less the start clamped to it (ONNX
/// operator specification, Slice, step 1), `min(end,axis)` written shorter where one covers
/// the other (`P` within `P+S`). On a symbolic axis built to the total length this is exact
/// and short (`S`); on a fixed table it is exact and stays in `min` form. A difference below
/// zero (an end before the start, an empty slice) evaluates to no size, never a wrong one.
fn span_from_size(axis: &Dim, start: &Dim, end: &End, step: i64) -> Dim {
    if step != 1 {
        return Dim::Unknown;
    }
    let end = match end {
        End::Size(e) => e.lesser(axis),
        End::At(e) if *e >= TO_THE_END => Some(axis.clone()),
        End::At(_) => None,
    };
    end.zip(start.lesser(axis))
        .and_then(|(e, s)| e.sub(&s))
        .unwrap_or(Dim::Unknown)
}

/// Exporters write "to the end" as a large end: INT64_MAX, INT32_MAX, or 10^9 (one TF
/// converter's masked ends). Common practice; a symbolic size is assumed to be below it.
const TO_THE_END: i64 = 1_000_000_000;

/// The output size of a slice of a symbolic size T, where it is an expression of T: from
/// `start` ≥ 0 to the end, `ceil((T - start) / step)`; from `start` ≥ 0 to an end counted
/// from the end (`x[:, 1:-1]`), `ceil((T - start - |end|) / step)`; the whole axis backwards
/// (from the last element past the first), `ceil(T / |step|)`; the first k or the last k
/// elements (`x[:, :k]`, `x[:, -k:]`), `min(T,k)`. As for `x[:, 2:T]` (`sized_span`), a
/// difference assumes T is at least what it takes away; at smaller T (an empty slice) it
/// evaluates to no size rather than a wrong one. Anything else stays unknown.
fn open_span(d: &Dim, start: i64, end: i64, step: i64) -> Dim {
    let stride = step.unsigned_abs();
    let Ok(round_up) = i64::try_from(stride - 1) else {
        return Dim::Unknown;
    };
    let counted = |v: i64| (-TO_THE_END..0).contains(&v);
    let first_off = if step > 0 && (0..TO_THE_END).contains(&start) && end >= TO_THE_END {
        start
    } else if step > 0 && (0..TO_THE_END).contains(&start) && counted(end) {
        start - end
    } else if step < 0 && (start == -1 || start >= TO_THE_END) && end <= -TO_THE_END {
        0
    } else if step == 1 && start == 0 && (0..TO_THE_END).contains(&end) {
        return d.lesser(&Dim::Known(end.unsigned_abs())).unwrap_or(Dim::Unknown);
    } else if step == 1 && counted(start) && end >= TO_THE_END {
        return d.lesser(&Dim::Known(start.unsigned_abs())).unwrap_or(Dim::Unknown);
    } else {
        return Dim::Unknown;
    };
    d.offset(-first_off).offset(round_up).div_floor(stride)
}

fn slice(ctx: &Ctx) -> Inferred {
    let dt = ctx.dtype(0);
    let Some(d) = ctx.dims_ref(0) else {
        return Ok(smallvec::smallvec![tensor(dt, Shape::unknown())]);
    };
    let Some(ranges) = slice_ranges(ctx, d)? else {
        // Unknown bounds: the rank stays, the sliced sizes are unknown.
        let mut s = DimVec::from(d);
        match ctx.opset >= 10 && ctx.has_input(3) {
            true => match ctx.const_ints(3) {
                Some(axes) => {
                    for a in axes {
                        if let Some(i) = norm_axis(a, s.len()) {
                            s[i] = Dim::Unknown;
                        }
                    }
                }
                None => s.iter_mut().for_each(|x| *x = Dim::Unknown),
            },
            // The default axes are the first as many as there are starts.
            false => {
                let n = match ctx.dims(1).as_deref() {
                    Some([Dim::Known(n)]) if ctx.opset >= 10 => *n as usize,
                    _ => s.len(),
                };
                s.iter_mut().take(n).for_each(|x| *x = Dim::Unknown)
            }
        }
        return Ok(smallvec::smallvec![tensor(dt, Shape::of(s))]);
    };
    let mut out = DimVec::from(d);
    for (axis, r) in ranges {
        out[axis] = match r {
            AxisSpan::Clamped(s, e, step) => {
                // Both bounds are clamped into [-1, dim], so the span fits an int64; the step
                // is any nonzero int64, i64::MIN included, so it is divided as unsigned.
                let span = if step > 0 { e - s } else { s - e }.max(0);
                Dim::Known(span.unsigned_abs().div_ceil(step.unsigned_abs()))
            }
            AxisSpan::Open(dim) => dim,
        };
    }
    Ok(smallvec::smallvec![tensor(dt, Shape::of(out))])
}

fn fold_slice(ctx: &Ctx) -> Option<Vec<ConstValue>> {
    let data = ctx.konst(0)?;
    let d: Vec<Dim> = data.dims.iter().map(|&x| Dim::Known(x)).collect();
    let ranges = slice_ranges(ctx, &d).ok()??;
    let r: Vec<(usize, i64, i64, i64)> = ranges
        .into_iter()
        .map(|(a, r)| match r {
            AxisSpan::Clamped(s, e, st) => Some((a, s, e, st)),
            AxisSpan::Open(_) => None,
        })
        .collect::<Option<_>>()?;
    Some(vec![fold::slice(data, &r)?])
}

/// Split of a constant: each output is the run of the data along the axis that its size
/// gives (ONNX operator specification, Split), in output order. Exporters cut a shape into
/// its dims this way (the AffineGrid function body splits `size` into N, C, H, W).
fn fold_split(ctx: &Ctx) -> Option<Vec<ConstValue>> {
    let data = ctx.konst(0)?;
    let axis = norm_axis(ctx.int("axis", 0), data.dims.len())?;
    let total = i64::try_from(*data.dims.get(axis)?).ok()?;
    let parts = split(ctx).ok()?;
    let mut start = 0i64;
    let mut values = Vec::with_capacity(parts.len());
    for part in &parts {
        let len = i64::try_from(part.shape.dims()?.get(axis)?.known()?).ok()?;
        let end = start.checked_add(len).filter(|&e| e <= total)?;
        values.push(fold::slice(data, &[(axis, start, end, 1)])?);
        start = end;
    }
    Some(values)
}

fn gather(ctx: &Ctx) -> Inferred {
    let dt = ctx.dtype(0);
    let (Some(d), Some(idx)) = (ctx.dims(0), ctx.dims(1)) else {
        return Ok(smallvec::smallvec![tensor(dt, Shape::unknown())]);
    };
    let axis = norm_axis(ctx.int("axis", 0), d.len()).ok_or("axis out of range")?;
    Ok(smallvec::smallvec![tensor(dt, gather_shape(&d, idx, axis))])
}

/// Gather's output: `data`'s dims with the one at `axis` replaced by the indices' dims (ONNX
/// spec, Gather). `axis` is already within `data`'s rank.
pub(super) fn gather_shape(data: &[Dim], idx: Vec<Dim>, axis: usize) -> Shape {
    let mut out = DimVec::from(&data[..axis]);
    out.extend(idx);
    out.extend(data[axis + 1..].iter().cloned());
    Shape::of(out)
}

fn fold_gather(ctx: &Ctx) -> Option<Vec<ConstValue>> {
    let data = ctx.konst(0)?;
    let idx = ctx.konst(1)?;
    let axis = norm_axis(ctx.int("axis", 0), data.dims.len())?;
    Some(vec![fold::gather(data, idx, axis)?])
}

fn gather_elements(ctx: &Ctx) -> Inferred {
    Ok(smallvec::smallvec![tensor(ctx.dtype(0), ctx.shape(1))])
}

pub(super) fn gather_nd(ctx: &Ctx) -> Inferred {
    let dt = ctx.dtype(0);
    let (Some(d), Some(i)) = (ctx.dims(0), ctx.dims(1)) else {
        return Ok(smallvec::smallvec![tensor(dt, Shape::unknown())]);
    };
    let b = ctx.int("batch_dims", 0).max(0) as usize;
    let Some(Dim::Known(last)) = i.last().cloned() else {
        return Ok(smallvec::smallvec![tensor(dt, Shape::unknown())]);
    };
    let last = last as usize;
    if b + last > d.len() {
        return Err("indices address more dims than data has".into());
    }
    let mut out = i[..i.len() - 1].to_vec();
    out.extend_from_slice(&d[b + last..]);
    Ok(smallvec::smallvec![tensor(dt, Shape::of(out))])
}

// ---- Pad, Resize, Upsample, Tile, Expand -----------------------------------------------

pub(super) fn pad(ctx: &Ctx) -> Inferred {
    let dt = ctx.dtype(0);
    let Some(d) = ctx.dims(0) else {
        return Ok(smallvec::smallvec![tensor(dt, Shape::unknown())]);
    };
    let pads = if ctx.opset >= 11 {
        match ctx.konst(1) {
            Some(c) if matches!(c.data, ConstData::Dims(_)) && c.try_ints().is_none() => {
                return Ok(smallvec::smallvec![tensor(dt, padded_by_sizes(ctx, &d, c.as_dims())?)]);
            }
            Some(c) => c.try_ints(),
            None => None,
        }
    } else {
        ctx.ints("pads").or_else(|| ctx.ints("paddings"))
    };
    let Some(pads) = pads else {
        return Ok(smallvec::smallvec![tensor(dt, Shape::of_rank(d.len()))]);
    };
    let Some(axes) = pad_axes(ctx, d.len(), pads.len())? else {
        return Ok(smallvec::smallvec![tensor(dt, Shape::of_rank(d.len()))]);
    };
    let mut out = d.clone();
    for (k, &a) in axes.iter().enumerate() {
        let total = pads[k].checked_add(pads[k + axes.len()]).ok_or("pads overflow")?;
        out[a] = match &d[a] {
            Dim::Known(v) => Dim::Known(signed_size(a, *v)?.saturating_add(total).max(0) as u64),
            sym @ Dim::Sym(_) => sym.offset(total),
            Dim::Unknown => Dim::Unknown,
        };
    }
    Ok(smallvec::smallvec![tensor(dt, Shape::of(out))])
}

/// The axes Pad pads (its `axes` input from opset 18, else every axis), checked against the
/// number of pads; `None` where the axes are not known.
fn pad_axes(ctx: &Ctx, rank: usize, pads: usize) -> Result<Option<Vec<usize>>, String> {
    let axes: Vec<usize> = if ctx.opset >= 18 && ctx.has_input(3) {
        match ctx.const_ints(3) {
            Some(a) => a
                .iter()
                .map(|&x| norm_axis(x, rank).ok_or("axis out of range"))
                .collect::<Result<_, _>>()?,
            None => return Ok(None),
        }
    } else {
        (0..rank).collect()
    };
    if pads != 2 * axes.len() {
        return Err(format!("pads has {pads} values for {} axes", axes.len()));
    }
    Ok(Some(axes))
}

/// Pad's output where the pads are sizes computed from the input's shape (a pad up to a
/// multiple of a window, `(k - W % k) % k`): each padded axis grows by its two pads (ONNX
/// operator specification, Pad). Such pads are never negative (a value of sizes), so no axis
/// is cropped.
fn padded_by_sizes(ctx: &Ctx, d: &[Dim], pads: Vec<Dim>) -> Result<Shape, String> {
    let Some(axes) = pad_axes(ctx, d.len(), pads.len())? else {
        return Ok(Shape::of_rank(d.len()));
    };
    // A -1 beside the sizes (`fold::INFER_MARK`) would crop: not a size to add.
    if pads.iter().any(|p| matches!(p, Dim::Sym(s) if &**s == INFER_MARK)) {
        return Ok(Shape::of_rank(d.len()));
    }
    let mut out = d.to_vec();
    for (k, &a) in axes.iter().enumerate() {
        let grown = d[a].add(&pads[k]).and_then(|x| x.add(&pads[k + axes.len()]));
        out[a] = grown.ok_or("pads overflow")?;
    }
    Ok(Shape::of(out))
}

/// floor(size × scale), per the Resize specification. A symbolic size stays an expression
/// where the product is exact: a whole-number scale, or one over a power of two.
fn scaled(d: &Dim, s: f64) -> Dim {
    const WHOLE_MAX: f64 = (1u64 << 32) as f64;
    match d {
        Dim::Known(v) => Dim::Known((*v as f64 * s).floor() as u64),
        Dim::Sym(_) if s >= 1.0 && s.fract() == 0.0 && s <= WHOLE_MAX => {
            d.mul(&Dim::Known(s as u64)).unwrap_or(Dim::Unknown)
        }
        Dim::Sym(_) if s > 0.0 && s < 1.0 => {
            let k = 1.0 / s;
            let exact = k.fract() == 0.0 && k <= WHOLE_MAX && (k as u64).is_power_of_two();
            if exact {
                d.div_floor(k as u64)
            } else {
                Dim::Unknown
            }
        }
        _ => Dim::Unknown,
    }
}

fn resize(ctx: &Ctx) -> Inferred {
    let dt = ctx.dtype(0);
    let Some(d) = ctx.dims(0) else {
        return Ok(smallvec::smallvec![tensor(dt, Shape::unknown())]);
    };
    let (scale_slot, size_slot) = match (ctx.node.op_type.as_str(), ctx.opset) {
        ("Upsample", _) | (_, ..=10) => (1, None),
        _ => (2, Some(3)),
    };
    let axes: Vec<usize> = match ctx.ints("axes") {
        Some(a) => a
            .iter()
            .map(|&x| norm_axis(x, d.len()).ok_or("axis out of range"))
            .collect::<Result<_, _>>()?,
        None => (0..d.len()).collect(),
    };
    let unknown = || Ok(smallvec::smallvec![tensor(dt, Shape::of_rank(d.len()))]);
    let mut out = d.clone();
    if let Some(sizes) = size_slot.filter(|&i| ctx.has_input(i)).map(|i| ctx.konst(i)) {
        let Some(sizes) = sizes.filter(|s| !s.is_empty()) else {
            return unknown();
        };
        if sizes.len() != axes.len() {
            return Err("sizes length differs from the axes".into());
        }
        let policy = ctx
            .string("keep_aspect_ratio_policy")
            .unwrap_or_else(|| "stretch".into());
        if policy != "stretch" {
            let known: Option<Vec<u64>> = axes.iter().map(|&a| d[a].known()).collect();
            let (Some(inp), Some(sizes)) = (known, sizes.try_ints()) else {
                return unknown();
            };
            let ratios = sizes.iter().zip(&inp).map(|(&s, &i)| s as f64 / i as f64);
            let r = if policy == "not_larger" {
                ratios.fold(f64::INFINITY, f64::min)
            } else {
                ratios.fold(0.0, f64::max)
            };
            for (k, &a) in axes.iter().enumerate() {
                out[a] = Dim::Known((inp[k] as f64 * r).round() as u64);
            }
        } else {
            // Sizes read off a symbolic shape (`Shape` × factors) stay symbolic.
            for (&a, size) in axes.iter().zip(sizes.as_dims()) {
                out[a] = size;
            }
        }
        return Ok(smallvec::smallvec![tensor(dt, Shape::of(out))]);
    }
    let scales: Option<Vec<f64>> = if ctx.node.op_type == "Upsample" && ctx.opset < 9 {
        match ctx.node.attr("scales") {
            Some(AttrValue::Floats(f)) => Some(f.iter().map(|&x| x as f64).collect()),
            _ => None,
        }
    } else if ctx.has_input(scale_slot) {
        ctx.konst(scale_slot).map(ConstValue::as_floats)
    } else {
        None
    };
    let Some(scales) = scales.filter(|s| !s.is_empty()) else {
        return unknown();
    };
    if scales.len() != axes.len() {
        return Err("scales length differs from the axes".into());
    }
    for (k, &a) in axes.iter().enumerate() {
        out[a] = scaled(&d[a], scales[k]);
    }
    Ok(smallvec::smallvec![tensor(dt, Shape::of(out))])
}

fn tile(ctx: &Ctx) -> Inferred {
    let dt = ctx.dtype(0);
    let Some(d) = ctx.dims(0) else {
        return Ok(smallvec::smallvec![tensor(dt, Shape::unknown())]);
    };
    let Some(reps) = ctx.const_ints(1) else {
        return Ok(smallvec::smallvec![tensor(dt, Shape::of_rank(d.len()))]);
    };
    if reps.len() != d.len() {
        return Err("repeats length differs from the rank".into());
    }
    let out = d
        .iter()
        .zip(&reps)
        .map(|(x, &r)| x.mul(&Dim::Known(r.max(0) as u64)).ok_or("overflow"))
        .collect::<Result<DimVec, _>>()?;
    Ok(smallvec::smallvec![tensor(dt, Shape::of(out))])
}

fn expand(ctx: &Ctx) -> Inferred {
    let dt = ctx.dtype(0);
    let Some(target) = ctx.konst(1) else {
        return Ok(smallvec::smallvec![tensor(dt, expand_unknown_target(ctx)?)]);
    };
    Ok(smallvec::smallvec![tensor(
        dt,
        broadcast(&[ctx.shape(0), Shape::of(target.as_dims())])?,
    )])
}

/// Expand to a shape known only at run time. Its length, when the shape input's own shape is
/// known, still fixes the rank (max of the two, per the ONNX Expand specification's
/// multidirectional broadcasting), and a known dim of the data other than 1 survives, since
/// the target's dim there must be 1 or that dim.
fn expand_unknown_target(ctx: &Ctx) -> Result<Shape, String> {
    let (Some(data), Some(target)) = (ctx.dims(0), ctx.shape(1).concrete()) else {
        return Ok(Shape::unknown());
    };
    let [len] = target[..] else {
        return Ok(Shape::unknown());
    };
    let rank = data.len().max(rank_within_limit(len)?);
    let lead = rank - data.len();
    Ok(Shape::of(
        (0..rank)
            .map(|i| match i.checked_sub(lead).map(|j| &data[j]) {
                // A symbolic dim may be 1 at run time, and then the target's dim wins.
                Some(Dim::Known(v)) if *v != 1 => Dim::Known(*v),
                _ => Dim::Unknown,
            })
            .collect::<DimVec>(),
    ))
}

fn fold_expand(ctx: &Ctx) -> Option<Vec<ConstValue>> {
    let data = ctx.konst(0)?;
    let target = ctx.konst(1)?.try_ints()?;
    let zeros_dims: Vec<u64> = target.iter().map(|&x| u64::try_from(x).ok()).collect::<Option<_>>()?;
    let n = count(&zeros_dims)?;
    if n > MAX_FOLD_ELEMENTS {
        return None;
    }
    let zero = ConstValue::ints(zeros_dims.clone(), vec![0; n as usize]);
    Some(vec![fold::elementwise(
        &[data, &zero],
        |a| Some(a[0]),
        |a| a[0],
        false,
    )?])
}

// ---- Data-dependent and selection ops ---------------------------------------------------

/// A size known only at run time, named after the node so the report can point at it.
pub(super) fn data_dependent(ctx: &Ctx, what: &str) -> Dim {
    let name = format!("{what}@{}", ctx.node.name);
    match ctx.assumed.get(&name) {
        Some(v) => Dim::Known(v),
        None => Dim::sym(&name),
    }
}

fn top_k(ctx: &Ctx) -> Inferred {
    let Some(d) = ctx.dims(0) else {
        return Ok(smallvec::smallvec![
            tensor(ctx.dtype(0), Shape::unknown()),
            tensor(Some(DType::I64), Shape::unknown()),
        ]);
    };
    let axis = norm_axis(ctx.int("axis", -1), d.len()).ok_or("axis out of range")?;
    let k = if ctx.opset >= 10 {
        ctx.const_ints(1).and_then(|k| k.first().copied())
    } else {
        ctx.opt_int("k")
    };
    // A k computed from sizes (`Min(Shape(scores)[1], 300)` in detection heads) is the
    // expression it folds to; one that is not an expression is a size of its own.
    let sized = || match ctx.konst(1)?.as_dims().as_slice() {
        [k @ Dim::Sym(_)] => Some(k.clone()),
        _ => None,
    };
    let mut out = d.clone();
    out[axis] = match k {
        Some(k) => Dim::Known(k.max(0) as u64),
        None if ctx.opset >= 10 => sized().unwrap_or_else(|| data_dependent(ctx, "k")),
        None => data_dependent(ctx, "k"),
    };
    Ok(smallvec::smallvec![
        tensor(ctx.dtype(0), Shape::of(out.clone())),
        tensor(Some(DType::I64), Shape::of(out)),
    ])
}

fn non_max_suppression(ctx: &Ctx) -> Inferred {
    Ok(smallvec::smallvec![tensor(
        Some(DType::I64),
        Shape::of([data_dependent(ctx, "selected"), Dim::Known(3)]),
    )])
}

fn non_zero(ctx: &Ctx) -> Inferred {
    let rank = ctx
        .shape(0)
        .rank()
        .map(|r| Dim::Known(r as u64))
        .unwrap_or(Dim::Unknown);
    Ok(smallvec::smallvec![tensor(
        Some(DType::I64),
        Shape::of([rank, data_dependent(ctx, "nonzero")]),
    )])
}

fn compress(ctx: &Ctx) -> Inferred {
    let dt = ctx.dtype(0);
    let Some(mut d) = ctx.dims(0) else {
        return Ok(smallvec::smallvec![tensor(dt, Shape::unknown())]);
    };
    match ctx.opt_int("axis") {
        Some(a) => {
            let i = norm_axis(a, d.len()).ok_or("axis out of range")?;
            d[i] = data_dependent(ctx, "kept");
            Ok(smallvec::smallvec![tensor(dt, Shape::of(d))])
        }
        None => Ok(smallvec::smallvec![tensor(
            dt,
            Shape::of([data_dependent(ctx, "kept")])
        )]),
    }
}

fn unique(ctx: &Ctx) -> Inferred {
    let n = data_dependent(ctx, "unique");
    let mut outs = vec![tensor(
        ctx.dtype(0),
        match ctx.opt_int("axis") {
            None => Shape::of([n.clone()]),
            Some(a) => match ctx.dims(0) {
                Some(mut d) => {
                    let i = norm_axis(a, d.len()).ok_or("axis out of range")?;
                    d[i] = n.clone();
                    Shape::of(d)
                }
                None => Shape::unknown(),
            },
        },
    )];
    // inverse_indices: one per element, or one per slice along `axis`.
    let len = match ctx.opt_int("axis") {
        Some(a) => ctx
            .dims(0)
            .and_then(|d| norm_axis(a, d.len()).map(|i| Shape::of([d[i].clone()])))
            .unwrap_or_else(|| Shape::of_rank(1)),
        None => ctx
            .shape(0)
            .element_count()
            .map(|e| Shape::known(&[e]))
            .unwrap_or_else(|| Shape::of_rank(1)),
    };
    for i in 1..ctx.outputs() {
        outs.push(tensor(
            Some(DType::I64),
            if i == 2 { len.clone() } else { Shape::of([n.clone()]) },
        ));
    }
    Ok(outs.into())
}

fn depth_to_space(ctx: &Ctx) -> Inferred {
    let dt = ctx.dtype(0);
    let Some(d) = ctx.dims(0) else {
        return Ok(smallvec::smallvec![tensor(dt, Shape::of_rank(4))]);
    };
    if d.len() != 4 {
        return Err(format!("input of rank {}", d.len()));
    }
    let b = ctx.int("blocksize", 0);
    if b <= 0 {
        return Err("blocksize must be positive".into());
    }
    let b = b as u64;
    let b2 = b.checked_mul(b).ok_or("blocksize squared overflows")?;
    let up = ctx.node.op_type == "DepthToSpace";
    // Symbolic sizes too (`H*2`, `(H+1)/2`): the spec requires the divided sizes to be
    // multiples of the block, so rounding down is exact on any valid input.
    let scale = |x: &Dim, k: u64, grow: bool| -> Result<Dim, String> {
        if grow {
            x.mul(&Dim::Known(k)).ok_or_else(|| "overflow".to_string())
        } else {
            Ok(x.div_floor(k))
        }
    };
    let c = scale(&d[1], b2, !up)?;
    let sp = |x: &Dim| scale(x, b, up);
    Ok(smallvec::smallvec![tensor(
        dt,
        Shape::of([d[0].clone(), c, sp(&d[2])?, sp(&d[3])?])
    )])
}

fn one_hot(ctx: &Ctx) -> Inferred {
    let dt = ctx.dtype(2);
    let Some(d) = ctx.dims(0) else {
        return Ok(smallvec::smallvec![tensor(dt, Shape::unknown())]);
    };
    let depth = ctx
        .konst(1)
        .and_then(|c| c.as_floats().first().copied())
        .map(|x| Dim::Known(x.max(0.0) as u64))
        .unwrap_or(Dim::Unknown);
    let axis = norm_insert_axis(ctx.int("axis", -1), d.len()).ok_or("axis out of range")?;
    let mut out = d;
    out.insert(axis, depth);
    Ok(smallvec::smallvec![tensor(dt, Shape::of(out))])
}

macro_rules! op {
    ($name:literal, $infer:expr) => {
        OpDef {
            domain: "",
            op: $name,
            family: "shape_ops",
            infer: $infer,
            cost: CostRule::Free,
            fold: None,
        }
    };
    ($name:literal, $infer:expr, $fold:expr) => {
        OpDef {
            domain: "",
            op: $name,
            family: "shape_ops",
            infer: $infer,
            cost: CostRule::Free,
            fold: Some($fold),
        }
    };
}

pub static OPS: &[OpDef] = &[
    op!("Constant", constant, fold_constant),
    op!("ConstantOfShape", constant_of_shape, fold_constant_of_shape),
    op!("Shape", shape, fold_shape),
    op!("Size", size, fold_size),
    op!("Range", range, fold_range),
    op!("Reshape", reshape, fold_reshape),
    op!("Flatten", flatten, fold_same_data),
    op!("Transpose", transpose, fold_transpose),
    op!("Squeeze", squeeze, fold_same_data),
    op!("Unsqueeze", unsqueeze, fold_same_data),
    op!("Concat", concat, fold_concat),
    op!("Split", split, fold_split),
    op!("Slice", slice, fold_slice),
    op!("Gather", gather, fold_gather),
    op!("GatherElements", gather_elements),
    op!("GatherND", gather_nd),
    op!("Pad", pad),
    op!("Resize", resize),
    op!("Upsample", resize),
    op!("Tile", tile),
    op!("Expand", expand, fold_expand),
    op!("TopK", top_k),
    op!("NonMaxSuppression", non_max_suppression),
    op!("NonZero", non_zero),
    op!("Compress", compress),
    op!("Unique", unique),
    op!("DepthToSpace", depth_to_space),
    op!("SpaceToDepth", depth_to_space),
    op!("OneHot", one_hot),
];
