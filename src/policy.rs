//! Coverage policies for `tilecut check`: the TOML format (the only module that knows its
//! keys), command-line overrides, evaluation against an analysis, baselines and regressions.

use std::collections::BTreeMap;

use serde::{Deserialize, Serialize};

use crate::cut::Side;
use crate::report::analyze::AnalyzeReport;

pub const POLICY_VERSION: u32 = 1;
pub const BASELINE_VERSION: u32 = 1;

/// Thresholds; every key optional. Fractions are 0..1.
#[derive(Deserialize, Serialize, Debug, Clone, Default, PartialEq)]
#[serde(deny_unknown_fields)]
pub struct Limits {
    pub target: Option<String>,
    pub dims: Option<BTreeMap<String, u64>>,
    pub min_coverage_macs: Option<f64>,
    pub min_coverage_nodes: Option<f64>,
    pub max_accel_partitions: Option<u64>,
    pub max_boundary_bytes: Option<u64>,
    pub max_transfers: Option<u64>,
    pub max_latency_us: Option<f64>,
    /// Op types every node of which must be placed on the accelerator.
    pub must_offload: Option<Vec<String>>,
    /// Reason codes that may not occur on any node.
    pub forbidden_reasons: Option<Vec<String>>,
}

impl Limits {
    /// The first limit whose value no model could meet or miss sensibly (a coverage outside
    /// 0..1, a latency that is not a positive number), as its policy key and the problem.
    /// The policy file and the command line both refuse such values.
    pub fn impossible(&self) -> Option<(&'static str, String)> {
        for (k, v) in [
            ("min_coverage_macs", self.min_coverage_macs),
            ("min_coverage_nodes", self.min_coverage_nodes),
        ] {
            if let Some(x) = v.filter(|x| !(0.0..=1.0).contains(x)) {
                return Some((k, format!("{x} is impossible; coverage is a fraction from 0 to 1")));
            }
        }
        let x = self.max_latency_us.filter(|x| !(x.is_finite() && *x > 0.0))?;
        Some((
            "max_latency_us",
            format!("{x} is impossible; give a positive number of microseconds"),
        ))
    }
}

#[derive(Deserialize, Serialize, Debug, Clone, Default, PartialEq)]
#[serde(deny_unknown_fields)]
pub struct Regression {
    /// Largest allowed drop of MAC coverage (absolute fraction).
    pub max_coverage_drop: Option<f64>,
    /// Whether the number of accelerator partitions may grow.
    #[serde(default)]
    pub allow_more_partitions: bool,
    /// Largest allowed growth of boundary bytes, in percent.
    pub max_boundary_growth_pct: Option<f64>,
    /// Largest allowed growth of the estimated latency, in percent.
    pub max_latency_growth_pct: Option<f64>,
}

#[derive(Deserialize, Serialize, Debug, Clone, PartialEq)]
#[serde(deny_unknown_fields)]
pub struct ModelLimits {
    /// A path, or a `*` pattern, matched against the model path as given.
    pub path: String,
    #[serde(flatten)]
    pub limits: Limits,
}

#[derive(Deserialize, Serialize, Debug, Clone, PartialEq)]
#[serde(deny_unknown_fields)]
pub struct PolicyFile {
    pub version: u32,
    #[serde(default)]
    pub defaults: Limits,
    #[serde(default)]
    pub regression: Regression,
    #[serde(default, rename = "model")]
    pub models: Vec<ModelLimits>,
}

#[derive(Debug, thiserror::Error)]
#[error("{source_name}: {message}")]
pub struct PolicyError {
    pub source_name: String,
    pub message: String,
}

pub const TEMPLATE: &str = include_str!("policy_template.toml");

pub fn parse(text: &str, source_name: &str) -> Result<PolicyFile, PolicyError> {
    let err = |message: String| PolicyError {
        source_name: source_name.to_string(),
        message,
    };
    let p: PolicyFile = toml::from_str(text).map_err(|e| err(crate::text::toml_error(text, &e)))?;
    if p.version != POLICY_VERSION {
        return Err(err(format!(
            "key `version`: this tilecut reads policy version {POLICY_VERSION}, the file has {}",
            p.version
        )));
    }
    let check = |where_: &str, l: &Limits| -> Result<(), PolicyError> {
        if let Some((k, why)) = l.impossible() {
            return Err(err(format!("key `{where_}{k}`: {why}")));
        }
        if let Some(t) = &l.target {
            crate::target::load(t).map_err(|e| err(format!("key `{where_}target`: {e}")))?;
        }
        Ok(())
    };
    check("defaults.", &p.defaults)?;
    for m in &p.models {
        check(&format!("model `{}` ", m.path), &m.limits)?;
    }
    let r = &p.regression;
    for (k, v) in [
        ("max_coverage_drop", r.max_coverage_drop),
        ("max_boundary_growth_pct", r.max_boundary_growth_pct),
        ("max_latency_growth_pct", r.max_latency_growth_pct),
    ] {
        if v.is_some_and(|x| !(x.is_finite() && x >= 0.0)) {
            return Err(err(format!("key `regression.{k}`: must be zero or positive")));
        }
    }
    Ok(p)
}

/// A `[[model]] path`: a `*` pattern, or a path or file name matched as a path suffix.
fn path_matches(pattern: &str, text: &str) -> bool {
    if pattern.contains('*') {
        crate::text::glob(pattern, text)
    } else {
        text == pattern || text.ends_with(&format!("/{pattern}"))
    }
}

/// Where a limit came from, for the report.
#[derive(Serialize, Debug, Clone, Copy, PartialEq, Eq)]
#[serde(rename_all = "kebab-case")]
pub enum Source {
    Defaults,
    Model,
    CommandLine,
}

/// One limit with its origin.
#[derive(Debug, Clone)]
pub struct Effective {
    pub limits: Limits,
    pub sources: BTreeMap<&'static str, Source>,
}

macro_rules! merge_fields {
    ($out:ident, $src:ident, $from:expr, $which:expr, [$($f:ident),*]) => {
        $(
            if $from.$f.is_some() {
                $out.$f = $from.$f.clone();
                $src.insert(stringify!($f), $which);
            }
        )*
    };
}

/// The limits for `model_path`: defaults, then matching `[[model]]` entries in file order,
/// then the command line.
pub fn effective(p: &PolicyFile, model_path: &str, cli: &Limits) -> Effective {
    let mut out = Limits::default();
    let mut src = BTreeMap::new();
    let layers: Vec<(&Limits, Source)> = std::iter::once((&p.defaults, Source::Defaults))
        .chain(
            p.models
                .iter()
                .filter(|m| path_matches(&m.path, model_path))
                .map(|m| (&m.limits, Source::Model)),
        )
        .chain(std::iter::once((cli, Source::CommandLine)))
        .collect();
    for (l, which) in layers {
        merge_fields!(
            out,
            src,
            l,
            which,
            [
                target,
                dims,
                min_coverage_macs,
                min_coverage_nodes,
                max_accel_partitions,
                max_boundary_bytes,
                max_transfers,
                max_latency_us,
                must_offload,
                forbidden_reasons
            ]
        );
    }
    Effective {
        limits: out,
        sources: src,
    }
}

/// The outcome of one rule on one model.
#[derive(Serialize, Debug, Clone)]
pub struct Outcome {
    pub model: String,
    pub rule: String,
    pub passed: bool,
    pub measured: String,
    pub limit: String,
    pub source: Option<Source>,
    pub message: String,
    /// Offending nodes, for rules about nodes.
    pub nodes: Vec<String>,
    /// Under `check --assume-*`: the outcome on the real figures (this one is under the
    /// assumptions).
    pub real: Option<RealOutcome>,
}

/// The real side of an outcome evaluated under what-if assumptions.
#[derive(Serialize, Debug, Clone)]
pub struct RealOutcome {
    pub passed: bool,
    pub measured: String,
}

fn outcome(
    model: &str,
    rule: &str,
    passed: bool,
    measured: String,
    limit: String,
    source: Option<Source>,
    message: String,
) -> Outcome {
    Outcome {
        model: model.into(),
        rule: rule.into(),
        passed,
        measured,
        limit,
        source,
        message,
        nodes: Vec::new(),
        real: None,
    }
}

/// Checks a report against effective limits.
pub fn evaluate(r: &AnalyzeReport, e: &Effective) -> Vec<Outcome> {
    let l = &e.limits;
    let m = &r.model.path;
    let s = &r.summary;
    let src = |k: &str| e.sources.get(k).copied();
    let mut out = Vec::new();
    if let Some(min) = l.min_coverage_macs {
        let (ok, measured) = match s.coverage_macs {
            Some(c) => (c + 1e-12 >= min, format!("{:.2} %", c * 100.0)),
            None => (false, "unknown (fix symbolic dims)".to_string()),
        };
        out.push(outcome(
            m,
            "min-coverage-macs",
            ok,
            measured.clone(),
            format!("{:.2} %", min * 100.0),
            src("min_coverage_macs"),
            format!("MAC coverage {measured}, policy minimum {:.2} %", min * 100.0),
        ));
    }
    if let Some(min) = l.min_coverage_nodes {
        let c = s.coverage_nodes;
        out.push(outcome(
            m,
            "min-coverage-nodes",
            c + 1e-12 >= min,
            format!("{:.2} %", c * 100.0),
            format!("{:.2} %", min * 100.0),
            src("min_coverage_nodes"),
            format!("node coverage {:.2} %, policy minimum {:.2} %", c * 100.0, min * 100.0),
        ));
    }
    if let Some(max) = l.max_accel_partitions {
        let n = s.accel_partitions as u64;
        out.push(outcome(
            m,
            "max-accel-partitions",
            n <= max,
            n.to_string(),
            max.to_string(),
            src("max_accel_partitions"),
            format!("{n} accelerator partitions, policy maximum {max}"),
        ));
    }
    if let Some(max) = l.max_boundary_bytes {
        out.push(outcome(
            m,
            "max-boundary-bytes",
            s.boundary_bytes <= max,
            s.boundary_bytes.to_string(),
            max.to_string(),
            src("max_boundary_bytes"),
            format!(
                "{} boundary bytes per inference, policy maximum {max}",
                s.boundary_bytes
            ),
        ));
    }
    if let Some(max) = l.max_transfers {
        let n = s.transfers as u64;
        out.push(outcome(
            m,
            "max-transfers",
            n <= max,
            n.to_string(),
            max.to_string(),
            src("max_transfers"),
            format!("{n} transfers per inference, policy maximum {max}"),
        ));
    }
    if let Some(max) = l.max_latency_us {
        let (ok, measured) = match s.est_latency_us {
            Some(v) => (v <= max, format!("{v:.1} µs")),
            None => (false, "unknown (cost of some nodes unknown: fix dims)".to_string()),
        };
        out.push(outcome(
            m,
            "max-latency",
            ok,
            measured.clone(),
            format!("{max:.1} µs"),
            src("max_latency_us"),
            format!("estimated latency {measured}, policy maximum {max:.1} µs"),
        ));
    }
    if let Some(ops) = &l.must_offload {
        for op in ops {
            let off: Vec<String> = r
                .nodes
                .iter()
                .filter(|n| &n.op == op && n.placement != Side::Accel && n.placement != Side::Const)
                .map(|n| n.name.clone())
                .collect();
            let total = r.nodes.iter().filter(|n| &n.op == op).count();
            let mut o = outcome(
                m,
                &format!("must-offload:{op}"),
                off.is_empty(),
                format!("{} of {total} on the CPU", off.len()),
                "0 on the CPU".into(),
                src("must_offload"),
                if off.is_empty() {
                    format!("every {op} runs on the accelerator")
                } else {
                    let why = r
                        .nodes
                        .iter()
                        .find(|n| n.name == off[0])
                        .and_then(|n| n.reasons.iter().find(|x| x.blocking))
                        .map(|x| format!(": {}", x.message))
                        .unwrap_or_else(|| {
                            ": the target can run it, but the cut keeps it on the CPU (cheaper there by the cost model)"
                                .into()
                        });
                    format!("{} {op} node(s) stay on the CPU, e.g. `{}`{why}", off.len(), off[0])
                },
            );
            o.nodes = off;
            out.push(o);
        }
    }
    if let Some(codes) = &l.forbidden_reasons {
        for code in codes {
            let hits: Vec<&crate::report::analyze::NodeRow> = r
                .nodes
                .iter()
                .filter(|n| n.reasons.iter().any(|x| x.code == code.as_str()))
                .collect();
            let macs: u64 = hits.iter().map(|n| n.macs.unwrap_or(0)).sum();
            let mut o = outcome(
                m,
                code,
                hits.is_empty(),
                format!("{} node(s)", hits.len()),
                "none".into(),
                src("forbidden_reasons"),
                match hits.first() {
                    None => format!("no node has reason `{code}`"),
                    Some(n) => {
                        let msg = n
                            .reasons
                            .iter()
                            .find(|x| x.code == code.as_str())
                            .map(|x| x.message.clone())
                            .unwrap_or_default();
                        format!(
                            "{} node(s) with `{code}` keep {macs} MACs off the accelerator, e.g. `{}`: {msg}",
                            hits.len(),
                            n.name
                        )
                    }
                },
            );
            o.nodes = hits.iter().map(|n| n.name.clone()).collect();
            out.push(o);
        }
    }
    out
}

/// The figures a baseline keeps per model.
#[derive(Serialize, Deserialize, Debug, Clone, PartialEq)]
#[serde(deny_unknown_fields)]
pub struct BaselineEntry {
    pub path: String,
    pub target: String,
    pub coverage_macs: Option<f64>,
    pub coverage_nodes: f64,
    pub accel_partitions: usize,
    pub boundary_bytes: u64,
    pub transfers: usize,
    /// None while the latency depends on unknown dims.
    pub est_latency_us: Option<f64>,
    pub placements: BTreeMap<String, Side>,
}

#[derive(Serialize, Deserialize, Debug, Clone, PartialEq)]
#[serde(deny_unknown_fields)]
pub struct Baseline {
    pub schema_version: u32,
    pub models: Vec<BaselineEntry>,
}

pub fn baseline_entry(r: &AnalyzeReport) -> BaselineEntry {
    let s = &r.summary;
    BaselineEntry {
        path: r.model.path.clone(),
        target: r.target.name.clone(),
        coverage_macs: s.coverage_macs,
        coverage_nodes: s.coverage_nodes,
        accel_partitions: s.accel_partitions,
        boundary_bytes: s.boundary_bytes,
        transfers: s.transfers,
        est_latency_us: s.est_latency_us,
        placements: r.nodes.iter().map(|n| (n.name.clone(), n.placement)).collect(),
    }
}

/// Regression rules of the policy applied to (old, new).
pub fn regressions(old: &BaselineEntry, new: &BaselineEntry, rules: &Regression) -> Vec<Outcome> {
    let m = &new.path;
    let mut out = Vec::new();
    if let Some(drop) = rules.max_coverage_drop {
        let (o, n) = (old.coverage_macs.unwrap_or(0.0), new.coverage_macs.unwrap_or(0.0));
        out.push(outcome(
            m,
            "regression-coverage",
            o - n <= drop + 1e-12,
            format!("{:.2} % → {:.2} %", o * 100.0, n * 100.0),
            format!("drop ≤ {:.2} %", drop * 100.0),
            None,
            format!("MAC coverage went from {:.2} % to {:.2} %", o * 100.0, n * 100.0),
        ));
    }
    if !rules.allow_more_partitions {
        out.push(outcome(
            m,
            "regression-partitions",
            new.accel_partitions <= old.accel_partitions,
            format!("{} → {}", old.accel_partitions, new.accel_partitions),
            "no increase".into(),
            None,
            format!(
                "accelerator partitions went from {} to {}",
                old.accel_partitions, new.accel_partitions
            ),
        ));
    }
    let growth = |a: f64, b: f64| {
        if a > 0.0 {
            (b - a) / a * 100.0
        } else if b > 0.0 {
            f64::INFINITY
        } else {
            0.0
        }
    };
    if let Some(max) = rules.max_boundary_growth_pct {
        let g = growth(old.boundary_bytes as f64, new.boundary_bytes as f64);
        out.push(outcome(
            m,
            "regression-boundary-bytes",
            g <= max + 1e-9,
            format!("{} → {} ({g:+.1} %)", old.boundary_bytes, new.boundary_bytes),
            format!("growth ≤ {max} %"),
            None,
            format!(
                "boundary bytes went from {} to {} ({g:+.1} %)",
                old.boundary_bytes, new.boundary_bytes
            ),
        ));
    }
    if let Some(max) = rules.max_latency_growth_pct {
        let shown = |x: Option<f64>| x.map_or_else(|| "unknown".to_string(), |v| format!("{v:.1}"));
        let (passed, g) = match (old.est_latency_us, new.est_latency_us) {
            (Some(a), Some(b)) => {
                let g = growth(a, b);
                (g <= max + 1e-9, format!(" ({g:+.1} %)"))
            }
            // Nothing known to regress against; an unknown new latency cannot be vouched for.
            (None, _) => (true, String::new()),
            (Some(_), None) => (false, " (now unknown: fix dims)".to_string()),
        };
        out.push(outcome(
            m,
            "regression-latency",
            passed,
            format!("{} → {} µs{g}", shown(old.est_latency_us), shown(new.est_latency_us)),
            format!("growth ≤ {max} %"),
            None,
            format!(
                "estimated latency went from {} to {} µs{g}",
                shown(old.est_latency_us),
                shown(new.est_latency_us)
            ),
        ));
    }
    out
}
