//! The `tilecut` process: arguments → library → exit status. Errors are printed once, as
//! one line, on stderr.

use std::io::Write;
use std::process::ExitCode;

use anyhow::Context;
use clap::Parser;
use tilecut::cli::{Cli, Command, DevCommand};
use tilecut::onnx::builder::write_atomic;
use tilecut::report::{inspect, Format};

/// Exit statuses, documented in the README: 0 ok, 1 policy violated, 2 could not run.
const EXIT_COULD_NOT_RUN: u8 = 2;

fn main() -> ExitCode {
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
            }
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
    }
}
