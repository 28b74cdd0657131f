//! The ONNX `GraphProto`, implemented by hand to size its node list once.
//!
//! prost grows a repeated field by doubling: a 100k-node graph re-allocated its node list 15
//! times, and the copies touched about twice the list's final size (22 MB) in fresh memory.
//! Serialisers write a message's fields in field-number order, so the nodes (field 1) lie in
//! one run; at the first node the decoder counts that run ahead and reserves it exactly. The
//! count is only a capacity hint: a file laid out otherwise decodes the same, just slower.
//! Inside a nested graph the count can run past the graph's end into the enclosing graph's
//! nodes (the decoder cannot see where a nested message ends), so all hints of one decode
//! share a budget of what the file could hold (`decode_model`): a hostile file nesting graphs
//! cannot make each level reserve the whole run again.
//!
//! The first large node run of a decode (the main graph's, in any file written in field order)
//! is decoded on all cores: the run is cut at node boundaries into pieces of about equal bytes
//! and each piece decodes into its own slots of the node list. Every node goes through the
//! same `merge` with the same recursion context as in a sequential decode, so the result and
//! any error are the same; only the order in which nodes are visited differs.

use bytes::{Buf, BufMut};
use prost::encoding::{self, DecodeContext, WireType};
use prost::DecodeError;

use super::node::{plainly_sound, varint, NodeCheck, NodeRun};
use super::text::{encode_string, string_len};
use super::{NodeProto, SparseTensorProto, StringStringEntryProto, TensorProto, ValueInfoProto};

/// Field numbers of the standard's `GraphProto`.
mod field {
    pub const NODE: u32 = 1;
    pub const NAME: u32 = 2;
    pub const INITIALIZER: u32 = 5;
    pub const DOC_STRING: u32 = 10;
    pub const INPUT: u32 = 11;
    pub const OUTPUT: u32 = 12;
    pub const VALUE_INFO: u32 = 13;
    pub const SPARSE_INITIALIZER: u32 = 15;
    pub const METADATA_PROPS: u32 = 16;
}

/// `GraphProto`, field for field (`quantization_annotation`, which tilecut does not read, is
/// skipped like any unknown field).
#[derive(Clone, PartialEq, Default, Debug)]
pub struct GraphProto {
    /// The graph's first node run left in wire form, in a model read for import only
    /// (`decode_model_for_import`); its nodes come before those in `node`. `None` in any
    /// other decode: code that edits or writes graphs never meets one.
    pub node_run: Option<NodeRun>,
    pub node: Vec<NodeProto>,
    pub name: String,
    pub initializer: Vec<TensorProto>,
    pub sparse_initializer: Vec<SparseTensorProto>,
    pub doc_string: String,
    pub input: Vec<ValueInfoProto>,
    pub output: Vec<ValueInfoProto>,
    pub value_info: Vec<ValueInfoProto>,
    pub metadata_props: Vec<StringStringEntryProto>,
}

thread_local! {
    /// Node slots the current `decode_model` may still reserve ahead: one per two bytes of the
    /// file (the smallest node entry), which is what a full decode could allocate anyway.
    /// Zero outside `decode_model`: no hints, prost's growth.
    static HINT_BUDGET: std::cell::Cell<usize> = const { std::cell::Cell::new(0) };
    /// Whether the current `decode_model` may still split a node run across threads: once per
    /// decode, so that nested graphs decoded by a worker never start workers of their own.
    static SPLIT_ALLOWED: std::cell::Cell<bool> = const { std::cell::Cell::new(false) };
    /// Whether each piece of a split run gets an owner of its own (see `decode_run_split`):
    /// false for static bytes, whose slices take no reference count at all.
    static PIECE_OWNERS: std::cell::Cell<bool> = const { std::cell::Cell::new(true) };
    /// Whether the current decode may still keep a node run in wire form (`node_run`): once
    /// per `decode_model_for_import`, for the first run met, which is the main graph's in any
    /// file written in field order.
    static KEEP_RUN: std::cell::Cell<bool> = const { std::cell::Cell::new(false) };
}

/// Below this many nodes a run decodes on the calling thread: starting a thread costs about as
/// much as decoding a few hundred nodes.
const SPLIT_MIN_NODES: usize = 4096;
/// At most this many threads decode one run.
const SPLIT_MAX_THREADS: usize = 4;
/// The stack of a thread that decodes or imports part of a graph: as deep as the main
/// thread's, for nodes nesting graphs up to prost's recursion limit and import's depth limit.
pub const WORKER_STACK: usize = 8 << 20;

/// Decodes a `ModelProto` with node-list hints bounded by the file's size.
pub fn decode_model(bytes: bytes::Bytes) -> Result<super::ModelProto, DecodeError> {
    decode_model_with(bytes, false)
}

/// `decode_model`, told whether `bytes` are static (a map kept for the process's life): the
/// pieces decoded on other threads then share them as they are.
pub fn decode_model_with(bytes: bytes::Bytes, is_static: bool) -> Result<super::ModelProto, DecodeError> {
    decode_model_as(bytes, is_static, false)
}

/// `decode_model_with` for a reader that only imports the model: the main graph's node run is
/// checked node by node exactly as a full decode would (same faults, same messages) but kept
/// in wire form (`GraphProto::node_run`), each node checked field by field (`NodeCheck`).
pub fn decode_model_for_import(bytes: bytes::Bytes, is_static: bool) -> Result<super::ModelProto, DecodeError> {
    decode_model_as(bytes, is_static, true)
}

fn decode_model_as(bytes: bytes::Bytes, is_static: bool, keep_run: bool) -> Result<super::ModelProto, DecodeError> {
    HINT_BUDGET.with(|b| b.set(bytes.len() / 2));
    SPLIT_ALLOWED.with(|s| s.set(true));
    PIECE_OWNERS.with(|p| p.set(!is_static));
    KEEP_RUN.with(|k| k.set(keep_run));
    let out = <super::ModelProto as prost::Message>::decode(bytes);
    HINT_BUDGET.with(|b| b.set(0));
    SPLIT_ALLOWED.with(|s| s.set(false));
    PIECE_OWNERS.with(|p| p.set(true));
    KEEP_RUN.with(|k| k.set(false));
    out
}

const NODE_KEY: u64 = (field::NODE as u64) << 3 | WireType::LengthDelimited as u64;

/// The run of length-delimited field-1 entries at the start of `wire`, which starts at the
/// length of the first one (its key already read): how many there are and where the last one
/// ends. Stops at anything else or at a malformed length.
fn node_run(mut wire: &[u8]) -> (usize, usize) {
    let total = wire.len();
    let mut count = 0;
    let mut end = 0;
    while let Some(len) = varint(&mut wire) {
        let Ok(len) = usize::try_from(len) else { break };
        if len > wire.len() {
            break;
        }
        wire = &wire[len..];
        count += 1;
        end = total - wire.len();
        if varint(&mut wire) != Some(NODE_KEY) {
            break;
        }
    }
    (count, end)
}

/// Where `run` (a node run as `node_run` measured it) is cut into `pieces` parts of about
/// equal bytes: for each part after the first, its first node's index and the offset of that
/// node's length. Never cuts a run into empty parts.
fn run_cuts(run: &[u8], count: usize, pieces: usize) -> Vec<(usize, usize)> {
    let mut cuts = Vec::with_capacity(pieces.saturating_sub(1));
    let mut wire = run;
    let mut index = 0;
    while cuts.len() + 1 < pieces && index < count {
        let at = run.len() - wire.len();
        if index > 0 && at * pieces >= run.len() * (cuts.len() + 1) {
            cuts.push((index, at));
        }
        // The run was measured: each length and key decodes and each length fits.
        let Some(len) = varint(&mut wire) else {
            break;
        };
        let Some(rest) = usize::try_from(len).ok().and_then(|l| wire.get(l..)) else {
            break;
        };
        wire = rest;
        index += 1;
        if index < count && varint(&mut wire).is_none() {
            break;
        }
    }
    cuts
}

/// Decodes the `slots.len()` nodes of `piece` (length-prefixed nodes joined by node keys) into
/// their slots, each exactly as the sequential decode would.
fn decode_piece(
    slots: &mut [NodeProto],
    mut piece: bytes::Bytes,
    _at: usize,
    ctx: DecodeContext,
) -> Result<(), DecodeError> {
    let n = slots.len();
    for (i, slot) in slots.iter_mut().enumerate() {
        encoding::message::merge(WireType::LengthDelimited, slot, &mut piece, ctx.clone())?;
        if i + 1 < n && encoding::decode_varint(&mut piece)? != NODE_KEY {
            return Err(DecodeError::new("node run changed while decoding"));
        }
    }
    Ok(())
}

/// `decode_piece` for a run kept in wire form: each node is checked as its decode would check
/// it (`NodeCheck`), and its slot gets the node's span (offset in the run, length). `at` is
/// the piece's offset in the run.
fn check_piece(
    slots: &mut [(u32, u32)],
    piece: bytes::Bytes,
    at: usize,
    ctx: DecodeContext,
) -> Result<(), DecodeError> {
    let n = slots.len();
    let total = piece.len();
    let mut wire: &[u8] = &piece;
    for (i, slot) in slots.iter_mut().enumerate() {
        let mut peek = wire;
        let len = varint(&mut peek).ok_or_else(|| DecodeError::new("invalid varint"))?;
        let start = at + (total - peek.len());
        match usize::try_from(len).ok().and_then(|l| peek.split_at_checked(l)) {
            // The fast judgment first; a node it is unsure of gets the full check, which
            // raises the fault a decode would.
            Some((node, rest)) if plainly_sound(node) => wire = rest,
            _ => {
                let mut rest = piece.slice(total - wire.len()..);
                encoding::message::merge(WireType::LengthDelimited, &mut NodeCheck, &mut rest, ctx.clone())?;
                wire = &piece[total - rest.len()..];
            }
        }
        // The run fits in u32 offsets (checked before a run is kept), and the node's length
        // was read (or the check consumed exactly `len` bytes of payload).
        let span = (u32::try_from(start), u32::try_from(len));
        let (Ok(start), Ok(len)) = span else {
            return Err(DecodeError::new("node run too long to keep"));
        };
        *slot = (start, len);
        if i + 1 < n && varint(&mut wire) != Some(NODE_KEY) {
            return Err(DecodeError::new("node run changed while decoding"));
        }
    }
    Ok(())
}

/// How many runs were decoded split, so that tests can tell the split path ran.
#[cfg(test)]
static SPLIT_RUNS: std::sync::atomic::AtomicUsize = std::sync::atomic::AtomicUsize::new(0);

/// Slots of the node list and the bytes of the nodes that go in them, with the offset of those
/// bytes in the run.
type Piece<'a, T> = (&'a mut [T], bytes::Bytes, usize);

/// What decodes one piece into its slots (`decode_piece`, `check_piece`).
type PieceFn<T> = fn(&mut [T], bytes::Bytes, usize, DecodeContext) -> Result<(), DecodeError>;

/// Decodes the run of `count` nodes whose `len` bytes start `buf` on up to `threads` threads,
/// appending them to `nodes`. Falls back to one thread where no other can be started.
fn decode_run_split(
    nodes: &mut Vec<NodeProto>,
    buf: &mut impl Buf,
    count: usize,
    len: usize,
    threads: usize,
    ctx: DecodeContext,
) -> Result<(), DecodeError> {
    #[cfg(test)]
    SPLIT_RUNS.fetch_add(1, std::sync::atomic::Ordering::Relaxed);
    let run = buf.copy_to_bytes(len);
    let start = nodes.len();
    nodes.resize_with(start + count, NodeProto::default);
    decode_pieces(&mut nodes[start..], &run, threads, ctx, decode_piece)
}

/// Checks the run of `count` nodes whose `len` bytes start `buf` on up to `threads` threads,
/// and keeps it in wire form.
fn keep_run(
    buf: &mut impl Buf,
    count: usize,
    len: usize,
    threads: usize,
    ctx: DecodeContext,
) -> Result<NodeRun, DecodeError> {
    #[cfg(test)]
    if threads > 1 {
        SPLIT_RUNS.fetch_add(1, std::sync::atomic::Ordering::Relaxed);
    }
    let run = buf.copy_to_bytes(len);
    let mut spans = vec![(0u32, 0u32); count];
    decode_pieces(&mut spans, &run, threads, ctx, check_piece)?;
    Ok(NodeRun::of_decoded(run, spans))
}

/// Cuts `run` (`slots.len()` nodes) into up to `threads` pieces of about equal bytes and hands
/// each piece with its slots to `decode`, one piece per thread.
fn decode_pieces<T: Send>(
    slots: &mut [T],
    run: &bytes::Bytes,
    threads: usize,
    ctx: DecodeContext,
    decode: PieceFn<T>,
) -> Result<(), DecodeError> {
    let count = slots.len();
    let cuts = run_cuts(run, count, threads);
    let mut slots = slots;
    // Each piece shares the file's bytes through an owner of its own, so that the reference
    // counts the pieces' strings take do not all land on one contended counter.
    let owners = PIECE_OWNERS.with(|p| p.get());
    let mut pieces = Vec::with_capacity(cuts.len() + 1);
    let mut prev = (0, 0);
    for &(index, at) in cuts.iter().chain(std::iter::once(&(count, run.len()))) {
        let (head, tail) = std::mem::take(&mut slots).split_at_mut(index - prev.0);
        slots = tail;
        // A piece after the first starts at a node key's end, so its bytes begin with a length;
        // a piece before the last ends with the next piece's key, which it does not read.
        let bytes = if owners {
            bytes::Bytes::from_owner(run.slice(prev.1..at))
        } else {
            run.slice(prev.1..at)
        };
        pieces.push((head, bytes, prev.1));
        prev = (index, at);
    }
    // A piece whose worker cannot start is decoded here after the first; the cells hand each
    // piece to exactly one thread.
    let cells: Vec<std::sync::Mutex<Option<Piece<T>>>> =
        pieces.into_iter().map(|p| std::sync::Mutex::new(Some(p))).collect();
    let run_piece = |cell: &std::sync::Mutex<Option<Piece<T>>>, ctx: DecodeContext| -> Result<(), DecodeError> {
        // `take` cannot panic, so a poisoned lock still holds a whole piece or none.
        let piece = cell.lock().unwrap_or_else(|e| e.into_inner()).take();
        match piece {
            Some((slots, bytes, at)) => decode(slots, bytes, at, ctx),
            None => Ok(()),
        }
    };
    std::thread::scope(|scope| {
        let workers: Vec<_> = cells
            .iter()
            .skip(1)
            .map(|cell| {
                let ctx = ctx.clone();
                std::thread::Builder::new()
                    .stack_size(WORKER_STACK)
                    .spawn_scoped(scope, move || run_piece(cell, ctx))
                    .ok()
            })
            .collect();
        let mut result = match cells.first() {
            Some(cell) => run_piece(cell, ctx.clone()),
            None => Ok(()),
        };
        for (cell, worker) in cells.iter().skip(1).zip(workers) {
            let r = match worker {
                // A panic is a bug, raised here as one thread would have raised it.
                Some(handle) => handle.join().unwrap_or_else(|p| std::panic::resume_unwind(p)),
                None => run_piece(cell, ctx.clone()),
            };
            // Pieces are checked in file order: the first error is the one a sequential decode
            // meets first.
            if result.is_ok() {
                result = r;
            }
        }
        result
    })
}

impl prost::Message for GraphProto {
    fn encode_raw(&self, buf: &mut impl BufMut) {
        if let Some(run) = &self.node_run {
            run.encode(field::NODE, buf);
        }
        encoding::message::encode_repeated(field::NODE, &self.node, buf);
        encode_string(field::NAME, &self.name, buf);
        encoding::message::encode_repeated(field::INITIALIZER, &self.initializer, buf);
        encode_string(field::DOC_STRING, &self.doc_string, buf);
        encoding::message::encode_repeated(field::INPUT, &self.input, buf);
        encoding::message::encode_repeated(field::OUTPUT, &self.output, buf);
        encoding::message::encode_repeated(field::VALUE_INFO, &self.value_info, buf);
        encoding::message::encode_repeated(field::SPARSE_INITIALIZER, &self.sparse_initializer, buf);
        encoding::message::encode_repeated(field::METADATA_PROPS, &self.metadata_props, buf);
    }

    fn merge_field(
        &mut self,
        tag: u32,
        wire_type: WireType,
        buf: &mut impl Buf,
        ctx: DecodeContext,
    ) -> Result<(), DecodeError> {
        match tag {
            field::NODE => {
                if self.node.is_empty() && self.node_run.is_none() && wire_type == WireType::LengthDelimited {
                    let budget = HINT_BUDGET.with(|b| b.get());
                    let (count, len) = if budget == 0 { (0, 0) } else { node_run(buf.chunk()) };
                    let threads = || {
                        std::thread::available_parallelism()
                            .map_or(1, |n| n.get())
                            .min(SPLIT_MAX_THREADS)
                    };
                    if count > 0 && u32::try_from(len).is_ok() && KEEP_RUN.with(|k| k.replace(false)) {
                        HINT_BUDGET.with(|b| b.set(budget.saturating_sub(count)));
                        let split = count >= SPLIT_MIN_NODES && SPLIT_ALLOWED.with(|s| s.replace(false));
                        let threads = if split { threads() } else { 1 };
                        self.node_run = Some(keep_run(buf, count, len, threads, ctx)?);
                        return Ok(());
                    }
                    if count >= SPLIT_MIN_NODES && SPLIT_ALLOWED.with(|s| s.replace(false)) && threads() > 1 {
                        // The run lies within the file (`node_run` checked each length), so
                        // its count is within the budget.
                        HINT_BUDGET.with(|b| b.set(budget.saturating_sub(count)));
                        self.node.reserve_exact(count);
                        return decode_run_split(&mut self.node, buf, count, len, threads(), ctx);
                    }
                    let run = count.min(budget);
                    HINT_BUDGET.with(|b| b.set(budget - run));
                    self.node.reserve_exact(run);
                }
                super::node::merge_messages(wire_type, &mut self.node, buf, ctx)
            }
            field::NAME => encoding::string::merge(wire_type, &mut self.name, buf, ctx),
            field::INITIALIZER => encoding::message::merge_repeated(wire_type, &mut self.initializer, buf, ctx),
            field::DOC_STRING => encoding::string::merge(wire_type, &mut self.doc_string, buf, ctx),
            field::INPUT => encoding::message::merge_repeated(wire_type, &mut self.input, buf, ctx),
            field::OUTPUT => encoding::message::merge_repeated(wire_type, &mut self.output, buf, ctx),
            field::VALUE_INFO => encoding::message::merge_repeated(wire_type, &mut self.value_info, buf, ctx),
            field::SPARSE_INITIALIZER => {
                encoding::message::merge_repeated(wire_type, &mut self.sparse_initializer, buf, ctx)
            }
            field::METADATA_PROPS => encoding::message::merge_repeated(wire_type, &mut self.metadata_props, buf, ctx),
            _ => encoding::skip_field(wire_type, tag, buf, ctx),
        }
    }

    fn encoded_len(&self) -> usize {
        self.node_run.as_ref().map_or(0, |r| r.encoded_len(field::NODE))
            + encoding::message::encoded_len_repeated(field::NODE, &self.node)
            + string_len(field::NAME, &self.name)
            + encoding::message::encoded_len_repeated(field::INITIALIZER, &self.initializer)
            + string_len(field::DOC_STRING, &self.doc_string)
            + encoding::message::encoded_len_repeated(field::INPUT, &self.input)
            + encoding::message::encoded_len_repeated(field::OUTPUT, &self.output)
            + encoding::message::encoded_len_repeated(field::VALUE_INFO, &self.value_info)
            + encoding::message::encoded_len_repeated(field::SPARSE_INITIALIZER, &self.sparse_initializer)
            + encoding::message::encoded_len_repeated(field::METADATA_PROPS, &self.metadata_props)
    }

    fn clear(&mut self) {
        *self = GraphProto::default();
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use bytes::Bytes;
    use prost::Message;

    fn node(op: &str, out: &str) -> NodeProto {
        NodeProto {
            op_type: op.into(),
            output: vec![out.into()],
            ..Default::default()
        }
    }

    #[test]
    fn the_node_run_is_reserved_exactly_and_round_trips() {
        let g = GraphProto {
            node: (0..100).map(|i| node("Relu", &format!("y{i}"))).collect(),
            name: "g".into(),
            ..Default::default()
        };
        let m = super::super::ModelProto {
            graph: Some(g.clone()),
            ..Default::default()
        };
        let d = decode_model(Bytes::from(m.encode_to_vec())).expect("decodes");
        let d = d.graph.expect("graph");
        assert_eq!(d, g);
        assert_eq!(d.node.capacity(), 100);
    }

    /// A subgraph as the last attribute of a node, followed by the enclosing graph's other
    /// nodes: the subgraph's run scan reads on into them. The hints of one decode never add up
    /// to more node slots than the file could hold.
    #[test]
    fn hints_in_nested_graphs_stay_within_the_files_budget() {
        use super::super::AttributeProto;
        let mut inner = GraphProto::default();
        for level in 0..30 {
            let mut carrier = node("If", &format!("c{level}"));
            // `g` is the attribute's last field written (no `type`), so the subgraph's bytes
            // are followed directly by the enclosing graph's next node.
            carrier.attribute.push(AttributeProto {
                name: "then_branch".into(),
                g: Some(Box::new(inner)),
                ..Default::default()
            });
            let mut nodes = vec![carrier];
            nodes.extend((0..100).map(|i| node("Relu", &format!("l{level}_{i}"))));
            inner = GraphProto {
                node: nodes,
                ..Default::default()
            };
        }
        let m = super::super::ModelProto {
            graph: Some(inner),
            ..Default::default()
        };
        let wire = m.encode_to_vec();
        let d = decode_model(Bytes::from(wire.clone())).expect("decodes");
        fn slots(g: &GraphProto) -> usize {
            g.node.capacity()
                + g.node
                    .iter()
                    .flat_map(|n| n.attribute.iter())
                    .filter_map(|a| a.g.as_deref())
                    .map(slots)
                    .sum::<usize>()
        }
        let graph = d.graph.expect("graph");
        assert_eq!(graph.node.len(), 101);
        // The budget, plus what ordinary doubling adds once it is spent (≤ 2 per real node).
        let real = 30 * 101;
        let bound = wire.len() / 2 + 2 * real;
        assert!(slots(&graph) <= bound, "{} slots, bound {bound}", slots(&graph));
    }

    /// Nodes interleaved with other fields (allowed by the encoding guide: fields may come in
    /// any order and repeated ones may be split) decode all the same.
    #[test]
    fn nodes_split_by_other_fields_decode_in_order() {
        let mut wire = Vec::new();
        encoding::message::encode(1, &node("A", "a"), &mut wire);
        encoding::string::encode(2, &"g".to_string(), &mut wire);
        encoding::message::encode(1, &node("B", "b"), &mut wire);
        let d = GraphProto::decode(Bytes::from(wire)).expect("decodes");
        let ops: Vec<&str> = d.node.iter().map(|n| n.op_type.as_str()).collect();
        assert_eq!(ops, ["A", "B"]);
        assert_eq!(d.name, "g");
    }

    #[test]
    fn a_truncated_node_run_is_an_error_not_a_panic() {
        let g = GraphProto {
            node: (0..10).map(|i| node("Relu", &format!("y{i}"))).collect(),
            ..Default::default()
        };
        let wire = g.encode_to_vec();
        // Cuts inside a node (a cut between two nodes leaves a valid, shorter graph).
        for cut in [1, 3, wire.len() - 1] {
            assert!(
                GraphProto::decode(Bytes::copy_from_slice(&wire[..cut])).is_err(),
                "cut {cut}"
            );
        }
    }

    /// A graph over the split threshold: nodes with attributes, empty optional inputs and, at
    /// both ends and in the middle, an `If` carrying a subgraph.
    fn large_model(nodes: usize) -> super::super::ModelProto {
        use super::super::AttributeProto;
        let mut list = Vec::with_capacity(nodes);
        for i in 0..nodes {
            let mut n = node(if i % 3 == 0 { "Conv" } else { "Relu" }, &format!("t{i}"));
            n.name = format!("n{i}").into();
            n.input = vec![format!("t{}", i.saturating_sub(1)).into(), "".into()];
            n.attribute.push(AttributeProto {
                name: "k".into(),
                ints: vec![i as i64, 3],
                r#type: 7,
                ..Default::default()
            });
            if i == 0 || i == nodes / 2 || i + 1 == nodes {
                let body = GraphProto {
                    node: (0..5).map(|j| node("Neg", &format!("b{i}_{j}"))).collect(),
                    ..Default::default()
                };
                n.attribute.push(AttributeProto {
                    name: "then_branch".into(),
                    g: Some(Box::new(body)),
                    r#type: 5,
                    ..Default::default()
                });
            }
            list.push(n);
        }
        super::super::ModelProto {
            ir_version: 9,
            graph: Some(GraphProto {
                node: list,
                name: "main".into(),
                ..Default::default()
            }),
            ..Default::default()
        }
    }

    /// A large model's wire form with node names `n100` and `n7000` (in the first and second
    /// halves) made invalid UTF-8: the later alone, the earlier alone, both.
    fn name_faults(wire: &[u8]) -> Vec<Vec<u8>> {
        let find = |needle: &[u8]| wire.windows(needle.len()).position(|w| w == needle).expect("present");
        let early = find(b"n100\x22") + 1;
        let late = find(b"n7000\x22") + 1;
        [vec![late], vec![early], vec![early, late]]
            .into_iter()
            .map(|faults| {
                let mut bad = wire.to_vec();
                for at in faults {
                    bad[at] = 0xff;
                }
                bad
            })
            .collect()
    }

    fn split_runs() -> usize {
        SPLIT_RUNS.load(std::sync::atomic::Ordering::Relaxed)
    }

    #[test]
    fn a_large_run_decodes_split_exactly_as_encoded() {
        let m = large_model(3 * SPLIT_MIN_NODES);
        let wire = Bytes::from(m.encode_to_vec());
        let before = split_runs();
        let d = decode_model(wire.clone()).expect("decodes");
        if std::thread::available_parallelism().map_or(1, |n| n.get()) > 1 {
            assert!(split_runs() > before, "the run was not split");
        }
        assert_eq!(d, m);
        // And as the sequential decode (prost's own entry point never splits) has it.
        assert_eq!(d, super::super::ModelProto::decode(wire.clone()).expect("decodes"));

        // From static bytes (a map kept for the process's life), the pieces share the bytes
        // without owners of their own: the same tree, every string a slice of those bytes.
        let leaked: &'static [u8] = Box::leak(wire.to_vec().into_boxed_slice());
        let before = split_runs();
        let s = decode_model_with(Bytes::from_static(leaked), true).expect("decodes");
        if std::thread::available_parallelism().map_or(1, |n| n.get()) > 1 {
            assert!(split_runs() > before, "the run was not split");
        }
        assert_eq!(s, m);
        let span = leaked.as_ptr_range();
        let graph = s.graph.as_ref().expect("graph");
        for n in [&graph.node[0], &graph.node[graph.node.len() - 1]] {
            assert!(
                span.contains(&n.name.as_ptr()),
                "`{}` is not a slice of the file",
                n.name
            );
        }
        // The next decode on this thread shares through owners again.
        assert!(PIECE_OWNERS.with(|p| p.get()));
    }

    /// A fault in any piece is the same error, word for word, as the sequential decode's; with
    /// faults in two pieces, the first in file order.
    #[test]
    fn a_fault_in_a_split_run_is_the_sequential_error() {
        let m = large_model(2 * SPLIT_MIN_NODES);
        let wire = m.encode_to_vec();
        for bad in name_faults(&wire) {
            let bad = Bytes::from(bad);
            let split = decode_model(bad.clone()).expect_err("invalid UTF-8");
            let sequential = super::super::ModelProto::decode(bad).expect_err("invalid UTF-8");
            assert_eq!(split.to_string(), sequential.to_string());
        }
        // A run truncated inside its last node is shorter than measured: not split, an error.
        let cut = Bytes::copy_from_slice(&wire[..wire.len() - 3]);
        assert!(decode_model(cut).is_err());
    }

    /// A model read for import keeps its main node run in wire form: the same nodes, field for
    /// field, as the full decode, whether the run is split across threads or not, from shared or
    /// static bytes; and the graph writes back to the same bytes.
    #[test]
    fn a_run_kept_in_wire_form_holds_the_full_decodes_nodes() {
        for nodes in [7, 3 * SPLIT_MIN_NODES] {
            let m = large_model(nodes);
            let wire = Bytes::from(m.encode_to_vec());
            let leaked: &'static [u8] = Box::leak(wire.to_vec().into_boxed_slice());
            for (bytes, is_static) in [(wire.clone(), false), (Bytes::from_static(leaked), true)] {
                let before = split_runs();
                let d = decode_model_for_import(bytes, is_static).expect("decodes");
                if nodes > SPLIT_MIN_NODES && std::thread::available_parallelism().map_or(1, |n| n.get()) > 1 {
                    assert!(split_runs() > before, "the run was not split");
                }
                let g = d.graph.as_ref().expect("graph");
                let run = g.node_run.as_ref().expect("run kept");
                assert!(g.node.is_empty());
                let want = &m.graph.as_ref().expect("graph").node;
                assert_eq!(run.len(), want.len());
                for (w, n) in run.nodes().zip(want) {
                    assert_eq!(&w.decode().expect("decodes"), n);
                    let v = w.view();
                    assert_eq!((v.name, v.op_type, v.domain), (n.name.as_str(), n.op_type.as_str(), ""));
                    assert_eq!(
                        v.inputs.as_slice(),
                        n.input.iter().map(|s| s.as_str()).collect::<Vec<_>>()
                    );
                    assert_eq!(
                        v.outputs.as_slice(),
                        n.output.iter().map(|s| s.as_str()).collect::<Vec<_>>()
                    );
                    let attrs: Vec<_> = v.attributes().map(|a| a.expect("decodes")).collect();
                    assert_eq!(attrs, n.attribute);
                }
                assert_eq!(d.encode_to_vec(), wire, "written back byte for byte");
                assert_eq!(d.encoded_len(), wire.len());
            }
            // The next decode on this thread is a full one again.
            assert!(!KEEP_RUN.with(|k| k.get()));
        }
    }

    /// Checking a node run instead of decoding it meets the same faults with the same words,
    /// the first in file order: invalid UTF-8 in a name, a string field written as a varint, an
    /// attribute whose field has the wrong wire type, a node cut short.
    #[test]
    fn a_fault_in_a_kept_run_is_the_full_decodes_error() {
        let m = large_model(2 * SPLIT_MIN_NODES);
        let wire = m.encode_to_vec();
        let find = |needle: &[u8]| wire.windows(needle.len()).position(|w| w == needle).expect("present");
        let mut cases = name_faults(&wire);
        // Node `n5`'s name key (field 3, length-delimited = 0x1a) turned into a varint key
        // (0x18): its length byte is then read as the varint.
        let mut varint = wire.clone();
        let name = find(b"\x1a\x02n5\x22");
        varint[name] = 0x18;
        cases.push(varint);
        // The `ints` attribute field (8, packed = 0x42) of the first node as a 64-bit field.
        let mut attr = wire.clone();
        let ints = find(b"\x42\x02\x00\x03");
        attr[ints] = 0x41;
        cases.push(attr);
        cases.push(wire[..wire.len() - 3].to_vec());
        for bad in cases {
            let bad = Bytes::from(bad);
            let kept = decode_model_for_import(bad.clone(), false).expect_err("faulty");
            let full = super::super::ModelProto::decode(bad).expect_err("faulty");
            assert_eq!(kept.to_string(), full.to_string());
        }
    }

    #[test]
    fn runs_are_cut_at_node_boundaries_into_even_pieces() {
        let g = GraphProto {
            node: (0..100).map(|i| node("Relu", &format!("y{i}"))).collect(),
            ..Default::default()
        };
        let wire = g.encode_to_vec();
        // The run starts after the first key.
        let run = &wire[1..];
        let (count, end) = node_run(run);
        assert_eq!((count, end), (100, run.len()));
        for pieces in 1..=5 {
            let cuts = run_cuts(run, count, pieces);
            assert_eq!(cuts.len(), pieces - 1);
            let mut prev = (0, 0);
            for &(index, at) in &cuts {
                assert!(index > prev.0 && at > prev.1, "{cuts:?}");
                // Each cut is the start of node `index`'s length, right after its key.
                assert_eq!(run[at - 1], NODE_KEY as u8);
                let nodes: Vec<NodeProto> = g.node[index..].to_vec();
                let rest = GraphProto {
                    node: nodes,
                    ..Default::default()
                }
                .encode_to_vec();
                assert_eq!(&run[at..], &rest[1..]);
                prev = (index, at);
            }
            // Pieces of about equal bytes: none more than one node off an even share.
            let mut bounds: Vec<usize> = cuts.iter().map(|c| c.1).collect();
            bounds.insert(0, 0);
            bounds.push(run.len());
            let node_bytes = run.len() / count + 2;
            for w in bounds.windows(2) {
                let share = run.len() / pieces;
                assert!((w[1] - w[0]).abs_diff(share) <= node_bytes, "{bounds:?}");
            }
        }
        // More pieces than nodes: one per node at most.
        let two = &GraphProto {
            node: g.node[..2].to_vec(),
            ..Default::default()
        }
        .encode_to_vec()[1..];
        assert_eq!(run_cuts(two, 2, 4).len(), 1);
    }
}
