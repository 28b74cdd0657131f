//! Constant folding of small integer and float tensors, so exporter patterns such as
//! `Shape → Gather → Unsqueeze → Concat → Reshape` resolve to concrete shapes.

use crate::ir::{ConstData, ConstValue, Dim};

use super::util::count;
use super::Ctx;

/// Stands for a literal -1 inside a partly symbolic shape value (Reshape's "infer this dim").
pub const INFER_MARK: &str = "-1";

/// Element limit for folded values: shape arithmetic is tiny; anything larger is left alone.
pub const MAX_FOLD_ELEMENTS: u64 = 1 << 16;

/// Broadcast shape of two concrete shapes, or None if they do not broadcast.
fn broadcast_dims(a: &[u64], b: &[u64]) -> Option<Vec<u64>> {
    let r = a.len().max(b.len());
    let mut out = vec![0; r];
    for i in 0..r {
        let x = if i + a.len() >= r { a[i + a.len() - r] } else { 1 };
        let y = if i + b.len() >= r { b[i + b.len() - r] } else { 1 };
        out[i] = match (x, y) {
            (x, y) if x == y => x,
            (1, y) => y,
            (x, 1) => x,
            _ => return None,
        };
    }
    Some(out)
}

/// The broadcast shape of folded inputs, if they broadcast and the result is small enough.
fn folded_shape(values: &[&ConstValue]) -> Option<Vec<u64>> {
    let mut dims: Vec<u64> = Vec::new();
    for v in values {
        dims = broadcast_dims(&dims, &v.dims)?;
    }
    (count(&dims)? <= MAX_FOLD_ELEMENTS).then_some(dims)
}

/// Index into `dims`-shaped data for the broadcast position `pos` of `out`.
fn source_index(pos: &[u64], dims: &[u64]) -> usize {
    let off = pos.len() - dims.len();
    let mut idx = 0u64;
    for (i, &d) in dims.iter().enumerate() {
        let p = if d == 1 { 0 } else { pos[off + i] };
        idx = idx * d + p;
    }
    idx as usize
}

fn positions(dims: &[u64]) -> impl Iterator<Item = Vec<u64>> + '_ {
    let total = count(dims).unwrap_or(0);
    (0..total).map(move |mut flat| {
        let mut pos = vec![0; dims.len()];
        for i in (0..dims.len()).rev() {
            let d = dims[i].max(1);
            pos[i] = flat % d;
            flat /= d;
        }
        pos
    })
}

/// Folds an element-wise op over any number of broadcast inputs.
pub fn elementwise(
    values: &[&ConstValue],
    int_op: impl Fn(&[i64]) -> Option<i64>,
    float_op: impl Fn(&[f64]) -> f64,
    bool_result: bool,
) -> Option<ConstValue> {
    if !values.iter().all(|v| v.is_numeric()) {
        return None;
    }
    let dims = folded_shape(values)?;
    let all_int = values.iter().all(|v| matches!(v.data, ConstData::Int(_)));
    if all_int || bool_result {
        let ints: Vec<Vec<i64>> = values.iter().map(|v| v.as_ints()).collect();
        let floats: Vec<Vec<f64>> = values.iter().map(|v| v.as_floats()).collect();
        let mut out = Vec::new();
        for pos in positions(&dims) {
            if all_int {
                let args: Vec<i64> = values
                    .iter()
                    .zip(&ints)
                    .map(|(v, d)| d[source_index(&pos, &v.dims)])
                    .collect();
                out.push(int_op(&args)?);
            } else {
                let args: Vec<f64> = values
                    .iter()
                    .zip(&floats)
                    .map(|(v, d)| d[source_index(&pos, &v.dims)])
                    .collect();
                out.push(float_op(&args) as i64);
            }
        }
        Some(ConstValue::ints(dims, out))
    } else {
        let floats: Vec<Vec<f64>> = values.iter().map(|v| v.as_floats()).collect();
        let out = positions(&dims)
            .map(|pos| {
                let args: Vec<f64> = values
                    .iter()
                    .zip(&floats)
                    .map(|(v, d)| d[source_index(&pos, &v.dims)])
                    .collect();
                float_op(&args)
            })
            .collect();
        Some(ConstValue::floats(dims, out))
    }
}

/// A reduction's step for integers (None on overflow) and for floats.
pub type ReduceOps = (fn(i64, i64) -> Option<i64>, fn(f64, f64) -> f64);

/// Reduces a constant over the flagged axes (`keep`: reduced axes stay as size 1). Integers
/// stay integers (None on overflow); an empty reduction is left unfolded, since the value
/// the specification gives it depends on the op.
pub fn reduce(data: &ConstValue, reduced: &[bool], keep: bool, (int_op, float_op): ReduceOps) -> Option<ConstValue> {
    if reduced.len() != data.dims.len() || !data.is_numeric() || count(&data.dims)? == 0 {
        return None;
    }
    let kept: Vec<u64> = data
        .dims
        .iter()
        .zip(reduced)
        .map(|(&d, &r)| if r { 1 } else { d })
        .collect();
    let n = usize::try_from(count(&kept)?).ok()?;
    let slot = |pos: &[u64]| {
        kept.iter()
            .zip(pos)
            .fold(0u64, |i, (&d, &p)| i * d + if d == 1 { 0 } else { p }) as usize
    };
    let dims: Vec<u64> = if keep {
        kept.clone()
    } else {
        data.dims
            .iter()
            .zip(reduced)
            .filter(|(_, &r)| !r)
            .map(|(&d, _)| d)
            .collect()
    };
    if matches!(data.data, ConstData::Float(_)) {
        let v = data.as_floats();
        let mut out: Vec<Option<f64>> = vec![None; n];
        for (pos, x) in positions(&data.dims).zip(v) {
            let o = &mut out[slot(&pos)];
            *o = Some(o.map_or(x, |a| float_op(a, x)));
        }
        return Some(ConstValue::floats(dims, out.into_iter().collect::<Option<_>>()?));
    }
    let v = data.try_ints()?;
    let mut out: Vec<Option<i64>> = vec![None; n];
    for (pos, x) in positions(&data.dims).zip(v) {
        let o = &mut out[slot(&pos)];
        *o = Some(match *o {
            Some(a) => int_op(a, x)?,
            None => x,
        });
    }
    Some(ConstValue::ints(dims, out.into_iter().collect::<Option<_>>()?))
}

/// An element-wise op over shape values of which at least one is known only in part
/// (`ConstData::Dims`), all others integers or, with `whole_floats`, floats that are whole
/// numbers (exporters cast a shape to float to scale it: `H` × 2.0 is `2*H` exactly). The
/// result is integers where every element came out known, dims otherwise.
pub fn dims_elementwise(
    values: &[&ConstValue],
    op: impl Fn(&Dim, &Dim) -> Option<Dim>,
    whole_floats: bool,
) -> Option<ConstValue> {
    if !values.iter().any(|v| matches!(v.data, ConstData::Dims(_))) {
        return None;
    }
    let dims = folded_shape(values)?;
    let args: Vec<Vec<Dim>> = values
        .iter()
        .map(|v| match &v.data {
            ConstData::Float(f) if whole_floats => f.iter().map(|&x| whole_dim(x)).collect(),
            ConstData::Float(_) => None,
            _ => Some(v.as_dims()),
        })
        .collect::<Option<_>>()?;
    // Reshape's -1 is not a size: no arithmetic on it.
    if args
        .iter()
        .flatten()
        .any(|d| matches!(d, Dim::Sym(s) if &**s == INFER_MARK))
    {
        return None;
    }
    let mut out = Vec::new();
    for pos in positions(&dims) {
        let mut it = values.iter().zip(&args).map(|(v, a)| &a[source_index(&pos, &v.dims)]);
        let first = it.next()?.clone();
        out.push(it.try_fold(first, |acc, x| op(&acc, x))?);
    }
    let known: Option<Vec<i64>> = out
        .iter()
        .map(|d| d.known().and_then(|x| i64::try_from(x).ok()))
        .collect();
    Some(ConstValue {
        dims,
        data: match known {
            Some(v) => ConstData::Int(v),
            None => ConstData::Dims(out),
        },
    })
}

/// One element of a shape value known in part: an integer (negative ones included, as
/// `Reshape`'s -1, which a partly symbolic value holds as `INFER_MARK`), or a size that may
/// be symbolic.
#[derive(Clone)]
enum Elem {
    Int(i64),
    Size(Dim),
}

/// The elements of an integer or partly symbolic value; None for floats.
fn elems(v: &ConstValue) -> Option<Vec<Elem>> {
    match &v.data {
        ConstData::Dims(d) => Some(
            d.iter()
                .map(|x| match x {
                    Dim::Sym(s) if &**s == INFER_MARK => Elem::Int(-1),
                    _ => match x.known().and_then(|k| i64::try_from(k).ok()) {
                        Some(k) => Elem::Int(k),
                        None => Elem::Size(x.clone()),
                    },
                })
                .collect(),
        ),
        ConstData::Float(_) => None,
        ConstData::Int(_) => Some(v.as_ints().into_iter().map(Elem::Int).collect()),
    }
}

/// `Equal` where a shape value is known in part, as exporters test a target shape against -1
/// before `Expand`: a size is never negative, and a symbol equals itself; any other question
/// about a symbol has no answer here.
pub fn dims_equal(a: &ConstValue, b: &ConstValue) -> Option<ConstValue> {
    if !matches!(a.data, ConstData::Dims(_)) && !matches!(b.data, ConstData::Dims(_)) {
        return None;
    }
    let dims = folded_shape(&[a, b])?;
    let (x, y) = (elems(a)?, elems(b)?);
    let out = positions(&dims)
        .map(|pos| {
            match (&x[source_index(&pos, &a.dims)], &y[source_index(&pos, &b.dims)]) {
                (Elem::Int(p), Elem::Int(q)) => Some(p == q),
                (Elem::Size(_), Elem::Int(k)) | (Elem::Int(k), Elem::Size(_)) if *k < 0 => Some(false),
                (Elem::Size(Dim::Sym(p)), Elem::Size(Dim::Sym(q))) if p == q => Some(true),
                _ => None,
            }
            .map(i64::from)
        })
        .collect::<Option<Vec<i64>>>()?;
    Some(ConstValue::ints(dims, out))
}

/// `Where` choosing between shape values known in part, with a known condition. The result
/// keeps exact integers when every chosen element is one; beside a symbol, a -1 is kept as
/// `INFER_MARK` (as `Concat` keeps it) and any other negative integer is not folded.
pub fn dims_where(cond: &ConstValue, a: &ConstValue, b: &ConstValue) -> Option<ConstValue> {
    if !matches!(a.data, ConstData::Dims(_)) && !matches!(b.data, ConstData::Dims(_)) {
        return None;
    }
    let c = cond.try_ints()?;
    let dims = folded_shape(&[cond, a, b])?;
    let (x, y) = (elems(a)?, elems(b)?);
    let chosen: Vec<Elem> = positions(&dims)
        .map(|pos| {
            let pick = *c.get(source_index(&pos, &cond.dims))? != 0;
            let (from, v) = if pick { (&x, a) } else { (&y, b) };
            from.get(source_index(&pos, &v.dims)).cloned()
        })
        .collect::<Option<_>>()?;
    let data = match chosen
        .iter()
        .map(|e| match e {
            Elem::Int(k) => Some(*k),
            Elem::Size(_) => None,
        })
        .collect::<Option<Vec<i64>>>()
    {
        Some(ints) => ConstData::Int(ints),
        None => ConstData::Dims(
            chosen
                .into_iter()
                .map(|e| match e {
                    Elem::Int(-1) => Some(Dim::sym(INFER_MARK)),
                    Elem::Int(k) => u64::try_from(k).ok().map(Dim::Known),
                    Elem::Size(d) => Some(d),
                })
                .collect::<Option<_>>()?,
        ),
    };
    Some(ConstValue { dims, data })
}

/// A float that is a whole, non-negative number that fits a size, as a dim.
fn whole_dim(x: f64) -> Option<Dim> {
    (x.is_finite() && x >= 0.0 && x.fract() == 0.0 && x < 9.0e15).then_some(Dim::Known(x as u64))
}

/// All inputs present and constant, in slot order.
pub fn all_consts<'a>(ctx: &Ctx<'a>) -> Option<Vec<&'a ConstValue>> {
    (0..ctx.node.inputs.len())
        .filter(|&i| ctx.has_input(i))
        .map(|i| ctx.konst(i))
        .collect()
}

/// Int division rounding toward negative infinity is not ONNX Div (which truncates like C).
pub fn trunc_div(a: i64, b: i64) -> Option<i64> {
    a.checked_div(b)
}

/// Gathers `indices` (already in range) from a 1-D or N-D constant along `axis`.
pub fn gather(data: &ConstValue, indices: &ConstValue, axis: usize) -> Option<ConstValue> {
    let r = data.dims.len();
    if axis >= r {
        return None;
    }
    let outer = count(&data.dims[..axis])?;
    let size = data.dims[axis];
    let dim = i64::try_from(size).ok()?;
    let inner = count(&data.dims[axis + 1..])?;
    let idx: Vec<u64> = indices
        .as_ints()
        .into_iter()
        .map(|i| {
            let j = if i < 0 { i + dim } else { i };
            (0..dim).contains(&j).then_some(j as u64)
        })
        .collect::<Option<_>>()?;
    let mut dims = data.dims[..axis].to_vec();
    dims.extend_from_slice(&indices.dims);
    dims.extend_from_slice(&data.dims[axis + 1..]);
    if count(&dims)? > MAX_FOLD_ELEMENTS {
        return None;
    }
    let mut flat = Vec::new();
    for o in 0..outer {
        for &i in &idx {
            for k in 0..inner {
                flat.push(((o * size + i) * inner + k) as usize);
            }
        }
    }
    Some(data.pick(dims, &flat))
}

/// Slices a constant along several axes (starts/ends already clamped, steps non-zero).
pub fn slice(data: &ConstValue, ranges: &[(usize, i64, i64, i64)]) -> Option<ConstValue> {
    let mut keep: Vec<Vec<u64>> = data.dims.iter().map(|&d| (0..d).collect()).collect();
    for &(axis, start, end, step) in ranges {
        let mut v = Vec::new();
        let mut i = start;
        while (step > 0 && i < end) || (step < 0 && i > end) {
            v.push(i as u64);
            // A step near int64's extremes walks past the bounds in one stride.
            match i.checked_add(step) {
                Some(next) => i = next,
                None => break,
            }
        }
        keep[axis] = v;
    }
    let dims: Vec<u64> = keep.iter().map(|k| k.len() as u64).collect();
    let total = count(&dims)?;
    if total > MAX_FOLD_ELEMENTS {
        return None;
    }
    let strides: Vec<u64> = (0..data.dims.len())
        .map(|i| count(&data.dims[i + 1..]).unwrap_or(0))
        .collect();
    let mut src_idx = Vec::with_capacity(total as usize);
    for pos in positions(&dims) {
        let mut s = 0;
        for (a, &p) in pos.iter().enumerate() {
            s += keep[a][p as usize] * strides[a];
        }
        src_idx.push(s as usize);
    }
    Some(data.pick(dims, &src_idx))
}

/// Output axis `i` is input axis `perm[i]`; `perm` is a permutation of the axes.
pub fn transpose(data: &ConstValue, perm: &[usize]) -> Option<ConstValue> {
    let rank = data.dims.len();
    let mut seen = vec![false; rank];
    for &p in perm {
        if p >= rank || std::mem::replace(&mut seen[p], true) {
            return None;
        }
    }
    let dims: Vec<u64> = perm.iter().map(|&p| data.dims[p]).collect();
    let total = count(&dims)?;
    if total > MAX_FOLD_ELEMENTS {
        return None;
    }
    let strides: Vec<u64> = (0..rank).map(|i| count(&data.dims[i + 1..]).unwrap_or(0)).collect();
    let src_idx: Vec<usize> = positions(&dims)
        .map(|pos| pos.iter().zip(perm).map(|(&x, &p)| x * strides[p]).sum::<u64>() as usize)
        .collect();
    Some(data.pick(dims, &src_idx))
}
