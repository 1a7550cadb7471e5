//! Server settings: defaults here, overridden by a TOML file, then by environment variables
//! and flags (the command line handles those two).

use std::collections::BTreeMap;
use std::net::SocketAddr;
use std::path::{Path, PathBuf};

use serde::Deserialize;

/// Everything `convoy serve` can be told. Each field is also a key of the TOML file.
#[derive(Clone, Debug, Deserialize)]
#[serde(default, deny_unknown_fields)]
pub struct ServeConfig {
    /// Address of the gRPC port.
    pub listen: SocketAddr,
    /// Address of the Prometheus metrics endpoint (`GET /metrics`); none: not served.
    pub metrics_listen: Option<SocketAddr>,
    /// Folder of `.cvb` bundles; none: the demo model built into the binary.
    pub models: Option<PathBuf>,
    /// The model an empty request names; none: the only model loaded.
    pub default_model: Option<String>,
    /// Compute threads (each runs one batch at a time).
    pub compute_threads: usize,
    /// Most samples in one batch.
    pub batch_limit: usize,
    /// Longest a batch keeps collecting while every compute thread is busy, in milliseconds.
    pub batch_wait_ms: f64,
    /// Most samples waiting per model version before requests are refused.
    pub queue_limit: usize,
    /// Samples one request may carry.
    pub max_samples_per_request: usize,
    /// Largest gRPC message accepted, in bytes.
    pub max_message_bytes: usize,
    /// Largest encoded image, in bytes.
    pub max_image_bytes: usize,
    /// Largest decoded image, in pixels (checked from the header, before decoding).
    pub max_image_pixels: u64,
    /// Requests of one stream computed at the same time.
    pub stream_concurrency: usize,
    /// HTTP/2 streams (calls) open at once on one client connection; further calls of that
    /// connection wait for one to end.
    pub max_streams_per_connection: u32,
    /// PEM certificate chain of both gRPC ports (predict and control); with `tls_key_file`,
    /// turns TLS on.
    pub tls_cert_file: Option<PathBuf>,
    /// PEM private key of `tls_cert_file`.
    pub tls_key_file: Option<PathBuf>,
    /// PEM certificate(s) of the authority that signs client certificates: when set, every
    /// client must present a certificate it signed (mutual TLS).
    pub tls_client_ca_file: Option<PathBuf>,
    /// Public key files (`convoy key new`); when any is set, only bundles signed by one of
    /// them are loaded.
    pub trusted_keys: Vec<PathBuf>,
    /// Watch the models folder with the operating system's change notifications.
    pub watch_models: bool,
    /// Also look at the models folder this often, in milliseconds (for file systems without
    /// change notifications); 0: never.
    pub rescan_interval_ms: u64,
    /// Model name → version held active whatever higher versions arrive.
    pub pinned_versions: BTreeMap<String, String>,
    /// Keep the previously active version loaded as an instant rollback target.
    pub keep_previous: bool,
    /// Let removing a model's last bundle file stop that model (default: it keeps answering).
    pub retire_last: bool,
    /// Serve the control service (load, activate, retire, rescan).
    pub control: bool,
    /// Address of the control service.
    pub control_listen: SocketAddr,
    /// File holding the control service's bearer token (or set `CONVOY_CONTROL_TOKEN`).
    pub control_token_file: Option<PathBuf>,
    /// Compare served inputs and outputs with the reference in each bundle that has one.
    pub drift_monitoring: bool,
    /// Samples in each model version's drift window.
    pub drift_window: usize,
    /// Significance level of the drift tests (before the Bonferroni correction).
    pub drift_alpha: f64,
    /// Longest a shutdown (SIGTERM, Ctrl-C) waits for accepted requests to be answered before
    /// the process exits anyway, in milliseconds.
    pub shutdown_grace_ms: u64,
    /// At shutdown, health turns NOT_SERVING at once; new requests are still answered for this
    /// long (so that balancers watching health move away first), then refused. Milliseconds;
    /// 0: refuse at once.
    pub shutdown_notice_ms: u64,
    /// The token itself, when given by the environment or in-process; never read from TOML,
    /// so that settings files hold no secret.
    #[serde(skip)]
    pub control_token: Option<String>,
}

impl Default for ServeConfig {
    fn default() -> Self {
        ServeConfig {
            // Loopback by default: exposing the port is a decision, not an accident.
            listen: SocketAddr::from(([127, 0, 0, 1], 7171)),
            metrics_listen: None,
            models: None,
            default_model: None,
            compute_threads: std::thread::available_parallelism().map_or(2, |n| n.get()),
            batch_limit: 8,
            batch_wait_ms: 2.0,
            queue_limit: 256,
            max_samples_per_request: 64,
            max_message_bytes: 32 << 20,
            max_image_bytes: 16 << 20,
            max_image_pixels: 40_000_000,
            stream_concurrency: 16,
            // Enough for a client multiplexing many callers over one connection (the bench's
            // closed loop uses up to this many), few enough that one connection cannot hold an
            // unbounded number of calls' buffers; more callers can open more connections.
            max_streams_per_connection: 64,
            tls_cert_file: None,
            tls_key_file: None,
            tls_client_ca_file: None,
            trusted_keys: Vec::new(),
            watch_models: true,
            // Notifications usually come first; a scan is a folder listing and one stat per
            // file, cheap enough every two seconds.
            rescan_interval_ms: 2000,
            pinned_versions: BTreeMap::new(),
            keep_previous: false,
            retire_last: false,
            control: false,
            // Loopback: the control service changes what is served; exposing it is a decision.
            control_listen: SocketAddr::from(([127, 0, 0, 1], 7172)),
            control_token_file: None,
            drift_monitoring: true,
            // See `drift::WindowConfig::default` for why 500.
            drift_window: 500,
            // Common practice for a single test; the report divides it by the number of
            // statistics tested (Bonferroni).
            drift_alpha: 0.05,
            // Below Kubernetes' default terminationGracePeriodSeconds (30 s, from memory), so
            // the process ends on its own before it would be killed.
            shutdown_grace_ms: 25_000,
            shutdown_notice_ms: 0,
            control_token: None,
        }
    }
}

/// Why settings could not be read.
#[derive(Debug, thiserror::Error)]
pub enum ConfigError {
    #[error("{path}: {source}")]
    Io {
        path: PathBuf,
        source: std::io::Error,
    },
    #[error("{path}: {source}")]
    Toml {
        path: PathBuf,
        source: toml::de::Error,
    },
    #[error("setting {key}: {problem}")]
    Invalid { key: &'static str, problem: String },
    #[error(
        "the control service needs a bearer token of at least {min} bytes: set control_token_file or CONVOY_CONTROL_TOKEN"
    )]
    NoControlToken { min: usize },
}

impl ServeConfig {
    /// Reads a TOML file; keys left out keep their defaults.
    ///
    /// # Errors
    /// Unreadable file, invalid TOML, unknown keys.
    pub fn from_file(path: &Path) -> Result<ServeConfig, ConfigError> {
        let text = std::fs::read_to_string(path).map_err(|source| ConfigError::Io {
            path: path.to_path_buf(),
            source,
        })?;
        toml::from_str(&text).map_err(|source| ConfigError::Toml {
            path: path.to_path_buf(),
            source,
        })
    }

    /// Checks that every limit is usable.
    ///
    /// # Errors
    /// A zero where at least one is needed.
    pub fn validate(&self) -> Result<(), ConfigError> {
        self.validate_limits()?;
        self.validate_tls()?;
        self.validate_inputs_and_timing()?;
        if self.control {
            let token = self.control_token()?;
            if token.is_none_or(|t| t.len() < crate::rollout::control::MIN_TOKEN_LEN) {
                return Err(ConfigError::NoControlToken {
                    min: crate::rollout::control::MIN_TOKEN_LEN,
                });
            }
        }
        Ok(())
    }

    /// Sizes, counts and the batching wait.
    fn validate_limits(&self) -> Result<(), ConfigError> {
        let positive = [
            ("compute_threads", self.compute_threads),
            ("batch_limit", self.batch_limit),
            ("queue_limit", self.queue_limit),
            ("max_samples_per_request", self.max_samples_per_request),
            ("max_message_bytes", self.max_message_bytes),
            ("max_image_bytes", self.max_image_bytes),
            ("stream_concurrency", self.stream_concurrency),
        ];
        for (key, v) in positive {
            if v == 0 {
                return Err(ConfigError::Invalid {
                    key,
                    problem: "must be at least 1".into(),
                });
            }
        }
        if !(self.batch_wait_ms.is_finite() && (0.0..=10_000.0).contains(&self.batch_wait_ms)) {
            return Err(ConfigError::Invalid {
                key: "batch_wait_ms",
                problem: format!("{} is not between 0 and 10000", self.batch_wait_ms),
            });
        }
        if self.batch_limit > 1024 {
            return Err(ConfigError::Invalid {
                key: "batch_limit",
                problem: "at most 1024".into(),
            });
        }
        if self.max_streams_per_connection == 0 {
            return Err(ConfigError::Invalid {
                key: "max_streams_per_connection",
                problem: "must be at least 1".into(),
            });
        }
        Ok(())
    }

    /// Certificate, key and client CA go together.
    fn validate_tls(&self) -> Result<(), ConfigError> {
        match (&self.tls_cert_file, &self.tls_key_file) {
            (Some(_), None) => {
                return Err(ConfigError::Invalid {
                    key: "tls_key_file",
                    problem: "tls_cert_file is set, its private key is not".into(),
                });
            }
            (None, Some(_)) => {
                return Err(ConfigError::Invalid {
                    key: "tls_cert_file",
                    problem: "tls_key_file is set, the certificate is not".into(),
                });
            }
            _ => {}
        }
        if self.tls_client_ca_file.is_some() && self.tls_cert_file.is_none() {
            return Err(ConfigError::Invalid {
                key: "tls_client_ca_file",
                problem: "client certificates need TLS: set tls_cert_file and tls_key_file".into(),
            });
        }
        Ok(())
    }

    /// Image size, drift window and test level, request size against the queue, shutdown.
    fn validate_inputs_and_timing(&self) -> Result<(), ConfigError> {
        if self.max_image_pixels == 0 {
            return Err(ConfigError::Invalid {
                key: "max_image_pixels",
                problem: "must be at least 1".into(),
            });
        }
        if !(50..=100_000).contains(&self.drift_window) {
            return Err(ConfigError::Invalid {
                key: "drift_window",
                problem: format!("{} is not between 50 and 100000", self.drift_window),
            });
        }
        if !(self.drift_alpha > 0.0 && self.drift_alpha < 0.5) {
            return Err(ConfigError::Invalid {
                key: "drift_alpha",
                problem: format!("{} is not between 0 and 0.5", self.drift_alpha),
            });
        }
        if self.max_samples_per_request > self.queue_limit {
            return Err(ConfigError::Invalid {
                key: "max_samples_per_request",
                problem: format!(
                    "{} exceeds queue_limit {}: such a request could never be queued",
                    self.max_samples_per_request, self.queue_limit
                ),
            });
        }
        if self.shutdown_notice_ms >= self.shutdown_grace_ms {
            return Err(ConfigError::Invalid {
                key: "shutdown_notice_ms",
                problem: format!(
                    "{} must be below shutdown_grace_ms {}",
                    self.shutdown_notice_ms, self.shutdown_grace_ms
                ),
            });
        }
        Ok(())
    }

    /// Whether both gRPC ports use TLS.
    pub fn tls_enabled(&self) -> bool {
        self.tls_cert_file.is_some() && self.tls_key_file.is_some()
    }

    /// The control token: `control_token` if set, else the first line of
    /// `control_token_file`, trimmed.
    ///
    /// # Errors
    /// An unreadable token file.
    pub fn control_token(&self) -> Result<Option<String>, ConfigError> {
        if let Some(t) = &self.control_token {
            return Ok(Some(t.trim().to_string()));
        }
        match &self.control_token_file {
            Some(path) => {
                let text = std::fs::read_to_string(path).map_err(|source| ConfigError::Io {
                    path: path.clone(),
                    source,
                })?;
                Ok(Some(text.lines().next().unwrap_or("").trim().to_string()))
            }
            None => Ok(None),
        }
    }
}
