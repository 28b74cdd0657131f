//! Signal-processing ops of audio front ends: STFT, DFT, the window generators and
//! MelWeightMatrix, per the ONNX operator specification (opset 17, DFT's axis input from 20).
//! Complex values are carried in a trailing dimension of 2 (real, imaginary).

use crate::ir::{DType, Dim, Fact, Shape};

use super::util::{count, norm_axis, tensor};
use super::{CostRule, Ctx, Inferred, MacsOps, OpDef};

/// A scalar integer input that must be a constant for the output size to be known.
fn scalar(ctx: &Ctx, i: usize) -> Option<i64> {
    ctx.const_ints(i).and_then(|v| v.first().copied())
}

/// STFT: signal [batch, length, 1|2], frame_step, window [frame_length]?, frame_length? →
/// [batch, frames, bins, 2] with frames = ⌊(length − frame_length) / step⌋ + 1 and bins =
/// frame_length/2 + 1 when onesided (the default), else frame_length.
fn stft(ctx: &Ctx) -> Inferred {
    let x = ctx.dims(0).ok_or("signal rank unknown")?;
    if x.len() != 3 {
        return Err(format!("signal of rank {} (need [batch, length, 1 or 2])", x.len()));
    }
    let frame_length = scalar(ctx, 3)
        .map(|v| Dim::Known(v.max(0) as u64))
        .or_else(|| ctx.dims(2).and_then(|w| w.first().cloned()))
        .unwrap_or(Dim::Unknown);
    let step = scalar(ctx, 1);
    let frames = match (&x[1], &frame_length, step) {
        (Dim::Known(n), Dim::Known(f), Some(s)) if s > 0 && n >= f => Dim::Known((n - f) / s as u64 + 1),
        (Dim::Known(_), Dim::Known(_), Some(s)) if s > 0 => return Err("frame longer than the signal".into()),
        _ => Dim::Unknown,
    };
    let onesided = ctx.int("onesided", 1) != 0;
    let bins = match frame_length {
        Dim::Known(f) if onesided => Dim::Known(f / 2 + 1),
        Dim::Known(f) => Dim::Known(f),
        _ => Dim::Unknown,
    };
    Ok(smallvec::smallvec![tensor(
        ctx.dtype(0),
        Shape::of([x[0].clone(), frames, bins, Dim::Known(2)]),
    )])
}

/// DFT: the input with its last dim 2 (complex out), the transformed axis of length
/// dft_length (when given) or its own, halved plus one when onesided; an inverse onesided
/// transform is real (last dim 1) of dft_length or 2·(bins − 1). The axis is an attribute
/// (default 1) before opset 20 and an input (default −2) from 20; it never names the last dim.
fn dft(ctx: &Ctx) -> Inferred {
    let x = ctx.dims(0).ok_or("input rank unknown")?;
    if x.len() < 2 {
        return Err(format!("input of rank {}", x.len()));
    }
    let rank = x.len();
    let axis = if ctx.opset >= 20 {
        match ctx.has_input(2) {
            true => scalar(ctx, 2).ok_or("axis input is not a constant")?,
            false => -2,
        }
    } else {
        ctx.int("axis", 1)
    };
    let a = norm_axis(axis, rank)
        .filter(|&a| a < rank - 1)
        .ok_or(format!("axis {axis} out of range"))?;
    let mut out = x.clone();
    let len = if ctx.has_input(1) {
        match scalar(ctx, 1) {
            Some(n) => Dim::Known(n.max(0) as u64),
            None => Dim::Unknown,
        }
    } else {
        x[a].clone()
    };
    let inverse = ctx.int("inverse", 0) != 0;
    let onesided = ctx.int("onesided", 0) != 0;
    out[rank - 1] = Dim::Known(2);
    match (onesided, inverse) {
        // A forward onesided transform keeps the unique half of the bins.
        (true, false) => {
            out[a] = match &len {
                Dim::Known(n) => Dim::Known(n / 2 + 1),
                _ => Dim::Unknown,
            }
        }
        // An inverse of onesided bins is real: dft_length, else 2·(bins − 1), last dim 1.
        (true, true) => {
            out[a] = if ctx.has_input(1) {
                len
            } else {
                match &x[a] {
                    Dim::Known(n) if *n > 0 => (n - 1).checked_mul(2).map_or(Dim::Unknown, Dim::Known),
                    _ => Dim::Unknown,
                }
            };
            out[rank - 1] = Dim::Known(1);
        }
        _ => out[a] = len,
    }
    Ok(smallvec::smallvec![tensor(ctx.dtype(0), Shape::of(out))])
}

/// A naive DFT costs N complex multiply-adds per output bin; FFT libraries do far fewer,
/// so this counts the O(N log N) of a radix-2 transform: 4 real MACs per complex butterfly
/// multiply, N/2·log2 N butterflies per transformed vector.
fn fft_macs(_ctx: &Ctx, outs: &[Fact]) -> MacsOps {
    let macs = (|| {
        let y = outs.first()?.shape.concrete()?;
        let n = *y.get(y.len().checked_sub(2)?)?;
        let vectors = count(&y[..y.len() - 2])?;
        let log = 64 - n.max(1).leading_zeros() as u64;
        vectors.checked_mul((n / 2).checked_mul(log * 4)?)
    })();
    (macs, Some(0))
}

/// STFT: one FFT per frame of frame_length points.
fn stft_macs(ctx: &Ctx, outs: &[Fact]) -> MacsOps {
    let macs = (|| {
        let y = outs.first()?.shape.concrete()?;
        let frame = ctx
            .konst(3)
            .and_then(|c| c.as_ints().first().copied())
            .map(|v| v as u64)
            .or_else(|| {
                let w = ctx.shape(2).concrete()?;
                w.first().copied()
            })?;
        let log = 64 - frame.max(1).leading_zeros() as u64;
        count(y.get(..2)?)?.checked_mul((frame / 2).checked_mul(log * 4)?)
    })();
    (macs, Some(0))
}

/// HannWindow / HammingWindow / BlackmanWindow: [size] of `output_datatype` (float32).
fn window(ctx: &Ctx) -> Inferred {
    let dt = DType::from_onnx(ctx.int("output_datatype", 1) as i32);
    let n = scalar(ctx, 0)
        .map(|v| Dim::Known(v.max(0) as u64))
        .unwrap_or(Dim::Unknown);
    Ok(smallvec::smallvec![tensor(dt, Shape::of([n]))])
}

/// MelWeightMatrix: [⌊dft_length/2⌋ + 1, num_mel_bins] of `output_datatype` (float32).
fn mel_weight_matrix(ctx: &Ctx) -> Inferred {
    let dt = DType::from_onnx(ctx.int("output_datatype", 1) as i32);
    let bins = scalar(ctx, 1)
        .map(|v| Dim::Known(v.max(0) as u64 / 2 + 1))
        .unwrap_or(Dim::Unknown);
    let mels = scalar(ctx, 0)
        .map(|v| Dim::Known(v.max(0) as u64))
        .unwrap_or(Dim::Unknown);
    Ok(smallvec::smallvec![tensor(dt, Shape::of([bins, mels]))])
}

macro_rules! op {
    ($name:literal, $infer:expr, $cost:expr) => {
        OpDef {
            domain: "",
            op: $name,
            family: "signal",
            infer: $infer,
            cost: $cost,
            fold: None,
        }
    };
}

pub static OPS: &[OpDef] = &[
    op!("STFT", stft, CostRule::Custom(stft_macs)),
    op!("DFT", dft, CostRule::Custom(fft_macs)),
    op!("HannWindow", window, CostRule::PerOutput(4)),
    op!("HammingWindow", window, CostRule::PerOutput(4)),
    op!("BlackmanWindow", window, CostRule::PerOutput(6)),
    op!("MelWeightMatrix", mel_weight_matrix, CostRule::PerOutput(4)),
];
