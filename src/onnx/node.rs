//! The ONNX `NodeProto`, implemented by hand for its memory footprint.
//!
//! prost decodes a repeated field by pushing onto a `Vec`, and a `Vec`'s first allocation
//! holds four elements: a node with one attribute carried room for four 320-byte
//! `AttributeProto`s, and one with two inputs room for four names. On a 100k-node graph that
//! slack was half of the decoded tree, and every byte of it is memory the kernel must zero.
//! Here short repeated fields grow one element at a time. The wire format is the standard's.

use bytes::{Buf, BufMut};
use prost::encoding::{self, DecodeContext, WireType};
use prost::DecodeError;

use super::text::{merge_repeated, ProtoStr};
use super::{AttributeProto, StringStringEntryProto};

/// Field numbers of the standard's `NodeProto`.
mod field {
    pub const INPUT: u32 = 1;
    pub const OUTPUT: u32 = 2;
    pub const NAME: u32 = 3;
    pub const OP_TYPE: u32 = 4;
    pub const ATTRIBUTE: u32 = 5;
    pub const DOC_STRING: u32 = 6;
    pub const DOMAIN: u32 = 7;
    pub const OVERLOAD: u32 = 8;
    pub const METADATA_PROPS: u32 = 9;
}

/// `NodeProto`, field for field; the three fields analysis never reads are in `rare`.
#[derive(Clone, PartialEq, Default, Debug)]
pub struct NodeProto {
    pub input: Vec<ProtoStr>,
    pub output: Vec<ProtoStr>,
    pub name: ProtoStr,
    pub op_type: ProtoStr,
    pub domain: ProtoStr,
    pub attribute: Vec<AttributeProto>,
    /// Allocated only for a node that sets one of them: almost none do, and inline they were
    /// a third of every node's size.
    pub rare: Option<Box<NodeRare>>,
}

/// `doc_string`, `overload` and `metadata_props` of a `NodeProto`: kept so that exported
/// pieces carry them, never analysed.
#[derive(Clone, PartialEq, Default, Debug)]
pub struct NodeRare {
    pub doc_string: ProtoStr,
    pub overload: ProtoStr,
    pub metadata_props: Vec<StringStringEntryProto>,
}

impl NodeProto {
    fn rare_mut(&mut self) -> &mut NodeRare {
        self.rare.get_or_insert_with(Default::default)
    }
}

/// Below this length a repeated field grows by exactly one element (nodes have a handful of
/// inputs, outputs and attributes); beyond it, the usual doubling.
const EXACT_UP_TO: usize = 8;

pub(super) fn push_exact<T>(v: &mut Vec<T>, item: T) {
    if v.len() == v.capacity() && v.len() < EXACT_UP_TO {
        v.reserve_exact(1);
    }
    v.push(item);
}

/// One element of a repeated message field, decoded in its slot and dropped again if it fails.
/// Nodes and attributes are a few hundred bytes each: decoded on the stack and then pushed,
/// each was copied once more (libc's `memcpy` showed in profiles of large graphs).
pub(super) fn merge_messages<M: prost::Message + Default>(
    wire_type: WireType,
    v: &mut Vec<M>,
    buf: &mut impl Buf,
    ctx: DecodeContext,
) -> Result<(), DecodeError> {
    push_exact(v, M::default());
    let last = v.len() - 1; // the element just pushed
    let r = encoding::message::merge(wire_type, &mut v[last], buf, ctx);
    if r.is_err() {
        v.pop();
    }
    r
}

impl prost::Message for NodeProto {
    fn encode_raw(&self, buf: &mut impl BufMut) {
        for s in &self.input {
            s.encode_always(field::INPUT, buf);
        }
        for s in &self.output {
            s.encode_always(field::OUTPUT, buf);
        }
        self.name.encode(field::NAME, buf);
        self.op_type.encode(field::OP_TYPE, buf);
        encoding::message::encode_repeated(field::ATTRIBUTE, &self.attribute, buf);
        if let Some(r) = &self.rare {
            r.doc_string.encode(field::DOC_STRING, buf);
        }
        self.domain.encode(field::DOMAIN, buf);
        if let Some(r) = &self.rare {
            r.overload.encode(field::OVERLOAD, buf);
            encoding::message::encode_repeated(field::METADATA_PROPS, &r.metadata_props, buf);
        }
    }

    fn merge_field(
        &mut self,
        tag: u32,
        wire_type: WireType,
        buf: &mut impl Buf,
        ctx: DecodeContext,
    ) -> Result<(), DecodeError> {
        match tag {
            field::INPUT => merge_repeated(wire_type, &mut self.input, buf, ctx),
            field::OUTPUT => merge_repeated(wire_type, &mut self.output, buf, ctx),
            field::NAME => ProtoStr::merge(wire_type, buf, ctx).map(|s| self.name = s),
            field::OP_TYPE => ProtoStr::merge(wire_type, buf, ctx).map(|s| self.op_type = s),
            field::ATTRIBUTE => merge_messages(wire_type, &mut self.attribute, buf, ctx),
            field::DOC_STRING => ProtoStr::merge(wire_type, buf, ctx).map(|s| self.rare_mut().doc_string = s),
            field::DOMAIN => ProtoStr::merge(wire_type, buf, ctx).map(|s| self.domain = s),
            field::OVERLOAD => ProtoStr::merge(wire_type, buf, ctx).map(|s| self.rare_mut().overload = s),
            field::METADATA_PROPS => merge_messages(wire_type, &mut self.rare_mut().metadata_props, buf, ctx),
            _ => encoding::skip_field(wire_type, tag, buf, ctx),
        }
    }

    fn encoded_len(&self) -> usize {
        self.input
            .iter()
            .map(|s| s.encoded_len_always(field::INPUT))
            .sum::<usize>()
            + self
                .output
                .iter()
                .map(|s| s.encoded_len_always(field::OUTPUT))
                .sum::<usize>()
            + self.name.encoded_len(field::NAME)
            + self.op_type.encoded_len(field::OP_TYPE)
            + encoding::message::encoded_len_repeated(field::ATTRIBUTE, &self.attribute)
            + self.domain.encoded_len(field::DOMAIN)
            + self.rare.as_ref().map_or(0, |r| {
                r.doc_string.encoded_len(field::DOC_STRING)
                    + r.overload.encoded_len(field::OVERLOAD)
                    + encoding::message::encoded_len_repeated(field::METADATA_PROPS, &r.metadata_props)
            })
    }

    fn clear(&mut self) {
        *self = NodeProto::default();
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use bytes::Bytes;
    use prost::Message;

    /// The same node encoded field by field as the protobuf encoding guide lays out a
    /// message (key = field number << 3 | wire type; strings and messages length-delimited).
    #[test]
    fn decodes_the_standard_wire_layout() {
        let mut wire = Vec::new();
        for (tag, s) in [
            (1u32, "x"),
            (1, ""),
            (1, "w"),
            (2, "y"),
            (3, "conv_1"),
            (4, "Conv"),
            (7, ""),
        ] {
            encoding::encode_key(tag, WireType::LengthDelimited, &mut wire);
            encoding::encode_varint(s.len() as u64, &mut wire);
            wire.extend_from_slice(s.as_bytes());
        }
        let attr = AttributeProto {
            name: "group".into(),
            i: 2,
            r#type: 2,
            ..Default::default()
        };
        encoding::message::encode(5, &attr, &mut wire);
        // An unknown field (a later version of the standard) is skipped.
        encoding::encode_key(99, WireType::Varint, &mut wire);
        encoding::encode_varint(1, &mut wire);
        let n = NodeProto::decode(Bytes::from(wire)).expect("decodes");
        assert_eq!(n.input, ["x", "", "w"]);
        assert_eq!(n.output, ["y"]);
        assert_eq!((n.name.as_str(), n.op_type.as_str()), ("conv_1", "Conv"));
        assert_eq!(n.attribute, [attr]);
        assert!(n.attribute.capacity() == 1 && n.input.capacity() == 3, "no slack");
        let again = NodeProto::decode(Bytes::from(n.encode_to_vec())).expect("round trip");
        assert_eq!(again, n);
    }

    /// The fields analysis never reads still survive a decode and re-encode (field numbers 6,
    /// 8 and 9 of the standard's `NodeProto`), and cost nothing on a node without them.
    #[test]
    fn rare_fields_round_trip() {
        let mut wire = Vec::new();
        for (tag, s) in [(4u32, "Relu"), (6, "from line 12"), (8, "fast")] {
            encoding::encode_key(tag, WireType::LengthDelimited, &mut wire);
            encoding::encode_varint(s.len() as u64, &mut wire);
            wire.extend_from_slice(s.as_bytes());
        }
        let prop = StringStringEntryProto {
            key: "grade".into(),
            value: "A".into(),
        };
        encoding::message::encode(9, &prop, &mut wire);
        let n = NodeProto::decode(Bytes::from(wire.clone())).expect("decodes");
        let rare = n.rare.as_deref().expect("rare fields kept");
        assert_eq!(
            (rare.doc_string.as_str(), rare.overload.as_str()),
            ("from line 12", "fast")
        );
        assert_eq!(rare.metadata_props, [prop]);
        assert_eq!(n.encode_to_vec(), wire, "same bytes, same order");
        assert_eq!(n.encoded_len(), wire.len());
        let plain = NodeProto::decode(Bytes::from(wire[..6].to_vec())).expect("decodes");
        assert_eq!(plain.op_type, "Relu");
        assert!(plain.rare.is_none());
    }

    #[test]
    fn a_string_field_with_a_varint_wire_type_is_an_error() {
        let mut wire = Vec::new();
        encoding::encode_key(1, WireType::Varint, &mut wire);
        encoding::encode_varint(3, &mut wire);
        assert!(NodeProto::decode(Bytes::from(wire)).is_err());
    }
}
