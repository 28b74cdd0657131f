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

/// Pieces whose inputs or outputs are not tensors: a sequence, an optional, a sequence of maps
/// (a classifier's ZipMap). Each piece declares them with their kind and element type, as the
/// ONNX IR's `TypeProto` has them, and passes the `onnx` package's full check.
#[test]
fn pieces_keep_sequence_optional_and_map_types() {
    if !python_onnx("pieces_keep_sequence_optional_and_map_types") {
        return;
    }
    let d = tempfile::tempdir().expect("tmp");
    let zipmap = d.path().join("grader_scores.onnx");
    python(
        "import sys, onnx\nfrom onnx import helper as h, TensorProto as T\n\
         n = [h.make_node('LinearClassifier', ['x'], ['label', 'score'], domain='ai.onnx.ml', coefficients=[0.5] * 8, intercepts=[0.1, 0.2], classlabels_strings=['ripe', 'raw']),\n\
              h.make_node('ZipMap', ['score'], ['scores'], domain='ai.onnx.ml', classlabels_strings=['ripe', 'raw'])]\n\
         g = h.make_graph(n, 'g', [h.make_tensor_value_info('x', T.FLOAT, [3, 4])], [h.make_value_info('label', onnx.TypeProto()), h.make_value_info('scores', onnx.TypeProto())])\n\
         onnx.save(h.make_model(g, opset_imports=[h.make_opsetid('', 17), h.make_opsetid('ai.onnx.ml', 3)]), sys.argv[1])",
        &[zipmap.to_str().expect("utf8")],
    );
    let conformance = Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/onnx-node");
    let mut models = vec![zipmap];
    for m in [
        "test_split_to_sequence_1",
        "test_sequence_insert_at_back",
        "test_sequence_map_identity_1_sequence",
        "test_optional_get_element_optional_sequence",
        "test_identity_opt",
        "test_if_opt",
        "test_loop16_seq_none",
    ] {
        models.push(conformance.join(format!("{m}.onnx")));
    }
    for (k, model) in models.iter().enumerate() {
        let out = d.path().join(format!("pieces{k}"));
        let (code, _, err) = run(&[
            "split",
            model.to_str().expect("utf8"),
            "--out",
            out.to_str().expect("utf8"),
            "--target",
            "wide-array",
        ]);
        assert_eq!(code, 0, "{}: {err}", model.display());
        let checked = python(
            "import sys, glob, onnx\nfor p in sorted(glob.glob(sys.argv[1] + '/*.onnx')):\n    m = onnx.load(p)\n    onnx.checker.check_model(m, full_check=True)\n    print(*[o.type.WhichOneof('value') for o in m.graph.output])",
            &[out.to_str().expect("utf8")],
        );
        assert!(!checked.trim().is_empty(), "{}: no pieces", model.display());
        if k == 0 {
            assert!(checked.contains("sequence_type"), "the ZipMap output: {checked}");
        }
    }
}

#[test]
fn conformance_models_split_and_verify() {
    let have_python = python_onnx("conformance_models_split_and_verify");
    let dir = Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/onnx-node");
    let mut files: Vec<PathBuf> = std::fs::read_dir(&dir)
        .expect("dir")
        .map(|e| e.expect("e").path())
        .filter(|p| p.extension().is_some_and(|e| e == "onnx"))
        .collect();
    files.sort();
    let d = tempfile::tempdir().expect("tmp");
    let (mut by_tract, mut by_reference, mut unrunnable, mut symbolic, mut random) = (0, 0, Vec::new(), 0, 0);
    let mut split_failures = Vec::new();
    // Greedy offload onto wide-array makes multi-piece splits of most of them.
    for f in &files {
        let Ok(a) = tilecut::read_model(f, &Default::default()) else {
            continue;
        };
        if a.model
            .graph
            .inputs
            .iter()
            .any(|i| !a.model.graph.value(*i).fact.shape.is_concrete())
        {
            symbolic += 1;
            continue;
        }
        let out = d.path().join(format!("p{}", unrunnable.len()));
        let (c, _, e) = run(&[
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
            split_failures.push(format!("{}: {}", f.display(), e.trim()));
            continue;
        }
        check_wiring(&out);
        let (c, o, e) = run(&["verify", f.to_str().expect("utf8"), out.to_str().expect("utf8")]);
        match c {
            0 => by_tract += 1,
            1 => panic!("{}: pieces differ from the original: {o}", f.display()),
            // Random ops (Bernoulli, RandomNormal…): verify refuses, nothing to compare.
            _ if e.contains("draws random numbers") => random += 1,
            _ => unrunnable.push((f.clone(), out)),
        }
    }
    // What tract cannot run goes to the onnx reference evaluator, many models per process.
    let mut reference_failures = Vec::new();
    if have_python && !unrunnable.is_empty() {
        let list = d.path().join("batch.json");
        let pairs: Vec<[String; 2]> = unrunnable
            .iter()
            .map(|(m, o)| [m.display().to_string(), o.display().to_string()])
            .collect();
        std::fs::write(&list, serde_json::to_vec(&pairs).expect("json")).expect("write");
        let out = python(
            tilecut::verify::REFERENCE,
            &["--batch", list.to_str().expect("utf8"), "1e-5", "1"],
        );
        for line in out.lines() {
            let r: serde_json::Value = serde_json::from_str(line).expect("json line");
            match r["results"].as_array() {
                Some(res) => {
                    let bad: Vec<&serde_json::Value> = res.iter().filter(|x| x["equal"] != true).collect();
                    assert!(
                        bad.is_empty(),
                        "{}: pieces differ (reference evaluator): {bad:?}",
                        r["model"]
                    );
                    by_reference += 1;
                }
                None => reference_failures.push(format!("{}: {}", r["model"], r["error"])),
            }
        }
    }
    println!(
        "conformance split + verify of {} models: {by_tract} verified by tract-onnx, {by_reference} by the onnx reference evaluator, {} run by neither, {symbolic} with symbolic inputs, {random} with random ops",
        files.len(),
        unrunnable.len() - by_reference
    );
    for r in &reference_failures {
        println!("  not verified: {r}");
    }
    assert!(split_failures.is_empty(), "split failed: {split_failures:#?}");
    assert!(by_tract >= 600, "only {by_tract} verified by tract");
    if have_python {
        assert!(
            by_reference >= 100,
            "only {by_reference} verified by the reference evaluator"
        );
    }
}

/// A MatMul on an n×n float weight stored outside the model, at `location` (relative to the
/// model's folder `src`), then a Relu: the model file, and the weight bytes written.
fn model_with_external_weights(src: &Path, name: &str, location: &str, n: i64) -> (PathBuf, Vec<u8>) {
    use tilecut::ir::DType;
    use tilecut::onnx::builder::{raw_tensor, ModelBuilder};
    use tilecut::onnx::StringStringEntryProto;
    let w: Vec<u8> = (0..n * n).flat_map(|i| ((i % 7) as f32 * 0.1).to_le_bytes()).collect();
    let file = src.join(location);
    std::fs::create_dir_all(file.parent().expect("folder")).expect("mkdir");
    std::fs::write(&file, &w).expect("write");
    let mut m = ModelBuilder::new(name, 17);
    m.graph.input("x", DType::F32, &[1.into(), n.into()]);
    let mut t = raw_tensor("w", DType::F32, &[n, n], Vec::new());
    t.data_location = 1;
    t.external_data = vec![StringStringEntryProto {
        key: "location".into(),
        value: location.into(),
    }];
    m.graph.initializer(t);
    m.graph.node("MatMul", &["x", "w"], &["h"]);
    m.graph.node("Relu", &["h"], &["y"]);
    m.graph.output("y", DType::F32, &[1.into(), n.into()]);
    let model = src.join(format!("{name}.onnx"));
    std::fs::write(&model, m.encode()).expect("write");
    (model, w)
}

#[test]
fn external_data_pieces_stay_inside_the_output_folder() {
    let d = tempfile::tempdir().expect("tmp");
    let (model, _) = model_with_external_weights(&d.path().join("src"), "ext", "weights.bin", 16);
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
    // Pieces keep the side the cut-finder gave their nodes: cutting the int8 grader where its
    // min-cut plan crosses the boundary (image_q in, fc_35_q out) leaves the array's piece whole.
    let q = d.path().join("q");
    split_and_verify(
        &sample("fruit_grader_qdq_int8.onnx"),
        &q,
        &["--cut-at", "image_q", "--cut-at", "fc_35_q"],
        false,
    )
    .expect("verifies");
    let m: serde_json::Value =
        serde_json::from_str(&std::fs::read_to_string(q.join("manifest.json")).expect("m")).expect("json");
    let sides: Vec<&str> = m["pieces"]
        .as_array()
        .expect("pieces")
        .iter()
        .map(|p| p["side"].as_str().expect("side"))
        .collect();
    assert_eq!(sides, ["cpu", "accel", "cpu"]);
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

/// `--force` replaces the output folder as a whole: a folder holding the model, or the
/// external data the model reads, is refused (it once deleted the model), and nothing is
/// written or removed.
#[test]
fn the_output_folder_never_holds_what_the_split_reads() {
    let d = tempfile::tempdir().expect("tmp");
    let src = d.path().join("src");
    let (model, w) = model_with_external_weights(&src, "monitor", "data/weights.bin", 8);
    let bytes = std::fs::read(&model).expect("read");
    let ms = model.to_str().expect("utf8");
    for (out, holds) in [
        (src.clone(), "monitor.onnx"),
        (d.path().to_path_buf(), "monitor.onnx"),
        (src.join("data"), "weights.bin"),
    ] {
        let os = out.to_str().expect("utf8");
        assert_fails_cleanly(&["split", ms, "--out", os, "--force"], holds);
        assert_fails_cleanly(&["split", ms, "--out", os, "--force"], "would replace a folder holding");
    }
    assert_eq!(std::fs::read(&model).expect("model kept"), bytes);
    assert_eq!(std::fs::read(src.join("data/weights.bin")).expect("data kept"), w);
    let mut left: Vec<_> = std::fs::read_dir(&src)
        .expect("dir")
        .map(|e| e.expect("e").file_name())
        .collect();
    left.sort();
    assert_eq!(left, ["data", "monitor.onnx"], "no temporary folder left behind");
    // A folder beside the model is fine.
    let out = src.join("pieces");
    assert_eq!(run(&["split", ms, "--out", out.to_str().expect("utf8")]).0, 0);
}

/// A count assumed for a data-dependent size (`--dim selected@nms=20`) sizes the cut's costs,
/// but the pieces keep that dim open: how many boxes are kept changes from one inference to
/// the next, and a piece declaring 20 would be wrong for every other count.
#[test]
fn pieces_keep_data_dependent_dims_open() {
    let d = tempfile::tempdir().expect("tmp");
    let m = nms_head(d.path());
    let out = d.path().join("pieces");
    let assumed = format!("{NMS_KEPT}=20");
    let args = ["--target", "wide-array", "--pin-accel", "MatMul", "--dim", &assumed];
    split_and_verify(&m, &out, &args, false).expect("tract verifies it");
    let read = tilecut::read_model(&out.join("piece_1_accel.onnx"), &Default::default()).expect("reads");
    let g = &read.model.graph;
    let kept = g.inputs.iter().copied().find(|&v| g.value(v).name == "kept");
    let kept = kept.expect("the accelerator piece reads the kept boxes");
    let dims = g.value(kept).fact.shape.dims().expect("rank").to_vec();
    assert_eq!(dims.len(), 2);
    assert!(dims[0].known().is_none(), "the kept count stays open: {dims:?}");
    assert_eq!(dims[1].known(), Some(4));
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

#[test]
fn a_cut_inside_a_function_call_writes_its_body_inline() {
    let have_python = python_onnx("a_cut_inside_a_function_call_writes_its_body_inline");
    let d = tempfile::tempdir().expect("tmp");
    let m = function_model(d.path());
    let out = d.path().join("pieces");
    // The IR names the call's inner tensor `ss/t` (call name / tensor name).
    let (c, _, e) = run(&[
        "split",
        m.to_str().expect("utf8"),
        "--out",
        out.to_str().expect("utf8"),
        "--cut-at",
        "ss/t",
    ]);
    assert_eq!(c, 0, "{e}");
    check_wiring(&out);
    let manifest: serde_json::Value =
        serde_json::from_str(&std::fs::read_to_string(out.join("manifest.json")).expect("m")).expect("json");
    let pieces = manifest["pieces"].as_array().expect("pieces");
    assert_eq!(pieces.len(), 2);
    assert_eq!(pieces[0]["outputs"], serde_json::json!(["ss/t"]));
    assert!(pieces[1]["inputs"].as_array().expect("i").iter().any(|i| i == "ss/t"));
    // Without a cut inside it, the call is copied whole, with its function.
    let whole = d.path().join("whole");
    let (c, _, e) = run(&[
        "split",
        m.to_str().expect("utf8"),
        "--out",
        whole.to_str().expect("utf8"),
    ]);
    assert_eq!(c, 0, "{e}");
    if !have_python {
        return;
    }
    let (c, o, e) = run(&[
        "verify",
        m.to_str().expect("utf8"),
        out.to_str().expect("utf8"),
        "--engine",
        "python-reference",
    ]);
    assert_eq!(c, 0, "{o}{e}");
    // Each piece is a valid model on its own (onnx.checker, full check).
    for p in pieces {
        let f = out.join(p["file"].as_str().expect("file"));
        python(
            "import sys, onnx; onnx.checker.check_model(onnx.load(sys.argv[1]), full_check=True)",
            &[f.to_str().expect("utf8")],
        );
    }
}

/// Writes input tensors with numpy (`.npy`) and the onnx package's numpy_helper (`.pb`), the
/// general-purpose writers of both formats, and returns what they hold as JSON.
const WRITE_FEEDS: &str = r#"
import sys, json, os, numpy as np, onnx
from onnx import numpy_helper
d = sys.argv[1]
rng = np.random.default_rng(7)
out = {}
def save(name, a, pb_name=None):
    np.save(os.path.join(d, name + ".npy"), a)
    t = numpy_helper.from_array(a, pb_name or "")
    open(os.path.join(d, name + ".pb"), "wb").write(t.SerializeToString())
    out[name] = {"dtype": str(a.dtype), "shape": list(a.shape), "values": [float(x) for x in a.reshape(-1)]}
for dt in ["float32", "float64", "float16", "int8", "int16", "int32", "int64", "uint8", "uint16", "uint32", "uint64"]:
    save("t_" + dt, (rng.uniform(-100, 100, (2, 3)) if dt.startswith("float") else rng.integers(0, 100, (2, 3))).astype(dt))
save("t_bool", rng.integers(0, 2, (4,)).astype(bool))
save("t_scalar", np.array(3.5, dtype=np.float32))
save("image", rng.uniform(-1, 1, (1, 3, 64, 64)).astype(np.float32), "image")
save("small", rng.uniform(-1, 1, (1, 3, 32, 32)).astype(np.float32))
save("ints", rng.integers(0, 9, (1, 3, 64, 64)).astype(np.int64))
print(json.dumps(out))
"#;

#[test]
fn verify_reads_inputs_from_npy_and_pb_files() {
    if !python_onnx("verify_reads_inputs_from_npy_and_pb_files") {
        return;
    }
    let d = tempfile::tempdir().expect("tmp");
    let written: serde_json::Value =
        serde_json::from_str(&python(WRITE_FEEDS, &[d.path().to_str().expect("utf8")])).expect("json");
    // The reader returns exactly what numpy and numpy_helper wrote, for every type.
    for (name, want) in written.as_object().expect("object") {
        for ext in ["npy", "pb"] {
            let (_, t) = tilecut::feeds::read(&d.path().join(format!("{name}.{ext}")))
                .unwrap_or_else(|e| panic!("{name}.{ext}: {e}"));
            assert_eq!(t.dtype.name(), want["dtype"].as_str().expect("dtype"), "{name}.{ext}");
            let shape: Vec<u64> = want["shape"]
                .as_array()
                .expect("shape")
                .iter()
                .map(|x| x.as_u64().expect("dim"))
                .collect();
            assert_eq!(t.dims, shape, "{name}.{ext}");
            let width = t.bytes.len() / want["values"].as_array().expect("v").len().max(1);
            let got: Vec<f64> = t
                .bytes
                .chunks_exact(width.max(1))
                .map(|c| {
                    let mut b = [0u8; 8];
                    b[..c.len()].copy_from_slice(c);
                    use tilecut::ir::DType::*;
                    match t.dtype {
                        F32 => f32::from_le_bytes([b[0], b[1], b[2], b[3]]) as f64,
                        F64 => f64::from_le_bytes(b),
                        F16 => tilecut::values::f16_to_f64(u16::from_le_bytes([b[0], b[1]])),
                        I8 => b[0] as i8 as f64,
                        I16 => i16::from_le_bytes([b[0], b[1]]) as f64,
                        I32 => i32::from_le_bytes([b[0], b[1], b[2], b[3]]) as f64,
                        I64 => i64::from_le_bytes(b) as f64,
                        U8 | Bool => b[0] as f64,
                        U16 => u16::from_le_bytes([b[0], b[1]]) as f64,
                        U32 => u32::from_le_bytes([b[0], b[1], b[2], b[3]]) as f64,
                        U64 => u64::from_le_bytes(b) as f64,
                        other => panic!("unexpected {other}"),
                    }
                })
                .collect();
            let want: Vec<f64> = want["values"]
                .as_array()
                .expect("values")
                .iter()
                .map(|x| x.as_f64().expect("f"))
                .collect();
            assert_eq!(got.len(), want.len(), "{name}.{ext}");
            // serde_json's default float parsing may be one ulp off Python's shortest repr.
            for (k, (g, w)) in got.iter().zip(&want).enumerate() {
                assert!(
                    (g - w).abs() <= 4.0 * f64::EPSILON * w.abs(),
                    "{name}.{ext} element {k}: read {g}, written {w}"
                );
            }
        }
    }
    // End to end: the float grader split, verified on the files' values by both engines.
    let m = sample("fruit_grader_f32.onnx");
    let (ms, out) = (m.to_str().expect("utf8"), d.path().join("pieces"));
    let os = out.to_str().expect("utf8");
    let (c, _, e) = run(&["split", ms, "--out", os]);
    assert_eq!(c, 0, "{e}");
    let image = |ext: &str| d.path().join(format!("image.{ext}")).display().to_string();
    for engine in ["tract", "python-reference"] {
        for feed in [format!("image={}", image("npy")), image("pb")] {
            let (c, o, e) = run(&[
                "verify", ms, os, "--engine", engine, "--feed", &feed, "--format", "json",
            ]);
            assert_eq!(c, 0, "{engine} {feed}: {e}");
            let r: serde_json::Value = serde_json::from_str(&o).expect("json");
            assert_eq!(r["inputs"][0]["input"], "image");
            assert!(r["inputs"][0]["source"]
                .as_str()
                .expect("s")
                .ends_with(&feed[feed.len() - 9..]));
            assert_eq!(r["passed"], true);
        }
    }
    // Bad feeds: one line, exit 2, naming the file and the problem.
    let p = |f: &str| d.path().join(f).display().to_string();
    std::fs::write(d.path().join("notes.txt"), "apple").expect("write");
    for (feed, needle) in [
        (format!("image={}", p("missing.npy")), "missing.npy"),
        (format!("camera={}", image("npy")), "no input `camera`"),
        (format!("image={}", p("small.npy")), "has shape"),
        (format!("image={}", p("ints.npy")), "the file holds int64"),
        (format!("image={}", p("notes.txt")), ".npy or .pb"),
        (p("t_float32.pb"), "names no input"),
        ("=x.npy".to_string(), "NAME=FILE"),
    ] {
        assert_fails_cleanly(&["verify", ms, os, "--feed", &feed], needle);
    }
    let truncated = std::fs::read(d.path().join("image.npy")).expect("read");
    std::fs::write(d.path().join("cut.npy"), &truncated[..truncated.len() / 2]).expect("write");
    assert_fails_cleanly(
        &["verify", ms, os, "--feed", &format!("image={}", p("cut.npy"))],
        "bytes",
    );
}

/// External weights are copied whole, however large: a regression test for pieces whose
/// external data was cut at 16 MiB (a buffer cap meant for small constants).
#[test]
fn large_external_weights_are_copied_whole() {
    use tilecut::ir::DType;
    use tilecut::onnx::builder::{raw_tensor, ModelBuilder};
    use tilecut::onnx::StringStringEntryProto;
    let d = tempfile::tempdir().expect("tmp");
    let src = d.path().join("src");
    std::fs::create_dir(&src).expect("mkdir");
    let (k, n) = (2048usize, 2304usize); // 18 MiB of float32 weights
    let w: Vec<u8> = (0..k * n)
        .flat_map(|i| (((i * 7919) % 1000) as f32 * 1e-3 - 0.5).to_le_bytes())
        .collect();
    // 100 bytes of something else first, so the tensor sits at an offset.
    let mut file = vec![7u8; 100];
    file.extend_from_slice(&w);
    std::fs::write(src.join("big.bin"), &file).expect("write");
    let mut m = ModelBuilder::new("big", 17);
    m.graph.input("x", DType::F32, &[1.into(), (k as i64).into()]);
    let mut t = raw_tensor("w", DType::F32, &[k as i64, n as i64], Vec::new());
    t.data_location = 1;
    t.external_data = vec![
        StringStringEntryProto {
            key: "location".into(),
            value: "big.bin".into(),
        },
        StringStringEntryProto {
            key: "offset".into(),
            value: "100".into(),
        },
        StringStringEntryProto {
            key: "length".into(),
            value: w.len().to_string(),
        },
    ];
    m.graph.initializer(t);
    m.graph.node("MatMul", &["x", "w"], &["h"]);
    m.graph.node("Relu", &["h"], &["y"]);
    m.graph.output("y", DType::F32, &[1.into(), (n as i64).into()]);
    let model = src.join("big.onnx");
    std::fs::write(&model, m.encode()).expect("write");
    let out = d.path().join("out");
    let engine = split_and_verify(&model, &out, &["--pin-cpu", "Relu", "--strategy", "greedy"], false);
    assert_eq!(engine, Some("tract-onnx"));
    let data: Vec<PathBuf> = std::fs::read_dir(&out)
        .expect("dir")
        .map(|e| e.expect("e").path())
        .filter(|p| p.extension().is_some_and(|x| x == "data"))
        .collect();
    assert_eq!(data.len(), 1, "{data:?}");
    let copied = std::fs::read(&data[0]).expect("read");
    assert_eq!(copied.len(), w.len(), "the piece's data file holds the whole tensor");
    assert!(copied == w, "and byte for byte the same");
}

/// `--input` sizes the reference evaluator's inputs as `--dim` does: an input declared with a
/// symbolic dim, fixed only by `--input`, is generated at that shape (it used to look the
/// symbol up among the `--dim` settings and fail).
#[test]
fn the_reference_engine_takes_input_settings() {
    if !python_onnx("the_reference_engine_takes_input_settings") {
        return;
    }
    let d = tempfile::tempdir().expect("tmp");
    let m = model(
        vec![node("Relu", &["x"], &["r"]), node("Neg", &["r"], &["y"])],
        vec![vi("x", 1, &[Dm::S("n"), Dm::N(4)])],
        untyped(&["y"]),
        vec![],
    );
    let p = write(d.path(), "sym.onnx", &m);
    let out = d.path().join("pieces");
    let (pm, o) = (p.to_str().expect("utf8"), out.to_str().expect("utf8"));
    let (c, _, err) = run(&["split", pm, "--out", o, "--input", "x=3x4"]);
    assert_eq!(c, 0, "{err}");
    let (c, stdout, err) = run(&[
        "verify",
        pm,
        o,
        "--input",
        "x=3x4",
        "--engine",
        "python-reference",
        "--format",
        "json",
    ]);
    assert_eq!(c, 0, "{err}");
    let j: serde_json::Value = serde_json::from_str(&stdout).expect("json");
    assert_eq!(j["inputs"][0]["shape"], serde_json::json!([3, 4]));
    assert_eq!(j["outputs"][0]["elements"], 12);
}

/// Exporters name dims with dots (`p2o.DynamicDimension.0`), slashes or function calls
/// (`floor(T/2 - 1/2) + 1`), which tract cannot read as its dim expressions, and declare
/// symbolic dims on inner tensors, which tract will not unify with the sizes the inputs fix
/// (seen on deployed detectors and OCR models). `verify` clears them for tract alone, so such
/// a model runs.
#[test]
fn tract_verifies_models_whose_dim_names_it_cannot_parse() {
    let d = tempfile::tempdir().expect("tmp");
    let mut m = model(
        vec![node("Relu", &["x"], &["r"]), node("Neg", &["r"], &["y"])],
        vec![vi("x", 1, &[Dm::S("p2o.DynamicDimension.0"), Dm::N(4)])],
        vec![vi("y", 1, &[Dm::S("Neg/out_dim_0"), Dm::N(4)])],
        vec![],
    );
    if let Some(g) = m.graph.as_mut() {
        g.value_info
            .push(vi("r", 1, &[Dm::S("floor(T/2 - 1/2) + 1"), Dm::N(4)]));
        // A plain name: readable, and still not the 3 that `--input` fixes.
        g.value_info.push(vi("y", 1, &[Dm::S("batch"), Dm::N(4)]));
    }
    let p = write(d.path(), "dotted.onnx", &m);
    let out = d.path().join("pieces");
    let (pm, o) = (p.to_str().expect("utf8"), out.to_str().expect("utf8"));
    let (c, _, err) = run(&["split", pm, "--out", o, "--input", "x=3x4"]);
    assert_eq!(c, 0, "{err}");
    let (c, stdout, err) = run(&["verify", pm, o, "--input", "x=3x4", "--format", "json"]);
    assert_eq!(c, 0, "{err}");
    let j: serde_json::Value = serde_json::from_str(&stdout).expect("json");
    assert_eq!(j["engine"], "tract");
    assert_eq!(j["outputs"][0]["elements"], 12);
}

/// A model tract panics on (a Squeeze-11 with a negative axis: tract-hir 0.21 asserts in its
/// shape rules; the ONNX operator spec, Squeeze-11, allows axes in [-r, r-1]) is a one-line
/// error, exit 2, with tract's message and no panic report on stderr.
#[test]
fn a_panic_inside_tract_is_a_one_line_error() {
    let d = tempfile::tempdir().expect("tmp");
    let mut m = model(
        vec![{
            let mut n = node("Squeeze", &["x"], &["y"]);
            n.attribute.push(ints_attr("axes", &[-1, 0]));
            n
        }],
        vec![vi("x", 1, &[Dm::N(1), Dm::N(3), Dm::N(1)])],
        vec![vi("y", 1, &[Dm::N(3)])],
        vec![],
    );
    m.opset_import[0].version = 11;
    let p = write(d.path(), "squeeze11.onnx", &m);
    let out = d.path().join("pieces");
    let (pm, o) = (p.to_str().expect("utf8"), out.to_str().expect("utf8"));
    let (c, _, err) = run(&["split", pm, "--out", o]);
    assert_eq!(c, 0, "{err}");
    let (c, stdout, err) = run(&["verify", pm, o]);
    assert_eq!(c, 2, "{stdout}{err}");
    assert!(stdout.is_empty(), "{stdout}");
    assert_eq!(err.lines().count(), 1, "{err}");
    assert!(err.contains("squeeze11.onnx: tract panicked on it: "), "{err}");
    assert!(!err.contains("panicked at"), "{err}");
}

/// Tolerances must be non-negative numbers: anything else is a one-line error, exit 2.
#[test]
fn bad_tolerances_are_refused() {
    for (flag, v) in [
        ("--rtol", "-1"),
        ("--atol", "nan"),
        ("--steps", "-0.5"),
        ("--atol", "inf"),
    ] {
        let arg = format!("{flag}={v}");
        let (c, out, err) = run(&["verify", "model.onnx", "pieces", &arg]);
        assert_eq!(c, 2, "{arg}: {err}");
        assert!(out.is_empty());
        assert_eq!(err.lines().count(), 1, "{err}");
        assert!(err.contains(flag), "{err}");
    }
}
