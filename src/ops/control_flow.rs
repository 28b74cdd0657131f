//! Subgraph-carrying ops: If, Loop, Scan. Their bodies are inferred by the driver first;
//! the shape functions here combine the bodies' output facts.

use crate::ir::{Dim, Fact, Shape};

use super::util::tensor;
use super::{CostRule, Ctx, Inferred, OpDef};

/// Merges two branch facts: equal dims stay, differing ones become unknown.
pub(super) fn merge(a: &Fact, b: &Fact) -> Fact {
    let dtype = if a.dtype == b.dtype { a.dtype } else { None };
    let shape = match (a.shape.dims(), b.shape.dims()) {
        (Some(x), Some(y)) if x.len() == y.len() => Shape::of(
            x.iter()
                .zip(y)
                .map(|(p, q)| if p == q { p.clone() } else { Dim::Unknown })
                .collect(),
        ),
        _ => Shape::unknown(),
    };
    Fact {
        value_type: a.value_type.clone(),
        dtype,
        shape,
    }
}

fn if_(ctx: &Ctx) -> Inferred {
    let n = ctx.outputs();
    let branches = &ctx.body_outputs;
    if branches.len() != 2 {
        return Err("If needs then_branch and else_branch".into());
    }
    // A constant condition selects one branch (the other never runs).
    if let Some(c) = ctx.konst(0).and_then(|c| c.as_ints().first().copied()) {
        let pick = if c != 0 { 0 } else { 1 };
        let b = &branches[pick];
        return Ok((0..n).map(|i| b.get(i).cloned().unwrap_or_default()).collect());
    }
    Ok((0..n)
        .map(|i| match (branches[0].get(i), branches[1].get(i)) {
            (Some(a), Some(b)) => merge(a, b),
            _ => Fact::default(),
        })
        .collect())
}

/// Loop: outputs are the final carried values, then scan outputs stacked over iterations.
fn loop_(ctx: &Ctx) -> Inferred {
    let body = ctx.body_outputs.first().ok_or("Loop without body")?;
    let carried = ctx.node.inputs.len().saturating_sub(2);
    let trips = ctx
        .konst(0)
        .and_then(|c| c.as_ints().first().copied())
        .or(ctx.loop_trips.map(|t| t as i64));
    let mut outs = Vec::with_capacity(ctx.outputs());
    for i in 0..ctx.outputs() {
        // Body outputs: cond, carried..., scan outputs...
        let Some(f) = body.get(i + 1) else {
            outs.push(Fact::default());
            continue;
        };
        if i < carried {
            // The carried value's fact as it enters the loop is the more reliable one.
            let entry = ctx.fact(i + 2).cloned().unwrap_or_default();
            outs.push(if entry.shape == f.shape {
                entry
            } else {
                merge(&entry, f)
            });
        } else {
            let lead = match trips {
                Some(t) if ctx.konst(1).is_none_or(|c| c.as_ints().first() != Some(&0)) => Dim::Known(t.max(0) as u64),
                _ => Dim::sym(&format!("trips@{}", ctx.node.name)),
            };
            let shape = match f.shape.dims() {
                Some(d) => {
                    let mut s = vec![lead];
                    s.extend(d.iter().cloned());
                    Shape::of(s)
                }
                None => Shape::unknown(),
            };
            outs.push(tensor(f.dtype, shape));
        }
    }
    Ok(outs)
}

/// Scan (opset 9+): state outputs keep the body's facts; scan outputs gain the scan axis.
fn scan(ctx: &Ctx) -> Inferred {
    if ctx.opset < 9 {
        // Scan-8 has a batch axis and sequence_lens input; not modelled.
        return Err("Scan before opset 9 (batched form) is not modelled".into());
    }
    let body = ctx.body_outputs.first().ok_or("Scan without body")?;
    let n_scan_in = ctx.int("num_scan_inputs", 0).max(0) as usize;
    let n_state = ctx.node.inputs.len().saturating_sub(n_scan_in);
    let seq = (n_state < ctx.node.inputs.len())
        .then(|| ctx.dims(n_state))
        .flatten()
        .and_then(|d| {
            let axis = ctx
                .ints("scan_input_axes")
                .and_then(|a| a.first().copied())
                .unwrap_or(0);
            super::util::norm_axis(axis, d.len()).map(|a| d[a].clone())
        })
        .unwrap_or(Dim::Unknown);
    let out_axes = ctx.ints("scan_output_axes");
    let mut outs = Vec::new();
    for i in 0..ctx.outputs() {
        let f = body.get(i).cloned().unwrap_or_default();
        if i < n_state {
            outs.push(f);
            continue;
        }
        let shape = match f.shape.dims() {
            Some(d) => {
                let mut s = d.to_vec();
                let axis = out_axes.as_ref().and_then(|a| a.get(i - n_state).copied()).unwrap_or(0);
                let at = super::util::norm_insert_axis(axis, s.len()).unwrap_or(0);
                s.insert(at, seq.clone());
                Shape::of(s)
            }
            None => Shape::unknown(),
        };
        outs.push(tensor(f.dtype, shape));
    }
    Ok(outs)
}

macro_rules! op {
    ($name:literal, $infer:expr) => {
        // Bodies are costed by the driver (If: costlier branch; Loop: × trips); the node itself adds nothing.
        OpDef {
            domain: "",
            op: $name,
            family: "control_flow",
            infer: $infer,
            cost: CostRule::Free,
            fold: None,
        }
    };
}

pub static OPS: &[OpDef] = &[op!("If", if_), op!("Loop", loop_), op!("Scan", scan)];
