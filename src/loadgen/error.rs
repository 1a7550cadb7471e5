//! [`LoadgenError`]: why a measurement could not start.
//!
//! Failures of single requests during a run are not errors of the run: they are counted in the
//! report by status code.

use std::path::PathBuf;

use thiserror::Error;

use crate::bundle::BundleError;
use crate::engine::{EngineError, RunError};
use crate::npy::NpyError;

/// Why a load run or a local measurement could not be made.
#[derive(Debug, Error)]
pub enum LoadgenError {
    #[error("{name} must be {allowed}, got {value}")]
    Setting {
        name: &'static str,
        value: String,
        allowed: &'static str,
    },
    #[error("{address:?} is not a server address: {reason}")]
    Address { address: String, reason: String },
    #[error("cannot reach {server}: {reason}")]
    Connect { server: String, reason: String },
    #[error("asking {server} for its catalog: the server answered {code}: {message}")]
    Catalog {
        server: String,
        code: &'static str,
        message: String,
    },
    #[error("the server names no default model; choose one with --model")]
    NoDefaultModel,
    #[error("the server has no model {model:?}")]
    UnknownModel { model: String },
    #[error("model {model:?} has no version able to answer")]
    NoActiveVersion { model: String },
    #[error("model {model:?} has no version {version:?}")]
    UnknownVersion { model: String, version: String },
    #[error("{path}: {source}")]
    Io {
        path: PathBuf,
        source: std::io::Error,
    },
    #[error("{path}: no files to send")]
    NoInputs { path: PathBuf },
    #[error("{path}: more than {limit} files; point --images at a smaller folder")]
    TooManyFiles { path: PathBuf, limit: usize },
    #[error("{path}: inputs exceed {limit} bytes in memory")]
    InputsTooLarge { path: PathBuf, limit: u64 },
    #[error("{path}: {source}")]
    Npy { path: PathBuf, source: NpyError },
    #[error(
        "{path}: a .npy batch needs a batch axis and a sample shape with at least one row, got {shape:?}"
    )]
    NpyShape { path: PathBuf, shape: Vec<usize> },
    #[error(transparent)]
    Bundle(#[from] BundleError),
    #[error(transparent)]
    Engine(#[from] EngineError),
    #[error("batch of {batch}: {source}")]
    Run { batch: usize, source: RunError },
}
