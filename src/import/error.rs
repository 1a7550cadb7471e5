//! Why an import failed. Every variant names what the user must look at.

use std::path::PathBuf;

use thiserror::Error;

use crate::bundle::BundleError;

/// An import failure; no bundle is written when one occurs.
#[derive(Debug, Error)]
pub enum ImportError {
    #[error("{path}: {source}")]
    Io {
        path: PathBuf,
        source: std::io::Error,
    },
    #[error("{path} is {bytes} bytes, more than the import limit of {limit}")]
    FileTooLarge {
        path: PathBuf,
        bytes: u64,
        limit: u64,
    },
    #[error("not a valid ONNX model: {reason}")]
    NotOnnx { reason: String },
    #[error(
        "ONNX opset {found} of the default domain is not supported (supported: {min} to {max})"
    )]
    Opset { found: i64, min: i64, max: i64 },
    #[error(
        "node {node:?} uses operator {op:?} from domain {domain:?}; only the default ONNX domain is supported"
    )]
    Domain {
        node: String,
        op: String,
        domain: String,
    },
    #[error("node {node:?}: operator {op:?} is not supported; supported operators: {supported}")]
    UnsupportedOp {
        node: String,
        op: String,
        supported: String,
    },
    #[error("node {node:?} ({op}): {problem}")]
    Unsupported {
        node: String,
        op: String,
        problem: String,
    },
    #[error("node {node:?} ({op}): input {index} must be a constant known at import time")]
    NotConstant {
        node: String,
        op: String,
        index: usize,
    },
    #[error("node {node:?} ({op}) reads {value:?}, which nothing produces")]
    MissingValue {
        node: String,
        op: String,
        value: String,
    },
    #[error("tensor {tensor:?}: {problem}")]
    Tensor { tensor: String, problem: String },
    #[error("tensor {tensor:?}: external data {location:?} {problem}")]
    ExternalData {
        tensor: String,
        location: String,
        problem: String,
    },
    #[error("graph input: {problem}")]
    Input { problem: String },
    #[error("graph output: {problem}")]
    Output { problem: String },
    #[error("{what}: {problem}")]
    Options { what: &'static str, problem: String },
    #[error(
        "check samples do not match: max error {max_abs_error:e} exceeds {bound:e} (1e-4 · max(1, max |reference|)); the converted model computes differently from the reference"
    )]
    CheckMismatch { max_abs_error: f32, bound: f32 },
    #[error(transparent)]
    Bundle(#[from] BundleError),
    /// The drift reference could not be read or run into a baseline.
    #[error(transparent)]
    Reference(#[from] crate::drift::ReferenceError),
}
