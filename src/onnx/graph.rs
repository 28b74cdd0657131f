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

use bytes::{Buf, BufMut};
use prost::encoding::{self, DecodeContext, WireType};
use prost::DecodeError;

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
}

/// Decodes a `ModelProto` with node-list hints bounded by the file's size.
pub fn decode_model(bytes: bytes::Bytes) -> Result<super::ModelProto, DecodeError> {
    HINT_BUDGET.with(|b| b.set(bytes.len() / 2));
    let out = <super::ModelProto as prost::Message>::decode(bytes);
    HINT_BUDGET.with(|b| b.set(0));
    out
}

/// How many length-delimited field-1 entries follow in `wire`, which starts at the length of
/// the first one (its key already read). Stops at anything else or at a malformed length.
fn node_run_length(mut wire: &[u8]) -> usize {
    const NODE_KEY: u64 = (field::NODE as u64) << 3 | WireType::LengthDelimited as u64;
    let mut count = 0;
    while let Ok(len) = encoding::decode_varint(&mut wire) {
        let Ok(len) = usize::try_from(len) else { break };
        if len > wire.len() {
            break;
        }
        wire = &wire[len..];
        count += 1;
        if encoding::decode_varint(&mut wire) != Ok(NODE_KEY) {
            break;
        }
    }
    count
}

impl prost::Message for GraphProto {
    fn encode_raw(&self, buf: &mut impl BufMut) {
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
                if self.node.is_empty() && wire_type == WireType::LengthDelimited {
                    let run = HINT_BUDGET.with(|b| {
                        let run = if b.get() == 0 {
                            0
                        } else {
                            node_run_length(buf.chunk()).min(b.get())
                        };
                        b.set(b.get() - run);
                        run
                    });
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
        encoding::message::encoded_len_repeated(field::NODE, &self.node)
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
}
