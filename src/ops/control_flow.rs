//! Subgraph-carrying ops: If, Loop, Scan, SequenceMap. Their bodies are inferred by the
//! driver first; the shape functions here combine the bodies' output facts.

use crate::ir::{AttrValue, ConstValue, Dim, Fact, Node, Shape, ValueType, MAX_TRACKED_ELEMENTS};

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
                .collect::<crate::ir::DimVec>(),
        ),
        _ => Shape::unknown(),
    };
    let value_type = match (&a.value_type, &b.value_type) {
        (ValueType::Sequence(x), ValueType::Sequence(y)) => ValueType::sequence(
            merge(&x.element, &y.element),
            if x.elements == y.elements {
                x.elements.clone()
            } else {
                None
            },
        ),
        (ValueType::Optional(x), ValueType::Optional(y)) => ValueType::Optional(Box::new(merge(x, y))),
        (t, _) => t.clone(),
    };
    Fact {
        value_type,
        dtype,
        shape,
    }
}

/// The body index of the branch an If takes, when it is an If whose condition is known:
/// bodies keep the file's attribute order, and exporters write `else_branch` first as often
/// as not. Inference, costing and the findings of the branch that cannot run all ask this.
pub fn taken_branch(node: &Node, condition: Option<&ConstValue>) -> Option<usize> {
    if node.op_type != "If" {
        return None;
    }
    let taken = *condition?.as_ints().first()? != 0;
    let want = if taken { "then_branch" } else { "else_branch" };
    Some(
        node.bodies()
            .iter()
            .position(|b| b.attr == want)
            .unwrap_or(usize::from(!taken)),
    )
}

/// Why an If or Loop output has dims that neither its inputs nor its bodies leave unknown,
/// per output: an If whose condition is not a constant and whose branches give different
/// shapes; a Loop whose carried value changes shape from one iteration to the next. `None`
/// where the usual reason (what the dims depend on) applies.
pub fn merge_reasons(ctx: &Ctx) -> Vec<Option<String>> {
    let differ = |a: &Fact, b: &Fact| a.shape.rank().is_some() && b.shape.rank().is_some() && a.shape != b.shape;
    match ctx.node.op_type.as_str() {
        "If" if ctx.body_outputs.len() == 2 && taken_branch(ctx.node, ctx.konst(0)).is_none() => (0..ctx.outputs())
            .map(|i| {
                // Named by attribute: the bodies keep the file's order, either branch first.
                let mut by_attr: Vec<(&str, &Fact)> = ctx
                    .node
                    .bodies()
                    .iter()
                    .zip(&ctx.body_outputs)
                    .filter_map(|(b, outs)| Some((b.attr.as_str(), outs.get(i)?)))
                    .collect();
                by_attr.sort_by_key(|(attr, _)| *attr != "then_branch");
                match by_attr[..] {
                    [(ta, a), (eb, b)] if differ(a, b) => Some(format!(
                        "the If's {ta} gives {} and its {eb} {}, and its condition is not a constant",
                        a.shape, b.shape
                    )),
                    _ => None,
                }
            })
            .collect(),
        "Loop" => {
            let Some(body) = ctx.body_outputs.first() else {
                return Vec::new();
            };
            let carried = ctx.node.inputs.len().saturating_sub(2);
            (0..ctx.outputs().min(carried))
                .map(|i| match (ctx.fact(i + 2), body.get(i + 1)) {
                    (Some(entry), Some(f)) if differ(entry, f) => Some(format!(
                        "the Loop's carried value enters as {} and leaves an iteration as {}: its shape changes from one iteration to the next",
                        entry.shape, f.shape
                    )),
                    _ => None,
                })
                .collect()
        }
        _ => Vec::new(),
    }
}

fn if_(ctx: &Ctx) -> Inferred {
    let n = ctx.outputs();
    let branches = &ctx.body_outputs;
    if branches.len() != 2 {
        return Err("If needs then_branch and else_branch".into());
    }
    // A constant condition selects one branch (the other never runs).
    if let Some(taken) = taken_branch(ctx.node, ctx.konst(0)) {
        let b = branches.get(taken).ok_or("If without that branch")?;
        return Ok((0..n).map(|i| b.get(i).cloned().unwrap_or_default()).collect());
    }
    Ok((0..n)
        .map(|i| match (branches[0].get(i), branches[1].get(i)) {
            (Some(a), Some(b)) => merge(a, b),
            _ => Fact::default(),
        })
        .collect())
}

/// An If whose condition is a constant passes on the values its taken branch computes (ONNX
/// operator specification: the outputs are the taken branch's), in output order up to the
/// first whose value is not known. Exporters select a 2-D or 3-D path this way, and sizes
/// read from a `--value` input then stay known past the If.
fn if_values(ctx: &Ctx) -> Option<Vec<ConstValue>> {
    let taken = taken_branch(ctx.node, ctx.konst(0))?;
    let values: Vec<ConstValue> = ctx.body_consts.get(taken)?.iter().map_while(Clone::clone).collect();
    (!values.is_empty()).then_some(values)
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
            let same_kind = std::mem::discriminant(&entry.value_type) == std::mem::discriminant(&f.value_type);
            outs.push(if !same_kind && *f != Fact::default() {
                // An optional entering a loop whose body yields what it holds (or an entry of
                // unknown kind), where the body's is known: the loop gives what the body
                // gives, as the ONNX project's own inference types Loop outputs from the
                // body (conformance model `test_loop16_seq_none`).
                f.clone()
            } else if entry.shape == f.shape {
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
    Ok(outs.into())
}

/// Where a Scan node's inputs are and how its body sees them, in both forms of the operator
/// specification: Scan-8 reads (sequence_lens, states…, scan inputs…) with a leading batch
/// axis on every state and [batch, sequence, …] on every scan input; Scan-9 and later read
/// (states…, scan inputs…), each scan input scanned along its `scan_input_axes` entry.
pub struct ScanLayout {
    /// Index of the first state input (1 in Scan-8, after sequence_lens).
    first: usize,
    n_state: usize,
    /// Per scan input, the axis scanned (Scan-8: 1, behind the batch axis).
    axes: Vec<i64>,
    batched: bool,
}

impl ScanLayout {
    pub fn of(node: &Node, opset: i64) -> ScanLayout {
        let int = |name: &str| match node.attr(name) {
            Some(AttrValue::Int(n)) => Some(*n),
            _ => None,
        };
        let batched = opset < 9;
        let first = usize::from(batched);
        // No more scan inputs than the node has inputs (`scan` refuses the node when the
        // attribute says more); the attribute is the file's and may be any number.
        let n_scan = int("num_scan_inputs")
            .and_then(|n| usize::try_from(n).ok())
            .unwrap_or(0)
            .min(node.inputs.len().saturating_sub(first));
        let n_state = node.inputs.len().saturating_sub(first + n_scan);
        let axes = match node.attr("scan_input_axes") {
            Some(AttrValue::Ints(a)) if !batched => a.clone(),
            _ => Vec::new(),
        };
        let axes = (0..n_scan)
            .map(|j| if batched { 1 } else { axes.get(j).copied().unwrap_or(0) })
            .collect();
        ScanLayout {
            first,
            n_state,
            axes,
            batched,
        }
    }

    /// The body's `k`-th input as seen from the node's input facts: a state without its batch
    /// axis (Scan-8), a scan input without its scanned axis (and batch axis).
    pub fn body_input(&self, k: usize, inputs: &[Fact]) -> Option<Fact> {
        let mut f = inputs.get(self.first + k)?.clone();
        let remove = |f: &mut Fact, axis: i64| {
            if let Some(d) = f.shape.dims() {
                match super::util::norm_axis(axis, d.len()) {
                    Some(a) => {
                        let mut d = d.to_vec();
                        d.remove(a);
                        f.shape = Shape::of(d);
                    }
                    None => f.shape = Shape::unknown(),
                }
            }
        };
        if k < self.n_state {
            if self.batched {
                remove(&mut f, 0);
            }
        } else {
            let axis = *self.axes.get(k - self.n_state)?;
            remove(&mut f, axis);
            if self.batched {
                remove(&mut f, 0);
            }
        }
        Some(f)
    }

    /// (batch, sequence length) of the first scan input: the batch is 1 outside Scan-8.
    fn lengths(&self, ctx: &Ctx) -> (Dim, Dim) {
        let Some(d) = ctx.dims(self.first + self.n_state) else {
            return (Dim::Unknown, Dim::Unknown);
        };
        let seq = self
            .axes
            .first()
            .and_then(|&a| super::util::norm_axis(a, d.len()))
            .map_or(Dim::Unknown, |a| d[a].clone());
        let batch = if self.batched {
            d.first().cloned().unwrap_or(Dim::Unknown)
        } else {
            Dim::Known(1)
        };
        (batch, seq)
    }

    /// How many times the body runs: the sequence length, times the batch in Scan-8.
    pub fn trips(&self, ctx: &Ctx) -> Option<u64> {
        let (batch, seq) = self.lengths(ctx);
        batch.known()?.checked_mul(seq.known()?)
    }
}

/// Scan: state outputs keep the body's facts (Scan-8 adds the batch axis back); scan outputs
/// gain the scanned axis (at `scan_output_axes`, Scan-9 and later).
fn scan(ctx: &Ctx) -> Inferred {
    let body = ctx.body_outputs.first().ok_or("Scan without body")?;
    let inputs = ctx.node.inputs.len().saturating_sub(usize::from(ctx.opset < 9));
    let declared = ctx.int("num_scan_inputs", 0);
    if u64::try_from(declared).is_ok_and(|n| n > inputs as u64) {
        return Err(format!(
            "num_scan_inputs {declared} but the node has {inputs} state and scan inputs"
        ));
    }
    let layout = ScanLayout::of(ctx.node, ctx.opset);
    let (batch, seq) = layout.lengths(ctx);
    let out_axes = ctx.ints("scan_output_axes");
    let mut outs = Vec::new();
    for i in 0..ctx.outputs() {
        let f = body.get(i).cloned().unwrap_or_default();
        if i < layout.n_state && !layout.batched {
            // A carried state may be any value type (a sequence, say): passed through whole.
            outs.push(f);
            continue;
        }
        let shape = match f.shape.dims() {
            Some(d) => {
                let mut s = d.to_vec();
                if i >= layout.n_state {
                    let axis = out_axes
                        .as_ref()
                        .filter(|_| !layout.batched)
                        .and_then(|a| a.get(i - layout.n_state).copied())
                        .unwrap_or(0);
                    let at = super::util::norm_insert_axis(axis, s.len()).ok_or("scan_output_axes out of range")?;
                    s.insert(at, seq.clone());
                }
                if layout.batched {
                    s.insert(0, batch.clone());
                }
                Shape::of(s)
            }
            None => Shape::unknown(),
        };
        outs.push(tensor(f.dtype, shape));
    }
    Ok(outs.into())
}

/// SequenceMap (opset 17): the body runs once per element of the first input; each body
/// output becomes a sequence as long as that input (ONNX operator specification). The body
/// was inferred on one element's fact (`seed_body_inputs`), which holds for every element:
/// where the input's elements are tracked, the outputs' are too, so their count carries on.
fn sequence_map(ctx: &Ctx) -> Inferred {
    let body = ctx.body_outputs.first().ok_or("SequenceMap without body")?;
    if ctx
        .fact(0)
        .is_some_and(|f| f.value_type == ValueType::Tensor && f.dtype.is_some())
    {
        return Err("input_sequence is a tensor, not a sequence".into());
    }
    // Element facts are copied per output: a node with very many outputs (a hostile file)
    // keeps only the common element fact.
    let count = sequence_map_trips(ctx)
        .and_then(|n| usize::try_from(n).ok())
        .filter(|n| n.saturating_mul(ctx.outputs()) <= 16 * MAX_TRACKED_ELEMENTS);
    Ok((0..ctx.outputs())
        .map(|j| {
            let element = body.get(j).cloned().unwrap_or_default();
            let elements = count.map(|n| vec![element.clone(); n]);
            Fact {
                value_type: ValueType::sequence(element, elements),
                dtype: None,
                shape: Shape::unknown(),
            }
        })
        .collect())
}

/// How many times SequenceMap runs its body: the first input's length, where the graph
/// tracks its elements.
pub fn sequence_map_trips(ctx: &Ctx) -> Option<u64> {
    match &ctx.fact(0)?.value_type {
        ValueType::Sequence(s) => s.elements.as_ref().map(|e| e.len() as u64),
        _ => None,
    }
}

macro_rules! op {
    ($name:literal, $infer:expr, $fold:expr) => {
        // Bodies are costed by the driver (If: costlier branch; Loop: × trips); the node itself adds nothing.
        OpDef {
            domain: "",
            op: $name,
            family: "control_flow",
            infer: $infer,
            cost: CostRule::Free,
            fold: $fold,
        }
    };
}

pub static OPS: &[OpDef] = &[
    op!("If", if_, Some(if_values)),
    op!("Loop", loop_, None),
    op!("Scan", scan, None),
    op!("SequenceMap", sequence_map, None),
];
