//! Why a bundle could not be read or written.

use std::path::PathBuf;

use thiserror::Error;

use super::version::VersionError;
use crate::graph::shapes::GraphError;

/// What is wrong with one tensor entry.
#[derive(Clone, Debug, PartialEq, Eq, Error)]
pub enum TensorProblem {
    #[error("appears twice in the tensor index")]
    Duplicate,
    #[error("offset {offset} is not a multiple of {align}")]
    Misaligned { offset: u64, align: u64 },
    #[error("bytes {offset}..{offset}+{length} lie outside the {data_len}-byte data section")]
    OutOfBounds {
        offset: u64,
        length: u64,
        data_len: u64,
    },
    #[error("length {length} bytes does not match its shape ({expected} bytes)")]
    LengthMismatch { length: u64, expected: u64 },
    #[error("shape {shape:?} has {elements} elements, more than the limit {limit}")]
    TooLarge {
        shape: Vec<usize>,
        elements: u128,
        limit: u64,
    },
    #[error("overlaps tensor {other:?}")]
    Overlap { other: String },
    #[error("contains a non-finite value at element {index}")]
    NonFinite { index: usize },
}

/// Every way reading or writing a bundle can fail. Each names the problem; none is a panic.
#[derive(Debug, Error)]
pub enum BundleError {
    #[error("{path}: {source}")]
    Io {
        path: PathBuf,
        source: std::io::Error,
    },
    #[error("truncated bundle: the {what} needs {needed} bytes, the file has {available}")]
    Truncated {
        what: &'static str,
        needed: u64,
        available: u64,
    },
    #[error("not a convoy bundle: magic bytes are {found:02x?}")]
    BadMagic { found: [u8; 8] },
    #[error(
        "bundle format version {found} is not supported (this convoy reads version {supported})"
    )]
    UnsupportedFormat { found: u32, supported: u32 },
    #[error("unknown header flags {flags:#x}")]
    UnknownFlags { flags: u32 },
    #[error("manifest length {length} exceeds the limit of {limit} bytes")]
    ManifestTooLarge { length: u64, limit: u64 },
    #[error("file is {actual} bytes but its header describes {expected}")]
    SizeMismatch { expected: u64, actual: u64 },
    #[error("manifest checksum mismatch: header says {expected}, manifest hashes to {actual}")]
    ManifestChecksum { expected: String, actual: String },
    #[error("manifest is not valid: {source}")]
    ManifestJson { source: serde_json::Error },
    #[error("node {node:?} uses unknown op {op:?}")]
    UnknownOp { node: String, op: String },
    #[error("data checksum mismatch: manifest says {expected}, data hashes to {actual}")]
    DataChecksum { expected: String, actual: String },
    #[error("tensor {tensor:?} {problem}")]
    Tensor {
        tensor: String,
        problem: TensorProblem,
    },
    #[error("invalid model name {name:?}: {reason}")]
    BadName { name: String, reason: &'static str },
    #[error(transparent)]
    Version(#[from] VersionError),
    /// Boxed: graph errors carry several names and shapes, and every `Result` of the reader
    /// would otherwise be that large.
    #[error("invalid graph: {0}")]
    Graph(Box<GraphError>),
    #[error("{field} is inconsistent: {problem}")]
    Spec {
        field: &'static str,
        problem: String,
    },
    #[error("check samples: {problem}")]
    CheckSamples { problem: String },
    #[error("signature block: {problem}")]
    SignatureBlock { problem: &'static str },
}

impl From<GraphError> for BundleError {
    fn from(e: GraphError) -> Self {
        BundleError::Graph(Box::new(e))
    }
}
