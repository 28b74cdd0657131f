//! Decoding small stored tensors into values, for shape arithmetic and quantization
//! parameters. Works on in-memory payloads only; the caller reads external bytes.

use crate::ir::{ConstValue, DType, Storage, TensorData};
use crate::onnx::tensor::decode_varints;

/// Tensors larger than this are never decoded: analysis needs only small constants.
pub const MAX_DECODE_ELEMENTS: u64 = 1 << 16;

/// Decodes `data` if it is small, in memory, and of a numeric type tilecut reads.
pub fn decode(data: &TensorData) -> Option<ConstValue> {
    let n = data.element_count()?;
    if n > MAX_DECODE_ELEMENTS {
        return None;
    }
    let dt = data.dtype?;
    let dims = data.dims.clone();
    match &data.storage {
        Storage::Raw(b) => decode_raw(dt, b, n as usize).map(|v| with_dims(v, dims)),
        Storage::Fixed32(b) => {
            let v: Vec<f64> = b
                .chunks_exact(4)
                .map(|c| f32::from_le_bytes([c[0], c[1], c[2], c[3]]) as f64)
                .collect();
            (v.len() == n as usize && dt == DType::F32).then(|| ConstValue::floats(dims, v))
        }
        Storage::Fixed64(b) => {
            let v: Vec<f64> = b
                .chunks_exact(8)
                .map(|c| f64::from_le_bytes(c.try_into().unwrap_or([0; 8])))
                .collect();
            (v.len() == n as usize).then(|| ConstValue::floats(dims, v))
        }
        Storage::Varints(b) => {
            let raw = decode_varints(b)?;
            if raw.len() != n as usize {
                return None;
            }
            match dt {
                // fp16/bf16 travel as their bit patterns in int32_data (ONNX IR spec).
                DType::F16 => Some(ConstValue::floats(
                    dims,
                    raw.iter().map(|&x| f16_to_f64(x as u16)).collect(),
                )),
                DType::BF16 => Some(ConstValue::floats(
                    dims,
                    raw.iter().map(|&x| bf16_to_f64(x as u16)).collect(),
                )),
                DType::U64 => Some(ConstValue::ints(
                    dims,
                    raw.iter().map(|&x| x.min(i64::MAX as u64) as i64).collect(),
                )),
                d if d.is_integer() || d == DType::Bool => {
                    Some(ConstValue::ints(dims, raw.iter().map(|&x| x as i64).collect()))
                }
                _ => None,
            }
        }
        Storage::Empty if n == 0 => Some(ConstValue::ints(dims, Vec::new())),
        _ => None,
    }
}

enum Decoded {
    Int(Vec<i64>),
    Float(Vec<f64>),
}

fn with_dims(v: Decoded, dims: Vec<u64>) -> ConstValue {
    match v {
        Decoded::Int(x) => ConstValue::ints(dims, x),
        Decoded::Float(x) => ConstValue::floats(dims, x),
    }
}

/// Decodes little-endian `raw_data` of `n` elements.
pub fn decode_raw_bytes(dt: DType, b: &[u8], dims: Vec<u64>) -> Option<ConstValue> {
    let n = dims.iter().product::<u64>() as usize;
    decode_raw(dt, b, n).map(|v| with_dims(v, dims))
}

fn decode_raw(dt: DType, b: &[u8], n: usize) -> Option<Decoded> {
    let need = dt.bytes_for(n as u64)? as usize;
    if b.len() != need {
        return None;
    }
    macro_rules! ints {
        ($t:ty, $w:expr) => {
            Decoded::Int(
                b.chunks_exact($w)
                    .map(|c| <$t>::from_le_bytes(c.try_into().unwrap_or([0; $w])) as i64)
                    .collect(),
            )
        };
    }
    Some(match dt {
        DType::F32 => Decoded::Float(
            b.chunks_exact(4)
                .map(|c| f32::from_le_bytes([c[0], c[1], c[2], c[3]]) as f64)
                .collect(),
        ),
        DType::F64 => Decoded::Float(
            b.chunks_exact(8)
                .map(|c| f64::from_le_bytes(c.try_into().unwrap_or([0; 8])))
                .collect(),
        ),
        DType::F16 => Decoded::Float(
            b.chunks_exact(2)
                .map(|c| f16_to_f64(u16::from_le_bytes([c[0], c[1]])))
                .collect(),
        ),
        DType::BF16 => Decoded::Float(
            b.chunks_exact(2)
                .map(|c| bf16_to_f64(u16::from_le_bytes([c[0], c[1]])))
                .collect(),
        ),
        DType::I8 => Decoded::Int(b.iter().map(|&x| x as i8 as i64).collect()),
        DType::U8 | DType::Bool => Decoded::Int(b.iter().map(|&x| x as i64).collect()),
        DType::I16 => ints!(i16, 2),
        DType::U16 => ints!(u16, 2),
        DType::I32 => ints!(i32, 4),
        DType::U32 => ints!(u32, 4),
        DType::I64 => ints!(i64, 8),
        DType::U64 => Decoded::Int(
            b.chunks_exact(8)
                .map(|c| u64::from_le_bytes(c.try_into().unwrap_or([0; 8])).min(i64::MAX as u64) as i64)
                .collect(),
        ),
        // 4-bit integers: two per byte, low nibble first (ONNX IR spec, "4 bit integer types").
        DType::I4 | DType::U4 => {
            let signed = dt == DType::I4;
            Decoded::Int(
                (0..n)
                    .map(|i| {
                        let byte = b[i / 2];
                        let nib = if i % 2 == 0 { byte & 0x0f } else { byte >> 4 };
                        if signed && nib >= 8 {
                            nib as i64 - 16
                        } else {
                            nib as i64
                        }
                    })
                    .collect(),
            )
        }
        _ => return None,
    })
}

/// IEEE 754 binary16 to f64.
pub fn f16_to_f64(h: u16) -> f64 {
    let sign = if h & 0x8000 != 0 { -1.0 } else { 1.0 };
    let exp = ((h >> 10) & 0x1f) as i32;
    let frac = (h & 0x3ff) as f64;
    sign * match exp {
        0 => frac * 2f64.powi(-24),
        31 => {
            if frac == 0.0 {
                f64::INFINITY
            } else {
                f64::NAN
            }
        }
        e => (1.0 + frac / 1024.0) * 2f64.powi(e - 15),
    }
}

pub fn bf16_to_f64(h: u16) -> f64 {
    f32::from_bits((h as u32) << 16) as f64
}

/// f64 to IEEE 754 binary16 bits, rounding to nearest, ties to even (what a Cast does).
pub fn f64_to_f16_bits(x: f64) -> u16 {
    // Through f32 is exact for every value an f16 round-trip produced; for others the double
    // rounding can differ from direct rounding by one ulp in rare ties, acceptable for
    // constants materialised from folding.
    let f = x as f32;
    let b = f.to_bits();
    let sign = ((b >> 16) & 0x8000) as u16;
    let exp = ((b >> 23) & 0xff) as i32;
    let mant = b & 0x7f_ffff;
    if exp == 0xff {
        return sign | 0x7c00 | if mant != 0 { 0x200 } else { 0 };
    }
    let e = exp - 127 + 15;
    if e >= 0x1f {
        return sign | 0x7c00;
    }
    if e <= 0 {
        if e < -10 {
            return sign;
        }
        // Subnormal: shift the implicit-one mantissa into place, round to nearest even.
        let m = mant | 0x80_0000;
        let shift = (14 - e) as u32;
        let half = 1u32 << (shift - 1);
        let rest = m & ((1u32 << shift) - 1);
        let mut v = m >> shift;
        if rest > half || (rest == half && v & 1 == 1) {
            v += 1;
        }
        return sign | v as u16;
    }
    let rest = mant & 0x1fff;
    let mut v = ((e as u32) << 10) | (mant >> 13);
    if rest > 0x1000 || (rest == 0x1000 && v & 1 == 1) {
        v += 1; // may carry into the exponent, which is the correct rounding
    }
    sign | v as u16
}

/// f64 to bfloat16 bits, rounding to nearest, ties to even.
pub fn f64_to_bf16_bits(x: f64) -> u16 {
    let b = (x as f32).to_bits();
    if (b & 0x7fff_ffff) > 0x7f80_0000 {
        return ((b >> 16) | 0x40) as u16; // a quiet NaN
    }
    let round = 0x7fff + ((b >> 16) & 1);
    (b.wrapping_add(round) >> 16) as u16
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn half_precision_round_trips() {
        // Every finite binary16 value converts back to its own bits (IEEE 754-2008 binary16).
        for h in 0u16..=0xffff {
            let x = f16_to_f64(h);
            if x.is_nan() {
                assert_eq!(f64_to_f16_bits(x) & 0x7c00, 0x7c00);
                continue;
            }
            assert_eq!(f64_to_f16_bits(x), h, "{h:#06x} = {x}");
        }
        for h in [0x3f80u16, 0xc000, 0x7f7f, 0x0001, 0x8000] {
            assert_eq!(f64_to_bf16_bits(bf16_to_f64(h)), h);
        }
        // Ties to even: 1 + 2^-11 lies halfway between 1 and the next binary16 value.
        assert_eq!(f64_to_f16_bits(1.0 + 2f64.powi(-11)), 0x3c00);
        assert_eq!(f64_to_f16_bits(70000.0), 0x7c00, "overflow to infinity");
    }

    #[test]
    fn half_precision_values() {
        // IEEE 754-2008 binary16: 0x3c00 = 1.0, 0xc000 = -2.0, 0x7bff = 65504 (largest normal).
        assert_eq!(f16_to_f64(0x3c00), 1.0);
        assert_eq!(f16_to_f64(0xc000), -2.0);
        assert_eq!(f16_to_f64(0x7bff), 65504.0);
        assert_eq!(bf16_to_f64(0x3f80), 1.0);
    }

    #[test]
    fn int4_nibbles_low_first() {
        // ONNX IR spec: element 0 in the low nibble; 0xF is -1 as int4.
        let v = decode_raw_bytes(DType::I4, &[0xf1, 0x07], vec![3]).expect("decodes");
        assert_eq!(v.as_ints(), vec![1, -1, 7]);
    }
}
