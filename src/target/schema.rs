//! The target profile file format (TOML). The only module that knows its keys; see
//! `builtin/*.toml` for commented examples and the README for the key reference.
//!
//! Units are fixed: bytes, seconds, hertz, MACs per cycle per data type, operations per
//! second. TOPS = 2 × MACs/s ÷ 10¹².

use std::collections::BTreeMap;

use serde::{Deserialize, Serialize};

/// The profile format version this build reads.
pub const PROFILE_VERSION: u32 = 1;

#[derive(Deserialize, Serialize, Debug, Clone)]
#[serde(deny_unknown_fields)]
pub struct ProfileFile {
    pub version: u32,
    pub name: String,
    #[serde(default)]
    pub description: String,
    pub array: ArraySpec,
    pub host: HostLink,
    pub cpu: CpuModel,
    #[serde(default)]
    pub float: FloatPolicy,
    #[serde(default, rename = "rule")]
    pub rules: Vec<RuleSpec>,
    #[serde(default, rename = "movement")]
    pub movement: Vec<MovementSpec>,
}

#[derive(Deserialize, Serialize, Debug, Clone)]
#[serde(deny_unknown_fields)]
pub struct ArraySpec {
    /// Columns of the array.
    pub columns: u32,
    /// Compute tiles per column.
    pub compute_rows: u32,
    pub clock_hz: f64,
    /// Time to load a different partition's configuration onto the array.
    #[serde(default)]
    pub reconfigure_s: f64,
    pub compute_tile: ComputeTileSpec,
    pub buffer_tile: BufferTileSpec,
    pub io_tile: IoTileSpec,
}

#[derive(Deserialize, Serialize, Debug, Clone)]
#[serde(deny_unknown_fields)]
pub struct ComputeTileSpec {
    pub local_memory_bytes: u64,
    /// Neighbouring tiles whose data memory this tile addresses directly.
    pub neighbour_memories: u32,
    pub stream_inputs: u32,
    pub stream_outputs: u32,
    /// Peak MACs per cycle per data type name (int8, int16, bf16, …).
    pub macs_per_cycle: BTreeMap<String, u64>,
}

#[derive(Deserialize, Serialize, Debug, Clone)]
#[serde(deny_unknown_fields)]
pub struct BufferTileSpec {
    pub capacity_bytes: u64,
    pub dma_channels: u32,
    /// Dimensions of a DMA access pattern (multi-dimensional addressing).
    pub addressing_dims: u32,
}

#[derive(Deserialize, Serialize, Debug, Clone)]
#[serde(deny_unknown_fields)]
pub struct IoTileSpec {
    pub dma_channels: u32,
    pub bandwidth_bytes_per_s: f64,
}

#[derive(Deserialize, Serialize, Debug, Clone)]
#[serde(deny_unknown_fields)]
pub struct HostLink {
    pub bandwidth_bytes_per_s: f64,
    pub transfer_latency_s: f64,
    pub dispatch_overhead_s: f64,
    #[serde(default)]
    pub layout_conversion_s: f64,
}

#[derive(Deserialize, Serialize, Debug, Clone)]
#[serde(deny_unknown_fields)]
pub struct CpuModel {
    /// Sustained operations per second per data type name.
    pub ops_per_s: BTreeMap<String, f64>,
    pub memory_bandwidth_bytes_per_s: f64,
}

#[derive(Deserialize, Serialize, Debug, Clone)]
#[serde(deny_unknown_fields)]
pub struct FloatPolicy {
    /// "cpu": float ops stay on the CPU; "bf16": they run on the array as bf16.
    pub mode: String,
    /// Conversion throughput for fp32 ↔ bf16 at the boundary, when mode = "bf16".
    #[serde(default)]
    pub conversion_bytes_per_s: f64,
}

impl Default for FloatPolicy {
    fn default() -> Self {
        FloatPolicy {
            mode: "cpu".into(),
            conversion_bytes_per_s: 0.0,
        }
    }
}

#[derive(Deserialize, Serialize, Debug, Clone)]
#[serde(deny_unknown_fields)]
pub struct TypeSig {
    pub act: String,
    #[serde(default)]
    pub weight: Option<String>,
    #[serde(default)]
    pub out: Option<String>,
    #[serde(default)]
    pub acc: Option<String>,
}

#[derive(Deserialize, Serialize, Debug, Clone)]
#[serde(deny_unknown_fields)]
pub struct AttrSpec {
    pub name: String,
    /// Values the attribute may take (integers or strings).
    pub allowed: Vec<toml::Value>,
    /// The ONNX default, used when the node omits the attribute.
    #[serde(default)]
    pub default: Option<toml::Value>,
}

#[derive(Deserialize, Serialize, Debug, Clone)]
#[serde(deny_unknown_fields)]
pub struct RuleSpec {
    pub id: String,
    pub why: String,
    pub ops: Vec<String>,
    #[serde(default)]
    pub domain: String,
    /// Inclusive opset range [min, max].
    #[serde(default)]
    pub opsets: Option<[i64; 2]>,
    /// Allowed type signatures; empty means any type.
    #[serde(default)]
    pub types: Vec<TypeSig>,
    /// "per-tensor", "per-channel" or "any".
    #[serde(default)]
    pub weight_granularity: Option<String>,
    #[serde(default)]
    pub weight_axis: Option<i64>,
    #[serde(default)]
    pub symmetric_weights: bool,
    #[serde(default)]
    pub per_tensor_activations: bool,
    #[serde(default)]
    pub pow2_scales: bool,
    #[serde(default)]
    pub blocked_weights: bool,
    #[serde(default)]
    pub kernel_max: Option<u64>,
    #[serde(default)]
    pub stride_max: Option<u64>,
    #[serde(default)]
    pub dilation_max: Option<u64>,
    /// Group forms: "regular", "depthwise", "grouped".
    #[serde(default)]
    pub groups: Option<Vec<String>>,
    #[serde(default, rename = "attr")]
    pub attrs: Vec<AttrSpec>,
    #[serde(default = "yes")]
    pub static_shapes: bool,
    #[serde(default)]
    pub max_rank: Option<usize>,
    #[serde(default)]
    pub max_dim: Option<u64>,
    /// Channel counts are padded to a multiple of this (an efficiency note, not a blocker).
    #[serde(default)]
    pub channel_align: Option<u64>,
}

fn yes() -> bool {
    true
}

#[derive(Deserialize, Serialize, Debug, Clone)]
#[serde(deny_unknown_fields)]
pub struct MovementSpec {
    pub id: String,
    pub why: String,
    pub ops: Vec<String>,
    /// "dma" (the buffer tile's access patterns do it) or "tile" (a compute tile copies).
    pub how: String,
    #[serde(default)]
    pub max_rank: Option<usize>,
}
