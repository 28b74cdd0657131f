//! `tilecut diff` outputs: placement changes with the reason, partitions added or removed,
//! every summary figure, and the policy's regression rules (JSON: `gate::Diff` as it is).

use std::io::Write;

use super::term::{Paint, Tone};
use crate::cut::Side;
use crate::gate::DiffReport as Diff;

pub fn render_json(d: &Diff, out: &mut dyn Write) -> std::io::Result<()> {
    super::write_json(d, out)
}

fn side(x: Option<Side>) -> &'static str {
    match x {
        Some(Side::Accel) => "accel",
        Some(Side::Cpu) => "cpu",
        Some(Side::Const) => "const",
        None => "absent",
    }
}

pub fn render_table(d: &Diff, out: &mut dyn Write, paint: Paint) -> std::io::Result<()> {
    writeln!(out, "{} → {}", d.old, d.new)?;
    for c in &d.placement_changes {
        writeln!(
            out,
            "  {}: {} → {}{}",
            c.node,
            side(c.old),
            side(c.new),
            c.why.as_ref().map(|w| format!(" ({w})")).unwrap_or_default()
        )?;
    }
    writeln!(out, "  accelerator partitions {:+}", d.partitions_added)?;
    let num = |x: f64| {
        if x.is_nan() {
            format!("{:>14}", "unknown")
        } else {
            format!("{x:>14.4}")
        }
    };
    for f in &d.figures {
        let delta = if f.delta.is_nan() {
            "unknown".to_string()
        } else {
            format!("{:+.4}", f.delta)
        };
        writeln!(out, "  {:<16} {} → {} ({delta})", f.figure, num(f.old), num(f.new))?;
    }
    for r in d.regressions.iter().filter(|r| !r.passed) {
        writeln!(
            out,
            "  {} {}: {}",
            paint.paint(Tone::Bad, "REGRESSION"),
            r.rule,
            r.message
        )?;
    }
    Ok(())
}
