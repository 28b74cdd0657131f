//! Input tensors for `verify` given as files: NumPy `.npy` (format versions 1–3, little-endian
//! numeric types, C order) or ONNX `TensorProto` `.pb`. Errors name the file and the problem.

use std::path::{Path, PathBuf};

use crate::ir::{DType, HostTensor};

/// `--feed NAME=FILE`, or `--feed FILE.pb` when the TensorProto carries its input's name.
#[derive(Clone, Debug, PartialEq, Eq)]
pub struct FeedArg {
    pub name: Option<String>,
    pub path: PathBuf,
}

pub fn parse_arg(text: &str) -> Result<FeedArg, String> {
    match text.split_once('=') {
        Some((n, p)) if !n.is_empty() && !p.is_empty() => Ok(FeedArg {
            name: Some(n.to_string()),
            path: PathBuf::from(p),
        }),
        Some(_) => Err(format!("--feed `{text}`: expected NAME=FILE or FILE.pb")),
        None => Ok(FeedArg {
            name: None,
            path: PathBuf::from(text),
        }),
    }
}

/// Reads a feed file; the name is the TensorProto's own for `.pb` files that carry one.
pub fn read(path: &Path) -> Result<(Option<String>, HostTensor), String> {
    let shown = path.display();
    let bytes = crate::text::read_file(path).map_err(|e| format!("{shown}: cannot read: {e}"))?;
    let ext = path
        .extension()
        .and_then(|e| e.to_str())
        .map(str::to_ascii_lowercase)
        .unwrap_or_default();
    match ext.as_str() {
        "npy" => decode_npy(&bytes).map(|t| (None, t)),
        "pb" => crate::onnx::feed::decode_pb(&bytes),
        _ => Err("expected a .npy or .pb file".into()),
    }
    .map_err(|e| format!("{shown}: {e}"))
}

/// NumPy type codes (`descr`) and the element types they hold.
const NPY_TYPES: &[(&str, DType)] = &[
    ("f4", DType::F32),
    ("f8", DType::F64),
    ("f2", DType::F16),
    ("i1", DType::I8),
    ("i2", DType::I16),
    ("i4", DType::I32),
    ("i8", DType::I64),
    ("u1", DType::U8),
    ("u2", DType::U16),
    ("u4", DType::U32),
    ("u8", DType::U64),
    ("b1", DType::Bool),
];

/// Decodes a `.npy` file (the format NumPy documents in `numpy.lib.format`): the magic
/// `\x93NUMPY`, a version, a header length, a Python-literal header dict with `descr`,
/// `fortran_order` and `shape`, then the raw elements.
pub fn decode_npy(b: &[u8]) -> Result<HostTensor, String> {
    if b.len() < 10 || &b[..6] != b"\x93NUMPY" {
        return Err("not a .npy file (no \\x93NUMPY magic)".into());
    }
    let major = b[6];
    let (len, start) = match major {
        1 => (u16::from_le_bytes([b[8], b[9]]) as usize, 10usize),
        2 | 3 => {
            if b.len() < 12 {
                return Err("truncated header".into());
            }
            (u32::from_le_bytes([b[8], b[9], b[10], b[11]]) as usize, 12)
        }
        v => return Err(format!("unsupported .npy format version {v}")),
    };
    let end = start
        .checked_add(len)
        .filter(|&e| e <= b.len())
        .ok_or("truncated header")?;
    let header = std::str::from_utf8(&b[start..end]).map_err(|_| "the header is not text")?;
    let descr = dict_value(header, "descr").ok_or("the header has no `descr`")?;
    let descr = descr.trim_matches(|c| c == '\'' || c == '"');
    let (order, code) = descr.split_at(descr.len().min(1));
    if order == ">" && !matches!(code, "i1" | "u1" | "b1") {
        return Err(format!(
            "big-endian data (`{descr}`) is not supported; save it little-endian"
        ));
    }
    if !matches!(order, "<" | "|" | "=" | ">") {
        return Err(format!("unsupported element type `{descr}`"));
    }
    let dtype = NPY_TYPES
        .iter()
        .find(|(c, _)| *c == code)
        .map(|(_, d)| *d)
        .ok_or_else(|| format!("unsupported element type `{descr}`"))?;
    let fortran = dict_value(header, "fortran_order").ok_or("the header has no `fortran_order`")?;
    if fortran.trim() != "False" {
        return Err("Fortran-ordered arrays are not supported; save a C-ordered array".into());
    }
    let shape = dict_value(header, "shape").ok_or("the header has no `shape`")?;
    let dims: Vec<u64> = shape
        .trim()
        .trim_start_matches('(')
        .trim_end_matches(')')
        .split(',')
        .map(str::trim)
        .filter(|s| !s.is_empty())
        .map(|s| s.parse::<u64>().map_err(|_| format!("bad dim `{s}` in the shape")))
        .collect::<Result<_, _>>()?;
    let t = HostTensor {
        dtype,
        dims,
        bytes: b[end..].to_vec(),
    };
    t.consistent()?;
    if dtype == DType::Bool && t.bytes.iter().any(|&x| x > 1) {
        return Err("a bool element is neither 0 nor 1".into());
    }
    Ok(t)
}

/// The text of `key`'s value in a Python dict literal of simple values (strings, booleans,
/// tuples of integers), as `.npy` headers are.
fn dict_value<'a>(header: &'a str, key: &str) -> Option<&'a str> {
    let k = header
        .find(&format!("'{key}'"))
        .or_else(|| header.find(&format!("\"{key}\"")))?;
    let rest = &header[k + key.len() + 2..];
    let rest = rest.trim_start().strip_prefix(':')?.trim_start();
    let end = if rest.starts_with('(') {
        rest.find(')')? + 1
    } else if let Some(q) = rest.chars().next().filter(|c| *c == '\'' || *c == '"') {
        rest[1..].find(q)? + 2
    } else {
        rest.find([',', '}']).unwrap_or(rest.len())
    };
    Some(&rest[..end])
}

#[cfg(test)]
mod tests {
    use super::*;

    fn npy(header: &str, data: &[u8]) -> Vec<u8> {
        let mut h = header.to_string();
        while (10 + h.len() + 1) % 64 != 0 {
            h.push(' ');
        }
        h.push('\n');
        let mut b = b"\x93NUMPY\x01\x00".to_vec();
        b.extend_from_slice(&(h.len() as u16).to_le_bytes());
        b.extend_from_slice(h.as_bytes());
        b.extend_from_slice(data);
        b
    }

    #[test]
    fn npy_headers_as_numpy_writes_them() {
        // The header NumPy 2 writes for np.zeros((2, 3), np.float32) (numpy.lib.format).
        let b = npy(
            "{'descr': '<f4', 'fortran_order': False, 'shape': (2, 3), }",
            &[0u8; 24],
        );
        let t = decode_npy(&b).expect("decodes");
        assert_eq!((t.dtype, t.dims.clone()), (DType::F32, vec![2, 3]));
        // A 1-D shape is written `(5,)`, a scalar `()`.
        let t = decode_npy(&npy(
            "{'descr': '|u1', 'fortran_order': False, 'shape': (5,), }",
            &[1; 5],
        ))
        .expect("1-D");
        assert_eq!(t.dims, vec![5]);
        let t = decode_npy(&npy("{'descr': '<i8', 'fortran_order': False, 'shape': (), }", &[0; 8])).expect("scalar");
        assert!(t.dims.is_empty());
    }

    #[test]
    fn bad_npy_files_are_errors() {
        let cases: &[(&[u8], &str)] = &[
            (b"", "magic"),
            (b"PK\x03\x04 a zip file", "magic"),
            (
                &npy("{'descr': '>f4', 'fortran_order': False, 'shape': (1,), }", &[0; 4]),
                "big-endian",
            ),
            (
                &npy("{'descr': '<f4', 'fortran_order': True, 'shape': (1,), }", &[0; 4]),
                "Fortran",
            ),
            (
                &npy("{'descr': '<c8', 'fortran_order': False, 'shape': (1,), }", &[0; 8]),
                "unsupported",
            ),
            (
                &npy("{'descr': '<f4', 'fortran_order': False, 'shape': (3,), }", &[0; 4]),
                "need 12 bytes",
            ),
            (
                &npy("{'descr': '|O', 'fortran_order': False, 'shape': (1,), }", &[0; 8]),
                "unsupported",
            ),
            (
                &npy("{'descr': '<f4', 'fortran_order': False, 'shape': (-1,), }", &[]),
                "bad dim",
            ),
            (
                &npy("{'descr': '|b1', 'fortran_order': False, 'shape': (1,), }", &[7]),
                "bool",
            ),
        ];
        for (b, want) in cases {
            let e = decode_npy(b).expect_err("must fail");
            assert!(e.contains(want), "{e} should mention {want}");
        }
        let mut truncated = npy("{'descr': '<f4', 'fortran_order': False, 'shape': (1,), }", &[]);
        truncated.truncate(20);
        assert!(decode_npy(&truncated).is_err());
    }
}
