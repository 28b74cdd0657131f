//! tilecut: how much of an ONNX model runs on a tile-array accelerator.
pub mod benchgen;
pub mod cli;
pub mod diag;
pub mod error;
pub mod fastmap;
pub mod import;
pub mod infer;
pub mod ir;
pub mod onnx;
pub mod ops;
pub mod report;
pub mod samples;
pub mod values;

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
