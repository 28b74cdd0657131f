//! Concrete suggestions for nodes the target keeps on the CPU, one per blocking reason: an
//! equivalent form made of ops the target has rules for (`target/equivalents.toml`), a
//! quantization change, a dim to fix, an attribute value the rule allows. Knows nothing of
//! costs or the cut; the report ranks what this module says.

use std::sync::OnceLock;

use serde::Deserialize;

use crate::ir::{Dim, Graph, NodeId};
use crate::rules::{reason, Reason, Verdict};
use crate::target::Target;

/// One equivalent form: `op` can be written with the ops in `with`.
#[derive(Deserialize, Debug, Clone)]
#[serde(deny_unknown_fields)]
pub struct Equivalent {
    pub op: String,
    pub with: Vec<String>,
    /// Conditions the node must meet (names in `CONDITIONS`).
    #[serde(default)]
    pub when: Vec<String>,
    /// False for approximations.
    pub exact: bool,
    pub how: String,
}

#[derive(Deserialize)]
#[serde(deny_unknown_fields)]
struct EquivalentsFile {
    #[serde(rename = "equivalent")]
    entries: Vec<Equivalent>,
}

/// The embedded table's text (a test checks it parses and names only known ops).
pub const EQUIVALENTS_TOML: &str = include_str!("target/equivalents.toml");

/// The equivalents table, parsed once. Embedded data, checked by a test; an unreadable table
/// would only mean fewer suggestions, never a failure.
pub fn equivalents() -> &'static [Equivalent] {
    static TABLE: OnceLock<Vec<Equivalent>> = OnceLock::new();
    TABLE.get_or_init(|| {
        toml::from_str::<EquivalentsFile>(EQUIVALENTS_TOML)
            .map(|f| f.entries)
            .unwrap_or_default()
    })
}

/// Whether the target has a rule or a movement entry for a default-domain op.
pub fn target_knows(target: &Target, op: &str) -> bool {
    target
        .file
        .rules
        .iter()
        .any(|r| crate::ops::is_default_domain(&r.domain) && r.ops.iter().any(|o| o == op))
        || target.file.movement.iter().any(|m| m.ops.iter().any(|o| o == op))
}

/// The conditions an equivalent may require of a node.
pub const CONDITIONS: &[&str] = &[
    "const-input-1",
    "rank-2",
    "spatial-axes",
    "min-zero-no-max",
    "single-slope",
    "constant-mode",
    "feeds-conv",
    "follows-conv",
    "two-operands",
    "small-integer-exponent",
];

/// Whether `node` meets condition `c` (see `CONDITIONS`); unknown facts mean no.
fn meets(g: &Graph, id: NodeId, c: &str) -> bool {
    use crate::ir::{AttrValue, ValueKind};
    let node = g.node(id);
    let input = |k: usize| node.inputs.get(k).copied().flatten();
    let is_const = |k: usize| {
        input(k).is_some_and(|v| {
            let val = g.value(v);
            matches!(val.kind, ValueKind::Initializer | ValueKind::Constant) || val.konst.is_some()
        })
    };
    let konst = |k: usize| input(k).and_then(|v| g.value(v).konst.as_ref());
    let rank = |k: usize| input(k).and_then(|v| g.value(v).fact.shape.rank());
    match c {
        "const-input-1" => is_const(1),
        "rank-2" => rank(0) == Some(2) && rank(1) == Some(2),
        "spatial-axes" => {
            let Some(r) = rank(0).filter(|&r| r >= 3) else {
                return false;
            };
            let axes: Option<Vec<i64>> = match node.attr("axes") {
                Some(AttrValue::Ints(a)) => Some(a.clone()),
                _ => konst(1).and_then(|k| k.try_ints()),
            };
            let keep = !matches!(node.attr("keepdims"), Some(AttrValue::Int(0)));
            let Some(mut axes) = axes else { return false };
            for a in axes.iter_mut() {
                if *a < 0 {
                    *a += r as i64;
                }
            }
            axes.sort_unstable();
            keep && axes == (2..r as i64).collect::<Vec<_>>()
        }
        "min-zero-no-max" => {
            let attr_min = match node.attr("min") {
                Some(AttrValue::Float(m)) => Some(*m as f64),
                _ => None,
            };
            let min = attr_min.or_else(|| konst(1).and_then(|k| k.as_floats().first().copied()));
            let no_max = node.attr("max").is_none() && input(2).is_none();
            min == Some(0.0) && no_max
        }
        "single-slope" => input(1).and_then(|v| g.value(v).fact.shape.element_count()) == Some(1),
        "constant-mode" => match node.attr("mode") {
            None => true,
            Some(AttrValue::String(m)) => m == "constant",
            _ => false,
        },
        "feeds-conv" => node.outputs.first().copied().flatten().is_some_and(|o| {
            let cs = &g.value(o).consumers;
            !cs.is_empty() && cs.iter().all(|c| g.node(*c).op_type == "Conv")
        }),
        "follows-conv" => input(0).is_some_and(|v| {
            let val = g.value(v);
            val.consumers.len() == 1 && val.producer.is_some_and(|p| g.node(p).op_type == "Conv")
        }),
        "two-operands" => node.inputs.iter().flatten().count() == 2,
        "small-integer-exponent" => konst(1)
            .map(|k| k.as_floats())
            .is_some_and(|v| v.len() == 1 && v[0].fract() == 0.0 && (2.0..=4.0).contains(&v[0])),
        _ => false,
    }
}

/// The first equivalent form for the node that the target has rules for and whose
/// conditions the node meets, exact forms first.
pub fn equivalent_for<'a>(g: &Graph, id: NodeId, target: &Target) -> Option<&'a Equivalent> {
    let table = equivalents();
    let op = g.node(id).op_type.as_str();
    let usable = |e: &&Equivalent| {
        e.op == op && e.with.iter().all(|w| target_knows(target, w)) && e.when.iter().all(|c| meets(g, id, c))
    };
    table
        .iter()
        .filter(|e| e.exact)
        .find(usable)
        .or_else(|| table.iter().filter(|e| !e.exact).find(usable))
}

/// The first integer type signature of the target's rule for `op`, in words.
fn integer_signature(target: &Target, op: &str) -> Option<String> {
    target
        .file
        .rules
        .iter()
        .filter(|r| r.ops.iter().any(|o| o == op))
        .flat_map(|r| r.types.iter())
        .find(|t| !t.act.starts_with("fp") && !t.act.starts_with("bf"))
        .map(|t| match (&t.weight, &t.out) {
            (Some(w), Some(o)) => format!("{} × {w} → {o}", t.act),
            (None, Some(o)) => format!("{} → {o}", t.act),
            _ => t.act.clone(),
        })
}

/// Symbolic dims (not data-dependent ones) on a node's activation tensors.
fn node_symbols(g: &Graph, id: NodeId) -> (Vec<String>, bool) {
    let node = g.node(id);
    let mut syms: Vec<String> = Vec::new();
    let mut data_dependent = false;
    for v in node.inputs.iter().chain(node.outputs.iter()).flatten() {
        for d in g.value(*v).fact.shape.dims().into_iter().flatten() {
            if let Dim::Sym(_) = d {
                for s in d.symbols() {
                    if crate::ir::is_data_dependent(&s) {
                        data_dependent = true;
                    } else {
                        syms.push(s);
                    }
                }
            }
        }
    }
    syms.sort();
    syms.dedup();
    (syms, data_dependent)
}

/// What to change so that the node could run on the array: one suggestion per distinct
/// blocking reason, in the verdict's order, joined with "; also ".
pub fn suggest(g: &Graph, id: NodeId, v: &Verdict, target: &Target) -> Option<String> {
    let mut seen: Vec<&str> = Vec::new();
    let mut parts: Vec<String> = Vec::new();
    for r in v.reasons.iter().filter(|r| r.blocking) {
        if seen.contains(&r.code) {
            continue;
        }
        seen.push(r.code);
        if let Some(s) = suggest_one(g, id, r, target) {
            parts.push(s);
        }
    }
    (!parts.is_empty()).then(|| parts.join("; also "))
}

/// The suggestion for one blocking reason of a node.
pub fn suggest_one(g: &Graph, id: NodeId, first: &Reason, target: &Target) -> Option<String> {
    let node = g.node(id);
    let op = node.op_type.as_str();
    let limit = |key: &str| -> Option<u64> {
        let rule = target.file.rules.iter().find(|r| Some(&r.id) == first.rule.as_ref())?;
        match key {
            "kernel" => rule.kernel_max,
            "stride" => rule.stride_max,
            "dilation" => rule.dilation_max,
            "rank" => rule.max_rank.map(|r| r as u64),
            "dim" => rule.max_dim,
            _ => None,
        }
    };
    let s = match first.code {
        reason::NO_RULE => match equivalent_for(g, id, target) {
            Some(e) => format!(
                "{}{} (the target has rules for {})",
                e.how,
                if e.exact { "" } else { "; an approximation" },
                if e.with.is_empty() {
                    "everything that remains".to_string()
                } else {
                    e.with.join(", ")
                }
            ),
            None => format!(
                "no equivalent form the target runs fits this node; a rule for {op} would be needed (`--assume-supported {op}` shows the gain, `tilecut survey` ranks it across models)"
            ),
        },
        reason::FLOAT_ON_CPU => match integer_signature(target, op) {
            Some(sig) => format!(
                "quantize it in QDQ form to {sig} ({}); `--assume-quantized` shows the gain",
                if sig.contains('×') {
                    "static activation scales, symmetric per-channel weights"
                } else {
                    "static scales"
                }
            ),
            None => "quantize it in QDQ form to the target's integer types".into(),
        },
        reason::TYPES => "re-quantize to one of the rule's type signatures listed in the reason".into(),
        reason::UNKNOWN_TYPES => "fix the input shapes and types (--input NAME=SHAPE) so that inference can type this node".into(),
        reason::WEIGHT_ASYMMETRIC => "re-quantize the weights symmetrically (zero point 0)".into(),
        reason::WEIGHT_GRANULARITY => "re-quantize the weights with the granularity the reason names (per-channel or per-tensor scales)".into(),
        reason::WEIGHT_AXIS => "re-quantize the weights per channel along the axis the reason names".into(),
        reason::WEIGHT_BLOCKED => "quantize the weights per channel instead of in blocks (int8, axis 0)".into(),
        reason::ACT_PER_AXIS => "quantize the activations with one scale per tensor".into(),
        reason::SCALE_POW2 => "calibrate with scales constrained to powers of two".into(),
        reason::DYNAMIC_QUANT => "quantize statically: calibrate activation scales offline and export QDQ instead of DynamicQuantizeLinear".into(),
        reason::DYNAMIC_SHAPE => {
            let (syms, data_dependent) = node_symbols(g, id);
            if !syms.is_empty() {
                format!(
                    "fix the symbolic dims: {}",
                    syms.iter().map(|s| crate::text::fix_hint(s)).collect::<Vec<_>>().join(" ")
                )
            } else if data_dependent {
                "its shape depends on data at run time: keep it on the CPU, or bound the size (e.g. a fixed top-k) so the shape is static; `--dim what@node=N` (the name the reason gives) shows the figures padded to N".into()
            } else {
                "fix the input shapes (--input NAME=SHAPE) so that every dim is known".into()
            }
        }
        reason::KERNEL => match limit("kernel") {
            Some(k) => format!(
                "split the kernel into kernels of at most {k}×{k} (e.g. stacked smaller convolutions, or a k×1 then 1×k pair)"
            ),
            None => "use smaller kernels".into(),
        },
        reason::STRIDE => match limit("stride") {
            Some(m) => format!("use a stride of at most {m} and subsample afterwards (a strided Slice or a pooling step)"),
            None => "use a smaller stride".into(),
        },
        reason::DILATION => match limit("dilation") {
            Some(m) => format!("use a dilation of at most {m}, or space the kernel out explicitly with zero weights"),
            None => "use a smaller dilation".into(),
        },
        reason::GROUP => "write the grouped convolution as a Split, one Conv per group and a Concat (regular convolutions the target runs)".into(),
        reason::ATTR => format!(
            "set the attribute to one of the values the reason lists{}",
            if op == "Resize" || op == "Upsample" {
                " (e.g. mode = \"nearest\"; retrain or fine-tune if the model relies on interpolation)"
            } else {
                ""
            }
        ),
        reason::RANK => match limit("rank") {
            Some(r) => format!("reshape to at most {r} dims around this node (merge the outer dims)"),
            None => "reshape to fewer dims".into(),
        },
        reason::DIM => match limit("dim") {
            Some(m) => format!("tile the computation along the large dim in pieces of at most {m} (Split, the op, Concat)"),
            None => "tile the computation along the large dim".into(),
        },
        reason::OPSET => "re-export the model with an opset inside the rule's range".into(),
        reason::CONTROL_FLOW => match op {
            "If" => "fold the If at export with a constant condition, or move the branch to pre/post-processing".into(),
            "Loop" | "Scan" => "unroll the loop at export (a static trip count), or keep it on the CPU and offload its body's ops as a separate model".into(),
            _ => "restructure without subgraphs".into(),
        },
        _ => return None,
    };
    Some(s)
}

#[cfg(test)]
mod tests {
    use super::*;

    /// The embedded table is data: it must parse, name only ops the registry knows, use only
    /// defined conditions, and say what to do.
    #[test]
    fn the_equivalents_table_is_valid() {
        let parsed: EquivalentsFile = toml::from_str(EQUIVALENTS_TOML).unwrap_or_else(|e| panic!("{e}"));
        assert!(parsed.entries.len() >= 30);
        let mut seen = std::collections::BTreeSet::new();
        for e in &parsed.entries {
            assert!(crate::ops::lookup("", &e.op).is_some(), "unknown op {}", e.op);
            for w in &e.with {
                assert!(crate::ops::lookup("", w).is_some(), "{}: unknown op {w}", e.op);
                assert_ne!(w, &e.op, "{} cannot be its own equivalent", e.op);
            }
            for c in &e.when {
                assert!(CONDITIONS.contains(&c.as_str()), "{}: unknown condition {c}", e.op);
            }
            assert!(!e.how.trim().is_empty(), "{}: no `how`", e.op);
            assert!(
                seen.insert((e.op.clone(), e.with.clone())),
                "{} → {:?} twice",
                e.op,
                e.with
            );
        }
        assert_eq!(equivalents().len(), parsed.entries.len());
    }
}
