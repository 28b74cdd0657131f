//! `tilecut split` and `tilecut verify`: every sample split and proven equivalent by a
//! general-purpose engine (tract-onnx, or the `onnx` package's reference evaluator where tract
//! lacks the ops or types), conformance models likewise, pieces valid per `onnx.checker`,
//! manifest wiring, external data, `--cut-at`, and the fault cases.

mod common;

use std::path::{Path, PathBuf};

use common::*;

fn sample(name: &str) -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join("sample-models").join(name)
}

const DIMS: [&str; 4] = ["--dim", "batch=1", "--dim", "frames=20"];

/// Splits `model` into `out` and verifies it; returns the engine that verified it, if any.
fn split_and_verify(model: &Path, out: &Path, extra: &[&str], python: bool) -> Option<&'static str> {
    let m = model.to_str().expect("utf8");
    let o = out.to_str().expect("utf8");
    let mut args = vec!["split", m, "--out", o, "--force"];
    args.extend_from_slice(&DIMS);
    args.extend_from_slice(extra);
    let (c, _, err) = run(&args);
    assert_eq!(c, 0, "split {m}: {err}");
    check_wiring(out);
    let mut v = vec!["verify", m, o];
    v.extend_from_slice(&DIMS);
    let (c, out_t, err_t) = run(&v);
    match c {
        0 => return Some("tract-onnx"),
        1 => panic!("{m}: pieces differ from the original (tract): {out_t}"),
        _ => assert!(
            err_t.contains("could not run") || err_t.contains("not supported") || err_t.contains("panicked"),
            "{m}: {err_t}"
        ),
    }
    if !python {
        return None;
    }
    v.extend_from_slice(&["--engine", "python-reference"]);
    let (c, out_p, err_p) = run(&v);
    match c {
        0 => Some("onnx reference evaluator"),
        1 => panic!("{m}: pieces differ from the original (reference evaluator): {out_p}"),
        _ => {
            println!(
                "{m}: no engine runs it (tract: {}; reference: {})",
                err_t.trim(),
                err_p.trim()
            );
            None
        }
    }
}

/// Every piece input is an original graph input or an output of an earlier piece.
fn check_wiring(dir: &Path) {
    let m: serde_json::Value =
        serde_json::from_str(&std::fs::read_to_string(dir.join("manifest.json")).expect("manifest")).expect("json");
    let mut available: std::collections::BTreeSet<String> = m["graph_inputs"]
        .as_array()
        .expect("inputs")
        .iter()
        .map(|s| s.as_str().unwrap_or("").to_string())
        .collect();
    for p in m["pieces"].as_array().expect("pieces") {
        assert!(dir.join(p["file"].as_str().expect("file")).exists());
        for i in p["inputs"].as_array().expect("inputs") {
            let name = i.as_str().expect("name");
            assert!(
                available.contains(name),
                "piece {} reads `{name}` before any piece produces it",
                p["id"]
            );
        }
        for o in p["outputs"].as_array().expect("outputs") {
            available.insert(o.as_str().expect("name").to_string());
        }
    }
    for o in m["graph_outputs"].as_array().expect("outputs") {
        assert!(
            available.contains(o.as_str().expect("name")),
            "graph output {o} is produced by no piece"
        );
    }
}

#[test]
fn every_sample_splits_and_verifies() {
    let python = python_onnx("every_sample_splits_and_verifies");
    let d = tempfile::tempdir().expect("tmp");
    let mut lines = Vec::new();
    for (name, _) in tilecut::samples::all().expect("samples") {
        for strategy in ["mincut", "greedy"] {
            let out = d.path().join(format!("{name}-{strategy}"));
            let engine = split_and_verify(&sample(name), &out, &["--strategy", strategy], python);
            if python {
                assert!(engine.is_some(), "{name} ({strategy}): no engine verified it");
            }
            lines.push(format!(
                "{name} ({strategy}): verified by {}",
                engine.unwrap_or("none (python onnx missing)")
            ));
        }
    }
    for l in &lines {
        println!("{l}");
    }
}

#[test]
fn pieces_pass_the_onnx_full_check() {
    if !python_onnx("pieces_pass_the_onnx_full_check") {
        return;
    }
    let d = tempfile::tempdir().expect("tmp");
    for name in [
        "parcel_label_detector_qdq.onnx",
        "fruit_grader_qdq_int8.onnx",
        "night_mode_switch_if.onnx",
        "vibration_monitor_a16w8.onnx",
    ] {
        let out = d.path().join(name);
        let mut args: Vec<String> = vec![
            "split".into(),
            sample(name).to_str().expect("utf8").to_string(),
            "--out".into(),
            out.to_str().expect("utf8").into(),
            "--strategy".into(),
            "greedy".into(),
        ];
        args.extend(DIMS.iter().map(|s| s.to_string()));
        let refs: Vec<&str> = args.iter().map(|s| s.as_str()).collect();
        assert_eq!(run(&refs).0, 0);
        let out = python(
            "import sys, glob, onnx\nfor p in sorted(glob.glob(sys.argv[1] + '/*.onnx')):\n    onnx.checker.check_model(onnx.load(p), full_check=True)\n    print('ok', p)",
            &[out.to_str().expect("utf8")],
        );
        assert!(out.lines().count() >= 1, "{name}: {out}");
    }
}

#[test]
fn conformance_models_split_and_verify() {
    let dir = Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/onnx-node");
    let mut files: Vec<PathBuf> = std::fs::read_dir(&dir)
        .expect("dir")
        .map(|e| e.expect("e").path())
        .filter(|p| p.extension().is_some_and(|e| e == "onnx"))
        .collect();
    files.sort();
    let d = tempfile::tempdir().expect("tmp");
    let (mut verified, mut skipped) = (0, 0);
    // Every fourth model keeps the test quick; greedy offload makes multi-piece splits.
    for f in files.iter().step_by(4) {
        let Ok(a) = tilecut::read_model(f, &Default::default()) else {
            continue;
        };
        if a.model
            .graph
            .inputs
            .iter()
            .any(|i| !a.model.graph.value(*i).fact.shape.is_concrete())
        {
            skipped += 1;
            continue;
        }
        let out = d.path().join("p");
        let (c, _, _) = run(&[
            "split",
            f.to_str().expect("utf8"),
            "--out",
            out.to_str().expect("utf8"),
            "--force",
            "--strategy",
            "greedy",
            "--target",
            "wide-array",
        ]);
        if c != 0 {
            skipped += 1;
            continue;
        }
        check_wiring(&out);
        let (c, o, e) = run(&["verify", f.to_str().expect("utf8"), out.to_str().expect("utf8")]);
        match c {
            0 => verified += 1,
            1 => panic!("{}: pieces differ from the original: {o}", f.display()),
            _ => {
                let _ = e;
                skipped += 1;
            }
        }
    }
    println!("conformance split + verify: {verified} models verified by tract-onnx, {skipped} not runnable or not splittable");
    assert!(verified >= 150, "only {verified} verified");
}

#[test]
fn external_data_pieces_stay_inside_the_output_folder() {
    use tilecut::ir::DType;
    use tilecut::onnx::builder::{raw_tensor, ModelBuilder};
    use tilecut::onnx::StringStringEntryProto;
    let d = tempfile::tempdir().expect("tmp");
    let src = d.path().join("src");
    std::fs::create_dir(&src).expect("mkdir");
    let w: Vec<u8> = (0..16 * 16)
        .flat_map(|i| ((i % 7) as f32 * 0.1).to_le_bytes())
        .collect();
    std::fs::write(src.join("weights.bin"), &w).expect("write");
    let mut m = ModelBuilder::new("ext", 17);
    m.graph.input("x", DType::F32, &[1.into(), 16.into()]);
    let mut t = raw_tensor("w", DType::F32, &[16, 16], Vec::new());
    t.data_location = 1;
    t.external_data = vec![StringStringEntryProto {
        key: "location".into(),
        value: "weights.bin".into(),
    }];
    m.graph.initializer(t);
    m.graph.node("MatMul", &["x", "w"], &["h"]);
    m.graph.node("Relu", &["h"], &["y"]);
    m.graph.output("y", DType::F32, &[1.into(), 16.into()]);
    let model = src.join("ext.onnx");
    std::fs::write(&model, m.encode()).expect("write");
    let out = d.path().join("out");
    let engine = split_and_verify(&model, &out, &["--pin-cpu", "Relu"], false);
    assert_eq!(engine, Some("tract-onnx"));
    let manifest = std::fs::read_to_string(out.join("manifest.json")).expect("manifest");
    assert!(
        manifest.contains("piece_0.data") || manifest.contains(".data"),
        "{manifest}"
    );
    for e in std::fs::read_dir(&out).expect("dir") {
        let p = e.expect("e").path();
        if p.extension().is_some_and(|x| x == "onnx") {
            // The reader refuses references outside the folder: reading each piece proves it.
            tilecut::read_model(&p, &Default::default()).expect("piece reads");
        }
    }
    // Inline weights stay inline.
    let inline = d.path().join("inline");
    split_and_verify(&sample("fruit_grader_qdq_int8.onnx"), &inline, &[], false).expect("tract verifies it");
    assert!(!std::fs::read_dir(&inline).expect("dir").any(|e| e
        .expect("e")
        .path()
        .extension()
        .is_some_and(|x| x == "data")));
}

#[test]
fn cut_at_forces_the_cut_points() {
    let d = tempfile::tempdir().expect("tmp");
    let out = d.path().join("cut");
    // Cut the float grader after its first ReLU and after the pooling.
    split_and_verify(
        &sample("fruit_grader_f32.onnx"),
        &out,
        &["--cut-at", "relu_5", "--cut-at", "pool_21"],
        false,
    )
    .expect("verifies");
    let m: serde_json::Value =
        serde_json::from_str(&std::fs::read_to_string(out.join("manifest.json")).expect("m")).expect("json");
    assert_eq!(m["pieces"].as_array().expect("pieces").len(), 3);
    assert_fails_cleanly(
        &[
            "split",
            sample("fruit_grader_f32.onnx").to_str().expect("utf8"),
            "--out",
            d.path().join("x").to_str().expect("utf8"),
            "--cut-at",
            "nope",
        ],
        "no such tensor",
    );
}

#[test]
fn output_folder_faults_leave_nothing_behind() {
    let d = tempfile::tempdir().expect("tmp");
    let m = sample("fruit_grader_qdq_int8.onnx");
    let ms = m.to_str().expect("utf8");
    // A file where the folder should be.
    let file = d.path().join("afile");
    std::fs::write(&file, b"x").expect("write");
    assert_fails_cleanly(&["split", ms, "--out", file.to_str().expect("utf8")], "not a folder");
    // A folder that cannot be created (procfs refuses even root).
    assert_fails_cleanly(&["split", ms, "--out", "/proc/tilecut-cannot-write-here"], "/proc");
    // An existing non-empty folder is refused without --force, replaced with it.
    let full = d.path().join("full");
    std::fs::create_dir(&full).expect("mkdir");
    std::fs::write(full.join("keep.txt"), b"mine").expect("write");
    assert_fails_cleanly(&["split", ms, "--out", full.to_str().expect("utf8")], "not empty");
    assert!(full.join("keep.txt").exists(), "refused split leaves the folder alone");
    assert_eq!(
        run(&["split", ms, "--out", full.to_str().expect("utf8"), "--force"]).0,
        0
    );
    assert!(full.join("manifest.json").exists() && !full.join("keep.txt").exists());
    // The input model is never modified.
    let before = std::fs::read(&m).expect("read");
    assert_eq!(
        run(&["split", ms, "--out", d.path().join("again").to_str().expect("utf8")]).0,
        0
    );
    assert_eq!(before, std::fs::read(&m).expect("read"));
}

/// A sink that fails on its second file, like a disk filling up midway.
struct FailingSink(usize);

impl tilecut::onnx::split::Sink for FailingSink {
    fn put(&mut self, dir: &Path, file: &tilecut::onnx::split::OutFile) -> std::io::Result<()> {
        self.0 += 1;
        if self.0 == 2 {
            return Err(std::io::Error::other("injected failure"));
        }
        tilecut::onnx::split::FileSink.put(dir, file)
    }
}

#[test]
fn a_write_failing_midway_leaves_no_partial_folder() {
    let d = tempfile::tempdir().expect("tmp");
    let m = sample("parcel_label_detector_qdq.onnx");
    let a = tilecut::analyze_stages(
        &m,
        &Default::default(),
        tilecut::target::load("compact-array").expect("t"),
        &Default::default(),
    )
    .expect("ok");
    let loaded = tilecut::onnx::load::load(&m).expect("load");
    let (files, manifest) = tilecut::onnx::split::build(&loaded, &a.read.model.graph, &a.plan).expect("build");
    assert!(files.len() >= 2);
    let out = d.path().join("out");
    let err = tilecut::onnx::split::write(&out, &files, &manifest, false, &mut FailingSink(0)).expect_err("fails");
    assert!(err.to_string().contains("injected failure"));
    assert!(!out.exists(), "no partial output folder");
    let leftovers: Vec<_> = std::fs::read_dir(d.path()).expect("dir").collect();
    assert!(leftovers.is_empty(), "temporary folder cleaned up");
}

#[test]
fn verify_detects_a_mismatch_and_bad_folders() {
    let d = tempfile::tempdir().expect("tmp");
    let out = d.path().join("p");
    let (a, b) = (sample("fruit_grader_qdq_int8.onnx"), sample("fruit_grader_f32.onnx"));
    assert_eq!(
        run(&["split", a.to_str().expect("utf8"), "--out", out.to_str().expect("utf8")]).0,
        0
    );
    // Verifying another model against these pieces: the outputs differ, exit 1.
    let (c, o, _) = run(&["verify", b.to_str().expect("utf8"), out.to_str().expect("utf8")]);
    assert_eq!(c, 1, "{o}");
    assert!(o.contains("MISMATCH"));
    assert_fails_cleanly(
        &[
            "verify",
            a.to_str().expect("utf8"),
            d.path().join("none").to_str().expect("utf8"),
        ],
        "manifest.json",
    );
}
