//! Output shapes inferred by tilecut agree with tract-onnx's own type analysis (a
//! general-purpose ONNX library) on the conformance models both of them understand.

use std::path::Path;

use tract_onnx::prelude::*;

#[test]
fn output_shapes_agree_with_tract_analysis() {
    let dir = Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/onnx-node");
    // Ops from vision, audio and transformer models; each file is an ONNX conformance model.
    let names = [
        "test_conv_with_strides_padding",
        "test_conv_with_strides_no_padding",
        "test_convtranspose",
        "test_maxpool_2d_pads",
        "test_maxpool_2d_strides",
        "test_averagepool_2d_pads",
        "test_globalaveragepool",
        "test_gemm_default_matrix_bias",
        "test_matmul_3d",
        "test_matmul_4d",
        "test_relu",
        "test_sigmoid",
        "test_softmax_axis_1",
        "test_add_bcast",
        "test_mul_bcast",
        "test_concat_2d_axis_1",
        "test_transpose_default",
        "test_reshape_reduced_dims",
        "test_flatten_axis1",
        "test_squeeze",
        "test_unsqueeze_axis_0",
        "test_batchnorm_example",
        "test_layer_normalization_2d_axis1",
        "test_reduce_mean_default_axes_keepdims_example",
        "test_slice",
        "test_gather_0",
        "test_constant_pad",
        "test_split_equal_parts_1d_opset18",
        "test_tile",
        "test_expand_dim_changed",
        "test_clip",
        "test_leakyrelu",
        "test_hardswish",
        "test_depthtospace_example",
        "test_instancenorm_example",
        "test_lstm_defaults",
        "test_gru_defaults",
        "test_einsum_batch_matmul",
        "test_resize_upsample_scales_nearest",
        "test_qlinearconv",
        "test_qlinearmatmul_2D_uint8_float32",
        "test_quantizelinear",
        "test_dequantizelinear",
        "test_where_example",
        "test_cast_FLOAT_to_DOUBLE",
    ];
    let (mut compared, mut tract_failed) = (0, 0);
    let mut disagreements = Vec::new();
    for name in names {
        let path = dir.join(format!("{name}.onnx"));
        assert!(path.exists(), "{name} is among the committed conformance models");
        let ours = tilecut::read_model(&path, &Default::default()).expect("tilecut reads it");
        let theirs = std::panic::catch_unwind(|| -> TractResult<Vec<Vec<usize>>> {
            let model = tract_onnx::onnx().model_for_path(&path)?.into_typed()?;
            model
                .output_outlets()?
                .iter()
                .map(|o| {
                    let fact = model.outlet_fact(*o)?;
                    fact.shape
                        .as_concrete()
                        .map(|s| s.to_vec())
                        .ok_or_else(|| anyhow::anyhow!("symbolic"))
                })
                .collect()
        });
        let Ok(Ok(shapes)) = theirs else {
            tract_failed += 1;
            continue;
        };
        for (k, s) in shapes.iter().enumerate() {
            let id = ours.model.graph.outputs[k];
            let mine = ours.model.graph.value(id).fact.shape.concrete();
            let expect: Vec<u64> = s.iter().map(|&d| d as u64).collect();
            compared += 1;
            if mine.as_ref() != Some(&expect) {
                disagreements.push(format!("{name} output {k}: tilecut {mine:?}, tract {expect:?}"));
            }
        }
    }
    println!(
        "tract cross-check: {compared} outputs compared, {} models tract could not analyze",
        tract_failed
    );
    assert!(disagreements.is_empty(), "{disagreements:#?}");
    assert!(compared >= 30, "too few outputs compared: {compared}");
}
