//! The `ai.onnx.preview.training` domain (ONNX operator specification): the optimizer
//! updates Adagrad, Momentum and Adam, and Gradient. Training graphs are not what an array
//! runs at inference time, but a model file may carry them, and each output has the shape
//! of the tensor it updates: they are sized rather than left unknown.

use crate::ir::Fact;

use super::{CostRule, Ctx, Inferred, MacsOps, OpDef};

pub const TRAINING_DOMAIN: &str = "ai.onnx.preview.training";

/// An optimizer's inputs are R, T, then `groups` lists of n tensors each (X, G, and the
/// optimizer's state); its outputs are the lists at `outputs_from` (by list index: X is 0, G
/// is 1), updated. Adagrad: X, G, H → X_new, H_new; Momentum: X, G, V → X_new, V_new;
/// Adam: X, G, V, H → X_new, V_new, H_new.
fn updated(ctx: &Ctx, groups: usize, outputs_from: &[usize]) -> Inferred {
    let listed = ctx.node.inputs.len().saturating_sub(2);
    if listed == 0 || listed % groups != 0 {
        return Err(format!(
            "{} inputs after R and T, not {groups} lists of equal length",
            listed
        ));
    }
    let n = listed / groups;
    Ok((0..ctx.outputs())
        .map(|j| {
            outputs_from
                .get(j / n)
                .and_then(|&g| ctx.fact(2 + g * n + j % n))
                .cloned()
                .unwrap_or_default()
        })
        .collect())
}

/// Adagrad (X, G, H → X_new, H_new) and Momentum (X, G, V → X_new, V_new): one state list.
fn one_state(ctx: &Ctx) -> Inferred {
    updated(ctx, 3, &[0, 2])
}

fn adam(ctx: &Ctx) -> Inferred {
    updated(ctx, 4, &[0, 2, 3])
}

/// Gradient: one output per name in `xs`, the gradient of `y` with respect to it, shaped as
/// that input (the node's inputs are the values of `xs`, then of `zs`).
fn gradient(ctx: &Ctx) -> Inferred {
    let xs = match ctx.node.attr("xs") {
        Some(crate::ir::AttrValue::Strings(s)) => s.len(),
        _ => return Err("Gradient without xs".into()),
    };
    Ok((0..ctx.outputs())
        .map(|j| {
            if j < xs {
                ctx.fact(j).cloned().unwrap_or_default()
            } else {
                Fact::default()
            }
        })
        .collect())
}

/// Ops per element of the updated tensors, counted from the update formulas of the operator
/// specification: Adagrad regularises the gradient (2), accumulates its square (2), takes the
/// root plus epsilon (2) and steps (3): 9; Momentum regularises (2), updates the velocity (3)
/// and steps (2): 7, and 9 in Nesterov mode, whose step adds the scaled velocity again; Adam
/// regularises (2), updates both moments (3 and 4), takes the root plus epsilon (2), steps
/// (3) and scales by the post-update norm coefficient (1): 15. Scalars (the learning rate's
/// decay) are not counted.
fn per_element(ctx: &Ctx, groups: usize, k: u64) -> MacsOps {
    let n = ctx.node.inputs.len().saturating_sub(2) / groups;
    let mut elements = Some(0u64);
    for i in 0..n {
        let e = ctx.fact(2 + i).and_then(|f| f.shape.element_count());
        elements = elements.zip(e).and_then(|(a, b)| a.checked_add(b));
    }
    (Some(0), elements.and_then(|e| e.checked_mul(k)))
}

fn adagrad_cost(ctx: &Ctx, _outs: &[Fact]) -> MacsOps {
    per_element(ctx, 3, 9)
}

fn momentum_cost(ctx: &Ctx, _outs: &[Fact]) -> MacsOps {
    let nesterov = ctx.string("mode").is_some_and(|m| m == "nesterov");
    per_element(ctx, 3, if nesterov { 9 } else { 7 })
}

fn adam_cost(ctx: &Ctx, _outs: &[Fact]) -> MacsOps {
    per_element(ctx, 4, 15)
}

/// The backward pass of the graph between `xs` and `y`, which the node does not spell out:
/// not costed.
fn gradient_cost(_ctx: &Ctx, _outs: &[Fact]) -> MacsOps {
    (None, None)
}

macro_rules! op {
    ($name:literal, $infer:expr, $cost:expr) => {
        OpDef {
            domain: TRAINING_DOMAIN,
            op: $name,
            family: "training",
            infer: $infer,
            cost: CostRule::Custom($cost),
            fold: None,
        }
    };
}

pub static OPS: &[OpDef] = &[
    op!("Adagrad", one_state, adagrad_cost),
    op!("Momentum", one_state, momentum_cost),
    op!("Adam", adam, adam_cost),
    op!("Gradient", gradient, gradient_cost),
];
