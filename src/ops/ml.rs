//! The `ai.onnx.ml` domain (ONNX-ML operator specification): the classical-model ops that
//! converters of tree ensembles, linear models and pre-processing pipelines write. None of
//! them is array work; their shapes matter for the tensors they hand on (a scaler in front of
//! a network, a classifier behind one), and their counts keep them from looking free.
//!
//! Batch convention: the spec gives X as `[N, C]`. A rank-1 X is one example; what a model
//! then outputs is not specified (the `onnx` package's reference evaluator gives
//! LinearRegressor `[targets]`), so other ops leave that output unknown.

use crate::ir::{AttrValue, DType, Dim, Fact, Shape, ValueType};

use super::util::{like_input, tensor};
use super::{CostRule, Ctx, Inferred, MacsOps, OpDef};

pub const ML_DOMAIN: &str = "ai.onnx.ml";

/// How X holds its examples.
enum Batch {
    /// `[N, C]`.
    Rows(Dim, Dim),
    /// `[C]`: one example.
    Single(Dim),
    /// X's rank is unknown.
    Unknown,
}

fn batch(ctx: &Ctx) -> Result<Batch, String> {
    Ok(match ctx.dims_ref(0) {
        None => Batch::Unknown,
        Some([c]) => Batch::Single(c.clone()),
        Some([n, c]) => Batch::Rows(n.clone(), c.clone()),
        Some(d) => return Err(format!("input of rank {}, expected [N, C] or [C]", d.len())),
    })
}

/// `[N, tail…]` for batched X; unknown otherwise.
fn per_row(b: &Batch, tail: &[Dim]) -> Shape {
    match b {
        Batch::Rows(n, _) => Shape::of([std::slice::from_ref(n), tail].concat()),
        _ => Shape::unknown(),
    }
}

/// Examples × features, where both are known (a single example counts once).
fn examples_times_features(ctx: &Ctx) -> Option<u64> {
    match batch(ctx).ok()? {
        Batch::Rows(n, c) => n.known()?.checked_mul(c.known()?),
        Batch::Single(c) => c.known(),
        Batch::Unknown => None,
    }
}

fn list_len(ctx: &Ctx, name: &str) -> Option<u64> {
    match ctx.node.attr(name)? {
        AttrValue::Ints(v) => Some(v.len() as u64),
        AttrValue::Floats(v) => Some(v.len() as u64),
        AttrValue::Strings(v) => Some(v.len() as u64),
        AttrValue::Tensor(t) => t.element_count(),
        _ => None,
    }
}

/// The class labels of a classifier: their count and the label type (int64 or string). The
/// integer list is `classlabels_ints` on linear models and SVMs, `classlabels_int64s` on tree
/// ensembles.
fn class_labels(ctx: &Ctx) -> Result<(u64, DType), String> {
    if let Some(n) = list_len(ctx, "classlabels_ints").or_else(|| list_len(ctx, "classlabels_int64s")) {
        return Ok((n, DType::I64));
    }
    list_len(ctx, "classlabels_strings")
        .map(|n| (n, DType::Str))
        .ok_or_else(|| "no class labels (classlabels_ints, _int64s or _strings)".to_string())
}

/// Scaler, Normalizer: X's shape, float32 out.
fn float_like_input(ctx: &Ctx) -> Inferred {
    Ok(smallvec::smallvec![tensor(Some(DType::F32), ctx.shape(0))])
}

/// LabelEncoder-1/2/4: X's shape; the type of the values it maps to.
fn label_encoder(ctx: &Ctx) -> Inferred {
    let dtype = if let Some(AttrValue::Tensor(t)) = ctx.node.attr("values_tensor") {
        t.dtype
    } else if ctx.node.attr("values_strings").is_some() {
        Some(DType::Str)
    } else if ctx.node.attr("values_int64s").is_some() {
        Some(DType::I64)
    } else if ctx.node.attr("values_floats").is_some() {
        Some(DType::F32)
    } else {
        // Version 1: `classes_strings` maps strings to their index and back.
        match ctx.dtype(0) {
            Some(DType::Str) => Some(DType::I64),
            Some(DType::I64) => Some(DType::Str),
            _ => None,
        }
    };
    Ok(smallvec::smallvec![tensor(dtype, ctx.shape(0))])
}

/// CategoryMapper-1: strings to int64 and int64 to strings, X's shape.
fn category_mapper(ctx: &Ctx) -> Inferred {
    let dtype = match ctx.dtype(0) {
        Some(DType::Str) => Some(DType::I64),
        Some(DType::I64) => Some(DType::Str),
        Some(t) => return Err(format!("input of type {}, expected string or int64", t.name())),
        None => None,
    };
    Ok(smallvec::smallvec![tensor(dtype, ctx.shape(0))])
}

/// OneHotEncoder-1: X's shape plus one axis as long as the category list, float32.
fn one_hot_encoder(ctx: &Ctx) -> Inferred {
    let cats = list_len(ctx, "cats_int64s")
        .or_else(|| list_len(ctx, "cats_strings"))
        .ok_or("neither cats_int64s nor cats_strings is set")?;
    let shape = match ctx.dims_ref(0) {
        Some(d) => {
            let mut d = d.to_vec();
            d.push(Dim::Known(cats));
            Shape::of(d)
        }
        None => Shape::unknown(),
    };
    Ok(smallvec::smallvec![tensor(Some(DType::F32), shape)])
}

/// ArrayFeatureExtractor-1: the indices Y pick along X's last axis. For the 1-D Y the spec's
/// example uses, the last axis becomes Y's length; for a Y of higher rank, as long as all of
/// Y's elements (the `onnx` package's shape inference).
fn array_feature_extractor(ctx: &Ctx) -> Inferred {
    let shape = match (ctx.dims_ref(0), ctx.dims_ref(1)) {
        (Some(x), Some(y)) if !x.is_empty() => {
            let mut d = x[..x.len() - 1].to_vec();
            d.push(super::util::product(y)?);
            Shape::of(d)
        }
        (Some(_), Some(_)) => return Err("X is a scalar".into()),
        _ => Shape::unknown(),
    };
    Ok(smallvec::smallvec![tensor(ctx.dtype(0), shape)])
}

/// FeatureVectorizer-1: the inputs' features side by side, `[N, Σ inputdimensions]`, float32.
fn feature_vectorizer(ctx: &Ctx) -> Inferred {
    let total: u64 = ctx
        .ints_ref("inputdimensions")
        .ok_or("no inputdimensions")?
        .iter()
        .map(|&d| u64::try_from(d).map_err(|_| format!("negative input dimension {d}")))
        .sum::<Result<u64, String>>()?;
    Ok(smallvec::smallvec![tensor(
        Some(DType::F32),
        per_row(&batch(ctx)?, &[Dim::Known(total)]),
    )])
}

/// LinearRegressor-1: `[N, targets]`, float32 (`[targets]` for a single example, as the
/// `onnx` package's reference evaluator gives it).
fn linear_regressor(ctx: &Ctx) -> Inferred {
    let targets = u64::try_from(ctx.int("targets", 1)).map_err(|_| "negative targets")?;
    let shape = match batch(ctx)? {
        Batch::Single(_) => Shape::known(&[targets]),
        b => per_row(&b, &[Dim::Known(targets)]),
    };
    Ok(smallvec::smallvec![tensor(Some(DType::F32), shape)])
}

/// SVMRegressor-1: one score per example, `[N, 1]`, float32.
fn svm_regressor(ctx: &Ctx) -> Inferred {
    Ok(smallvec::smallvec![tensor(
        Some(DType::F32),
        per_row(&batch(ctx)?, &[Dim::Known(1)])
    )])
}

/// LinearClassifier-1, SVMClassifier-1, TreeEnsembleClassifier-1/3: the label per example
/// `[N]`, and the scores `[N, E]`, float32: "one score for each class and example", E the
/// number of labels, also for two classes (the `onnx` package's reference evaluator).
fn classifier(ctx: &Ctx) -> Inferred {
    let (classes, labels) = class_labels(ctx)?;
    let b = batch(ctx)?;
    Ok(smallvec::smallvec![
        tensor(Some(labels), per_row(&b, &[])),
        tensor(Some(DType::F32), per_row(&b, &[Dim::Known(classes)])),
    ])
}

/// TreeEnsembleRegressor-1/3: `[N, n_targets]`, float32.
fn tree_regressor(ctx: &Ctx) -> Inferred {
    let targets = u64::try_from(ctx.int("n_targets", 1)).map_err(|_| "negative n_targets")?;
    Ok(smallvec::smallvec![tensor(
        Some(DType::F32),
        per_row(&batch(ctx)?, &[Dim::Known(targets)]),
    )])
}

/// TreeEnsemble-5: `[N, n_targets]` of X's type.
fn tree_ensemble(ctx: &Ctx) -> Inferred {
    let targets = ctx.opt_int("n_targets").ok_or("no n_targets")?;
    let targets = u64::try_from(targets).map_err(|_| "negative n_targets")?;
    Ok(smallvec::smallvec![tensor(
        ctx.dtype(0),
        per_row(&batch(ctx)?, &[Dim::Known(targets)]),
    )])
}

/// ZipMap-1: a sequence of maps (label → score), one per example, keyed by the labels' type.
fn zip_map(ctx: &Ctx) -> Inferred {
    let key = match (
        ctx.node.attr("classlabels_int64s"),
        ctx.node.attr("classlabels_strings"),
    ) {
        (Some(_), None) => Some(DType::I64),
        (None, Some(_)) => Some(DType::Str),
        _ => None,
    };
    let map = Fact {
        value_type: ValueType::Map(key),
        dtype: Some(DType::F32),
        shape: Shape::unknown(),
    };
    Ok(smallvec::smallvec![Fact {
        value_type: ValueType::sequence(map, None),
        dtype: None,
        shape: Shape::unknown(),
    }])
}

/// Linear models: one multiply-accumulate per feature, class (or target) and example.
fn linear_macs(ctx: &Ctx, _outs: &[Fact]) -> MacsOps {
    let per_example = match class_labels(ctx) {
        Ok((e, _)) => Some(e),
        Err(_) => u64::try_from(ctx.int("targets", 1)).ok(),
    };
    let macs = examples_times_features(ctx)
        .zip(per_example)
        .and_then(|(a, b)| a.checked_mul(b));
    (macs, Some(0))
}

/// Support vector models: a kernel evaluation of C features per support vector and example
/// (a linear model without support vectors: one per class).
fn svm_macs(ctx: &Ctx, _outs: &[Fact]) -> MacsOps {
    let vectors = ctx
        .ints_ref("vectors_per_class")
        .map(|v| v.iter().map(|&x| x.max(0) as u64).sum::<u64>())
        .or_else(|| ctx.opt_int("n_supports").map(|x| x.max(0) as u64))
        .filter(|&v| v > 0)
        .or_else(|| class_labels(ctx).ok().map(|(e, _)| e))
        .unwrap_or(1);
    let macs = examples_times_features(ctx).and_then(|x| x.checked_mul(vectors));
    (macs, Some(0))
}

/// Tree ensembles: one comparison per level walked in every tree, the depth estimated as that
/// of a balanced tree of the ensemble's mean size (an estimate; real trees are uneven).
fn tree_ops(ctx: &Ctx, _outs: &[Fact]) -> MacsOps {
    let (trees, nodes) = if let Some(roots) = ctx.ints_ref("tree_roots") {
        let leaves = list_len(ctx, "leaf_targetids").unwrap_or(0);
        let inner = list_len(ctx, "nodes_featureids").unwrap_or(0);
        (roots.len() as u64, inner + leaves)
    } else {
        let ids = ctx.ints_ref("nodes_treeids").unwrap_or(&[]);
        let mut distinct: Vec<i64> = ids.to_vec();
        distinct.sort_unstable();
        distinct.dedup();
        (distinct.len() as u64, ids.len() as u64)
    };
    let ops = (|| {
        let n = match batch(ctx).ok()? {
            Batch::Rows(n, _) => n.known()?,
            Batch::Single(_) => 1,
            Batch::Unknown => return None,
        };
        let mean = nodes.checked_div(trees)?;
        let depth = u64::from(64 - mean.leading_zeros()).max(1);
        n.checked_mul(trees)?.checked_mul(depth)
    })();
    (Some(0), ops)
}

macro_rules! op {
    ($name:literal, $infer:expr, $cost:expr) => {
        OpDef {
            domain: ML_DOMAIN,
            op: $name,
            family: "ml",
            infer: $infer,
            cost: $cost,
            fold: None,
        }
    };
}

/// DictVectorizer-1: one map in, a 1-D tensor as long as the vocabulary out, of the map's
/// value type (ONNX-ML operator specification: "the output array will be equal in length to
/// the index mapping vector").
fn dict_vectorizer(ctx: &Ctx) -> Inferred {
    let length = match (ctx.node.attr("int64_vocabulary"), ctx.node.attr("string_vocabulary")) {
        (Some(AttrValue::Ints(k)), None) => k.len(),
        (None, Some(AttrValue::Strings(k))) => k.len(),
        _ => return Err("needs exactly one of int64_vocabulary and string_vocabulary".into()),
    };
    let dtype = match ctx.fact(0).map(|f| (&f.value_type, f.dtype)) {
        Some((ValueType::Map(_), dtype)) => dtype,
        Some((ValueType::Tensor, None)) | None => None,
        Some(_) => return Err("input is not a map".into()),
    };
    Ok(smallvec::smallvec![tensor(
        dtype,
        Shape::of([Dim::Known(length as u64)])
    )])
}

/// CastMap-1: a map keyed by int64 to a tensor of `cast_to`'s type, holding the map's values
/// (DENSE: as many as the map has, which the data decides) or `max_map` slots (SPARSE). The
/// specification gives the length, not the rank: the `[1, n]` layout is the one runtimes
/// give, as I remember it (from memory).
fn cast_map(ctx: &Ctx) -> Inferred {
    let dtype = match ctx.string("cast_to").as_deref().unwrap_or("TO_FLOAT") {
        "TO_FLOAT" => DType::F32,
        "TO_STRING" => DType::Str,
        "TO_INT64" => DType::I64,
        other => return Err(format!("cast_to `{other}` is none of TO_FLOAT, TO_STRING, TO_INT64")),
    };
    let length = match ctx.string("map_form").as_deref().unwrap_or("DENSE") {
        "DENSE" => super::shape_ops::data_dependent(ctx, "entries"),
        "SPARSE" => match ctx.opt_int("max_map").unwrap_or(1) {
            m if m > 0 => Dim::Known(m as u64),
            m => return Err(format!("max_map {m} is not positive")),
        },
        other => return Err(format!("map_form `{other}` is neither DENSE nor SPARSE")),
    };
    Ok(smallvec::smallvec![tensor(
        Some(dtype),
        Shape::of([Dim::Known(1), length])
    )])
}

pub static OPS: &[OpDef] = &[
    op!("Binarizer", like_input, CostRule::PerOutput(1)),
    op!("Scaler", float_like_input, CostRule::PerOutput(2)),
    op!("Normalizer", float_like_input, CostRule::PerOutput(3)),
    op!("Imputer", like_input, CostRule::PerOutput(1)),
    op!("LabelEncoder", label_encoder, CostRule::PerOutput(1)),
    op!("CategoryMapper", category_mapper, CostRule::PerOutput(1)),
    op!("OneHotEncoder", one_hot_encoder, CostRule::Free),
    op!("ArrayFeatureExtractor", array_feature_extractor, CostRule::Free),
    op!("FeatureVectorizer", feature_vectorizer, CostRule::Free),
    op!("LinearRegressor", linear_regressor, CostRule::Custom(linear_macs)),
    op!("LinearClassifier", classifier, CostRule::Custom(linear_macs)),
    op!("SVMRegressor", svm_regressor, CostRule::Custom(svm_macs)),
    op!("SVMClassifier", classifier, CostRule::Custom(svm_macs)),
    op!("TreeEnsembleRegressor", tree_regressor, CostRule::Custom(tree_ops)),
    op!("TreeEnsembleClassifier", classifier, CostRule::Custom(tree_ops)),
    op!("TreeEnsemble", tree_ensemble, CostRule::Custom(tree_ops)),
    op!("ZipMap", zip_map, CostRule::Free),
    op!("DictVectorizer", dict_vectorizer, CostRule::Free),
    op!("CastMap", cast_map, CostRule::Free),
];
