//! `check` and `diff` as library calls: run the analysis per model under a policy, compare
//! against baselines, and compare two models or saved reports.

use std::collections::BTreeMap;
use std::path::{Path, PathBuf};

use serde::Serialize;

use crate::cut::Side;
use crate::policy::{self, Baseline, BaselineEntry, Limits, PolicyFile, RealOutcome};
use crate::report::analyze::AnalyzeReport;
use crate::report::check::{CheckReport, Failure, CHECK_SCHEMA_VERSION};

/// Everything `check` needs besides the policy.
pub struct CheckRequest<'a> {
    pub models: &'a [PathBuf],
    pub policy: &'a PolicyFile,
    pub policy_name: String,
    pub cli: Limits,
    pub baseline: Option<Baseline>,
    /// With assumptions, the policy is evaluated on the figures under them; each outcome
    /// also carries the real measurement.
    pub what_if: crate::WhatIf,
}

/// Runs the check; returns the report and the baseline of what was measured.
pub fn check(req: &CheckRequest, progress: &(dyn Fn(usize, usize) + Sync)) -> (CheckReport, Baseline) {
    let mut outcomes = Vec::new();
    let mut failures = Vec::new();
    let mut entries = Vec::new();
    for (done, path) in req.models.iter().enumerate() {
        progress(done, req.models.len());
        let shown = path.display().to_string();
        let eff = policy::effective(req.policy, &shown, &req.cli);
        let run = || -> Result<(AnalyzeReport, Option<AnalyzeReport>), String> {
            let target_name = eff.limits.target.clone().unwrap_or_else(|| "compact-array".into());
            let target = crate::target::load(&target_name).map_err(|e| e.to_string())?;
            let mut overrides = crate::Overrides::default();
            for (k, v) in eff.limits.dims.clone().unwrap_or_default() {
                overrides.dims.insert(k, v);
            }
            let opts = crate::AnalyzeOptions {
                what_if: req.what_if.clone(),
                ..Default::default()
            };
            let a = crate::analyze_stages(path, &overrides, target, &opts).map_err(|e| e.to_string())?;
            Ok((a.report(), a.assumed_report()))
        };
        match run() {
            Ok((real, assumed)) => {
                let mut found = policy::evaluate(&real, &eff);
                if let Some(assumed) = &assumed {
                    let mut under = policy::evaluate(assumed, &eff);
                    for (u, r) in under.iter_mut().zip(&found) {
                        u.real = Some(RealOutcome {
                            passed: r.passed,
                            measured: r.measured.clone(),
                        });
                    }
                    found = under;
                }
                outcomes.extend(found);
                // Baselines and regressions keep to what was measured, never to assumptions.
                let entry = policy::baseline_entry(&real);
                if let Some(b) = &req.baseline {
                    if let Some(old) = b.models.iter().find(|m| m.path == entry.path) {
                        outcomes.extend(policy::regressions(old, &entry, &req.policy.regression));
                    }
                }
                entries.push(entry);
            }
            Err(e) => failures.push(Failure { model: shown, error: e }),
        }
    }
    let passed = failures.is_empty() && outcomes.iter().all(|o| o.passed);
    (
        CheckReport {
            schema_version: CHECK_SCHEMA_VERSION,
            policy: req.policy_name.clone(),
            assumptions: req.what_if.describe(),
            outcomes,
            failures,
            passed,
        },
        Baseline {
            schema_version: policy::BASELINE_VERSION,
            models: entries,
        },
    )
}

/// What `diff` compares: placements with their first blocking reason, and summary figures.
#[derive(Debug, Clone)]
pub struct DiffSide {
    pub path: String,
    pub placements: BTreeMap<String, (Side, Option<String>)>,
    pub figures: BTreeMap<&'static str, f64>,
    pub entry: BaselineEntry,
}

const FIGURES: &[&str] = &[
    "coverage_macs",
    "coverage_nodes",
    "accel_partitions",
    "boundary_bytes",
    "transfers",
    "est_latency_us",
];

fn from_report(v: &serde_json::Value, source: &str) -> Result<DiffSide, String> {
    let nodes = v["nodes"]
        .as_array()
        .ok_or_else(|| format!("{source}: not a tilecut analyze report (no `nodes`)"))?;
    let mut placements = BTreeMap::new();
    for n in nodes {
        let side = match n["placement"].as_str() {
            Some("accel") => Side::Accel,
            Some("cpu") => Side::Cpu,
            Some("const") => Side::Const,
            _ => return Err(format!("{source}: node without a valid placement")),
        };
        let reason = n["reasons"]
            .as_array()
            .and_then(|r| r.iter().find(|x| x["blocking"] == true))
            .and_then(|x| x["message"].as_str())
            .map(str::to_string);
        placements.insert(n["name"].as_str().unwrap_or("").to_string(), (side, reason));
    }
    let s = &v["summary"];
    let mut figures = BTreeMap::new();
    for f in FIGURES {
        figures.insert(*f, s[*f].as_f64().unwrap_or(f64::NAN));
    }
    let entry = BaselineEntry {
        path: v["model"]["path"].as_str().unwrap_or(source).to_string(),
        target: v["target"]["name"].as_str().unwrap_or("").to_string(),
        coverage_macs: s["coverage_macs"].as_f64(),
        coverage_nodes: s["coverage_nodes"].as_f64().unwrap_or(0.0),
        accel_partitions: s["accel_partitions"].as_u64().unwrap_or(0) as usize,
        boundary_bytes: s["boundary_bytes"].as_u64().unwrap_or(0),
        transfers: s["transfers"].as_u64().unwrap_or(0) as usize,
        est_latency_us: s["est_latency_us"].as_f64(),
        placements: placements.iter().map(|(k, (s, _))| (k.clone(), *s)).collect(),
    };
    Ok(DiffSide {
        path: entry.path.clone(),
        placements,
        figures,
        entry,
    })
}

/// Loads one side of a diff: a saved JSON report, or a model analyzed now.
pub fn diff_side(path: &Path, target: &str, overrides: &crate::Overrides) -> Result<DiffSide, String> {
    let shown = path.display().to_string();
    let head = std::fs::read(path).map_err(|e| format!("{shown}: cannot read: {e}"))?;
    if head.first() == Some(&b'{') {
        let v: serde_json::Value =
            serde_json::from_slice(&head).map_err(|e| format!("{shown}: not valid JSON: {e}"))?;
        return from_report(&v, &shown);
    }
    let t = crate::target::load(target).map_err(|e| e.to_string())?;
    let a = crate::analyze_stages(path, overrides, t, &Default::default()).map_err(|e| e.to_string())?;
    let v = serde_json::to_value(a.report()).map_err(|e| e.to_string())?;
    from_report(&v, &shown)
}

#[derive(Serialize, Debug, Clone)]
pub struct PlacementChange {
    pub node: String,
    pub old: Option<Side>,
    pub new: Option<Side>,
    pub why: Option<String>,
}

#[derive(Serialize, Debug, Clone)]
pub struct FigureChange {
    pub figure: &'static str,
    pub old: f64,
    pub new: f64,
    pub delta: f64,
}

#[derive(Serialize, Debug, Clone)]
pub struct DiffReport {
    pub old: String,
    pub new: String,
    pub placement_changes: Vec<PlacementChange>,
    pub partitions_added: i64,
    pub figures: Vec<FigureChange>,
    pub regressions: Vec<policy::Outcome>,
}

pub fn diff(old: &DiffSide, new: &DiffSide, rules: Option<&policy::Regression>) -> DiffReport {
    let mut names: Vec<&String> = old.placements.keys().chain(new.placements.keys()).collect();
    names.sort();
    names.dedup();
    let placement_changes = names
        .into_iter()
        .filter_map(|n| {
            let a = old.placements.get(n);
            let b = new.placements.get(n);
            if a.map(|x| x.0) == b.map(|x| x.0) {
                return None;
            }
            Some(PlacementChange {
                node: n.clone(),
                old: a.map(|x| x.0),
                new: b.map(|x| x.0),
                why: b.and_then(|x| x.1.clone()),
            })
        })
        .collect();
    let figures = FIGURES
        .iter()
        .map(|f| {
            let (a, b) = (old.figures[f], new.figures[f]);
            FigureChange {
                figure: f,
                old: a,
                new: b,
                delta: b - a,
            }
        })
        .collect();
    DiffReport {
        old: old.path.clone(),
        new: new.path.clone(),
        placement_changes,
        partitions_added: new.entry.accel_partitions as i64 - old.entry.accel_partitions as i64,
        figures,
        regressions: rules
            .map(|r| policy::regressions(&old.entry, &new.entry, r))
            .unwrap_or_default(),
    }
}
