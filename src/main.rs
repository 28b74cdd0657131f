//! The `tilecut` process: arguments → library → exit status. Errors are printed once, as
//! one line, on stderr.

use std::io::Write;
use std::process::ExitCode;

use anyhow::Context;
use clap::Parser;
use tilecut::cli::{Cli, Command, DevCommand, TargetsAction};
use tilecut::onnx::builder::write_atomic;
use tilecut::report::{analyze, inspect, Format};

/// Exit statuses, documented in the README: 0 ok, 1 policy violated, 2 could not run.
const EXIT_COULD_NOT_RUN: u8 = 2;

fn main() -> ExitCode {
    // Large OS pages for the allocator's arenas: on virtual machines a page fault costs
    // microseconds, and the IR of a 100k-node model touches hundreds of MB.
    // SAFETY: setting an allocator option is a plain store, valid at any time.
    unsafe { libmimalloc_sys::mi_option_set(libmimalloc_sys::mi_option_large_os_pages, 1) };
    let cli = Cli::parse();
    match run(cli) {
        Ok(code) => ExitCode::from(code),
        Err(e) => {
            if is_broken_pipe(&e) {
                return ExitCode::SUCCESS;
            }
            let chain: Vec<String> = e.chain().map(|c| c.to_string()).collect();
            eprintln!("tilecut: error: {}", chain.join(": ").replace('\n', " "));
            ExitCode::from(EXIT_COULD_NOT_RUN)
        }
    }
}

fn is_broken_pipe(e: &anyhow::Error) -> bool {
    e.chain().any(|c| {
        c.downcast_ref::<std::io::Error>()
            .is_some_and(|io| io.kind() == std::io::ErrorKind::BrokenPipe)
    })
}

fn run(cli: Cli) -> anyhow::Result<u8> {
    match cli.command {
        Command::Inspect(args) => {
            let overrides = args.model.overrides()?;
            let report = tilecut::inspect(&args.model.model, &overrides)?;
            let mut buf = Vec::new();
            match args.format {
                Format::Json => inspect::render_json(&report, &mut buf)?,
                Format::Table => inspect::render_table(&report, &mut buf)?,
                Format::Markdown => inspect::render_markdown(&report, &mut buf)?,
            }
            std::io::stdout().lock().write_all(&buf)?;
            Ok(0)
        }
        Command::Analyze(args) => {
            let overrides = args.model.overrides()?;
            let target = tilecut::target::load(&args.target.target)?;
            let opts = tilecut::AnalyzeOptions {
                strategy: args.strategy,
                pins: tilecut::cut::Pins {
                    cpu: args.pin_cpu.clone(),
                    accel: args.pin_accel.clone(),
                },
            };
            let analysis = tilecut::analyze_stages(&args.model.model, &overrides, target, &opts)?;
            let report = analysis.report();
            let mut buf = Vec::new();
            match args.format {
                Format::Json => analyze::render_json(&report, &mut buf)?,
                Format::Table => analyze::render_table(&report, &mut buf)?,
                Format::Markdown => analyze::render_markdown(&report, &mut buf)?,
            }
            std::io::stdout().lock().write_all(&buf)?;
            Ok(0)
        }
        Command::Targets(args) => {
            let mut out = String::new();
            match args.action {
                None => {
                    for (name, text) in tilecut::target::BUILTIN {
                        let t = tilecut::target::parse(text, name)?;
                        out.push_str(&format!(
                            "{:<16} {:>2} columns × {} rows, {:>5.1} TOPS int8  {}\n",
                            name,
                            t.file.array.columns,
                            t.file.array.compute_rows,
                            t.tops("int8").unwrap_or(0.0),
                            t.file.description
                        ));
                    }
                }
                Some(TargetsAction::Show { name }) => {
                    let text = tilecut::target::BUILTIN
                        .iter()
                        .find(|(n, _)| *n == name)
                        .map(|(_, t)| *t)
                        .ok_or_else(|| anyhow::anyhow!("no built-in target `{name}` (see `tilecut targets`)"))?;
                    out.push_str(text);
                }
            }
            std::io::stdout().lock().write_all(out.as_bytes())?;
            Ok(0)
        }
        Command::Explain(args) => {
            let overrides = args.model.overrides()?;
            let target = tilecut::target::load(&args.target.target)?;
            let analysis = tilecut::analyze_stages(&args.model.model, &overrides, target, &Default::default())?;
            let id = tilecut::report::explain::find(&analysis, &args.node).ok_or_else(|| {
                anyhow::anyhow!(
                    "{}: no node or tensor named `{}`",
                    args.model.model.display(),
                    args.node
                )
            })?;
            let mut buf = Vec::new();
            tilecut::report::explain::render(&analysis, id, &mut buf)?;
            std::io::stdout().lock().write_all(&buf)?;
            Ok(0)
        }
        Command::Dev(DevCommand::Samples { dir }) => {
            std::fs::create_dir_all(&dir).with_context(|| format!("{}: cannot create folder", dir.display()))?;
            for (name, model) in tilecut::samples::all().map_err(|e| anyhow::anyhow!("building samples: {e}"))? {
                let path = dir.join(name);
                write_atomic(&path, &prost::Message::encode_to_vec(&model))
                    .with_context(|| format!("{}: cannot write", path.display()))?;
                eprintln!("wrote {}", path.display());
            }
            Ok(0)
        }
        Command::Dev(DevCommand::BenchModels { dir, stacks_only }) => {
            std::fs::create_dir_all(&dir).with_context(|| format!("{}: cannot create folder", dir.display()))?;
            for n in [10_000usize, 30_000, 50_000, 100_000, 200_000] {
                let path = dir.join(format!("stack_{}k.onnx", n / 1000));
                write_atomic(&path, &tilecut::benchgen::stack(n).encode())
                    .with_context(|| format!("{}: cannot write", path.display()))?;
                eprintln!("wrote {}", path.display());
            }
            if !stacks_only {
                for (stem, external) in [("heavy_1g_inline", false), ("heavy_1g_external", true)] {
                    tilecut::benchgen::heavy(1 << 30, &dir, stem, external)
                        .with_context(|| format!("{}: cannot write {stem}", dir.display()))?;
                    eprintln!("wrote {}", dir.join(stem).display());
                }
            }
            Ok(0)
        }
    }
}

// The reader allocates many small strings and vectors; mimalloc keeps that linear in the
// node count where the system allocator's consolidation does not (benches/README numbers).
#[global_allocator]
static ALLOCATOR: mimalloc::MiMalloc = mimalloc::MiMalloc;
