//! `tilecut survey` outputs: the ranked "lift this blocker → gain" table, per-model coverage
//! and failures, as a terminal table, JSON, Markdown, or CSV.
//!
//! JSON shape (version `survey::SURVEY_SCHEMA_VERSION`): `schema_version`, `estimate_note`,
//! `target`, `dim_lifts` {default, by_name}, `ranking[]` {rank, blocker, kind (op|quant|limit|dim), name,
//! how, models, models_helped, nodes, macs_moved, partitions_removed, transfers_removed,
//! boundary_bytes_removed, latency_saved_us, latency_unknown_models}, `models[]` {path,
//! nodes, figures {accel_macs, coverage_macs, coverage_nodes, accel_partitions, transfers,
//! boundary_bytes, est_latency_us}, lifts[] {blocker, kind, name, how, nodes, figures, gain
//! {macs_moved, partitions_removed, transfers_removed, boundary_bytes_removed,
//! latency_saved_us}}, lift_errors[]}, `failures[]` {path, error}.
//!
//! CSV: one row per ranked blocker, the `ranking[]` fields in that order, header first.

use std::io::Write;

use tabled::settings::Style;
use tabled::{Table, Tabled};

use super::term::{Paint, Tone};
use super::{grouped, pct};
use crate::survey::SurveyReport;

pub fn render_json(r: &SurveyReport, out: &mut dyn Write) -> std::io::Result<()> {
    super::write_json(r, out)
}

fn signed(n: i64) -> String {
    if n > 0 {
        format!("+{}", grouped(n as u64))
    } else if n < 0 {
        format!("-{}", grouped(n.unsigned_abs()))
    } else {
        "0".into()
    }
}

fn latency(r: &crate::survey::RankRow) -> String {
    let mut s = format!("{:.1}", r.latency_saved_us);
    if r.latency_unknown_models > 0 {
        s.push_str(&format!(" (+{} unknown)", r.latency_unknown_models));
    }
    s
}

#[derive(Tabled)]
struct RankTable {
    #[tabled(rename = "#")]
    rank: usize,
    #[tabled(rename = "lift this blocker")]
    blocker: String,
    models: String,
    nodes: usize,
    #[tabled(rename = "MACs moved")]
    macs: String,
    #[tabled(rename = "partitions removed")]
    partitions: String,
    #[tabled(rename = "transfers removed")]
    transfers: String,
    #[tabled(rename = "est. µs saved")]
    latency: String,
    #[tabled(rename = "see it with")]
    how: String,
}

#[derive(Tabled)]
struct ModelTable {
    model: String,
    nodes: usize,
    #[tabled(rename = "coverage MACs")]
    macs: String,
    #[tabled(rename = "coverage nodes")]
    cover: String,
    #[tabled(rename = "accel partitions")]
    partitions: usize,
    #[tabled(rename = "est. latency µs")]
    latency: String,
    blockers: usize,
}

pub fn render_table(r: &SurveyReport, out: &mut dyn Write, paint: Paint) -> std::io::Result<()> {
    writeln!(
        out,
        "{}",
        paint.paint(
            Tone::Strong,
            &format!(
                "survey of {} model(s) on target `{}`: what lifting each blocker would gain",
                r.models.len() + r.failures.len(),
                r.target
            )
        )
    )?;
    if r.ranking.is_empty() {
        writeln!(out, "no blockers: every node the target could run is judged capable")?;
    } else {
        let rows: Vec<RankTable> = r
            .ranking
            .iter()
            .map(|x| RankTable {
                rank: x.rank,
                blocker: x.blocker.clone(),
                models: format!("{}/{}", x.models_helped, x.models),
                nodes: x.nodes,
                macs: signed(x.macs_moved),
                partitions: signed(x.partitions_removed),
                transfers: signed(x.transfers_removed),
                latency: if x.latency_saved_us > 0.0 {
                    paint.paint(Tone::Good, &latency(x))
                } else {
                    latency(x)
                },
                how: x.how.clone(),
            })
            .collect();
        writeln!(out, "{}", Table::new(rows).with(Style::sharp()))?;
        let mut dims: Vec<String> = r.dim_lifts.by_name.iter().map(|(k, v)| format!("{k}={v}")).collect();
        dims.push(format!("others={}", r.dim_lifts.default));
        writeln!(
            out,
            "models = helped/with the blocker; lifted dims are fixed to {}",
            dims.join(", ")
        )?;
    }
    if !r.models.is_empty() {
        let rows: Vec<ModelTable> = r
            .models
            .iter()
            .map(|m| ModelTable {
                model: m.path.clone(),
                nodes: m.nodes,
                macs: pct(m.figures.coverage_macs),
                cover: pct(Some(m.figures.coverage_nodes)),
                partitions: m.figures.accel_partitions,
                latency: m
                    .figures
                    .est_latency_us
                    .map_or_else(|| "unknown (fix dims)".into(), |v| format!("{v:.1}")),
                blockers: m.lifts.len(),
            })
            .collect();
        writeln!(out, "per model:")?;
        writeln!(out, "{}", Table::new(rows).with(Style::sharp()))?;
    }
    for m in &r.models {
        for e in &m.lift_errors {
            writeln!(out, "{} in {}: {e}", paint.paint(Tone::Warn, "could not lift"), m.path)?;
        }
    }
    for f in &r.failures {
        writeln!(
            out,
            "{} {}: {}",
            paint.paint(Tone::Bad, "could not survey"),
            f.path,
            f.error
        )?;
    }
    writeln!(out, "{}", r.estimate_note)
}

fn md(s: &str) -> String {
    s.replace('|', "\\|")
}

pub fn render_markdown(r: &SurveyReport, out: &mut dyn Write) -> std::io::Result<()> {
    writeln!(
        out,
        "### tilecut survey: {} model(s) on `{}`\n",
        r.models.len() + r.failures.len(),
        r.target
    )?;
    if r.ranking.is_empty() {
        writeln!(out, "No blockers.\n")?;
    } else {
        writeln!(
            out,
            "| # | lift this blocker | models helped | nodes | MACs moved | partitions removed | transfers removed | est. µs saved | see it with |"
        )?;
        writeln!(out, "|---|---|---|---|---|---|---|---|---|")?;
        for x in &r.ranking {
            writeln!(
                out,
                "| {} | `{}` | {}/{} | {} | {} | {} | {} | {} | `{}` |",
                x.rank,
                md(&x.blocker),
                x.models_helped,
                x.models,
                x.nodes,
                signed(x.macs_moved),
                signed(x.partitions_removed),
                signed(x.transfers_removed),
                latency(x),
                md(&x.how)
            )?;
        }
    }
    if !r.models.is_empty() {
        writeln!(
            out,
            "\n| model | nodes | coverage MACs | coverage nodes | accel partitions | est. latency µs |"
        )?;
        writeln!(out, "|---|---|---|---|---|---|")?;
        for m in &r.models {
            writeln!(
                out,
                "| `{}` | {} | {} | {} | {} | {} |",
                md(&m.path),
                m.nodes,
                pct(m.figures.coverage_macs),
                pct(Some(m.figures.coverage_nodes)),
                m.figures.accel_partitions,
                m.figures
                    .est_latency_us
                    .map_or_else(|| "unknown".into(), |v| format!("{v:.1}"))
            )?;
        }
    }
    if !r.failures.is_empty() {
        writeln!(out, "\n**Could not survey**\n")?;
        for f in &r.failures {
            writeln!(out, "- `{}`: {}", md(&f.path), md(&f.error))?;
        }
    }
    writeln!(out, "\n_{}_", r.estimate_note)
}

/// A CSV field, quoted when it holds a comma, quote or line break (RFC 4180).
fn csv(s: &str) -> String {
    if s.contains([',', '"', '\n', '\r']) {
        format!("\"{}\"", s.replace('"', "\"\""))
    } else {
        s.to_string()
    }
}

pub fn render_csv(r: &SurveyReport, out: &mut dyn Write) -> std::io::Result<()> {
    writeln!(
        out,
        "rank,blocker,kind,name,how,models,models_helped,nodes,macs_moved,partitions_removed,transfers_removed,boundary_bytes_removed,latency_saved_us,latency_unknown_models"
    )?;
    for x in &r.ranking {
        writeln!(
            out,
            "{},{},{},{},{},{},{},{},{},{},{},{},{:.6},{}",
            x.rank,
            csv(&x.blocker),
            x.kind.as_str(),
            csv(&x.name),
            csv(&x.how),
            x.models,
            x.models_helped,
            x.nodes,
            x.macs_moved,
            x.partitions_removed,
            x.transfers_removed,
            x.boundary_bytes_removed,
            x.latency_saved_us,
            x.latency_unknown_models
        )?;
    }
    Ok(())
}
