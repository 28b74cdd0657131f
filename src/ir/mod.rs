//! tilecut's own model of an operator graph: an arena of nodes and values indexed by ids,
//! each value with one producer, many consumers and a small fact (dtype, shape).
//! A leaf module: it does no I/O and names no protobuf type.

mod dtype;
mod name;
mod shape;
mod terms;
mod text;

pub use dtype::DType;
pub use name::Name;
pub use shape::{compact_expression, evaluate, rank_within_limit, Dim, DimVec, Shape, MAX_RANK};
pub use text::Text;

use bytes::Bytes;
use std::collections::BTreeMap;
use std::path::PathBuf;

/// A node's index in its graph, stored plus one (as `ValueId`), so that `Option<NodeId>`
/// takes four bytes: every value records its producer.
#[derive(Clone, Copy, PartialEq, Eq, PartialOrd, Ord, Hash)]
pub struct NodeId(std::num::NonZeroU32);

/// A value's index in its graph, stored plus one so that `Option<ValueId>` takes four bytes
/// (a node's input and output slots are lists of them).
#[derive(Clone, Copy, PartialEq, Eq, PartialOrd, Ord, Hash)]
pub struct ValueId(std::num::NonZeroU32);

impl NodeId {
    /// The id of the node at `index`; a graph holds fewer than 2^32 - 1 nodes, for the
    /// reason `ValueId::new` gives.
    pub fn new(index: usize) -> NodeId {
        NodeId(plus_one(index))
    }

    pub fn index(self) -> usize {
        self.0.get() as usize - 1
    }
}

impl std::fmt::Debug for NodeId {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        write!(f, "NodeId({})", self.index())
    }
}

impl ValueId {
    /// The id of the value at `index`. A graph holds fewer than 2^32 - 1 values: each takes
    /// more than one byte of a file of at most 2 GiB, or of memory.
    pub fn new(index: usize) -> ValueId {
        ValueId(plus_one(index))
    }

    pub fn index(self) -> usize {
        self.0.get() as usize - 1
    }
}

/// An index stored plus one, as both ids keep it (the largest for an index beyond them).
fn plus_one(index: usize) -> std::num::NonZeroU32 {
    u32::try_from(index)
        .ok()
        .and_then(|i| i.checked_add(1))
        .and_then(std::num::NonZeroU32::new)
        .unwrap_or(std::num::NonZeroU32::MAX)
}

impl std::fmt::Debug for ValueId {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        write!(f, "ValueId({})", self.index())
    }
}

/// What a value is, from the graph's point of view.
#[derive(Clone, Copy, Debug, PartialEq, Eq, PartialOrd, Ord)]
pub enum ValueKind {
    /// A graph input the caller feeds.
    Input,
    /// A weight stored in the file (including old-IR initializers also listed as inputs).
    Initializer,
    /// Computed from constants only (Constant nodes and what folds from them): weight-like.
    Constant,
    /// Computed per inference.
    Activation,
    /// A graph output.
    Output,
}

impl ValueKind {
    pub fn as_str(self) -> &'static str {
        match self {
            ValueKind::Input => "input",
            ValueKind::Initializer => "initializer",
            ValueKind::Constant => "constant",
            ValueKind::Activation => "activation",
            ValueKind::Output => "output",
        }
    }
}

/// The non-tensor value types ONNX allows, besides plain tensors.
#[derive(Clone, Debug, PartialEq)]
pub enum ValueType {
    Tensor,
    SparseTensor,
    /// A sequence, boxed whole: every value's fact carries a `ValueType`, and few are
    /// sequences (inline, its parts made each fact 16 bytes larger).
    Sequence(Box<SequenceFact>),
    /// A map, with its key type where known (the fact's `dtype` is its values' type).
    Map(Option<DType>),
    Optional(Box<Fact>),
}

impl ValueType {
    pub fn sequence(element: Fact, elements: Option<Vec<Fact>>) -> ValueType {
        ValueType::Sequence(Box::new(SequenceFact { element, elements }))
    }
}

/// What is known of a sequence's elements.
#[derive(Clone, Debug, PartialEq)]
pub struct SequenceFact {
    /// The fact every element satisfies.
    pub element: Fact,
    /// Each element's fact, where the graph makes the sequence element by element (construct,
    /// insert, erase, split with known sizes; at most `MAX_TRACKED_ELEMENTS`).
    pub elements: Option<Vec<Fact>>,
}

/// The longest sequence whose elements are tracked one by one.
pub const MAX_TRACKED_ELEMENTS: usize = 64;

/// What is known of a value: element type and shape, either possibly unknown.
#[derive(Clone, Debug, PartialEq)]
pub struct Fact {
    pub value_type: ValueType,
    pub dtype: Option<DType>,
    pub shape: Shape,
}

impl Default for Fact {
    fn default() -> Self {
        Fact {
            value_type: ValueType::Tensor,
            dtype: None,
            shape: Shape::unknown(),
        }
    }
}

impl Fact {
    pub fn tensor(dtype: Option<DType>, shape: Shape) -> Fact {
        Fact {
            value_type: ValueType::Tensor,
            dtype,
            shape,
        }
    }

    /// Bytes of one instance of the value, if dtype and every dim are known. A sequence is
    /// its elements together, when each is known; an optional, the value it holds (what it
    /// takes when it holds one); a map or a sparse tensor is not sized.
    pub fn bytes(&self) -> Option<u64> {
        match &self.value_type {
            ValueType::Tensor => {
                let n = self.shape.element_count()?;
                self.dtype?.bytes_for(n)
            }
            ValueType::Sequence(s) => s
                .elements
                .as_ref()?
                .iter()
                .try_fold(0u64, |acc, e| acc.checked_add(e.bytes()?)),
            ValueType::Optional(inner) => inner.bytes(),
            ValueType::SparseTensor | ValueType::Map(_) => None,
        }
    }

    /// Whether every dim of the value is known: a tensor's own; each element's of a sequence
    /// whose elements are tracked; the held value's of an optional.
    pub fn is_concrete(&self) -> bool {
        match &self.value_type {
            ValueType::Sequence(s) => s.elements.as_ref().is_some_and(|es| es.iter().all(Fact::is_concrete)),
            ValueType::Optional(inner) => inner.is_concrete(),
            ValueType::Tensor | ValueType::SparseTensor | ValueType::Map(_) => self.shape.is_concrete(),
        }
    }

    /// The first fact inside this one that is not concrete (itself, for a tensor): what
    /// a reason for it should describe. None for a sequence whose elements are not tracked.
    pub fn first_unknown(&self) -> Option<&Fact> {
        match &self.value_type {
            ValueType::Sequence(s) => s.elements.as_ref()?.iter().find_map(Fact::first_unknown),
            ValueType::Optional(inner) => inner.first_unknown(),
            ValueType::Tensor | ValueType::SparseTensor | ValueType::Map(_) => {
                (!self.shape.is_concrete()).then_some(self)
            }
        }
    }
}

/// Where the payload of a stored tensor lives; read only on demand.
#[derive(Clone, Debug, PartialEq)]
pub enum Storage {
    /// `raw_data`: little-endian elements, sub-byte types packed two (or four) per byte.
    Raw(Bytes),
    /// Packed varints (`int32_data`, `int64_data`, `uint64_data`).
    Varints(Bytes),
    /// Packed little-endian f32 (`float_data`; fp16/bf16 bit patterns for those types).
    Fixed32(Bytes),
    /// Packed little-endian f64 (`double_data`).
    Fixed64(Bytes),
    /// Strings, never decoded for analysis.
    Strings(usize),
    /// A file next to the model, already checked to stay inside the model's folder.
    External {
        path: PathBuf,
        offset: u64,
        length: Option<u64>,
        present: bool,
    },
    /// No payload at all (an empty tensor, or a malformed one reported elsewhere).
    Empty,
}

/// A tensor stored in the model: initializer or attribute tensor.
#[derive(Clone, Debug, PartialEq)]
pub struct TensorData {
    pub dtype: Option<DType>,
    pub dims: Vec<u64>,
    pub storage: Storage,
}

impl TensorData {
    pub fn element_count(&self) -> Option<u64> {
        self.dims.iter().try_fold(1u64, |acc, &d| acc.checked_mul(d))
    }

    /// Bytes the tensor occupies in memory (sub-byte types packed), if its type is known.
    pub fn bytes(&self) -> Option<u64> {
        self.dtype?.bytes_for(self.element_count()?)
    }
}

/// The contents of a small constant tensor, as far as the analysis needs them.
#[derive(Clone, Debug, PartialEq)]
pub enum ConstData {
    Int(Vec<i64>),
    Float(Vec<f64>),
    /// A shape value known in part (the output of `Shape` on a symbolic shape).
    Dims(Vec<Dim>),
}

#[derive(Clone, Debug, PartialEq)]
pub struct ConstValue {
    pub dims: Vec<u64>,
    pub data: ConstData,
}

impl ConstValue {
    pub fn ints(dims: Vec<u64>, v: Vec<i64>) -> ConstValue {
        ConstValue {
            dims,
            data: ConstData::Int(v),
        }
    }

    pub fn floats(dims: Vec<u64>, v: Vec<f64>) -> ConstValue {
        ConstValue {
            dims,
            data: ConstData::Float(v),
        }
    }

    pub fn len(&self) -> usize {
        match &self.data {
            ConstData::Int(v) => v.len(),
            ConstData::Float(v) => v.len(),
            ConstData::Dims(v) => v.len(),
        }
    }

    /// The values as integers, if every one is known (floats truncated, as Cast does).
    pub fn try_ints(&self) -> Option<Vec<i64>> {
        match &self.data {
            ConstData::Int(v) => Some(v.clone()),
            ConstData::Float(v) => Some(v.iter().map(|x| *x as i64).collect()),
            ConstData::Dims(v) => v
                .iter()
                .map(|d| d.known().and_then(|x| i64::try_from(x).ok()))
                .collect(),
        }
    }

    /// The values as dims (known or symbolic); negative integers become unknown dims.
    pub fn as_dims(&self) -> Vec<Dim> {
        match &self.data {
            ConstData::Dims(v) => v.clone(),
            _ => self
                .as_ints()
                .into_iter()
                .map(|x| if x >= 0 { Dim::Known(x as u64) } else { Dim::Unknown })
                .collect(),
        }
    }

    /// Picks elements by flat index, whatever the element kind.
    pub fn pick(&self, dims: Vec<u64>, idx: &[usize]) -> ConstValue {
        let data = match &self.data {
            ConstData::Int(v) => ConstData::Int(idx.iter().map(|&i| v[i]).collect()),
            ConstData::Float(v) => ConstData::Float(idx.iter().map(|&i| v[i]).collect()),
            ConstData::Dims(v) => ConstData::Dims(idx.iter().map(|&i| v[i].clone()).collect()),
        };
        ConstValue { dims, data }
    }

    pub fn is_empty(&self) -> bool {
        self.len() == 0
    }

    /// The values as integers; unknown dims of a shape value become -1.
    pub fn as_ints(&self) -> Vec<i64> {
        match &self.data {
            ConstData::Int(v) => v.clone(),
            ConstData::Float(v) => v.iter().map(|x| *x as i64).collect(),
            ConstData::Dims(v) => v.iter().map(|d| d.known().map(|x| x as i64).unwrap_or(-1)).collect(),
        }
    }

    pub fn as_floats(&self) -> Vec<f64> {
        match &self.data {
            ConstData::Int(v) => v.iter().map(|x| *x as f64).collect(),
            ConstData::Float(v) => v.clone(),
            ConstData::Dims(v) => v
                .iter()
                .map(|d| d.known().map(|x| x as f64).unwrap_or(f64::NAN))
                .collect(),
        }
    }

    /// True if every element is a known number.
    pub fn is_numeric(&self) -> bool {
        self.try_ints().is_some() || matches!(self.data, ConstData::Float(_))
    }
}

/// A whole tensor in host memory, little-endian and densely packed: an input read from a
/// `.npy` or `.pb` file for `verify`.
#[derive(Clone, Debug, PartialEq)]
pub struct HostTensor {
    pub dtype: DType,
    pub dims: Vec<u64>,
    pub bytes: Vec<u8>,
}

impl HostTensor {
    /// Checks that the payload has exactly the bytes its type and shape need.
    pub fn consistent(&self) -> Result<(), String> {
        let n = self
            .dims
            .iter()
            .try_fold(1u64, |a, &d| a.checked_mul(d))
            .ok_or("the shape's element count overflows")?;
        let want = self
            .dtype
            .bytes_for(n)
            .ok_or_else(|| format!("{} tensors are not supported here", self.dtype.name()))?;
        if want != self.bytes.len() as u64 {
            return Err(format!(
                "{} elements of {} need {want} bytes, the file has {}",
                n,
                self.dtype.name(),
                self.bytes.len()
            ));
        }
        Ok(())
    }
}

/// The nodes reading a value, in import order.
pub type Consumers = smallvec::SmallVec<[NodeId; 4]>;

/// A value (tensor) of a graph.
#[derive(Clone, Debug)]
pub struct Value {
    pub name: Text,
    pub kind: ValueKind,
    pub fact: Fact,
    /// The fact the file declared (graph input/output or value_info), kept for cross-checks.
    /// Boxed, like the two below: most values have none, and a large graph has many values.
    pub declared: Option<Box<Fact>>,
    pub producer: Option<NodeId>,
    /// Inline up to four readers, the same 24 bytes as a `Vec`: most tensors have one or two,
    /// and a large graph paid one allocation per tensor for them.
    pub consumers: Consumers,
    pub data: Option<Box<TensorData>>,
    pub konst: Option<Box<ConstValue>>,
}

impl Value {
    /// A value with nothing known of it beyond its kind and fact: no producer, no readers yet.
    pub fn new(name: impl Into<Text>, kind: ValueKind, fact: Fact) -> Value {
        Value {
            name: name.into(),
            kind,
            fact,
            declared: None,
            producer: None,
            consumers: Default::default(),
            data: None,
            konst: None,
        }
    }
}

/// An attribute value. Tensors and graphs are owned here; graphs are analyzed as bodies.
#[derive(Clone, Debug, PartialEq)]
pub enum AttrValue {
    Float(f32),
    Int(i64),
    String(String),
    Tensor(Box<TensorData>),
    /// Index into the node's `bodies`.
    Graph(usize),
    Floats(Vec<f32>),
    Ints(Vec<i64>),
    Strings(Vec<String>),
    Tensors(Vec<TensorData>),
    Graphs(Vec<usize>),
    /// A type, sparse tensor or anything else tilecut does not interpret.
    Other,
}

#[derive(Clone, Debug)]
pub struct Attr {
    /// Shared: a graph repeats a few attribute names (`axis`, `perm`) on every node.
    pub name: Name,
    pub value: AttrValue,
}

/// A subgraph carried by a node (If branches, Loop and Scan bodies).
#[derive(Clone, Debug)]
pub struct Body {
    pub attr: String,
    pub graph: Graph,
}

/// Cost figures of one node; `None` where a figure depends on an unknown dim.
#[derive(Clone, Debug, Default, PartialEq)]
pub struct NodeCost {
    /// Multiply-accumulates (conventions in `ops`).
    pub macs: Option<u64>,
    /// Element-wise and other non-MAC arithmetic operations.
    pub ops: Option<u64>,
    /// Symbols whose values would make the unknown figures known. Inline up to two: on a
    /// graph with a symbolic batch every node has one, and a heap list each was measurable.
    pub needs_dims: NameList,
}

#[derive(Clone, Debug)]
pub struct Node {
    pub name: Text,
    /// True when the file left the node unnamed and `name` was generated.
    pub generated_name: bool,
    /// Shared with every other node of the same op (see `Name`).
    pub op_type: Name,
    pub domain: Name,
    /// One slot per declared input; `None` for an omitted optional input ("").
    pub inputs: Slots,
    pub outputs: Slots,
    pub attrs: Box<[Attr]>,
    /// Subgraphs, captures and the function call: few nodes have any, and inline they were
    /// 40 of a node's 200 bytes (see `bodies`, `captures`, `from_function`).
    pub extra: Option<Box<NodeExtra>>,
    /// Index of the file's node this one comes from (the call node, for expanded functions).
    pub source_index: u32,
    /// Set when every input is constant and the node was folded (weight-like).
    pub folded: bool,
}

/// The parts of a node that few nodes have.
#[derive(Clone, Debug, Default)]
pub struct NodeExtra {
    pub bodies: Box<[Body]>,
    /// Outer-scope values the bodies read: edges like any other input.
    pub captures: Box<[ValueId]>,
    /// The model-local function call this node was expanded from, if any.
    pub from_function: Option<Name>,
}

impl Node {
    /// Subgraphs the node carries (If branches, Loop and Scan bodies).
    pub fn bodies(&self) -> &[Body] {
        self.extra.as_deref().map_or(&[], |e| &e.bodies)
    }

    /// Outer-scope values the bodies read.
    pub fn captures(&self) -> &[ValueId] {
        self.extra.as_deref().map_or(&[], |e| &e.captures)
    }

    /// The model-local function call this node was expanded from, if any.
    pub fn from_function(&self) -> Option<&Name> {
        self.extra.as_deref().and_then(|e| e.from_function.as_ref())
    }

    pub fn attr(&self, name: &str) -> Option<&AttrValue> {
        self.attrs.iter().find(|a| a.name == name).map(|a| &a.value)
    }

    pub fn is_default_domain(&self) -> bool {
        is_default_domain(&self.domain)
    }

    /// The op type, qualified by its domain outside the standard one (`Conv`,
    /// `my.domain.MyOp`): how reports and blockers name it.
    pub fn op_label(&self) -> String {
        op_label(&self.domain, &self.op_type)
    }

    /// Values read by this node, bodies' captures included, in slot order, deduplicated.
    pub fn all_inputs(&self) -> Inputs {
        let mut out = Inputs::new();
        let all = self.inputs.iter().flatten().chain(self.captures());
        if self.inputs.len() + self.captures().len() <= 16 {
            for v in all {
                if !out.contains(v) {
                    out.push(*v);
                }
            }
        } else {
            // A set for wide nodes (a Sum or a body over thousands of values): a scan of the
            // list per value would be quadratic.
            let mut seen = std::collections::HashSet::new();
            out.extend(all.copied().filter(|v| seen.insert(*v)));
        }
        out
    }
}

/// A node's input or output slots: inline up to four (as small as a `Vec`), so that building
/// a large graph allocates nothing for them on most nodes.
pub type Slots = smallvec::SmallVec<[Option<ValueId>; 4]>;

/// A node's input values: inline up to four (most nodes read one to three), so that asking
/// for them allocates nothing.
pub type Inputs = smallvec::SmallVec<[ValueId; 4]>;

/// A short list of names, inline up to two (as small as a `Vec`).
pub type NameList = smallvec::SmallVec<[Name; 2]>;

/// Whether a dim name is one tilecut gives a data-dependent size (`what@node`; a Loop's trip
/// count `trips@node` is set with `--loop-trips` instead).
pub fn is_data_dependent(name: &str) -> bool {
    name.split_once('@').is_some_and(|(what, _)| what != "trips")
}

/// Domains tilecut treats as the standard one: empty, or its full name.
pub fn is_default_domain(domain: &str) -> bool {
    domain.is_empty() || domain == "ai.onnx"
}

/// The contrib operator domain, as model files name it: runtimes' optimisers and quantizers
/// write fused and operator-form quantized ops there. Written once, here; reports and
/// profiles call it `contrib`.
pub const CONTRIB_DOMAIN: &str = "com.microsoft";

/// An op type qualified by its domain outside the standard one (see `Node::op_label`). The
/// contrib domain is `contrib`, as profiles and `--assume-supported` may write it.
pub fn op_label(domain: &str, op_type: &str) -> String {
    if is_default_domain(domain) {
        op_type.to_string()
    } else if domain == CONTRIB_DOMAIN {
        format!("contrib.{op_type}")
    } else {
        format!("{domain}.{op_type}")
    }
}

/// A graph: nodes in a topological order, values, and the graph's interface.
#[derive(Clone, Debug, Default)]
pub struct Graph {
    pub name: String,
    pub nodes: Vec<Node>,
    pub values: Vec<Value>,
    pub inputs: Vec<ValueId>,
    pub outputs: Vec<ValueId>,
    /// Placeholders for outer-scope values a subgraph reads (their facts come from outside).
    pub captured: Vec<ValueId>,
    /// Each node's cost figures, by node index, once inference has run (see `cost`). Kept
    /// beside the nodes rather than in them: import builds the nodes at its memory peak, and
    /// inference fills this from memory import has freed again (5.6 MB on a 100k-node graph,
    /// which a fresh process would otherwise have to be given and cleared by the kernel).
    pub costs: Vec<NodeCost>,
}

/// The cost of a node not inferred: nothing known.
static NO_COST: std::sync::OnceLock<NodeCost> = std::sync::OnceLock::new();

impl Graph {
    /// A node's cost figures; unknown for a graph not yet inferred.
    pub fn cost(&self, id: NodeId) -> &NodeCost {
        self.costs
            .get(id.index())
            .unwrap_or_else(|| NO_COST.get_or_init(NodeCost::default))
    }

    pub fn node(&self, id: NodeId) -> &Node {
        &self.nodes[id.index()]
    }

    pub fn value(&self, id: ValueId) -> &Value {
        &self.values[id.index()]
    }

    pub fn value_by_name(&self, name: &str) -> Option<ValueId> {
        self.values.iter().position(|v| v.name == name).map(ValueId::new)
    }

    pub fn node_ids(&self) -> impl Iterator<Item = NodeId> {
        (0..self.nodes.len()).map(NodeId::new)
    }

    /// The graph as a petgraph DAG over node ids, one edge per (producer, consumer, value).
    pub fn to_petgraph(&self) -> petgraph::graph::DiGraph<NodeId, ValueId> {
        let mut g = petgraph::graph::DiGraph::with_capacity(self.nodes.len(), self.values.len());
        let idx: Vec<_> = self.node_ids().map(|n| g.add_node(n)).collect();
        for (i, node) in self.nodes.iter().enumerate() {
            for v in node.all_inputs() {
                if let Some(p) = self.value(v).producer {
                    g.add_edge(idx[p.index()], idx[i], v);
                }
            }
        }
        g
    }
}

/// A whole model: metadata plus the main graph.
#[derive(Clone, Debug)]
pub struct Model {
    pub path: PathBuf,
    pub ir_version: i64,
    pub producer: String,
    /// domain ("" for the default) → opset version.
    pub opsets: BTreeMap<String, i64>,
    pub graph: Graph,
    pub functions: Vec<String>,
    /// Trip counts given by the user for Loop nodes, by node name.
    pub loop_trips: BTreeMap<String, u64>,
    /// Sizes the user assumed for data-dependent dims (`--dim what@node=N`: how many boxes a
    /// NonMaxSuppression keeps, …), by the name tilecut gives such a dim.
    pub assumed_sizes: BTreeMap<String, u64>,
    /// Main-graph inputs whose values the file does not give and on which unknown sizes or
    /// an If's branch depend (`--value` sets them), sorted; filled by inference.
    pub needs_values: Vec<String>,
}

impl Model {
    /// The opset of the default domain (`ai.onnx`).
    pub fn default_opset(&self) -> i64 {
        opset_of(&self.opsets, "")
    }
}

/// The version imported for `domain`, treating "" and "ai.onnx" as one; 0 when not imported.
pub fn opset_of(opsets: &BTreeMap<String, i64>, domain: &str) -> i64 {
    let d = if domain == "ai.onnx" { "" } else { domain };
    opsets
        .get(d)
        .or_else(|| if d.is_empty() { opsets.get("ai.onnx") } else { None })
        .copied()
        .unwrap_or(0)
}

#[cfg(test)]
mod tests {
    use super::*;

    /// A large graph holds one node and about one value per operator, and a fresh process
    /// pays for every page it touches: these sizes are the import's memory (measured:
    /// each 16 bytes off both records is about 400 page faults on a 100k-node graph).
    #[test]
    fn graph_records_stay_compact() {
        assert_eq!(std::mem::size_of::<Text>(), 16);
        assert_eq!(std::mem::size_of::<Shape>(), 16);
        assert_eq!(std::mem::size_of::<Fact>(), 40);
        assert_eq!(std::mem::size_of::<Option<NodeId>>(), 4);
        assert!(std::mem::size_of::<Node>() <= 112);
        assert!(std::mem::size_of::<Value>() <= 112);
    }

    #[test]
    fn node_ids_round_trip_their_index() {
        for i in [0usize, 1, 99_999, u32::MAX as usize - 1] {
            assert_eq!(NodeId::new(i).index(), i);
        }
        assert!(NodeId::new(3) < NodeId::new(4));
        assert_eq!(format!("{:?}", NodeId::new(7)), "NodeId(7)");
    }
}
