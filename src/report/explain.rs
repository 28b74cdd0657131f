//! `tilecut explain`: one node's verdict in full.

use std::io::Write;

use crate::ir::{NodeId, ValueId};
use crate::Analysis;

/// Finds a node by name, or the producer of a tensor of that name.
pub fn find(a: &Analysis, name: &str) -> Option<NodeId> {
    let g = &a.read.model.graph;
    g.node_ids().find(|&i| g.node(i).name == name).or_else(|| {
        g.values
            .iter()
            .position(|v| v.name == name)
            .and_then(|i| g.value(ValueId::new(i)).producer)
    })
}

pub fn render(a: &Analysis, id: NodeId, out: &mut dyn Write) -> std::io::Result<()> {
    let g = &a.read.model.graph;
    let n = g.node(id);
    let v = &a.verdicts[id.index()];
    let side = a.plan.side[id.index()];
    writeln!(out, "node       {}", n.name)?;
    writeln!(out, "op         {}", n.op_label())?;
    writeln!(
        out,
        "verdict    {:?} (placed: {:?}{})",
        v.candidate,
        side,
        a.plan.partition_of[id.index()]
            .map(|p| format!(", partition P{p}"))
            .unwrap_or_default()
    )?;
    writeln!(out, "types      {}", v.signature)?;
    if !v.bundle.is_empty() {
        writeln!(out, "bundle     {}", v.bundle.join(", "))?;
    }
    for (label, slots) in [("input ", &n.inputs), ("output", &n.outputs)] {
        for s in slots.iter().flatten() {
            let val = g.value(*s);
            writeln!(
                out,
                "{label}     {} : {} {} ({})",
                val.name,
                val.fact.dtype.map(|d| d.name()).unwrap_or("?"),
                val.fact.shape,
                val.kind.as_str()
            )?;
        }
    }
    writeln!(out, "MACs       {}", crate::report::maybe(g.cost(id).macs))?;
    writeln!(out, "cpu        {:.3} µs", a.costs.cpu_ps[id.index()] as f64 / 1e6)?;
    match a.costs.accel_ps[id.index()] {
        Some(t) => writeln!(out, "accel      {:.3} µs (estimate)", t as f64 / 1e6)?,
        None => writeln!(out, "accel      cannot run there")?,
    }
    let consulted: Vec<&str> = a
        .target
        .file
        .rules
        .iter()
        .filter(|r| r.ops.iter().any(|o| o == &n.op_type))
        .map(|r| r.id.as_str())
        .chain(
            a.target
                .file
                .movement
                .iter()
                .filter(|m| m.ops.iter().any(|o| o == &n.op_type))
                .map(|m| m.id.as_str()),
        )
        .collect();
    writeln!(
        out,
        "rules      {} (target {})",
        if consulted.is_empty() {
            "none for this op".to_string()
        } else {
            consulted.join(", ")
        },
        a.target.name()
    )?;
    if let Some(r) = &v.rule {
        writeln!(out, "decided by {r}")?;
    }
    for r in &v.reasons {
        writeln!(
            out,
            "  [{}] {}{}",
            r.code,
            r.message,
            if r.blocking { "" } else { " (note)" }
        )?;
    }
    Ok(())
}
