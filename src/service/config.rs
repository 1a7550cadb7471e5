//! Server settings: defaults here, overridden by a TOML file, then by environment variables
//! and flags (the command line handles those two).

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
        if self.max_image_pixels == 0 {
            return Err(ConfigError::Invalid {
                key: "max_image_pixels",
                problem: "must be at least 1".into(),
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
        Ok(())
    }
}
