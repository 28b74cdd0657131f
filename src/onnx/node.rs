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

/// `NodeProto`, field for field.
#[derive(Clone, PartialEq, Default, Debug)]
pub struct NodeProto {
    pub input: Vec<String>,
    pub output: Vec<String>,
    pub name: String,
    pub op_type: String,
    pub domain: String,
    pub overload: String,
    pub attribute: Vec<AttributeProto>,
    pub doc_string: String,
    pub metadata_props: Vec<StringStringEntryProto>,
}

/// Below this length a repeated field grows by exactly one element (nodes have a handful of
/// inputs, outputs and attributes); beyond it, the usual doubling.
const EXACT_UP_TO: usize = 8;

fn push_exact<T>(v: &mut Vec<T>, item: T) {
    if v.len() == v.capacity() && v.len() < EXACT_UP_TO {
        v.reserve_exact(1);
    }
    v.push(item);
}

fn merge_strings(
    wire_type: WireType,
    v: &mut Vec<String>,
    buf: &mut impl Buf,
    ctx: DecodeContext,
) -> Result<(), DecodeError> {
    let mut s = String::new();
    encoding::string::merge(wire_type, &mut s, buf, ctx)?;
    push_exact(v, s);
    Ok(())
}

fn merge_messages<M: prost::Message + Default>(
    wire_type: WireType,
    v: &mut Vec<M>,
    buf: &mut impl Buf,
    ctx: DecodeContext,
) -> Result<(), DecodeError> {
    let mut m = M::default();
    encoding::message::merge(wire_type, &mut m, buf, ctx)?;
    push_exact(v, m);
    Ok(())
}

/// A proto3 string field: written only when not empty (shared by the hand-written messages).
pub(super) fn encode_string(tag: u32, s: &String, buf: &mut impl BufMut) {
    if !s.is_empty() {
        encoding::string::encode(tag, s, buf);
    }
}

pub(super) fn string_len(tag: u32, s: &String) -> usize {
    if s.is_empty() {
        0
    } else {
        encoding::string::encoded_len(tag, s)
    }
}

impl prost::Message for NodeProto {
    fn encode_raw(&self, buf: &mut impl BufMut) {
        encoding::string::encode_repeated(field::INPUT, &self.input, buf);
        encoding::string::encode_repeated(field::OUTPUT, &self.output, buf);
        encode_string(field::NAME, &self.name, buf);
        encode_string(field::OP_TYPE, &self.op_type, buf);
        encoding::message::encode_repeated(field::ATTRIBUTE, &self.attribute, buf);
        encode_string(field::DOC_STRING, &self.doc_string, buf);
        encode_string(field::DOMAIN, &self.domain, buf);
        encode_string(field::OVERLOAD, &self.overload, buf);
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
            field::INPUT => merge_strings(wire_type, &mut self.input, buf, ctx),
            field::OUTPUT => merge_strings(wire_type, &mut self.output, buf, ctx),
            field::NAME => encoding::string::merge(wire_type, &mut self.name, buf, ctx),
            field::OP_TYPE => encoding::string::merge(wire_type, &mut self.op_type, buf, ctx),
            field::ATTRIBUTE => merge_messages(wire_type, &mut self.attribute, buf, ctx),
            field::DOC_STRING => encoding::string::merge(wire_type, &mut self.doc_string, buf, ctx),
            field::DOMAIN => encoding::string::merge(wire_type, &mut self.domain, buf, ctx),
            field::OVERLOAD => encoding::string::merge(wire_type, &mut self.overload, buf, ctx),
            field::METADATA_PROPS => merge_messages(wire_type, &mut self.metadata_props, buf, ctx),
            _ => encoding::skip_field(wire_type, tag, buf, ctx),
        }
    }

    fn encoded_len(&self) -> usize {
        encoding::string::encoded_len_repeated(field::INPUT, &self.input)
            + encoding::string::encoded_len_repeated(field::OUTPUT, &self.output)
            + string_len(field::NAME, &self.name)
            + string_len(field::OP_TYPE, &self.op_type)
            + encoding::message::encoded_len_repeated(field::ATTRIBUTE, &self.attribute)
            + string_len(field::DOC_STRING, &self.doc_string)
            + string_len(field::DOMAIN, &self.domain)
            + string_len(field::OVERLOAD, &self.overload)
            + encoding::message::encoded_len_repeated(field::METADATA_PROPS, &self.metadata_props)
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

    #[test]
    fn a_string_field_with_a_varint_wire_type_is_an_error() {
        let mut wire = Vec::new();
        encoding::encode_key(1, WireType::Varint, &mut wire);
        encoding::encode_varint(3, &mut wire);
        assert!(NodeProto::decode(Bytes::from(wire)).is_err());
    }
}
