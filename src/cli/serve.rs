//! `convoy serve`: settings from defaults, a TOML file, environment variables and flags (each
//! overriding the one before), then the server until Ctrl-C or SIGTERM.

use std::net::SocketAddr;
use std::path::PathBuf;

use super::CliError;
use crate::service::{ServeConfig, start};

/// Flags of `convoy serve`; each also reads an environment variable.
#[derive(Clone, Debug, clap::Args)]
pub struct ServeArgs {
    /// Folder of .cvb bundles to serve (default: the demo model built into the binary).
    #[arg(long, env = "CONVOY_MODELS")]
    pub models: Option<PathBuf>,
    /// gRPC address (default 127.0.0.1:7171).
    #[arg(long, env = "CONVOY_LISTEN")]
    pub listen: Option<SocketAddr>,
    /// Serve Prometheus metrics (GET /metrics) on this address (default: not served).
    #[arg(long, env = "CONVOY_METRICS_LISTEN")]
    pub metrics_listen: Option<SocketAddr>,
    /// TOML settings file; flags and environment variables override it.
    #[arg(long, env = "CONVOY_CONFIG")]
    pub config: Option<PathBuf>,
    /// The model an empty request names.
    #[arg(long, env = "CONVOY_DEFAULT_MODEL")]
    pub default_model: Option<String>,
    /// Compute threads.
    #[arg(long, env = "CONVOY_COMPUTE_THREADS")]
    pub compute_threads: Option<usize>,
}

fn resolve(args: &ServeArgs) -> Result<ServeConfig, CliError> {
    let mut config = match &args.config {
        Some(path) => ServeConfig::from_file(path)?,
        None => ServeConfig::default(),
    };
    if let Some(m) = &args.models {
        config.models = Some(m.clone());
    }
    if let Some(l) = args.listen {
        config.listen = l;
    }
    if let Some(m) = args.metrics_listen {
        config.metrics_listen = Some(m);
    }
    if let Some(d) = &args.default_model {
        config.default_model = Some(d.clone());
    }
    if let Some(t) = args.compute_threads {
        config.compute_threads = t;
    }
    config.validate()?;
    Ok(config)
}

pub fn serve(args: &ServeArgs) -> Result<(), CliError> {
    let config = resolve(args)?;
    let runtime = tokio::runtime::Builder::new_multi_thread()
        .enable_all()
        .thread_name("convoy-io")
        .build()
        .map_err(CliError::Runtime)?;
    runtime.block_on(async move {
        let mut server = start(&config).await?;
        let loaded = server.loads.iter().filter(|l| l.result.is_ok()).count();
        let refused = server.loads.len() - loaded;
        eprintln!(
            "convoy: serving {} model version(s) on {}{}",
            loaded,
            server.local_addr,
            if refused > 0 {
                format!(" ({refused} refused; see the log)")
            } else {
                String::new()
            }
        );
        let stop = server.take_shutdown();
        tokio::select! {
            r = wait_for_signal() => {
                r.map_err(CliError::Runtime)?;
                tracing::info!("shutting down");
                if let Some(tx) = stop {
                    let _ = tx.send(());
                }
                server.wait().await.map_err(|e| CliError::Serve(e.to_string()))
            }
        }
    })
}

/// Ctrl-C, or SIGTERM on Unix (what service managers send).
async fn wait_for_signal() -> std::io::Result<()> {
    #[cfg(unix)]
    {
        let mut term = tokio::signal::unix::signal(tokio::signal::unix::SignalKind::terminate())?;
        tokio::select! {
            r = tokio::signal::ctrl_c() => r,
            _ = term.recv() => Ok(()),
        }
    }
    #[cfg(not(unix))]
    {
        tokio::signal::ctrl_c().await
    }
}
