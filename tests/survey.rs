//! What-if analysis (`analyze`/`check` with `--assume-*`) and `tilecut survey`.
//!
//! The central check is two independent paths to one number: lifting a blocker in the survey
//! (which re-judges only the affected nodes and re-runs only the later stages) must give
//! exactly the figures of a plain `analyze` with a profile that really supports the op, or
//! with the dims really fixed — a profile and a run written out by hand, not derived.

mod common;

use std::path::{Path, PathBuf};

use common::*;
use serde_json::Value;

fn sample(name: &str) -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join("sample-models").join(name)
}

fn s(p: &Path) -> &str {
    p.to_str().expect("utf8 path")
}

fn json(args: &[&str]) -> Value {
    let (code, out, err) = run(args);
    assert_eq!(code, 0, "{args:?}: {err}");
    serde_json::from_str(&out).unwrap_or_else(|e| panic!("{args:?}: {e}\n{out}"))
}

/// The figures the survey reports, picked from an analyze summary.
fn figures(summary: &Value) -> Value {
    let keys = [
        "accel_macs",
        "coverage_macs",
        "coverage_nodes",
        "accel_partitions",
        "transfers",
        "boundary_bytes",
        "est_latency_us",
    ];
    let mut out = serde_json::Map::new();
    for k in keys {
        out.insert(k.to_string(), summary[k].clone());
    }
    Value::Object(out)
}

fn lift<'a>(survey: &'a Value, model: usize, blocker: &str) -> &'a Value {
    survey["models"][model]["lifts"]
        .as_array()
        .expect("lifts")
        .iter()
        .find(|l| l["blocker"] == blocker)
        .unwrap_or_else(|| panic!("no lift {blocker} in {}", survey["models"][model]))
}

/// The compact-array profile plus a hand-written Softmax rule for its integer types.
fn profile_with_softmax(dir: &Path) -> PathBuf {
    let (code, base, err) = run(&["targets", "show", "compact-array"]);
    assert_eq!(code, 0, "{err}");
    let p = dir.join("with-softmax.toml");
    std::fs::write(
        &p,
        format!(
            "{base}\n[[rule]]\nid = \"softmax-int\"\nwhy = \"test: this profile runs Softmax\"\nops = [\"Softmax\"]\n\
             types = [{{ act = \"int8\", out = \"int8\" }}, {{ act = \"uint8\", out = \"uint8\" }}, {{ act = \"int16\", out = \"int16\" }}]\n"
        ),
    )
    .expect("write profile");
    p
}

#[test]
fn lifting_the_only_blocker_equals_a_profile_that_supports_the_op() {
    let d = tempfile::tempdir().expect("tmp");
    let model = sample("fruit_grader_qdq_int8.onnx");
    // On compact-array this model's only blocker is Softmax (no rule for it).
    let survey = json(&["survey", s(&model), "--format", "json"]);
    let ranking = survey["ranking"].as_array().expect("ranking");
    assert_eq!(ranking.len(), 1, "only one blocker expected: {ranking:?}");
    assert_eq!(ranking[0]["blocker"], "op:Softmax");
    let lifted = &lift(&survey, 0, "op:Softmax")["figures"];

    let profile = profile_with_softmax(d.path());
    let supported = json(&["analyze", s(&model), "--target", s(&profile), "--format", "json"]);
    assert_eq!(lifted, &figures(&supported["summary"]), "survey lift vs real profile");
    // A third path: the what-if of `analyze` itself.
    let what_if = json(&[
        "analyze",
        s(&model),
        "--assume-supported",
        "Softmax",
        "--format",
        "json",
    ]);
    assert_eq!(lifted, &figures(&what_if["what_if"]["summary"]));
    assert_eq!(&figures(&what_if["summary"]), &survey["models"][0]["figures"]);
    // And the lift actually changed something: Softmax now runs on the array.
    assert!(lifted["coverage_nodes"].as_f64() > survey["models"][0]["figures"]["coverage_nodes"].as_f64());
    assert!(what_if["what_if"]["moved_to_accel"]
        .as_array()
        .expect("moved")
        .iter()
        .any(|n| n == "softmax_37"));
}

#[test]
fn lifting_dims_equals_analyzing_with_the_dims_fixed() {
    let model = sample("command_word_encoder_f32.onnx");
    for target in ["compact-array", "wide-array"] {
        let survey = json(&[
            "survey",
            s(&model),
            "--target",
            target,
            "--lift-dim",
            "frames=98",
            "--format",
            "json",
        ]);
        let base = ["analyze", s(&model), "--target", target];
        let dims = ["--dim", "batch=1", "--dim", "frames=98"];
        let fixed = json(&[&base[..], &dims, &["--format", "json"]].concat());
        assert_eq!(
            &lift(&survey, 0, "dim:*")["figures"],
            &figures(&fixed["summary"]),
            "{target}: dim:* vs --dim batch=1 --dim frames=98"
        );
        let one = json(&[
            "analyze",
            s(&model),
            "--target",
            target,
            "--dim",
            "frames=98",
            "--format",
            "json",
        ]);
        assert_eq!(&lift(&survey, 0, "dim:frames")["figures"], &figures(&one["summary"]));
        // The real figures are unknown (symbolic dims), and say which dims to fix.
        let real = json(&["analyze", s(&model), "--target", target, "--format", "json"]);
        assert!(real["summary"]["est_latency_us"].is_null());
        assert_eq!(real["summary"]["needs_dims"], serde_json::json!(["batch", "frames"]));
        assert_eq!(real["summary"]["needs_inputs"], serde_json::json!([]));
        assert!(fixed["summary"]["est_latency_us"].is_number());
        // The table says the node coverage comes from a cut that could not weigh those nodes.
        let (c, table, err) = run(&base);
        assert_eq!(c, 0, "{err}");
        let row = table.lines().find(|l| l.contains("coverage by nodes")).expect("row");
        assert!(
            row.contains("nodes of unknown cost: fix --dim batch=N --dim frames=N for a real plan"),
            "{row}"
        );
        let (_, table, _) = run(&[&base[..], &dims].concat());
        assert!(!table.contains("unknown cost"), "{table}");
    }
}

#[test]
fn quantization_and_waiver_lifts_equal_the_analyze_what_ifs() {
    for (model, blocker, flags) in [
        (
            "fruit_grader_f32.onnx",
            "quant:float-on-cpu",
            &["--assume-quantized"][..],
        ),
        (
            "fruit_grader_qdq_asymmetric_u8.onnx",
            "quant:weight-asymmetric",
            &["--assume-waived", "weight-asymmetric"][..],
        ),
        (
            "fruit_grader_qdq_int4_blocked.onnx",
            "quant:weight-blocked",
            &["--assume-waived", "weight-blocked"][..],
        ),
    ] {
        let path = sample(model);
        let survey = json(&["survey", s(&path), "--format", "json"]);
        let mut args = vec!["analyze", s(&path), "--format", "json"];
        args.extend_from_slice(flags);
        let a = json(&args);
        assert_eq!(
            &lift(&survey, 0, blocker)["figures"],
            &figures(&a["what_if"]["summary"]),
            "{model} {blocker}"
        );
        assert_eq!(lift(&survey, 0, blocker)["how"], flags.join(" "));
    }
    // Waiving asymmetric weights moves the whole backbone onto the array: the grader's five
    // weighted layers (4 Conv + 1 Gemm) carry every MAC of the model.
    let a = json(&[
        "analyze",
        s(&sample("fruit_grader_qdq_asymmetric_u8.onnx")),
        "--assume-waived",
        "weight-asymmetric",
        "--format",
        "json",
    ]);
    assert_eq!(a["summary"]["coverage_macs"], 0.0);
    assert_eq!(a["what_if"]["summary"]["coverage_macs"], 1.0);
    assert!(a["what_if"]["delta"]["est_latency_us"].as_f64().expect("delta") < 0.0);
}

#[test]
fn assumed_quantization_judges_float_ops_as_their_rules_first_integer_signature() {
    let r = json(&[
        "analyze",
        s(&sample("fruit_grader_f32.onnx")),
        "--assume-quantized",
        "--strategy",
        "greedy",
        "--format",
        "json",
    ]);
    // compact-array's conv rule lists int8 × int8 → int8 first.
    let explain = run(&[
        "explain",
        s(&sample("fruit_grader_f32.onnx")),
        "conv_4",
        "--target",
        "compact-array",
    ]);
    assert!(explain.1.contains("float-on-cpu"), "real verdict: {}", explain.1);
    let moved = r["what_if"]["moved_to_accel"].as_array().expect("moved");
    assert!(moved.iter().any(|n| n == "conv_4"), "{moved:?}");
    // Softmax has no rule on compact-array, so assuming quantization does not move it.
    assert!(!moved.iter().any(|n| n == "softmax_37"));
    // A quantized model moves int8 tensors across the boundary: the image 1×3×64×64 = 12,288
    // int8 bytes in, the logits 1×5 = 5 int8 bytes out to the CPU's Softmax: 12,293 bytes,
    // which is also what the really quantized sample moves (tests/check.rs).
    assert_eq!(r["what_if"]["summary"]["boundary_bytes"], 12_293);
    assert_eq!(
        r["summary"]["coverage_macs"], 0.0,
        "really, the float model's compute stays on the CPU"
    );
    assert_eq!(r["what_if"]["summary"]["coverage_macs"], 1.0);
}

#[test]
fn check_evaluates_the_policy_under_the_assumptions_and_keeps_the_real_figures() {
    let d = tempfile::tempdir().expect("tmp");
    let policy = d.path().join("p.toml");
    std::fs::write(&policy, "version = 1\n[defaults]\nmin_coverage_nodes = 0.95\n").expect("write");
    let model = sample("fruit_grader_qdq_int8.onnx");
    // Real: 88.6 % of nodes on the array, below 95 %.
    let (code, _, _) = run(&["check", s(&model), "--policy", s(&policy)]);
    assert_eq!(code, 1);
    // Supporting Softmax would put 97.7 % there.
    let (code, out, err) = run(&[
        "check",
        s(&model),
        "--policy",
        s(&policy),
        "--assume-supported",
        "Softmax",
        "--format",
        "json",
    ]);
    assert_eq!(code, 0, "{out}{err}");
    let r: Value = serde_json::from_str(&out).expect("json");
    assert_eq!(r["assumptions"], serde_json::json!(["assume-supported Softmax"]));
    let o = &r["outcomes"][0];
    assert_eq!(o["passed"], true);
    assert_eq!(o["real"]["passed"], false);
    let (_, table, _) = run(&[
        "check",
        s(&model),
        "--policy",
        s(&policy),
        "--assume-supported",
        "Softmax",
    ]);
    assert!(table.contains("what-if") && table.contains("real: FAIL"), "{table}");
}

fn copy_sample(dir: &Path, name: &str) {
    std::fs::copy(sample(name), dir.join(name)).expect("copy");
}

#[test]
fn bad_files_are_listed_and_never_stop_the_survey() {
    let d = tempfile::tempdir().expect("tmp");
    let nested = d.path().join("more");
    std::fs::create_dir(&nested).expect("mkdir");
    copy_sample(d.path(), "fruit_grader_qdq_int8.onnx");
    copy_sample(&nested, "parcel_label_detector_qdq.onnx");
    let good = std::fs::read(sample("fruit_grader_f32.onnx")).expect("read");
    std::fs::write(d.path().join("corrupt.onnx"), &good[..good.len() / 3]).expect("write");
    std::fs::write(d.path().join("empty.onnx"), b"").expect("write");
    std::fs::write(nested.join("labels.onnx"), "apple\npear\nplum\n").expect("write");
    std::fs::write(d.path().join("readme.txt"), "not a model, not surveyed").expect("write");
    let (code, out, err) = run(&["survey", s(d.path()), "--format", "json"]);
    assert_eq!(code, 0, "{err}");
    let r: Value = serde_json::from_str(&out).expect("json");
    assert_eq!(r["models"].as_array().expect("models").len(), 2);
    let failures = r["failures"].as_array().expect("failures");
    let names: Vec<&str> = failures.iter().map(|f| f["path"].as_str().expect("path")).collect();
    assert_eq!(names.len(), 3, "{failures:?}");
    for n in ["corrupt.onnx", "empty.onnx", "labels.onnx"] {
        assert!(names.iter().any(|p| p.ends_with(n)), "{n} missing from {names:?}");
    }
    assert!(failures.iter().all(|f| !f["error"].as_str().expect("e").is_empty()));
    // Warnings on stderr name each failed file, one line each.
    assert_eq!(
        err.lines().filter(|l| l.contains("could not survey")).count(),
        3,
        "{err}"
    );
    let (code, _, _) = run(&["survey", s(d.path()), "--strict", "--quiet"]);
    assert_eq!(code, 1);
    let (_, _, quiet_err) = run(&["survey", s(d.path()), "--quiet"]);
    assert!(quiet_err.is_empty(), "--quiet keeps stderr empty: {quiet_err}");
    // No partial output, no change to the inputs.
    assert_eq!(
        std::fs::read(d.path().join("corrupt.onnx")).expect("r").len(),
        good.len() / 3
    );
}

#[test]
fn the_ranking_is_deterministic_and_ties_fall_by_name() {
    let dir = Path::new(env!("CARGO_MANIFEST_DIR")).join("sample-models");
    let one = run(&["survey", s(&dir), "--format", "json", "--jobs", "1"]);
    let many = run(&["survey", s(&dir), "--format", "json", "--jobs", "4"]);
    assert_eq!(one.0, 0, "{}", one.2);
    assert_eq!(one.1, many.1, "same bytes whatever the number of workers");
    let r: Value = serde_json::from_str(&one.1).expect("json");
    let rows = r["ranking"].as_array().expect("ranking");
    assert!(rows.len() >= 5, "{rows:?}");
    for (k, w) in rows.windows(2).enumerate() {
        let key = |x: &Value| {
            (
                -x["latency_saved_us"].as_f64().expect("f"),
                -x["macs_moved"].as_i64().expect("i"),
                -x["models_helped"].as_i64().expect("i"),
                x["blocker"].as_str().expect("s").to_string(),
            )
        };
        let (a, b) = (key(&w[0]), key(&w[1]));
        assert!(a.partial_cmp(&b).expect("comparable").is_le(), "{a:?} before {b:?}");
        assert_eq!(w[0]["rank"], k + 1);
    }
    // The summed gains are the sums of the per-model gains.
    for row in rows {
        let total: i64 = r["models"]
            .as_array()
            .expect("models")
            .iter()
            .flat_map(|m| m["lifts"].as_array().expect("lifts").iter())
            .filter(|l| l["blocker"] == row["blocker"])
            .map(|l| l["gain"]["macs_moved"].as_i64().expect("i"))
            .sum();
        assert_eq!(row["macs_moved"], total, "{}", row["blocker"]);
    }
}

#[test]
fn csv_and_markdown_carry_the_ranking() {
    let dir = Path::new(env!("CARGO_MANIFEST_DIR")).join("sample-models");
    let j = json(&["survey", s(&dir), "--format", "json"]);
    let (code, csv, _) = run(&["survey", s(&dir), "--format", "csv"]);
    assert_eq!(code, 0);
    let lines: Vec<&str> = csv.lines().collect();
    let ranking = j["ranking"].as_array().expect("ranking");
    assert_eq!(lines.len(), ranking.len() + 1);
    let header: Vec<&str> = lines[0].split(',').collect();
    assert_eq!(header.len(), 14);
    for (line, row) in lines[1..].iter().zip(ranking) {
        // No field here needs quoting except `how`, which has no comma; split is exact.
        let f: Vec<&str> = line.split(',').collect();
        assert_eq!(f.len(), header.len(), "{line}");
        assert_eq!(f[1], row["blocker"].as_str().expect("s"));
        assert_eq!(f[8], row["macs_moved"].to_string());
    }
    let (_, md, _) = run(&["survey", s(&dir), "--format", "markdown"]);
    for row in ranking {
        assert!(md.contains(&format!("`{}`", row["blocker"].as_str().expect("s"))));
    }
}

#[test]
fn bad_survey_and_what_if_arguments_fail_cleanly() {
    let d = tempfile::tempdir().expect("tmp");
    let model = sample("fruit_grader_qdq_int8.onnx");
    let missing = d.path().join("nowhere");
    assert_fails_cleanly(&["survey", s(&missing)], "nowhere");
    assert_fails_cleanly(&["survey", s(d.path())], "no .onnx files");
    assert_fails_cleanly(&["survey", s(&model), "--jobs", "0"], "--jobs");
    assert_fails_cleanly(&["survey", s(&model), "--lift-dim", "frames=many"], "--lift-dim");
    assert_fails_cleanly(&["survey", s(&model), "--lift-dim", "frames=0"], "at least 1");
    assert_fails_cleanly(&["survey", s(&model), "--target", "no-such-array"], "no-such-array");
    assert_fails_cleanly(&["analyze", s(&model), "--assume-waived", "no-rule"], "no-rule");
    assert_fails_cleanly(&["analyze", s(&model), "--assume-supported", "Soft max"], "Soft max");
    assert_fails_cleanly(
        &["check", s(&model), "--policy", s(&missing), "--assume-quantized"],
        "nowhere",
    );
}
