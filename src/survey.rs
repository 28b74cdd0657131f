//! `tilecut survey`: which blocker, once lifted, would gain the most across a collection of
//! models. Each model is read once; for every blocker it has, only the stages the blocker
//! affects run again:
//!
//! | blocker | lifted by | stages run again |
//! |---|---|---|
//! | `op:X` (no rule for op X) | a rule accepting X under the target's types | judge (X's nodes only), cost, cut, map |
//! | `quant:CODE` (a quantization-scheme or type reason) | waiving CODE; `float-on-cpu` by assuming quantization | judge, cost, cut, map |
//! | `limit:CODE` (an attribute, opset or shape limit) | waiving CODE | judge, cost, cut, map |
//! | `dim:NAME` (a symbolic input dim) | fixing NAME (`DimLifts`: 1 unless set) | shapes (import + infer from the decoded file), then all |
//! | `dim:*` (when a collection has several) | fixing every symbolic input dim at once | the same |
//!
//! Every lift is the what-if `analyze` offers with the flag in `Lift::how`, so a user can
//! reproduce any row. Gains are lifted minus real figures of the same model. The library does
//! no output; progress is reported through a callback.

use std::collections::{BTreeMap, BTreeSet};
use std::path::{Path, PathBuf};
use std::sync::atomic::{AtomicUsize, Ordering};
use std::sync::Mutex;

use serde::Serialize;

use crate::report::analyze::{Summary, ESTIMATE_NOTE};
use crate::rules::{reason, Assumptions, Candidate};
use crate::target::Target;
use crate::{AnalyzeOptions, Analyzed, Overrides, Stages, WhatIf};

pub const SURVEY_SCHEMA_VERSION: u32 = 1;

/// What a blocker is, which decides the stages a lift re-runs.
#[derive(Serialize, Debug, Clone, Copy, PartialEq, Eq, PartialOrd, Ord)]
#[serde(rename_all = "lowercase")]
pub enum Kind {
    Op,
    Quant,
    Limit,
    Dim,
}

impl Kind {
    pub fn as_str(self) -> &'static str {
        match self {
            Kind::Op => "op",
            Kind::Quant => "quant",
            Kind::Limit => "limit",
            Kind::Dim => "dim",
        }
    }
}

/// Reason codes that are quantization-scheme blockers (the rest of `WAIVABLE` are limits).
const QUANT_CODES: &[&str] = &[
    reason::TYPES,
    reason::FLOAT_ON_CPU,
    reason::WEIGHT_GRANULARITY,
    reason::WEIGHT_AXIS,
    reason::WEIGHT_ASYMMETRIC,
    reason::WEIGHT_BLOCKED,
    reason::ACT_PER_AXIS,
    reason::SCALE_POW2,
    reason::DYNAMIC_QUANT,
];

/// One blocker: `kind:name`, e.g. `op:Softmax`, `quant:weight-asymmetric`, `dim:batch`.
#[derive(Debug, Clone, PartialEq, Eq, PartialOrd, Ord)]
pub struct BlockerKey {
    pub kind: Kind,
    pub name: String,
}

impl BlockerKey {
    pub fn label(&self) -> String {
        format!("{}:{}", self.kind.as_str(), self.name)
    }
}

/// The figures a lift is judged by.
#[derive(Serialize, Debug, Clone, PartialEq)]
pub struct Figures {
    pub accel_macs: u64,
    pub coverage_macs: Option<f64>,
    pub coverage_nodes: f64,
    pub accel_partitions: usize,
    pub transfers: usize,
    pub boundary_bytes: u64,
    pub est_latency_us: Option<f64>,
}

impl Figures {
    pub fn of(s: &Summary) -> Figures {
        Figures {
            accel_macs: s.accel_macs,
            coverage_macs: s.coverage_macs,
            coverage_nodes: s.coverage_nodes,
            accel_partitions: s.accel_partitions,
            transfers: s.transfers,
            boundary_bytes: s.boundary_bytes,
            est_latency_us: s.est_latency_us,
        }
    }
}

/// Lifted minus real, signed so that positive is better.
#[derive(Serialize, Debug, Clone, PartialEq)]
pub struct Gain {
    pub macs_moved: i64,
    pub partitions_removed: i64,
    pub transfers_removed: i64,
    pub boundary_bytes_removed: i64,
    /// None when either side's latency is unknown (symbolic dims).
    pub latency_saved_us: Option<f64>,
}

fn gain(real: &Figures, lifted: &Figures) -> Gain {
    let i = |x: u64| i64::try_from(x).unwrap_or(i64::MAX);
    Gain {
        macs_moved: i(lifted.accel_macs).saturating_sub(i(real.accel_macs)),
        partitions_removed: real.accel_partitions as i64 - lifted.accel_partitions as i64,
        transfers_removed: real.transfers as i64 - lifted.transfers as i64,
        boundary_bytes_removed: i(real.boundary_bytes).saturating_sub(i(lifted.boundary_bytes)),
        latency_saved_us: match (real.est_latency_us, lifted.est_latency_us) {
            (Some(a), Some(b)) => Some(a - b),
            _ => None,
        },
    }
}

/// One blocker of one model, lifted.
#[derive(Serialize, Debug, Clone)]
pub struct Lift {
    pub blocker: String,
    pub kind: Kind,
    pub name: String,
    /// The `analyze` flag that shows the same scenario.
    pub how: String,
    /// Nodes this blocker keeps on the CPU (they may have other blockers too).
    pub nodes: usize,
    pub figures: Figures,
    pub gain: Gain,
}

#[derive(Serialize, Debug, Clone)]
pub struct ModelSurvey {
    pub path: String,
    pub nodes: usize,
    pub figures: Figures,
    pub lifts: Vec<Lift>,
    /// Blockers whose lift could not be computed (the model itself was surveyed).
    pub lift_errors: Vec<String>,
}

/// A file that could not be surveyed: listed, never fatal.
#[derive(Serialize, Debug, Clone)]
pub struct Failure {
    pub path: String,
    pub error: String,
}

/// One blocker across the collection: the ranked table's row.
#[derive(Serialize, Debug, Clone)]
pub struct RankRow {
    pub rank: usize,
    pub blocker: String,
    pub kind: Kind,
    pub name: String,
    pub how: String,
    /// Models the blocker occurs in, and how many of those gain anything by lifting it.
    pub models: usize,
    pub models_helped: usize,
    pub nodes: usize,
    pub macs_moved: i64,
    pub partitions_removed: i64,
    pub transfers_removed: i64,
    pub boundary_bytes_removed: i64,
    /// Summed over the models whose latency is known on both sides.
    pub latency_saved_us: f64,
    /// Models left out of `latency_saved_us` because a latency is unknown.
    pub latency_unknown_models: usize,
}

#[derive(Serialize, Debug, Clone)]
pub struct SurveyReport {
    pub schema_version: u32,
    pub estimate_note: &'static str,
    pub target: String,
    /// The values symbolic dims are fixed to when a `dim:` blocker is lifted.
    pub dim_lifts: DimLifts,
    pub ranking: Vec<RankRow>,
    pub models: Vec<ModelSurvey>,
    pub failures: Vec<Failure>,
}

/// The values symbolic dims take when their blocker is lifted: per name, else a default.
#[derive(Serialize, Debug, Clone, PartialEq, Eq)]
pub struct DimLifts {
    pub default: u64,
    pub by_name: BTreeMap<String, u64>,
}

impl Default for DimLifts {
    fn default() -> Self {
        DimLifts {
            default: 1,
            by_name: BTreeMap::new(),
        }
    }
}

impl DimLifts {
    pub fn value(&self, name: &str) -> u64 {
        self.by_name.get(name).copied().unwrap_or(self.default)
    }
}

/// What to survey and how.
pub struct Request<'a> {
    pub paths: &'a [PathBuf],
    pub target: &'a Target,
    pub overrides: &'a Overrides,
    /// Models analyzed at once (each worker holds one model in memory).
    pub jobs: usize,
    pub dim_lifts: DimLifts,
}

/// Why the survey could not start (a bad argument, not a bad model).
#[derive(Debug, thiserror::Error)]
#[error("{0}")]
pub struct SurveyError(pub String);

/// The model files under `paths`: files as given, folders searched recursively for `*.onnx`
/// (any case), symbolic links to folders not followed; sorted, duplicates removed.
pub fn collect(paths: &[PathBuf]) -> Result<Vec<PathBuf>, SurveyError> {
    fn walk(dir: &Path, out: &mut Vec<PathBuf>) -> Result<(), SurveyError> {
        let entries =
            std::fs::read_dir(dir).map_err(|e| SurveyError(format!("{}: cannot list: {e}", dir.display())))?;
        let mut items: Vec<PathBuf> = entries.filter_map(|e| e.ok().map(|e| e.path())).collect();
        items.sort();
        for p in items {
            let Ok(meta) = std::fs::symlink_metadata(&p) else {
                continue;
            };
            if meta.is_dir() {
                walk(&p, out)?;
            } else if p.extension().is_some_and(|e| e.eq_ignore_ascii_case("onnx")) {
                out.push(p);
            }
        }
        Ok(())
    }
    let mut out = Vec::new();
    for p in paths {
        let meta = std::fs::metadata(p).map_err(|e| SurveyError(format!("{}: {e}", p.display())))?;
        if meta.is_dir() {
            let before = out.len();
            walk(p, &mut out)?;
            if out.len() == before {
                return Err(SurveyError(format!("{}: no .onnx files in this folder", p.display())));
            }
        } else {
            out.push(p.clone());
        }
    }
    let mut seen = BTreeSet::new();
    out.retain(|p| seen.insert(p.clone()));
    Ok(out)
}

/// Surveys every model; `progress(done, total)` is called as models finish.
pub fn survey(req: &Request, progress: &(dyn Fn(usize, usize) + Sync)) -> Result<SurveyReport, SurveyError> {
    if req.jobs == 0 {
        return Err(SurveyError("--jobs must be at least 1".into()));
    }
    let files = collect(req.paths)?;
    let total = files.len();
    let results: Mutex<Vec<Option<Result<ModelSurvey, String>>>> = Mutex::new(vec![None; total]);
    let next = AtomicUsize::new(0);
    let done = AtomicUsize::new(0);
    let workers = req.jobs.min(total).max(1);
    std::thread::scope(|scope| {
        for _ in 0..workers {
            scope.spawn(|| loop {
                let i = next.fetch_add(1, Ordering::Relaxed);
                if i >= total {
                    break;
                }
                let r = survey_model(&files[i], req);
                if let Ok(mut v) = results.lock() {
                    v[i] = Some(r);
                }
                progress(done.fetch_add(1, Ordering::Relaxed) + 1, total);
            });
        }
    });
    let results = results
        .into_inner()
        .map_err(|_| SurveyError("a survey worker panicked".into()))?;
    let mut models = Vec::new();
    let mut failures = Vec::new();
    for (path, r) in files.iter().zip(results) {
        match r {
            Some(Ok(m)) => models.push(m),
            Some(Err(e)) => failures.push(Failure {
                path: path.display().to_string(),
                error: e,
            }),
            None => failures.push(Failure {
                path: path.display().to_string(),
                error: "not surveyed (a worker stopped)".into(),
            }),
        }
    }
    Ok(SurveyReport {
        schema_version: SURVEY_SCHEMA_VERSION,
        estimate_note: ESTIMATE_NOTE,
        target: req.target.name().to_string(),
        dim_lifts: req.dim_lifts.clone(),
        ranking: rank(&models),
        models,
        failures,
    })
}

/// Blockers of one analyzed model, with the nodes each keeps on the CPU.
pub fn blockers(read: &Analyzed, base: &Stages) -> BTreeMap<BlockerKey, usize> {
    let g = &read.model.graph;
    let input_dims = input_symbols(read);
    let mut out: BTreeMap<BlockerKey, usize> = BTreeMap::new();
    for (i, v) in base.verdicts.iter().enumerate() {
        if v.candidate != Candidate::Cpu {
            continue;
        }
        let node = &g.nodes[i];
        let mut keys: BTreeSet<BlockerKey> = BTreeSet::new();
        for r in v.reasons.iter().filter(|r| r.blocking) {
            let key = |kind, name: &str| BlockerKey {
                kind,
                name: name.to_string(),
            };
            match r.code {
                reason::NO_RULE => {
                    keys.insert(key(Kind::Op, &node.op_label()));
                }
                reason::DYNAMIC_SHAPE => {
                    for vid in node.inputs.iter().chain(node.outputs.iter()).flatten() {
                        for s in g
                            .value(*vid)
                            .fact
                            .shape
                            .dims()
                            .into_iter()
                            .flatten()
                            .flat_map(|d| d.symbols())
                        {
                            if input_dims.contains(&s) {
                                keys.insert(key(Kind::Dim, &s));
                            }
                        }
                    }
                }
                c if QUANT_CODES.contains(&c) => {
                    keys.insert(key(Kind::Quant, c));
                }
                c if reason::WAIVABLE.contains(&c) => {
                    keys.insert(key(Kind::Limit, c));
                }
                // Control flow and unknown types cannot be lifted by an assumption.
                _ => {}
            }
        }
        let dims = keys.iter().filter(|k| k.kind == Kind::Dim).count();
        for k in keys {
            *out.entry(k).or_default() += 1;
        }
        if dims > 0 {
            *out.entry(all_dims()).or_default() += 1;
        }
    }
    // Lifting one of several symbolic dims rarely makes a shape static; `dim:*` fixes them all.
    if out.keys().filter(|k| k.kind == Kind::Dim).count() < 3 {
        out.remove(&all_dims());
    }
    out
}

/// The blocker "every symbolic input dim", lifted by fixing them all at once.
fn all_dims() -> BlockerKey {
    BlockerKey {
        kind: Kind::Dim,
        name: ALL_DIMS.to_string(),
    }
}

/// The name of the `dim:*` blocker.
pub const ALL_DIMS: &str = "*";

/// Symbolic dims of the graph inputs, which `--dim` can fix.
fn input_symbols(read: &Analyzed) -> BTreeSet<String> {
    let g = &read.model.graph;
    g.inputs
        .iter()
        .filter_map(|v| g.value(*v).fact.shape.dims())
        .flatten()
        .flat_map(|d| d.symbols())
        .collect()
}

/// The what-if that lifts `key`, and the `analyze` flag that shows it.
pub fn what_if_for(key: &BlockerKey, dims: &DimLifts) -> (WhatIf, String) {
    let mut w = WhatIf::default();
    let how = match key.kind {
        Kind::Op => {
            w.supported_ops.push(key.name.clone());
            format!("--assume-supported {}", key.name)
        }
        Kind::Quant if key.name == reason::FLOAT_ON_CPU => {
            w.judge.quantized = true;
            "--assume-quantized".to_string()
        }
        Kind::Quant | Kind::Limit => {
            if let Some(c) = reason::WAIVABLE.iter().find(|c| **c == key.name) {
                w.judge.waived.insert(c);
            }
            format!("--assume-waived {}", key.name)
        }
        Kind::Dim if key.name == ALL_DIMS => "--dim NAME=N for every symbolic input dim".to_string(),
        Kind::Dim => format!("--dim {}={}", key.name, dims.value(&key.name)),
    };
    (w, how)
}

/// Lifts one blocker of a model already analyzed, re-running only the stages it affects.
/// `loaded` is needed for `dim:` blockers (shapes onward).
pub fn lift(
    key: &BlockerKey,
    read: &Analyzed,
    base: &Stages,
    loaded: &crate::onnx::load::LoadedModel,
    overrides: &Overrides,
    dims: &DimLifts,
) -> Result<Figures, String> {
    let g = &read.model.graph;
    let (w, _) = what_if_for(key, dims);
    let opts = AnalyzeOptions::default();
    let stages = match key.kind {
        Kind::Op => {
            // Only nodes of this op can change verdict: the assumed rule names no other op.
            let target = base.target.with_assumed_ops(&w.supported_ops);
            let (domain, op) = crate::target::split_op(&key.name);
            let mut verdicts = base.verdicts.clone();
            for (i, n) in g.nodes.iter().enumerate() {
                if n.op_type == op && crate::ops::node_in_domain(n, domain) {
                    verdicts[i] = crate::rules::judge_node(
                        g,
                        crate::ir::NodeId::new(i),
                        &read.model.opsets,
                        &target,
                        &Assumptions::default(),
                    );
                }
            }
            crate::stages_from_verdicts(read, target, verdicts, &opts)
        }
        Kind::Quant | Kind::Limit => {
            let opts = AnalyzeOptions {
                what_if: w,
                ..Default::default()
            };
            crate::run_stages(read, base.target.clone(), &opts)
        }
        Kind::Dim => {
            let mut o = overrides.clone();
            if key.name == ALL_DIMS {
                for d in input_symbols(read) {
                    let v = dims.value(&d);
                    o.dims.insert(d, v);
                }
            } else {
                o.dims.insert(key.name.clone(), dims.value(&key.name));
            }
            let reread = crate::read_loaded(loaded, &o).map_err(|e| e.to_string())?;
            let s = crate::run_stages(&reread, base.target.clone(), &opts).map_err(|e| e.to_string())?;
            return Ok(Figures::of(&s.summary(&reread)));
        }
    }
    .map_err(|e| e.to_string())?;
    Ok(Figures::of(&stages.summary(read)))
}

fn survey_model(path: &Path, req: &Request) -> Result<ModelSurvey, String> {
    let loaded = crate::onnx::load::load(path).map_err(|e| e.to_string())?;
    let read = crate::read_loaded(&loaded, req.overrides).map_err(|e| e.to_string())?;
    let base = crate::run_stages(&read, req.target.clone(), &AnalyzeOptions::default()).map_err(|e| e.to_string())?;
    let real = Figures::of(&base.summary(&read));
    let mut lifts = Vec::new();
    let mut lift_errors = Vec::new();
    for (key, nodes) in blockers(&read, &base) {
        let figures = match lift(&key, &read, &base, &loaded, req.overrides, &req.dim_lifts) {
            Ok(f) => f,
            Err(e) => {
                lift_errors.push(format!("{}: {e}", key.label()));
                continue;
            }
        };
        let (_, how) = what_if_for(&key, &req.dim_lifts);
        lifts.push(Lift {
            blocker: key.label(),
            kind: key.kind,
            name: key.name.clone(),
            how,
            nodes,
            gain: gain(&real, &figures),
            figures,
        });
    }
    Ok(ModelSurvey {
        path: path.display().to_string(),
        nodes: read.model.graph.nodes.len(),
        figures: real,
        lifts,
        lift_errors,
    })
}

/// Sums each blocker over the models and ranks: estimated latency saved, then MACs moved,
/// then models helped, then the blocker's name (so ties always fall the same way).
pub fn rank(models: &[ModelSurvey]) -> Vec<RankRow> {
    let mut rows: BTreeMap<String, RankRow> = BTreeMap::new();
    for m in models {
        for l in &m.lifts {
            let r = rows.entry(l.blocker.clone()).or_insert_with(|| RankRow {
                rank: 0,
                blocker: l.blocker.clone(),
                kind: l.kind,
                name: l.name.clone(),
                how: l.how.clone(),
                models: 0,
                models_helped: 0,
                nodes: 0,
                macs_moved: 0,
                partitions_removed: 0,
                transfers_removed: 0,
                boundary_bytes_removed: 0,
                latency_saved_us: 0.0,
                latency_unknown_models: 0,
            });
            let gn = &l.gain;
            r.models += 1;
            let helped = gn.macs_moved > 0 || gn.latency_saved_us.is_some_and(|x| x > 0.0) || gn.partitions_removed > 0;
            r.models_helped += usize::from(helped);
            r.nodes += l.nodes;
            r.macs_moved = r.macs_moved.saturating_add(gn.macs_moved);
            r.partitions_removed += gn.partitions_removed;
            r.transfers_removed += gn.transfers_removed;
            r.boundary_bytes_removed = r.boundary_bytes_removed.saturating_add(gn.boundary_bytes_removed);
            match gn.latency_saved_us {
                Some(x) => r.latency_saved_us += x,
                None => r.latency_unknown_models += 1,
            }
        }
    }
    let mut rows: Vec<RankRow> = rows.into_values().collect();
    rows.sort_by(|a, b| {
        b.latency_saved_us
            .total_cmp(&a.latency_saved_us)
            .then(b.macs_moved.cmp(&a.macs_moved))
            .then(b.models_helped.cmp(&a.models_helped))
            .then(a.blocker.cmp(&b.blocker))
    });
    for (i, r) in rows.iter_mut().enumerate() {
        r.rank = i + 1;
    }
    rows
}
