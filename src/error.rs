//! Errors that stop the tool. What a model *contains* (an unknown op, a missing shape) is a
//! finding returned beside the result, never one of these.

use std::path::PathBuf;

/// Why a model file could not be read or imported. Every message names the file.
#[derive(Debug, thiserror::Error)]
pub enum ReadError {
    #[error("{path}: cannot read: {source}")]
    Io { path: PathBuf, source: std::io::Error },
    #[error("{path}: empty file, not an ONNX model")]
    Empty { path: PathBuf },
    #[error("{path}: not a valid ONNX model: {msg}")]
    Decode { path: PathBuf, msg: String },
    #[error("{path}: {msg}")]
    Invalid { path: PathBuf, msg: String },
    #[error("{path}: external data of tensor `{tensor}` at `{location}` refused: {why}")]
    ExternalData {
        path: PathBuf,
        tensor: String,
        location: String,
        why: String,
    },
}

impl ReadError {
    pub fn invalid(path: &std::path::Path, msg: impl Into<String>) -> ReadError {
        ReadError::Invalid {
            path: path.to_path_buf(),
            msg: msg.into(),
        }
    }
}

/// A bad `--dim` / `--input` override or similar user-supplied setting.
#[derive(Debug, thiserror::Error)]
#[error("{0}")]
pub struct SettingError(pub String);
