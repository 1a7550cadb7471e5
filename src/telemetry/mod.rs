//! Operator metrics in the Prometheus text format: what the server records, and `GET /metrics`.
//!
//! Layout:
//! - [`names`]: every metric's name, help text, labels and histogram buckets;
//! - [`record`]: the recording functions (re-exported here), cheap and callable from any thread;
//! - `endpoint`: the HTTP endpoint, on its own thread and runtime.
//!
//! A measurement travels: a recording function → the `metrics` facade → the process-wide
//! Prometheus recorder of `metrics-exporter-prometheus` → rendered as text on each scrape.
//!
//! Config → build → handle: [`install`] takes the server's `metrics_listen` setting and returns
//! a [`TelemetryHandle`] that owns the endpoint. The recorder itself is the one piece of
//! process-wide state: the `metrics` facade holds exactly one recorder per process, so it is
//! installed by the first [`install`] and shared by every later one (tests start several
//! servers in one process), while each call with an address binds an endpoint of its own.
//!
//! | metric | type | labels |
//! |---|---|---|
//! | `convoy_requests_total` | counter | model, version, code |
//! | `convoy_samples_total` | counter | model, version, code |
//! | `convoy_request_duration_seconds` | histogram | model |
//! | `convoy_queue_wait_seconds` | histogram | model, version |
//! | `convoy_batch_compute_seconds` | histogram | model, version |
//! | `convoy_batch_size` | histogram | model, version |
//! | `convoy_batches_total` | counter | model, version, outcome |
//! | `convoy_queued_samples` | gauge | model, version |
//! | `convoy_requests_in_flight` | gauge | |
//! | `convoy_image_prepare_seconds` | histogram | model |
//! | `convoy_model_loads_total` | counter | model, outcome |
//! | `convoy_model_active_version` | gauge | model, version |
//! | `convoy_model_swap_seconds` | histogram | model |
//! | `convoy_requests_shed_total` | counter | model, version, reason |
//! | `convoy_drift_samples_total` | counter | model, version |
//! | `convoy_drift_values_total` | counter | model, version, statistic, bin |
//! | `convoy_drift_out_of_range_total` | counter | model, version, statistic |
//! | `convoy_drift_non_finite_total` | counter | model, version, statistic |
//! | `convoy_drift_predictions_total` | counter | model, version, class |
//! | `convoy_drift_psi` | gauge | model, version, statistic |
//! | `convoy_drift_p_value` | gauge | model, version, statistic |
//! | `convoy_drift_verdict` | gauge | model, version, statistic |
//! | `convoy_drift_window_samples` | gauge | model, version |

pub mod drift;
mod endpoint;
pub mod names;
pub mod record;

use std::net::SocketAddr;
use std::sync::OnceLock;
use std::time::Duration;

use metrics_exporter_prometheus::PrometheusHandle;

pub use endpoint::{CONTENT_TYPE, PATH};
pub use names::{SHED_CANCELLED, SHED_DEADLINE, SHED_QUEUE_FULL};
pub use record::{
    BatchOutcome, InFlight, UNKNOWN, active_version, batch_computed, code_name, image_prepared,
    in_flight, queue_depth, queue_wait, request_finished, shed, version_loaded,
};

/// Why metrics could not be served.
#[derive(Debug, thiserror::Error)]
pub enum TelemetryError {
    #[error("cannot serve metrics on {addr}: {source}")]
    Bind {
        addr: SocketAddr,
        source: std::io::Error,
    },
    #[error("cannot start the metrics thread: {source}")]
    Thread { source: std::io::Error },
    /// Another library installed its own `metrics` recorder in this process first, so convoy's
    /// measurements go there and there is nothing to serve.
    #[error("another metrics recorder is installed in this process; convoy cannot serve metrics")]
    RecorderTaken,
}

/// What [`install`] started. Dropping it stops this server's metrics endpoint (the recorder
/// stays: it belongs to the process).
#[derive(Debug)]
pub struct TelemetryHandle {
    /// Where `GET /metrics` answers; `None` when no address was configured.
    pub metrics_addr: Option<SocketAddr>,
    _endpoint: Option<endpoint::Endpoint>,
}

/// How often histogram samples are folded into their buckets between scrapes, so memory stays
/// bounded when nobody scrapes. The exporter's own default interval (5 s).
const UPKEEP_INTERVAL: Duration = Duration::from_secs(5);

/// The process-wide recorder's handle; `None` when another recorder was there first.
static RECORDER: OnceLock<Option<PrometheusHandle>> = OnceLock::new();

fn recorder() -> Option<&'static PrometheusHandle> {
    RECORDER
        .get_or_init(|| {
            let recorder = names::builder().build_recorder();
            let handle = recorder.handle();
            if let Err(e) = metrics::set_global_recorder(recorder) {
                tracing::warn!(error = %e, "metrics recorder not installed");
                return None;
            }
            names::describe_all();
            metrics::gauge!(names::REQUESTS_IN_FLIGHT).increment(0.0);
            let upkeep = handle.clone();
            let spawned = std::thread::Builder::new()
                .name("convoy-metrics-upkeep".into())
                .spawn(move || {
                    loop {
                        std::thread::sleep(UPKEEP_INTERVAL);
                        upkeep.run_upkeep();
                    }
                });
            if let Err(e) = spawned {
                // Scrapes still fold samples in; only an unscraped server grows.
                tracing::warn!(error = %e, "metrics upkeep thread not started");
            }
            Some(handle)
        })
        .as_ref()
}

/// Installs the process-wide recorder (first call only) and, when `metrics_listen` is given,
/// serves `GET /metrics` there (port 0 picks a free port; the handle tells which).
///
/// Calling it again — a second server in the same process — reuses the recorder and binds
/// another endpoint.
///
/// # Errors
/// With an address: it cannot be bound, the endpoint thread cannot start, or another
/// `metrics` recorder was installed in this process first. Without one, never.
pub fn install(metrics_listen: Option<SocketAddr>) -> Result<TelemetryHandle, TelemetryError> {
    let handle = recorder();
    let Some(addr) = metrics_listen else {
        return Ok(TelemetryHandle {
            metrics_addr: None,
            _endpoint: None,
        });
    };
    let handle = handle.ok_or(TelemetryError::RecorderTaken)?;
    let endpoint = endpoint::Endpoint::start(addr, handle.clone())?;
    Ok(TelemetryHandle {
        metrics_addr: Some(endpoint.local_addr()),
        _endpoint: Some(endpoint),
    })
}
