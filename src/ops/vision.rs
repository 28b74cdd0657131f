//! Detection, sampling and geometry ops (ONNX operator specification): GridSample,
//! AffineGrid, RoiAlign, MaxRoiPool, Col2Im, CenterCropPad, Det, ImageScaler.

use crate::ir::{Dim, DimVec, Shape};

use super::util::{like_input, norm_axis, tensor};
use super::{CostRule, Ctx, Inferred, OpDef};

/// GridSample: X [N, C, D1..Dr], grid [N, O1..Or, r] → [N, C, O1..Or].
pub(super) fn grid_sample(ctx: &Ctx) -> Inferred {
    let x = ctx.dims(0).ok_or("input rank unknown")?;
    let g = ctx.dims(1).ok_or("grid rank unknown")?;
    if x.len() < 3 || g.len() != x.len() {
        return Err(format!("input rank {} with grid rank {}", x.len(), g.len()));
    }
    let mut out: DimVec = smallvec::smallvec![x[0].clone(), x[1].clone()];
    out.extend(g[1..g.len() - 1].iter().cloned());
    Ok(smallvec::smallvec![tensor(ctx.dtype(0), Shape::of(out))])
}

/// AffineGrid: theta [N, 2, 3] or [N, 3, 4], size = [N, C, H, W] or [N, C, D, H, W] (a
/// constant) → grid [N, H, W, 2] or [N, D, H, W, 3].
fn affine_grid(ctx: &Ctx) -> Inferred {
    let size = ctx.konst(1).map(|c| c.as_dims());
    let shape = match size {
        Some(s) if s.len() >= 3 => {
            let mut out: DimVec = smallvec::smallvec![s[0].clone()];
            out.extend(s[2..].iter().cloned());
            out.push(Dim::Known((s.len() - 2) as u64));
            Shape::of(out)
        }
        Some(s) => return Err(format!("size has {} values", s.len())),
        None => match ctx.shape(1).concrete() {
            Some(n) if n.len() == 1 && n[0] >= 3 => Shape::of_rank(crate::ir::rank_within_limit(n[0])?),
            _ => Shape::unknown(),
        },
    };
    Ok(smallvec::smallvec![tensor(ctx.dtype(0), shape)])
}

/// RoiAlign: X [N, C, H, W], rois [R, 4], batch_indices [R] → [R, C, output_height,
/// output_width] (attributes, default 1).
fn roi_align(ctx: &Ctx) -> Inferred {
    let x = ctx.dims(0).ok_or("input rank unknown")?;
    if x.len() != 4 {
        return Err(format!("input of rank {}", x.len()));
    }
    let rois = ctx.dims(1).and_then(|r| r.first().cloned()).unwrap_or(Dim::Unknown);
    let h = ctx.int("output_height", 1).max(0) as u64;
    let w = ctx.int("output_width", 1).max(0) as u64;
    Ok(smallvec::smallvec![tensor(
        ctx.dtype(0),
        Shape::of([rois, x[1].clone(), Dim::Known(h), Dim::Known(w)]),
    )])
}

/// MaxRoiPool: X [N, C, H, W], rois [R, 5] → [R, C, pooled_h, pooled_w].
fn max_roi_pool(ctx: &Ctx) -> Inferred {
    let x = ctx.dims(0).ok_or("input rank unknown")?;
    if x.len() != 4 {
        return Err(format!("input of rank {}", x.len()));
    }
    let pooled = ctx.ints("pooled_shape").ok_or("no pooled_shape")?;
    if pooled.len() != 2 {
        return Err("pooled_shape needs two values".into());
    }
    let rois = ctx.dims(1).and_then(|r| r.first().cloned()).unwrap_or(Dim::Unknown);
    Ok(smallvec::smallvec![tensor(
        ctx.dtype(0),
        Shape::of([
            rois,
            x[1].clone(),
            Dim::Known(pooled[0].max(0) as u64),
            Dim::Known(pooled[1].max(0) as u64),
        ]),
    )])
}

/// Col2Im: input [N, C·∏block, L], image_shape and block_shape constants → [N, C, image…].
fn col2im(ctx: &Ctx) -> Inferred {
    let x = ctx.dims(0).ok_or("input rank unknown")?;
    if x.len() != 3 {
        return Err(format!("input of rank {}", x.len()));
    }
    let image = ctx.const_ints(1).ok_or("image_shape is not a constant")?;
    let block = ctx.const_ints(2);
    let c = match (&x[1], block) {
        (Dim::Known(cb), Some(b)) => {
            let p: i64 = b.iter().product();
            if p <= 0 || *cb as i64 % p != 0 {
                return Err(format!("channel dim {cb} is not a multiple of the block size {p}"));
            }
            Dim::Known(*cb / p as u64)
        }
        _ => Dim::Unknown,
    };
    let mut out: DimVec = smallvec::smallvec![x[0].clone(), c];
    out.extend(image.iter().map(|&v| Dim::Known(v.max(0) as u64)));
    Ok(smallvec::smallvec![tensor(ctx.dtype(0), Shape::of(out))])
}

/// CenterCropPad: the input with the dims named by `axes` (all, by default) set to `shape`.
fn center_crop_pad(ctx: &Ctx) -> Inferred {
    let x = ctx.dims(0).ok_or("input rank unknown")?;
    let Some(want) = ctx.const_ints(1) else {
        return Ok(smallvec::smallvec![tensor(ctx.dtype(0), Shape::of_rank(x.len()))]);
    };
    let axes: Vec<i64> = ctx.ints("axes").unwrap_or_else(|| (0..x.len() as i64).collect());
    if axes.len() != want.len() {
        return Err(format!("{} axes for {} sizes", axes.len(), want.len()));
    }
    let mut out = x.clone();
    for (a, w) in axes.iter().zip(want) {
        let i = norm_axis(*a, x.len()).ok_or(format!("axis {a} out of range"))?;
        out[i] = Dim::Known(w.max(0) as u64);
    }
    Ok(smallvec::smallvec![tensor(ctx.dtype(0), Shape::of(out))])
}

/// Det: [*, M, M] → [*].
fn det(ctx: &Ctx) -> Inferred {
    let x = ctx.dims(0).ok_or("input rank unknown")?;
    if x.len() < 2 {
        return Err(format!("input of rank {}", x.len()));
    }
    Ok(smallvec::smallvec![tensor(ctx.dtype(0), Shape::of(&x[..x.len() - 2]))])
}

macro_rules! op {
    ($name:literal, $infer:expr, $cost:expr) => {
        OpDef {
            domain: "",
            op: $name,
            family: "vision",
            infer: $infer,
            cost: $cost,
            fold: None,
        }
    };
}

pub static OPS: &[OpDef] = &[
    op!("GridSample", grid_sample, CostRule::PerOutput(8)),
    op!("AffineGrid", affine_grid, CostRule::PerOutput(6)),
    op!("RoiAlign", roi_align, CostRule::PerOutput(16)),
    op!("MaxRoiPool", max_roi_pool, CostRule::PerOutput(4)),
    op!("Col2Im", col2im, CostRule::PerInput(1)),
    op!("CenterCropPad", center_crop_pad, CostRule::Free),
    op!("Det", det, CostRule::PerInput(1)),
    // ImageScaler (an experimental op of the early opsets): scale and per-channel bias.
    op!("ImageScaler", like_input, CostRule::PerOutput(2)),
];
