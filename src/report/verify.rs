//! `tilecut verify` outputs: which engine ran, where each input came from, and every output
//! compared (JSON: the `verify::VerifyReport` as it is).

use std::io::Write;

use super::term::{Paint, Tone};
use crate::verify::{Engine, VerifyReport};

pub fn render_json(r: &VerifyReport, out: &mut dyn Write) -> std::io::Result<()> {
    super::write_json(r, out)
}

pub fn render_table(r: &VerifyReport, out: &mut dyn Write, paint: Paint) -> std::io::Result<()> {
    let engine = match r.engine {
        Engine::Tract => "tract-onnx",
        Engine::PythonReference => "the onnx reference evaluator",
    };
    writeln!(out, "engine: {engine}")?;
    for i in &r.inputs {
        writeln!(out, "input  {} ({} {:?}): {}", i.input, i.dtype, i.shape, i.source)?;
    }
    for o in &r.outputs {
        let verdict = if o.equal {
            paint.paint(Tone::Good, "equal   ")
        } else {
            paint.paint(Tone::Bad, "MISMATCH")
        };
        writeln!(
            out,
            "{verdict} {} ({}, {} elements): max error {:.3e}, tolerance {:.3e}",
            o.output, o.dtype, o.elements, o.max_error, o.tolerance
        )?;
    }
    Ok(())
}
