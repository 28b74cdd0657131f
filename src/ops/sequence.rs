//! Sequence and optional values (ONNX operator specification). A sequence's fact is the fact
//! all its elements satisfy, and, where the graph builds it element by element with known
//! positions (SequenceEmpty, SequenceConstruct, SequenceInsert, SequenceErase, SplitToSequence
//! with known sizes), each element's own fact: SequenceAt at a constant position,
//! SequenceLength and ConcatFromSequence then see what is really there. Elsewhere (positions
//! read at run time, Loop-carried sequences) elements whose shapes differ merge to unknown
//! dims.

use crate::ir::{ConstValue, DType, Dim, Fact, Shape, ValueType, MAX_TRACKED_ELEMENTS};

use super::control_flow::merge;
use super::shape_ops::concat_shape;
use super::util::{norm_axis, norm_insert_axis, tensor};
use super::{CostRule, Ctx, Inferred, OpDef};

fn sequence_of(elem: Fact) -> Fact {
    Fact {
        value_type: ValueType::sequence(elem, None),
        dtype: None,
        shape: Shape::unknown(),
    }
}

/// A sequence of these elements; `empty` is the element fact of an empty one. Past
/// `MAX_TRACKED_ELEMENTS`, only the merged fact is kept.
fn sequence_with(elements: Vec<Fact>, empty: Fact) -> Fact {
    let mut facts = elements.iter();
    let elem = match facts.next() {
        Some(first) => facts.fold(first.clone(), |a, b| merge(&a, b)),
        None => empty,
    };
    let tracked = (elements.len() <= MAX_TRACKED_ELEMENTS).then_some(elements);
    Fact {
        value_type: ValueType::sequence(elem, tracked),
        dtype: None,
        shape: Shape::unknown(),
    }
}

fn optional_of(inner: Fact) -> Fact {
    Fact {
        value_type: ValueType::Optional(Box::new(inner)),
        dtype: None,
        shape: Shape::unknown(),
    }
}

/// The element fact of a sequence input (a plain tensor input stands for itself).
fn element(ctx: &Ctx, i: usize) -> Fact {
    match ctx.fact(i) {
        Some(Fact {
            value_type: ValueType::Sequence(s),
            ..
        }) => s.element.clone(),
        Some(Fact {
            value_type: ValueType::Optional(e),
            ..
        }) => (**e).clone(),
        Some(f) => f.clone(),
        None => Fact::default(),
    }
}

/// Each element's fact of a sequence input, where they are tracked.
fn elements(ctx: &Ctx, i: usize) -> Option<Vec<Fact>> {
    match ctx.fact(i) {
        Some(Fact {
            value_type: ValueType::Sequence(s),
            ..
        }) => s.elements.clone(),
        _ => None,
    }
}

/// A constant position input into a sequence of `n` elements, per the specification:
/// negative positions count from the back (`-1` is the last element, or, for an insertion,
/// the place before it); an insertion may also take `n`, the back.
fn position(ctx: &Ctx, i: usize, n: usize, insertion: bool) -> Option<usize> {
    let p = *ctx.konst(i)?.try_ints()?.first()?;
    let at = if p < 0 {
        p.checked_add(i64::try_from(n).ok()?)?
    } else {
        p
    };
    usize::try_from(at).ok().filter(|&a| a < n || (insertion && a == n))
}

fn sequence_empty(ctx: &Ctx) -> Inferred {
    let dt = DType::from_onnx(ctx.int("dtype", 1) as i32);
    Ok(smallvec::smallvec![sequence_with(
        Vec::new(),
        tensor(dt, Shape::unknown())
    )])
}

fn sequence_construct(ctx: &Ctx) -> Inferred {
    let facts: Vec<Fact> = (0..ctx.node.inputs.len())
        .map(|i| ctx.fact(i).cloned().unwrap_or_default())
        .collect();
    Ok(smallvec::smallvec![sequence_with(facts, Fact::default())])
}

fn sequence_insert(ctx: &Ctx) -> Inferred {
    let elem = element(ctx, 0);
    let added = ctx.fact(1).cloned().unwrap_or_default();
    if let Some(mut v) = elements(ctx, 0) {
        let at = if ctx.has_input(2) {
            position(ctx, 2, v.len(), true)
        } else {
            Some(v.len())
        };
        if let Some(at) = at {
            v.insert(at, added);
            return Ok(smallvec::smallvec![sequence_with(v, elem)]);
        }
    }
    // An empty sequence's element has no shape yet: the inserted tensor decides it.
    let merged = if elem.shape.rank().is_none() && elem.dtype == added.dtype {
        added
    } else {
        merge(&elem, &added)
    };
    Ok(smallvec::smallvec![sequence_of(merged)])
}

fn sequence_erase(ctx: &Ctx) -> Inferred {
    if let Some(mut v) = elements(ctx, 0) {
        let at = if ctx.has_input(1) {
            position(ctx, 1, v.len(), false)
        } else {
            v.len().checked_sub(1)
        };
        if let Some(at) = at {
            v.remove(at);
            return Ok(smallvec::smallvec![sequence_with(v, element(ctx, 0))]);
        }
    }
    Ok(smallvec::smallvec![sequence_of(element(ctx, 0))])
}

fn sequence_at(ctx: &Ctx) -> Inferred {
    let at = elements(ctx, 0).and_then(|v| Some(v.get(position(ctx, 1, v.len(), false)?)?.clone()));
    Ok(smallvec::smallvec![at.unwrap_or_else(|| element(ctx, 0))])
}

fn sequence_length(_ctx: &Ctx) -> Inferred {
    Ok(smallvec::smallvec![tensor(Some(DType::I64), Shape::scalar())])
}

/// The length of a sequence whose elements are tracked is fixed by the graph, not the data.
fn fold_sequence_length(ctx: &Ctx) -> Option<Vec<ConstValue>> {
    let n = i64::try_from(elements(ctx, 0)?.len()).ok()?;
    Some(vec![ConstValue::ints(Vec::new(), vec![n])])
}

/// SplitToSequence: without `split`, pieces of 1 along `axis` (removed when keepdims = 0);
/// a scalar `split` gives pieces of that size (the last one shorter when the size does not
/// divide the axis); a 1-D one gives pieces of its sizes. With the axis known, the pieces are
/// tracked one by one.
fn split_to_sequence(ctx: &Ctx) -> Inferred {
    let Some(x) = ctx.dims(0) else {
        return Ok(smallvec::smallvec![sequence_of(tensor(ctx.dtype(0), Shape::unknown()))]);
    };
    let axis = norm_axis(ctx.int("axis", 0), x.len()).ok_or("axis out of range")?;
    let piece = |size: Option<u64>| {
        let mut d = x.clone();
        d[axis] = size.map_or(Dim::Unknown, Dim::Known);
        tensor(ctx.dtype(0), Shape::of(d))
    };
    let n = x[axis].known();
    let sizes: Option<Vec<u64>> = if !ctx.has_input(1) {
        if ctx.int("keepdims", 1) == 0 {
            let mut d = x.clone();
            d.remove(axis);
            let one = tensor(ctx.dtype(0), Shape::of(d));
            return Ok(smallvec::smallvec![match n.and_then(|n| usize::try_from(n).ok()) {
                Some(n) if n <= MAX_TRACKED_ELEMENTS => sequence_with(vec![one; n], Fact::default()),
                _ => sequence_of(one),
            }]);
        }
        n.and_then(|n| usize::try_from(n).ok())
            .filter(|&n| n <= MAX_TRACKED_ELEMENTS)
            .map(|n| vec![1; n])
    } else {
        match ctx.konst(1) {
            Some(c) if c.dims.is_empty() => match (c.as_ints().first(), n) {
                (Some(&s), Some(n)) if s > 0 => {
                    let s = s as u64;
                    let count = n.div_ceil(s);
                    (count as usize <= MAX_TRACKED_ELEMENTS).then(|| (0..count).map(|i| s.min(n - i * s)).collect())
                }
                _ => None,
            },
            Some(c) if c.dims.len() == 1 => c
                .try_ints()
                .and_then(|v| v.iter().map(|&x| u64::try_from(x).ok()).collect()),
            _ => None,
        }
    };
    match sizes {
        Some(sizes) if sizes.len() <= MAX_TRACKED_ELEMENTS => Ok(smallvec::smallvec![sequence_with(
            sizes.into_iter().map(|s| piece(Some(s))).collect(),
            Fact::default(),
        )]),
        // Pieces of one size when the scalar split divides the axis, else unknown.
        _ => {
            let size = match (ctx.konst(1), n) {
                (None, _) => Some(1),
                (Some(c), Some(n)) if c.dims.is_empty() => match c.as_ints().first() {
                    Some(&s) if s > 0 && n % s as u64 == 0 => Some(s as u64),
                    _ => None,
                },
                (Some(c), _) if c.len() == 1 && c.dims.len() == 1 => Some(c.as_ints()[0].max(0) as u64),
                _ => None,
            };
            Ok(smallvec::smallvec![sequence_of(piece(size))])
        }
    }
}

/// ConcatFromSequence: with the elements tracked, the concatenation of their shapes (or their
/// stack along a new axis); otherwise the element shape with `axis` of unknown total size, or
/// a new axis of unknown count when `new_axis` = 1.
fn concat_from_sequence(ctx: &Ctx) -> Inferred {
    let e = element(ctx, 0);
    let new_axis = ctx.int("new_axis", 0) != 0;
    if let Some(v) = elements(ctx, 0).filter(|v| !v.is_empty()) {
        let shapes: Vec<Option<Vec<Dim>>> = v.iter().map(|f| f.shape.dims().map(<[Dim]>::to_vec)).collect();
        let shape = if new_axis {
            match e.shape.dims().map(<[Dim]>::to_vec) {
                Some(mut d) => {
                    let a = norm_insert_axis(ctx.int("axis", 0), d.len()).ok_or("axis out of range")?;
                    d.insert(a, Dim::Known(v.len() as u64));
                    Shape::of(d)
                }
                None => Shape::unknown(),
            }
        } else {
            concat_shape(&shapes, ctx.int("axis", 0))?
        };
        return Ok(smallvec::smallvec![tensor(e.dtype, shape)]);
    }
    let Some(d) = e.shape.dims() else {
        return Ok(smallvec::smallvec![tensor(e.dtype, Shape::unknown())]);
    };
    let mut d = d.to_vec();
    if new_axis {
        let a = norm_insert_axis(ctx.int("axis", 0), d.len()).ok_or("axis out of range")?;
        d.insert(a, Dim::Unknown);
    } else {
        let a = norm_axis(ctx.int("axis", 0), d.len()).ok_or("axis out of range")?;
        d[a] = Dim::Unknown;
    }
    Ok(smallvec::smallvec![tensor(e.dtype, Shape::of(d))])
}

fn optional(ctx: &Ctx) -> Inferred {
    Ok(smallvec::smallvec![optional_of(
        ctx.fact(0).cloned().unwrap_or_default()
    )])
}

fn optional_get_element(ctx: &Ctx) -> Inferred {
    // From opset 18 the input may also be a tensor or a sequence, which is returned as it is
    // (ONNX operator specification, OptionalGetElement-18): only an optional is unwrapped.
    let out = match ctx.fact(0) {
        Some(Fact {
            value_type: ValueType::Optional(e),
            ..
        }) => (**e).clone(),
        Some(f) => f.clone(),
        None => Fact::default(),
    };
    Ok(smallvec::smallvec![out])
}

fn optional_has_element(_ctx: &Ctx) -> Inferred {
    Ok(smallvec::smallvec![tensor(Some(DType::Bool), Shape::scalar())])
}

macro_rules! op {
    ($name:literal, $infer:expr) => {
        OpDef {
            domain: "",
            op: $name,
            family: "sequence",
            infer: $infer,
            cost: CostRule::Free,
            fold: None,
        }
    };
}

pub static OPS: &[OpDef] = &[
    op!("SequenceEmpty", sequence_empty),
    op!("SequenceConstruct", sequence_construct),
    op!("SequenceInsert", sequence_insert),
    op!("SequenceErase", sequence_erase),
    op!("SequenceAt", sequence_at),
    OpDef {
        fold: Some(fold_sequence_length),
        ..op!("SequenceLength", sequence_length)
    },
    op!("SplitToSequence", split_to_sequence),
    op!("ConcatFromSequence", concat_from_sequence),
    op!("Optional", optional),
    op!("OptionalGetElement", optional_get_element),
    op!("OptionalHasElement", optional_has_element),
];
