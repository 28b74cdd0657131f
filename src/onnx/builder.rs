//! Writing ONNX models: typed helpers over the wire types, so sample models, the quantizer and
//! (later) split export produce valid files without hand-assembling protobuf.

use std::path::Path;

use bytes::Bytes;
use prost::Message;

use super::{
    tensor_shape_proto, type_proto, AttributeProto, GraphProto, ModelProto, NodeProto, OperatorSetIdProto, TensorProto,
    TensorShapeProto, TypeProto, ValueInfoProto,
};
use crate::ir::DType;

/// A dimension of a declared input or output.
#[derive(Clone, Debug)]
pub enum DimSpec {
    Fixed(i64),
    Named(String),
}

impl From<i64> for DimSpec {
    fn from(v: i64) -> Self {
        DimSpec::Fixed(v)
    }
}

impl From<&str> for DimSpec {
    fn from(v: &str) -> Self {
        DimSpec::Named(v.to_string())
    }
}

/// Builds a `ValueInfoProto` for a tensor.
pub fn value_info(name: &str, dtype: DType, dims: &[DimSpec]) -> ValueInfoProto {
    let dim = dims
        .iter()
        .map(|d| tensor_shape_proto::Dimension {
            value: Some(match d {
                DimSpec::Fixed(v) => tensor_shape_proto::dimension::Value::DimValue(*v),
                DimSpec::Named(s) => tensor_shape_proto::dimension::Value::DimParam(s.clone()),
            }),
            denotation: String::new(),
        })
        .collect();
    ValueInfoProto {
        name: name.into(),
        r#type: Some(TypeProto {
            value: Some(type_proto::Value::TensorType(type_proto::Tensor {
                elem_type: dtype.onnx_code(),
                shape: Some(TensorShapeProto { dim }),
            })),
            denotation: String::new(),
        }),
        ..Default::default()
    }
}

/// A `ValueInfoProto` from an inferred fact: known dims as values, symbols as params, unknown
/// dims (and unknown ranks) left open. Sequences, optionals, maps and sparse tensors keep their
/// kind (ONNX IR `TypeProto`), so that a piece whose input or output is one stays valid.
pub fn value_info_fact(name: &str, fact: &crate::ir::Fact) -> ValueInfoProto {
    ValueInfoProto {
        name: name.into(),
        r#type: Some(type_of_fact(fact)),
        ..Default::default()
    }
}

fn type_of_fact(fact: &crate::ir::Fact) -> TypeProto {
    use crate::ir::ValueType;
    let elem_type = fact.dtype.map(DType::onnx_code).unwrap_or(0);
    let value = match &fact.value_type {
        ValueType::Tensor => type_proto::Value::TensorType(type_proto::Tensor {
            elem_type,
            shape: shape_proto(&fact.shape),
        }),
        ValueType::SparseTensor => type_proto::Value::SparseTensorType(type_proto::SparseTensor {
            elem_type,
            shape: shape_proto(&fact.shape),
        }),
        ValueType::Sequence(s) => type_proto::Value::SequenceType(Box::new(type_proto::Sequence {
            elem_type: Some(Box::new(type_of_fact(&s.element))),
        })),
        ValueType::Optional(inner) => type_proto::Value::OptionalType(Box::new(type_proto::Optional {
            elem_type: Some(Box::new(type_of_fact(inner))),
        })),
        ValueType::Map(key) => type_proto::Value::MapType(Box::new(type_proto::Map {
            key_type: key.map(DType::onnx_code).unwrap_or(0),
            // The values' type: the fact's element type, as a tensor of any shape.
            value_type: Some(Box::new(type_of_fact(&crate::ir::Fact::tensor(
                fact.dtype,
                crate::ir::Shape::unknown(),
            )))),
        })),
    };
    TypeProto {
        value: Some(value),
        denotation: String::new(),
    }
}

fn shape_proto(shape: &crate::ir::Shape) -> Option<TensorShapeProto> {
    shape.dims().map(|d| TensorShapeProto {
        dim: d
            .iter()
            .map(|x| tensor_shape_proto::Dimension {
                value: match x {
                    crate::ir::Dim::Known(v) => Some(tensor_shape_proto::dimension::Value::DimValue(*v as i64)),
                    // Only plain names go out as dim_param; tilecut's derived and data-dependent
                    // symbols (`a*b`, `k@node`) are ours alone and stay open.
                    crate::ir::Dim::Sym(s) if s.chars().all(|c| c.is_alphanumeric() || c == '_') => {
                        Some(tensor_shape_proto::dimension::Value::DimParam(s.to_string()))
                    }
                    crate::ir::Dim::Sym(_) => None,
                    crate::ir::Dim::Unknown => None,
                },
                denotation: String::new(),
            })
            .collect(),
    })
}

/// A tensor whose payload is `raw` (little-endian, sub-byte types packed low nibble first).
pub fn raw_tensor(name: &str, dtype: DType, dims: &[i64], raw: Vec<u8>) -> TensorProto {
    TensorProto {
        name: name.into(),
        dims: dims.to_vec(),
        data_type: dtype.onnx_code(),
        raw_data: Bytes::from(raw),
        ..Default::default()
    }
}

pub fn f32_tensor(name: &str, dims: &[i64], values: &[f32]) -> TensorProto {
    raw_tensor(
        name,
        DType::F32,
        dims,
        values.iter().flat_map(|v| v.to_le_bytes()).collect(),
    )
}

pub fn i64_tensor(name: &str, dims: &[i64], values: &[i64]) -> TensorProto {
    raw_tensor(
        name,
        DType::I64,
        dims,
        values.iter().flat_map(|v| v.to_le_bytes()).collect(),
    )
}

/// Integer tensor of any integer type, packed as the standard stores it.
pub fn int_tensor(name: &str, dtype: DType, dims: &[i64], values: &[i64]) -> TensorProto {
    let raw: Vec<u8> = match dtype {
        DType::I8 | DType::U8 | DType::Bool => values.iter().map(|&v| v as u8).collect(),
        DType::I16 | DType::U16 => values.iter().flat_map(|&v| (v as u16).to_le_bytes()).collect(),
        DType::I32 | DType::U32 => values.iter().flat_map(|&v| (v as u32).to_le_bytes()).collect(),
        DType::I4 | DType::U4 => values
            .chunks(2)
            .map(|p| (p[0] as u8 & 0x0f) | ((p.get(1).copied().unwrap_or(0) as u8 & 0x0f) << 4))
            .collect(),
        _ => values.iter().flat_map(|v| v.to_le_bytes()).collect(),
    };
    raw_tensor(name, dtype, dims, raw)
}

/// Attribute constructors.
pub mod attr {
    use super::*;

    pub fn int(name: &str, v: i64) -> AttributeProto {
        AttributeProto {
            name: name.into(),
            r#type: 2,
            i: v,
            ..Default::default()
        }
    }
    pub fn float(name: &str, v: f32) -> AttributeProto {
        AttributeProto {
            name: name.into(),
            r#type: 1,
            f: v,
            ..Default::default()
        }
    }
    pub fn ints(name: &str, v: &[i64]) -> AttributeProto {
        AttributeProto {
            name: name.into(),
            r#type: 7,
            ints: v.to_vec(),
            ..Default::default()
        }
    }
    pub fn string(name: &str, v: &str) -> AttributeProto {
        AttributeProto {
            name: name.into(),
            r#type: 3,
            s: Bytes::copy_from_slice(v.as_bytes()),
            ..Default::default()
        }
    }
    pub fn tensor(name: &str, t: TensorProto) -> AttributeProto {
        AttributeProto {
            name: name.into(),
            r#type: 4,
            t: Some(Box::new(t)),
            ..Default::default()
        }
    }
    pub fn graph(name: &str, g: GraphProto) -> AttributeProto {
        AttributeProto {
            name: name.into(),
            r#type: 5,
            g: Some(Box::new(g)),
            ..Default::default()
        }
    }
}

/// Builds one graph (the main graph or a body).
#[derive(Default, Clone)]
pub struct GraphBuilder {
    pub graph: GraphProto,
    counter: usize,
}

impl GraphBuilder {
    pub fn new(name: &str) -> GraphBuilder {
        GraphBuilder {
            graph: GraphProto {
                name: name.into(),
                ..Default::default()
            },
            counter: 0,
        }
    }

    pub fn input(&mut self, name: &str, dtype: DType, dims: &[DimSpec]) -> &mut Self {
        self.graph.input.push(value_info(name, dtype, dims));
        self
    }

    pub fn output(&mut self, name: &str, dtype: DType, dims: &[DimSpec]) -> &mut Self {
        self.graph.output.push(value_info(name, dtype, dims));
        self
    }

    pub fn initializer(&mut self, t: TensorProto) -> &mut Self {
        self.graph.initializer.push(t);
        self
    }

    /// Adds a node named after its op and a counter; returns it for attributes.
    pub fn node(&mut self, op: &str, inputs: &[&str], outputs: &[&str]) -> &mut NodeProto {
        self.counter += 1;
        self.graph.node.push(NodeProto {
            name: format!("{}_{}", op.to_lowercase(), self.counter).into(),
            op_type: op.into(),
            input: inputs.iter().map(|&s| s.into()).collect(),
            output: outputs.iter().map(|&s| s.into()).collect(),
            ..Default::default()
        });
        let last = self.graph.node.len() - 1;
        &mut self.graph.node[last]
    }

    /// A fresh tensor name with a readable stem.
    pub fn fresh(&mut self, stem: &str) -> String {
        self.counter += 1;
        format!("{stem}_{}", self.counter)
    }
}

/// Builds a model: a main graph plus opset imports.
pub struct ModelBuilder {
    pub graph: GraphBuilder,
    pub opsets: Vec<(String, i64)>,
    pub ir_version: i64,
    pub doc: String,
}

impl ModelBuilder {
    pub fn new(name: &str, opset: i64) -> ModelBuilder {
        // IR version paired with the opset (ONNX versioning table): opset 21 → IR 10, 20 → 9,
        // 18/19 → 8, 15–17 → 8 is accepted too; newer opsets take IR 10/11.
        let ir_version = match opset {
            ..=14 => 7,
            15..=19 => 8,
            20 => 9,
            21..=22 => 10,
            _ => 11,
        };
        ModelBuilder {
            graph: GraphBuilder::new(name),
            opsets: vec![(String::new(), opset)],
            ir_version,
            doc: String::new(),
        }
    }

    pub fn build(&self) -> ModelProto {
        ModelProto {
            ir_version: self.ir_version,
            opset_import: self
                .opsets
                .iter()
                .map(|(d, v)| OperatorSetIdProto {
                    domain: d.clone(),
                    version: *v,
                })
                .collect(),
            producer_name: "tilecut".into(),
            producer_version: env!("CARGO_PKG_VERSION").into(),
            doc_string: self.doc.clone(),
            graph: Some(self.graph.graph.clone()),
            ..Default::default()
        }
    }

    pub fn encode(&self) -> Vec<u8> {
        self.build().encode_to_vec()
    }
}

/// Writes bytes atomically: a temporary file in the same folder, then a rename, so a failed
/// write never leaves a partial file.
pub fn write_atomic(path: &Path, bytes: &[u8]) -> std::io::Result<()> {
    use std::io::Write;
    let dir = path
        .parent()
        .filter(|p| !p.as_os_str().is_empty())
        .unwrap_or(Path::new("."));
    let name = path
        .file_name()
        .map(|n| n.to_string_lossy().into_owned())
        .unwrap_or_default();
    let tmp = dir.join(format!(".{name}.tilecut-tmp"));
    let result = (|| {
        let mut f = std::fs::File::create(&tmp)?;
        f.write_all(bytes)?;
        f.sync_all()?;
        std::fs::rename(&tmp, path)
    })();
    if result.is_err() {
        let _ = std::fs::remove_file(&tmp);
    }
    result
}
