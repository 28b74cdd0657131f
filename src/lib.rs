//! tilecut: how much of an ONNX model runs on a tile-array accelerator.
pub mod benchgen;
pub mod cli;
pub mod cut;
pub mod diag;
pub mod error;
pub mod fastmap;
pub mod feeds;
pub mod gate;
pub mod import;
pub mod infer;
pub mod ir;
pub mod map;
pub mod onnx;
pub mod ops;
pub mod outpath;
pub mod policy;
pub mod quant;
pub mod report;
pub mod rules;
pub mod samples;
pub mod suggest;
pub mod survey;
pub mod target;
pub mod text;
pub mod values;
pub mod verify;

use std::path::Path;

pub use error::ReadError;
pub use import::Overrides;

/// The memory setting of every tilecut process (the binary and the benches, which also
/// declare mimalloc as their global allocator so that they measure what the binary does):
/// transparent huge pages off for the process. With them, the first touch of each 2 MiB of
/// heap has the kernel clear all of it, which on virtual machines swung a 100k-node
/// `inspect` from 70 ms to over 300 ms by whether the host had the memory at hand (a third
/// to two thirds of the process's time was the kernel clearing pages); with 4 KiB pages
/// only what is written is cleared, and the run time holds steady (README, Benchmarks,
/// "Ninth session").
pub fn tune_allocator() {
    #[cfg(target_os = "linux")]
    // SAFETY: `prctl` with `PR_SET_THP_DISABLE` sets a flag of the calling process and reads
    // no memory of it; on failure (an old kernel) the process keeps the system's setting.
    unsafe {
        libc::prctl(libc::PR_SET_THP_DISABLE, 1, 0, 0, 0);
    }
}

/// A model read, imported and inferred: the input of every later stage.
pub struct Analyzed {
    pub model: ir::Model,
    pub diags: Vec<diag::Diagnostic>,
    pub unknown: infer::UnknownReasons,
}

/// Reads, imports and infers a model file: the reading pipeline every command shares.
pub fn read_model(path: &Path, overrides: &Overrides) -> Result<Analyzed, ReadError> {
    read_model_with(path, overrides, onnx::load::MapLife::Shared)
}

/// `read_model`, with the file's map kept as `life` says (`Process` for a process that reads
/// this one model and ends).
pub fn read_model_with(path: &Path, overrides: &Overrides, life: onnx::load::MapLife) -> Result<Analyzed, ReadError> {
    let loaded = onnx::load::load_for_import(path, life)?;
    let (mut model, mut diags) = import::import(&loaded, overrides)?;
    // The wire-format tree is not needed past import. Its main nodes stayed in wire form, but
    // a graph's value_info can still be one decoded entry per tensor: freeing it runs beside
    // inference on another thread; if no thread can be started, the failed spawn drops it here.
    let _ = std::thread::Builder::new().spawn(move || drop(loaded));
    let unknown = infer::infer(&mut model, &mut diags);
    Ok(Analyzed { model, diags, unknown })
}

/// Imports and infers a model already loaded: "shapes onward" for callers that keep the
/// decoded file (the survey fixes one dim after another without reading the file again).
pub fn read_loaded(loaded: &onnx::load::LoadedModel, overrides: &Overrides) -> Result<Analyzed, ReadError> {
    let (mut model, mut diags) = import::import(loaded, overrides)?;
    let unknown = infer::infer(&mut model, &mut diags);
    Ok(Analyzed { model, diags, unknown })
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

/// What-if settings: `--assume-supported`, `--assume-quantized`, `--assume-waived`.
#[derive(Clone, Debug, Default, PartialEq, Eq)]
pub struct WhatIf {
    /// Op types (`Op` or `domain.Op`) treated as capable under the target's types.
    pub supported_ops: Vec<String>,
    /// Assumptions the judge honours (quantization, waived reason codes).
    pub judge: rules::Assumptions,
}

impl WhatIf {
    pub fn is_empty(&self) -> bool {
        self.supported_ops.is_empty() && self.judge.is_empty()
    }

    /// The assumptions in words, for reports: `assume-supported Softmax`, ….
    pub fn describe(&self) -> Vec<String> {
        let mut out: Vec<String> = self
            .supported_ops
            .iter()
            .map(|o| format!("assume-supported {o}"))
            .collect();
        if self.judge.quantized {
            out.push("assume-quantized".into());
        }
        out.extend(self.judge.waived.iter().map(|c| format!("assume-waived {c}")));
        out
    }

    /// Parses `--assume-waived` codes (comma lists allowed), refusing codes that cannot be
    /// waived.
    pub fn add_waived(&mut self, text: &str) -> Result<(), error::SettingError> {
        for code in text.split(',').map(str::trim).filter(|c| !c.is_empty()) {
            let known = rules::reason::WAIVABLE.iter().find(|c| **c == code).ok_or_else(|| {
                error::SettingError(format!(
                    "--assume-waived `{code}`: not a reason code that can be waived (one of: {})",
                    rules::reason::WAIVABLE.join(", ")
                ))
            })?;
            self.judge.waived.insert(known);
        }
        Ok(())
    }

    /// Parses `--assume-supported` op lists (comma lists allowed).
    pub fn add_supported(&mut self, text: &str) -> Result<(), error::SettingError> {
        for op in text.split(',').map(str::trim) {
            let (_, name) = target::split_op(op);
            if name.is_empty() || !name.chars().all(|c| c.is_ascii_alphanumeric() || c == '_') {
                return Err(error::SettingError(format!(
                    "--assume-supported `{op}`: expected an op type such as Softmax or com.example.MyOp"
                )));
            }
            if !self.supported_ops.iter().any(|o| o == op) {
                self.supported_ops.push(op.to_string());
            }
        }
        Ok(())
    }
}

/// Options of `analyze` beyond the model's.
#[derive(Clone, Debug)]
pub struct AnalyzeOptions {
    pub strategy: cut::Strategy,
    pub pins: cut::Pins,
    /// `--columns N`: the column budget for the mapping.
    pub columns: Option<u32>,
    /// Figures under these assumptions are computed beside the real ones.
    pub what_if: WhatIf,
}

impl Default for AnalyzeOptions {
    fn default() -> Self {
        AnalyzeOptions {
            strategy: cut::Strategy::Mincut,
            pins: cut::Pins::default(),
            columns: None,
            what_if: WhatIf::default(),
        }
    }
}

/// Every stage after reading, for one target and one set of assumptions.
#[derive(Clone)]
pub struct Stages {
    pub target: target::Target,
    pub verdicts: Vec<rules::Verdict>,
    pub costs: cut::Costs,
    pub plan: cut::Plan,
    pub greedy: cut::Plan,
    pub cpu_only: cut::Plan,
    pub array: map::ArrayUse,
    pub greedy_array: map::ArrayUse,
}

impl Stages {
    /// The summary figures of these stages over `read` (the model they were computed on).
    pub fn summary(&self, read: &Analyzed) -> report::analyze::Summary {
        report::analyze::summary(&report::analyze::Inputs {
            model: &read.model,
            target: &self.target,
            verdicts: &self.verdicts,
            costs: &self.costs,
            plan: &self.plan,
            greedy: &self.greedy,
            cpu_only: &self.cpu_only,
            array: &self.array,
            greedy_array: &self.greedy_array,
            params: 0,
            warnings: Vec::new(),
        })
    }
}

/// judge → cost → cut (all three strategies) → map, over a model already read.
pub fn run_stages(read: &Analyzed, target: target::Target, opts: &AnalyzeOptions) -> Result<Stages, cut::PinError> {
    let verdicts = rules::judge_with(&read.model.graph, &read.model.opsets, &target, &opts.what_if.judge);
    stages_from_verdicts(read, target, verdicts, opts)
}

/// cost → cut → map, from verdicts already given (the survey re-judges only what a lifted
/// blocker touches).
pub fn stages_from_verdicts(
    read: &Analyzed,
    target: target::Target,
    verdicts: Vec<rules::Verdict>,
    opts: &AnalyzeOptions,
) -> Result<Stages, cut::PinError> {
    let g = &read.model.graph;
    let costs = cut::cost::costs(g, &verdicts, &target);
    let cut::Plans {
        chosen: mut plan,
        greedy,
        cpu: cpu_only,
    } = cut::plans(g, &verdicts, &costs, opts.strategy, &opts.pins)?;
    let mapped = |p: &cut::Plan| {
        let array = map::map(g, &costs, p, &target, opts.columns);
        let latency = map::est_latency_ps(p, &costs, &array);
        (array, latency)
    };
    let (mut array, mut latency) = mapped(&plan);
    // Under `--strategy greedy` the chosen plan is the greedy plan: mapped once.
    let (greedy_array, greedy_latency) = if opts.strategy == cut::Strategy::Greedy {
        (array.clone(), latency)
    } else {
        mapped(&greedy)
    };
    if opts.strategy == cut::Strategy::Mincut {
        if !array.resident {
            plan = cut::fit(g, &verdicts, &costs, &opts.pins, plan, &|p| {
                let (array, latency) = mapped(p);
                (latency, array.resident)
            })?;
            (array, latency) = mapped(&plan);
        }
        // Never slower, as mapped, than the simple strategies (the cut alone guarantees this
        // for the objective, which leaves out swapping partitions through the columns).
        let (cpu_array, cpu_latency) = mapped(&cpu_only);
        for (other, other_array, other_latency) in [
            (&greedy, &greedy_array, greedy_latency),
            (&cpu_only, &cpu_array, cpu_latency),
        ] {
            if other_latency < latency {
                plan = cut::Plan {
                    strategy: cut::Strategy::Mincut,
                    mincut_ps: plan.mincut_ps,
                    ..other.clone()
                };
                array = other_array.clone();
                latency = other_latency;
            }
        }
    }
    Ok(Stages {
        target,
        verdicts,
        costs,
        plan,
        greedy,
        cpu_only,
        array,
        greedy_array,
    })
}

/// Every stage of `analyze`, kept for callers that look inside (tests, `explain`). The real
/// stages are reached through `Deref` (`analysis.plan`, `analysis.verdicts`, …).
pub struct Analysis {
    pub read: Analyzed,
    pub stages: Stages,
    /// The same stages under the what-if assumptions, when some were given.
    pub what_if: Option<(WhatIf, Box<Stages>)>,
}

impl std::ops::Deref for Analysis {
    type Target = Stages;

    fn deref(&self) -> &Stages {
        &self.stages
    }
}

/// read → judge → cost → cut (all three strategies) → map; again under the what-if
/// assumptions when `opts` has some.
pub fn analyze_stages(
    path: &Path,
    overrides: &Overrides,
    target: target::Target,
    opts: &AnalyzeOptions,
) -> Result<Analysis, AnalyzeError> {
    analyze_stages_observed(path, overrides, target, opts, &mut |_| {})
}

/// `analyze_stages`, telling `observe` which stage starts (for a progress line).
pub fn analyze_stages_observed(
    path: &Path,
    overrides: &Overrides,
    target: target::Target,
    opts: &AnalyzeOptions,
    observe: &mut dyn FnMut(&'static str),
) -> Result<Analysis, AnalyzeError> {
    observe("reading the model");
    let read = read_model(path, overrides)?;
    observe("judging, cutting, mapping");
    analyze_read(read, target, opts)
}

/// `analyze_stages` over a model already read.
pub fn analyze_read(read: Analyzed, target: target::Target, opts: &AnalyzeOptions) -> Result<Analysis, AnalyzeError> {
    let what_if = if opts.what_if.is_empty() {
        None
    } else {
        let assumed = target.with_assumed_ops(&opts.what_if.supported_ops);
        Some((opts.what_if.clone(), Box::new(run_stages(&read, assumed, opts)?)))
    };
    let real = AnalyzeOptions {
        what_if: WhatIf::default(),
        ..opts.clone()
    };
    let stages = run_stages(&read, target, &real)?;
    Ok(Analysis { read, stages, what_if })
}

impl Analysis {
    fn inputs<'a>(&'a self, s: &'a Stages, params: u64) -> report::analyze::Inputs<'a> {
        let mut warnings = self.read.diags.clone();
        warnings.extend(s.target.warnings.iter().cloned());
        report::analyze::Inputs {
            model: &self.read.model,
            target: &s.target,
            verdicts: &s.verdicts,
            costs: &s.costs,
            plan: &s.plan,
            greedy: &s.greedy,
            cpu_only: &s.cpu_only,
            array: &s.array,
            greedy_array: &s.greedy_array,
            params,
            warnings,
        }
    }

    pub fn report(&self) -> report::analyze::AnalyzeReport {
        let params = self.params();
        let mut r = report::analyze::build(&self.inputs(&self.stages, params));
        if let Some((w, s)) = &self.what_if {
            r.what_if = Some(report::analyze::what_if(&r, &self.inputs(s, params), w));
            // An assumed op the model does not contain changes nothing: say so.
            for op in &w.supported_ops {
                let (domain, name) = target::split_op(op);
                let present = self
                    .read
                    .model
                    .graph
                    .nodes
                    .iter()
                    .any(|n| n.op_type == name && ops::node_in_domain(n, domain));
                if !present {
                    r.warnings.push(diag::Diagnostic::new(
                        diag::codes::ASSUMPTION_UNUSED,
                        format!("--assume-supported {op}: the model has no node of that op type"),
                    ));
                }
            }
        }
        r
    }

    /// The whole report under the what-if assumptions (None without assumptions): what
    /// `check --assume-*` evaluates the policy on.
    pub fn assumed_report(&self) -> Option<report::analyze::AnalyzeReport> {
        let (_, s) = self.what_if.as_ref()?;
        Some(report::analyze::build(&self.inputs(s, self.params())))
    }

    fn params(&self) -> u64 {
        report::inspect::params_and_weight_bytes(&self.read.model.graph).0
    }
}
