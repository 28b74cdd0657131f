//! The ONNX `NodeProto`, implemented by hand for its memory footprint.
//!
//! prost decodes a repeated field by pushing onto a `Vec`, and a `Vec`'s first allocation
//! holds four elements: a node with one attribute carried room for four 320-byte
//! `AttributeProto`s, and one with two inputs room for four names. On a 100k-node graph that
//! slack was half of the decoded tree, and every byte of it is memory the kernel must zero.
//! Here short repeated fields grow one element at a time. The wire format is the standard's.

use bytes::{Buf, BufMut, Bytes};
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

/// Checks a node's wire form field by field exactly as `NodeProto`'s decode does (the same
/// decoders, the same faults), keeping nothing: what a node run kept in wire form goes
/// through. Attributes and metadata entries are decoded and dropped; strings are only
/// checked, without a list to hold them.
#[derive(Debug, Default)]
pub(super) struct NodeCheck;

impl prost::Message for NodeCheck {
    fn encode_raw(&self, _buf: &mut impl BufMut) {}

    fn merge_field(
        &mut self,
        tag: u32,
        wire_type: WireType,
        buf: &mut impl Buf,
        ctx: DecodeContext,
    ) -> Result<(), DecodeError> {
        match tag {
            field::INPUT
            | field::OUTPUT
            | field::NAME
            | field::OP_TYPE
            | field::DOC_STRING
            | field::DOMAIN
            | field::OVERLOAD => ProtoStr::merge(wire_type, buf, ctx).map(drop),
            field::ATTRIBUTE => encoding::message::merge(wire_type, &mut AttributeProto::default(), buf, ctx),
            field::METADATA_PROPS => {
                encoding::message::merge(wire_type, &mut StringStringEntryProto::default(), buf, ctx)
            }
            _ => encoding::skip_field(wire_type, tag, buf, ctx),
        }
    }

    fn encoded_len(&self) -> usize {
        0
    }

    fn clear(&mut self) {}
}

/// Whether a node's wire form surely decodes without fault, judged from its bytes alone:
/// the fast path of the check a kept node run gets. `false` means "not sure" (a field this
/// does not judge, or a fault), and the caller then runs `NodeCheck`, which finds the fault
/// and its message exactly as a decode would. Decoding a node only to drop it took a
/// reference on the file's buffer per string and built every attribute: 5.5 ms of reading a
/// 100k-node graph.
pub(super) fn plainly_sound(wire: &[u8]) -> bool {
    // A node whose every byte is ASCII has only ASCII strings, and every key and length in it
    // is one byte: one word-at-a-time scan, then a walk from length to length.
    let ascii = wire.is_ascii();
    let mut at = 0;
    if ascii {
        while let (Some(&k), Some(&len)) = (wire.get(at), wire.get(at + 1)) {
            if !is_string_key(u64::from(k)) {
                break;
            }
            at += 2 + usize::from(len);
        }
        match at.cmp(&wire.len()) {
            std::cmp::Ordering::Equal => return true,
            std::cmp::Ordering::Greater => return false,
            // From a field the walk does not take (an attribute, an unknown field) on, the
            // node is judged field by field.
            std::cmp::Ordering::Less => {}
        }
    }
    let mut buf = wire.get(at..).unwrap_or_default();
    while !buf.is_empty() {
        let Some(k) = varint(&mut buf) else {
            return false;
        };
        // Whole keys (field number and wire type) are matched: a field of the right number
        // but another wire type is a fault, left to the full check.
        let sound = match k {
            k if is_string_key(k) => payload(&mut buf).is_some_and(|p| ascii || is_text(p)),
            key::ATTRIBUTE => payload(&mut buf).is_some_and(|p| plainly_sound_attribute(p, ascii)),
            _ => skip_unknown(k, field::METADATA_PROPS, &mut buf),
        };
        if !sound {
            return false;
        }
    }
    true
}

/// Whether `k` is the key of one of a node's string fields.
fn is_string_key(k: u64) -> bool {
    matches!(
        k,
        key::INPUT | key::OUTPUT | key::NAME | key::OP_TYPE | key::DOC_STRING | key::DOMAIN | key::OVERLOAD
    )
}

/// `plainly_sound` for an `AttributeProto`: the scalar and list fields nearly every attribute
/// uses are judged here; an attribute carrying a tensor, graph, type or sparse tensor is left
/// to the full check.
fn plainly_sound_attribute(wire: &[u8], ascii: bool) -> bool {
    let mut buf = wire;
    while !buf.is_empty() {
        let Some(k) = varint(&mut buf) else {
            return false;
        };
        let sound = match k {
            key::attr::NAME | key::attr::DOC_STRING | key::attr::REF_ATTR_NAME => {
                payload(&mut buf).is_some_and(|p| ascii || is_text(p))
            }
            key::attr::S | key::attr::STRINGS => payload(&mut buf).is_some(),
            key::attr::I | key::attr::TYPE | key::attr::INTS_ONE => varint(&mut buf).is_some(),
            key::attr::F | key::attr::FLOATS_ONE => match buf.get(4..) {
                Some(rest) => {
                    buf = rest;
                    true
                }
                None => false,
            },
            key::attr::FLOATS => payload(&mut buf).is_some_and(|p| p.len() % 4 == 0),
            key::attr::INTS => payload(&mut buf).is_some_and(|mut p| {
                while !p.is_empty() {
                    if varint(&mut p).is_none() {
                        return false;
                    }
                }
                true
            }),
            _ => skip_unknown(k, super::attr::field::SPARSE_TENSORS, &mut buf),
        };
        if !sound {
            return false;
        }
    }
    true
}

/// Keys (field number << 3 | wire type) of the fields the fast judgment reads, each with the
/// wire type the standard gives it.
mod key {
    use super::field;

    const fn len(tag: u32) -> u64 {
        (tag as u64) << 3 | 2
    }

    pub const INPUT: u64 = len(field::INPUT);
    pub const OUTPUT: u64 = len(field::OUTPUT);
    pub const NAME: u64 = len(field::NAME);
    pub const OP_TYPE: u64 = len(field::OP_TYPE);
    pub const ATTRIBUTE: u64 = len(field::ATTRIBUTE);
    pub const DOC_STRING: u64 = len(field::DOC_STRING);
    pub const DOMAIN: u64 = len(field::DOMAIN);
    pub const OVERLOAD: u64 = len(field::OVERLOAD);

    pub mod attr {
        use super::len;
        use crate::onnx::attr::field;

        const fn varint(tag: u32) -> u64 {
            (tag as u64) << 3
        }

        const fn fixed32(tag: u32) -> u64 {
            (tag as u64) << 3 | 5
        }

        pub const NAME: u64 = len(field::NAME);
        pub const F: u64 = fixed32(field::F);
        pub const I: u64 = varint(field::I);
        pub const S: u64 = len(field::S);
        /// Packed, as writers put repeated numbers; `…_ONE`: one element per field, which
        /// protobuf parsers must also accept.
        pub const FLOATS: u64 = len(field::FLOATS);
        pub const FLOATS_ONE: u64 = fixed32(field::FLOATS);
        pub const INTS: u64 = len(field::INTS);
        pub const INTS_ONE: u64 = varint(field::INTS);
        pub const STRINGS: u64 = len(field::STRINGS);
        pub const DOC_STRING: u64 = len(field::DOC_STRING);
        pub const TYPE: u64 = varint(field::TYPE);
        pub const REF_ATTR_NAME: u64 = len(field::REF_ATTR_NAME);
    }
}

/// A field whose key `k` the fast judgment did not match: skipped as prost's `skip_field`
/// would if its number is unknown to the message (above `last_known`, the message's highest
/// field number). A number up to `last_known` is a field the message knows (or a reserved
/// one, rarer still): with another wire type a fault, or a message field; either way left to
/// the full check, as are groups and malformed keys.
fn skip_unknown(k: u64, last_known: u32, buf: &mut &[u8]) -> bool {
    let Ok(k) = u32::try_from(k) else {
        return false;
    };
    let tag = k >> 3;
    if tag <= last_known {
        return false;
    }
    match WireType::try_from(u64::from(k & 7)) {
        Ok(wire_type) => skip_plain(wire_type, buf),
        Err(_) => false,
    }
}

/// A varint, as prost's `decode_varint` reads it; the one- and two-byte forms (keys, lengths
/// of names and of most nodes) inline.
#[inline(always)]
pub(super) fn varint(buf: &mut &[u8]) -> Option<u64> {
    match *buf {
        [b, ref rest @ ..] if *b < 0x80 => {
            *buf = rest;
            Some(u64::from(*b))
        }
        // Keys of field numbers 16 to 2047 (an attribute's `type`).
        [b0, b1, ref rest @ ..] if *b1 < 0x80 => {
            *buf = rest;
            Some(u64::from(*b0 & 0x7f) | u64::from(*b1) << 7)
        }
        // prost's error would be built (a heap allocation) only to be dropped.
        [] => None,
        _ => encoding::decode_varint(buf).ok(),
    }
}

/// A length-delimited field's payload (its key already read), if its length fits in `buf`.
#[inline(always)]
fn payload<'a>(buf: &mut &'a [u8]) -> Option<&'a [u8]> {
    let len = usize::try_from(varint(buf)?).ok()?;
    let (p, rest) = buf.split_at_checked(len)?;
    *buf = rest;
    Some(p)
}

/// Skips a field of a number the message does not know, as prost's `skip_field` would; groups
/// (deprecated, never in ONNX files) are left to the full check.
fn skip_plain(wire_type: WireType, buf: &mut &[u8]) -> bool {
    let width = match wire_type {
        WireType::Varint => return encoding::decode_varint(buf).is_ok(),
        WireType::LengthDelimited => return payload(buf).is_some(),
        WireType::SixtyFourBit => 8,
        WireType::ThirtyTwoBit => 4,
        WireType::StartGroup | WireType::EndGroup => return false,
    };
    match buf.get(width..) {
        Some(rest) => {
            *buf = rest;
            true
        }
        None => false,
    }
}

/// What `ProtoStr::merge` accepts: UTF-8, checked ASCII-first as there.
fn is_text(bytes: &[u8]) -> bool {
    bytes.is_ascii() || std::str::from_utf8(bytes).is_ok()
}

/// A node left in its wire form: a slice of a node run that decoded without fault when the
/// model was read (`GraphProto::node_run`). Its fields are found by scanning the slice when
/// asked, so that a large graph never holds its nodes decoded: on a 100k-node graph the
/// decoded nodes were about 36 MB of fresh memory, which the kernel must zero, against
/// 0.8 MB of spans.
#[derive(Clone, Copy, Debug)]
pub struct WireNode<'a> {
    run: &'a Bytes,
    start: u32,
    len: u32,
}

/// The node run of a graph read for import, kept as wire bytes (see `WireNode`).
#[derive(Clone, PartialEq, Default, Debug)]
pub struct NodeRun {
    /// The run's bytes (nodes with the keys between them).
    bytes: Bytes,
    /// Each node's payload: offset into `bytes` and length.
    spans: Vec<(u32, u32)>,
}

impl NodeRun {
    /// No nodes: what a graph without a run reads as.
    pub const fn empty() -> NodeRun {
        NodeRun {
            bytes: Bytes::new(),
            spans: Vec::new(),
        }
    }

    /// A run whose every span holds a node that decoded whole as a `NodeProto`: the string
    /// fields `WireNode` hands out were checked as UTF-8 then.
    pub(super) fn of_decoded(bytes: Bytes, spans: Vec<(u32, u32)>) -> NodeRun {
        NodeRun { bytes, spans }
    }

    /// The run as the standard's wire form: each node as a `node` field of its graph.
    pub(super) fn encode(&self, tag: u32, buf: &mut impl BufMut) {
        for n in self.nodes() {
            encoding::encode_key(tag, WireType::LengthDelimited, buf);
            encoding::encode_varint(n.len as u64, buf);
            buf.put_slice(n.wire());
        }
    }

    pub(super) fn encoded_len(&self, tag: u32) -> usize {
        self.spans
            .iter()
            .map(|&(_, len)| encoding::key_len(tag) + encoding::encoded_len_varint(len as u64) + len as usize)
            .sum()
    }

    pub fn len(&self) -> usize {
        self.spans.len()
    }

    pub fn is_empty(&self) -> bool {
        self.spans.is_empty()
    }

    /// The node at `i`, an index below `len()`.
    pub fn node(&self, i: usize) -> WireNode<'_> {
        let (start, len) = self.spans[i];
        WireNode {
            run: &self.bytes,
            start,
            len,
        }
    }

    pub fn nodes(&self) -> impl ExactSizeIterator<Item = WireNode<'_>> + '_ {
        (0..self.len()).map(move |i| self.node(i))
    }
}

impl<'a> WireNode<'a> {
    fn wire(&self) -> &'a [u8] {
        let start = self.start as usize;
        self.run.get(start..start + self.len as usize).unwrap_or_default()
    }

    fn fields(&self) -> Fields<'a> {
        let wire = self.wire();
        Fields {
            wire,
            start: self.start as usize,
            rest: wire,
        }
    }

    /// The strings of field `key` (a string field's key: its number << 3 | 2).
    fn strings(&self, key: u64) -> Strings<'a> {
        Strings {
            fields: self.fields(),
            key,
        }
    }

    /// A singular string field: its last occurrence, as protobuf merges repeats.
    fn last_string(&self, key: u64) -> &'a str {
        self.strings(key).last().unwrap_or_default()
    }

    pub fn name(&self) -> &'a str {
        self.last_string(key::NAME)
    }

    pub fn op_type(&self) -> &'a str {
        self.last_string(key::OP_TYPE)
    }

    pub fn domain(&self) -> &'a str {
        self.last_string(key::DOMAIN)
    }

    pub fn outputs(&self) -> Strings<'a> {
        self.strings(key::OUTPUT)
    }

    /// Every field import reads, in one scan of the node.
    pub fn view(&self) -> WireView<'a> {
        let mut v = WireView::default();
        self.view_into(&mut v);
        v
    }

    /// `view` into a view kept from the previous node: a pass over a large graph reuses one,
    /// instead of building and moving a fresh one (240 bytes) per node.
    pub fn view_into(&self, v: &mut WireView<'a>) {
        v.run = self.run;
        (v.name, v.op_type, v.domain) = ("", "", "");
        v.inputs.clear();
        v.outputs.clear();
        v.attributes.clear();
        for (k, p, at) in self.fields() {
            match k {
                key::INPUT => v.inputs.push(checked_text(p)),
                key::OUTPUT => v.outputs.push(checked_text(p)),
                key::NAME => v.name = checked_text(p),
                key::OP_TYPE => v.op_type = checked_text(p),
                key::DOMAIN => v.domain = checked_text(p),
                key::ATTRIBUTE => v.attributes.push((at, p.len())),
                _ => {}
            }
        }
    }

    /// The whole node, decoded.
    pub fn decode(&self) -> Result<NodeProto, DecodeError> {
        let start = self.start as usize;
        <NodeProto as prost::Message>::decode(self.run.slice(start..start + self.len as usize))
    }
}

/// The fields of a `WireNode` that import reads, found in one scan.
pub struct WireView<'a> {
    run: &'a Bytes,
    pub name: &'a str,
    pub op_type: &'a str,
    pub domain: &'a str,
    pub inputs: smallvec::SmallVec<[&'a str; 4]>,
    pub outputs: smallvec::SmallVec<[&'a str; 4]>,
    /// Each attribute's payload: offset in the run and length.
    attributes: smallvec::SmallVec<[(usize, usize); 2]>,
}

/// The run of an empty view.
static NO_RUN: Bytes = Bytes::new();

impl Default for WireView<'_> {
    fn default() -> Self {
        WireView {
            run: &NO_RUN,
            name: "",
            op_type: "",
            domain: "",
            inputs: Default::default(),
            outputs: Default::default(),
            attributes: Default::default(),
        }
    }
}

impl WireView<'_> {
    pub fn attribute_count(&self) -> usize {
        self.attributes.len()
    }

    /// Each attribute, decoded on its own (payloads stay slices of the file).
    pub fn attributes(&self) -> impl Iterator<Item = Result<AttributeProto, DecodeError>> + '_ {
        self.attributes
            .iter()
            .map(|&(at, len)| <AttributeProto as prost::Message>::decode(self.run.slice(at..at + len)))
    }
}

/// The length-delimited fields of a `WireNode`, in wire order, as (key, payload, payload's
/// offset in the run); keys and lengths read as `plainly_sound` reads them. Fields of other
/// wire types (none in the standard's `NodeProto`) are skipped.
struct Fields<'a> {
    wire: &'a [u8],
    /// The node's offset in its run.
    start: usize,
    /// What is left of `wire` to scan.
    rest: &'a [u8],
}

impl<'a> Iterator for Fields<'a> {
    type Item = (u64, &'a [u8], usize);

    #[inline(always)]
    fn next(&mut self) -> Option<Self::Item> {
        // The node decoded whole when it was kept: each key, length and skip succeeds (a
        // failure ends the scan).
        loop {
            let k = varint(&mut self.rest)?;
            if k & 7 == WireType::LengthDelimited as u64 {
                let p = payload(&mut self.rest)?;
                let at = self.start + (self.wire.len() - self.rest.len() - p.len());
                return Some((k, p, at));
            }
            let wire_type = WireType::try_from(k & 7).ok()?;
            encoding::skip_field(wire_type, (k >> 3) as u32, &mut self.rest, DecodeContext::default()).ok()?;
        }
    }
}

/// The strings of one field of a `WireNode`, in wire order.
pub struct Strings<'a> {
    fields: Fields<'a>,
    key: u64,
}

impl<'a> Iterator for Strings<'a> {
    type Item = &'a str;

    fn next(&mut self) -> Option<&'a str> {
        let key = self.key;
        self.fields.find(|f| f.0 == key).map(|f| checked_text(f.1))
    }
}

/// The text of a string field of a node kept in wire form.
fn checked_text(bytes: &[u8]) -> &str {
    // SAFETY: a `NodeRun` keeps only nodes that decoded whole, and decoding checks every
    // string field as UTF-8 (`ProtoStr::merge`); the bytes are immutable since.
    unsafe { std::str::from_utf8_unchecked(bytes) }
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

    /// A node read in wire form answers as its decode does: a singular field written twice
    /// takes its last value (protobuf's merge rule), unknown fields of any wire type are
    /// skipped, and a repeated field keeps every element in order.
    #[test]
    fn a_node_in_wire_form_reads_as_its_decode() {
        let mut wire = Vec::new();
        for (tag, s) in [(3u32, "first"), (1, "x"), (4, "Add"), (1, ""), (3, "second"), (2, "y")] {
            encoding::encode_key(tag, WireType::LengthDelimited, &mut wire);
            encoding::encode_varint(s.len() as u64, &mut wire);
            wire.extend_from_slice(s.as_bytes());
        }
        encoding::encode_key(99, WireType::Varint, &mut wire);
        encoding::encode_varint(300, &mut wire);
        encoding::encode_key(98, WireType::ThirtyTwoBit, &mut wire);
        wire.extend_from_slice(&[1, 2, 3, 4]);
        let attr = AttributeProto {
            name: "axis".into(),
            i: -1,
            r#type: 2,
            ..Default::default()
        };
        encoding::message::encode(5, &attr, &mut wire);
        encoding::encode_key(7, WireType::LengthDelimited, &mut wire);
        encoding::encode_varint(3, &mut wire);
        wire.extend_from_slice(b"dom");
        let bytes = Bytes::from(wire.clone());
        let decoded = NodeProto::decode(bytes.clone()).expect("decodes");
        prost::Message::decode(bytes.clone())
            .map(|NodeCheck| ())
            .expect("checks");
        let run = NodeRun::of_decoded(bytes, vec![(0, wire.len() as u32)]);
        let w = run.nodes().next().expect("one node");
        let v = w.view();
        assert_eq!((v.name, v.op_type, v.domain), ("second", "Add", "dom"));
        assert_eq!(decoded.name, "second");
        assert_eq!(v.inputs.as_slice(), ["x", ""]);
        assert_eq!(v.outputs.as_slice(), ["y"]);
        assert_eq!(v.attribute_count(), 1);
        let attrs: Vec<_> = v.attributes().map(|a| a.expect("decodes")).collect();
        assert_eq!(attrs, [attr]);
        assert_eq!((w.name(), w.op_type(), w.domain()), ("second", "Add", "dom"));
        assert_eq!(w.outputs().collect::<Vec<_>>(), ["y"]);
        assert_eq!(w.decode().expect("decodes"), decoded);
    }

    /// Whether the full check (prost's decode of each field, as `NodeProto`'s decode) accepts
    /// `wire`; and the fast judgment must never accept more.
    fn judged_alike(wire: &[u8]) -> (bool, bool) {
        let full = <NodeCheck as Message>::decode(Bytes::copy_from_slice(wire)).is_ok();
        let fast = plainly_sound(wire);
        assert!(
            !fast || full,
            "fast judgment passed a node the decode refuses: {wire:?}"
        );
        assert_eq!(full, NodeProto::decode(Bytes::copy_from_slice(wire)).is_ok());
        (full, fast)
    }

    /// The fast judgment never passes a node that a decode refuses (the protobuf encoding
    /// guide's wire rules, as prost implements them): nodes with every kind of attribute, each
    /// cut short at every byte and with bytes changed at pseudo-random places.
    #[test]
    fn the_fast_judgment_never_passes_a_fault() {
        let named = |name: &str| AttributeProto {
            name: name.into(),
            ..Default::default()
        };
        let mut attrs = vec![
            AttributeProto {
                i: -7,
                r#type: 2,
                ..named("axis")
            },
            AttributeProto {
                f: 1e-5,
                r#type: 1,
                ..named("epsilon")
            },
            AttributeProto {
                s: Bytes::from_static(b"\xffNOTSET"),
                r#type: 3,
                ..named("auto_pad")
            },
            AttributeProto {
                ints: vec![0, 2, -1, 1 << 40],
                r#type: 7,
                ..named("perm")
            },
            AttributeProto {
                floats: vec![1.0, 0.5],
                r#type: 6,
                ..named("scales")
            },
            AttributeProto {
                t: Some(Box::default()),
                r#type: 4,
                ..named("value")
            },
            AttributeProto {
                g: Some(Box::default()),
                r#type: 5,
                ..named("then_branch")
            },
        ];
        let mut rare = named("kernel");
        rare.rare_mut().ref_attr_name = "k".into();
        rare.rare_mut().doc_string = "size of the window".into();
        rare.rare_mut().strings = vec![Bytes::from_static(b"a"), Bytes::from_static(b"\xfe")];
        attrs.push(rare);
        let mut plain = 0;
        let mut cases: Vec<Vec<u8>> = Vec::new();
        // Each attribute kind, and no attribute at all: then a node of ASCII names is judged
        // by its own walk, and one with a non-ASCII name field by field.
        for attribute in attrs
            .iter()
            .map(|a| vec![a.clone(), named("group")])
            .chain([vec![], vec![]])
        {
            let plain_names = cases.len() == attrs.len();
            let node = NodeProto {
                input: vec!["x".into(), "".into(), if plain_names { "w" } else { "w_é" }.into()],
                output: vec!["y".into()],
                name: "grader/conv_3".into(),
                op_type: "Conv".into(),
                domain: "".into(),
                attribute,
                rare: None,
            };
            cases.push(node.encode_to_vec());
        }
        // Forms prost accepts that the encoder above never writes: unpacked lists, a field
        // of an unknown number of each wire type, and a name that is not UTF-8.
        let mut extra = Vec::new();
        encoding::encode_key(8, WireType::Varint, &mut extra);
        encoding::encode_varint(3, &mut extra);
        encoding::encode_key(7, WireType::ThirtyTwoBit, &mut extra);
        extra.extend_from_slice(&1f32.to_le_bytes());
        encoding::encode_key(99, WireType::SixtyFourBit, &mut extra);
        extra.extend_from_slice(&[0; 8]);
        let mut node = Vec::new();
        encoding::encode_key(5, WireType::LengthDelimited, &mut node);
        encoding::encode_varint(extra.len() as u64, &mut node);
        node.extend_from_slice(&extra);
        encoding::encode_key(98, WireType::Varint, &mut node);
        encoding::encode_varint(1 << 50, &mut node);
        encoding::encode_key(97, WireType::LengthDelimited, &mut node);
        encoding::encode_varint(2, &mut node);
        node.extend_from_slice(b"ok");
        cases.push(node.clone());
        encoding::encode_key(3, WireType::LengthDelimited, &mut node);
        encoding::encode_varint(1, &mut node);
        node.push(0xc3);
        cases.push(node);
        let mut rng = crate::samples::Rng::new(11);
        let (mut tried, mut passed_fast) = (0, 0);
        for wire in &cases {
            let (full, fast) = judged_alike(wire);
            plain += usize::from(fast);
            assert!(full || wire.ends_with(&[0xc3]), "every case but the last decodes");
            for cut in 0..wire.len() {
                judged_alike(&wire[..cut]);
            }
            for _ in 0..400 {
                let mut w = wire.clone();
                for _ in 0..1 + rng.next_u64() % 3 {
                    let at = (rng.next_u64() % w.len() as u64) as usize;
                    w[at] = rng.next_u64() as u8;
                }
                let (_, fast) = judged_alike(&w);
                tried += 1;
                passed_fast += usize::from(fast);
            }
        }
        // Six of the attribute kinds, both nodes without one and the hand-made form take the
        // fast path (tensor and graph attributes are left to the full check); the changed
        // bytes exercise both paths.
        assert_eq!(plain, 9, "sound plain nodes judged on the fast path");
        assert!(
            passed_fast > tried / 10 && passed_fast < tried,
            "{passed_fast} of {tried}"
        );
    }

    #[test]
    fn a_string_field_with_a_varint_wire_type_is_an_error() {
        let mut wire = Vec::new();
        encoding::encode_key(1, WireType::Varint, &mut wire);
        encoding::encode_varint(3, &mut wire);
        assert!(NodeProto::decode(Bytes::from(wire)).is_err());
    }
}
