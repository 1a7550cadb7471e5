//! `convoy bench`: load a server with requests (closed or open loop) and report throughput,
//! latency percentiles and errors; or, with `--local`, time the engine alone per batch size.
//!
//! The measuring is in [`crate::loadgen`]; this file turns flags into its settings, draws the
//! progress line and prints the report.

use std::io::{IsTerminal, Write as _};
use std::path::PathBuf;
use std::time::Duration;

use super::CliError;
use crate::loadgen::{
    self, InputSource, LoadConfig, LoadgenError, LocalConfig, Pace, Progress, local, plot,
};

/// Flags of `convoy bench`.
#[derive(Clone, Debug, clap::Args)]
pub struct BenchArgs {
    /// Server address, e.g. 127.0.0.1:7171 or http://host:7171.
    #[arg(long, env = "CONVOY_SERVER", default_value = "127.0.0.1:7171")]
    pub server: String,
    /// Model name (default: the server's default model).
    #[arg(long, default_value = "")]
    pub model: String,
    /// Model version (default: the active one).
    #[arg(long, default_value = "")]
    pub version: String,
    /// Closed loop: this many callers, each sending its next request when the last returned
    /// (the default, with 8 callers).
    #[arg(long, value_name = "N", conflicts_with = "rate")]
    pub concurrency: Option<usize>,
    /// Open loop: requests per second on a fixed schedule, sent whether or not earlier ones
    /// returned; latency counts from each request's due time.
    #[arg(long, value_name = "PER_SECOND")]
    pub rate: Option<f64>,
    /// Seconds measured (default 10; with --local, per batch size, default 2).
    #[arg(long, value_name = "SECS")]
    pub duration: Option<f64>,
    /// Seconds of load before measuring starts, not counted (default 1, or a fifth of
    /// --duration when that is shorter).
    #[arg(long, value_name = "SECS")]
    pub warmup: Option<f64>,
    /// Samples in each request.
    #[arg(long, value_name = "K", default_value_t = 1)]
    pub samples_per_request: usize,
    /// Send the files of this folder as encoded images, round-robin.
    #[arg(long, value_name = "DIR", conflicts_with = "tensors")]
    pub images: Option<PathBuf>,
    /// Send the rows of this .npy array (first axis = samples) as tensors, round-robin.
    /// Without --images or --tensors: random tensors of the model's input shape.
    #[arg(long, value_name = "X.npy")]
    pub tensors: Option<PathBuf>,
    /// Seed of the random inputs.
    #[arg(long, default_value_t = 1)]
    pub seed: u64,
    /// Seconds to wait for one reply before counting it as a "client timeout".
    #[arg(long, value_name = "SECS", default_value_t = 30.0)]
    pub timeout: f64,
    /// Print one JSON object instead of text.
    #[arg(long)]
    pub json: bool,
    #[command(flatten)]
    pub tls: super::TlsArgs,
    /// Also draw the latency distribution into this SVG file.
    #[arg(long, value_name = "FILE.svg")]
    pub plot: Option<PathBuf>,
    /// Time the engine alone on this bundle, no server.
    #[arg(
        long,
        value_name = "BUNDLE",
        conflicts_with_all = ["concurrency", "rate", "images", "tensors", "plot", "warmup"]
    )]
    pub local: Option<PathBuf>,
    /// With --local: batch sizes to measure.
    #[arg(long, value_delimiter = ',', default_value = "1,2,4,8,16,32,64")]
    pub batches: Vec<usize>,
    /// With --local: the engine's threads per batch.
    #[arg(long, default_value_t = 1)]
    pub threads: usize,
    /// With --local: also time each step of the plan at the largest batch size and list the
    /// slowest (with --json, every step).
    #[arg(long, requires = "local")]
    pub steps: bool,
}

/// Width of the progress line, so a shorter line overwrites a longer one completely.
const LINE: usize = 78;
/// Without a terminal, a progress line is written every this many seconds.
const LOG_EVERY: u64 = 10;

pub fn bench(args: &BenchArgs) -> Result<(), CliError> {
    match &args.local {
        Some(bundle) => bench_local(args, bundle.clone()),
        None => bench_server(args),
    }
}

/// Library failures as the command line reports them.
fn cli_error(e: LoadgenError) -> CliError {
    match e {
        LoadgenError::Connect { server, reason } => CliError::Connect { server, reason },
        LoadgenError::Catalog { code, message, .. } => CliError::Rpc {
            code: code.to_string(),
            message,
        },
        LoadgenError::Io { path, source } => CliError::File { path, source },
        LoadgenError::Bundle(e) => CliError::Bundle(e),
        LoadgenError::Engine(e) => CliError::Engine(e),
        other => CliError::Usage(other.to_string()),
    }
}

fn bench_server(args: &BenchArgs) -> Result<(), CliError> {
    let duration =
        loadgen::seconds("--duration", args.duration.unwrap_or(10.0), true).map_err(cli_error)?;
    let warmup = match args.warmup {
        Some(w) => loadgen::seconds("--warmup", w, false).map_err(cli_error)?,
        None => loadgen::default_warmup(duration),
    };
    let timeout = loadgen::seconds("--timeout", args.timeout, true).map_err(cli_error)?;
    let pace = match (args.rate, args.concurrency) {
        (Some(rate_per_s), _) => Pace::Open { rate_per_s },
        (None, Some(concurrency)) => Pace::Closed { concurrency },
        (None, None) => LoadConfig::default().pace,
    };
    let inputs = match (&args.images, &args.tensors) {
        (Some(dir), _) => InputSource::Images(dir.clone()),
        (None, Some(path)) => InputSource::Tensors(path.clone()),
        (None, None) => InputSource::Random { seed: args.seed },
    };
    let (server, tls) = super::tls::url_and_tls(&args.server, &args.tls)?;
    let config = LoadConfig {
        server,
        tls,
        model: args.model.clone(),
        version: args.version.clone(),
        pace,
        duration,
        warmup,
        samples_per_request: args.samples_per_request,
        inputs,
        timeout,
        ..LoadConfig::default()
    };
    let terminal = std::io::stderr().is_terminal();
    let runtime = tokio::runtime::Builder::new_multi_thread()
        .enable_all()
        .thread_name("convoy-bench")
        .build()
        .map_err(CliError::Runtime)?;
    let report = runtime.block_on(async {
        let stop = async {
            // Without a Ctrl-C handler the run simply goes to its end.
            if tokio::signal::ctrl_c().await.is_err() {
                std::future::pending::<()>().await;
            }
        };
        loadgen::run(&config, stop, move |p: &Progress| {
            show_progress(p, terminal)
        })
        .await
    });
    if terminal {
        eprint!("\r{:LINE$}\r", "");
    }
    let report = report.map_err(cli_error)?;
    if let Some(path) = &args.plot {
        std::fs::write(path, plot::render_svg(&report)).map_err(|source| CliError::File {
            path: path.clone(),
            source,
        })?;
        eprintln!("latency plot written to {}", path.display());
    }
    let text = if args.json {
        // Plain data: serialising it cannot fail.
        serde_json::to_string_pretty(&report).expect("report serialises") + "\n"
    } else {
        report.to_text()
    };
    print!("{text}");
    Ok(())
}

/// `[#####.........]  3/6 s  requests 1,234  412/s  errors 0  warm-up`, redrawn in place on a
/// terminal; every few seconds as a plain line otherwise (logs stay short).
fn show_progress(p: &Progress, terminal: bool) {
    let secs = p.elapsed.as_secs();
    if !terminal && (secs == 0 || !secs.is_multiple_of(LOG_EVERY)) {
        return;
    }
    const BAR: usize = 20;
    let fraction = (p.elapsed.as_secs_f64() / p.total.as_secs_f64().max(1e-9)).min(1.0);
    let filled = (fraction * BAR as f64).round() as usize;
    let line = format!(
        "[{}{}] {:>4}/{} s  requests {}  {}/s  errors {}{}",
        "#".repeat(filled),
        ".".repeat(BAR - filled),
        secs,
        p.total.as_secs_f64().ceil(),
        super::with_commas(p.requests),
        loadgen::report::number(p.per_s),
        super::with_commas(p.errors),
        if p.warming_up { "  (warm-up)" } else { "" }
    );
    let mut err = std::io::stderr().lock();
    // Progress is best effort: a closed stderr must not end the run.
    let _ = if terminal {
        write!(err, "\r{line:LINE$}")
    } else {
        writeln!(err, "{line}")
    };
    let _ = err.flush();
}

fn bench_local(args: &BenchArgs, bundle: PathBuf) -> Result<(), CliError> {
    let duration =
        loadgen::seconds("--duration", args.duration.unwrap_or(2.0), true).map_err(cli_error)?;
    let config = LocalConfig {
        bundle,
        batches: args.batches.clone(),
        threads: args.threads,
        duration,
        seed: args.seed,
        steps: args.steps,
    };
    let terminal = std::io::stderr().is_terminal();
    let report = local::run_local(&config, |batch, index, count| {
        if terminal {
            eprint!(
                "\r{:LINE$}",
                format!(
                    "measuring batch {batch} ({} of {count}, {} s each)",
                    index + 1,
                    loadgen::report::number(Duration::as_secs_f64(&config.duration))
                )
            );
        }
    });
    if terminal {
        eprint!("\r{:LINE$}\r", "");
    }
    let report = report.map_err(cli_error)?;
    let text = if args.json {
        // Plain data: serialising it cannot fail.
        serde_json::to_string_pretty(&report).expect("report serialises") + "\n"
    } else {
        report.to_text()
    };
    print!("{text}");
    Ok(())
}
