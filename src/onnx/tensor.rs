//! The ONNX `TensorProto`, implemented by hand so that weights are never copied.
//!
//! prost would decode the packed numeric fields (`float_data`, `int64_data`, …) into `Vec`s,
//! copying every element. Here each of them stays the packed payload as it lies on the wire:
//! a `Bytes` slice of the mapped file. Elements are decoded only when asked for
//! (`TensorProto::int64s`, …), which the analysis does for small constants alone. Unpacked
//! encodings, which proto2 readers must also accept, are re-packed into an owned buffer.

use bytes::{Buf, BufMut, Bytes, BytesMut};
use prost::encoding::{self, DecodeContext, WireType};
use prost::DecodeError;

use super::text::{encode_string, string_len};
use super::StringStringEntryProto;

/// `TensorProto.Segment`: a slice of a large tensor split across several protos.
#[derive(Clone, PartialEq, prost::Message)]
pub struct Segment {
    #[prost(int64, tag = "1")]
    pub begin: i64,
    #[prost(int64, tag = "2")]
    pub end: i64,
}

/// Field numbers of the standard's `TensorProto`.
mod field {
    pub const DIMS: u32 = 1;
    pub const DATA_TYPE: u32 = 2;
    pub const SEGMENT: u32 = 3;
    pub const FLOAT_DATA: u32 = 4;
    pub const INT32_DATA: u32 = 5;
    pub const STRING_DATA: u32 = 6;
    pub const INT64_DATA: u32 = 7;
    pub const NAME: u32 = 8;
    pub const RAW_DATA: u32 = 9;
    pub const DOUBLE_DATA: u32 = 10;
    pub const UINT64_DATA: u32 = 11;
    pub const DOC_STRING: u32 = 12;
    pub const EXTERNAL_DATA: u32 = 13;
    pub const DATA_LOCATION: u32 = 14;
    pub const METADATA_PROPS: u32 = 16;
}

/// `TensorProto`. The five typed-data fields hold their packed wire payload.
#[derive(Clone, PartialEq, Default, Debug)]
pub struct TensorProto {
    pub dims: Vec<i64>,
    pub data_type: i32,
    pub segment: Option<Segment>,
    /// Packed little-endian fixed32 floats (also carries fp16/bf16 bit patterns per the spec).
    pub float_data: Bytes,
    /// Packed varints.
    pub int32_data: Bytes,
    pub string_data: Vec<Bytes>,
    /// Packed varints.
    pub int64_data: Bytes,
    pub name: String,
    pub doc_string: String,
    pub raw_data: Bytes,
    pub external_data: Vec<StringStringEntryProto>,
    /// 0 DEFAULT, 1 EXTERNAL.
    pub data_location: i32,
    /// Packed little-endian fixed64 doubles.
    pub double_data: Bytes,
    /// Packed varints.
    pub uint64_data: Bytes,
    pub metadata_props: Vec<StringStringEntryProto>,
}

/// How the elements of a packed field are laid out on the wire.
#[derive(Clone, Copy)]
enum Packing {
    Varint,
    Fixed32,
    Fixed64,
}

fn merge_packed(
    packing: Packing,
    wire_type: WireType,
    target: &mut Bytes,
    buf: &mut impl Buf,
    ctx: DecodeContext,
) -> Result<(), DecodeError> {
    let mut one = BytesMut::new();
    match (wire_type, packing) {
        (WireType::LengthDelimited, _) => {
            let mut slice = Bytes::new();
            encoding::bytes::merge(wire_type, &mut slice, buf, ctx)?;
            if target.is_empty() {
                *target = slice;
                return Ok(());
            }
            one.extend_from_slice(&slice);
        }
        (WireType::Varint, Packing::Varint) => {
            encoding::encode_varint(encoding::decode_varint(buf)?, &mut one);
        }
        (WireType::ThirtyTwoBit, Packing::Fixed32) => {
            if buf.remaining() < 4 {
                return Err(DecodeError::new("buffer underflow"));
            }
            one.put_u32_le(buf.get_u32_le());
        }
        (WireType::SixtyFourBit, Packing::Fixed64) => {
            if buf.remaining() < 8 {
                return Err(DecodeError::new("buffer underflow"));
            }
            one.put_u64_le(buf.get_u64_le());
        }
        _ => return Err(DecodeError::new("invalid wire type for a tensor data field")),
    }
    let mut joined = BytesMut::with_capacity(target.len() + one.len());
    joined.extend_from_slice(target);
    joined.extend_from_slice(&one);
    *target = joined.freeze();
    Ok(())
}

fn encode_packed_field(tag: u32, payload: &Bytes, buf: &mut impl BufMut) {
    if !payload.is_empty() {
        encoding::bytes::encode(tag, payload, buf);
    }
}

fn packed_field_len(tag: u32, payload: &Bytes) -> usize {
    if payload.is_empty() {
        0
    } else {
        encoding::bytes::encoded_len(tag, payload)
    }
}

impl prost::Message for TensorProto {
    fn encode_raw(&self, buf: &mut impl BufMut) {
        encoding::int64::encode_packed(field::DIMS, &self.dims, buf);
        if self.data_type != 0 {
            encoding::int32::encode(field::DATA_TYPE, &self.data_type, buf);
        }
        if let Some(segment) = &self.segment {
            encoding::message::encode(field::SEGMENT, segment, buf);
        }
        encode_packed_field(field::FLOAT_DATA, &self.float_data, buf);
        encode_packed_field(field::INT32_DATA, &self.int32_data, buf);
        encoding::bytes::encode_repeated(field::STRING_DATA, &self.string_data, buf);
        encode_packed_field(field::INT64_DATA, &self.int64_data, buf);
        encode_string(field::NAME, &self.name, buf);
        encode_packed_field(field::RAW_DATA, &self.raw_data, buf);
        encode_packed_field(field::DOUBLE_DATA, &self.double_data, buf);
        encode_packed_field(field::UINT64_DATA, &self.uint64_data, buf);
        encode_string(field::DOC_STRING, &self.doc_string, buf);
        encoding::message::encode_repeated(field::EXTERNAL_DATA, &self.external_data, buf);
        if self.data_location != 0 {
            encoding::int32::encode(field::DATA_LOCATION, &self.data_location, buf);
        }
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
            field::DIMS => encoding::int64::merge_repeated(wire_type, &mut self.dims, buf, ctx),
            field::DATA_TYPE => encoding::int32::merge(wire_type, &mut self.data_type, buf, ctx),
            field::SEGMENT => {
                encoding::message::merge(wire_type, self.segment.get_or_insert_with(Segment::default), buf, ctx)
            }
            field::FLOAT_DATA => merge_packed(Packing::Fixed32, wire_type, &mut self.float_data, buf, ctx),
            field::INT32_DATA => merge_packed(Packing::Varint, wire_type, &mut self.int32_data, buf, ctx),
            field::STRING_DATA => encoding::bytes::merge_repeated(wire_type, &mut self.string_data, buf, ctx),
            field::INT64_DATA => merge_packed(Packing::Varint, wire_type, &mut self.int64_data, buf, ctx),
            field::NAME => encoding::string::merge(wire_type, &mut self.name, buf, ctx),
            field::RAW_DATA => encoding::bytes::merge(wire_type, &mut self.raw_data, buf, ctx),
            field::DOUBLE_DATA => merge_packed(Packing::Fixed64, wire_type, &mut self.double_data, buf, ctx),
            field::UINT64_DATA => merge_packed(Packing::Varint, wire_type, &mut self.uint64_data, buf, ctx),
            field::DOC_STRING => encoding::string::merge(wire_type, &mut self.doc_string, buf, ctx),
            field::EXTERNAL_DATA => encoding::message::merge_repeated(wire_type, &mut self.external_data, buf, ctx),
            field::DATA_LOCATION => encoding::int32::merge(wire_type, &mut self.data_location, buf, ctx),
            field::METADATA_PROPS => encoding::message::merge_repeated(wire_type, &mut self.metadata_props, buf, ctx),
            _ => encoding::skip_field(wire_type, tag, buf, ctx),
        }
    }

    fn encoded_len(&self) -> usize {
        let mut len = encoding::int64::encoded_len_packed(field::DIMS, &self.dims);
        if self.data_type != 0 {
            len += encoding::int32::encoded_len(field::DATA_TYPE, &self.data_type);
        }
        if let Some(segment) = &self.segment {
            len += encoding::message::encoded_len(field::SEGMENT, segment);
        }
        len += packed_field_len(field::FLOAT_DATA, &self.float_data);
        len += packed_field_len(field::INT32_DATA, &self.int32_data);
        len += encoding::bytes::encoded_len_repeated(field::STRING_DATA, &self.string_data);
        len += packed_field_len(field::INT64_DATA, &self.int64_data);
        len += string_len(field::NAME, &self.name);
        len += packed_field_len(field::RAW_DATA, &self.raw_data);
        len += packed_field_len(field::DOUBLE_DATA, &self.double_data);
        len += packed_field_len(field::UINT64_DATA, &self.uint64_data);
        len += string_len(field::DOC_STRING, &self.doc_string);
        len += encoding::message::encoded_len_repeated(field::EXTERNAL_DATA, &self.external_data);
        if self.data_location != 0 {
            len += encoding::int32::encoded_len(field::DATA_LOCATION, &self.data_location);
        }
        len += encoding::message::encoded_len_repeated(field::METADATA_PROPS, &self.metadata_props);
        len
    }

    fn clear(&mut self) {
        *self = TensorProto::default();
    }
}

/// Decodes a run of packed varints; `None` if the payload is malformed.
pub fn decode_varints(mut payload: &[u8]) -> Option<Vec<u64>> {
    let mut out = Vec::new();
    while !payload.is_empty() {
        out.push(encoding::decode_varint(&mut payload).ok()?);
    }
    Some(out)
}

impl TensorProto {
    /// Packed `float_data` as f32 values (fp16/bf16/float8 tensors keep bit patterns here).
    pub fn float_values(&self) -> Option<Vec<f32>> {
        fixed_chunks::<4>(&self.float_data).map(|c| c.map(f32::from_le_bytes).collect())
    }

    pub fn double_values(&self) -> Option<Vec<f64>> {
        fixed_chunks::<8>(&self.double_data).map(|c| c.map(f64::from_le_bytes).collect())
    }

    /// `int32_data` values; the spec stores int32 and every narrower integer type here.
    pub fn int32_values(&self) -> Option<Vec<i64>> {
        // int32 varints are sign-extended to 64 bits on the wire.
        decode_varints(&self.int32_data).map(|v| v.into_iter().map(|x| x as i64).collect())
    }

    pub fn int64_values(&self) -> Option<Vec<i64>> {
        decode_varints(&self.int64_data).map(|v| v.into_iter().map(|x| x as i64).collect())
    }

    pub fn uint64_values(&self) -> Option<Vec<u64>> {
        decode_varints(&self.uint64_data)
    }

    /// True when the tensor's payload lives in an external file.
    pub fn is_external(&self) -> bool {
        self.data_location == 1
    }
}

fn fixed_chunks<const N: usize>(payload: &[u8]) -> Option<impl Iterator<Item = [u8; N]> + '_> {
    if payload.len() % N != 0 {
        return None;
    }
    Some(payload.chunks_exact(N).map(|c| {
        let mut a = [0u8; N];
        a.copy_from_slice(c);
        a
    }))
}

#[cfg(test)]
mod tests {
    use super::*;
    use prost::Message;

    #[test]
    fn packed_and_unpacked_float_data_decode_alike() {
        // proto2 readers must accept both encodings of a repeated scalar (protobuf encoding
        // guide, "Packed Repeated Fields"); writers of [packed=true] fields emit the packed one.
        let mut unpacked = Vec::new();
        for v in [1.5f32, -2.0] {
            encoding::encode_key(field::FLOAT_DATA, WireType::ThirtyTwoBit, &mut unpacked);
            unpacked.put_f32_le(v);
        }
        let a = TensorProto::decode(Bytes::from(unpacked)).expect("decodes");
        let b = TensorProto {
            float_data: Bytes::from([1.5f32, -2.0].iter().flat_map(|v| v.to_le_bytes()).collect::<Vec<_>>()),
            ..Default::default()
        };
        let b = TensorProto::decode(Bytes::from(b.encode_to_vec())).expect("decodes");
        assert_eq!(a.float_values(), Some(vec![1.5, -2.0]));
        assert_eq!(a.float_values(), b.float_values());
    }

    #[test]
    fn raw_data_is_a_slice_of_the_input_not_a_copy() {
        let t = TensorProto {
            raw_data: Bytes::from(vec![7u8; 4096]),
            ..Default::default()
        };
        let wire = Bytes::from(t.encode_to_vec());
        let decoded = TensorProto::decode(wire.clone()).expect("decodes");
        let start = wire.as_ptr() as usize;
        let inner = decoded.raw_data.as_ptr() as usize;
        assert!(inner >= start && inner < start + wire.len());
    }

    #[test]
    fn negative_int32_round_trips() {
        let mut payload = BytesMut::new();
        encoding::encode_varint(-3i64 as u64, &mut payload);
        let t = TensorProto {
            int32_data: payload.freeze(),
            ..Default::default()
        };
        let d = TensorProto::decode(Bytes::from(t.encode_to_vec())).expect("decodes");
        assert_eq!(d.int32_values(), Some(vec![-3]));
    }
}
