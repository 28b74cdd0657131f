//! The inference driver: walks each graph in topological order, loads the small constants
//! ops need, infers bodies before the node that carries them, folds shape arithmetic, marks
//! weight-like subgraphs, and costs every node. Unknowns become diagnostics, never guesses.

use std::collections::{BTreeMap, BTreeSet, HashMap};

use crate::diag::{codes, Diagnostic};
use crate::fastmap::FastMap;
use crate::ir::{
    ConstValue, DType, Fact, Graph, Model, Name, NodeCost, Shape, Storage, Value, ValueId, ValueKind, ValueType,
};
use crate::onnx::load::read_external;
use crate::ops::{self, CostRule, Ctx, MacsOps};
use crate::values::{self, MAX_DECODE_ELEMENTS};

/// Why a main-graph value's shape is not concrete, by value index. A large graph with one
/// symbolic dim has the same reason on every tensor: the text is shared (an interned `Name`,
/// copied as a pointer), not repeated. Sorted by value id, one entry per value (a list, not a
/// map: it is built in one pass and only read in order).
pub type UnknownReasons = Vec<(ValueId, Name)>;

/// One shared copy of each distinct reason text.
#[derive(Default)]
struct ReasonTexts(
    FastMap<String, Name>,
    /// Keyed by the addresses of the shape's symbols (0 for an unknown dim): no text hashed
    /// per tensor. Interned names are never freed, so an address stays one text's.
    FastMap<Vec<usize>, Name>,
    /// The key being looked up, reused: one allocation per distinct key, not per tensor.
    Vec<usize>,
    /// The last key found and its reason: tensors in a row mostly share their symbols (a
    /// batch dim on every tensor), and comparing a few addresses is cheaper than hashing.
    (Vec<usize>, Option<Name>),
);

impl ReasonTexts {
    /// The reason for a shape that is not concrete, cached by its dims that are not known
    /// (a symbol, or an unknown dim): the key shares the symbols' text instead of splitting
    /// and joining it again for every tensor.
    fn for_shape(&mut self, shape: &Shape) -> Name {
        let unknown = || {
            shape.dims().into_iter().flatten().filter_map(|d| match d {
                crate::ir::Dim::Sym(s) => Some(s.addr()),
                crate::ir::Dim::Unknown => Some(0),
                crate::ir::Dim::Known(_) => None,
            })
        };
        // Compared as it is read: the key is built only when it differs from the last one.
        if let Some(a) = &self.3 .1 {
            if unknown().eq(self.3 .0.iter().copied()) {
                return a.clone();
            }
        }
        let mut key = std::mem::take(&mut self.2);
        key.clear();
        key.extend(unknown());
        if let Some(a) = self.1.get(key.as_slice()) {
            let a = a.clone();
            self.3 .0.clone_from(&key);
            self.3 .1 = Some(a.clone());
            self.2 = key;
            return a;
        }
        let syms = shape.symbols();
        let text = if syms.is_empty() {
            "depends on a tensor whose shape is unknown".to_string()
        } else {
            symbolic_reason(&syms)
        };
        let a = self.get(text);
        self.1.insert(key, a.clone());
        a
    }

    /// The reason for a value that is not concrete: a tensor's shape, or what inside a
    /// sequence or optional is not known.
    fn for_fact(&mut self, fact: &Fact) -> Name {
        if is_tensor(fact) {
            return self.for_shape(&fact.shape);
        }
        match fact.first_unknown() {
            Some(inner) => self.for_shape(&inner.shape),
            None => self.get(format!(
                "a sequence whose elements are not known one by one (its length is unknown or above {})",
                crate::ir::MAX_TRACKED_ELEMENTS
            )),
        }
    }

    fn get(&mut self, text: String) -> Name {
        if let Some(a) = self.0.get(&text) {
            return a.clone();
        }
        let a = Name::from(text.as_str());
        self.0.insert(text, a.clone());
        a
    }
}

/// Infers facts and costs for the whole model in place.
pub fn infer(model: &mut Model, diags: &mut Vec<Diagnostic>) -> UnknownReasons {
    let opsets = model.opsets.clone();
    let trips = model.loop_trips.clone();
    // The symbols `--dim` can fix: those of the main graph's inputs.
    let mut fixable = BTreeSet::new();
    for &i in &model.graph.inputs {
        for d in model.graph.values[i.index()].fact.shape.dims().unwrap_or(&[]) {
            fixable.extend(d.symbols());
        }
    }
    let mut unknown_ops: BTreeMap<(String, String), (usize, String)> = BTreeMap::new();
    // At most one reason per value. Sized once: grown by doubling, the list was copied into
    // fresh memory again and again (a third of inference on a 100k-node graph with a symbolic
    // batch, where every tensor has one); capacity that is never written costs nothing.
    let mut reasons = UnknownReasons::with_capacity(model.graph.values.len());
    let mut needs = Vec::new();
    let assumed = crate::ops::AssumedSizes::new(model.assumed_sizes.clone());
    let settings = Settings {
        opsets: &opsets,
        trips: &trips,
        assumed: &assumed,
        fixable: &fixable,
    };
    infer_graph(
        &mut model.graph,
        &settings,
        &HashMap::new(),
        diags,
        &mut unknown_ops,
        Some(&mut reasons),
        &mut needs,
    );
    model.needs_values = needs_values(&model.graph, needs);
    for name in assumed.unmet() {
        diags.push(Diagnostic::new(
            codes::OVERRIDE_UNUSED,
            format!("--dim {name}: no node computes a data-dependent size of that name"),
        ));
    }
    for ((domain, op), (n, first)) in unknown_ops {
        let q = crate::ir::op_label(&domain, &op);
        diags.push(
            Diagnostic::new(
                codes::UNKNOWN_OP,
                format!("op `{q}` is not known to tilecut ({n} node(s)); its outputs take the file's declared shapes, if any"),
            )
            .at_node(&first),
        );
    }
    // Node outputs come in node order and graph inputs last; every value appears once.
    reasons.sort_by_key(|(id, _)| *id);
    reasons
}

/// The names of the main-graph inputs in `needs`, once each, sorted.
fn needs_values(g: &Graph, needs: Vec<ValueId>) -> Vec<String> {
    let mut names: Vec<String> = needs.iter().map(|v| g.values[v.index()].name.to_string()).collect();
    names.sort();
    names.dedup();
    names
}

type OuterFacts<'a> = HashMap<String, (Fact, Option<ConstValue>, ValueKind)>;

fn load_const(values: &mut [Value], v: ValueId) {
    let value = &mut values[v.index()];
    if value.konst.is_some() {
        return;
    }
    let Some(data) = &value.data else { return };
    let Some(n) = data.element_count() else { return };
    if n > MAX_DECODE_ELEMENTS {
        return;
    }
    value.konst = match &data.storage {
        Storage::External {
            path,
            offset,
            length,
            present: true,
        } => {
            let (Some(dt), Some(bytes)) = (data.dtype, data.bytes()) else {
                return;
            };
            if length.is_some_and(|l| l != bytes) {
                return;
            }
            read_external(path, *offset, bytes)
                .ok()
                .and_then(|b| values::decode_raw_bytes(dt, &b, data.dims.clone()))
                .map(Box::new)
        }
        _ => values::decode(data).map(Box::new),
    };
}

fn is_const_kind(k: ValueKind) -> bool {
    matches!(k, ValueKind::Initializer | ValueKind::Constant)
}

/// What every graph of one model is inferred under.
struct Settings<'a> {
    opsets: &'a BTreeMap<String, i64>,
    /// `--loop-trips`, by node name.
    trips: &'a BTreeMap<String, u64>,
    /// `--dim what@node=N` for data-dependent sizes, and which of them a node met.
    assumed: &'a crate::ops::AssumedSizes,
    /// Symbols of the main graph's inputs (see `fill_from`).
    fixable: &'a BTreeSet<String>,
}

fn infer_graph(
    g: &mut Graph,
    settings: &Settings,
    outer: &OuterFacts,
    diags: &mut Vec<Diagnostic>,
    unknown_ops: &mut BTreeMap<(String, String), (usize, String)>,
    mut reasons: Option<&mut UnknownReasons>,
    needs: &mut Vec<ValueId>,
) {
    let Settings {
        opsets,
        trips,
        assumed,
        fixable,
    } = *settings;
    // Captured outer values take their facts from outside.
    for &c in &g.captured.clone() {
        let name = g.values[c.index()].name.clone();
        if let Some((f, k, kind)) = outer.get(name.as_str()) {
            let v = &mut g.values[c.index()];
            v.fact = f.clone();
            v.konst = k.clone().map(Box::new);
            if is_const_kind(*kind) {
                v.kind = ValueKind::Constant;
            }
        }
    }
    // Every value of kind input is a graph input or a captured name (import makes them so),
    // which spares a walk over all of a large graph's values.
    for id in g.inputs.iter().chain(&g.captured) {
        let v = &mut g.values[id.index()];
        if v.kind == ValueKind::Input {
            if let Some(d) = &v.declared {
                v.fact = (**d).clone();
            }
        }
    }
    // Every node's entry is written in the loop below.
    g.costs.resize_with(g.nodes.len(), NodeCost::default);
    let mut texts = ReasonTexts::default();
    // Outputs whose unknown dims arose from symbolic inputs alone, with the symbols that size
    // them (`symbols_behind`): few values, so a map beside the reasons.
    let mut behind: FastMap<ValueId, Vec<String>> = FastMap::default();
    // Outputs of known ops that only the file's declaration sized: (count, first tensor, its node).
    let mut from_file: (usize, Option<(String, String)>) = (0, None);
    // What a node's op is, per (domain, op type), keyed by the interned names' addresses:
    // looked up by text once per distinct op instead of once per node.
    let mut defs = OpTable::default();
    for ni in 0..g.nodes.len() {
        // Constants among the inputs (and captures) are loaded: folding checks them, bodies see
        // them. Only a node with bodies needs its reads as a list of its own.
        for v in g.nodes[ni].inputs.iter().flatten().chain(g.nodes[ni].captures()) {
            load_const(&mut g.values, *v);
        }
        let node = &g.nodes[ni];
        let OpInfo { opset, def, random } = defs.get(node, opsets);

        // Bodies first, with this graph's facts visible to them.
        let mut body_outputs = Vec::new();
        let mut body_consts = Vec::new();
        let mut body_costs = Vec::new();
        if !node.bodies().is_empty() {
            // The bodies see what the node reads (its inputs and captures, which cover nested
            // bodies too), not the whole graph: a large graph with many If/Loop nodes would
            // otherwise copy every fact once per node.
            let mut scope: OuterFacts = outer.clone();
            for c in &node.all_inputs() {
                let v = &g.values[c.index()];
                scope.insert(
                    v.name.to_string(),
                    (v.fact.clone(), v.konst.as_deref().cloned(), v.kind),
                );
            }
            let input_facts: Vec<Fact> = node
                .inputs
                .iter()
                .map(|s| s.map(|v| g.values[v.index()].fact.clone()).unwrap_or_default())
                .collect();
            let op = node.op_type.clone();
            let scan = (op == "Scan").then(|| ops::ScanLayout::of(node, opset));
            let scores = (op == "FlexAttention").then(|| ops::flex_scores(node, &input_facts));
            // An If whose condition is known runs one branch: the other is still inferred
            // (split and explain read its tensors), but what it finds is not reported, as
            // it can never happen.
            let condition = node.inputs.first().copied().flatten();
            let taken = ops::taken_branch(node, condition.and_then(|c| g.values[c.index()].konst.as_deref()));
            let mut bodies = g.nodes[ni]
                .extra
                .as_mut()
                .map(|e| std::mem::take(&mut e.bodies))
                .unwrap_or_default();
            for (bi, b) in bodies.iter_mut().enumerate() {
                seed_body_inputs(&mut b.graph, &op, &input_facts, scan.as_ref(), scores.as_ref());
                let mut unseen = Vec::new();
                let body_diags = if taken.is_some_and(|t| t != bi) {
                    &mut unseen
                } else {
                    &mut *diags
                };
                infer_graph(
                    &mut b.graph,
                    settings,
                    &scope,
                    body_diags,
                    unknown_ops,
                    None,
                    &mut Vec::new(),
                );
                body_outputs.push(
                    b.graph
                        .outputs
                        .iter()
                        .map(|&o| b.graph.values[o.index()].fact.clone())
                        .collect(),
                );
                body_consts.push(
                    b.graph
                        .outputs
                        .iter()
                        .map(|&o| b.graph.values[o.index()].konst.as_deref().cloned())
                        .collect(),
                );
                body_costs.push(graph_cost(&b.graph));
            }
            if let Some(e) = g.nodes[ni].extra.as_mut() {
                e.bodies = bodies;
            }
        }

        let node = &g.nodes[ni];
        let ctx = Ctx {
            node,
            inputs: node
                .inputs
                .iter()
                .map(|s| s.map(|v| &g.values[v.index()].fact))
                .collect(),
            consts: node
                .inputs
                .iter()
                .map(|s| s.and_then(|v| g.values[v.index()].konst.as_deref()))
                .collect(),
            opset,
            body_outputs,
            body_consts,
            loop_trips: trips.get(node.name.as_str()).copied(),
            assumed,
        };
        let (facts, failure): (ops::Facts, Option<String>) = match def {
            Some(d) => match (d.infer)(&ctx) {
                Ok(f) => match f.iter().find_map(beyond_limits) {
                    Some(e) => (
                        ops::Facts::new(),
                        Some(format!("{} could not be inferred: {e}", node.op_type)),
                    ),
                    None => (f, None),
                },
                Err(e) => (
                    ops::Facts::new(),
                    Some(format!("{} could not be inferred: {e}", node.op_type)),
                ),
            },
            None => {
                let e = unknown_ops
                    .entry((node.domain.to_string(), node.op_type.to_string()))
                    .or_insert((0, node.name.to_string()));
                e.0 += 1;
                (
                    ops::Facts::new(),
                    Some(format!("op `{}` is unknown to tilecut", node.op_type)),
                )
            }
        };
        let folded_values = def.and_then(|d| d.fold).and_then(|f| f(&ctx));
        let node = &g.nodes[ni];
        let all_const_inputs = node.inputs.iter().flatten().chain(node.captures()).all(|v| {
            is_const_kind(g.values[v.index()].kind)
                || g.values[v.index()].konst.as_deref().is_some_and(ConstValue::is_numeric)
        });
        // Each output's fact: what inference found, completed from the file's declaration.
        // Costs are computed on these, so a figure follows the shape the report shows.
        let node = &g.nodes[ni];
        let mut outputs = facts;
        outputs.resize_with(node.outputs.len(), Fact::default);
        // Whether inference gave each output a rank: an unranked one takes the failure as its
        // reason, below.
        let ranked: smallvec::SmallVec<[bool; 4]> = if failure.is_some() {
            outputs.iter().map(|f| f.shape.rank().is_some()).collect()
        } else {
            smallvec::SmallVec::new()
        };
        for (slot, fact) in node.outputs.iter().zip(outputs.iter_mut()) {
            if let Some(decl) = slot.and_then(|v| g.values[v.index()].declared.as_deref()) {
                let fact_known = fact.dtype.is_some() && fact.shape.is_concrete();
                if fact_known && decl.dtype.is_some() && decl.shape.rank().is_some() && !agrees(fact, decl) {
                    diags.push(
                        Diagnostic::new(
                            codes::SHAPE_DISAGREES,
                            format!(
                                "inferred {} {} but the file declares {} {}",
                                fact.dtype.map(|d| d.name()).unwrap_or("?"),
                                fact.shape,
                                decl.dtype.map(|d| d.name()).unwrap_or("?"),
                                decl.shape
                            ),
                        )
                        .at_node(&node.name)
                        .at_tensor(slot.map_or("", |v| g.values[v.index()].name.as_str())),
                    );
                }
                let filled = fill_from(fact, decl, fixable);
                if def.is_some() && filled.shape != fact.shape {
                    from_file.0 += 1;
                    if from_file.1.is_none() {
                        let tensor = slot.map_or(String::new(), |v| g.values[v.index()].name.to_string());
                        from_file.1 = Some((tensor, node.name.to_string()));
                    }
                }
                *fact = filled;
            }
        }
        // A node whose inference failed is not costed from declared shapes: its inputs may be
        // what made it fail, and the cost rules expect the inputs their shape rules accepted.
        let cost = if failure.is_none() {
            node_cost(&ctx, def.map(|d| d.cost), &outputs, &body_costs)
        } else {
            node_cost(&ctx, def.map(|d| d.cost), &[], &body_costs)
        };
        let mut merged = if node.bodies().is_empty() || def.is_none() {
            Vec::new()
        } else {
            ops::merge_reasons(&ctx)
        };
        // The context borrows the graph, which the outputs below are written into.
        drop(ctx);
        // An If of the main graph whose condition is not known (`merge_reasons` then gives a
        // slot per output), while some output or its cost is unknown: what the condition is
        // computed from picks the branch.
        if reasons.is_some() && !merged.is_empty() && node.op_type == "If" {
            let unknown = cost.macs.is_none() || cost.ops.is_none() || outputs.iter().any(|f| !f.is_concrete());
            if let Some(src) = unknown.then(|| condition_sources(g, node)).flatten() {
                let said = condition_text(g, node, &src);
                for m in merged.iter_mut().flatten() {
                    m.push_str(&said);
                }
                needs.extend(src.inputs);
            }
        }
        if let Some(f) = &failure {
            if def.is_some() {
                diags.push(Diagnostic::new(codes::SHAPE_FAILED, f.clone()).at_node(&node.name));
            }
        }
        let fully_folded = folded_values.as_ref().is_some_and(|vals| {
            vals.len() >= node.outputs.iter().flatten().count() && vals.iter().all(ConstValue::is_numeric)
        });
        let folded = !random && (all_const_inputs || fully_folded);
        let node = &g.nodes[ni];
        for (k, slot) in node.outputs.iter().enumerate() {
            let Some(v) = slot else { continue };
            let fact = std::mem::take(&mut outputs[k]);
            if let Some(r) = reasons.as_deref_mut() {
                if !fact.is_concrete() {
                    let why = match (&failure, merged.get(k)) {
                        (Some(f), _) if !ranked.get(k).copied().unwrap_or(true) => texts.get(f.clone()),
                        (_, Some(Some(m))) => texts.get(m.clone()),
                        _ => match sized_by_values(g, node, &fact) {
                            Some((text, settable)) => {
                                needs.extend(settable);
                                texts.get(text)
                            }
                            None if !has_unknown_dim(&fact) => texts.for_fact(&fact),
                            None => match symbols_behind(g, node, &fact, &behind) {
                                Some(syms) => {
                                    let text = symbolic_reason(&syms);
                                    behind.insert(*v, syms);
                                    texts.get(text)
                                }
                                None => texts.for_fact(&fact),
                            },
                        },
                    };
                    r.push((*v, why));
                }
            }
            let value = &mut g.values[v.index()];
            value.fact = fact;
            value.konst = folded_values
                .as_ref()
                .and_then(|vals| vals.get(k).cloned())
                .map(Box::new);
            if folded && value.kind == ValueKind::Activation {
                value.kind = ValueKind::Constant;
            }
        }
        g.costs[ni] = cost;
        g.nodes[ni].folded = folded;
    }
    if let (n, Some((tensor, node))) = from_file {
        diags.push(
            Diagnostic::new(
                codes::DECLARED_FALLBACK,
                format!(
                    "{n} tensor(s) that tilecut could not size take the shape the file declares; figures computed from them rest on the file"
                ),
            )
            .at_node(&node)
            .at_tensor(&tensor),
        );
    }
    // Graph inputs the caller feeds but whose shapes are unknown, for the report.
    if let Some(r) = reasons {
        for &i in &g.inputs {
            let f = &g.values[i.index()].fact;
            if !f.is_concrete() {
                let inner = f.first_unknown();
                let syms = inner.map(|u| u.shape.symbols()).unwrap_or_default();
                r.push((
                    i,
                    texts.get(if inner.is_none() {
                        "declared as a sequence, whose length is not known".into()
                    } else if syms.is_empty() {
                        "declared with unknown dims".into()
                    } else {
                        format!("declared with symbolic dims: {}", syms.join(", "))
                    }),
                ));
            }
        }
    }
}

/// The symbols that size an output whose unknown dims (or rank) arose at its node from
/// symbolic inputs alone: two different symbols broadcast against each other (`S` and `U`),
/// a size no expression says. Fixing them sizes the output, which itself may show fewer of
/// them or none. `behind` holds what earlier outputs were given this way, so that an unknown
/// dim passed on keeps naming them. None when an input brings an unknown dim of another
/// cause, or a size read from data: the shape-based reason then stands. The caller has
/// checked that `fact` has an unknown dim (`has_unknown_dim`).
#[cold]
#[inline(never)]
fn symbols_behind(
    g: &Graph,
    node: &crate::ir::Node,
    fact: &Fact,
    behind: &FastMap<ValueId, Vec<String>>,
) -> Option<Vec<String>> {
    use crate::ir::Dim;
    let mut syms = fact.shape.symbols();
    for &v in node.inputs.iter().flatten().chain(node.captures()) {
        if let Some(from) = behind.get(&v) {
            syms.extend(from.iter().cloned());
            continue;
        }
        let value = &g.values[v.index()];
        let f = &value.fact;
        if !is_tensor(f) || f.shape.dims()?.contains(&Dim::Unknown) {
            return None;
        }
        syms.extend(f.shape.symbols());
        if value_unknown(value) && size_like(f) {
            // A size computed from symbolic shapes is known once they are; one read from
            // data is not.
            match value.konst.as_deref().map(|k| k.as_dims()) {
                Some(ds) if !ds.contains(&Dim::Unknown) => syms.extend(ds.iter().flat_map(Dim::symbols)),
                _ => return None,
            }
        }
    }
    syms.sort();
    syms.dedup();
    (!syms.is_empty()).then_some(syms)
}

/// The reason for a tensor that fixing these symbols sizes.
fn symbolic_reason(syms: &[String]) -> String {
    format!("depends on symbolic dims: {}", syms.join(", "))
}

/// Whether a tensor's shape has an unknown dim or rank: what `symbols_behind` looks into,
/// checked first so that the common symbolic tensor does not call it.
fn has_unknown_dim(f: &Fact) -> bool {
    is_tensor(f)
        && f.shape
            .dims()
            .is_none_or(|d| d.iter().any(|x| matches!(x, crate::ir::Dim::Unknown)))
}

/// Tensors of at most this many elements are read as sizes (a shape, a count, a scale per
/// axis) when saying what leaves an output dim unknown.
const SIZE_LIKE_ELEMENTS: u64 = 64;

/// For an If (the caller checks the op) whose condition is neither a constant nor folded:
/// where the condition comes from (`value_sources`).
fn condition_sources(g: &Graph, node: &crate::ir::Node) -> Option<Sources> {
    let c = node.inputs.first().copied().flatten()?;
    if !value_unknown(&g.values[c.index()]) {
        return None;
    }
    Some(value_sources(g, &[c]))
}

/// What an If's unknown condition is made of, to follow its reason: the graph inputs that
/// `--value` can set, the dims left symbolic that `--dim` can set, or that the data decides.
fn condition_text(g: &Graph, node: &crate::ir::Node, src: &Sources) -> String {
    let cond = node.inputs.first().copied().flatten();
    match &src.inputs[..] {
        [one] if Some(*one) == cond => format!("; it is {}{}", inputs_named(g, &src.inputs), src.hint()),
        _ => format!("; it is {}{}", src.origin(g), src.hint()),
    }
}

/// `graph input `a``, `graph inputs `a` and `b``.
fn inputs_named(g: &Graph, ids: &[ValueId]) -> String {
    let what = if ids.len() == 1 { "graph input" } else { "graph inputs" };
    format!("{what} {}", quoted(g, ids))
}

/// Names of values, quoted and listed: `` `a`, `b` and `c` ``.
fn quoted(g: &Graph, ids: &[ValueId]) -> String {
    listed(
        &ids.iter()
            .map(|v| format!("`{}`", g.values[v.index()].name))
            .collect::<Vec<_>>(),
    )
}

/// Why an output of a node whose inputs all have known shapes still has an unknown dim: its
/// size comes from the values of small inputs that are not constants (Range's limits,
/// Reshape's or Expand's shape, Tile's repeats, Resize's sizes). Names them, and the main-graph
/// inputs their values come from, which `--value` can set. None when the unknown dim came in
/// with an input, or when no input looks like a size: the shape-based reason then stands.
fn sized_by_values(g: &Graph, node: &crate::ir::Node, fact: &Fact) -> Option<(String, Vec<ValueId>)> {
    if !is_tensor(fact) || !fact.shape.dims()?.iter().any(|d| matches!(d, crate::ir::Dim::Unknown)) {
        return None;
    }
    let mut reads = node.inputs.iter().flatten().chain(node.captures()).peekable();
    reads.peek()?;
    if !reads.all(|v| g.values[v.index()].fact.is_concrete()) {
        return None;
    }
    let mut sizes: Vec<ValueId> = Vec::new();
    let slots = ops::sizing_slots(node);
    for (i, slot) in node.inputs.iter().enumerate() {
        let Some(v) = *slot else { continue };
        if slots.is_some_and(|s| !s.contains(&i)) {
            continue;
        }
        if value_unknown(&g.values[v.index()]) && size_like(&g.values[v.index()].fact) && !sizes.contains(&v) {
            sizes.push(v);
        }
    }
    if sizes.is_empty() {
        return None;
    }
    let (direct, computed): (Vec<ValueId>, Vec<ValueId>) = sizes.iter().partition(|v| g.inputs.contains(v));
    let mut parts = Vec::new();
    if !direct.is_empty() {
        parts.push(inputs_named(g, &direct));
    }
    let mut src = Sources::default();
    if !computed.is_empty() {
        src = value_sources(g, &computed);
        parts.push(format!("{}, {}", quoted(g, &computed), src.origin(g)));
    }
    src.inputs.retain(|v| !direct.contains(v));
    src.inputs.splice(0..0, direct.iter().copied());
    let hint = src.hint();
    let text = if computed.is_empty() {
        format!(
            "sized by the value of {}, which the file does not give{hint}",
            inputs_named(g, &direct)
        )
    } else {
        format!("sized by the value of {}{hint}", parts.join(" and of "))
    };
    Some((text, src.inputs))
}

/// A value whose contents the file does not give and inference did not work out, wholly or
/// in part (a shape built from a known and an unknown dim).
fn value_unknown(v: &Value) -> bool {
    match v.konst.as_deref() {
        Some(k) => !k.is_numeric(),
        None => !is_const_kind(v.kind),
    }
}

/// A tensor small enough to be read as sizes: a scalar or a short list.
fn size_like(f: &Fact) -> bool {
    is_tensor(f)
        && f.shape.rank().is_some_and(|r| r <= 1)
        && f.shape.element_count().is_some_and(|n| n <= SIZE_LIKE_ELEMENTS)
}

/// Steps of the walk in `value_sources`: size arithmetic is short, and a reason is not worth
/// a long search.
const SOURCE_WALK_LIMIT: usize = 256;

/// Where the values of some size-like tensors come from, as far as the file says.
#[derive(Default)]
struct Sources {
    /// Main-graph inputs, in the order met: `--value` sets them.
    inputs: Vec<ValueId>,
    /// Dims left symbolic that a value is an expression of (a dim read with Shape): `--dim`
    /// sets them.
    symbols: Vec<String>,
    /// Whether some part comes from elsewhere: a large tensor's data, an outer scope, or a
    /// walk cut at its limit.
    from_data: bool,
}

impl Sources {
    /// "computed from graph input `a` and symbolic dim `b`", "computed at run time[, partly
    /// from …]".
    fn origin(&self, g: &Graph) -> String {
        let mut known = Vec::new();
        if !self.inputs.is_empty() {
            known.push(inputs_named(g, &self.inputs));
        }
        if !self.symbols.is_empty() {
            let what = if self.symbols.len() == 1 {
                "symbolic dim"
            } else {
                "symbolic dims"
            };
            let names: Vec<String> = self.symbols.iter().map(|s| format!("`{s}`")).collect();
            known.push(format!("{what} {}", listed(&names)));
        }
        match (known.is_empty(), self.from_data) {
            (true, _) => "computed at run time".into(),
            (false, false) => format!("computed from {}", known.join(" and ")),
            (false, true) => format!("computed at run time, partly from {}", known.join(" and ")),
        }
    }

    /// The options that set what the value is computed from: " (set it with --value NAME=…)".
    fn hint(&self) -> String {
        let mut options = Vec::new();
        if !self.inputs.is_empty() {
            options.push("--value NAME=…");
        }
        if !self.symbols.is_empty() {
            options.push("--dim NAME=…");
        }
        match (self.inputs.len() + self.symbols.len(), options.is_empty()) {
            (_, true) => String::new(),
            (1, false) => format!(" (set it with {})", options.join(" and ")),
            _ => format!(" (set them with {})", options.join(" and ")),
        }
    }
}

/// Where the values `start` are computed from: following producers through size-like
/// tensors only, the main-graph inputs met, and the symbols of values that are expressions
/// of symbolic dims (a Shape read of a tensor whose dims are left symbolic).
fn value_sources(g: &Graph, start: &[ValueId]) -> Sources {
    let mut stack: Vec<ValueId> = start.iter().rev().copied().collect();
    let mut seen: Vec<ValueId> = Vec::new();
    let mut src = Sources::default();
    while let Some(v) = stack.pop() {
        if seen.contains(&v) {
            continue;
        }
        if seen.len() >= SOURCE_WALK_LIMIT {
            src.from_data = true;
            break;
        }
        seen.push(v);
        let value = &g.values[v.index()];
        if !value_unknown(value) {
            continue;
        }
        if g.inputs.contains(&v) {
            src.inputs.push(v);
            continue;
        }
        // A value worked out as an expression of symbolic dims: those dims decide it.
        if let Some(k) = value.konst.as_deref() {
            let dims = k.as_dims();
            let symbols: Vec<String> = dims.iter().flat_map(|d| d.symbols()).collect();
            if !symbols.is_empty() && dims.iter().all(|d| !matches!(d, crate::ir::Dim::Unknown)) {
                for s in symbols {
                    if !src.symbols.contains(&s) {
                        src.symbols.push(s);
                    }
                }
                continue;
            }
        }
        let Some(p) = value.producer else {
            src.from_data = true;
            continue;
        };
        let producer = g.node(p);
        for &u in producer.inputs.iter().flatten().chain(producer.captures()).rev() {
            let read = &g.values[u.index()];
            if !value_unknown(read) {
                continue;
            }
            if size_like(&read.fact) {
                stack.push(u);
            } else {
                src.from_data = true;
            }
        }
    }
    src
}

/// `a`, `a and b`, `a, b and c`.
fn listed(names: &[String]) -> String {
    match names {
        [] => String::new(),
        [one] => one.clone(),
        [rest @ .., last] => format!("{} and {last}", rest.join(", ")),
    }
}

/// What inference needs of a node's op beyond the node: the opset it is read at, its
/// definition (none for an op tilecut does not know) and whether it draws random values.
#[derive(Clone, Copy)]
struct OpInfo {
    opset: i64,
    def: Option<&'static ops::OpDef>,
    random: bool,
}

/// `OpInfo` per (domain, op type), by the interned names' addresses: a 64-slot table in front
/// of a map, since a graph has a few dozen distinct ops and a hash per node was a tenth of
/// inference's own time on a 100k-node graph.
struct OpTable {
    slots: [Option<((usize, usize), OpInfo)>; 64],
    all: FastMap<(usize, usize), OpInfo>,
}

impl Default for OpTable {
    fn default() -> Self {
        OpTable {
            slots: [None; 64],
            all: FastMap::default(),
        }
    }
}

impl OpTable {
    fn get(&mut self, node: &crate::ir::Node, opsets: &BTreeMap<String, i64>) -> OpInfo {
        let key = (node.domain.addr(), node.op_type.addr());
        // Names are separate heap allocations: the low bits are alignment, the next vary.
        let slot = ((key.0 ^ key.1) >> 4) % 64;
        if let Some((k, info)) = self.slots[slot] {
            if k == key {
                return info;
            }
        }
        let info = *self.all.entry(key).or_insert_with(|| OpInfo {
            opset: crate::ir::opset_of(opsets, &node.domain),
            def: ops::lookup(&node.domain, &node.op_type),
            random: ops::is_random(&node.op_type),
        });
        self.slots[slot] = Some((key, info));
        info
    }
}

fn agrees(a: &Fact, b: &Fact) -> bool {
    if a.dtype != b.dtype {
        return false;
    }
    match (a.shape.dims(), b.shape.dims()) {
        (Some(x), Some(y)) => {
            x.len() == y.len()
                && x.iter().zip(y).all(|(p, q)| match (p, q) {
                    (crate::ir::Dim::Known(m), crate::ir::Dim::Known(n)) => m == n,
                    _ => true,
                })
        }
        _ => true,
    }
}

/// Fills what inference left unknown from the file's declaration. A declared symbol that no
/// graph input has (`unk__3`, as shape inference tools name what they could not work out)
/// fills as unknown: kept, it would be advertised as a `--dim` to fix, and no `--dim` reaches
/// it; fixing the inputs' symbols is what sizes such a tensor.
fn fill_from(fact: &Fact, decl: &Fact, fixable: &BTreeSet<String>) -> Fact {
    use crate::ir::Dim;
    let declared = |q: &Dim| match q {
        Dim::Sym(_) if !q.symbols().iter().all(|s| fixable.contains(s)) => Dim::Unknown,
        q => q.clone(),
    };
    let dtype = fact.dtype.or(decl.dtype);
    let shape = match (fact.shape.dims(), decl.shape.dims()) {
        (None, Some(y)) => Shape::of(y.iter().map(declared).collect::<crate::ir::DimVec>()),
        (Some(x), Some(y)) if x.len() == y.len() => Shape::of(
            x.iter()
                .zip(y)
                .map(|(p, q)| match p {
                    Dim::Unknown => declared(q),
                    p => p.clone(),
                })
                .collect::<crate::ir::DimVec>(),
        ),
        _ => fact.shape.clone(),
    };
    // A sequence whose elements the graph spells out keeps them: a declaration types the
    // elements only.
    let tracked = matches!(&fact.value_type, ValueType::Sequence(s) if s.elements.is_some());
    // An untyped declaration reads as a bare tensor: it must not turn an inferred sequence,
    // map or optional back into one.
    let bare = decl.value_type == ValueType::Tensor && fact.value_type != ValueType::Tensor;
    let value_type = if !tracked && !bare && fact.dtype.is_none() && fact.shape.rank().is_none() {
        decl.value_type.clone()
    } else {
        fact.value_type.clone()
    };
    Fact {
        value_type,
        dtype,
        shape,
    }
}

/// Every symbol of a fact's shape.
fn all_symbols(f: &Fact) -> BTreeSet<String> {
    f.shape.dims().unwrap_or(&[]).iter().flat_map(|d| d.symbols()).collect()
}

/// Body graph inputs: Loop (iteration, condition, carried...), Scan (state..., scan slices),
/// SequenceMap (one element of each sequence input), FlexAttention (the scores, `scores`).
fn seed_body_inputs(
    body: &mut Graph,
    op: &str,
    inputs: &[Fact],
    scan: Option<&ops::ScanLayout>,
    scores: Option<&Fact>,
) {
    let ids = body.inputs.clone();
    for (k, id) in ids.iter().enumerate() {
        let v = &mut body.values[id.index()];
        let known = v
            .declared
            .as_ref()
            .is_some_and(|d| d.dtype.is_some() && d.shape.is_concrete());
        if known {
            continue;
        }
        let seeded = match op {
            "Loop" => match k {
                0 => Some(Fact::tensor(Some(DType::I64), Shape::scalar())),
                1 => Some(Fact::tensor(Some(DType::Bool), Shape::scalar())),
                _ => inputs.get(k).cloned(),
            },
            "Scan" => scan.and_then(|l| l.body_input(k, inputs)),
            "FlexAttention" if k == 0 => scores.cloned(),
            // One element of each sequence input; a tensor input as it is.
            "SequenceMap" => inputs.get(k).map(|f| match &f.value_type {
                ValueType::Sequence(s) => s.element.clone(),
                _ => f.clone(),
            }),
            _ => None,
        };
        if let Some(f) = seeded {
            let decl = v.declared.as_deref().cloned().unwrap_or_default();
            v.declared = Some(Box::new(if matches!(op, "SequenceMap" | "FlexAttention") {
                // Every run sees an element that fits the merged element fact, dim for dim
                // (FlexAttention's one run, the scores): it beats the body's own symbols,
                // which only fill what it leaves unknown.
                fill_from(&f, &decl, &all_symbols(&decl))
            } else {
                // The other direction: what the carrying node infers completes the body's
                // own declaration, whatever symbols it has. A loop's carried values may
                // change shape from one iteration to the next, which a body's symbol says.
                fill_from(&decl, &f, &all_symbols(&f))
            }));
        }
    }
}

/// Why an output fact an op's rule gave cannot stand, if it cannot. A shape built from a
/// constant's values can be as long as the constant, and past the rank limit it would be
/// copied into every tensor downstream. A dim is an int64 in ONNX (`TensorShapeProto`), and a
/// product of hostile sizes (Tile, Flatten) can pass that in tilecut's unsigned arithmetic.
fn beyond_limits(f: &Fact) -> Option<String> {
    let dims = f.shape.dims()?;
    if dims.len() > crate::ir::MAX_RANK {
        return crate::ir::rank_within_limit(dims.len() as u64).err();
    }
    dims.iter().find_map(|d| match d {
        crate::ir::Dim::Known(v) if i64::try_from(*v).is_err() => {
            Some(format!("a dim of {v} does not fit in an int64, as an ONNX dim must"))
        }
        _ => None,
    })
}

/// Summed (macs, ops) of a graph; None where any node's figure is unknown.
fn graph_cost(g: &Graph) -> MacsOps {
    let mut macs = Some(0u64);
    let mut ops_ = Some(0u64);
    for id in g.node_ids().filter(|&id| !g.node(id).folded) {
        let cost = g.cost(id);
        macs = macs.zip(cost.macs).and_then(|(a, b)| a.checked_add(b));
        ops_ = ops_.zip(cost.ops).and_then(|(a, b)| a.checked_add(b));
    }
    (macs, ops_)
}

fn node_cost(ctx: &Ctx, rule: Option<CostRule>, outs: &[Fact], bodies: &[MacsOps]) -> NodeCost {
    let (mut macs, mut ops_) = match rule {
        None => (None, None),
        Some(CostRule::Free) => (Some(0), Some(0)),
        Some(CostRule::PerOutput(k)) => (
            Some(0),
            outs.first()
                .and_then(|f| f.shape.element_count())
                .and_then(|e| e.checked_mul(k)),
        ),
        Some(CostRule::PerInput(k)) => (
            Some(0),
            ctx.fact(0)
                .and_then(|f| f.shape.element_count())
                .and_then(|e| e.checked_mul(k)),
        ),
        Some(CostRule::Custom(f)) => f(ctx, outs),
    };
    if !bodies.is_empty() {
        let trips: Option<u64> = match ctx.node.op_type.as_str() {
            "If" => Some(1),
            "Loop" => ctx
                .konst(0)
                .and_then(|c| c.as_ints().first().copied())
                .map(|t| t.max(0) as u64)
                .or(ctx.loop_trips),
            "Scan" => ops::ScanLayout::of(ctx.node, ctx.opset).trips(ctx),
            "SequenceMap" => ops::sequence_map_trips(ctx),
            _ => Some(1),
        };
        let pick = |sel: fn(&MacsOps) -> Option<u64>| -> Option<u64> {
            if ctx.node.op_type == "If" {
                if let Some(taken) = ops::taken_branch(ctx.node, ctx.konst(0)) {
                    return bodies.get(taken).and_then(sel);
                }
                // Unknown condition: cost the more expensive branch.
                return bodies.iter().map(sel).try_fold(0u64, |m, x| x.map(|x| m.max(x)));
            }
            bodies
                .iter()
                .map(sel)
                .try_fold(0u64, |m, x| x.and_then(|x| m.checked_add(x)))?
                .checked_mul(trips?)
        };
        macs = macs.zip(pick(|b| b.0)).and_then(|(a, b)| a.checked_add(b));
        ops_ = ops_.zip(pick(|b| b.1)).and_then(|(a, b)| a.checked_add(b));
    }
    let mut needs = crate::ir::NameList::new();
    if ctx.node.op_type == "Loop"
        && (macs.is_none() || ops_.is_none())
        && ctx.konst(0).is_none()
        && ctx.loop_trips.is_none()
    {
        needs.push(crate::ir::Name::from(format!("trips@{}", ctx.node.name)));
    }
    if macs.is_none() || ops_.is_none() {
        // A shape passed on from an input is the input's own allocation: read once.
        let mut read: smallvec::SmallVec<[&crate::ir::Shape; 6]> = smallvec::SmallVec::new();
        for f in ctx.inputs.iter().flatten().copied().chain(outs.iter()) {
            if !read.iter().any(|s| s.same_alloc(&f.shape)) {
                f.shape.symbols_into(&mut needs);
                read.push(&f.shape);
            }
        }
        needs.sort();
        needs.dedup();
    }
    NodeCost {
        macs,
        ops: ops_,
        needs_dims: needs,
    }
}

/// True for tensor values (not sequences, maps or optionals).
pub fn is_tensor(f: &Fact) -> bool {
    f.value_type == ValueType::Tensor
}
