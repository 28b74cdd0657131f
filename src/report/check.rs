//! `tilecut check` outputs: the result table, JSON, a Markdown summary, JUnit XML (one test
//! case per model × rule) and SARIF 2.1.0 (one result per violation).

use std::io::Write;

use serde::Serialize;
use serde_json::json;

use crate::policy::Outcome;

pub const CHECK_SCHEMA_VERSION: u32 = 1;

/// A model that could not be analyzed: never reported as passing.
#[derive(Serialize, Debug, Clone)]
pub struct Failure {
    pub model: String,
    pub error: String,
}

#[derive(Serialize, Debug, Clone)]
pub struct CheckReport {
    pub schema_version: u32,
    pub policy: String,
    /// What-if assumptions the outcomes were evaluated under (empty: the real figures).
    pub assumptions: Vec<String>,
    pub outcomes: Vec<Outcome>,
    pub failures: Vec<Failure>,
    pub passed: bool,
}

impl CheckReport {
    /// 2 if any model could not be analyzed, else 1 if any rule failed, else 0.
    pub fn exit_code(&self) -> u8 {
        if !self.failures.is_empty() {
            2
        } else if self.outcomes.iter().any(|o| !o.passed) {
            1
        } else {
            0
        }
    }
}

pub fn render_json(r: &CheckReport, out: &mut dyn Write) -> std::io::Result<()> {
    super::write_json(r, out)
}

fn source(o: &Outcome) -> &'static str {
    match o.source {
        Some(crate::policy::Source::Defaults) => "policy defaults",
        Some(crate::policy::Source::Model) => "policy [[model]]",
        Some(crate::policy::Source::CommandLine) => "command line",
        None => "policy regression",
    }
}

/// "; real: pass 12.3 %" for outcomes evaluated under assumptions.
fn real_note(o: &Outcome) -> String {
    o.real
        .as_ref()
        .map(|r| format!("; real: {} {}", if r.passed { "pass" } else { "FAIL" }, r.measured))
        .unwrap_or_default()
}

pub fn render_table(r: &CheckReport, out: &mut dyn Write, paint: super::term::Paint) -> std::io::Result<()> {
    use super::term::Tone;
    if !r.assumptions.is_empty() {
        writeln!(out, "what-if: evaluated under {}", r.assumptions.join(", "))?;
    }
    for o in &r.outcomes {
        writeln!(
            out,
            "{} {} {}: {} (limit {}, from {}{})",
            if o.passed {
                paint.paint(Tone::Good, "pass")
            } else {
                paint.paint(Tone::Bad, "FAIL")
            },
            o.model,
            o.rule,
            o.message,
            o.limit,
            source(o),
            real_note(o)
        )?;
    }
    for f in &r.failures {
        writeln!(out, "{} {}: {}", paint.paint(Tone::Bad, "ERROR"), f.model, f.error)?;
    }
    let failed = r.outcomes.iter().filter(|o| !o.passed).count();
    writeln!(
        out,
        "{} checks, {failed} failed, {} models not analyzed",
        r.outcomes.len(),
        r.failures.len()
    )
}

/// A Markdown summary for CI job summaries; appended, so several runs can share a file.
pub fn render_markdown(r: &CheckReport, out: &mut dyn Write) -> std::io::Result<()> {
    let failed = r.outcomes.iter().filter(|o| !o.passed).count();
    let verdict = if r.exit_code() == 0 { "passed" } else { "FAILED" };
    writeln!(out, "### tilecut coverage check {verdict}\n")?;
    writeln!(
        out,
        "{} checks, {failed} failed, {} models not analyzed (policy `{}`).\n",
        r.outcomes.len(),
        r.failures.len(),
        r.policy
    )?;
    if !r.assumptions.is_empty() {
        writeln!(
            out,
            "What-if: measured under {}; the real figure is in the last column.\n",
            r.assumptions.join(", ")
        )?;
        writeln!(
            out,
            "| | model | rule | measured | limit | from | real |\n|---|---|---|---|---|---|---|"
        )?;
    } else {
        writeln!(
            out,
            "| | model | rule | measured | limit | from |\n|---|---|---|---|---|---|"
        )?;
    }
    for o in &r.outcomes {
        let real = o
            .real
            .as_ref()
            .map(|x| format!(" {} {} |", if x.passed { "✅" } else { "❌" }, x.measured))
            .unwrap_or_default();
        writeln!(
            out,
            "| {} | `{}` | `{}` | {} | {} | {} |{real}",
            if o.passed { "✅" } else { "❌" },
            o.model,
            o.rule,
            o.measured,
            o.limit,
            source(o)
        )?;
    }
    for f in &r.failures {
        writeln!(
            out,
            "| ⚠️ | `{}` | could not analyze | {} | | |",
            f.model,
            f.error.replace('|', "\\|")
        )?;
    }
    writeln!(out)
}

fn xml(s: &str) -> String {
    s.replace('&', "&amp;")
        .replace('<', "&lt;")
        .replace('>', "&gt;")
        .replace('"', "&quot;")
        .replace('\'', "&apos;")
}

/// JUnit XML: one test suite, one test case per model × rule; unanalyzable models are errors.
pub fn render_junit(r: &CheckReport, out: &mut dyn Write) -> std::io::Result<()> {
    let failures = r.outcomes.iter().filter(|o| !o.passed).count();
    writeln!(out, r#"<?xml version="1.0" encoding="UTF-8"?>"#)?;
    writeln!(
        out,
        r#"<testsuites name="tilecut" tests="{}" failures="{failures}" errors="{}">"#,
        r.outcomes.len() + r.failures.len(),
        r.failures.len()
    )?;
    writeln!(
        out,
        r#"  <testsuite name="tilecut check" tests="{}" failures="{failures}" errors="{}">"#,
        r.outcomes.len() + r.failures.len(),
        r.failures.len()
    )?;
    for o in &r.outcomes {
        write!(
            out,
            r#"    <testcase classname="{}" name="{}""#,
            xml(&o.model),
            xml(&o.rule)
        )?;
        if o.passed {
            writeln!(out, "/>")?;
        } else {
            writeln!(out, ">")?;
            writeln!(
                out,
                r#"      <failure message="{}">{}</failure>"#,
                xml(&o.message),
                xml(&format!(
                    "measured {}, limit {}, from {}",
                    o.measured,
                    o.limit,
                    source(o)
                ))
            )?;
            writeln!(out, "    </testcase>")?;
        }
    }
    for f in &r.failures {
        writeln!(out, r#"    <testcase classname="{}" name="analyze">"#, xml(&f.model))?;
        writeln!(out, r#"      <error message="{}"/>"#, xml(&f.error))?;
        writeln!(out, "    </testcase>")?;
    }
    writeln!(out, "  </testsuite>\n</testsuites>")
}

/// SARIF 2.1.0 (OASIS): one result per violation; the model file is the artifact location,
/// the node the logical location; rule ids are tilecut's rule and reason codes.
pub fn render_sarif(r: &CheckReport, out: &mut dyn Write) -> std::io::Result<()> {
    let mut rule_ids: Vec<String> = r
        .outcomes
        .iter()
        .filter(|o| !o.passed)
        .map(|o| o.rule.clone())
        .collect();
    if !r.failures.is_empty() {
        rule_ids.push("analysis-failed".into());
    }
    rule_ids.sort();
    rule_ids.dedup();
    let rules: Vec<serde_json::Value> = rule_ids
        .iter()
        .map(|id| json!({"id": id, "shortDescription": {"text": format!("tilecut coverage rule {id}")}}))
        .collect();
    let mut results = Vec::new();
    for o in r.outcomes.iter().filter(|o| !o.passed) {
        let nodes: Vec<&String> = if o.nodes.is_empty() {
            vec![]
        } else {
            o.nodes.iter().collect()
        };
        let mut location = json!({"physicalLocation": {"artifactLocation": {"uri": o.model}}});
        if !nodes.is_empty() {
            location["logicalLocations"] =
                serde_json::Value::Array(nodes.iter().map(|n| json!({"name": n, "kind": "element"})).collect());
        }
        results.push(json!({
            "ruleId": o.rule,
            "level": "error",
            "message": {"text": o.message},
            "locations": [location],
        }));
    }
    for f in &r.failures {
        results.push(json!({
            "ruleId": "analysis-failed",
            "level": "error",
            "message": {"text": f.error},
            "locations": [{"physicalLocation": {"artifactLocation": {"uri": f.model}}}],
        }));
    }
    let doc = json!({
        "version": "2.1.0",
        "$schema": "https://docs.oasis-open.org/sarif/sarif/v2.1.0/errata01/os/schemas/sarif-schema-2.1.0.json",
        "runs": [{
            "tool": {"driver": {"name": "tilecut", "version": env!("CARGO_PKG_VERSION"), "rules": rules}},
            "results": results,
        }],
    });
    super::write_json(&doc, out)
}
