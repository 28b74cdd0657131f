//! Convolutions and pools: spatial output sizes from kernel, stride, dilation and padding
//! (ONNX operator spec, Conv / ConvTranspose / MaxPool / AveragePool), and MAC counts.

use crate::ir::{DType, Dim, DimVec, Fact, Shape};

use super::util::{count, tensor};
use super::{CostRule, Ctx, Inferred, MacsOps, OpDef};

/// Which input carries X and W for each conv-like op, and its output type.
struct ConvIo {
    x: usize,
    w: Option<usize>,
}

fn io(op: &str) -> ConvIo {
    ConvIo {
        x: 0,
        w: Some(if super::weight_in_slot_3(op) { 3 } else { 1 }),
    }
}

// The window arithmetic runs in 128 bits: kernel, stride, dilation and pads are the file's
// 64-bit values, and (kernel - 1) · dilation alone can pass 64 bits. A result that does not
// fit a dim is an error, never a wrapped number.
fn floor_div(a: i128, b: i128) -> i128 {
    a.div_euclid(b)
}

fn ceil_div(a: i128, b: i128) -> i128 {
    -(-a).div_euclid(b)
}

/// Output size of one spatial axis of a conv or pool.
#[allow(clippy::too_many_arguments)]
fn spatial_out(
    input: &Dim,
    kernel: u64,
    stride: u64,
    dilation: u64,
    pads: Option<(i64, i64)>,
    auto_pad: &str,
    ceil_mode: bool,
) -> Result<Dim, String> {
    let (k, s, d) = (i128::from(kernel), i128::from(stride), i128::from(dilation));
    if s <= 0 || d <= 0 {
        return Err("stride and dilation must be positive".into());
    }
    let ek = (k - 1) * d + 1;
    let (pad_begin, pad_total) = pads
        .map(|(b, e)| (i128::from(b), i128::from(b) + i128::from(e)))
        .unwrap_or((0, 0));
    let i = match input {
        Dim::Known(i) => i128::from(*i),
        Dim::Unknown => return Ok(Dim::Unknown),
        // A symbolic size stays symbolic: the specification's floor((in + pads − extent) / s)
        // + 1 is floor((in + c) / s) with c = pads − extent + s; SAME padding gives
        // ceil(in / s), that is c = s − 1. With ceil_mode and a stride the last window's
        // placement rule cannot be written: unknown until the size is fixed.
        sym @ Dim::Sym(_) => {
            if ceil_mode && s != 1 {
                return Ok(Dim::Unknown);
            }
            let c = match auto_pad {
                "SAME_UPPER" | "SAME_LOWER" => s - 1,
                "VALID" => s - ek,
                _ => pad_total - ek + s,
            };
            return Ok(match i64::try_from(c) {
                Ok(c) => sym.offset(c).div_floor(stride),
                Err(_) => Dim::Unknown,
            });
        }
    };
    let out = match auto_pad {
        "SAME_UPPER" | "SAME_LOWER" => ceil_div(i, s),
        "VALID" => {
            let n = i - ek;
            if n < 0 {
                return Err(format!("kernel extent {ek} exceeds input {i}"));
            }
            floor_div(n, s) + 1
        }
        _ => {
            let n = i + pad_total - ek;
            // With ceil_mode a window may run past the padded end by less than a stride: the
            // specification's ceil((in + pads − extent) / s + 1) is then still 1 (ONNX operator
            // spec, MaxPool / AveragePool output shape; the reference implementation agrees).
            if n < 0 && !(ceil_mode && n > -s) {
                return Err(format!("kernel extent {ek} exceeds padded input {}", i + pad_total));
            }
            if ceil_mode {
                let mut o = ceil_div(n, s) + 1;
                // The last window must start inside the input or left padding (ONNX pool
                // shape inference, matching the reference implementation).
                if (o - 1) * s >= i + pad_begin {
                    o -= 1;
                }
                o
            } else {
                floor_div(n, s) + 1
            }
        }
    };
    u64::try_from(out.max(0))
        .map(Dim::Known)
        .map_err(|_| format!("output size {out} does not fit 64 bits"))
}

pub(super) struct Window {
    kernel: Vec<u64>,
    strides: Vec<u64>,
    dilations: Vec<u64>,
    pads: Option<Vec<i64>>,
    auto_pad: String,
}

pub(super) fn window(ctx: &Ctx, spatial: usize, kernel: Option<Vec<u64>>) -> Result<Window, String> {
    let kernel = match ctx.ints("kernel_shape") {
        Some(k) => k
            .iter()
            .map(|&v| u64::try_from(v).map_err(|_| format!("negative kernel dim {v}")))
            .collect::<Result<_, _>>()?,
        None => kernel.ok_or("kernel shape unknown (no kernel_shape and W's shape is unknown)")?,
    };
    if kernel.len() != spatial {
        return Err(format!("kernel has {} dims for {} spatial dims", kernel.len(), spatial));
    }
    let pos = |name: &str| -> Result<Vec<u64>, String> {
        match ctx.ints(name) {
            Some(v) if v.len() == spatial => v
                .iter()
                .map(|&x| u64::try_from(x).map_err(|_| format!("negative {name}")))
                .collect(),
            Some(v) if v.is_empty() => Ok(vec![1; spatial]),
            Some(v) => Err(format!("{name} has {} values for {} spatial dims", v.len(), spatial)),
            None => Ok(vec![1; spatial]),
        }
    };
    let pads = ctx.ints("pads");
    if let Some(p) = &pads {
        if p.len() != 2 * spatial && !p.is_empty() {
            return Err(format!("pads has {} values for {} spatial dims", p.len(), spatial));
        }
    }
    let mut auto_pad = ctx.string("auto_pad").unwrap_or_else(|| "NOTSET".into());
    if auto_pad.is_empty() {
        auto_pad = "NOTSET".into();
    }
    Ok(Window {
        kernel,
        strides: pos("strides")?,
        dilations: pos("dilations")?,
        pads: pads.filter(|p| !p.is_empty()),
        auto_pad,
    })
}

pub(super) fn conv_spatial(ctx: &Ctx, x: &[Dim], w: &Window, ceil_mode: bool) -> Result<Vec<Dim>, String> {
    let spatial = w.kernel.len();
    (0..spatial)
        .map(|i| {
            let pad = w.pads.as_ref().map(|p| (p[i], p[i + spatial]));
            spatial_out(
                &x[2 + i],
                w.kernel[i],
                w.strides[i],
                w.dilations[i],
                pad,
                &w.auto_pad,
                ceil_mode,
            )
        })
        .collect::<Result<_, _>>()
        .map_err(|e: String| format!("{}: {e}", ctx.node.op_type))
}

pub(super) fn conv(ctx: &Ctx) -> Inferred {
    let io = io(&ctx.node.op_type);
    let x = ctx.dims(io.x).ok_or("input rank unknown")?;
    if x.len() < 3 {
        return Err(format!("input of rank {} (need N, C and spatial dims)", x.len()));
    }
    let wdims = io.w.and_then(|i| ctx.dims(i));
    let kernel = wdims
        .as_ref()
        .and_then(|w| w.get(2..).map(|k| k.iter().map(Dim::known).collect::<Option<Vec<_>>>()))
        .flatten();
    let win = window(ctx, x.len() - 2, kernel)?;
    let mut out: DimVec = smallvec::smallvec![
        x[0].clone(),
        wdims.as_ref().and_then(|w| w.first().cloned()).unwrap_or(Dim::Unknown),
    ];
    out.extend(conv_spatial(ctx, &x, &win, false)?);
    Ok(smallvec::smallvec![tensor(out_dtype(ctx), Shape::of(out))])
}

/// A conv's output type: int32 accumulators for ConvInteger, y_zero_point's type for the
/// operator-form quantized convs, else X's.
fn out_dtype(ctx: &Ctx) -> Option<DType> {
    match ctx.node.op_type.as_str() {
        "ConvInteger" => Some(DType::I32),
        "QLinearConv" | "QLinearConvTranspose" => ctx.dtype(7),
        _ => ctx.dtype(0),
    }
}

pub(super) fn conv_transpose(ctx: &Ctx) -> Inferred {
    let io = io(&ctx.node.op_type);
    let x = ctx.dims(io.x).ok_or("input rank unknown")?;
    if x.len() < 3 {
        return Err(format!("input of rank {}", x.len()));
    }
    let spatial = x.len() - 2;
    let wdims = io.w.and_then(|i| ctx.dims(i));
    let dtype = out_dtype(ctx);
    let kernel = wdims
        .as_ref()
        .and_then(|w| w.get(2..).map(|k| k.iter().map(Dim::known).collect::<Option<Vec<_>>>()))
        .flatten();
    let win = window(ctx, spatial, kernel)?;
    let group = ctx.int("group", 1).max(1) as u64;
    let cout = wdims
        .as_ref()
        .and_then(|w| w.get(1))
        .and_then(Dim::known)
        .map(|c| c.checked_mul(group).map(Dim::Known).ok_or("output channels overflow"))
        .transpose()?
        .unwrap_or(Dim::Unknown);
    let out_pad = ctx.ints("output_padding").unwrap_or_else(|| vec![0; spatial]);
    let mut out: DimVec = smallvec::smallvec![x[0].clone(), cout];
    if let Some(shape) = ctx.ints("output_shape") {
        let s = &shape[shape.len().saturating_sub(spatial)..];
        out.extend(s.iter().map(|&v| Dim::Known(v.max(0) as u64)));
        return Ok(smallvec::smallvec![tensor(dtype, Shape::of(out))]);
    }
    for i in 0..spatial {
        let (s, k, d) = (
            i128::from(win.strides[i]),
            i128::from(win.kernel[i]),
            i128::from(win.dilations[i]),
        );
        let op = i128::from(out_pad.get(i).copied().unwrap_or(0));
        // out = s·in + extra (ONNX spec, ConvTranspose: s·(in − 1) + output_padding +
        // ((k − 1)·d + 1) − pads; SAME: s·in). In 128 bits: the file's 64-bit attributes
        // can pass 64 bits in between, and an extra that does not fit is an error.
        let extra = match win.auto_pad.as_str() {
            "SAME_UPPER" | "SAME_LOWER" => 0,
            _ => {
                let pads = win
                    .pads
                    .as_ref()
                    .map(|p| i128::from(p[i]) + i128::from(p[i + spatial]))
                    .unwrap_or(0);
                op + ((k - 1) * d + 1) - s - if win.auto_pad == "VALID" { 0 } else { pads }
            }
        };
        let extra = i64::try_from(extra).map_err(|_| "output size overflows")?;
        let s = i64::try_from(s).map_err(|_| "stride overflows")?;
        out.push(match &x[2 + i] {
            Dim::Known(inp) => {
                let o = i64::try_from(*inp)
                    .ok()
                    .and_then(|inp| s.checked_mul(inp)?.checked_add(extra))
                    .ok_or("output size overflows")?;
                Dim::Known(o.max(0) as u64)
            }
            sym @ Dim::Sym(_) => sym.mul(&Dim::Known(s as u64)).map_or(Dim::Unknown, |d| d.offset(extra)),
            Dim::Unknown => Dim::Unknown,
        });
    }
    Ok(smallvec::smallvec![tensor(dtype, Shape::of(out))])
}

pub(super) fn pool(ctx: &Ctx) -> Inferred {
    let x = ctx.dims(0).ok_or("input rank unknown")?;
    if x.len() < 3 {
        return Err(format!("input of rank {}", x.len()));
    }
    let win = window(ctx, x.len() - 2, None)?;
    let ceil_mode = ctx.int("ceil_mode", 0) != 0;
    let mut out: DimVec = smallvec::smallvec![x[0].clone(), x[1].clone()];
    out.extend(conv_spatial(ctx, &x, &win, ceil_mode)?);
    let shape = Shape::of(out);
    let mut outs = vec![tensor(ctx.dtype(0), shape.clone())];
    if ctx.outputs() > 1 {
        outs.push(tensor(Some(DType::I64), shape));
    }
    Ok(outs.into())
}

fn global_pool(ctx: &Ctx) -> Inferred {
    let x = ctx.dims(0).ok_or("input rank unknown")?;
    if x.len() < 2 {
        return Err(format!("input of rank {}", x.len()));
    }
    let mut out: DimVec = smallvec::smallvec![x[0].clone(), x[1].clone()];
    out.extend(std::iter::repeat_n(Dim::Known(1), x.len() - 2));
    Ok(smallvec::smallvec![tensor(ctx.dtype(0), Shape::of(out))])
}

/// MaxUnpool: `output_shape` (input 2) when given, else each spatial dim is
/// (in − 1)·stride − pad_begin − pad_end + kernel (ONNX spec, MaxUnpool).
fn max_unpool(ctx: &Ctx) -> Inferred {
    let x = ctx.dims(0).ok_or("input rank unknown")?;
    if x.len() < 3 {
        return Err(format!("input of rank {}", x.len()));
    }
    if ctx.has_input(2) {
        let shape = match ctx.konst(2) {
            Some(c) => Shape::of(c.as_dims()),
            None => Shape::of_rank(x.len()),
        };
        return Ok(smallvec::smallvec![tensor(ctx.dtype(0), shape)]);
    }
    let spatial = x.len() - 2;
    let win = window(ctx, spatial, None)?;
    let mut out: DimVec = smallvec::smallvec![x[0].clone(), x[1].clone()];
    for i in 0..spatial {
        out.push(match x[2 + i] {
            Dim::Known(n) => {
                // In 128 bits, as the window arithmetic above.
                let pads = win
                    .pads
                    .as_ref()
                    .map(|p| i128::from(p[i]) + i128::from(p[i + spatial]))
                    .unwrap_or(0);
                let o = (i128::from(n) - 1) * i128::from(win.strides[i]) - pads + i128::from(win.kernel[i]);
                Dim::Known(u64::try_from(o.max(0)).map_err(|_| "output size overflows")?)
            }
            _ => Dim::Unknown,
        });
    }
    Ok(smallvec::smallvec![tensor(ctx.dtype(0), Shape::of(out))])
}

pub(super) fn conv_macs(ctx: &Ctx, outs: &[Fact]) -> MacsOps {
    let io = io(&ctx.node.op_type);
    let macs = (|| {
        let y = outs.first()?.shape.concrete()?;
        let w = ctx.shape(io.w?).concrete()?;
        // W is [Cout, Cin/group, k...]: every output element takes Cin/group·∏k MACs.
        count(&y)?.checked_mul(count(w.get(1..)?)?)
    })();
    (macs, Some(0))
}

pub(super) fn conv_transpose_macs(ctx: &Ctx, _outs: &[Fact]) -> MacsOps {
    let io = io(&ctx.node.op_type);
    let macs = (|| {
        let x = ctx.shape(io.x).concrete()?;
        let w = ctx.shape(io.w?).concrete()?;
        // W is [Cin, Cout/group, k...]: every input element scatters into Cout/group·∏k outputs.
        count(&x)?.checked_mul(count(w.get(1..)?)?)
    })();
    (macs, Some(0))
}

pub(super) fn pool_ops(ctx: &Ctx, outs: &[Fact]) -> MacsOps {
    let ops = (|| {
        let y = outs.first()?.shape.element_count()?;
        let k: u64 = count(
            &ctx.ints("kernel_shape")?
                .iter()
                .map(|&v| v.max(0) as u64)
                .collect::<Vec<_>>(),
        )?;
        y.checked_mul(k)
    })();
    (Some(0), ops)
}

/// CausalConvWithState (opset 27): a depthwise causal 1-D convolution over (batch, channels,
/// length) with weight (channels, 1, k); the output has the input's shape and the carried
/// state holds the last k−1 positions: (batch, channels, k−1) (ONNX operator specification,
/// CausalConvWithState-27).
fn causal_conv_with_state(ctx: &Ctx) -> Inferred {
    let x = ctx.shape(0);
    if let Some(r) = x.rank().filter(|&r| r != 3) {
        return Err(format!("input of rank {r}, expected (batch, channels, length)"));
    }
    let kernel = match ctx.dims(1) {
        Some(w) if w.len() == 3 => w[2].clone(),
        Some(w) => return Err(format!("weight of rank {}, expected (channels, 1, k)", w.len())),
        None => Dim::Unknown,
    };
    let mut outs = vec![tensor(ctx.dtype(0), x.clone())];
    if ctx.outputs() > 1 {
        let carried = match kernel {
            Dim::Known(0) => return Err("kernel size 0".into()),
            Dim::Known(k) => Dim::Known(k - 1),
            // A past state given as input has the same shape.
            _ => match ctx.dims(3) {
                Some(p) if p.len() == 3 => p[2].clone(),
                _ => Dim::Unknown,
            },
        };
        let state = match x.dims() {
            Some(d) => Shape::of([d[0].clone(), d[1].clone(), carried]),
            None => Shape::of_rank(3),
        };
        outs.push(tensor(ctx.dtype(0), state));
    }
    Ok(outs.into())
}

/// Depthwise: each output element is k multiply-accumulates; the fused SiLU is two ops per
/// element (a Sigmoid and a Mul, as the function body counts it); the bias is part of the Conv.
fn causal_conv_macs(ctx: &Ctx, outs: &[Fact]) -> MacsOps {
    let y = outs.first().and_then(|f| f.shape.element_count());
    let macs = (|| y?.checked_mul(ctx.shape(1).concrete()?.get(2).copied()?))();
    let per = match ctx.string("activation").as_deref() {
        Some("silu" | "swish") => 2,
        _ => 0,
    };
    (macs, y.and_then(|y| y.checked_mul(per)))
}

macro_rules! op {
    ($name:literal, $infer:expr, $cost:expr) => {
        OpDef {
            domain: "",
            op: $name,
            family: "conv",
            infer: $infer,
            cost: $cost,
            fold: None,
        }
    };
}

pub static OPS: &[OpDef] = &[
    op!("Conv", conv, CostRule::Custom(conv_macs)),
    op!("ConvInteger", conv, CostRule::Custom(conv_macs)),
    op!("QLinearConv", conv, CostRule::Custom(conv_macs)),
    op!("ConvTranspose", conv_transpose, CostRule::Custom(conv_transpose_macs)),
    // DeformConv: X, W, offset (B, mask): Conv's output shape and MACs (plus the bilinear
    // sampling, counted as other ops by nobody's convention, so left out).
    op!("DeformConv", conv, CostRule::Custom(conv_macs)),
    op!(
        "CausalConvWithState",
        causal_conv_with_state,
        CostRule::Custom(causal_conv_macs)
    ),
    op!("MaxUnpool", max_unpool, CostRule::Free),
    op!("MaxPool", pool, CostRule::Custom(pool_ops)),
    op!("AveragePool", pool, CostRule::Custom(pool_ops)),
    op!("LpPool", pool, CostRule::Custom(pool_ops)),
    op!("GlobalAveragePool", global_pool, CostRule::PerInput(1)),
    op!("GlobalMaxPool", global_pool, CostRule::PerInput(1)),
    op!("GlobalLpPool", global_pool, CostRule::PerInput(2)),
];
