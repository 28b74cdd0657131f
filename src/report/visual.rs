//! Pictures of an analysis: Graphviz DOT (one cluster per partition) and a self-contained HTML
//! page (no network, no external scripts) with the model as lanes along execution order, the
//! transfers drawn to scale of bytes, the array as a grid of columns and tiles, and the figures.

use std::io::Write;

use crate::cut::Side;
use crate::report::analyze::AnalyzeReport;
use crate::Analysis;

fn esc(s: &str) -> String {
    s.replace('&', "&amp;")
        .replace('<', "&lt;")
        .replace('>', "&gt;")
        .replace('"', "&quot;")
}

fn dot_id(s: &str) -> String {
    format!("\"{}\"", s.replace('\\', "\\\\").replace('"', "\\\""))
}

/// Graphviz DOT of the partitioned graph.
pub fn render_dot(a: &Analysis, out: &mut dyn Write) -> std::io::Result<()> {
    let g = &a.read.model.graph;
    let plan = &a.plan;
    writeln!(
        out,
        "digraph tilecut {{\n  rankdir=TB;\n  node [shape=box, fontsize=10];"
    )?;
    for p in &plan.partitions {
        let (label, color) = match p.side {
            Side::Accel => ("accelerator", "#2f7d6d"),
            _ => ("CPU", "#6b5ca5"),
        };
        writeln!(
            out,
            "  subgraph cluster_p{} {{\n    label=\"P{} {label}\";\n    color=\"{color}\";",
            p.id, p.id
        )?;
        for n in &p.nodes {
            let node = g.node(*n);
            writeln!(
                out,
                "    {} [label={}];",
                dot_id(&node.name),
                dot_id(&format!("{}\n{}", node.op_type, node.name))
            )?;
        }
        writeln!(out, "  }}")?;
    }
    let crossing: std::collections::BTreeSet<usize> = plan.cut_points.iter().map(|c| c.value.index()).collect();
    for (i, node) in g.nodes.iter().enumerate() {
        if plan.side[i] == Side::Const {
            continue;
        }
        for v in node.all_inputs() {
            let Some(p) = g.value(v).producer else { continue };
            if plan.side[p.index()] == Side::Const {
                continue;
            }
            let style = if crossing.contains(&v.index()) && plan.partition_of[p.index()] != plan.partition_of[i] {
                format!(
                    " [color=\"#c0392b\", penwidth=2, label={}]",
                    dot_id(&format!("{} B", a.costs.bytes[v.index()].unwrap_or(0)))
                )
            } else {
                String::new()
            };
            writeln!(out, "  {} -> {}{style};", dot_id(&g.node(p).name), dot_id(&node.name))?;
        }
    }
    writeln!(out, "}}")
}

/// The self-contained page, from the analysis and the report already built from it (on a
/// large graph the report holds a row per node: building it twice cost as much memory again).
pub fn render_html(a: &Analysis, r: &AnalyzeReport, out: &mut dyn Write) -> std::io::Result<()> {
    let s = &r.summary;
    let parts = &r.partitions;
    let lane_w = 1000.0f64;
    let total_nodes: usize = parts.iter().map(|p| p.nodes.len()).sum::<usize>().max(1);
    let max_bytes = r.cut_points.iter().filter_map(|c| c.bytes).max().unwrap_or(1).max(1) as f64;
    let mut svg = String::new();
    let height = 190.0;
    svg.push_str(&format!(r#"<svg class="lanes" viewBox="0 0 {lane_w} {height}" role="img" aria-label="partitions along execution order">"#));
    svg.push_str(
        r#"<text x="4" y="40" class="lane-label">CPU</text><text x="4" y="150" class="lane-label">array</text>"#,
    );
    let mut x = 60.0;
    let usable = lane_w - 70.0;
    let mut centers = std::collections::BTreeMap::new();
    for p in parts {
        let w = (usable * p.nodes.len() as f64 / total_nodes as f64).max(14.0);
        let (y, cls) = if p.side == Side::Accel {
            (120.0, "accel")
        } else {
            (14.0, "cpu")
        };
        svg.push_str(&format!(
            r#"<g class="partition {cls}" data-id="{}"><rect x="{x:.1}" y="{y}" width="{:.1}" height="52" rx="6"><title>P{} {}: {} nodes, {} MACs, est. {:.1} µs</title></rect><text x="{:.1}" y="{:.0}">P{}</text></g>"#,
            p.id,
            (w - 4.0).max(10.0),
            p.id,
            if p.side == Side::Accel { "accelerator" } else { "CPU" },
            p.nodes.len(),
            p.macs,
            p.est_latency_us,
            x + 6.0,
            y + 31.0,
            p.id
        ));
        centers.insert(p.id, (x + w / 2.0, y));
        x += w;
    }
    for c in &r.cut_points {
        let width = 1.0 + 11.0 * (c.bytes.unwrap_or(0) as f64 / max_bytes);
        let from = c
            .from_partition
            .and_then(|p| centers.get(&p))
            .copied()
            .unwrap_or((40.0, 40.0));
        let to = c
            .to_partitions
            .first()
            .and_then(|p| centers.get(p))
            .copied()
            .unwrap_or((lane_w - 10.0, 40.0));
        let (y1, y2) = (
            if from.1 > 100.0 { 120.0 } else { 66.0 },
            if to.1 > 100.0 { 120.0 } else { 66.0 },
        );
        svg.push_str(&format!(
            r#"<line class="transfer" x1="{:.1}" y1="{y1}" x2="{:.1}" y2="{y2}" stroke-width="{width:.1}"><title>{}: {} bytes, {:.2} µs</title></line>"#,
            from.0,
            to.0,
            esc(&c.tensor),
            c.bytes.unwrap_or(0),
            c.transfer_us
        ));
    }
    svg.push_str("</svg>");
    // The array grid: columns × compute rows, tiles coloured by the partition that uses them.
    let t = &a.target.file.array;
    let mut grid = String::new();
    let (cols, rows) = (t.columns as usize, t.compute_rows as usize);
    let cell = 34.0;
    grid.push_str(&format!(
        r#"<svg class="array" viewBox="0 0 {:.0} {:.0}" role="img" aria-label="array columns and tiles">"#,
        cols as f64 * (cell + 6.0) + 10.0,
        (rows + 2) as f64 * (cell + 6.0) + 10.0
    ));
    let mut owner: Vec<Option<usize>> = vec![None; cols];
    let mut col = 0usize;
    for m in &a.array.mappings {
        for _ in 0..m.columns {
            if col < cols {
                owner[col] = Some(m.partition);
                col += 1;
            }
        }
    }
    for (c, own) in owner.iter().enumerate() {
        let x = 5.0 + c as f64 * (cell + 6.0);
        for row in 0..rows + 2 {
            let y = 5.0 + row as f64 * (cell + 6.0);
            let kind = if row == 0 {
                "io"
            } else if row == 1 {
                "buffer"
            } else {
                "compute"
            };
            let cls = match own {
                Some(p) => format!("tile {kind} used p{}", p % 6),
                None => format!("tile {kind} free"),
            };
            let title = match own {
                Some(p) => format!("column {c}, {kind} tile: partition P{p}"),
                None => format!("column {c}, {kind} tile: free"),
            };
            grid.push_str(&format!(r#"<rect class="{cls}" x="{x:.0}" y="{y:.0}" width="{cell}" height="{cell}" rx="4"><title>{title}</title></rect>"#));
        }
    }
    grid.push_str("</svg>");
    let mut rows_html = String::new();
    for p in parts {
        rows_html.push_str(&format!(
            "<tr><td>P{}</td><td>{}</td><td>{}</td><td>{}</td><td>{}</td><td>{}</td><td>{:.1}</td><td>{}</td></tr>",
            p.id,
            if p.side == Side::Accel { "accelerator" } else { "CPU" },
            p.nodes.len(),
            crate::report::grouped(p.macs),
            crate::report::grouped(p.weight_bytes),
            match (p.columns, p.tiles) {
                (Some(c), Some(t)) => format!("{c} / {t}"),
                _ => "–".into(),
            },
            p.est_latency_us,
            p.mapping
                .as_ref()
                .map(|m| format!("{:?}", m.bound).to_lowercase())
                .unwrap_or_else(|| "–".into())
        ));
    }
    let cov = s
        .coverage_macs
        .map(|c| format!("{:.1} %", c * 100.0))
        .unwrap_or_else(|| "unknown".into());
    write!(
        out,
        r##"<!DOCTYPE html>
<html lang="en"><head><meta charset="utf-8"><title>tilecut: {model}</title>
<style>
body {{ font: 14px/1.45 system-ui, sans-serif; margin: 24px auto; max-width: 1080px; color: #1d2330; background: #fbfaf7; }}
h1 {{ font-size: 20px; margin: 0 0 4px; }} .sub {{ color: #5b6170; margin: 0 0 18px; }}
.figures {{ display: grid; grid-template-columns: repeat(auto-fit, minmax(150px, 1fr)); gap: 10px; margin: 16px 0; }}
.figure {{ background: #fff; border: 1px solid #e3e0d8; border-radius: 8px; padding: 10px 12px; }}
.figure b {{ display: block; font-size: 20px; }}
svg {{ width: 100%; height: auto; background: #fff; border: 1px solid #e3e0d8; border-radius: 8px; }}
svg.array {{ max-width: 420px; }}
.partition rect {{ stroke: #1d2330; stroke-width: .6; }} .partition.cpu rect {{ fill: #d9d2f0; }} .partition.accel rect {{ fill: #a8dccd; }}
.partition text, .lane-label {{ font-size: 12px; fill: #1d2330; }}
.transfer {{ stroke: #d35400; stroke-opacity: .75; stroke-linecap: round; }}
.tile.free {{ fill: #eeeae1; }} .tile.io {{ stroke: #8a8576; stroke-dasharray: 3 2; }} .tile.buffer {{ stroke: #8a8576; }}
.used.p0 {{ fill: #2f7d6d; }} .used.p1 {{ fill: #3c8dbc; }} .used.p2 {{ fill: #c27c0e; }} .used.p3 {{ fill: #8e44ad; }} .used.p4 {{ fill: #b03a2e; }} .used.p5 {{ fill: #5d6d7e; }}
table {{ border-collapse: collapse; width: 100%; background: #fff; }} td, th {{ border-bottom: 1px solid #e3e0d8; padding: 5px 8px; text-align: left; }}
.note {{ color: #5b6170; font-style: italic; }}
</style></head>
<body>
<h1>{model}</h1><p class="sub">target {target} · {columns} columns · strategy min-cut</p>
<div class="figures">
<div class="figure">coverage by MACs<b>{cov}</b></div>
<div class="figure">coverage by nodes<b>{covn:.1} %</b></div>
<div class="figure">accelerator partitions<b>{parts_n}</b></div>
<div class="figure">boundary bytes / inference<b>{bytes}</b></div>
<div class="figure">est. latency<b>{lat}</b></div>
<div class="figure">CPU only (est.)<b>{cpu}</b></div>
<div class="figure">columns free<b>{free} of {budget}</b></div>
</div>
<h2>Execution order</h2>
{svg}
<h2>The array</h2>
{grid}
<h2>Partitions</h2>
<table><thead><tr><th>id</th><th>side</th><th>nodes</th><th>MACs</th><th>weight bytes</th><th>columns / tiles</th><th>est. µs</th><th>bound</th></tr></thead><tbody>{rows_html}</tbody></table>
<p class="note">{note}</p>
<script>
(function () {{
  var n = document.querySelectorAll("g.partition").length;
  document.body.setAttribute("data-partitions", String(n));
  document.body.setAttribute("data-ok", "1");
}})();
</script>
</body></html>
"##,
        model = esc(&r.model.path),
        target = esc(&r.target.name),
        columns = r.target.columns,
        cov = cov,
        covn = s.coverage_nodes * 100.0,
        parts_n = s.accel_partitions,
        bytes = crate::report::grouped(s.boundary_bytes),
        lat = s
            .est_latency_us
            .map_or_else(|| "unknown (fix dims)".to_string(), |v| format!("{v:.1} µs")),
        cpu = s
            .cpu_only_latency_us
            .map_or_else(|| "unknown (fix dims)".to_string(), |v| format!("{v:.1} µs")),
        free = s.columns_free,
        budget = s.columns_budget,
        svg = svg,
        grid = grid,
        rows_html = rows_html,
        note = esc(&match super::analyze::unknown_cost_note(s) {
            Some(n) => format!("{} Coverage by nodes: {n}.", r.estimate_note),
            None => r.estimate_note.to_string(),
        }),
    )
}
