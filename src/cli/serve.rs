//! `convoy serve`: settings from defaults, a TOML file, environment variables and flags (each
//! overriding the one before), then the server until Ctrl-C or SIGTERM, which drain it (see
//! [`crate::service::RunningServer::drain`]); a second signal stops at once.

use std::net::SocketAddr;
use std::path::PathBuf;

use super::CliError;
use crate::service::{DrainSettings, ServeConfig, start};

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
    /// Hold MODEL at VERSION whatever higher versions arrive (repeatable).
    #[arg(long = "pin", value_name = "MODEL=VERSION", value_parser = parse_pin)]
    pub pins: Vec<(String, String)>,
    /// Keep the previously active version loaded as an instant rollback target.
    #[arg(long, env = "CONVOY_KEEP_PREVIOUS")]
    pub keep_previous: bool,
    /// Serve the control service (activate, retire, rescan, load) on --control-listen.
    #[arg(long, env = "CONVOY_CONTROL_ENABLED")]
    pub control: bool,
    /// Address of the control service (default 127.0.0.1:7172).
    #[arg(long, env = "CONVOY_CONTROL_LISTEN")]
    pub control_listen: Option<SocketAddr>,
    /// File whose first line is the control service's bearer token (or set
    /// CONVOY_CONTROL_TOKEN).
    #[arg(long, env = "CONVOY_CONTROL_TOKEN_FILE")]
    pub control_token_file: Option<PathBuf>,
    #[command(flatten)]
    pub security: SecurityArgs,
}

/// TLS and signature flags of `convoy serve` (keys tls_* and trusted_keys of the settings).
#[derive(Clone, Debug, clap::Args)]
pub struct SecurityArgs {
    /// PEM certificate chain: serve both gRPC ports over TLS (with --tls-key-file).
    #[arg(long, env = "CONVOY_TLS_CERT_FILE", value_name = "FILE")]
    pub tls_cert_file: Option<PathBuf>,
    /// PEM private key of --tls-cert-file.
    #[arg(long, env = "CONVOY_TLS_KEY_FILE", value_name = "FILE")]
    pub tls_key_file: Option<PathBuf>,
    /// PEM certificate authority: clients must present a certificate it signed.
    #[arg(long, env = "CONVOY_TLS_CLIENT_CA_FILE", value_name = "FILE")]
    pub tls_client_ca_file: Option<PathBuf>,
    /// Load only bundles signed by this public key (repeatable; adds to trusted_keys).
    #[arg(long = "trusted-key", value_name = "FILE")]
    pub trusted_keys: Vec<PathBuf>,
}

impl SecurityArgs {
    fn apply(&self, config: &mut ServeConfig) {
        for (flag, key) in [
            (&self.tls_cert_file, &mut config.tls_cert_file),
            (&self.tls_key_file, &mut config.tls_key_file),
            (&self.tls_client_ca_file, &mut config.tls_client_ca_file),
        ] {
            if let Some(path) = flag {
                *key = Some(path.clone());
            }
        }
        config
            .trusted_keys
            .extend(self.trusted_keys.iter().cloned());
    }
}

fn parse_pin(s: &str) -> Result<(String, String), String> {
    match s.split_once('=') {
        Some((m, v)) if !m.is_empty() && !v.is_empty() => Ok((m.to_string(), v.to_string())),
        _ => Err(format!("{s:?} is not MODEL=VERSION")),
    }
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
    config.pinned_versions.extend(args.pins.iter().cloned());
    config.keep_previous |= args.keep_previous;
    config.control |= args.control;
    if let Some(a) = args.control_listen {
        config.control_listen = a;
    }
    if let Some(f) = &args.control_token_file {
        config.control_token_file = Some(f.clone());
    }
    args.security.apply(&mut config);
    // The token itself only from the environment, never from a flag (flags show in `ps`).
    if let Ok(t) = std::env::var("CONVOY_CONTROL_TOKEN")
        && !t.trim().is_empty()
    {
        config.control_token = Some(t);
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
        let server = start(&config).await?;
        let loaded = server.loads.iter().filter(|l| l.result.is_ok()).count();
        let refused = server.loads.len() - loaded;
        eprintln!(
            "convoy: serving {} model version(s) on {}{}{}",
            loaded,
            server.local_addr,
            if refused > 0 {
                format!(" ({refused} refused; see the log)")
            } else {
                String::new()
            },
            match server.control_addr {
                Some(a) => format!("; control service on {a}"),
                None => String::new(),
            }
        );
        wait_for_signal().await.map_err(CliError::Runtime)?;
        let settings = DrainSettings::from_config(&config);
        tracing::info!(
            grace_ms = config.shutdown_grace_ms,
            notice_ms = config.shutdown_notice_ms,
            "draining: health NOT_SERVING, finishing accepted requests"
        );
        tokio::select! {
            report = server.drain(settings) => {
                tracing::info!(
                    took_ms = report.took.as_millis() as u64,
                    unanswered = report.unanswered,
                    "stopped"
                );
                if report.unanswered > 0 {
                    return Err(CliError::Serve(format!(
                        "{} accepted request(s) were still unanswered when the grace period of {} ms ended",
                        report.unanswered, config.shutdown_grace_ms
                    )));
                }
                Ok(())
            }
            // A second signal: the operator does not want to wait.
            r = wait_for_signal() => {
                r.map_err(CliError::Runtime)?;
                Err(CliError::Serve("stopped by a second signal before the drain finished".into()))
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
