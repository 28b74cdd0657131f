//! Helpers shared by the op families: attribute access, broadcasting, axis handling.

use crate::ir::{AttrValue, ConstData, ConstValue, DType, Dim, DimVec, Fact, Shape};

use super::Ctx;

impl<'a> Ctx<'a> {
    pub fn fact(&self, i: usize) -> Option<&'a Fact> {
        self.inputs.get(i).copied().flatten()
    }

    pub fn has_input(&self, i: usize) -> bool {
        self.node.inputs.get(i).is_some_and(Option::is_some)
    }

    pub fn dtype(&self, i: usize) -> Option<DType> {
        self.fact(i)?.dtype
    }

    pub fn shape(&self, i: usize) -> Shape {
        self.fact(i).map(|f| f.shape.clone()).unwrap_or_else(Shape::unknown)
    }

    /// The input's dims, borrowed: for the ops every model has many of, where the copy
    /// `dims` makes was a measurable share of inference.
    pub fn dims_ref(&self, i: usize) -> Option<&'a [Dim]> {
        self.fact(i)?.shape.dims()
    }

    /// An integer-list attribute, borrowed.
    pub fn ints_ref(&self, name: &str) -> Option<&'a [i64]> {
        match self.node.attr(name) {
            Some(AttrValue::Ints(v)) => Some(v),
            _ => None,
        }
    }

    pub fn dims(&self, i: usize) -> Option<Vec<Dim>> {
        self.fact(i)?.shape.dims().map(<[Dim]>::to_vec)
    }

    pub fn konst(&self, i: usize) -> Option<&'a ConstValue> {
        self.consts.get(i).copied().flatten()
    }

    /// The input's values as integers, if every one is known: a shape value with a symbolic
    /// element is not a list of numbers (its `-1` stand-in would read as "infer" or "last").
    pub fn const_ints(&self, i: usize) -> Option<Vec<i64>> {
        self.konst(i).and_then(ConstValue::try_ints)
    }

    pub fn outputs(&self) -> usize {
        self.node.outputs.len()
    }

    pub fn int(&self, name: &str, default: i64) -> i64 {
        match self.node.attr(name) {
            Some(AttrValue::Int(v)) => *v,
            _ => default,
        }
    }

    pub fn opt_int(&self, name: &str) -> Option<i64> {
        match self.node.attr(name) {
            Some(AttrValue::Int(v)) => Some(*v),
            _ => None,
        }
    }

    pub fn float(&self, name: &str, default: f32) -> f32 {
        match self.node.attr(name) {
            Some(AttrValue::Float(v)) => *v,
            _ => default,
        }
    }

    pub fn ints(&self, name: &str) -> Option<Vec<i64>> {
        match self.node.attr(name) {
            Some(AttrValue::Ints(v)) => Some(v.clone()),
            _ => None,
        }
    }

    pub fn string(&self, name: &str) -> Option<String> {
        match self.node.attr(name) {
            Some(AttrValue::String(s)) => Some(s.clone()),
            _ => None,
        }
    }

    /// An axis attribute normalised against `rank`, or an error naming the node.
    pub fn axis(&self, value: i64, rank: usize) -> Result<usize, String> {
        norm_axis(value, rank).ok_or_else(|| format!("axis {value} out of range for rank {rank}"))
    }
}

pub fn norm_axis(value: i64, rank: usize) -> Option<usize> {
    let r = rank as i64;
    let a = if value < 0 { value + r } else { value };
    (0..r).contains(&a).then_some(a as usize)
}

/// Like `norm_axis`, but for positions an axis may be inserted at (0..=rank).
pub fn norm_insert_axis(value: i64, rank: usize) -> Option<usize> {
    let r = rank as i64;
    let a = if value < 0 { value + r + 1 } else { value };
    (0..=r).contains(&a).then_some(a as usize)
}

pub fn same_as(ctx: &Ctx, i: usize) -> Fact {
    ctx.fact(i)
        .cloned()
        .map(|mut f| {
            if f.value_type != crate::ir::ValueType::Tensor {
                return f;
            }
            f.value_type = crate::ir::ValueType::Tensor;
            f
        })
        .unwrap_or_default()
}

/// One output with input 0's fact: the shape function of every op that keeps its input's
/// type and shape.
pub fn like_input(ctx: &Ctx) -> super::Inferred {
    Ok(smallvec::smallvec![same_as(ctx, 0)])
}

pub fn tensor(dtype: Option<DType>, shape: Shape) -> Fact {
    Fact::tensor(dtype, shape)
}

fn broadcast_dim(a: &Dim, b: &Dim) -> Result<Dim, String> {
    Ok(match (a, b) {
        (Dim::Known(1), d) | (d, Dim::Known(1)) => d.clone(),
        (Dim::Known(x), Dim::Known(y)) => {
            if x != y {
                return Err(format!("cannot broadcast dims {x} and {y}"));
            }
            Dim::Known(*x)
        }
        // A known size above one wins: the other must equal it or be 1 for the model to be valid.
        (Dim::Known(x), _) | (_, Dim::Known(x)) => Dim::Known(*x),
        (Dim::Sym(x), Dim::Sym(y)) if x == y => Dim::Sym(x.clone()),
        (x @ Dim::Sym(_), m) | (m, x @ Dim::Sym(_)) if m.caps(x) => x.clone(),
        // Likewise a size that is never 1 (`Dim::never_one`) wins whatever the other is.
        (x, _) | (_, x) if x.never_one() => x.clone(),
        _ => Dim::Unknown,
    })
}

/// Multidirectional (numpy-style) broadcasting, ONNX "Broadcasting in ONNX".
pub fn broadcast(shapes: &[Shape]) -> Result<Shape, String> {
    broadcast_all(shapes.iter())
}

/// `broadcast` over borrowed shapes: an element-wise node's inputs are not copied first.
pub fn broadcast_all<'s>(shapes: impl Iterator<Item = &'s Shape> + Clone) -> Result<Shape, String> {
    if shapes.clone().any(|s| s.dims().is_none()) {
        return Ok(Shape::unknown());
    }
    // Operands of one shape (a residual Add, a Mul by a gate) broadcast to that shape: the
    // output shares it instead of a copy.
    if let Some(first) = shapes.clone().next() {
        // Shared shapes compare by address first (`Arc`'s equality for `Eq` contents).
        if shapes.clone().all(|s| s == first) {
            return Ok(first.clone());
        }
    }
    let out = broadcast_dims(shapes.filter_map(Shape::dims), 0)?;
    Ok(Shape::of(out))
}

/// The broadcast of known dim lists, with room for `extra` dims after them (MatMul appends
/// its matrix dims to the broadcast batch dims).
pub(super) fn broadcast_dims<'d>(
    lists: impl Iterator<Item = &'d [Dim]> + Clone,
    extra: usize,
) -> Result<DimVec, String> {
    let rank = lists.clone().map(<[Dim]>::len).max().unwrap_or(0);
    // Lists that each end the longest one (a weight matrix's empty batch, an operand of the
    // same shape, a bias over the last dims) broadcast to the longest as it is: a dim
    // broadcast with itself is itself.
    if let Some(longest) = lists.clone().find(|l| l.len() == rank) {
        if lists.clone().all(|l| longest.ends_with(l)) {
            let mut out = DimVec::with_capacity(rank + extra);
            out.extend(longest.iter().cloned());
            return Ok(out);
        }
    }
    // Missing leading dims are 1, which broadcasts to anything.
    let mut out = DimVec::with_capacity(rank + extra);
    out.resize(rank, Dim::Known(1));
    for dims in lists {
        let off = rank - dims.len();
        for (i, d) in dims.iter().enumerate() {
            out[off + i] = broadcast_dim(&out[off + i], d)?;
        }
    }
    Ok(out)
}

/// Product of dims as a Dim (symbolic where needed); error on overflow.
pub fn product(dims: &[Dim]) -> Result<Dim, String> {
    let mut acc = Dim::Known(1);
    for d in dims {
        acc = acc.mul(d).ok_or("dim product overflows 64 bits")?;
    }
    Ok(acc)
}

/// An axis's size as the int64 that Slice's and Pad's signed arithmetic takes (ONNX states
/// dims as int64): a size past it, a product of hostile sizes, is an error naming the axis.
pub fn signed_size(axis: usize, size: u64) -> Result<i64, String> {
    i64::try_from(size).map_err(|_| format!("axis {axis} of size {size} is beyond int64"))
}

/// Checked product of known sizes.
pub fn count(dims: &[u64]) -> Option<u64> {
    dims.iter().try_fold(1u64, |a, &d| a.checked_mul(d))
}

/// A constant with the same element kind as `like` (ints stay ints).
pub fn const_like(like: &ConstValue, dims: Vec<u64>, v: Vec<f64>) -> ConstValue {
    match like.data {
        ConstData::Float(_) => ConstValue::floats(dims, v),
        _ => ConstValue::ints(dims, v.into_iter().map(|x| x as i64).collect()),
    }
}
