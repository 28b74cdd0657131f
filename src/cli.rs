//! The command line, defined once: clap derive, doc comments are the `--help` text.

use std::path::PathBuf;

use clap::{Args, Parser, Subcommand};

use crate::import::Overrides;
use crate::report::Format;

/// How much of an ONNX model runs on a tile-array accelerator, where to cut it, and what
/// the cut costs. Exit status: 0 ok, 1 a policy was violated, 2 tilecut could not run.
#[derive(Parser, Debug)]
#[command(name = "tilecut", version, about)]
pub struct Cli {
    /// No progress line and no notes on stderr; errors are still printed.
    #[arg(long, short, global = true)]
    pub quiet: bool,
    #[command(subcommand)]
    pub command: Command,
}

#[derive(Subcommand, Debug)]
pub enum Command {
    /// Read a model: opsets, inputs and outputs, op counts, parameters, MACs, activation
    /// bytes, tensors whose shapes stay unknown, and warnings.
    Inspect(InspectArgs),
    /// Judge every node against a target, find the CPU/accelerator cut, and estimate
    /// transfers, partitions and latency (estimates, from the cost model in the README).
    Analyze(AnalyzeArgs),
    /// List the built-in target profiles, or print one as a starting template.
    Targets(TargetsArgs),
    /// Gate merges on offload coverage: check models against a policy file. Exit 0 when all
    /// limits hold, 1 when one is violated, 2 when a model or the policy could not be used.
    Check(CheckArgs),
    /// Compare two models or two saved `analyze --format json` reports: placement changes,
    /// partitions, and every summary figure.
    Diff(DiffArgs),
    /// Export each partition of the cut as a standalone ONNX model, plus a manifest.
    Split(SplitArgs),
    /// Run the original model and the chained pieces of a split on the same inputs (seeded
    /// random, or files given with --feed) and compare every output. Exit 0 equal, 1
    /// mismatch, 2 could not run.
    Verify(VerifyArgs),
    /// Survey a collection of models (files and folders, searched for *.onnx): which
    /// blocker, once lifted, would gain the most. Each lift re-runs only the stages it
    /// affects. Exit 0, or 1 with --strict when some file could not be surveyed.
    Survey(SurveyArgs),
    /// Explain one node's verdict (or the node producing a tensor): bundle, types, shapes,
    /// and every rule consulted.
    Explain(ExplainArgs),
    /// Developer tools: regenerate the sample models, generate benchmark models.
    #[command(hide = true, subcommand)]
    Dev(DevCommand),
}

#[derive(Subcommand, Debug)]
pub enum DevCommand {
    /// Write every sample model into DIR (byte-for-byte reproducible).
    Samples {
        /// Output folder (created if missing).
        dir: PathBuf,
    },
    /// Write the benchmark models into DIR: stacks of 10k/30k/50k/100k/200k nodes, 1 GiB of
    /// weights inline and external, and 2.25 GiB of external weights (about 5 GB of disk).
    BenchModels {
        /// Output folder (created if missing).
        dir: PathBuf,
        /// Only the node stacks, not the heavy-weight models.
        #[arg(long)]
        stacks_only: bool,
    },
}

/// Options shared by every command that reads a model.
#[derive(Args, Debug, Clone)]
pub struct ModelArgs {
    /// The ONNX model file.
    pub model: PathBuf,
    /// Fix a symbolic dimension, e.g. `--dim batch=1` (repeatable).
    #[arg(long = "dim", value_name = "NAME=VALUE")]
    pub dims: Vec<String>,
    /// Fix an input's shape, e.g. `--input image=1x3x224x224` (repeatable).
    #[arg(long = "input", value_name = "NAME=SHAPE")]
    pub inputs: Vec<String>,
    /// Trip count of a Loop node whose count is not a constant, e.g. `--loop-trips decode=32`.
    #[arg(long = "loop-trips", value_name = "NODE=N")]
    pub loop_trips: Vec<String>,
    /// Fix a small numeric input's value, so that what branches on it resolves, e.g.
    /// `--value sample_rate=16000` (comma-separated for several elements; repeatable).
    #[arg(long = "value", value_name = "NAME=V")]
    pub values: Vec<String>,
}

impl ModelArgs {
    pub fn overrides(&self) -> Result<Overrides, crate::error::SettingError> {
        let mut o = Overrides::default();
        for d in &self.dims {
            o.add_dim(d)?;
        }
        for i in &self.inputs {
            o.add_input(i)?;
        }
        for t in &self.loop_trips {
            o.add_loop_trips(t)?;
        }
        for v in &self.values {
            o.add_value(v)?;
        }
        Ok(o)
    }
}

#[derive(Args, Debug)]
pub struct InspectArgs {
    #[command(flatten)]
    pub model: ModelArgs,
    /// Output format.
    #[arg(long, value_enum, default_value_t = Format::Table)]
    pub format: Format,
}

/// The target option shared by every command that judges a model.
#[derive(Args, Debug, Clone)]
pub struct TargetArgs {
    /// A built-in target name (see `tilecut targets`) or a profile file.
    #[arg(long, default_value = "compact-array")]
    pub target: String,
}

#[derive(Args, Debug)]
pub struct AnalyzeArgs {
    #[command(flatten)]
    pub model: ModelArgs,
    #[command(flatten)]
    pub target: TargetArgs,
    /// Output format.
    #[arg(long, value_enum, default_value_t = Format::Table)]
    pub format: Format,
    #[command(flatten)]
    pub cut: CutArgs,
    #[command(flatten)]
    pub what_if: WhatIfArgs,
    /// Cap the array budget at N columns, to see what fits in fewer columns and at what cost.
    #[arg(long, value_name = "N", value_parser = clap::value_parser!(u32).range(1..))]
    pub columns: Option<u32>,
    /// Also write a Graphviz DOT file of the partitioned graph (one cluster per partition).
    #[arg(long, value_name = "FILE")]
    pub dot: Option<PathBuf>,
    /// Also write a self-contained HTML page with the lanes, the array grid and the figures.
    #[arg(long, value_name = "FILE")]
    pub html: Option<PathBuf>,
}

#[derive(Args, Debug)]
pub struct TargetsArgs {
    #[command(subcommand)]
    pub action: Option<TargetsAction>,
}

#[derive(Subcommand, Debug)]
pub enum TargetsAction {
    /// Print a built-in profile (a commented template to copy and edit).
    Show {
        /// Built-in target name.
        name: String,
    },
}

/// Output formats of `survey`.
#[derive(Clone, Copy, Debug, PartialEq, Eq, clap::ValueEnum)]
pub enum SurveyFormat {
    Table,
    Json,
    Markdown,
    Csv,
}

#[derive(Args, Debug)]
pub struct SurveyArgs {
    /// Model files and folders (folders are searched recursively for *.onnx).
    #[arg(required = true)]
    pub paths: Vec<PathBuf>,
    #[command(flatten)]
    pub target: TargetArgs,
    /// Fix a symbolic dimension in every model, e.g. `--dim batch=1` (repeatable).
    #[arg(long = "dim", value_name = "NAME=VALUE")]
    pub dims: Vec<String>,
    /// The value a symbolic dim takes when its blocker is lifted.
    #[arg(long, value_name = "N", default_value_t = 1, value_parser = clap::value_parser!(u64).range(1..))]
    pub lift_dims_to: u64,
    /// The value one named dim takes when lifted, e.g. `--lift-dim frames=98` (repeatable).
    #[arg(long = "lift-dim", value_name = "NAME=N")]
    pub lift_dim: Vec<String>,
    /// Models analyzed in parallel (default: the machine's cores); each holds one model in memory.
    #[arg(long, value_name = "N", value_parser = clap::value_parser!(u64).range(1..1025))]
    pub jobs: Option<u64>,
    /// Exit 1 when some file could not be surveyed.
    #[arg(long)]
    pub strict: bool,
    /// Output format.
    #[arg(long, value_enum, default_value_t = SurveyFormat::Table)]
    pub format: SurveyFormat,
}

#[derive(Args, Debug)]
pub struct ExplainArgs {
    #[command(flatten)]
    pub model: ModelArgs,
    /// A node name, or a tensor name (its producer is explained).
    pub node: String,
    #[command(flatten)]
    pub target: TargetArgs,
}

#[derive(Args, Debug)]
pub struct CheckArgs {
    /// Models to check.
    #[arg(required_unless_present = "init")]
    pub models: Vec<PathBuf>,
    /// The policy file (TOML; `--init` prints a commented template).
    #[arg(long, required_unless_present = "init")]
    pub policy: Option<PathBuf>,
    /// Print a commented policy template and exit.
    #[arg(long)]
    pub init: bool,
    /// Target for every model (overrides the policy's).
    #[arg(long)]
    pub target: Option<String>,
    /// Fix a symbolic dimension (overrides the policy's dims).
    #[arg(long = "dim", value_name = "NAME=VALUE")]
    pub dims: Vec<String>,
    /// Least share of MACs on the accelerator, 0 to 1 (overrides the policy's).
    #[arg(long, value_name = "FRACTION")]
    pub min_coverage_macs: Option<f64>,
    /// Least share of (non-constant) nodes on the accelerator, 0 to 1 (overrides the policy's).
    #[arg(long, value_name = "FRACTION")]
    pub min_coverage_nodes: Option<f64>,
    /// Most accelerator partitions, i.e. dispatches per inference (overrides the policy's).
    #[arg(long, value_name = "N")]
    pub max_accel_partitions: Option<u64>,
    /// Most bytes crossing CPU ↔ accelerator per inference (overrides the policy's).
    #[arg(long, value_name = "BYTES")]
    pub max_boundary_bytes: Option<u64>,
    /// Most boundary crossings per inference (overrides the policy's).
    #[arg(long, value_name = "N")]
    pub max_transfers: Option<u64>,
    /// Most estimated end-to-end latency in microseconds, an estimate (overrides the policy's).
    #[arg(long, value_name = "MICROSECONDS")]
    pub max_latency_us: Option<f64>,
    #[command(flatten)]
    pub what_if: WhatIfArgs,
    /// Write the current figures as a baseline file.
    #[arg(long, value_name = "FILE")]
    pub save_baseline: Option<PathBuf>,
    /// Fail on regressions against this baseline (tolerances from the policy).
    #[arg(long, value_name = "FILE")]
    pub baseline: Option<PathBuf>,
    /// Append a Markdown summary to this file (for CI job summaries).
    #[arg(long, value_name = "PATH")]
    pub summary_file: Option<PathBuf>,
    /// Write JUnit XML here.
    #[arg(long, value_name = "FILE")]
    pub junit: Option<PathBuf>,
    /// Write SARIF 2.1.0 here.
    #[arg(long, value_name = "FILE")]
    pub sarif: Option<PathBuf>,
    /// Output format on stdout.
    #[arg(long, value_enum, default_value_t = Format::Table)]
    pub format: Format,
}

#[derive(Args, Debug)]
pub struct DiffArgs {
    /// The old model or saved JSON report.
    pub old: PathBuf,
    /// The new model or saved JSON report.
    pub new: PathBuf,
    #[command(flatten)]
    pub target: TargetArgs,
    /// Fix a symbolic dimension of both models.
    #[arg(long = "dim", value_name = "NAME=VALUE")]
    pub dims: Vec<String>,
    /// Exit 1 when the policy's regression rules are broken (needs --policy).
    #[arg(long, requires = "policy")]
    pub fail_on_regression: bool,
    /// Policy whose [regression] rules apply.
    #[arg(long)]
    pub policy: Option<PathBuf>,
    /// Output format.
    #[arg(long, value_enum, default_value_t = Format::Table)]
    pub format: Format,
}

#[derive(Args, Debug)]
pub struct SplitArgs {
    #[command(flatten)]
    pub model: ModelArgs,
    #[command(flatten)]
    pub target: TargetArgs,
    /// Output folder (refused if it exists and is not empty, unless --force).
    #[arg(long)]
    pub out: PathBuf,
    /// Replace an existing non-empty output folder.
    #[arg(long)]
    pub force: bool,
    /// Cut at these tensors instead of the cut-finder's boundaries (repeatable).
    #[arg(long = "cut-at", value_name = "TENSOR")]
    pub cut_at: Vec<String>,
    #[command(flatten)]
    pub cut: CutArgs,
}

#[derive(Args, Debug)]
pub struct VerifyArgs {
    #[command(flatten)]
    pub model: ModelArgs,
    /// The folder `tilecut split` wrote.
    pub dir: PathBuf,
    /// Use this input's values from a file instead of seeded random ones: `NAME=FILE.npy`,
    /// `NAME=FILE.pb` (an ONNX TensorProto), or `FILE.pb` when the tensor carries the input's
    /// name (repeatable).
    #[arg(long = "feed", value_name = "NAME=FILE")]
    pub feeds: Vec<String>,
    /// Which engine runs the models.
    #[arg(long, value_enum, default_value_t = crate::verify::Engine::Tract)]
    pub engine: crate::verify::Engine,
    /// Relative tolerance for float outputs: an element passes within atol + rtol·max(|a|, |b|).
    #[arg(long, default_value_t = 1e-5)]
    pub rtol: f64,
    /// Absolute tolerance for float outputs (what elements near zero are held to).
    #[arg(long, default_value_t = 1e-6)]
    pub atol: f64,
    /// Tolerance in quantization steps for integer outputs.
    #[arg(long, default_value_t = 1.0)]
    pub steps: f64,
    /// Output format.
    #[arg(long, value_enum, default_value_t = Format::Table)]
    pub format: Format,
}

/// What-if assumptions shared by `analyze` and `check`: figures under them are computed
/// beside the real ones.
#[derive(Args, Debug, Clone, Default)]
pub struct WhatIfArgs {
    /// What-if: treat these op types as supported by the target under its own data types,
    /// e.g. `--assume-supported Softmax,TopK` (repeatable; `domain.Op` for other domains).
    #[arg(long = "assume-supported", value_name = "OP[,OP...]")]
    pub assume_supported: Vec<String>,
    /// What-if: judge float compute ops as if quantized to the first integer type signature
    /// of the target's rule for them.
    #[arg(long = "assume-quantized")]
    pub assume_quantized: bool,
    /// What-if: these reason codes no longer block, e.g. `--assume-waived kernel-too-large`
    /// (repeatable; quantization-scheme, attribute, shape-limit and type codes).
    #[arg(long = "assume-waived", value_name = "CODE[,CODE...]")]
    pub assume_waived: Vec<String>,
}

impl WhatIfArgs {
    pub fn what_if(&self) -> Result<crate::WhatIf, crate::error::SettingError> {
        let mut w = crate::WhatIf::default();
        for s in &self.assume_supported {
            w.add_supported(s)?;
        }
        for c in &self.assume_waived {
            w.add_waived(c)?;
        }
        w.judge.quantized = self.assume_quantized;
        Ok(w)
    }
}

/// The cut options shared by `analyze` and `split`.
#[derive(Args, Debug, Clone)]
pub struct CutArgs {
    /// How to choose what runs on the accelerator.
    #[arg(long, value_enum, default_value_t = crate::cut::Strategy::Mincut)]
    pub strategy: crate::cut::Strategy,
    /// Keep matching nodes on the CPU: a node name, an op type, or a `*` pattern (repeatable).
    #[arg(long = "pin-cpu", value_name = "PATTERN")]
    pub pin_cpu: Vec<String>,
    /// Force matching nodes onto the accelerator (repeatable); impossible pins are errors.
    #[arg(long = "pin-accel", value_name = "PATTERN")]
    pub pin_accel: Vec<String>,
}

impl CutArgs {
    pub fn options(&self, columns: Option<u32>, what_if: crate::WhatIf) -> crate::AnalyzeOptions {
        crate::AnalyzeOptions {
            strategy: self.strategy,
            pins: crate::cut::Pins {
                cpu: self.pin_cpu.clone(),
                accel: self.pin_accel.clone(),
            },
            columns,
            what_if,
        }
    }
}
