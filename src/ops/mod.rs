//! What tilecut knows about each operator: one registry from (domain, op type) to a shape
//! function, a cost rule and, for shape arithmetic, a constant folder. Families live in
//! their own files; an op missing here becomes an unknown fact plus a diagnostic.
//!
//! Cost conventions (also in the README):
//! - MACs count multiply-accumulates of the op's main contraction: Conv =
//!   N·Cout·∏out_spatial·(Cin/group)·∏kernel; ConvTranspose = N·Cin·∏in_spatial·(Cout/group)·∏kernel;
//!   MatMul = ∏batch·M·N·K; Gemm = M·N·K; Einsum = ∏ of every distinct index size; LSTM/GRU/RNN =
//!   seq·dirs·batch·gates·hidden·(input+hidden); Attention = B·H·Sq·Skv·(Dqk+Dv) with Skv
//!   counting a KV cache's past keys; LinearAttention = B·T·(Hq + Hkv·u)·dk·dv (u = 2 for the
//!   delta rules, else 1);
//!   CausalConvWithState = B·C·L·k.
//!   Bias additions, activation functions and scaling are not MACs.
//! - `ops` counts other arithmetic: element-wise ops one per output element (times the
//!   per-op factor in the table), pools one per window element, reductions one per input element.
//! - Data movement (Reshape, Transpose, Concat, Gather, …) costs neither: only bytes.

mod contrib;
mod control_flow;
mod conv;
mod elementwise;
mod fold;
mod matmul;
mod ml;
mod norm;
mod quant;
mod recurrent;
mod reduce;
mod sequence;
mod shape_ops;
mod signal;
mod strings;
mod training;
mod util;
mod vision;

pub use control_flow::{merge_reasons, sequence_map_trips, taken_branch, ScanLayout};
pub use matmul::flex_scores;
pub use util::broadcast;

use crate::ir::{ConstValue, Fact, Node};

/// What an op's functions see of one node.
pub struct Ctx<'a> {
    pub node: &'a Node,
    /// Inline up to four slots: building a context allocates nothing for most nodes.
    pub inputs: smallvec::SmallVec<[Option<&'a Fact>; 4]>,
    pub consts: smallvec::SmallVec<[Option<&'a ConstValue>; 4]>,
    /// Opset version of the node's domain.
    pub opset: i64,
    /// Facts inferred for each body's outputs (If/Loop/Scan), in body order.
    pub body_outputs: Vec<Vec<Fact>>,
    /// The values of those outputs that inference worked out, in the same order (an If whose
    /// condition is known passes its taken branch's on).
    pub body_consts: Vec<Vec<Option<ConstValue>>>,
    /// A Loop's trip count from `--loop-trips`, when its `M` input is not a constant.
    pub loop_trips: Option<u64>,
    /// Sizes the user assumed for data-dependent dims.
    pub assumed: &'a AssumedSizes,
}

/// Sizes the user assumed for data-dependent dims (`--dim what@node=N`), by the name tilecut
/// gives such a dim, and the names a node has met (the others are reported unused).
#[derive(Debug, Default)]
pub struct AssumedSizes {
    values: std::collections::BTreeMap<String, u64>,
    met: std::cell::RefCell<std::collections::BTreeSet<String>>,
}

impl AssumedSizes {
    pub fn new(values: std::collections::BTreeMap<String, u64>) -> AssumedSizes {
        AssumedSizes {
            values,
            met: Default::default(),
        }
    }

    /// The assumed size of the dim named `name`, noting that it was met.
    pub fn get(&self, name: &str) -> Option<u64> {
        let v = self.values.get(name).copied()?;
        self.met.borrow_mut().insert(name.to_string());
        Some(v)
    }

    /// Names given that no node computes.
    pub fn unmet(&self) -> Vec<&str> {
        let met = self.met.borrow();
        self.values
            .keys()
            .filter(|k| !met.contains(*k))
            .map(String::as_str)
            .collect()
    }
}

/// An inference outcome for one node: the output facts, or why they are unknown.
/// The facts of a node's outputs, inline up to two: most ops have one or two outputs, and a
/// large graph paid one allocation per node for the list.
pub type Facts = smallvec::SmallVec<[Fact; 2]>;

pub type Inferred = Result<Facts, String>;

/// (MACs, other ops) of one node; `None` where a dim is unknown.
pub type MacsOps = (Option<u64>, Option<u64>);

/// How an op's arithmetic is counted.
#[derive(Clone, Copy)]
pub enum CostRule {
    /// Pure data movement or metadata: no arithmetic.
    Free,
    /// `k` ops per element of output 0.
    PerOutput(u64),
    /// `k` ops per element of input 0 (reductions, normalisations).
    PerInput(u64),
    /// Op-specific: returns (macs, ops).
    Custom(fn(&Ctx, &[Fact]) -> MacsOps),
}

/// Computes a node's output values from small constant inputs, if it can.
pub type FoldFn = fn(&Ctx) -> Option<Vec<ConstValue>>;

/// Everything known about one op type.
pub struct OpDef {
    pub domain: &'static str,
    pub op: &'static str,
    /// The family file that owns it.
    pub family: &'static str,
    pub infer: fn(&Ctx) -> Inferred,
    pub cost: CostRule,
    /// Computes output values when inputs are small constants (shape arithmetic).
    pub fold: Option<FoldFn>,
}

pub use crate::ir::{is_default_domain, CONTRIB_DOMAIN};

/// A domain as profiles may write it: `contrib` stands for `CONTRIB_DOMAIN`.
pub fn resolve_domain(d: &str) -> &str {
    if d == "contrib" {
        CONTRIB_DOMAIN
    } else {
        d
    }
}

/// Whether `node` is in `domain` as a profile or a what-if names it: the standard domain by
/// any of its spellings, `contrib` for `CONTRIB_DOMAIN`, else the exact name.
pub fn node_in_domain(node: &crate::ir::Node, domain: &str) -> bool {
    resolve_domain(domain) == node.domain || (is_default_domain(domain) && node.is_default_domain())
}

/// Operator-form quantized ops whose weight is input 3, after (x, x_scale, x_zero_point):
/// QLinearConv and QLinearMatMul (ONNX spec), the contrib domain's QGemm and
/// QLinearConvTranspose. Inference, quantization parameters and the rule table's kernel check
/// all read the weight there.
pub fn weight_in_slot_3(op: &str) -> bool {
    matches!(op, "QLinearConv" | "QLinearMatMul" | "QGemm" | "QLinearConvTranspose")
}

/// The input slots whose values size a node's outputs, for ops that also read other small
/// inputs which do not (a decoding loop's `num_beams` and `min_length`, CropAndResize's batch
/// indices): a reason then names only the inputs worth setting with `--value`. None: every
/// size-like input may.
pub fn sizing_slots(node: &crate::ir::Node) -> Option<&'static [usize]> {
    if node.domain.as_str() != CONTRIB_DOMAIN {
        return None;
    }
    match node.op_type.as_str() {
        // max_length, num_return_sequences (contrib documentation, from memory).
        "BeamSearch" | "WhisperBeamSearch" => Some(&[1, 4]),
        "GreedySearch" | "Sampling" => Some(&[1]),
        "CropAndResize" => Some(&[3]),
        _ => None,
    }
}

/// The registry: every family's table, concatenated.
pub fn registry() -> &'static [&'static [OpDef]] {
    REGISTRY
}

static REGISTRY: &[&[OpDef]] = &[
    elementwise::OPS,
    conv::OPS,
    matmul::OPS,
    norm::OPS,
    quant::OPS,
    recurrent::OPS,
    reduce::OPS,
    shape_ops::OPS,
    control_flow::OPS,
    signal::OPS,
    strings::OPS,
    vision::OPS,
    sequence::OPS,
    contrib::OPS,
    ml::OPS,
    training::OPS,
];

/// Looks an op up by domain and type (a hash index over the registry, built once).
pub fn lookup(domain: &str, op: &str) -> Option<&'static OpDef> {
    type Index = crate::fastmap::FastMap<(&'static str, &'static str), &'static OpDef>;
    static INDEX: std::sync::OnceLock<Index> = std::sync::OnceLock::new();
    let index = INDEX.get_or_init(|| {
        registry()
            .iter()
            .flat_map(|t| t.iter())
            .map(|o| ((o.domain, o.op), o))
            .collect()
    });
    let d = if domain == "ai.onnx" {
        ""
    } else {
        resolve_domain(domain)
    };
    index.get(&(d, op)).copied()
}

/// True for ops whose output is random: never folded as constants.
pub fn is_random(op: &str) -> bool {
    matches!(
        op,
        "RandomNormal" | "RandomUniform" | "RandomNormalLike" | "RandomUniformLike" | "Multinomial" | "Bernoulli"
    )
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn registry_has_no_duplicates_and_every_op_has_a_cost_convention() {
        let mut seen = std::collections::BTreeSet::new();
        for op in registry().iter().flat_map(|t| t.iter()) {
            assert!(
                seen.insert((op.domain, op.op)),
                "duplicate registry entry {}/{}",
                op.domain,
                op.op
            );
            assert!(!op.op.is_empty() && !op.family.is_empty());
            // Every entry has a cost rule by construction (the enum has no "unknown").
            let _ = op.cost;
        }
        assert!(seen.len() > 150, "registry unexpectedly small: {}", seen.len());
    }
}
