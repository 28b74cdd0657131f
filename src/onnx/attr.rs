//! The ONNX `AttributeProto`, implemented by hand for its footprint.
//!
//! Generated, an attribute was 320 bytes and its name a heap string of its own, though nearly
//! every attribute is one integer, one float, one string or a short list. Here the name is a
//! slice of the decoded buffer and the fields few attributes set (lists of strings, tensors,
//! graphs and types; sparse tensors; a reference to a function's attribute; documentation)
//! sit behind one box: 152 bytes. The wire format is the standard's, written in field-number
//! order as prost wrote it.

use bytes::{Buf, BufMut, Bytes};
use prost::encoding::{self, DecodeContext, WireType};
use prost::DecodeError;

use super::node::merge_messages;
use super::text::ProtoStr;
use super::{GraphProto, SparseTensorProto, TensorProto, TypeProto};

/// Field numbers of the standard's `AttributeProto`.
pub(crate) mod field {
    pub const NAME: u32 = 1;
    pub const F: u32 = 2;
    pub const I: u32 = 3;
    pub const S: u32 = 4;
    pub const T: u32 = 5;
    pub const G: u32 = 6;
    pub const FLOATS: u32 = 7;
    pub const INTS: u32 = 8;
    pub const STRINGS: u32 = 9;
    pub const TENSORS: u32 = 10;
    pub const GRAPHS: u32 = 11;
    pub const DOC_STRING: u32 = 13;
    pub const TP: u32 = 14;
    pub const TYPE_PROTOS: u32 = 15;
    pub const TYPE: u32 = 20;
    pub const REF_ATTR_NAME: u32 = 21;
    pub const SPARSE_TENSOR: u32 = 22;
    pub const SPARSE_TENSORS: u32 = 23;
}

/// `AttributeProto`, field for field; the fields few attributes set are in `rare`.
#[derive(Clone, PartialEq, Default, Debug)]
pub struct AttributeProto {
    pub name: ProtoStr,
    /// `AttributeType` as its number: values from newer IR versions decode too.
    pub r#type: i32,
    pub f: f32,
    pub i: i64,
    pub s: Bytes,
    pub t: Option<Box<TensorProto>>,
    pub g: Option<Box<GraphProto>>,
    pub floats: Vec<f32>,
    pub ints: Vec<i64>,
    /// Allocated only for an attribute that sets one of its fields.
    pub rare: Option<Box<AttributeRare>>,
}

/// The fields of an `AttributeProto` that few attributes set.
#[derive(Clone, PartialEq, Default, Debug)]
pub struct AttributeRare {
    pub ref_attr_name: ProtoStr,
    pub doc_string: ProtoStr,
    pub sparse_tensor: Option<Box<SparseTensorProto>>,
    pub tp: Option<Box<TypeProto>>,
    pub strings: Vec<Bytes>,
    pub tensors: Vec<TensorProto>,
    pub graphs: Vec<GraphProto>,
    pub sparse_tensors: Vec<SparseTensorProto>,
    pub type_protos: Vec<TypeProto>,
}

/// The empty rare part, for reading an attribute without one.
static NO_RARE: AttributeRare = AttributeRare {
    ref_attr_name: ProtoStr::new(),
    doc_string: ProtoStr::new(),
    sparse_tensor: None,
    tp: None,
    strings: Vec::new(),
    tensors: Vec::new(),
    graphs: Vec::new(),
    sparse_tensors: Vec::new(),
    type_protos: Vec::new(),
};

impl AttributeProto {
    /// The rare fields, empty where the attribute sets none.
    pub fn rare(&self) -> &AttributeRare {
        self.rare.as_deref().unwrap_or(&NO_RARE)
    }

    /// The rare fields for writing: allocated on first use.
    pub fn rare_mut(&mut self) -> &mut AttributeRare {
        self.rare.get_or_insert_with(Default::default)
    }

    /// `ref_attr_name`: the function attribute this one stands for, empty if none.
    pub fn ref_attr_name(&self) -> &str {
        &self.rare().ref_attr_name
    }

    pub fn strings(&self) -> &[Bytes] {
        &self.rare().strings
    }

    pub fn tensors(&self) -> &[TensorProto] {
        &self.rare().tensors
    }

    pub fn graphs(&self) -> &[GraphProto] {
        &self.rare().graphs
    }
}

/// An optional boxed message field: merged into the existing value, as protobuf requires of
/// a message field that appears more than once.
fn merge_boxed<M: prost::Message + Default>(
    wire_type: WireType,
    slot: &mut Option<Box<M>>,
    buf: &mut impl Buf,
    ctx: DecodeContext,
) -> Result<(), DecodeError> {
    encoding::message::merge(wire_type, slot.get_or_insert_with(Default::default).as_mut(), buf, ctx)
}

impl prost::Message for AttributeProto {
    fn encode_raw(&self, buf: &mut impl BufMut) {
        let rare = self.rare();
        self.name.encode(field::NAME, buf);
        if self.f != 0.0 {
            encoding::float::encode(field::F, &self.f, buf);
        }
        if self.i != 0 {
            encoding::int64::encode(field::I, &self.i, buf);
        }
        if !self.s.is_empty() {
            encoding::bytes::encode(field::S, &self.s, buf);
        }
        if let Some(t) = &self.t {
            encoding::message::encode(field::T, t.as_ref(), buf);
        }
        if let Some(g) = &self.g {
            encoding::message::encode(field::G, g.as_ref(), buf);
        }
        encoding::float::encode_packed(field::FLOATS, &self.floats, buf);
        encoding::int64::encode_packed(field::INTS, &self.ints, buf);
        encoding::bytes::encode_repeated(field::STRINGS, &rare.strings, buf);
        encoding::message::encode_repeated(field::TENSORS, &rare.tensors, buf);
        encoding::message::encode_repeated(field::GRAPHS, &rare.graphs, buf);
        rare.doc_string.encode(field::DOC_STRING, buf);
        if let Some(tp) = &rare.tp {
            encoding::message::encode(field::TP, tp.as_ref(), buf);
        }
        encoding::message::encode_repeated(field::TYPE_PROTOS, &rare.type_protos, buf);
        if self.r#type != 0 {
            encoding::int32::encode(field::TYPE, &self.r#type, buf);
        }
        rare.ref_attr_name.encode(field::REF_ATTR_NAME, buf);
        if let Some(st) = &rare.sparse_tensor {
            encoding::message::encode(field::SPARSE_TENSOR, st.as_ref(), buf);
        }
        encoding::message::encode_repeated(field::SPARSE_TENSORS, &rare.sparse_tensors, buf);
    }

    fn merge_field(
        &mut self,
        tag: u32,
        wire_type: WireType,
        buf: &mut impl Buf,
        ctx: DecodeContext,
    ) -> Result<(), DecodeError> {
        match tag {
            field::NAME => ProtoStr::merge(wire_type, buf, ctx).map(|s| self.name = s),
            field::F => encoding::float::merge(wire_type, &mut self.f, buf, ctx),
            field::I => encoding::int64::merge(wire_type, &mut self.i, buf, ctx),
            field::S => encoding::bytes::merge(wire_type, &mut self.s, buf, ctx),
            field::T => merge_boxed(wire_type, &mut self.t, buf, ctx),
            field::G => merge_boxed(wire_type, &mut self.g, buf, ctx),
            field::FLOATS => encoding::float::merge_repeated(wire_type, &mut self.floats, buf, ctx),
            field::INTS => encoding::int64::merge_repeated(wire_type, &mut self.ints, buf, ctx),
            field::STRINGS => encoding::bytes::merge_repeated(wire_type, &mut self.rare_mut().strings, buf, ctx),
            field::TENSORS => merge_messages(wire_type, &mut self.rare_mut().tensors, buf, ctx),
            field::GRAPHS => merge_messages(wire_type, &mut self.rare_mut().graphs, buf, ctx),
            field::DOC_STRING => ProtoStr::merge(wire_type, buf, ctx).map(|s| self.rare_mut().doc_string = s),
            field::TP => merge_boxed(wire_type, &mut self.rare_mut().tp, buf, ctx),
            field::TYPE_PROTOS => merge_messages(wire_type, &mut self.rare_mut().type_protos, buf, ctx),
            field::TYPE => encoding::int32::merge(wire_type, &mut self.r#type, buf, ctx),
            field::REF_ATTR_NAME => ProtoStr::merge(wire_type, buf, ctx).map(|s| self.rare_mut().ref_attr_name = s),
            field::SPARSE_TENSOR => merge_boxed(wire_type, &mut self.rare_mut().sparse_tensor, buf, ctx),
            field::SPARSE_TENSORS => merge_messages(wire_type, &mut self.rare_mut().sparse_tensors, buf, ctx),
            _ => encoding::skip_field(wire_type, tag, buf, ctx),
        }
    }

    fn encoded_len(&self) -> usize {
        let rare = self.rare();
        self.name.encoded_len(field::NAME)
            + if self.f != 0.0 {
                encoding::float::encoded_len(field::F, &self.f)
            } else {
                0
            }
            + if self.i != 0 {
                encoding::int64::encoded_len(field::I, &self.i)
            } else {
                0
            }
            + if self.s.is_empty() {
                0
            } else {
                encoding::bytes::encoded_len(field::S, &self.s)
            }
            + self
                .t
                .as_ref()
                .map_or(0, |t| encoding::message::encoded_len(field::T, t.as_ref()))
            + self
                .g
                .as_ref()
                .map_or(0, |g| encoding::message::encoded_len(field::G, g.as_ref()))
            + encoding::float::encoded_len_packed(field::FLOATS, &self.floats)
            + encoding::int64::encoded_len_packed(field::INTS, &self.ints)
            + encoding::bytes::encoded_len_repeated(field::STRINGS, &rare.strings)
            + encoding::message::encoded_len_repeated(field::TENSORS, &rare.tensors)
            + encoding::message::encoded_len_repeated(field::GRAPHS, &rare.graphs)
            + rare.doc_string.encoded_len(field::DOC_STRING)
            + rare
                .tp
                .as_ref()
                .map_or(0, |tp| encoding::message::encoded_len(field::TP, tp.as_ref()))
            + encoding::message::encoded_len_repeated(field::TYPE_PROTOS, &rare.type_protos)
            + if self.r#type != 0 {
                encoding::int32::encoded_len(field::TYPE, &self.r#type)
            } else {
                0
            }
            + rare.ref_attr_name.encoded_len(field::REF_ATTR_NAME)
            + rare.sparse_tensor.as_ref().map_or(0, |st| {
                encoding::message::encoded_len(field::SPARSE_TENSOR, st.as_ref())
            })
            + encoding::message::encoded_len_repeated(field::SPARSE_TENSORS, &rare.sparse_tensors)
    }

    fn clear(&mut self) {
        *self = AttributeProto::default();
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use prost::Message;

    fn key(tag: u32, wt: WireType, wire: &mut Vec<u8>) {
        encoding::encode_key(tag, wt, wire);
    }

    fn text(tag: u32, s: &[u8], wire: &mut Vec<u8>) {
        key(tag, WireType::LengthDelimited, wire);
        encoding::encode_varint(s.len() as u64, wire);
        wire.extend_from_slice(s);
    }

    /// Every field of the standard's `AttributeProto` (onnx/onnx.proto, field numbers 1–23),
    /// written in field-number order as the protobuf encoding guide lays a message out:
    /// decoded, then encoded again to the same bytes.
    #[test]
    fn every_field_round_trips_in_field_order() {
        let mut wire = Vec::new();
        text(field::NAME, b"mode", &mut wire);
        key(field::F, WireType::ThirtyTwoBit, &mut wire);
        wire.extend_from_slice(&1.5f32.to_le_bytes());
        key(field::I, WireType::Varint, &mut wire);
        encoding::encode_varint(7, &mut wire);
        text(field::S, b"linear", &mut wire);
        let tensor = TensorProto {
            name: "w".into(),
            dims: vec![2],
            data_type: 1,
            ..Default::default()
        };
        encoding::message::encode(field::T, &tensor, &mut wire);
        let graph = GraphProto {
            name: "body".into(),
            ..Default::default()
        };
        encoding::message::encode(field::G, &graph, &mut wire);
        encoding::float::encode_packed(field::FLOATS, &[0.5, 2.0], &mut wire);
        encoding::int64::encode_packed(field::INTS, &[0, 2, 1], &mut wire);
        text(field::STRINGS, b"a", &mut wire);
        text(field::STRINGS, b"", &mut wire);
        encoding::message::encode(field::TENSORS, &tensor, &mut wire);
        encoding::message::encode(field::GRAPHS, &graph, &mut wire);
        text(field::DOC_STRING, b"why", &mut wire);
        encoding::message::encode(field::TP, &TypeProto::default(), &mut wire);
        encoding::message::encode(field::TYPE_PROTOS, &TypeProto::default(), &mut wire);
        key(field::TYPE, WireType::Varint, &mut wire);
        encoding::encode_varint(2, &mut wire);
        text(field::REF_ATTR_NAME, b"alpha", &mut wire);
        encoding::message::encode(field::SPARSE_TENSOR, &SparseTensorProto::default(), &mut wire);
        encoding::message::encode(field::SPARSE_TENSORS, &SparseTensorProto::default(), &mut wire);

        let a = AttributeProto::decode(Bytes::from(wire.clone())).expect("decodes");
        assert_eq!(
            (a.name.as_str(), a.f, a.i, &a.s[..], a.r#type),
            ("mode", 1.5, 7, &b"linear"[..], 2)
        );
        assert_eq!(a.t.as_deref(), Some(&tensor));
        assert_eq!(a.g.as_deref(), Some(&graph));
        assert_eq!(
            (a.floats.as_slice(), a.ints.as_slice()),
            (&[0.5, 2.0][..], &[0, 2, 1][..])
        );
        assert_eq!(a.strings(), [Bytes::from_static(b"a"), Bytes::new()]);
        assert_eq!((a.tensors(), a.graphs()), (&[tensor][..], &[graph][..]));
        assert_eq!(a.ref_attr_name(), "alpha");
        let rare = a.rare();
        assert_eq!(rare.doc_string, "why");
        assert!(rare.tp.is_some() && rare.sparse_tensor.is_some());
        assert_eq!((rare.type_protos.len(), rare.sparse_tensors.len()), (1, 1));
        assert_eq!(a.encode_to_vec(), wire, "same bytes, same order");
        assert_eq!(a.encoded_len(), wire.len());
    }

    /// The attributes nearly every node has (one int, a list of ints) allocate no rare part,
    /// and unpacked repeated scalars, which proto2 writers emit, decode like packed ones.
    #[test]
    fn common_attributes_stay_small() {
        let mut wire = Vec::new();
        text(field::NAME, b"perm", &mut wire);
        for v in [0u64, 2, 1] {
            key(field::INTS, WireType::Varint, &mut wire);
            encoding::encode_varint(v, &mut wire);
        }
        key(field::TYPE, WireType::Varint, &mut wire);
        encoding::encode_varint(7, &mut wire);
        let a = AttributeProto::decode(Bytes::from(wire)).expect("decodes");
        assert_eq!(
            (a.name.as_str(), a.ints.as_slice(), a.r#type),
            ("perm", &[0, 2, 1][..], 7)
        );
        assert!(a.rare.is_none());
        assert!(a.strings().is_empty() && a.graphs().is_empty() && a.ref_attr_name().is_empty());
        // Generated, the message was 320 bytes; 152 on 64-bit targets now.
        assert!(std::mem::size_of::<AttributeProto>() <= 160);
    }

    #[test]
    fn a_truncated_attribute_is_an_error() {
        let mut wire = Vec::new();
        text(field::NAME, b"axis", &mut wire);
        wire.truncate(wire.len() - 1);
        assert!(AttributeProto::decode(Bytes::from(wire)).is_err());
    }
}
