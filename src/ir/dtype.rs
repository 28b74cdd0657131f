//! Element types, numbered as in the ONNX standard's `TensorProto.DataType`.

#[derive(Clone, Copy, Debug, PartialEq, Eq, PartialOrd, Ord, Hash)]
pub enum DType {
    F32,
    U8,
    I8,
    U16,
    I16,
    I32,
    I64,
    Str,
    Bool,
    F16,
    F64,
    U32,
    U64,
    C64,
    C128,
    BF16,
    F8E4M3FN,
    F8E4M3FNUZ,
    F8E5M2,
    F8E5M2FNUZ,
    U4,
    I4,
    F4E2M1,
    F8E8M0,
    U2,
    I2,
    F6E2M3,
    F6E3M2,
}

/// (code in the standard, our type, its name in the standard, bits per element).
/// Codes are the ONNX standard's `TensorProto.DataType` (onnx.proto), checked against the
/// `onnx` Python package 1.23 (`TensorProto.DataType.items()`; see tests/python_reference.rs).
const TABLE: &[(i32, DType, &str, u32)] = &[
    (1, DType::F32, "float32", 32),
    (2, DType::U8, "uint8", 8),
    (3, DType::I8, "int8", 8),
    (4, DType::U16, "uint16", 16),
    (5, DType::I16, "int16", 16),
    (6, DType::I32, "int32", 32),
    (7, DType::I64, "int64", 64),
    (8, DType::Str, "string", 0),
    (9, DType::Bool, "bool", 8),
    (10, DType::F16, "float16", 16),
    (11, DType::F64, "float64", 64),
    (12, DType::U32, "uint32", 32),
    (13, DType::U64, "uint64", 64),
    (14, DType::C64, "complex64", 64),
    (15, DType::C128, "complex128", 128),
    (16, DType::BF16, "bfloat16", 16),
    (17, DType::F8E4M3FN, "float8e4m3fn", 8),
    (18, DType::F8E4M3FNUZ, "float8e4m3fnuz", 8),
    (19, DType::F8E5M2, "float8e5m2", 8),
    (20, DType::F8E5M2FNUZ, "float8e5m2fnuz", 8),
    (21, DType::U4, "uint4", 4),
    (22, DType::I4, "int4", 4),
    (23, DType::F4E2M1, "float4e2m1", 4),
    (24, DType::F8E8M0, "float8e8m0", 8),
    (25, DType::U2, "uint2", 2),
    (26, DType::I2, "int2", 2),
    (27, DType::F6E2M3, "float6e2m3", 6),
    (28, DType::F6E3M2, "float6e3m2", 6),
];

impl DType {
    pub fn from_onnx(code: i32) -> Option<DType> {
        TABLE.iter().find(|e| e.0 == code).map(|e| e.1)
    }

    pub fn onnx_code(self) -> i32 {
        TABLE.iter().find(|e| e.1 == self).map(|e| e.0).unwrap_or(0)
    }

    pub fn name(self) -> &'static str {
        TABLE.iter().find(|e| e.1 == self).map(|e| e.2).unwrap_or("undefined")
    }

    pub fn from_name(name: &str) -> Option<DType> {
        TABLE.iter().find(|e| e.2 == name).map(|e| e.1)
    }

    /// Storage bits per element (0 for strings, whose size is not fixed).
    pub fn bits(self) -> u32 {
        TABLE.iter().find(|e| e.1 == self).map(|e| e.3).unwrap_or(0)
    }

    /// Bytes for `n` elements, sub-byte types packed (as the standard stores them in raw_data).
    pub fn bytes_for(self, n: u64) -> Option<u64> {
        let bits = self.bits() as u64;
        if bits == 0 {
            return None;
        }
        Some(n.checked_mul(bits)?.div_ceil(8))
    }

    pub fn is_float(self) -> bool {
        matches!(
            self,
            DType::F32
                | DType::F16
                | DType::F64
                | DType::BF16
                | DType::F8E4M3FN
                | DType::F8E4M3FNUZ
                | DType::F8E5M2
                | DType::F8E5M2FNUZ
                | DType::F4E2M1
                | DType::F8E8M0
                | DType::F6E2M3
                | DType::F6E3M2
        )
    }

    pub fn is_integer(self) -> bool {
        matches!(
            self,
            DType::U8
                | DType::I8
                | DType::U16
                | DType::I16
                | DType::I32
                | DType::I64
                | DType::U32
                | DType::U64
                | DType::U4
                | DType::I4
                | DType::U2
                | DType::I2
        )
    }
}

impl std::fmt::Display for DType {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.write_str(self.name())
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn codes_are_unique_and_round_trip() {
        for (i, a) in TABLE.iter().enumerate() {
            assert_eq!(DType::from_onnx(a.0), Some(a.1));
            assert_eq!(DType::from_name(a.2), Some(a.1));
            for b in &TABLE[i + 1..] {
                assert!(a.0 != b.0 && a.1 != b.1 && a.2 != b.2);
            }
        }
    }

    #[test]
    fn sub_byte_types_pack() {
        // ONNX IR spec, "4 bit integer types": two elements per byte, odd counts round up.
        assert_eq!(DType::I4.bytes_for(3), Some(2));
        assert_eq!(DType::F4E2M1.bytes_for(4), Some(2));
        assert_eq!(DType::F32.bytes_for(3), Some(12));
    }
}
