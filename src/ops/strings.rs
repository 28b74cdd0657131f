//! String and media-decoding ops (ONNX operator specification, opsets 9–20): what a text or
//! image pre-processing step inside a model produces. None of them is array work; their
//! shapes matter for the tensors they hand on, often sized by the data (a named symbol).

use crate::ir::{DType, Dim, Shape};

use super::shape_ops::data_dependent;
use super::util::{broadcast, tensor};
use super::{CostRule, Ctx, Inferred, OpDef};

/// RegexFullMatch-20: one bool per string.
fn regex_full_match(ctx: &Ctx) -> Inferred {
    Ok(smallvec::smallvec![tensor(Some(DType::Bool), ctx.shape(0))])
}

/// StringConcat-20: element-wise with multidirectional broadcasting.
fn string_concat(ctx: &Ctx) -> Inferred {
    let shape = broadcast(&[ctx.shape(0), ctx.shape(1)])?;
    Ok(smallvec::smallvec![tensor(Some(DType::Str), shape)])
}

/// StringSplit-20: Y is X's shape plus a last axis as long as the most substrings any element
/// splits into (data), Z the count per element (int64, X's shape).
fn string_split(ctx: &Ctx) -> Inferred {
    let x = ctx.shape(0);
    let y = match x.dims() {
        Some(d) => {
            let mut d = d.to_vec();
            d.push(data_dependent(ctx, "substrings"));
            Shape::of(d)
        }
        None => Shape::unknown(),
    };
    let mut outs = vec![tensor(Some(DType::Str), y)];
    if ctx.outputs() > 1 {
        outs.push(tensor(Some(DType::I64), x));
    }
    Ok(outs.into())
}

/// StringNormalizer-10: [C] or [1, C]; removing stop words makes C depend on the data.
fn string_normalizer(ctx: &Ctx) -> Inferred {
    let x = ctx.shape(0);
    let stops = ctx.node.attr("stopwords").is_some_and(|a| match a {
        crate::ir::AttrValue::Strings(s) => !s.is_empty(),
        _ => false,
    });
    let shape = match x.dims() {
        Some(d) if d.len() == 1 || d.len() == 2 => {
            let mut d = d.to_vec();
            if stops {
                if let Some(last) = d.last_mut() {
                    *last = data_dependent(ctx, "kept");
                }
            }
            Shape::of(d)
        }
        Some(d) => return Err(format!("input of rank {}, expected [C] or [1, C]", d.len())),
        None => Shape::unknown(),
    };
    Ok(smallvec::smallvec![tensor(Some(DType::Str), shape)])
}

/// TfIdfVectorizer-9: [N] → [C] and [B, N] → [B, C], C = the largest `ngram_indexes` + 1;
/// float32 output.
fn tfidf_vectorizer(ctx: &Ctx) -> Inferred {
    let c = ctx
        .ints("ngram_indexes")
        .and_then(|v| v.into_iter().max())
        .ok_or("no ngram_indexes")?;
    let c = u64::try_from(c).map_err(|_| format!("negative ngram index {c}"))? + 1;
    let shape = match ctx.dims(0) {
        Some(d) if d.len() == 1 => Shape::known(&[c]),
        Some(d) if d.len() == 2 => Shape::of([d[0].clone(), Dim::Known(c)]),
        Some(d) => return Err(format!("input of rank {}, expected [N] or [B, N]", d.len())),
        None => Shape::unknown(),
    };
    Ok(smallvec::smallvec![tensor(Some(DType::F32), shape)])
}

/// ImageDecoder-20: an encoded image to [H, W, C] uint8; H and W are the image's, C is 1 for
/// `Grayscale` and 3 for `RGB` (the default) and `BGR`.
fn image_decoder(ctx: &Ctx) -> Inferred {
    let channels = match ctx.string("pixel_format").as_deref().unwrap_or("RGB") {
        "Grayscale" => 1,
        "RGB" | "BGR" => 3,
        other => return Err(format!("unknown pixel_format `{other}`")),
    };
    let shape = Shape::of([
        data_dependent(ctx, "height"),
        data_dependent(ctx, "width"),
        Dim::Known(channels),
    ]);
    Ok(smallvec::smallvec![tensor(Some(DType::U8), shape)])
}

macro_rules! op {
    ($name:literal, $infer:expr) => {
        // One op per element produced: string handling and decoding are CPU work whose real
        // cost depends on the data; counted only so they are not free.
        OpDef {
            domain: "",
            op: $name,
            family: "strings",
            infer: $infer,
            cost: CostRule::PerOutput(1),
            fold: None,
        }
    };
}

pub static OPS: &[OpDef] = &[
    op!("RegexFullMatch", regex_full_match),
    op!("StringConcat", string_concat),
    op!("StringSplit", string_split),
    op!("StringNormalizer", string_normalizer),
    op!("TfIdfVectorizer", tfidf_vectorizer),
    op!("ImageDecoder", image_decoder),
];
