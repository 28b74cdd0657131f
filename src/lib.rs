//! tilecut: how much of an ONNX model runs on a tile-array accelerator.
pub mod benchgen;
pub mod cli;
pub mod cut;
pub mod diag;
pub mod error;
pub mod fastmap;
pub mod gate;
pub mod import;
pub mod infer;
pub mod ir;
pub mod map;
pub mod onnx;
pub mod ops;
pub mod policy;
pub mod quant;
pub mod report;
pub mod rules;
pub mod samples;
pub mod target;
pub mod text;
pub mod values;
pub mod verify;

use std::path::Path;

pub use error::ReadError;
pub use import::Overrides;

/// A model read, imported and inferred: the input of every later stage.
pub struct Analyzed {
    pub model: ir::Model,
    pub diags: Vec<diag::Diagnostic>,
    pub unknown: infer::UnknownReasons,
}

/// Reads, imports and infers a model file: the reading pipeline every command shares.
pub fn read_model(path: &Path, overrides: &Overrides) -> Result<Analyzed, ReadError> {
    let loaded = onnx::load::load(path)?;
    let (mut model, mut diags) = import::import(&loaded, overrides)?;
    // The wire-format tree is not needed past import; freeing it lets inference reuse the memory.
    drop(loaded);
    let unknown = infer::infer(&mut model, &mut diags);
    Ok(Analyzed { model, diags, unknown })
}

/// `tilecut inspect` as a library call.
pub fn inspect(path: &Path, overrides: &Overrides) -> Result<report::inspect::InspectReport, ReadError> {
    let a = read_model(path, overrides)?;
    Ok(report::inspect::build(&a.model, &a.diags, &a.unknown))
}

/// Why `analyze` could not run: a model, a profile or a pin problem.
#[derive(Debug, thiserror::Error)]
pub enum AnalyzeError {
    #[error(transparent)]
    Read(#[from] ReadError),
    #[error(transparent)]
    Profile(#[from] target::ProfileError),
    #[error(transparent)]
    Pin(#[from] cut::PinError),
}

/// Options of `analyze` beyond the model's.
#[derive(Clone, Debug)]
pub struct AnalyzeOptions {
    pub strategy: cut::Strategy,
    pub pins: cut::Pins,
    /// `--columns N`: the column budget for the mapping.
    pub columns: Option<u32>,
}

impl Default for AnalyzeOptions {
    fn default() -> Self {
        AnalyzeOptions {
            strategy: cut::Strategy::Mincut,
            pins: cut::Pins::default(),
            columns: None,
        }
    }
}

/// Every stage of `analyze`, kept for callers that look inside (tests, `explain`).
pub struct Analysis {
    pub read: Analyzed,
    pub target: target::Target,
    pub verdicts: Vec<rules::Verdict>,
    pub costs: cut::Costs,
    pub plan: cut::Plan,
    pub greedy: cut::Plan,
    pub cpu_only: cut::Plan,
    pub array: map::ArrayUse,
}

/// read → judge → cost → cut (all three strategies).
pub fn analyze_stages(
    path: &Path,
    overrides: &Overrides,
    target: target::Target,
    opts: &AnalyzeOptions,
) -> Result<Analysis, AnalyzeError> {
    let read = read_model(path, overrides)?;
    let g = &read.model.graph;
    let verdicts = rules::judge(g, &read.model.opsets, &target);
    let costs = cut::cost::costs(g, &verdicts, &target);
    let plan = cut::plan(g, &verdicts, &costs, opts.strategy, &opts.pins)?;
    let greedy = cut::plan(g, &verdicts, &costs, cut::Strategy::Greedy, &opts.pins)?;
    let cpu_only = cut::plan(g, &verdicts, &costs, cut::Strategy::Cpu, &opts.pins)?;
    let array = map::map(g, &costs, &plan, &target, opts.columns);
    Ok(Analysis {
        read,
        target,
        verdicts,
        costs,
        plan,
        greedy,
        cpu_only,
        array,
    })
}

impl Analysis {
    pub fn report(&self) -> report::analyze::AnalyzeReport {
        let ins = report::inspect::build(&self.read.model, &self.read.diags, &self.read.unknown);
        let mut warnings = self.read.diags.clone();
        warnings.extend(self.target.warnings.iter().cloned());
        report::analyze::build(&report::analyze::Inputs {
            model: &self.read.model,
            target: &self.target,
            verdicts: &self.verdicts,
            costs: &self.costs,
            plan: &self.plan,
            greedy: &self.greedy,
            cpu_only: &self.cpu_only,
            array: &self.array,
            params: ins.model.params,
            warnings,
        })
    }
}
