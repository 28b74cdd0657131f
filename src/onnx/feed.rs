//! Reading one input tensor from an ONNX `TensorProto` file (`.pb`, the format of the ONNX
//! backend test data sets) into host memory, for `verify`.

use bytes::Bytes;
use prost::Message;

use super::TensorProto;
use crate::ir::{DType, HostTensor};

/// Decodes a serialized `TensorProto`: its name (if any) and its elements, little-endian.
pub fn decode_pb(bytes: &[u8]) -> Result<(Option<String>, HostTensor), String> {
    let t = TensorProto::decode(Bytes::copy_from_slice(bytes)).map_err(|e| format!("not an ONNX TensorProto: {e}"))?;
    if t.is_external() {
        return Err("the tensor's data is stored externally; give the data inline".into());
    }
    let dtype = DType::from_onnx(t.data_type).ok_or_else(|| format!("unknown data type code {}", t.data_type))?;
    let dims: Vec<u64> = t
        .dims
        .iter()
        .map(|&d| u64::try_from(d).map_err(|_| format!("negative dim {d}")))
        .collect::<Result<_, _>>()?;
    let n = dims
        .iter()
        .try_fold(1u64, |a, &d| a.checked_mul(d))
        .ok_or("the shape overflows")? as usize;
    let data: Vec<u8> = if !t.raw_data.is_empty() || n == 0 {
        t.raw_data.to_vec()
    } else {
        // Typed fields, as the standard assigns them to element types (onnx.proto comments).
        let bad = || format!("the {} payload is malformed", dtype.name());
        match dtype {
            DType::F32 => t.float_data.to_vec(),
            DType::F64 => t.double_data.to_vec(),
            DType::I64 => t
                .int64_values()
                .ok_or_else(bad)?
                .iter()
                .flat_map(|v| v.to_le_bytes())
                .collect(),
            DType::U32 | DType::U64 => {
                let v = t.uint64_values().ok_or_else(bad)?;
                if dtype == DType::U32 {
                    v.iter().flat_map(|x| (*x as u32).to_le_bytes()).collect()
                } else {
                    v.iter().flat_map(|x| x.to_le_bytes()).collect()
                }
            }
            // int32_data carries every type of 32 bits or fewer, one element per value
            // (fp16/bf16 as their bit patterns).
            DType::I32 | DType::I16 | DType::U16 | DType::I8 | DType::U8 | DType::Bool | DType::F16 | DType::BF16 => {
                let v = t.int32_values().ok_or_else(bad)?;
                let width = (dtype.bits() / 8) as usize;
                v.iter().flat_map(|x| x.to_le_bytes()[..width].to_vec()).collect()
            }
            other => return Err(format!("{} inputs are not supported", other.name())),
        }
    };
    let name = (!t.name.is_empty()).then(|| t.name.clone());
    let h = HostTensor {
        dtype,
        dims,
        bytes: data,
    };
    h.consistent()?;
    Ok((name, h))
}
