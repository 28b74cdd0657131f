//! Opening a model file: memory map, zero-copy decode, and external-data paths.

use std::fs::File;
use std::path::{Component, Path, PathBuf};

use bytes::Bytes;

use super::ModelProto;
use crate::error::ReadError;

/// A decoded model whose tensor payloads are slices of the mapped file.
pub struct LoadedModel {
    pub path: PathBuf,
    /// The folder external data is resolved against (canonical).
    pub dir: PathBuf,
    pub proto: ModelProto,
    /// The file's bytes when it stays mapped for the process (`MapLife::Process`): names
    /// found in them are borrowed by the IR instead of copied (`ir::Text`).
    pub lasting: Option<&'static [u8]>,
}

/// How long a model file stays mapped.
#[derive(Clone, Copy, Debug, Default, PartialEq, Eq)]
pub enum MapLife {
    /// Unmapped when the last string or tensor decoded from it is dropped: for callers that
    /// read many models in one process (tests, folders of models).
    #[default]
    Shared,
    /// Mapped until the process exits. The decoded strings then share the map without a
    /// reference count: on a 100k-node graph, taking and releasing one per string cost about
    /// a tenth of reading it. For a process that reads one model and ends (the binary's
    /// `inspect` and `analyze`); each call leaves one mapping behind.
    Process,
}

/// Maps `path` and decodes it. Nothing of the weights is copied or even touched: the decoder
/// slices `raw_data` and packed fields out of the mapping.
pub fn load(path: &Path) -> Result<LoadedModel, ReadError> {
    load_with(path, MapLife::Shared)
}

/// `load`, with the map kept as `life` says.
pub fn load_with(path: &Path, life: MapLife) -> Result<LoadedModel, ReadError> {
    open(path, life, false)
}

/// `load_with` for a caller that only imports the model (`import::import`) and then drops it:
/// the main graph's nodes are checked as `load` checks them but stay in wire form
/// (`GraphProto::node_run`), so that a large graph is never held decoded. Code that edits or
/// writes the proto must use `load`.
pub fn load_for_import(path: &Path, life: MapLife) -> Result<LoadedModel, ReadError> {
    open(path, life, true)
}

fn open(path: &Path, life: MapLife, keep_run: bool) -> Result<LoadedModel, ReadError> {
    let io = |source| ReadError::Io {
        path: path.to_path_buf(),
        source,
    };
    // Checked before opening: opening a FIFO or a device would block or read forever.
    let meta = std::fs::metadata(path).map_err(io)?;
    if meta.is_dir() {
        return Err(ReadError::invalid(path, "is a folder, not a model file"));
    }
    if !meta.is_file() {
        return Err(ReadError::invalid(
            path,
            "is not a regular file (a pipe, socket or device?)",
        ));
    }
    let file = File::open(path).map_err(io)?;
    let meta = file.metadata().map_err(io)?;
    if meta.len() == 0 {
        return Err(ReadError::Empty {
            path: path.to_path_buf(),
        });
    }
    // SAFETY: the map is read-only; tilecut never writes the input. A file truncated by another
    // process while mapped would fault; that is the usual contract of mapped readers.
    let map = unsafe { memmap2::Mmap::map(&file) }.map_err(io)?;
    let (bytes, lasting) = match life {
        MapLife::Shared => (Bytes::from_owner(map), None),
        MapLife::Process => {
            let map: &'static memmap2::Mmap = Box::leak(Box::new(map));
            (Bytes::from_static(map), Some(&map[..]))
        }
    };
    let is_static = life == MapLife::Process;
    let proto = if keep_run {
        super::graph::decode_model_for_import(bytes, is_static)
    } else {
        super::graph::decode_model_with(bytes, is_static)
    }
    .map_err(|e| decode_error(path, e))?;
    if proto.graph.is_none() {
        return Err(ReadError::Decode {
            path: path.to_path_buf(),
            msg: "the file decodes but holds no graph".into(),
        });
    }
    let parent = path
        .parent()
        .filter(|p| !p.as_os_str().is_empty())
        .unwrap_or(Path::new("."));
    let dir = parent.canonicalize().map_err(io)?;
    Ok(LoadedModel {
        path: path.to_path_buf(),
        dir,
        proto,
        lasting,
    })
}

/// Decodes model bytes already in memory (tests, generated models).
pub fn decode(path: &Path, bytes: Bytes, dir: PathBuf) -> Result<LoadedModel, ReadError> {
    if bytes.is_empty() {
        return Err(ReadError::Empty {
            path: path.to_path_buf(),
        });
    }
    let proto = super::graph::decode_model(bytes).map_err(|e| decode_error(path, e))?;
    if proto.graph.is_none() {
        return Err(ReadError::Decode {
            path: path.to_path_buf(),
            msg: "the file decodes but holds no graph".into(),
        });
    }
    Ok(LoadedModel {
        path: path.to_path_buf(),
        dir,
        proto,
        lasting: None,
    })
}

fn decode_error(path: &Path, e: prost::DecodeError) -> ReadError {
    let text = e.to_string();
    let msg = if text.contains("recursion limit") {
        "messages nested deeper than the decoder allows (subgraphs nested far too deep)".to_string()
    } else {
        // prost's text is already one line: "failed to decode Protobuf message: …".
        text.replace("failed to decode Protobuf message: ", "")
    };
    ReadError::Decode {
        path: path.to_path_buf(),
        msg,
    }
}

/// Resolves an external-data `location` inside `dir`. This is a security boundary: absolute
/// paths and anything that leaves `dir` (by `..` or through a symbolic link) are refused.
/// Returns the path and whether the file exists.
pub fn resolve_external(dir: &Path, location: &str) -> Result<(PathBuf, bool), String> {
    if location.is_empty() {
        return Err("empty location".into());
    }
    let rel = Path::new(location);
    if rel.is_absolute() || location.starts_with('/') || location.starts_with('\\') {
        return Err("absolute paths are not allowed; external data must lie in the model's folder".into());
    }
    let mut depth: i64 = 0;
    for c in rel.components() {
        match c {
            Component::Normal(_) => depth += 1,
            Component::CurDir => {}
            Component::ParentDir => {
                depth -= 1;
                if depth < 0 {
                    return Err("the path leaves the model's folder".into());
                }
            }
            Component::RootDir | Component::Prefix(_) => {
                return Err("absolute paths are not allowed".into());
            }
        }
    }
    let joined = dir.join(rel);
    match joined.canonicalize() {
        Ok(real) => {
            if !real.starts_with(dir) {
                return Err("the path leaves the model's folder through a symbolic link".into());
            }
            let present = real.is_file();
            Ok((real, present))
        }
        // A missing file still allows analysis from the declared dims.
        Err(_) => Ok((joined, false)),
    }
}

/// Reads `length` bytes at `offset` of an external file (only for small constants).
pub fn read_external(path: &Path, offset: u64, length: u64) -> std::io::Result<Vec<u8>> {
    use std::io::{Read, Seek, SeekFrom};
    let mut f = File::open(path)?;
    f.seek(SeekFrom::Start(offset))?;
    let mut buf = vec![0u8; usize::try_from(length).unwrap_or(usize::MAX).min(1 << 24)];
    f.read_exact(&mut buf)?;
    Ok(buf)
}
