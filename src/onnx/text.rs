//! `ProtoStr`: a protobuf string field that shares the bytes it was decoded from.
//!
//! A model's names (node, op type, domain, every input and output) are most of a large
//! graph's wire bytes. Decoding each into a `String` was one heap allocation, one copy and,
//! on a 100k-node graph, a third of the decoded tree's memory. Decoded from the file's
//! `Bytes` (a memory map), a `ProtoStr` is a slice of the map: a reference count, no copy.
//! Its UTF-8 is checked once, when it is decoded, as the standard requires of `string`.

use std::fmt;
use std::ops::Deref;

use bytes::{Buf, BufMut, Bytes};
use prost::encoding::{self, DecodeContext, WireType};
use prost::DecodeError;

/// A UTF-8 string held in `Bytes`: a slice of the decoded buffer, or an owned string.
#[derive(Clone, Default)]
pub struct ProtoStr {
    bytes: Bytes,
}

impl ProtoStr {
    pub const fn new() -> Self {
        ProtoStr { bytes: Bytes::new() }
    }

    pub fn as_str(&self) -> &str {
        // SAFETY: every constructor checks or inherits UTF-8: `merge` checks it, `From<&str>`
        // and `From<String>` take a `str`, and `Clone` shares checked bytes.
        unsafe { std::str::from_utf8_unchecked(&self.bytes) }
    }

    /// Decodes one length-delimited string field, sharing `buf`'s bytes where `buf` is
    /// `Bytes` (zero-copy) and copying otherwise.
    pub fn merge(wire_type: WireType, buf: &mut impl Buf, _ctx: DecodeContext) -> Result<Self, DecodeError> {
        encoding::check_wire_type(WireType::LengthDelimited, wire_type)?;
        let len = encoding::decode_varint(buf)?;
        if len > buf.remaining() as u64 {
            return Err(DecodeError::new("buffer underflow"));
        }
        let bytes = buf.copy_to_bytes(len as usize);
        // Names are almost always ASCII: a word-at-a-time check of that, before the full
        // UTF-8 check (whose per-call setup cost 4% of reading a 100k-node graph).
        if !bytes.is_ascii() && std::str::from_utf8(&bytes).is_err() {
            return Err(DecodeError::new("invalid string value: data is not UTF-8 encoded"));
        }
        Ok(ProtoStr { bytes })
    }

    /// Writes the field unless it is empty (proto3: an empty string is the default).
    pub fn encode(&self, tag: u32, buf: &mut impl BufMut) {
        encode_string(tag, self, buf);
    }

    /// Writes the field even when empty (an element of a repeated field).
    pub fn encode_always(&self, tag: u32, buf: &mut impl BufMut) {
        encode_field(tag, self, buf);
    }

    pub fn encoded_len(&self, tag: u32) -> usize {
        string_len(tag, self)
    }

    pub fn encoded_len_always(&self, tag: u32) -> usize {
        field_len(tag, self)
    }
}

/// A proto3 string field, written only when not empty: `ProtoStr`s and the `String` fields of
/// the other hand-written messages.
pub(super) fn encode_string(tag: u32, s: &str, buf: &mut impl BufMut) {
    if !s.is_empty() {
        encode_field(tag, s, buf);
    }
}

pub(super) fn string_len(tag: u32, s: &str) -> usize {
    if s.is_empty() {
        0
    } else {
        field_len(tag, s)
    }
}

fn encode_field(tag: u32, s: &str, buf: &mut impl BufMut) {
    encoding::encode_key(tag, WireType::LengthDelimited, buf);
    encoding::encode_varint(s.len() as u64, buf);
    buf.put_slice(s.as_bytes());
}

fn field_len(tag: u32, s: &str) -> usize {
    encoding::key_len(tag) + encoding::encoded_len_varint(s.len() as u64) + s.len()
}

impl Deref for ProtoStr {
    type Target = str;
    fn deref(&self) -> &str {
        self.as_str()
    }
}

impl From<&str> for ProtoStr {
    fn from(s: &str) -> Self {
        ProtoStr {
            bytes: Bytes::copy_from_slice(s.as_bytes()),
        }
    }
}

impl From<String> for ProtoStr {
    fn from(s: String) -> Self {
        ProtoStr { bytes: Bytes::from(s) }
    }
}

impl From<&ProtoStr> for String {
    fn from(s: &ProtoStr) -> Self {
        s.as_str().to_owned()
    }
}

impl PartialEq for ProtoStr {
    fn eq(&self, other: &Self) -> bool {
        self.bytes == other.bytes
    }
}

impl Eq for ProtoStr {}

impl PartialEq<&str> for ProtoStr {
    fn eq(&self, other: &&str) -> bool {
        self.as_str() == *other
    }
}

impl fmt::Debug for ProtoStr {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        fmt::Debug::fmt(self.as_str(), f)
    }
}

impl fmt::Display for ProtoStr {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(self.as_str())
    }
}

/// One element of a repeated string field, pushed without slack (see `node::push_exact`).
pub(super) fn merge_repeated(
    wire_type: WireType,
    v: &mut Vec<ProtoStr>,
    buf: &mut impl Buf,
    ctx: DecodeContext,
) -> Result<(), DecodeError> {
    let s = ProtoStr::merge(wire_type, buf, ctx)?;
    super::node::push_exact(v, s);
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;

    fn field(tag: u32, payload: &[u8]) -> Vec<u8> {
        let mut wire = Vec::new();
        encoding::encode_key(tag, WireType::LengthDelimited, &mut wire);
        encoding::encode_varint(payload.len() as u64, &mut wire);
        wire.extend_from_slice(payload);
        wire
    }

    #[test]
    fn a_string_decoded_from_bytes_shares_them() {
        let wire = Bytes::from(field(3, b"conv_1"));
        let mut buf = wire.clone();
        let (tag, wt) = encoding::decode_key(&mut buf).expect("key");
        assert_eq!(tag, 3);
        let s = ProtoStr::merge(wt, &mut buf, DecodeContext::default()).expect("decodes");
        assert_eq!(s, "conv_1");
        // The same memory as the wire buffer: a slice, not a copy.
        let at = wire.as_ptr() as usize;
        assert!((at..at + wire.len()).contains(&(s.as_ptr() as usize)));
        let mut out = Vec::new();
        s.encode(3, &mut out);
        assert_eq!(out, wire.to_vec());
        assert_eq!(s.encoded_len(3), wire.len());
        assert_eq!(ProtoStr::from("conv_1"), s);
    }

    /// The protobuf language guide: a `string` "must always contain UTF-8 encoded text".
    #[test]
    fn invalid_utf8_and_short_buffers_are_errors() {
        let mut buf = Bytes::from(field(3, &[0x66, 0xff, 0x66])[1..].to_vec());
        assert!(ProtoStr::merge(WireType::LengthDelimited, &mut buf, DecodeContext::default()).is_err());
        let mut wire = field(3, b"abc");
        wire.truncate(wire.len() - 1);
        let mut buf = Bytes::from(wire[1..].to_vec());
        assert!(ProtoStr::merge(WireType::LengthDelimited, &mut buf, DecodeContext::default()).is_err());
        let mut buf = Bytes::from(vec![1u8]);
        assert!(ProtoStr::merge(WireType::Varint, &mut buf, DecodeContext::default()).is_err());
    }

    #[test]
    fn empty_is_not_written_but_counts_in_a_repeated_field() {
        let mut out = Vec::new();
        ProtoStr::new().encode(1, &mut out);
        assert!(out.is_empty());
        ProtoStr::new().encode_always(1, &mut out);
        assert_eq!(out, [0x0a, 0x00]);
        assert_eq!(ProtoStr::new().encoded_len_always(1), 2);
    }
}
