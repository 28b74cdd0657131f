//! A fast, deterministic hasher for the name tables of the reader (the FxHash multiply-rotate
//! scheme used by rustc). Hash maps are never iterated into output, so their order does not
//! matter; only speed does.

use std::collections::{HashMap, HashSet};
use std::hash::{BuildHasherDefault, Hasher};

#[derive(Default, Clone, Copy)]
pub struct FxHasher(u64);

const SEED: u64 = 0x51_7c_c1_b7_27_22_0a_95;

impl Hasher for FxHasher {
    fn write(&mut self, bytes: &[u8]) {
        let mut chunks = bytes.chunks_exact(8);
        for c in &mut chunks {
            let mut w = [0u8; 8];
            w.copy_from_slice(c);
            self.add(u64::from_le_bytes(w));
        }
        let rest = chunks.remainder();
        if !rest.is_empty() {
            self.add(tail_word(rest) ^ rest.len() as u64);
        }
    }

    fn write_u8(&mut self, i: u8) {
        self.add(i as u64);
    }

    fn write_usize(&mut self, i: usize) {
        self.add(i as u64);
    }

    fn finish(&self) -> u64 {
        // The multiply leaves the low bits weak, and hashbrown picks buckets by the low bits:
        // names that differ late ("b1234.q", "b1235.q") then collide and cost string
        // compares. MurmurHash3's 64-bit finalizer spreads every input bit.
        let mut x = self.0;
        x ^= x >> 33;
        x = x.wrapping_mul(0xff51_afd7_ed55_8ccd);
        x ^= x >> 33;
        x = x.wrapping_mul(0xc4ce_b9fe_1a85_ec53);
        x ^ (x >> 33)
    }
}

/// The bytes of a tail shorter than a word, as one word, distinct for distinct tails of one
/// length. Read with fixed-size loads: copying a variable-length tail into a buffer compiled
/// to a call to libc's `memcpy` and a stalled reload, on every short name hashed (8% of a
/// 100k-node `inspect` in a profile).
fn tail_word(rest: &[u8]) -> u64 {
    let n = rest.len();
    if n >= 4 {
        // Two overlapping four-byte reads cover all of a 4..=7-byte tail.
        let lo = u32::from_le_bytes([rest[0], rest[1], rest[2], rest[3]]);
        let hi = u32::from_le_bytes([rest[n - 4], rest[n - 3], rest[n - 2], rest[n - 1]]);
        lo as u64 | (hi as u64) << 32
    } else {
        // Bytes 0, n/2 and n-1 are all of a 1..=3-byte tail.
        rest[0] as u64 | (rest[n / 2] as u64) << 8 | (rest[n - 1] as u64) << 16
    }
}

impl FxHasher {
    fn add(&mut self, w: u64) {
        self.0 = (self.0.rotate_left(5) ^ w).wrapping_mul(SEED);
    }
}

pub type FastMap<K, V> = HashMap<K, V, BuildHasherDefault<FxHasher>>;
pub type FastSet<K> = HashSet<K, BuildHasherDefault<FxHasher>>;

/// Byte equality of two short texts without a call into the C library's `memcmp`: the
/// reader compares hundreds of thousands of short names (op types, tensor names), and on the
/// machines measured the call cost more than the comparison (a fifth of a large graph's
/// reading time, with libc's vector `memcmp`).
pub fn short_text_eq(a: &str, b: &str) -> bool {
    let (a, b) = (a.as_bytes(), b.as_bytes());
    if a.len() != b.len() {
        return false;
    }
    let mut ca = a.chunks_exact(8);
    let mut cb = b.chunks_exact(8);
    for (x, y) in (&mut ca).zip(&mut cb) {
        let word = |c: &[u8]| {
            let mut w = [0u8; 8];
            w.copy_from_slice(c);
            u64::from_ne_bytes(w)
        };
        if word(x) != word(y) {
            return false;
        }
    }
    ca.remainder().iter().zip(cb.remainder()).all(|(x, y)| x == y)
}

/// A borrowed name as a hash key, compared with `short_text_eq`.
#[derive(Clone, Copy, Debug)]
pub struct TextKey<'a>(pub &'a str);

impl PartialEq for TextKey<'_> {
    fn eq(&self, other: &Self) -> bool {
        short_text_eq(self.0, other.0)
    }
}

impl Eq for TextKey<'_> {}

impl std::hash::Hash for TextKey<'_> {
    #[inline]
    fn hash<H: Hasher>(&self, state: &mut H) {
        self.0.hash(state);
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn short_text_eq_agrees_with_str_eq() {
        let words = [
            "",
            "a",
            "ab",
            "Conv",
            "MatMulInteger",
            "b12.attn.q_proj",
            "b12.attn.q_proK",
            "x".repeat(40).leak(),
        ];
        for a in words {
            for b in words {
                assert_eq!(short_text_eq(a, b), a == b, "{a:?} vs {b:?}");
            }
        }
    }

    #[test]
    fn tails_of_one_length_hash_apart() {
        // Every tail of 1..=7 bytes over a small alphabet: distinct tails, distinct words.
        for n in 1..=7usize {
            let mut seen = std::collections::HashSet::new();
            for k in 0..3usize.pow(n as u32) {
                let tail: Vec<u8> = (0..n).map(|i| b"ab."[(k / 3usize.pow(i as u32)) % 3]).collect();
                assert!(seen.insert(tail_word(&tail)), "{n} bytes: {tail:?}");
            }
        }
    }
}
