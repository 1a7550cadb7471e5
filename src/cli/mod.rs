//! The `convoy` command line: argument definitions and one function per command.
//!
//! Commands print for people by default and for programs with `--json`; failures come back as
//! [`CliError`] so `main` can print one clear line and exit non-zero.

mod bench;
mod drift;
mod import;
mod inspect;
mod predict;
mod run;
mod serve;
mod sign;
mod tls;
mod versions;

pub use tls::TlsArgs;
pub(crate) use tls::connect;

use std::path::PathBuf;

use clap::{Parser, Subcommand};
use thiserror::Error;

use crate::bundle::BundleError;
use crate::engine::{EngineError, RunError};
use crate::import::ImportError;
use crate::npy::NpyError;

/// Serve small convolutional image classifiers from plain CPU servers.
#[derive(Debug, Parser)]
#[command(name = "convoy", version, about)]
pub struct Cli {
    #[command(subcommand)]
    pub command: Command,
}

#[derive(Debug, Subcommand)]
pub enum Command {
    /// Show a bundle's model, specs, layers and totals; verify its checksums and replay its
    /// check samples.
    Inspect {
        /// The bundle (.cvb) to read.
        bundle: PathBuf,
        /// Print JSON instead of text.
        #[arg(long)]
        json: bool,
    },
    /// Serve models over gRPC (predict, health, reflection).
    Serve(serve::ServeArgs),
    /// Ask a running server to classify images or .npy tensors.
    Predict(predict::PredictArgs),
    /// Convert an ONNX model exported by a training framework into a bundle.
    Import(Box<import::ImportArgs>),
    /// Measure a server under load, or the engine alone (--local).
    Bench(bench::BenchArgs),
    /// List a server's model versions; activate, retire, roll back (control service).
    Versions(versions::VersionsArgs),
    /// Show how a served model's recent inputs compare with its reference (input drift).
    Drift(drift::DriftArgs),
    /// Make a key pair for signing bundles.
    Key(sign::KeyArgs),
    /// Sign a bundle in place (rewritten atomically) with a secret key.
    Sign(sign::SignArgs),
    /// Run a batch from a NumPy file through a bundle and write the raw graph output.
    Run {
        /// The bundle (.cvb) to run.
        bundle: PathBuf,
        /// Input batch as .npy; its first axis is the batch.
        #[arg(long, short = 'i')]
        input: PathBuf,
        /// Where to write the output batch (.npy).
        #[arg(long, short = 'o')]
        output: PathBuf,
        /// Threads for the batch.
        #[arg(long, default_value_t = 1)]
        threads: usize,
        /// Refuse inputs containing NaN or infinity.
        #[arg(long)]
        reject_non_finite: bool,
    },
}

/// A command's failure, with what the user needs to fix it.
#[derive(Debug, Error)]
pub enum CliError {
    #[error(transparent)]
    Bundle(#[from] BundleError),
    #[error(transparent)]
    Engine(#[from] EngineError),
    #[error(transparent)]
    Npy(#[from] NpyError),
    #[error(transparent)]
    Import(#[from] ImportError),
    #[error(transparent)]
    Run(#[from] RunError),
    #[error(
        "input array has shape {found:?}; the model takes [batch, {}]",
        fmt_dims(expected)
    )]
    InputShape {
        found: Vec<usize>,
        expected: Vec<usize>,
    },
    #[error(
        "check samples do not replay: max error {max_abs_error:e} exceeds {bound:e}; the bundle is damaged or was made for different kernels"
    )]
    CheckFailed { max_abs_error: f32, bound: f32 },
    #[error("writing to standard output: {0}")]
    Stdout(std::io::Error),
    #[error(transparent)]
    Config(#[from] crate::service::ConfigError),
    #[error(transparent)]
    Start(#[from] crate::service::StartError),
    #[error("async runtime: {0}")]
    Runtime(std::io::Error),
    #[error("server: {0}")]
    Serve(String),
    #[error("cannot reach {server}: {reason}")]
    Connect { server: String, reason: String },
    #[error("the server answered {code}: {message}")]
    Rpc { code: String, message: String },
    #[error("{path}: {source}")]
    File {
        path: std::path::PathBuf,
        source: std::io::Error,
    },
    #[error("{0}")]
    Usage(String),
    #[error(transparent)]
    Key(#[from] crate::bundle::signature::KeyError),
    #[error(transparent)]
    Signature(#[from] crate::bundle::signature::SignatureProblem),
}

/// `1234567` as `1,234,567`.
pub(crate) fn with_commas(n: u64) -> String {
    let s = n.to_string();
    let mut out = String::new();
    for (i, c) in s.chars().enumerate() {
        if i > 0 && (s.len() - i).is_multiple_of(3) {
            out.push(',');
        }
        out.push(c);
    }
    out
}

/// A server's refusal, with the status code spelled as the gRPC specification spells it.
pub(crate) fn rpc_error(status: &tonic::Status) -> CliError {
    // A transport failure (a TLS alert, a reset connection) is a status whose message is
    // generic; its reason is in the source chain.
    let message = crate::service::error::with_sources(
        status.message().to_string(),
        std::error::Error::source(status),
    );
    CliError::Rpc {
        code: crate::telemetry::code_name(status.code()).to_string(),
        message,
    }
}

/// Runs a client command's future on a runtime of its own (one thread: a client waits on
/// the network, it does not compute).
pub(crate) fn block_on<T>(
    work: impl std::future::Future<Output = Result<T, CliError>>,
) -> Result<T, CliError> {
    tokio::runtime::Builder::new_current_thread()
        .enable_all()
        .build()
        .map_err(CliError::Runtime)?
        .block_on(work)
}

/// Prints `value` as pretty JSON and a newline.
pub(crate) fn print_json<T: serde::Serialize>(value: &T) -> Result<(), CliError> {
    // Plain data (strings, numbers, lists): serialising it cannot fail.
    let text = serde_json::to_string_pretty(value).expect("plain data serialises");
    println!("{text}");
    Ok(())
}

fn fmt_dims(d: &[usize]) -> String {
    d.iter()
        .map(|x| x.to_string())
        .collect::<Vec<_>>()
        .join(", ")
}

/// Runs one parsed command.
///
/// # Errors
/// The command's failure.
pub fn dispatch(cli: Cli) -> Result<(), CliError> {
    match cli.command {
        Command::Inspect { bundle, json } => inspect::inspect(&bundle, json),
        Command::Import(args) => import::import(&args),
        Command::Serve(args) => serve::serve(&args),
        Command::Predict(args) => predict::predict(&args),
        Command::Bench(args) => bench::bench(&args),
        Command::Versions(args) => versions::versions(&args),
        Command::Drift(args) => drift::drift(&args),
        Command::Key(args) => sign::key(&args),
        Command::Sign(args) => sign::sign(&args),
        Command::Run {
            bundle,
            input,
            output,
            threads,
            reject_non_finite,
        } => run::run(&bundle, &input, &output, threads, reject_non_finite),
    }
}
