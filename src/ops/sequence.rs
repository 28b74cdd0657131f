//! Sequence and optional values (ONNX operator specification): a sequence's fact is its
//! element fact; what a sequence holds element by element is not tracked, so elements whose
//! shapes differ merge to unknown dims.

use crate::ir::{DType, Dim, Fact, Shape, ValueType};

use super::control_flow::merge;
use super::util::{norm_axis, norm_insert_axis, tensor};
use super::{CostRule, Ctx, Inferred, OpDef};

fn sequence_of(elem: Fact) -> Fact {
    Fact {
        value_type: ValueType::Sequence(Box::new(elem)),
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
            value_type: ValueType::Sequence(e) | ValueType::Optional(e),
            ..
        }) => (**e).clone(),
        Some(f) => f.clone(),
        None => Fact::default(),
    }
}

fn sequence_empty(ctx: &Ctx) -> Inferred {
    let dt = DType::from_onnx(ctx.int("dtype", 1) as i32);
    Ok(vec![sequence_of(tensor(dt, Shape::unknown()))])
}

fn sequence_construct(ctx: &Ctx) -> Inferred {
    let mut facts = (0..ctx.node.inputs.len()).filter_map(|i| ctx.fact(i));
    let first = facts.next().cloned().unwrap_or_default();
    Ok(vec![sequence_of(facts.fold(first, |a, b| merge(&a, b)))])
}

fn sequence_insert(ctx: &Ctx) -> Inferred {
    let elem = element(ctx, 0);
    let added = ctx.fact(1).cloned().unwrap_or_default();
    // An empty sequence's element has no shape yet: the inserted tensor decides it.
    let merged = if elem.shape.rank().is_none() && elem.dtype == added.dtype {
        added
    } else {
        merge(&elem, &added)
    };
    Ok(vec![sequence_of(merged)])
}

fn sequence_erase(ctx: &Ctx) -> Inferred {
    Ok(vec![ctx.fact(0).cloned().unwrap_or_default()])
}

fn sequence_at(ctx: &Ctx) -> Inferred {
    Ok(vec![element(ctx, 0)])
}

fn sequence_length(_ctx: &Ctx) -> Inferred {
    Ok(vec![tensor(Some(DType::I64), Shape::scalar())])
}

/// SplitToSequence: without `split`, pieces of 1 along `axis` (removed when keepdims = 0);
/// a scalar `split` gives pieces of that size (the last may be shorter: unknown); a 1-D one
/// gives pieces of varying sizes (unknown).
fn split_to_sequence(ctx: &Ctx) -> Inferred {
    let Some(x) = ctx.dims(0) else {
        return Ok(vec![sequence_of(tensor(ctx.dtype(0), Shape::unknown()))]);
    };
    let axis = norm_axis(ctx.int("axis", 0), x.len()).ok_or("axis out of range")?;
    let mut d = x.clone();
    if !ctx.has_input(1) {
        if ctx.int("keepdims", 1) == 0 {
            d.remove(axis);
        } else {
            d[axis] = Dim::Known(1);
        }
    } else {
        d[axis] = match (ctx.konst(1), &x[axis]) {
            (Some(c), Dim::Known(n)) if c.dims.is_empty() => match c.as_ints().first() {
                Some(&s) if s > 0 && *n % s as u64 == 0 => Dim::Known(s as u64),
                _ => Dim::Unknown,
            },
            (Some(c), _) if c.len() == 1 && c.dims.len() == 1 => Dim::Known(c.as_ints()[0].max(0) as u64),
            _ => Dim::Unknown,
        };
    }
    Ok(vec![sequence_of(tensor(ctx.dtype(0), Shape::of(d)))])
}

/// ConcatFromSequence: the element shape with `axis` of unknown total size, or a new axis of
/// unknown count when `new_axis` = 1.
fn concat_from_sequence(ctx: &Ctx) -> Inferred {
    let e = element(ctx, 0);
    let Some(d) = e.shape.dims() else {
        return Ok(vec![tensor(e.dtype, Shape::unknown())]);
    };
    let mut d = d.to_vec();
    if ctx.int("new_axis", 0) != 0 {
        let a = norm_insert_axis(ctx.int("axis", 0), d.len()).ok_or("axis out of range")?;
        d.insert(a, Dim::Unknown);
    } else {
        let a = norm_axis(ctx.int("axis", 0), d.len()).ok_or("axis out of range")?;
        d[a] = Dim::Unknown;
    }
    Ok(vec![tensor(e.dtype, Shape::of(d))])
}

fn optional(ctx: &Ctx) -> Inferred {
    Ok(vec![optional_of(ctx.fact(0).cloned().unwrap_or_default())])
}

fn optional_get_element(ctx: &Ctx) -> Inferred {
    Ok(vec![element(ctx, 0)])
}

fn optional_has_element(_ctx: &Ctx) -> Inferred {
    Ok(vec![tensor(Some(DType::Bool), Shape::scalar())])
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
    op!("SequenceLength", sequence_length),
    op!("SplitToSequence", split_to_sequence),
    op!("ConcatFromSequence", concat_from_sequence),
    op!("Optional", optional),
    op!("OptionalGetElement", optional_get_element),
    op!("OptionalHasElement", optional_has_element),
];
