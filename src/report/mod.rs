//! Reports: one view model per command, the only serializable trees, and one renderer per
//! format. Only this module (and `main` for errors) writes to stdout.

pub mod analyze;
pub mod check;
pub mod diff;
pub mod explain;
pub mod inspect;
pub mod survey;
pub mod term;
pub mod verify;
pub mod visual;

/// Output formats of the reading commands.
#[derive(Clone, Copy, Debug, PartialEq, Eq, clap::ValueEnum)]
pub enum Format {
    Table,
    Json,
    Markdown,
}

/// Every JSON report: pretty-printed, one trailing newline. serde_json writes a token at a
/// time; straight into a `dyn Write` each token was a dynamic call, a third of the run for a
/// large model's JSON. A buffer in between takes the tokens with inlined copies.
pub fn write_json<T: serde::Serialize + ?Sized>(value: &T, out: &mut dyn std::io::Write) -> std::io::Result<()> {
    use std::io::Write;
    let mut buf = std::io::BufWriter::with_capacity(1 << 16, out);
    serde_json::to_writer_pretty(&mut buf, value)?;
    buf.write_all(b"\n")?;
    buf.flush()
}

/// Formats a count with thousands separators, for tables.
pub fn grouped(n: u64) -> String {
    let s = n.to_string();
    let mut out = String::with_capacity(s.len() + s.len() / 3);
    for (i, c) in s.chars().enumerate() {
        if i > 0 && (s.len() - i) % 3 == 0 {
            out.push('_');
        }
        out.push(c);
    }
    out
}

/// A share (0–1) as a percentage, or "unknown".
pub fn pct(x: Option<f64>) -> String {
    x.map(|v| format!("{:.1} %", v * 100.0))
        .unwrap_or_else(|| "unknown".into())
}

/// A figure that may be unknown, for tables.
pub fn maybe(n: Option<u64>) -> String {
    n.map(grouped).unwrap_or_else(|| "unknown".into())
}

/// Graph inputs the file declares with dims it leaves unknown (`-1`, missing, `?`): only
/// `--input` sizes them, and reports name them beside the figures they leave unknown.
pub(crate) fn inputs_to_size(g: &crate::ir::Graph) -> Vec<String> {
    g.inputs
        .iter()
        .map(|id| g.value(*id))
        .filter(|v| {
            v.fact
                .shape
                .dims()
                .is_some_and(|d| d.contains(&crate::ir::Dim::Unknown))
        })
        .map(|v| v.name.to_string())
        .collect()
}

/// The options that would make unknown figures known: a `--dim` (or `--loop-trips`) per
/// symbol they depend on, an `--input` per input declared with unknown dims, a `--value` per
/// input whose value sizes tensors or picks an If's branch.
pub(crate) fn fix_hints(dims: &[String], inputs: &[String], values: &[String]) -> Vec<String> {
    dims.iter()
        .map(|d| crate::text::fix_hint(d))
        .chain(inputs.iter().map(|n| format!("--input {n}=…")))
        .chain(values.iter().map(|n| format!("--value {n}=…")))
        .collect()
}
