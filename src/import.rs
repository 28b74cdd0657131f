//! From the wire format to the IR: values and nodes wired by name, model-local functions
//! expanded, subgraphs imported as node bodies, nodes sorted topologically.

use std::collections::{BTreeMap, BTreeSet, BinaryHeap, HashMap};
use std::path::{Path, PathBuf};

use crate::diag::{codes, Diagnostic};
use crate::error::{ReadError, SettingError};
use crate::fastmap::{short_text_eq, FastSet, TextKey};
use crate::ir::{
    Attr, AttrValue, Body, ConstValue, DType, Dim, Fact, Graph, Model, Name, Node, NodeExtra, NodeId, Shape, Storage,
    TensorData, Text, Value, ValueId, ValueKind, ValueType,
};
use crate::onnx::load::{resolve_external, LoadedModel};
use crate::onnx::node::{WireNode, WireView};
use crate::onnx::{self, ProtoStr, TensorProto};

/// Subgraphs (If/Loop/Scan bodies) nested deeper than this are refused instead of recursed
/// into. Real models nest two or three levels; the bound keeps hostile files from exhausting
/// the stack.
pub const MAX_SUBGRAPH_DEPTH: usize = 16;
/// Model-local functions calling functions deeper than this are refused (and recursion is).
pub const MAX_FUNCTION_DEPTH: usize = 8;
/// Nodes that expanding model-local function calls may produce in one model. Calls nest (a
/// function calling another many times, and so on), so a file of a few kilobytes can describe
/// billions of nodes: the expansion's size is counted from the functions before any call is
/// expanded, and a model over this bound is refused.
pub const MAX_FUNCTION_NODES: u64 = 1 << 20;

/// Shape settings given by the user: `--dim NAME=VALUE` and `--input NAME=AxBxC`.
#[derive(Clone, Debug, Default)]
pub struct Overrides {
    pub dims: BTreeMap<String, u64>,
    pub inputs: BTreeMap<String, Vec<Dim>>,
    /// `--loop-trips NODE=N`: trip counts for Loop nodes whose count is not a constant.
    pub loop_trips: BTreeMap<String, u64>,
    /// `--value NAME=V[,V…]`: the value of a small numeric input (a sample rate, a flag), so
    /// that what branches on it resolves; kept as text until the input's type is known.
    pub values: BTreeMap<String, Vec<String>>,
}

impl Overrides {
    /// These settings without the sizes assumed for data-dependent dims, if any was given:
    /// what a split piece declares must hold for every inference, and such a count changes
    /// from one inference to the next.
    pub fn without_assumed_sizes(&self) -> Option<Overrides> {
        if !self.dims.keys().any(|k| crate::ir::is_data_dependent(k)) {
            return None;
        }
        let mut open = self.clone();
        open.dims.retain(|k, _| !crate::ir::is_data_dependent(k));
        Some(open)
    }

    /// Parses `NAME=VALUE` (a non-negative integer).
    pub fn add_dim(&mut self, text: &str) -> Result<(), SettingError> {
        let (name, value) = text
            .split_once('=')
            .ok_or_else(|| SettingError(format!("--dim `{text}`: expected NAME=VALUE")))?;
        let v: u64 = value
            .trim()
            .parse()
            .map_err(|_| SettingError(format!("--dim `{text}`: `{value}` is not a non-negative integer")))?;
        within_int64("--dim", text, v)?;
        let name = name.trim();
        if name.is_empty() {
            return Err(SettingError(format!("--dim `{text}`: empty name")));
        }
        // The name the file's spelling `a + 1` takes in tilecut (see `Dim::param`).
        let name = crate::ir::compact_expression(name).unwrap_or_else(|| name.to_string());
        set_once(&mut self.dims, "--dim", name, v)
    }

    /// Parses `NAME=V[,V…]` for `--value`: numbers, one per element, in row-major order.
    pub fn add_value(&mut self, text: &str) -> Result<(), SettingError> {
        let (name, list) = text
            .split_once('=')
            .ok_or_else(|| SettingError(format!("--value `{text}`: expected NAME=V or NAME=V,V,…")))?;
        let name = name.trim();
        if name.is_empty() {
            return Err(SettingError(format!("--value `{text}`: empty name")));
        }
        let parts: Vec<String> = list.split(',').map(|p| p.trim().to_string()).collect();
        for p in &parts {
            if !p.parse::<f64>().is_ok_and(f64::is_finite) {
                return Err(SettingError(format!("--value `{text}`: `{p}` is not a number")));
            }
        }
        set_once(&mut self.values, "--value", name.to_string(), parts)
    }

    /// Parses `NODE=N` for `--loop-trips`.
    pub fn add_loop_trips(&mut self, text: &str) -> Result<(), SettingError> {
        let (name, value) = text
            .split_once('=')
            .ok_or_else(|| SettingError(format!("--loop-trips `{text}`: expected NODE=N")))?;
        let v: u64 = value.trim().parse().map_err(|_| {
            SettingError(format!(
                "--loop-trips `{text}`: `{value}` is not a non-negative integer"
            ))
        })?;
        within_int64("--loop-trips", text, v)?;
        set_once(&mut self.loop_trips, "--loop-trips", name.trim().to_string(), v)
    }

    /// Parses `NAME=1x3x224x224`; a part may also be a symbol name; `NAME=` is a scalar.
    pub fn add_input(&mut self, text: &str) -> Result<(), SettingError> {
        let (name, shape) = text
            .split_once('=')
            .ok_or_else(|| SettingError(format!("--input `{text}`: expected NAME=AxBxC")))?;
        if name.is_empty() {
            return Err(SettingError(format!("--input `{text}`: empty name")));
        }
        let mut dims = Vec::new();
        for part in shape.split(['x', 'X', ',']).filter(|p| !p.is_empty()) {
            let part = part.trim();
            if let Ok(v) = part.parse::<u64>() {
                within_int64("--input", text, v)?;
                dims.push(Dim::Known(v));
            } else if part.starts_with('-') || part.chars().next().is_some_and(|c| c.is_ascii_digit()) {
                return Err(SettingError(format!(
                    "--input `{text}`: dim `{part}` is not a non-negative integer or a name"
                )));
            } else {
                dims.push(Dim::sym(part));
            }
        }
        set_once(&mut self.inputs, "--input", name.to_string(), dims)
    }
}

/// ONNX states dims and trip counts as int64 (`TensorShapeProto`, Loop's `M`): a size
/// past that is no model's, and tilecut's arithmetic on sizes assumes they fit.
fn within_int64(option: &str, text: &str, v: u64) -> Result<(), SettingError> {
    if i64::try_from(v).is_err() {
        return Err(SettingError(format!(
            "{option} `{text}`: {v} is beyond int64, the largest size ONNX can state"
        )));
    }
    Ok(())
}

/// Records one setting; the same name given again with another value is an error, since
/// either choice would silently drop what the user wrote.
fn set_once<V: PartialEq>(
    map: &mut BTreeMap<String, V>,
    flag: &str,
    name: String,
    value: V,
) -> Result<(), SettingError> {
    match map.get(&name) {
        Some(old) if *old != value => Err(SettingError(format!(
            "{flag} {name}: given twice with different values"
        ))),
        _ => {
            map.insert(name, value);
            Ok(())
        }
    }
}

/// Imports a decoded model. Structural faults are errors; what is merely unknown or odd
/// becomes a diagnostic.
pub fn import(loaded: &LoadedModel, overrides: &Overrides) -> Result<(Model, Vec<Diagnostic>), ReadError> {
    let proto = &loaded.proto;
    let mut opsets = BTreeMap::new();
    for o in &proto.opset_import {
        let d = if o.domain == "ai.onnx" {
            String::new()
        } else {
            o.domain.clone()
        };
        opsets.insert(d, o.version);
    }
    let mut cx = Cx::new(loaded, overrides);
    if opsets.is_empty() {
        // IR version 1/2 models predate opset_import; the spec says to assume opset 1.
        opsets.insert(String::new(), 1);
        cx.diags.push(Diagnostic::new(
            codes::OPSET_MISSING,
            "the model imports no opset; assuming default-domain opset 1 (ONNX IR spec)",
        ));
    }
    let graph_proto = proto
        .graph
        .as_ref()
        .ok_or_else(|| ReadError::invalid(&loaded.path, "no graph"))?;
    let (graph, free) = import_graph(&mut cx, graph_proto, 0)?;
    if let Some((name, reader)) = free.first() {
        return Err(ReadError::invalid(
            &loaded.path,
            format!("node `{reader}` reads tensor `{name}`, which no node, input or initializer defines"),
        ));
    }
    for name in overrides.inputs.keys() {
        if !cx.used_inputs.contains(name) {
            return Err(ReadError::invalid(
                &loaded.path,
                format!("--input names `{name}`, which is not an input of the model"),
            ));
        }
    }
    for name in overrides.values.keys() {
        if !cx.used_values.contains(name) {
            return Err(ReadError::invalid(
                &loaded.path,
                format!("--value names `{name}`, which is not an input of the model"),
            ));
        }
    }
    // A data-dependent size (`what@node`) is met during inference, which says if it is unused.
    let assumed_sizes: BTreeMap<String, u64> = overrides
        .dims
        .iter()
        .filter(|(k, _)| crate::ir::is_data_dependent(k))
        .map(|(k, &v)| (k.clone(), v))
        .collect();
    for name in overrides.dims.keys() {
        if !cx.used_dims.contains(name) && !assumed_sizes.contains_key(name) {
            cx.diags.push(Diagnostic::new(
                codes::OVERRIDE_UNUSED,
                format!("--dim {name}: no input declares a dim of that name"),
            ));
        }
    }
    fn loop_names(g: &Graph, out: &mut BTreeSet<String>) {
        for n in &g.nodes {
            if n.op_type == "Loop" {
                out.insert(n.name.to_string());
            }
            for b in n.bodies() {
                loop_names(&b.graph, out);
            }
        }
    }
    let mut loops = BTreeSet::new();
    // Only `--loop-trips` needs them: a large graph is not walked again for nothing.
    if !overrides.loop_trips.is_empty() {
        loop_names(&graph, &mut loops);
    }
    for name in overrides.loop_trips.keys() {
        if !loops.contains(name) {
            return Err(ReadError::invalid(
                &loaded.path,
                format!("--loop-trips names `{name}`, which is not a Loop node of the model"),
            ));
        }
    }
    let mut functions: Vec<String> = proto
        .functions
        .iter()
        .map(|f| crate::ir::op_label(&f.domain, &f.name))
        .collect();
    functions.sort();
    let model = Model {
        path: loaded.path.clone(),
        ir_version: proto.ir_version,
        producer: format!("{} {}", proto.producer_name, proto.producer_version)
            .trim()
            .to_string(),
        opsets,
        graph,
        functions,
        loop_trips: overrides.loop_trips.clone(),
        assumed_sizes,
        needs_values: Vec::new(),
    };
    Ok((model, cx.diags))
}

/// The main graph's nodes with model-local function calls expanded, as wire-format nodes named
/// the way the IR names them (`call/inner`): what `split` writes when a cut falls inside a call.
pub fn expanded_main_nodes(loaded: &LoadedModel) -> Result<Vec<onnx::NodeProto>, ReadError> {
    let proto = &loaded.proto;
    let overrides = Overrides::default();
    let mut cx = Cx::new(loaded, &overrides);
    let g = proto
        .graph
        .as_ref()
        .ok_or_else(|| ReadError::invalid(&loaded.path, "no graph"))?;
    expand_functions(&mut cx, graph_nodes(g), 0, "")?
        .into_iter()
        .filter(|f| f.from_function.is_some())
        .map(|f| f.proto.into_owned(&loaded.path))
        .collect()
}

struct Cx<'a> {
    path: &'a Path,
    dir: &'a Path,
    functions: HashMap<(&'a str, &'a str), &'a onnx::FunctionProto>,
    overrides: &'a Overrides,
    diags: Vec<Diagnostic>,
    used_dims: BTreeSet<String>,
    used_inputs: BTreeSet<String>,
    used_values: BTreeSet<String>,
    /// One shared copy of each op type, domain and attribute name, for every graph of the model.
    names: Interner,
    texts: Texts,
    /// Nodes the function calls met so far expand to, and each function's own count (`None`
    /// while it is being counted: a function reached again then is recursion, which the
    /// expansion refuses by depth).
    function_nodes: u64,
    function_sizes: HashMap<(&'a str, &'a str), Option<u64>>,
}

/// Makes the IR's node and value names (`ir::Text`): borrowed where the text lies in a file
/// mapped for the process, copied otherwise.
#[derive(Clone, Copy)]
struct Texts(Option<&'static [u8]>);

impl Texts {
    fn text(self, s: &str) -> Text {
        if let Some(file) = self.0 {
            // Whether `s` lies within the file: then the same bytes, re-borrowed from the
            // lasting map, are the name.
            let at = (s.as_ptr() as usize).wrapping_sub(file.as_ptr() as usize);
            if let Some(bytes) = at.checked_add(s.len()).and_then(|end| file.get(at..end)) {
                // SAFETY: `bytes` is `s` itself (the same address and length), only borrowed
                // for longer from the map that holds it, which lives as long as the process:
                // UTF-8 as `s` is. Checked again, it was 3% of reading a 100k-node graph.
                debug_assert_eq!(bytes.as_ptr(), s.as_ptr());
                return Text::borrowed(unsafe { std::str::from_utf8_unchecked(bytes) });
            }
        }
        Text::from(s)
    }
}

/// Hands out one shared `Name` per distinct text. A model has a few dozen distinct op types,
/// domains and attribute names, met once per node: a small table indexed by the text's length
/// and end bytes answers nearly every lookup with one comparison, then a hash set for the
/// rest. (A list scanned most recently used first took 87 instructions a lookup on a 100k
/// node graph, on the import's critical path.)
struct Interner {
    slots: [Option<Name>; Interner::SLOTS],
    rest: FastSet<Name>,
}

impl Default for Interner {
    fn default() -> Self {
        Interner {
            slots: std::array::from_fn(|_| None),
            rest: FastSet::default(),
        }
    }
}

impl Interner {
    const SLOTS: usize = 64;

    fn slot(s: &str) -> usize {
        let b = s.as_bytes();
        let (first, last) = (b.first().copied().unwrap_or(0), b.last().copied().unwrap_or(0));
        (b.len().wrapping_mul(31) ^ usize::from(first).wrapping_mul(7) ^ usize::from(last)) % Self::SLOTS
    }

    fn get(&mut self, s: &str) -> Name {
        let slot = Self::slot(s);
        if let Some(n) = &self.slots[slot] {
            if short_text_eq(n, s) {
                return n.clone();
            }
        }
        let n = match self.rest.get(s) {
            Some(n) => n.clone(),
            None => {
                let n = Name::from(s);
                self.rest.insert(n.clone());
                n
            }
        };
        self.slots[slot] = Some(n.clone());
        n
    }
}

impl<'a> Cx<'a> {
    fn new(loaded: &'a LoadedModel, overrides: &'a Overrides) -> Cx<'a> {
        Cx {
            path: &loaded.path,
            dir: &loaded.dir,
            functions: loaded
                .proto
                .functions
                .iter()
                .map(|f| ((f.domain.as_str(), f.name.as_str()), f))
                .collect(),
            overrides,
            diags: Vec::new(),
            used_dims: BTreeSet::new(),
            used_inputs: BTreeSet::new(),
            used_values: BTreeSet::new(),
            names: Interner::default(),
            texts: Texts(loaded.lasting),
            function_nodes: 0,
            function_sizes: HashMap::new(),
        }
    }

    /// Nodes a call of the function `f` expands to, nested calls included (saturating).
    /// Functions nested deeper than `MAX_FUNCTION_DEPTH`, and recursion, count nothing here:
    /// the expansion refuses them with its own message.
    fn function_size(&mut self, f: &'a onnx::FunctionProto, depth: usize) -> u64 {
        let key = (f.domain.as_str(), f.name.as_str());
        match self.function_sizes.get(&key) {
            Some(Some(n)) => return *n,
            Some(None) => return 0,
            None => {}
        }
        if depth >= MAX_FUNCTION_DEPTH {
            return 0;
        }
        self.function_sizes.insert(key, None);
        let mut n = 0u64;
        for inner in &f.node {
            let add = match self.functions.get(&(inner.domain.as_str(), inner.op_type.as_str())) {
                Some(&callee) => self.function_size(callee, depth + 1),
                None => 1,
            };
            n = n.saturating_add(add);
        }
        self.function_sizes.insert(key, Some(n));
        n
    }

    fn err(&self, msg: impl Into<String>) -> ReadError {
        ReadError::invalid(self.path, msg)
    }
}

/// A node after function expansion, still in wire form (borrowed unless a function call
/// rewrote it).
struct FlatNode<'a> {
    proto: NodeRef<'a>,
    from_function: Option<Name>,
    /// Index of the node in the graph's own node list (the call node, for expanded nodes).
    source: usize,
}

/// A graph's nodes with function calls expanded, by index. A model without local functions
/// (most) is read in place: a list of 40 bytes a node was 4 MB of fresh memory on a 100k-node
/// graph, filled before anything else could start (about 2 ms of its import).
enum Flat<'a> {
    /// The graph's own nodes: those kept in wire form first, then the decoded ones (as
    /// `graph_nodes` lists them).
    InPlace {
        run: &'a onnx::node::NodeRun,
        decoded: &'a [onnx::NodeProto],
    },
    Expanded(Vec<FlatNode<'a>>),
}

/// One node of a `Flat`, borrowed from it.
#[derive(Clone, Copy)]
struct FlatRef<'f> {
    form: Form<'f>,
    from_function: Option<&'f Name>,
    source: usize,
}

impl<'a> Flat<'a> {
    fn of_graph(cx: &mut Cx, g: &'a onnx::GraphProto) -> Result<Flat<'a>, ReadError> {
        if cx.functions.is_empty() {
            Ok(Flat::InPlace {
                run: wire_run(g),
                decoded: &g.node,
            })
        } else {
            Ok(Flat::Expanded(expand_functions(cx, graph_nodes(g), 0, "")?))
        }
    }

    fn len(&self) -> usize {
        match self {
            Flat::InPlace { run, decoded } => run.len() + decoded.len(),
            Flat::Expanded(v) => v.len(),
        }
    }

    /// The node at `i`, an index below `len()`.
    fn get(&self, i: usize) -> FlatRef<'_> {
        match self {
            Flat::InPlace { run, decoded } => FlatRef {
                form: match i.checked_sub(run.len()) {
                    None => Form::Wire(run.node(i)),
                    Some(k) => Form::Decoded(&decoded[k]),
                },
                from_function: None,
                source: i,
            },
            Flat::Expanded(v) => {
                let n = &v[i];
                FlatRef {
                    form: n.proto.form(),
                    from_function: n.from_function.as_ref(),
                    source: n.source,
                }
            }
        }
    }

    fn iter(&self) -> impl Iterator<Item = FlatRef<'_>> + '_ {
        (0..self.len()).map(|i| self.get(i))
    }
}

/// A wire-format node: borrowed from the file decoded, owned when a function call rewrote it,
/// or still in wire form (a model read for import only). Not a `Cow`: that is as large as a
/// whole `NodeProto` (216 bytes) even when borrowed, and a 100k-node graph holds one per node.
enum NodeRef<'a> {
    Borrowed(&'a onnx::NodeProto),
    Owned(Box<onnx::NodeProto>),
    Wire(WireNode<'a>),
}

/// A node's input or output names, whichever form the node is in.
enum NodeStrings<'s> {
    Decoded(std::slice::Iter<'s, ProtoStr>),
    Wire(onnx::node::Strings<'s>),
}

impl<'s> Iterator for NodeStrings<'s> {
    type Item = &'s str;

    fn next(&mut self) -> Option<&'s str> {
        match self {
            NodeStrings::Decoded(it) => it.next().map(|s| s.as_str()),
            NodeStrings::Wire(it) => it.next(),
        }
    }
}

/// The two forms a `NodeRef` reads in: decoded (borrowed or owned alike), or wire.
#[derive(Clone, Copy)]
enum Form<'s> {
    Decoded(&'s onnx::NodeProto),
    Wire(WireNode<'s>),
}

impl<'s> Form<'s> {
    fn name(self) -> &'s str {
        match self {
            Form::Decoded(n) => n.name.as_str(),
            Form::Wire(w) => w.name(),
        }
    }

    fn op_type(self) -> &'s str {
        match self {
            Form::Decoded(n) => n.op_type.as_str(),
            Form::Wire(w) => w.op_type(),
        }
    }

    fn domain(self) -> &'s str {
        match self {
            Form::Decoded(n) => n.domain.as_str(),
            Form::Wire(w) => w.domain(),
        }
    }

    fn outputs(self) -> NodeStrings<'s> {
        match self {
            Form::Decoded(n) => NodeStrings::Decoded(n.output.iter()),
            Form::Wire(w) => NodeStrings::Wire(w.outputs()),
        }
    }

    /// The fields the import passes read. A node in wire form is scanned once, into `buf`,
    /// which the pass keeps from node to node.
    fn view<'v>(self, buf: &'v mut WireView<'s>) -> NodeView<'s, 'v> {
        match self {
            Form::Decoded(n) => NodeView::Decoded(n),
            Form::Wire(w) => {
                w.view_into(buf);
                NodeView::Wire(buf)
            }
        }
    }
}

impl NodeRef<'_> {
    fn form(&self) -> Form<'_> {
        match self {
            NodeRef::Borrowed(n) => Form::Decoded(n),
            NodeRef::Owned(n) => Form::Decoded(n),
            NodeRef::Wire(w) => Form::Wire(*w),
        }
    }

    fn op_type(&self) -> &str {
        self.form().op_type()
    }

    fn domain(&self) -> &str {
        self.form().domain()
    }

    fn into_owned(self, path: &Path) -> Result<onnx::NodeProto, ReadError> {
        match self {
            NodeRef::Borrowed(n) => Ok(n.clone()),
            NodeRef::Owned(n) => Ok(*n),
            NodeRef::Wire(w) => w.decode().map_err(|e| wire_error(path, e)),
        }
    }
}

/// A node's fields as the import passes read them.
enum NodeView<'s, 'v> {
    Decoded(&'s onnx::NodeProto),
    Wire(&'v WireView<'s>),
}

impl<'s> NodeView<'s, '_> {
    fn name(&self) -> &'s str {
        match self {
            NodeView::Decoded(n) => n.name.as_str(),
            NodeView::Wire(w) => w.name,
        }
    }

    fn op_type(&self) -> &'s str {
        match self {
            NodeView::Decoded(n) => n.op_type.as_str(),
            NodeView::Wire(w) => w.op_type,
        }
    }

    fn domain(&self) -> &'s str {
        match self {
            NodeView::Decoded(n) => n.domain.as_str(),
            NodeView::Wire(w) => w.domain,
        }
    }

    fn inputs(&self) -> impl Iterator<Item = &'s str> + '_ {
        let (decoded, wire) = match self {
            NodeView::Decoded(n) => (&n.input[..], &[][..]),
            NodeView::Wire(w) => (&[][..], &w.inputs[..]),
        };
        decoded.iter().map(|s| s.as_str()).chain(wire.iter().copied())
    }

    fn outputs(&self) -> impl Iterator<Item = &'s str> + '_ {
        let (decoded, wire) = match self {
            NodeView::Decoded(n) => (&n.output[..], &[][..]),
            NodeView::Wire(w) => (&[][..], &w.outputs[..]),
        };
        decoded.iter().map(|s| s.as_str()).chain(wire.iter().copied())
    }

    fn attribute_count(&self) -> usize {
        match self {
            NodeView::Decoded(n) => n.attribute.len(),
            NodeView::Wire(w) => w.attribute_count(),
        }
    }

    /// Calls `f` with each attribute in order; a node in wire form decodes them one at a time.
    fn try_for_each_attribute(
        &self,
        path: &Path,
        mut f: impl FnMut(&onnx::AttributeProto) -> Result<(), ReadError>,
    ) -> Result<(), ReadError> {
        match self {
            NodeView::Decoded(n) => n.attribute.iter().try_for_each(f),
            NodeView::Wire(w) => {
                for a in w.attributes() {
                    f(&a.map_err(|e| wire_error(path, e))?)?;
                }
                Ok(())
            }
        }
    }
}

/// A node kept in wire form decoded whole when the file was read, so it cannot fail to decode
/// again; if it did, it is reported as the file's fault.
fn wire_error(path: &Path, e: prost::DecodeError) -> ReadError {
    ReadError::invalid(path, format!("a node no longer decodes: {e}"))
}

/// Free names of a graph: (tensor name, first node reading it).
type FreeNames = Vec<(String, String)>;

fn import_graph(cx: &mut Cx, g: &onnx::GraphProto, depth: usize) -> Result<(Graph, FreeNames), ReadError> {
    if depth > MAX_SUBGRAPH_DEPTH {
        return Err(cx.err(format!(
            "subgraphs nested deeper than {MAX_SUBGRAPH_DEPTH} levels (graph `{}`); refusing to recurse",
            g.name
        )));
    }
    let flat = Flat::of_graph(cx, g)?;

    // Every value is an initializer, an input or a node output (plus a few placeholders):
    // sizing the tables once avoids re-growing (and re-touching) them on large graphs.
    // Node outputs are counted by the name pass below, which reserves room for them.
    let expected = g.initializer.len() + g.sparse_initializer.len() + g.input.len() + flat.len() + 8;
    // On a large main graph the value and node arrays are reserved here, on the importing
    // thread, and mapped by the pass threads once each is done with its pass (`RoomWork`).
    // Reserved here, the allocator places them the same way every run: reserved on another
    // thread, racing the passes' own allocations, they landed in one of a few places, and in
    // some the tables import frees later left no room for inference's allocations (about
    // 3,000 more page faults, in 11 of 30 and 26 of 40 runs on the 100k-node stack).
    let mut value_room: Option<Vec<Value>> = if depth == 0 && flat.len() >= PARALLEL_MIN_NODES {
        Some(Vec::with_capacity(expected))
    } else {
        None
    };
    let mut values: Vec<Value> = Vec::with_capacity(if value_room.is_some() {
        expected - flat.len()
    } else {
        expected
    });
    // Every tensor name the graph mentions, hashed once; later passes use its index.
    let mut syms = Symbols::with_capacity(expected);
    let texts = cx.texts;
    let new_value = |values: &mut Vec<Value>, name: &str, kind: ValueKind, fact: Fact| {
        values.push(Value::new(texts.text(name), kind, fact));
        ValueId::new(values.len() - 1)
    };

    for t in &g.initializer {
        let data = tensor_data(cx, t)?;
        if syms.value_of(&t.name).is_some() {
            return Err(cx.err(format!("initializer `{}` is defined twice", t.name)));
        }
        let fact = Fact::tensor(data.dtype, Shape::known(&data.dims));
        let id = new_value(&mut values, &t.name, ValueKind::Initializer, fact);
        values[id.index()].data = Some(Box::new(data));
        syms.bind(&t.name, id);
    }
    for sp in &g.sparse_initializer {
        let Some(v) = sp.values.as_ref() else { continue };
        let dims = non_negative_dims(cx, &v.name, &sp.dims)?;
        let dtype = DType::from_onnx(v.data_type);
        if syms.value_of(&v.name).is_some() {
            return Err(cx.err(format!("initializer `{}` is defined twice", v.name)));
        }
        let id = new_value(
            &mut values,
            &v.name,
            ValueKind::Initializer,
            Fact::tensor(dtype, Shape::known(&dims)),
        );
        values[id.index()].data = Some(Box::new(TensorData {
            dtype,
            dims,
            storage: Storage::Empty,
        }));
        syms.bind(&v.name, id);
    }
    let mut inputs = Vec::new();
    let mut weight_inputs: Vec<&str> = Vec::new();
    for vi in &g.input {
        let declared = declared_fact(cx, vi, false)?;
        if let Some(id) = syms.value_of(&vi.name) {
            // Old IR versions list initializers among the inputs: a weight with a default.
            values[id.index()].declared = Some(Box::new(declared));
            weight_inputs.push(&vi.name);
            continue;
        }
        let declared = if depth == 0 {
            declared_fact(cx, vi, true)?
        } else {
            declared
        };
        let id = new_value(&mut values, &vi.name, ValueKind::Input, declared.clone());
        if depth == 0 {
            if let Some(text) = cx.overrides.values.get(&vi.name) {
                let k = input_value(cx, &vi.name, &declared, text)?;
                cx.used_values.insert(vi.name.clone());
                values[id.index()].konst = Some(Box::new(k));
            }
        }
        values[id.index()].declared = Some(Box::new(declared));
        syms.bind(&vi.name, id);
        inputs.push(id);
    }

    if let Some(first) = weight_inputs.first() {
        cx.diags.push(
            Diagnostic::new(
                codes::INITIALIZER_AS_INPUT,
                format!(
                    "{} initializer(s) also listed as graph inputs (IR < 4 style); treated as weights",
                    weight_inputs.len()
                ),
            )
            .at_tensor(first),
        );
    }

    // Two passes over the nodes that do not depend on each other: tensor names into symbols,
    // and attributes (with the subgraphs they carry) into the IR. On a large main graph the
    // second runs on another thread.
    let parallel = depth == 0 && flat.len() >= PARALLEL_MIN_NODES;
    let mut node_room: Option<Vec<Node>> = if parallel {
        Some(Vec::with_capacity(flat.len()))
    } else {
        None
    };
    let path = cx.path;
    // The worker, which finishes first, also checks whether the nodes' own names can all be
    // kept; the node loop below then does not check them one by one.
    let (names, attrs, names_kept, early_deps) = if parallel {
        let flat = &flat;
        let syms = &mut syms;
        let rooms = RoomWork::new(
            [
                value_room.as_mut().map(spare_bytes),
                node_room.as_mut().map(spare_bytes),
            ]
            .into_iter()
            .flatten(),
        );
        let rooms = &rooms;
        std::thread::scope(|scope| {
            let worker = std::thread::Builder::new()
                .stack_size(crate::onnx::graph::WORKER_STACK)
                .spawn_scoped(scope, || {
                    let a = attr_pass(cx, flat, depth);
                    let kept = a.as_ref().is_ok_and(|a| distinct_names(&a.names));
                    rooms.help();
                    (a, kept)
                });
            let names = name_pass(path, flat, syms);
            // While the worker still reads attributes: the sort's rows, from the names alone.
            let early = names.as_ref().ok().and_then(|(_, ins)| plain_deps(ins, syms));
            rooms.help();
            let (attrs, kept) = match worker {
                Ok(h) => {
                    let (a, kept) = h.join().unwrap_or_else(|p| std::panic::resume_unwind(p));
                    (Some(a), kept)
                }
                Err(_) => (None, false),
            };
            (names, attrs, kept, early)
        })
    } else {
        (name_pass(path, &flat, &mut syms), None, false, None)
    };
    // A sequential import meets the name pass's faults first.
    let (outs, ins) = names?;
    if let Some(mut room) = value_room {
        room.append(&mut values);
        values = room;
    }
    // Room for every node output (the estimate above assumed one per node).
    values.reserve((outs.items.len() + 8).saturating_sub(values.capacity() - values.len()));
    let attrs = match attrs {
        Some(a) => a?,
        // Small graphs, or no thread could be started.
        None => attr_pass(cx, &flat, depth)?,
    };
    let AttrPass {
        attrs: mut attrs_of,
        ops: mut ops_of,
        names: node_names,
        bodies: mut bodies_of,
        reads: body_reads,
    } = attrs;

    // The outer names bodies read, as symbols: after every name the nodes write or read.
    let mut body_syms = Csr::with_rows(flat.len());
    let mut readers = body_reads.iter().peekable();
    for i in 0..flat.len() {
        if let Some((_, reads)) = readers.next_if(|r| r.0 == i) {
            for r in reads {
                body_syms.push(syms.intern(r));
            }
        }
        body_syms.end_row();
    }

    // Dependencies between nodes, for the topological sort.
    let mut graph_free: FreeNames = Vec::new();
    let mut captured: Vec<ValueId> = Vec::new();
    // Bodies read names the early rows did not see.
    let (deps, sorted) = match early_deps.filter(|_| body_reads.is_empty()) {
        Some(early) => early,
        None => {
            let mut deps = Csr::with_rows(flat.len());
            let mut sorted = true;
            for (i, n) in flat.iter().enumerate() {
                let reads = ins.of(i).iter().filter(|&&k| k != NONE).chain(body_syms.of(i));
                for &k in reads {
                    let p = syms.producer[k as usize];
                    if p != NONE {
                        sorted &= (p as usize) < i;
                        deps.push(p);
                    } else if syms.value[k as usize].is_none() {
                        let name = syms.names[k as usize];
                        let id = new_value(&mut values, name, ValueKind::Input, Fact::default());
                        syms.value[k as usize] = Some(id);
                        captured.push(id);
                        graph_free.push((name.to_string(), display_name(n.form, i)));
                    }
                }
                deps.end_row();
            }
            (deps, sorted)
        }
    };
    // Most files list their nodes in an order that is already valid, which the sort would
    // keep: then the rows show it, without the sort's tables (about 2.5 MB on a 100k-node
    // graph).
    let order = if sorted {
        (0..flat.len()).collect()
    } else {
        topo_order(cx, &flat, &deps)?
    };

    // Every node output's value id, in the order nodes are built: values and nodes can then
    // be built apart, on two threads for a large graph (each touches about as much fresh
    // memory as the other). Every name a node reads now has a value: the loop above gave one
    // to each name no node writes, and the sort puts a tensor's producer before its readers.
    let mut next = values.len() as u32;
    for &i in &order {
        for &k in outs.of(i) {
            if k != NONE {
                syms.value[k as usize] = Some(ValueId::new(next as usize));
                next += 1;
            }
        }
    }
    let wiring = Wiring {
        texts,
        names: &syms.names,
        value: &syms.value,
        order: &order,
        ins: &ins,
        outs: &outs,
        body: &body_syms,
    };
    let build = NodeBuild {
        flat: &flat,
        names: &node_names,
        names_kept,
        attrs: &mut attrs_of,
        ops: &mut ops_of,
        bodies: &mut bodies_of,
    };
    let (nodes, values_added) = if parallel {
        std::thread::scope(|scope| {
            let worker = std::thread::Builder::new()
                .stack_size(crate::onnx::graph::WORKER_STACK)
                .spawn_scoped(scope, || wiring.add_values(&mut values));
            let room = node_room.take();
            let nodes = wiring.nodes(build, room);
            let added = match worker {
                Ok(h) => {
                    h.join().unwrap_or_else(|p| std::panic::resume_unwind(p));
                    true
                }
                Err(_) => false,
            };
            (nodes, added)
        })
    } else {
        (wiring.nodes(build, None), false)
    };
    // Small graphs, or no thread could be started.
    if !values_added {
        wiring.add_values(&mut values);
    }

    let mut outputs = Vec::new();
    for vi in &g.output {
        let declared = declared_fact(cx, vi, false)?;
        let id = match syms.value_of(&vi.name) {
            Some(id) => id,
            None => {
                let id = new_value(&mut values, &vi.name, ValueKind::Input, Fact::default());
                syms.bind(&vi.name, id);
                captured.push(id);
                graph_free.push((vi.name.clone(), format!("graph output of `{}`", g.name)));
                id
            }
        };
        let v = &mut values[id.index()];
        if v.producer.is_some() {
            v.kind = ValueKind::Output;
        }
        v.declared = Some(Box::new(declared));
        outputs.push(id);
    }
    for vi in &g.value_info {
        if let Some(id) = syms.value_of(&vi.name) {
            let declared = declared_fact(cx, vi, false)?;
            if values[id.index()].declared.is_none() {
                values[id.index()].declared = Some(Box::new(declared));
            }
        }
    }
    let unused: Vec<&str> = values
        .iter()
        .enumerate()
        .filter(|(i, v)| {
            v.kind == ValueKind::Initializer && v.consumers.is_empty() && !outputs.contains(&ValueId::new(*i))
        })
        .map(|(_, v)| v.name.as_str())
        .collect();
    if let Some(first) = unused.first() {
        cx.diags.push(
            Diagnostic::new(
                codes::UNUSED_INITIALIZER,
                format!("{} initializer(s) not used by any node", unused.len()),
            )
            .at_tensor(first),
        );
    }
    let graph = Graph {
        name: g.name.clone(),
        nodes,
        values,
        inputs,
        outputs,
        captured,
        costs: Vec::new(),
    };
    Ok((graph, graph_free))
}

/// How one graph's nodes connect, once every tensor name has its value id: what building its
/// values and building its nodes both read.
struct Wiring<'w, 'a> {
    texts: Texts,
    names: &'w [&'a str],
    value: &'w [Option<ValueId>],
    /// Flat node indices in the order nodes are built (a topological order).
    order: &'w [usize],
    ins: &'w Csr,
    outs: &'w Csr,
    /// The outer names each node's bodies read.
    body: &'w Csr,
}

/// What building the nodes takes from the earlier passes, each node's part taken once.
struct NodeBuild<'w, 'a> {
    flat: &'w Flat<'a>,
    names: &'w [&'a str],
    /// Every node has a name of its own, distinct from the others (see `distinct_names`).
    names_kept: bool,
    attrs: &'w mut [Box<[Attr]>],
    ops: &'w mut [Option<(Name, Name)>],
    bodies: &'w mut [(usize, Vec<Body>)],
}

impl Wiring<'_, '_> {
    fn value_of(&self, k: u32) -> Option<ValueId> {
        if k == NONE {
            None
        } else {
            self.value[k as usize]
        }
    }

    /// The values a node's bodies read that are not among its inputs, each once.
    #[inline]
    fn captures(&self, i: usize) -> Vec<ValueId> {
        let reads = self.body.of(i);
        if reads.is_empty() {
            return Vec::new();
        }
        // The node's inputs and the captures so far, in a set: bodies can read tens of
        // thousands of outer names, and a scan per name would be quadratic.
        let mut seen: FastSet<ValueId> = self.ins.of(i).iter().filter_map(|&x| self.value_of(x)).collect();
        let mut caps: Vec<ValueId> = Vec::new();
        for &k in reads {
            let Some(v) = self.value_of(k) else { continue };
            if seen.insert(v) {
                caps.push(v);
            }
        }
        caps
    }

    /// Appends each node's outputs to `values` and records every read, in build order.
    fn add_values(&self, values: &mut Vec<Value>) {
        for (p, &i) in self.order.iter().enumerate() {
            let id = NodeId::new(p);
            for &k in self.ins.of(i) {
                if let Some(v) = self.value_of(k) {
                    values[v.index()].consumers.push(id);
                }
            }
            for &k in self.outs.of(i) {
                if k == NONE {
                    continue;
                }
                values.push(Value {
                    producer: Some(id),
                    ..Value::new(
                        self.texts.text(self.names[k as usize]),
                        ValueKind::Activation,
                        Fact::default(),
                    )
                });
            }
            for v in self.captures(i) {
                values[v.index()].consumers.push(id);
            }
        }
    }

    /// The graph's nodes in build order. Names the file gives are checked for repeats
    /// without copies; generated and renamed ones are few.
    fn nodes(&self, b: NodeBuild, room: Option<Vec<Node>>) -> Vec<Node> {
        let mut used_file: FastSet<TextKey> = FastSet::default();
        if !b.names_kept {
            used_file.reserve(b.flat.len());
        }
        let mut used_made: FastSet<String> = FastSet::default();
        let mut nodes = room.unwrap_or_default();
        nodes.reserve(self.order.len());
        for &i in self.order {
            let n = b.flat.get(i);
            let attrs = std::mem::take(&mut b.attrs[i]);
            // Each node is visited once, so its slot is still filled.
            let (op_type, domain) = b.ops[i].take().unwrap_or_default();
            let bodies = match b.bodies.binary_search_by_key(&i, |x| x.0) {
                Ok(k) => std::mem::take(&mut b.bodies[k].1),
                Err(_) => Vec::new(),
            };
            let file_name = b.names[i];
            // One hash per name in the common case: made names are rare, and `insert`
            // answers whether the name was free.
            let fresh = b.names_kept
                || (!file_name.is_empty()
                    && (used_made.is_empty() || !used_made.contains(file_name))
                    && used_file.insert(TextKey(file_name)));
            let name = if fresh {
                self.texts.text(file_name)
            } else {
                let base = if file_name.is_empty() {
                    generated_name(n.form, i)
                } else {
                    file_name.to_string()
                };
                let taken = |x: &str| used_file.contains(&TextKey(x)) || used_made.contains(x);
                let mut name = base.clone();
                if taken(&name) {
                    let mut k = 2;
                    while taken(&format!("{base}~{k}")) {
                        k += 1;
                    }
                    name = format!("{base}~{k}");
                }
                used_made.insert(name.clone());
                Text::from(name)
            };
            let slots = |row: &[u32]| -> crate::ir::Slots { row.iter().map(|&k| self.value_of(k)).collect() };
            let caps = self.captures(i);
            nodes.push(Node {
                name,
                generated_name: file_name.is_empty(),
                op_type,
                domain,
                inputs: slots(self.ins.of(i)),
                outputs: slots(self.outs.of(i)),
                attrs,
                extra: if bodies.is_empty() && caps.is_empty() && n.from_function.is_none() {
                    None
                } else {
                    Some(Box::new(NodeExtra {
                        bodies: bodies.into_boxed_slice(),
                        captures: caps.into_boxed_slice(),
                        from_function: n.from_function.cloned(),
                    }))
                },
                // A file's node list cannot reach 2^32 entries (a node takes at least two
                // bytes and a protobuf file at most 2 GiB).
                source_index: n.source as u32,
                folded: false,
            });
        }
        nodes
    }
}

/// The spare capacity of `v` as bytes that may be uninitialized.
fn spare_bytes<T>(v: &mut Vec<T>) -> &mut [std::mem::MaybeUninit<u8>] {
    let spare = v.spare_capacity_mut();
    let len = std::mem::size_of_val(spare);
    // SAFETY: the bytes of the spare capacity, as bytes that may be uninitialized: the same
    // allocation, length and lifetime, and `MaybeUninit<u8>` has no validity invariant nor
    // alignment beyond one.
    unsafe { std::slice::from_raw_parts_mut(spare.as_mut_ptr().cast::<std::mem::MaybeUninit<u8>>(), len) }
}

/// The value and node arrays' memory, in pieces that the two pass threads map (`prefault`)
/// as each finishes its pass, so that the build fills memory the kernel has already cleared.
/// A fresh process pays that clearing on first touch, and the two arrays are most of what
/// import touches (22 MB on a 100k-node graph). Done by two helper threads of their own, the
/// mapping took the two cores first and held both passes back by up to 6 ms at their start;
/// taken in pieces by whichever pass thread is free, the two threads end together
/// (README, "Twenty-third session").
struct RoomWork<'a>(std::sync::Mutex<Vec<&'a mut [std::mem::MaybeUninit<u8>]>>);

impl<'a> RoomWork<'a> {
    const PIECE: usize = 1 << 20;

    fn new(rooms: impl Iterator<Item = &'a mut [std::mem::MaybeUninit<u8>]>) -> RoomWork<'a> {
        let mut pieces: Vec<_> = rooms.flat_map(|r| r.chunks_mut(Self::PIECE)).collect();
        // Taken from the end: the first pieces first.
        pieces.reverse();
        RoomWork(std::sync::Mutex::new(pieces))
    }

    /// Maps pieces until none is left.
    fn help(&self) {
        loop {
            let piece = match self.0.lock() {
                Ok(mut p) => p.pop(),
                Err(_) => None,
            };
            match piece {
                Some(p) => prefault(p),
                None => return,
            }
        }
    }
}

/// Makes the kernel map (and clear) every page of `bytes`, memory not yet written (a
/// vector's spare capacity), now and on the calling thread, so that whoever writes it later
/// meets no page fault. One `madvise(MADV_POPULATE_WRITE)` over the whole pages took
/// 1.6–1.7 µs a page on the development machine against 2.5–2.8 µs for a write to each (an
/// 11,264-page probe), and 2–4 ms off a whole `inspect` of the 100k-node stack (alternating
/// runs; README, "Twentieth session"); a kernel without it (before Linux 5.14) refuses the
/// call, and then each page is written once. The partial pages at either end get one byte
/// written, as the fallback writes one a page.
fn prefault(bytes: &mut [std::mem::MaybeUninit<u8>]) {
    const PAGE: usize = 4096;
    #[cfg(target_os = "linux")]
    {
        let start = bytes.as_mut_ptr() as usize;
        let first = start.next_multiple_of(PAGE) - start;
        let whole = bytes.len().saturating_sub(first) / PAGE * PAGE;
        if whole > 0 {
            // SAFETY: the range lies inside `bytes`, which this thread holds mutably; the call
            // maps pages and changes no byte of them (a page already mapped is left as it is).
            let r = unsafe { libc::madvise((start + first) as *mut libc::c_void, whole, libc::MADV_POPULATE_WRITE) };
            if r == 0 {
                // The first byte and the first past the whole pages: in the partial pages.
                for i in [0, first + whole] {
                    if let Some(b) = bytes.get_mut(i) {
                        *b = std::mem::MaybeUninit::new(0);
                    }
                }
                return;
            }
        }
    }
    // One write a page is what makes the kernel map (and clear) it; the rest of each page is
    // left for the builder to write.
    for page in bytes.chunks_mut(PAGE) {
        page[0] = std::mem::MaybeUninit::new(0);
    }
}

/// Whether every node has a name of its own and no two share one: then every name is kept
/// as it is (the renaming in `import_graph` has nothing to do).
fn distinct_names(names: &[&str]) -> bool {
    // Indices into `names`, four bytes an entry (as in `Symbols`): a set of the names
    // themselves took 16 bytes each, 2 MB of fresh memory on a 100k-node graph.
    let mut seen: hashbrown::HashTable<u32> = hashbrown::HashTable::with_capacity(names.len());
    names.iter().enumerate().all(|(i, &name)| {
        if name.is_empty() {
            return false;
        }
        let entry = seen.entry(
            text_hash(name),
            |&k| short_text_eq(names[k as usize], name),
            |&k| text_hash(names[k as usize]),
        );
        match entry {
            hashbrown::hash_table::Entry::Occupied(_) => false,
            hashbrown::hash_table::Entry::Vacant(e) => {
                e.insert(i as u32);
                true
            }
        }
    })
}

/// Graphs with at least this many nodes import their attributes on a second thread.
const PARALLEL_MIN_NODES: usize = 4096;

/// Output and input symbols of every node (`NONE` for an omitted optional slot), duplicate
/// producers refused: each name a node writes or reads is looked up here, once.
fn name_pass<'a>(path: &Path, flat: &'a Flat, syms: &mut Symbols<'a>) -> Result<(Csr, Csr), ReadError> {
    let mut outs = Csr::with_rows(flat.len());
    let mut ins = Csr::with_rows(flat.len());
    let mut buf = WireView::default();
    for (i, n) in flat.iter().enumerate() {
        let view = n.form.view(&mut buf);
        for o in view.outputs() {
            if o.is_empty() {
                outs.push(NONE);
                continue;
            }
            let k = syms.intern(o);
            let other = syms.producer[k as usize];
            if other != NONE {
                let other = other as usize;
                return Err(ReadError::invalid(
                    path,
                    format!(
                        "tensor `{o}` is produced twice: by node `{}` and by node `{}`",
                        display_name(flat.get(other).form, other),
                        display_name(n.form, i)
                    ),
                ));
            }
            if syms.value[k as usize].is_some() {
                return Err(ReadError::invalid(
                    path,
                    format!(
                        "tensor `{o}` is produced by node `{}` but is also a graph input or initializer",
                        display_name(n.form, i)
                    ),
                ));
            }
            syms.producer[k as usize] = i as u32;
            outs.push(k);
        }
        outs.end_row();
        for x in view.inputs() {
            ins.push(if x.is_empty() { NONE } else { syms.intern(x) });
        }
        ins.end_row();
    }
    Ok((outs, ins))
}

/// Every node's attributes; for the few nodes that carry subgraphs (by node index, in node
/// order), their bodies, and the outer names the bodies read (inputs of the node). The names
/// are kept apart from the bodies, which move into the nodes, so that the name table can
/// borrow them.
struct AttrPass<'a> {
    attrs: Vec<Box<[Attr]>>,
    /// Each node's name as the file gives it ("" for none): read here with the attributes,
    /// in the same scan of a node kept in wire form.
    names: Vec<&'a str>,
    /// Each node's interned (op type, domain): on a large graph this runs on the worker,
    /// which has time to spare, rather than in the node loop on the critical path.
    ops: Vec<Option<(Name, Name)>>,
    bodies: Vec<(usize, Vec<Body>)>,
    reads: Vec<(usize, Vec<String>)>,
}

/// Imports the attributes of every node, and the subgraphs among them.
fn attr_pass<'a>(cx: &mut Cx, flat: &'a Flat, depth: usize) -> Result<AttrPass<'a>, ReadError> {
    let mut out = AttrPass {
        names: Vec::with_capacity(flat.len()),
        attrs: Vec::with_capacity(flat.len()),
        ops: Vec::with_capacity(flat.len()),
        bodies: Vec::new(),
        reads: Vec::new(),
    };
    let mut buf = WireView::default();
    for (i, n) in flat.iter().enumerate() {
        let mut bodies = Vec::new();
        let mut free: FreeNames = Vec::new();
        let view = n.form.view(&mut buf);
        let mut attrs = Vec::with_capacity(view.attribute_count());
        view.try_for_each_attribute(cx.path, |a| {
            let value = attr_value(cx, a, depth, &mut bodies, &mut free)?;
            attrs.push(Attr {
                name: cx.names.get(&a.name),
                value,
            });
            Ok(())
        })?;
        out.attrs.push(attrs.into_boxed_slice());
        out.ops
            .push(Some((cx.names.get(view.op_type()), cx.names.get(view.domain()))));
        out.names.push(view.name());
        if !bodies.is_empty() {
            out.bodies.push((i, bodies));
        }
        if !free.is_empty() {
            out.reads.push((i, free.into_iter().map(|(name, _)| name).collect()));
        }
    }
    Ok(out)
}

fn display_name(n: Form, index: usize) -> String {
    match n.name() {
        "" => generated_name(n, index),
        name => name.to_string(),
    }
}

/// A name for an unnamed node that does not depend on where it stands in the file: its op
/// and first output (output names are unique in a valid graph).
fn generated_name(n: Form, index: usize) -> String {
    match n.outputs().find(|o| !o.is_empty()) {
        Some(o) => format!("{}:{}", n.op_type(), o),
        None => format!("{}#{}", n.op_type(), index),
    }
}

/// The nodes of a graph kept in wire form (none, for a graph read whole).
fn wire_run(g: &onnx::GraphProto) -> &onnx::node::NodeRun {
    static NO_RUN: onnx::node::NodeRun = onnx::node::NodeRun::empty();
    g.node_run.as_ref().unwrap_or(&NO_RUN)
}

/// A graph's nodes in order: those kept in wire form first, then the decoded ones.
/// Its size hint is exact, so that the flat node list is sized once: grown by doubling, a
/// 100k-node list touched about 10 MB more fresh memory.
fn graph_nodes(g: &onnx::GraphProto) -> impl Iterator<Item = NodeRef<'_>> {
    wire_run(g)
        .nodes()
        .map(NodeRef::Wire)
        .chain(g.node.iter().map(NodeRef::Borrowed))
}

/// "No symbol / no node" in the compact tables below.
const NONE: u32 = u32::MAX;

/// The tensor names of one graph, each hashed once and then known by its index: the value it
/// names so far and the node that produces it.
struct Symbols<'a> {
    /// Symbol indices, found by their names' hashes. Four bytes an entry, not the 24 of a
    /// (name, index) pair: on a 100k-node graph the table is a sixth of the size, and
    /// import took about 3 ms less (of 29).
    index: hashbrown::HashTable<u32>,
    names: Vec<&'a str>,
    value: Vec<Option<ValueId>>,
    /// Index in the flat node list, or `NONE`.
    producer: Vec<u32>,
}

fn text_hash(s: &str) -> u64 {
    use std::hash::{BuildHasher, BuildHasherDefault};
    BuildHasherDefault::<crate::fastmap::FxHasher>::default().hash_one(TextKey(s))
}

impl<'a> Symbols<'a> {
    fn with_capacity(n: usize) -> Symbols<'a> {
        Symbols {
            index: hashbrown::HashTable::with_capacity(n),
            names: Vec::with_capacity(n),
            value: Vec::with_capacity(n),
            producer: Vec::with_capacity(n),
        }
    }

    fn intern(&mut self, name: &'a str) -> u32 {
        let names = &self.names;
        let entry = self.index.entry(
            text_hash(name),
            |&k| short_text_eq(names[k as usize], name),
            |&k| text_hash(names[k as usize]),
        );
        match entry {
            hashbrown::hash_table::Entry::Occupied(e) => *e.get(),
            hashbrown::hash_table::Entry::Vacant(e) => {
                let next = self.names.len() as u32;
                e.insert(next);
                self.names.push(name);
                self.value.push(None);
                self.producer.push(NONE);
                next
            }
        }
    }

    fn value_of(&self, name: &str) -> Option<ValueId> {
        let k = self
            .index
            .find(text_hash(name), |&k| short_text_eq(self.names[k as usize], name))?;
        self.value[*k as usize]
    }

    fn bind(&mut self, name: &'a str, id: ValueId) {
        let k = self.intern(name);
        self.value[k as usize] = Some(id);
    }
}

/// Rows of node indices in one buffer (compressed sparse rows), filled row by row.
struct Csr {
    starts: Vec<u32>,
    items: Vec<u32>,
}

impl Csr {
    fn with_rows(rows: usize) -> Csr {
        let mut starts = Vec::with_capacity(rows + 1);
        starts.push(0);
        Csr {
            starts,
            items: Vec::with_capacity(rows + rows / 2),
        }
    }

    fn push(&mut self, item: u32) {
        self.items.push(item);
    }

    fn end_row(&mut self) {
        self.starts.push(self.items.len() as u32);
    }

    fn of(&self, row: usize) -> &[u32] {
        &self.items[self.starts[row] as usize..self.starts[row + 1] as usize]
    }
}

/// Each node's producers, from the names it reads (the sort's rows), when every name read
/// has a producer or a value already; `None` when one has neither (it becomes a captured
/// outer value, which only the full loop in `import_graph` makes). With them, whether the
/// file's order is already a topological one (every node reads only earlier ones).
fn plain_deps(ins: &Csr, syms: &Symbols) -> Option<(Csr, bool)> {
    let rows = ins.starts.len() - 1;
    let mut deps = Csr::with_rows(rows);
    let mut sorted = true;
    for i in 0..rows {
        for &k in ins.of(i) {
            if k == NONE {
                continue;
            }
            let p = syms.producer[k as usize];
            if p != NONE {
                sorted &= (p as usize) < i;
                deps.push(p);
            } else if syms.value[k as usize].is_none() {
                return None;
            }
        }
        deps.end_row();
    }
    Some((deps, sorted))
}

/// Kahn's algorithm, always taking the earliest ready node in file order, so a file already
/// in order keeps it. A cycle is an error naming its nodes (found with petgraph's SCCs).
fn topo_order(cx: &Cx, flat: &Flat, deps: &Csr) -> Result<Vec<usize>, ReadError> {
    let n = flat.len();
    let mut indegree = vec![0u32; n];
    // The reverse rows (who reads node d), built by counting: again one allocation.
    let mut count = vec![0u32; n + 1];
    for (i, deg) in indegree.iter_mut().enumerate() {
        for &d in deps.of(i) {
            *deg += 1;
            count[d as usize + 1] += 1;
        }
    }
    for k in 0..n {
        count[k + 1] += count[k];
    }
    let mut fill = count.clone();
    let mut user_list = vec![0u32; count[n] as usize];
    for i in 0..n {
        for &d in deps.of(i) {
            user_list[fill[d as usize] as usize] = i as u32;
            fill[d as usize] += 1;
        }
    }
    drop(fill);
    let mut ready: BinaryHeap<std::cmp::Reverse<usize>> =
        (0..n).filter(|&i| indegree[i] == 0).map(std::cmp::Reverse).collect();
    let mut order = Vec::with_capacity(n);
    while let Some(std::cmp::Reverse(i)) = ready.pop() {
        order.push(i);
        for &u in &user_list[count[i] as usize..count[i + 1] as usize] {
            let u = u as usize;
            indegree[u] -= 1;
            if indegree[u] == 0 {
                ready.push(std::cmp::Reverse(u));
            }
        }
    }
    if order.len() == n {
        return Ok(order);
    }
    let mut pg = petgraph::graph::DiGraph::<usize, ()>::new();
    let idx: Vec<_> = (0..n).map(|i| pg.add_node(i)).collect();
    for i in 0..n {
        for &d in deps.of(i) {
            pg.add_edge(idx[d as usize], idx[i], ());
        }
    }
    let mut cycle: Vec<String> = petgraph::algo::tarjan_scc(&pg)
        .into_iter()
        .find(|scc| scc.len() > 1 || pg.contains_edge(scc[0], scc[0]))
        .unwrap_or_default()
        .into_iter()
        .map(|ix| display_name(flat.get(pg[ix]).form, pg[ix]))
        .collect();
    cycle.sort();
    let shown: Vec<String> = cycle.iter().take(8).map(|s| format!("`{s}`")).collect();
    let more = if cycle.len() > 8 {
        format!(" and {} more", cycle.len() - 8)
    } else {
        String::new()
    };
    Err(cx.err(format!(
        "the graph has a cycle through nodes {}{more}",
        shown.join(", ")
    )))
}

fn expand_functions<'a>(
    cx: &mut Cx,
    nodes: impl Iterator<Item = NodeRef<'a>>,
    depth: usize,
    stack: &str,
) -> Result<Vec<FlatNode<'a>>, ReadError> {
    // Exact for a graph's nodes (`graph_nodes` chains two exact lists).
    let mut out = Vec::with_capacity(nodes.size_hint().0);
    for (source, node) in nodes.enumerate() {
        let called = if cx.functions.is_empty() {
            None
        } else {
            cx.functions.get(&(node.domain(), node.op_type())).copied()
        };
        let Some(f) = called else {
            out.push(FlatNode {
                proto: node,
                from_function: None,
                source,
            });
            continue;
        };
        let wire_call;
        let n = match node.form() {
            Form::Decoded(n) => n,
            Form::Wire(w) => {
                wire_call = w.decode().map_err(|e| wire_error(cx.path, e))?;
                &wire_call
            }
        };
        if depth >= MAX_FUNCTION_DEPTH {
            return Err(cx.err(format!(
                "model-local functions call each other deeper than {MAX_FUNCTION_DEPTH} levels at `{}` (recursive?)",
                crate::ir::op_label(&n.domain, &n.op_type)
            )));
        }
        // Calls inside a function were counted with the call that reached it.
        if depth == 0 {
            let size = cx.function_size(f, 0);
            cx.function_nodes = cx.function_nodes.saturating_add(size);
            if cx.function_nodes > MAX_FUNCTION_NODES {
                return Err(cx.err(format!(
                    "model-local function calls expand to more than {MAX_FUNCTION_NODES} nodes (at the call of `{}`); refusing to expand them",
                    crate::ir::op_label(&n.domain, &n.op_type)
                )));
            }
        }
        let call = if n.name.is_empty() {
            generated_name(Form::Decoded(n), out.len())
        } else {
            n.name.to_string()
        };
        let mut rename: HashMap<&str, ProtoStr> = HashMap::new();
        for (i, formal) in f.input.iter().enumerate() {
            rename.insert(formal, n.input.get(i).cloned().unwrap_or_default());
        }
        for (i, formal) in f.output.iter().enumerate() {
            rename.insert(formal, n.output.get(i).cloned().unwrap_or_default());
        }
        let mut body = Vec::with_capacity(f.node.len());
        for inner in &f.node {
            let mut m = inner.clone();
            let map = |s: &ProtoStr| -> ProtoStr {
                if s.is_empty() {
                    return ProtoStr::new();
                }
                rename
                    .get(s.as_str())
                    .cloned()
                    .unwrap_or_else(|| format!("{call}/{s}").into())
            };
            m.input = inner.input.iter().map(map).collect();
            m.output = inner.output.iter().map(map).collect();
            m.name = if inner.name.is_empty() {
                format!("{call}/{}", generated_name(Form::Decoded(inner), 0))
            } else {
                format!("{call}/{}", inner.name)
            }
            .into();
            m.attribute = Vec::with_capacity(inner.attribute.len());
            for a in &inner.attribute {
                if a.ref_attr_name().is_empty() {
                    m.attribute.push(a.clone());
                    continue;
                }
                let given = n.attribute.iter().find(|x| x.name.as_str() == a.ref_attr_name());
                let default = f.attribute_proto.iter().find(|x| x.name.as_str() == a.ref_attr_name());
                if let Some(src) = given.or(default) {
                    let mut b = src.clone();
                    b.name = a.name.clone();
                    m.attribute.push(b);
                }
            }
            body.push(m);
        }
        let label = crate::ir::op_label(&n.domain, &n.op_type);
        let inner_stack = format!("{stack}{label}>");
        let call_name = Name::from(call.as_str());
        for flat in expand_functions(cx, body.iter().map(NodeRef::Borrowed), depth + 1, &inner_stack)? {
            let from = flat.from_function.unwrap_or_else(|| call_name.clone());
            out.push(FlatNode {
                proto: NodeRef::Owned(Box::new(flat.proto.into_owned(cx.path)?)),
                from_function: Some(from),
                source,
            });
        }
    }
    Ok(out)
}

fn attr_value(
    cx: &mut Cx,
    a: &onnx::AttributeProto,
    depth: usize,
    bodies: &mut Vec<Body>,
    free: &mut FreeNames,
) -> Result<AttrValue, ReadError> {
    // Old writers leave `type` UNDEFINED; then the populated field decides.
    let ty = if a.r#type != 0 {
        a.r#type
    } else if a.g.is_some() {
        5
    } else if a.t.is_some() {
        4
    } else if !a.ints.is_empty() {
        7
    } else if !a.floats.is_empty() {
        6
    } else if !a.strings().is_empty() {
        8
    } else if !a.graphs().is_empty() {
        10
    } else if !a.s.is_empty() {
        3
    } else if a.f != 0.0 {
        1
    } else {
        2
    };
    let body = |cx: &mut Cx, g: &onnx::GraphProto, bodies: &mut Vec<Body>, free: &mut FreeNames| {
        let (graph, f) = import_graph(cx, g, depth + 1)?;
        // A set, not a scan of `free` per name: a body can read tens of thousands of outer names.
        if !f.is_empty() {
            let mut seen: FastSet<String> = free.iter().map(|y| y.0.clone()).collect();
            for x in f {
                if seen.insert(x.0.clone()) {
                    free.push(x);
                }
            }
        }
        bodies.push(Body {
            attr: a.name.to_string(),
            graph,
        });
        Ok::<usize, ReadError>(bodies.len() - 1)
    };
    Ok(match ty {
        1 => AttrValue::Float(a.f),
        2 => AttrValue::Int(a.i),
        3 => AttrValue::String(String::from_utf8_lossy(&a.s).into_owned()),
        4 => match &a.t {
            Some(t) => AttrValue::Tensor(Box::new(tensor_data(cx, t)?)),
            None => AttrValue::Other,
        },
        5 => match &a.g {
            Some(g) => AttrValue::Graph(body(cx, g, bodies, free)?),
            None => AttrValue::Other,
        },
        6 => AttrValue::Floats(a.floats.clone()),
        7 => AttrValue::Ints(a.ints.clone()),
        8 => AttrValue::Strings(
            a.strings()
                .iter()
                .map(|s| String::from_utf8_lossy(s).into_owned())
                .collect(),
        ),
        9 => AttrValue::Tensors(
            a.tensors()
                .iter()
                .map(|t| tensor_data(cx, t))
                .collect::<Result<_, _>>()?,
        ),
        10 => {
            let mut ids = Vec::new();
            for g in a.graphs() {
                ids.push(body(cx, g, bodies, free)?);
            }
            AttrValue::Graphs(ids)
        }
        _ => AttrValue::Other,
    })
}

/// A `--value` for input `name`: as many numbers as its shape (fixed, with `--input` if need
/// be) holds, integers for an integer or boolean input.
fn input_value(cx: &Cx, name: &str, fact: &Fact, text: &[String]) -> Result<ConstValue, ReadError> {
    let dims = fact.shape.concrete().ok_or_else(|| {
        cx.err(format!(
            "--value {name}: the input's shape is not fully known; fix it with --input {name}=…"
        ))
    })?;
    let count = dims.iter().try_fold(1u64, |n, &d| n.checked_mul(d));
    if count != Some(text.len() as u64) {
        return Err(cx.err(format!(
            "--value {name}: the input has shape {} ({} element(s)) and {} value(s) were given",
            fact.shape,
            count.map_or_else(|| "too many".to_string(), |c| c.to_string()),
            text.len()
        )));
    }
    match fact.dtype {
        Some(dt) if dt.is_float() => Ok(ConstValue::floats(
            dims,
            text.iter().map(|t| t.parse().unwrap_or(f64::NAN)).collect(),
        )),
        Some(dt) if dt.is_integer() || dt == DType::Bool => {
            let ints: Option<Vec<i64>> = text.iter().map(|t| t.parse().ok()).collect();
            let ints = ints.ok_or_else(|| cx.err(format!("--value {name}: the input is {dt}; give whole numbers")))?;
            Ok(ConstValue::ints(dims, ints))
        }
        _ => Err(cx.err(format!(
            "--value {name}: only numeric inputs of a known type take values"
        ))),
    }
}

fn non_negative_dims(cx: &Cx, name: &str, dims: &[i64]) -> Result<Vec<u64>, ReadError> {
    within_rank_limit(cx, name, dims.len())?;
    dims.iter()
        .map(|&d| u64::try_from(d).map_err(|_| cx.err(format!("tensor `{name}` has negative dim {d}"))))
        .collect()
}

/// Refuses a tensor or declaration of more dims than any shape may have (`MAX_RANK`).
fn within_rank_limit(cx: &Cx, name: &str, rank: usize) -> Result<(), ReadError> {
    if rank > crate::ir::MAX_RANK {
        return Err(cx.err(format!(
            "tensor `{name}` has {rank} dims; tilecut reads shapes of at most {} dims",
            crate::ir::MAX_RANK
        )));
    }
    Ok(())
}

/// The IR view of a stored tensor; external payloads are located (and checked) but not read.
fn tensor_data(cx: &mut Cx, t: &TensorProto) -> Result<TensorData, ReadError> {
    let dims = non_negative_dims(cx, &t.name, &t.dims)?;
    let dtype = DType::from_onnx(t.data_type);
    let count = dims.iter().try_fold(1u64, |a, &d| a.checked_mul(d));
    if count.is_none() {
        return Err(cx.err(format!("tensor `{}` has dims whose product overflows 64 bits", t.name)));
    }
    let storage = if t.is_external() {
        let get = |k: &str| t.external_data.iter().find(|e| e.key == k).map(|e| e.value.as_str());
        let location = get("location").unwrap_or("");
        let parse = |k: &str| -> Result<Option<u64>, ReadError> {
            match get(k) {
                None => Ok(None),
                Some(s) => s.parse::<u64>().map(Some).map_err(|_| {
                    cx.err(format!(
                        "tensor `{}`: external data {k} `{s}` is not a non-negative integer",
                        t.name
                    ))
                }),
            }
        };
        let offset = parse("offset")?.unwrap_or(0);
        let length = parse("length")?;
        let (path, present) = resolve_external(cx.dir, location).map_err(|why| ReadError::ExternalData {
            path: cx.path.to_path_buf(),
            tensor: t.name.clone(),
            location: location.to_string(),
            why,
        })?;
        if !present {
            cx.diags.push(
                Diagnostic::new(
                    codes::EXTERNAL_MISSING,
                    format!("external data file `{location}` is missing; analysis uses the declared dims"),
                )
                .at_tensor(&t.name),
            );
        }
        Storage::External {
            path,
            offset,
            length,
            present,
        }
    } else if !t.raw_data.is_empty() {
        Storage::Raw(t.raw_data.clone())
    } else if !t.float_data.is_empty() {
        Storage::Fixed32(t.float_data.clone())
    } else if !t.int32_data.is_empty() {
        Storage::Varints(t.int32_data.clone())
    } else if !t.int64_data.is_empty() {
        Storage::Varints(t.int64_data.clone())
    } else if !t.uint64_data.is_empty() {
        Storage::Varints(t.uint64_data.clone())
    } else if !t.double_data.is_empty() {
        Storage::Fixed64(t.double_data.clone())
    } else if !t.string_data.is_empty() {
        Storage::Strings(t.string_data.len())
    } else {
        Storage::Empty
    };
    Ok(TensorData { dtype, dims, storage })
}

fn declared_fact(cx: &mut Cx, vi: &onnx::ValueInfoProto, apply_overrides: bool) -> Result<Fact, ReadError> {
    let Some(tp) = vi.r#type.as_ref() else {
        return Ok(Fact::default());
    };
    let mut fact = type_fact(cx, &vi.name, tp)?;
    if apply_overrides {
        if let Some(dims) = cx.overrides.inputs.get(&vi.name) {
            cx.used_inputs.insert(vi.name.clone());
            if let Some(declared) = fact.shape.dims() {
                // Another rank is another model: every op reading the input would be judged
                // on a shape the file rules out.
                if declared.len() != dims.len() {
                    return Err(cx.err(format!(
                        "--input {}: {} dim(s) given, but the model declares {} ({})",
                        vi.name,
                        dims.len(),
                        declared.len(),
                        fact.shape
                    )));
                }
                // A fixed size may be exported narrower than the graph accepts: said, not refused.
                for (axis, (was, now)) in declared.iter().zip(dims).enumerate() {
                    if let (Dim::Known(was), Dim::Known(now)) = (was, now) {
                        if was != now {
                            cx.diags.push(
                                Diagnostic::new(
                                    codes::OVERRIDE_CONFLICT,
                                    format!("--input sets dim {axis} to {now}; the file declares {was}"),
                                )
                                .at_tensor(&vi.name),
                            );
                        }
                    }
                }
            }
            fact.shape = Shape::of(dims.clone());
        }
        if let Some(dims) = fact.shape.0.as_mut().map(std::sync::Arc::make_mut) {
            for (axis, d) in dims.iter_mut().enumerate() {
                match d {
                    Dim::Sym(s) => {
                        let s = s.clone();
                        if let Some(&v) = cx.overrides.dims.get(&*s) {
                            cx.used_dims.insert(s.to_string());
                            *d = Dim::Known(v);
                            continue;
                        }
                        // A sum or product of symbols is known once each symbol in it is.
                        let symbols = d.symbols();
                        for x in &symbols {
                            if cx.overrides.dims.contains_key(x) {
                                cx.used_dims.insert(x.clone());
                            }
                        }
                        let dims = &cx.overrides.dims;
                        if let Ok(Some(v)) = crate::ir::evaluate(&s, &|x| dims.get(x).copied()) {
                            *d = Dim::Known(v);
                            continue;
                        }
                        let missing: Vec<String> = symbols
                            .iter()
                            .filter(|x| !dims.contains_key(*x))
                            .map(|x| format!("--dim {x}=N"))
                            .collect();
                        cx.diags.push(
                            Diagnostic::new(
                                codes::SYMBOLIC_DIM,
                                format!("input dim {axis} is symbolic `{s}`; fix it with {}", missing.join(" ")),
                            )
                            .at_tensor(&vi.name),
                        );
                    }
                    Dim::Unknown => cx.diags.push(
                        Diagnostic::new(
                            codes::UNKNOWN_DIM,
                            format!(
                                "input dim {axis} is missing, -1 or `?` (unknown); fix it with --input {}=…",
                                vi.name
                            ),
                        )
                        .at_tensor(&vi.name),
                    ),
                    Dim::Known(_) => {}
                }
            }
        }
    }
    Ok(fact)
}

fn type_fact(cx: &Cx, name: &str, tp: &onnx::TypeProto) -> Result<Fact, ReadError> {
    use onnx::type_proto::Value as T;
    Ok(match &tp.value {
        Some(T::TensorType(t)) => Fact::tensor(DType::from_onnx(t.elem_type), shape_of(cx, name, t.shape.as_ref())?),
        Some(T::SparseTensorType(t)) => Fact {
            value_type: ValueType::SparseTensor,
            dtype: DType::from_onnx(t.elem_type),
            shape: shape_of(cx, name, t.shape.as_ref())?,
        },
        Some(T::SequenceType(s)) => {
            let inner = match s.elem_type.as_deref() {
                Some(e) => type_fact(cx, name, e)?,
                None => Fact::default(),
            };
            Fact {
                value_type: ValueType::sequence(inner, None),
                dtype: None,
                shape: Shape::unknown(),
            }
        }
        Some(T::OptionalType(s)) => {
            let inner = match s.elem_type.as_deref() {
                Some(e) => type_fact(cx, name, e)?,
                None => Fact::default(),
            };
            Fact {
                value_type: ValueType::Optional(Box::new(inner)),
                dtype: None,
                shape: Shape::unknown(),
            }
        }
        // A map's element type is its values' (as ZipMap's output carries it), where they are
        // tensors: DictVectorizer gives a tensor of that type.
        Some(T::MapType(m)) => Fact {
            value_type: ValueType::Map(DType::from_onnx(m.key_type)),
            dtype: match m.value_type.as_deref().and_then(|v| v.value.as_ref()) {
                Some(T::TensorType(t)) => DType::from_onnx(t.elem_type),
                _ => None,
            },
            shape: Shape::unknown(),
        },
        None => Fact::default(),
    })
}

fn shape_of(cx: &Cx, name: &str, s: Option<&onnx::TensorShapeProto>) -> Result<Shape, ReadError> {
    use onnx::tensor_shape_proto::dimension::Value as D;
    let Some(s) = s else { return Ok(Shape::unknown()) };
    within_rank_limit(cx, name, s.dim.len())?;
    let mut dims = Vec::with_capacity(s.dim.len());
    for d in &s.dim {
        dims.push(match &d.value {
            Some(D::DimValue(v)) if *v >= 0 => Dim::Known(*v as u64),
            Some(D::DimValue(-1)) => Dim::Unknown,
            Some(D::DimValue(v)) => {
                return Err(cx.err(format!(
                    "tensor `{name}` declares dim {v}; only -1 (unknown) may be negative"
                )))
            }
            // `?` is how some exporters write "no name": naming it would make every `?` of
            // the model one size (an image's height its width).
            Some(D::DimParam(p)) if !p.is_empty() && p.trim() != "?" => Dim::param(p),
            _ => Dim::Unknown,
        });
    }
    Ok(Shape::of(dims))
}

/// Where a stored tensor's external file lives, for callers that copy it (split).
pub fn external_path(data: &TensorData) -> Option<&PathBuf> {
    match &data.storage {
        Storage::External { path, .. } => Some(path),
        _ => None,
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Texts that share a slot of the interner's table (same length and end bytes) still get
    /// their own names, and every lookup answers with the name of exactly its text.
    #[test]
    fn the_interner_keeps_texts_that_share_a_slot_apart() {
        let mut names = Interner::default();
        let texts = ["Relu", "Rexu", "", "axis", "Add", "Abd", "LayerNormalization", "Relu"];
        assert_eq!(Interner::slot("Relu"), Interner::slot("Rexu"));
        for _ in 0..3 {
            for t in texts {
                let n = names.get(t);
                assert_eq!(n.as_str(), t);
                assert_eq!(n, Name::from(t), "one name per text in the process");
            }
        }
    }

    /// Memory `prefault` went over is written afterwards without page faults: the kernel
    /// counts minor faults per thread (getrusage(2), `RUSAGE_THREAD`). Odd ends on purpose:
    /// the range starts and ends inside a page. Allowed: a few faults of the test's own.
    #[cfg(target_os = "linux")]
    #[test]
    fn prefaulted_memory_is_written_without_page_faults() {
        fn faults() -> i64 {
            // SAFETY: `getrusage` fills the struct it is given and keeps no pointer to it.
            unsafe {
                let mut u: libc::rusage = std::mem::zeroed();
                libc::getrusage(libc::RUSAGE_THREAD, &mut u);
                u.ru_minflt
            }
        }
        const LEN: usize = 8 << 20;
        let mut v: Vec<u8> = Vec::with_capacity(LEN + 3);
        let spare = &mut v.spare_capacity_mut()[3..];
        prefault(spare);
        let before = faults();
        for (i, b) in spare.iter_mut().enumerate() {
            *b = std::mem::MaybeUninit::new(i as u8);
        }
        let after = faults();
        let pages = (LEN / 4096) as i64;
        assert!(
            after - before < pages / 20,
            "{} faults writing {pages} prefaulted pages",
            after - before
        );
        // The contents written are the ones read back (populating mapped no other memory).
        // SAFETY: every byte from 3 on was written just above.
        let written = unsafe { std::slice::from_raw_parts(spare.as_ptr().cast::<u8>(), spare.len()) };
        assert!(written.iter().enumerate().all(|(i, &b)| b == i as u8));
    }
}
