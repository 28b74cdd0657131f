//! Target profiles: the built-in ones (TOML files embedded at build time), loading a user's
//! file, validation with file/line/key errors, and the arithmetic derived from a profile.

pub mod schema;

use std::path::Path;

use crate::diag::Diagnostic;
use crate::ir::DType;
pub use schema::ProfileFile;

/// Built-in profiles: (name, TOML source).
pub const BUILTIN: &[(&str, &str)] = &[
    ("compact-array", include_str!("builtin/compact-array.toml")),
    ("wide-array", include_str!("builtin/wide-array.toml")),
];

/// A profile that could not be used. The message names the file, and where the TOML parser
/// knows them, the line and key.
#[derive(Debug, thiserror::Error)]
#[error("{source_name}: {message}")]
pub struct ProfileError {
    pub source_name: String,
    pub message: String,
}

/// A validated target.
#[derive(Debug, Clone)]
pub struct Target {
    pub file: ProfileFile,
    /// Where it came from: `builtin:NAME` or the path.
    pub source: String,
    /// Warnings from validation (unknown op names in rules).
    pub warnings: Vec<Diagnostic>,
}

/// Data type names used in profiles, and the ONNX types they stand for.
pub const TYPE_NAMES: &[(&str, DType)] = &[
    ("int4", DType::I4),
    ("uint4", DType::U4),
    ("int8", DType::I8),
    ("uint8", DType::U8),
    ("int16", DType::I16),
    ("uint16", DType::U16),
    ("int32", DType::I32),
    ("int64", DType::I64),
    ("bf16", DType::BF16),
    ("fp16", DType::F16),
    ("fp32", DType::F32),
    ("fp8e4m3", DType::F8E4M3FN),
    ("fp8e5m2", DType::F8E5M2),
];

pub fn type_name(d: DType) -> &'static str {
    TYPE_NAMES
        .iter()
        .find(|(_, t)| *t == d)
        .map(|(n, _)| *n)
        .unwrap_or_else(|| d.name())
}

pub fn type_of(name: &str) -> Option<DType> {
    TYPE_NAMES.iter().find(|(n, _)| *n == name).map(|(_, t)| *t)
}

/// Loads `--target NAME|FILE`: a built-in name, else a path.
pub fn load(spec: &str) -> Result<Target, ProfileError> {
    if let Some((name, text)) = BUILTIN.iter().find(|(n, _)| *n == spec) {
        return parse(text, &format!("builtin:{name}"));
    }
    let path = Path::new(spec);
    if !path.exists() {
        let names: Vec<&str> = BUILTIN.iter().map(|(n, _)| *n).collect();
        return Err(ProfileError {
            source_name: spec.to_string(),
            message: format!("no such built-in target or file (built-in: {})", names.join(", ")),
        });
    }
    let text = crate::text::read_text_file(path).map_err(|e| ProfileError {
        source_name: spec.to_string(),
        message: format!("cannot read: {e}"),
    })?;
    parse(&text, spec)
}

/// Parses and validates profile text; `source_name` names it in errors.
pub fn parse(text: &str, source_name: &str) -> Result<Target, ProfileError> {
    let err = |message: String| ProfileError {
        source_name: source_name.to_string(),
        message,
    };
    let file: ProfileFile = toml::from_str(text).map_err(|e| err(crate::text::toml_error(text, &e)))?;
    validate(file, source_name)
}

fn validate(file: ProfileFile, source_name: &str) -> Result<Target, ProfileError> {
    let err = |key: &str, message: String| ProfileError {
        source_name: source_name.to_string(),
        message: format!("key `{key}`: {message}"),
    };
    if file.version != schema::PROFILE_VERSION {
        return Err(err(
            "version",
            format!(
                "this tilecut reads profile version {}, the file has {}",
                schema::PROFILE_VERSION,
                file.version
            ),
        ));
    }
    let a = &file.array;
    if a.columns == 0 || a.compute_rows == 0 {
        return Err(err(
            "array.columns",
            "the array needs at least one column and one compute row".into(),
        ));
    }
    let positive = [
        ("array.clock_hz", a.clock_hz),
        ("array.io_tile.bandwidth_bytes_per_s", a.io_tile.bandwidth_bytes_per_s),
        ("host.bandwidth_bytes_per_s", file.host.bandwidth_bytes_per_s),
        (
            "cpu.memory_bandwidth_bytes_per_s",
            file.cpu.memory_bandwidth_bytes_per_s,
        ),
    ];
    for (k, v) in positive {
        if !(v.is_finite() && v > 0.0) {
            return Err(err(k, format!("must be a positive number, got {v}")));
        }
    }
    let non_negative = [
        ("array.reconfigure_s", a.reconfigure_s),
        ("host.transfer_latency_s", file.host.transfer_latency_s),
        ("host.dispatch_overhead_s", file.host.dispatch_overhead_s),
        ("host.layout_conversion_s", file.host.layout_conversion_s),
    ];
    for (k, v) in non_negative {
        if !(v.is_finite() && v >= 0.0) {
            return Err(err(k, format!("must be zero or positive, got {v}")));
        }
    }
    if a.compute_tile.local_memory_bytes == 0 {
        return Err(err("array.compute_tile.local_memory_bytes", "must be positive".into()));
    }
    if a.compute_tile.stream_inputs == 0 || a.compute_tile.stream_outputs == 0 {
        return Err(err(
            "array.compute_tile.stream_inputs",
            "a compute tile needs at least one stream in and out".into(),
        ));
    }
    for (t, &m) in &a.compute_tile.macs_per_cycle {
        if type_of(t).is_none() {
            return Err(err(
                "array.compute_tile.macs_per_cycle",
                format!("unknown data type `{t}` (known: {})", known_types()),
            ));
        }
        if m == 0 {
            return Err(err(
                "array.compute_tile.macs_per_cycle",
                format!("`{t}` has 0 MACs per cycle; leave it out instead"),
            ));
        }
    }
    if a.compute_tile.macs_per_cycle.is_empty() {
        return Err(err(
            "array.compute_tile.macs_per_cycle",
            "no data type has MACs per cycle".into(),
        ));
    }
    for (t, &v) in &file.cpu.ops_per_s {
        if type_of(t).is_none() {
            return Err(err(
                "cpu.ops_per_s",
                format!("unknown data type `{t}` (known: {})", known_types()),
            ));
        }
        if !(v.is_finite() && v > 0.0) {
            return Err(err("cpu.ops_per_s", format!("`{t}` must be a positive rate")));
        }
    }
    if !file.cpu.ops_per_s.contains_key("fp32") {
        return Err(err(
            "cpu.ops_per_s",
            "needs at least an `fp32` rate (the fallback for other types)".into(),
        ));
    }
    match file.float.mode.as_str() {
        "cpu" => {}
        "bf16" => {
            let rate = file.float.conversion_bytes_per_s;
            if !rate.is_finite() || rate <= 0.0 {
                return Err(err(
                    "float.conversion_bytes_per_s",
                    "mode \"bf16\" needs a positive conversion rate".into(),
                ));
            }
        }
        other => return Err(err("float.mode", format!("`{other}` is not \"cpu\" or \"bf16\""))),
    }
    let mut ids = std::collections::BTreeSet::new();
    let mut warnings = Vec::new();
    for r in &file.rules {
        let key = format!("rule `{}`", r.id);
        if r.id.is_empty() || !ids.insert(r.id.clone()) {
            return Err(err("rule.id", format!("rule id `{}` is empty or used twice", r.id)));
        }
        if r.why.trim().is_empty() {
            return Err(err(&format!("{key}.why"), "every rule needs a `why`".into()));
        }
        if r.ops.is_empty() {
            return Err(err(&format!("{key}.ops"), "lists no ops".into()));
        }
        if let Some([lo, hi]) = r.opsets {
            if lo > hi || lo < 1 {
                return Err(err(
                    &format!("{key}.opsets"),
                    format!("[{lo}, {hi}] is not a valid inclusive range"),
                ));
            }
        }
        for t in &r.types {
            for name in [Some(&t.act), t.weight.as_ref(), t.out.as_ref(), t.acc.as_ref()]
                .into_iter()
                .flatten()
            {
                if type_of(name).is_none() {
                    return Err(err(
                        &format!("{key}.types"),
                        format!("unknown data type `{name}` (known: {})", known_types()),
                    ));
                }
            }
        }
        if let Some(g) = &r.weight_granularity {
            if !["per-tensor", "per-channel", "any"].contains(&g.as_str()) {
                return Err(err(
                    &format!("{key}.weight_granularity"),
                    format!("`{g}` is not per-tensor, per-channel or any"),
                ));
            }
            if g == "per-tensor" && r.weight_axis.is_some() {
                return Err(err(
                    &format!("{key}.weight_axis"),
                    "contradicts weight_granularity = \"per-tensor\"".into(),
                ));
            }
        }
        if let Some(gs) = &r.groups {
            for g in gs {
                if !["regular", "depthwise", "grouped"].contains(&g.as_str()) {
                    return Err(err(
                        &format!("{key}.groups"),
                        format!("`{g}` is not regular, depthwise or grouped"),
                    ));
                }
            }
        }
        for (k, v) in [
            ("kernel_max", r.kernel_max),
            ("stride_max", r.stride_max),
            ("dilation_max", r.dilation_max),
            ("channel_align", r.channel_align),
        ] {
            if v == Some(0) {
                return Err(err(
                    &format!("{key}.{k}"),
                    "0 would forbid every node; leave the key out instead".into(),
                ));
            }
        }
        for op in &r.ops {
            if crate::ops::lookup(&r.domain, op).is_none() {
                warnings.push(Diagnostic::new(
                    "profile-unknown-op",
                    format!("{source_name}: {key} names op `{op}`, which tilecut does not know"),
                ));
            }
        }
    }
    for m in &file.movement {
        if !ids.insert(m.id.clone()) {
            return Err(err("movement.id", format!("id `{}` is used twice", m.id)));
        }
        if !["dma", "tile"].contains(&m.how.as_str()) {
            return Err(err(
                &format!("movement `{}`.how", m.id),
                format!("`{}` is not \"dma\" or \"tile\"", m.how),
            ));
        }
        for op in &m.ops {
            if crate::ops::lookup("", op).is_none() {
                warnings.push(Diagnostic::new(
                    "profile-unknown-op",
                    format!(
                        "{source_name}: movement `{}` names op `{op}`, which tilecut does not know",
                        m.id
                    ),
                ));
            }
        }
    }
    Ok(Target {
        file,
        source: source_name.to_string(),
        warnings,
    })
}

fn known_types() -> String {
    TYPE_NAMES.iter().map(|(n, _)| *n).collect::<Vec<_>>().join(", ")
}

impl Target {
    pub fn name(&self) -> &str {
        &self.file.name
    }

    pub fn compute_tiles(&self) -> u64 {
        self.file.array.columns as u64 * self.file.array.compute_rows as u64
    }

    /// Peak MACs per second of one compute tile for `dtype` (None if it has no rate).
    pub fn tile_macs_per_s(&self, dtype: &str) -> Option<f64> {
        self.file
            .array
            .compute_tile
            .macs_per_cycle
            .get(dtype)
            .map(|&m| m as f64 * self.file.array.clock_hz)
    }

    /// TOPS of the whole array for `dtype`: 2 × MACs/s ÷ 10¹² (two ops per MAC).
    pub fn tops(&self, dtype: &str) -> Option<f64> {
        self.tile_macs_per_s(dtype)
            .map(|m| 2.0 * m * self.compute_tiles() as f64 / 1e12)
    }

    /// Data memory a compute tile can address directly: its own plus its neighbours'.
    pub fn addressable_bytes_per_tile(&self) -> u64 {
        let t = &self.file.array.compute_tile;
        t.local_memory_bytes * (1 + t.neighbour_memories as u64)
    }

    /// All on-array memory: compute tiles' local memories plus buffer tiles.
    pub fn total_array_bytes(&self) -> u64 {
        let a = &self.file.array;
        self.compute_tiles() * a.compute_tile.local_memory_bytes + a.columns as u64 * a.buffer_tile.capacity_bytes
    }

    /// The CPU's sustained rate for `dtype`, falling back to fp32.
    pub fn cpu_ops_per_s(&self, dtype: &str) -> f64 {
        let ops = &self.file.cpu.ops_per_s;
        ops.get(dtype).or_else(|| ops.get("fp32")).copied().unwrap_or(1.0)
    }

    pub fn floats_as_bf16(&self) -> bool {
        self.file.float.mode == "bf16"
    }

    /// The what-if `--assume-supported`: this target plus one rule accepting `ops` (each `Op`
    /// or `domain.Op`) under the target's own data types, i.e. every distinct type signature
    /// its rules list, with static shapes and no other limit. Ops keep their real rules too;
    /// a node passes if any rule accepts it.
    pub fn with_assumed_ops(&self, ops: &[String]) -> Target {
        let mut t = self.clone();
        if ops.is_empty() {
            return t;
        }
        let mut types: Vec<schema::TypeSig> = Vec::new();
        for r in &self.file.rules {
            for sig in &r.types {
                let same = |x: &schema::TypeSig| x.act == sig.act && x.weight == sig.weight && x.out == sig.out;
                if !types.iter().any(same) {
                    types.push(sig.clone());
                }
            }
        }
        let mut by_domain: std::collections::BTreeMap<String, Vec<String>> = Default::default();
        for op in ops {
            let (domain, name) = split_op(op);
            by_domain.entry(domain.to_string()).or_default().push(name.to_string());
        }
        for (domain, names) in by_domain {
            t.file.rules.push(schema::RuleSpec {
                id: if domain.is_empty() {
                    ASSUMED_RULE.to_string()
                } else {
                    format!("{ASSUMED_RULE}:{domain}")
                },
                why: "what-if: --assume-supported treats these ops as capable under the target's types".into(),
                ops: names,
                domain,
                opsets: None,
                types: types.clone(),
                weight_granularity: None,
                weight_axis: None,
                symmetric_weights: false,
                per_tensor_activations: false,
                pow2_scales: false,
                blocked_weights: true,
                kernel_max: None,
                stride_max: None,
                dilation_max: None,
                groups: None,
                attrs: Vec::new(),
                static_shapes: true,
                max_rank: None,
                max_dim: None,
                channel_align: None,
            });
        }
        t
    }
}

/// The id of the rule `Target::with_assumed_ops` adds.
pub const ASSUMED_RULE: &str = "assumed-supported";

/// `domain.Op` → (domain, Op); a bare `Op` is in the default domain.
pub fn split_op(spec: &str) -> (&str, &str) {
    match spec.rsplit_once('.') {
        Some((d, o)) if d != "ai.onnx" => (d, o),
        Some((_, o)) => ("", o),
        None => ("", spec),
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn every_builtin_profile_is_valid_and_explains_every_rule() {
        for (name, text) in BUILTIN {
            let t = parse(text, name).unwrap_or_else(|e| panic!("{e}"));
            assert_eq!(t.name(), *name);
            assert!(t.warnings.is_empty(), "{name}: {:?}", t.warnings);
            assert!(t.file.rules.iter().all(|r| !r.why.is_empty()));
            assert!(
                text.contains("ILLUSTRATIVE"),
                "{name} must say its numbers are illustrative"
            );
        }
    }
}
