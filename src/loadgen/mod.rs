//! Load generation: measuring a convoy server under load, or the engine alone.
//!
//! Layout, in the order a measurement runs:
//! - [`inputs`]: what requests carry (a folder of images, rows of a `.npy`, or seeded random
//!   tensors of the model's input shape, asked from the server's catalog);
//! - `drive`: the run against a server — a closed loop (N callers, each sending its next
//!   request when the last one returned) or an open loop (requests due on a fixed schedule,
//!   sent whether or not earlier ones returned); warm-up, stop on request, progress;
//! - [`histogram`]: latencies in log-linear buckets with a stated relative error bound;
//! - [`report`]: counts, throughput, percentiles and the server's own timing, as text or JSON;
//! - [`plot`]: the latency distribution as an SVG drawing;
//! - [`local`]: the engine without a server, batch size by batch size.
//!
//! Latency in the open loop is measured from the moment a request was *due*, not from when it
//! actually left. A server that stalls therefore cannot hide the queue that builds up behind
//! the stall: requests that should have gone out during it are charged the wait. A closed loop
//! cannot show this (its callers stop sending while they wait), which Gil Tene named
//! "coordinated omission" in his talk "How NOT to Measure Latency" (2015).
//!
//! Everything is bounded: run length, callers, rate, requests in flight (beyond the cap a due
//! request is counted as a `client overload` error instead of being delayed), inputs in memory,
//! and the histogram's size.

mod drive;
mod error;
pub mod histogram;
pub mod inputs;
pub mod local;
pub mod plot;
pub mod report;

use std::time::Duration;

pub use drive::{Progress, run};
pub use error::LoadgenError;
pub use inputs::InputSource;
pub use local::{LocalConfig, LocalReport, run_local};
pub use report::LoadReport;

/// Longest measurement (and longest warm-up plus measurement).
pub const MAX_DURATION: Duration = Duration::from_secs(3600);
/// Most concurrent callers of a closed loop.
pub const MAX_CONCURRENCY: usize = 4096;
/// Highest request rate of an open loop, per second.
pub const MAX_RATE: f64 = 100_000.0;
/// Requests of an open loop in flight at once; beyond it a due request is counted as a
/// `client overload` error. Generous: a server this far behind is already failing the test,
/// and the cap keeps the generator's memory bounded (each request holds its samples).
pub const MAX_IN_FLIGHT: usize = 4096;
/// Most samples in one request (servers have their own, usually lower, limit).
pub const MAX_SAMPLES_PER_REQUEST: usize = 1024;
/// Longest a request may take before it is counted as a `client timeout`.
pub const MAX_TIMEOUT: Duration = Duration::from_secs(600);

/// How requests are paced.
#[derive(Clone, Copy, Debug, PartialEq)]
pub enum Pace {
    /// `concurrency` callers, each sending its next request as soon as the last one returned.
    Closed { concurrency: usize },
    /// Request `i` is due at `start + i / rate_per_s` and is sent then, whatever is pending.
    Open { rate_per_s: f64 },
}

/// A run against a server.
#[derive(Clone, Debug)]
pub struct LoadConfig {
    /// `host:port` or a URL (`http://host:port`).
    pub server: String,
    /// Empty: the server's default model.
    pub model: String,
    /// Empty: the active version.
    pub version: String,
    pub pace: Pace,
    /// How long statistics are collected, after the warm-up.
    pub duration: Duration,
    /// Load sent before statistics start, so connections, caches and the server's buffers are
    /// warm; its requests are not counted.
    pub warmup: Duration,
    pub samples_per_request: usize,
    pub inputs: InputSource,
    /// Longest wait for one reply.
    pub timeout: Duration,
    /// Open loop only: requests in flight at once.
    pub max_in_flight: usize,
    /// TLS settings for an `https://` server; none: plain text.
    pub tls: Option<tonic::transport::ClientTlsConfig>,
}

impl Default for LoadConfig {
    fn default() -> Self {
        let duration = Duration::from_secs(10);
        LoadConfig {
            server: "127.0.0.1:7171".into(),
            model: String::new(),
            version: String::new(),
            pace: Pace::Closed { concurrency: 8 },
            duration,
            warmup: default_warmup(duration),
            samples_per_request: 1,
            inputs: InputSource::Random { seed: 1 },
            timeout: Duration::from_secs(30),
            max_in_flight: MAX_IN_FLIGHT,
            tls: None,
        }
    }
}

/// One second, or a fifth of the run when that is shorter: short runs stay short.
pub fn default_warmup(duration: Duration) -> Duration {
    Duration::from_secs(1).min(duration / 5)
}

/// `value` seconds as a [`Duration`], checked to lie in `[0, MAX_DURATION]` (0 excluded when
/// `exclusive_min`).
///
/// # Errors
/// NaN, infinities and values out of range, naming the setting.
pub fn seconds(
    name: &'static str,
    value: f64,
    exclusive_min: bool,
) -> Result<Duration, LoadgenError> {
    let ok = value.is_finite()
        && value <= MAX_DURATION.as_secs_f64()
        && (value > 0.0 || (!exclusive_min && value == 0.0));
    if !ok {
        return Err(LoadgenError::Setting {
            name,
            value: value.to_string(),
            allowed: if exclusive_min {
                "above 0 s and at most 3600 s"
            } else {
                "between 0 s and 3600 s"
            },
        });
    }
    Ok(Duration::from_secs_f64(value))
}

impl LoadConfig {
    /// Checks every bound.
    ///
    /// # Errors
    /// The first setting out of its range.
    pub fn validate(&self) -> Result<(), LoadgenError> {
        let setting = |name, value: String, allowed| {
            Err(LoadgenError::Setting {
                name,
                value,
                allowed,
            })
        };
        match self.pace {
            Pace::Closed { concurrency } if !(1..=MAX_CONCURRENCY).contains(&concurrency) => {
                return setting(
                    "--concurrency",
                    concurrency.to_string(),
                    "between 1 and 4096",
                );
            }
            Pace::Open { rate_per_s } if !(rate_per_s > 0.0 && rate_per_s <= MAX_RATE) => {
                return setting(
                    "--rate",
                    rate_per_s.to_string(),
                    "above 0 and at most 100000 per second",
                );
            }
            _ => {}
        }
        if self.duration.is_zero() || self.duration + self.warmup > MAX_DURATION {
            return setting(
                "--duration plus --warmup",
                format!("{:?} + {:?}", self.duration, self.warmup),
                "above 0 s and at most 3600 s together",
            );
        }
        if !(1..=MAX_SAMPLES_PER_REQUEST).contains(&self.samples_per_request) {
            return setting(
                "--samples-per-request",
                self.samples_per_request.to_string(),
                "between 1 and 1024",
            );
        }
        if self.timeout.is_zero() || self.timeout > MAX_TIMEOUT {
            return setting(
                "--timeout",
                format!("{:?}", self.timeout),
                "above 0 s and at most 600 s",
            );
        }
        if !(1..=MAX_IN_FLIGHT).contains(&self.max_in_flight) {
            return setting(
                "max_in_flight",
                self.max_in_flight.to_string(),
                "between 1 and 4096",
            );
        }
        Ok(())
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn defaults_validate_and_bounds_are_enforced() {
        LoadConfig::default().validate().unwrap();
        let bad = [
            LoadConfig {
                pace: Pace::Closed { concurrency: 0 },
                ..LoadConfig::default()
            },
            LoadConfig {
                pace: Pace::Open {
                    rate_per_s: f64::NAN,
                },
                ..LoadConfig::default()
            },
            LoadConfig {
                duration: Duration::from_secs(3600),
                warmup: Duration::from_secs(1),
                ..LoadConfig::default()
            },
            LoadConfig {
                samples_per_request: 0,
                ..LoadConfig::default()
            },
        ];
        for c in bad {
            assert!(matches!(c.validate(), Err(LoadgenError::Setting { .. })));
        }
        assert!(seconds("--duration", -1.0, true).is_err());
        assert!(seconds("--duration", 0.0, true).is_err());
        assert!(seconds("--warmup", 0.0, false).is_ok());
        assert!(seconds("--duration", 3600.5, true).is_err());
        assert!(seconds("--duration", f64::INFINITY, true).is_err());
        assert_eq!(
            default_warmup(Duration::from_secs(1)),
            Duration::from_millis(200)
        );
        assert_eq!(
            default_warmup(Duration::from_secs(60)),
            Duration::from_secs(1)
        );
    }
}
