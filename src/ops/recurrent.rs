//! LSTM, GRU and RNN (ONNX operator spec): Y [seq, dirs, batch, hidden] (layout 0) or
//! [batch, seq, dirs, hidden] (layout 1), Y_h / Y_c [dirs, batch, hidden] (or batch-first).
//! The contrib domain's DynamicQuantizeLSTM is an LSTM with int8 weights stored transposed
//! (W [dirs, input, 4·hidden], R [dirs, hidden, 4·hidden], from its contrib operator
//! documentation, recalled from memory and matching the shipped models' weights) and a
//! scale and zero point per direction after the LSTM inputs; its outputs are the LSTM's.

use crate::ir::{Dim, Fact, Shape};

use super::util::tensor;
use super::{CostRule, Ctx, Inferred, MacsOps, OpDef};

fn gates(op: &str) -> u64 {
    match op {
        "LSTM" | "DynamicQuantizeLSTM" => 4,
        "GRU" => 3,
        _ => 1,
    }
}

fn recurrent(ctx: &Ctx) -> Inferred {
    let x = ctx.dims(0).ok_or("X rank unknown")?;
    if x.len() != 3 {
        return Err(format!("X of rank {}", x.len()));
    }
    let layout = ctx.int("layout", 0);
    let (seq, batch) = if layout == 0 {
        (x[0].clone(), x[1].clone())
    } else {
        (x[1].clone(), x[0].clone())
    };
    let dirs = if ctx.string("direction").as_deref() == Some("bidirectional") {
        2
    } else {
        1
    };
    let hidden = match ctx.opt_int("hidden_size") {
        Some(h) => Dim::Known(h.max(0) as u64),
        None => match ctx.dims(2) {
            // R is [dirs, gates·hidden, hidden]; transposed in the quantized contrib form.
            Some(r) if r.len() == 3 && ctx.node.op_type == "DynamicQuantizeLSTM" => r[1].clone(),
            Some(r) if r.len() == 3 => r[2].clone(),
            _ => Dim::Unknown,
        },
    };
    let dt = ctx.dtype(0);
    let d = Dim::Known(dirs);
    let y = if layout == 0 {
        vec![seq, d.clone(), batch.clone(), hidden.clone()]
    } else {
        vec![batch.clone(), seq, d.clone(), hidden.clone()]
    };
    let state = if layout == 0 {
        vec![d, batch, hidden]
    } else {
        vec![batch, d, hidden]
    };
    let mut outs = vec![tensor(dt, Shape::of(y))];
    for _ in 1..ctx.outputs() {
        outs.push(tensor(dt, Shape::of(state.clone())));
    }
    Ok(outs.into())
}

fn recurrent_macs(ctx: &Ctx, outs: &[Fact]) -> MacsOps {
    let macs = (|| {
        let y = outs.first()?.shape.concrete()?;
        let x = ctx.shape(0).concrete()?;
        let input = *x.last()?;
        let hidden = *y.last()?;
        // Every output element of every step: gates × (input + hidden) MACs.
        let elems = super::util::count(&y)?;
        elems
            .checked_mul(gates(&ctx.node.op_type))?
            .checked_mul(input.checked_add(hidden)?)
    })();
    (
        macs,
        outs.first()
            .and_then(|f| f.shape.element_count())
            .and_then(|e| e.checked_mul(gates(&ctx.node.op_type) * 3)),
    )
}

macro_rules! op {
    ($name:literal) => {
        op!("", $name)
    };
    ($domain:expr, $name:literal) => {
        OpDef {
            domain: $domain,
            op: $name,
            family: "recurrent",
            infer: recurrent,
            cost: CostRule::Custom(recurrent_macs),
            fold: None,
        }
    };
}

pub static OPS: &[OpDef] = &[
    op!("LSTM"),
    op!("GRU"),
    op!("RNN"),
    op!(super::CONTRIB_DOMAIN, "DynamicQuantizeLSTM"),
];
