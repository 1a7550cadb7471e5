//! The gRPC server: the `Predictor` service, the standard health service and reflection.
//!
//! A request travels proto → [`predictor`] (resolve the model in the [`Registry`], prepare
//! samples with [`crate::prepare`]) → [`Scheduler`] (compute threads) → back, and
//! [`error::ServiceError`] turns failures into gRPC status codes in one place.
//!
//! [`start`] loads the models (through [`crate::rollout`], which also keeps watching the models
//! folder and serves the control service when configured), binds, and serves until the
//! returned handle is shut down. Both ports share [`tls`]'s transport settings: TLS or mutual
//! TLS when configured, and the per-connection stream limit.

pub mod api;
pub mod config;
pub mod drain;
pub mod error;
pub mod predictor;
pub mod tls;

use std::net::SocketAddr;
use std::sync::Arc;
use std::time::Duration;

use tokio::net::TcpListener;
use tokio::sync::oneshot;

pub use config::{ConfigError, ServeConfig};

use crate::bundle::signature::PublicKey;
use crate::drift::WindowConfig;
use crate::engine::EngineConfig;
use crate::prepare::ImageLimits;
use crate::registry::{LoadOutcome, LoadSettings, Policy, Registry};
use crate::rollout::control::{ControlService, TokenCheck};
use crate::rollout::watch::{self, WatchConfig, WatchHandle};
use crate::rollout::{ChangeReport, Rollout, RolloutError};
use crate::scheduler::{Scheduler, SchedulerConfig};
use crate::telemetry::{self, TelemetryError, TelemetryHandle};
use predictor::{PredictorService, RequestLimits, Shared};

/// How long a drain lets the transport close its connections after the last reply.
const CLOSE_WAIT: Duration = Duration::from_secs(1);

/// The demo model, built into the binary so a fresh checkout can serve something.
pub const DEMO_BUNDLE: &[u8] = include_bytes!(concat!(
    env!("CARGO_MANIFEST_DIR"),
    "/models/stamped-parts.cvb"
));

/// Why the server could not start.
#[derive(Debug, thiserror::Error)]
pub enum StartError {
    #[error(transparent)]
    Config(#[from] ConfigError),
    #[error("cannot listen on {addr}: {source}")]
    Bind {
        addr: SocketAddr,
        source: std::io::Error,
    },
    #[error("cannot read the models folder {path}: {source}")]
    Models {
        path: std::path::PathBuf,
        source: std::io::Error,
    },
    #[error("reflection service: {0}")]
    Reflection(String),
    #[error(transparent)]
    Telemetry(#[from] TelemetryError),
    #[error("TLS file {path}: {problem}")]
    TlsFile {
        path: std::path::PathBuf,
        problem: String,
    },
    #[error("TLS identity ({cert}, {key}) refused: {reason}")]
    TlsSetup {
        cert: std::path::PathBuf,
        key: std::path::PathBuf,
        reason: String,
    },
    #[error(
        "the control service would listen on {addr}, beyond loopback, without TLS: its bearer token would cross the network in clear; set tls_cert_file and tls_key_file, or a loopback control_listen"
    )]
    ControlInClear { addr: SocketAddr },
    #[error("trusted_keys: {0}")]
    TrustedKey(#[from] crate::bundle::signature::KeyError),
}

/// A running server.
pub struct RunningServer {
    pub local_addr: SocketAddr,
    /// The control service's address, when it is served.
    pub control_addr: Option<SocketAddr>,
    pub registry: Arc<Registry>,
    pub rollout: Arc<Rollout>,
    /// What the first look at the models (folder or built-in demo) loaded and refused.
    pub loads: Vec<LoadOutcome>,
    /// The metrics endpoint (its address, if served); stops with the server.
    pub telemetry: TelemetryHandle,
    /// The models folder's watcher; stops with the server.
    watcher: Option<WatchHandle>,
    control: Option<ControlServer>,
    shared: Arc<Shared>,
    shutdown: Option<oneshot::Sender<()>>,
    task: tokio::task::JoinHandle<Result<(), tonic::transport::Error>>,
}

/// How long a drain may take, and how much notice balancers get.
#[derive(Clone, Copy, Debug)]
pub struct DrainSettings {
    /// Longest wait for accepted requests (from the start of the drain).
    pub grace: Duration,
    /// Health NOT_SERVING, but new requests still answered, for this long first.
    pub notice: Duration,
}

impl DrainSettings {
    pub fn from_config(config: &ServeConfig) -> DrainSettings {
        DrainSettings {
            grace: Duration::from_millis(config.shutdown_grace_ms),
            notice: Duration::from_millis(config.shutdown_notice_ms),
        }
    }
}

/// What a drain did.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub struct DrainReport {
    /// Accepted requests still unanswered when the grace period ended (0: none was lost).
    pub unanswered: usize,
    /// From the start of the drain to the server's end.
    pub took: Duration,
}

impl RunningServer {
    /// Shuts down without losing an accepted request: health turns NOT_SERVING at once (and
    /// stays so), new predict requests are answered for `notice` and refused with
    /// UNAVAILABLE after it, requests already accepted — queued or computing — finish, then
    /// the transport closes its connections. Returns within `grace` of the call (plus a
    /// short close of the connections), whatever clients do.
    pub async fn drain(mut self, settings: DrainSettings) -> DrainReport {
        let started = tokio::time::Instant::now();
        let deadline = started + settings.grace;
        self.rollout.stop_serving().await;
        // No version changes while draining.
        self.watcher = None;
        tokio::time::sleep_until((started + settings.notice).min(deadline)).await;
        self.shared.admission.close();
        let answered = tokio::time::timeout_at(deadline, self.shared.admission.idle())
            .await
            .is_ok();
        let unanswered = self.shared.admission.in_flight();
        if !answered {
            tracing::warn!(
                unanswered,
                grace_ms = settings.grace.as_millis() as u64,
                "grace period over with requests unanswered"
            );
        }
        // Every accepted request has its reply; what remains open are streams that never end
        // on their own (health watches, idle prediction streams). The transport says GOAWAY
        // and gets a moment to flush replies, then the server task is stopped.
        if let Some(tx) = self.shutdown.take() {
            let _ = tx.send(());
        }
        self.stop_side_services().await;
        let flush = if answered {
            CLOSE_WAIT.min(deadline.saturating_duration_since(tokio::time::Instant::now()))
        } else {
            Duration::ZERO
        };
        if tokio::time::timeout(flush, &mut self.task).await.is_err() {
            self.task.abort();
        }
        DrainReport {
            unanswered,
            took: started.elapsed(),
        }
    }

    /// Stops accepting calls, finishes those in flight, and waits for the server to end.
    ///
    /// # Errors
    /// The transport's own failure, if it had one.
    pub async fn shutdown(mut self) -> Result<(), tonic::transport::Error> {
        if let Some(tx) = self.shutdown.take() {
            let _ = tx.send(());
        }
        self.stop_side_services().await;
        match self.task.await {
            Ok(r) => r,
            // The server task panicked or was cancelled; nothing more to wait for.
            Err(_) => Ok(()),
        }
    }

    /// Waits until the server ends (it ends when `shutdown` is called from elsewhere or the
    /// transport fails).
    ///
    /// # Errors
    /// The transport's failure.
    pub async fn wait(mut self) -> Result<(), tonic::transport::Error> {
        let result = match (&mut self.task).await {
            Ok(r) => r,
            Err(_) => Ok(()),
        };
        self.stop_side_services().await;
        result
    }

    /// Stops watching the folder and closes the control service.
    async fn stop_side_services(&mut self) {
        self.watcher = None;
        if let Some(mut c) = self.control.take() {
            if let Some(tx) = c.shutdown.take() {
                let _ = tx.send(());
            }
            let _ = c.task.await;
        }
    }

    /// Predict requests accepted and not yet answered.
    pub fn in_flight(&self) -> usize {
        self.shared.admission.in_flight()
    }

    /// A sender that stops the server when sent to (or dropped).
    pub fn take_shutdown(&mut self) -> Option<oneshot::Sender<()>> {
        self.shutdown.take()
    }
}

/// Two statuses of the transport say the wrong thing, and are rewritten (the gRPC status code
/// specification, doc/statuscodes.md, is the reference for both):
/// - a message over `max_message_bytes` is refused with OUT_OF_RANGE; a size limit is a
///   resource limit, so clients see RESOURCE_EXHAUSTED, with the transport's message (which
///   names the size and the limit) and the setting's name;
/// - a call whose `grpc-timeout` expires before the handler answers is ended with CANCELLED
///   ("Timeout expired"); the specification's code for it is DEADLINE_EXCEEDED, which is also
///   what the scheduler answers for a request whose deadline passes in the queue.
///
/// The status travels in the headers of a trailers-only response, or in the trailers, so
/// both are checked.
fn fix_transport_statuses(
    response: http::Response<tonic::body::Body>,
) -> http::Response<tonic::body::Body> {
    // Trailers-only responses carry the status in the headers; others in the trailers.
    let mut response = response;
    fix_status(response.headers_mut());
    response.map(|body| tonic::body::Body::new(FixedStatus { inner: body }))
}

/// A response body whose trailers get [`fix_status`].
struct FixedStatus {
    inner: tonic::body::Body,
}

impl http_body::Body for FixedStatus {
    type Data = <tonic::body::Body as http_body::Body>::Data;
    type Error = <tonic::body::Body as http_body::Body>::Error;

    fn poll_frame(
        mut self: std::pin::Pin<&mut Self>,
        cx: &mut std::task::Context<'_>,
    ) -> std::task::Poll<Option<Result<http_body::Frame<Self::Data>, Self::Error>>> {
        match std::pin::Pin::new(&mut self.inner).poll_frame(cx) {
            std::task::Poll::Ready(Some(Ok(frame))) => match frame.into_trailers() {
                Ok(mut trailers) => {
                    fix_status(&mut trailers);
                    std::task::Poll::Ready(Some(Ok(http_body::Frame::trailers(trailers))))
                }
                Err(frame) => std::task::Poll::Ready(Some(Ok(frame))),
            },
            other => other,
        }
    }

    fn is_end_stream(&self) -> bool {
        self.inner.is_end_stream()
    }

    fn size_hint(&self) -> http_body::SizeHint {
        self.inner.size_hint()
    }
}

fn fix_status(headers: &mut http::HeaderMap) {
    let status = headers.get("grpc-status").map(|v| v.as_bytes().to_vec());
    // grpc-message is percent-encoded on the wire (gRPC over HTTP/2 specification).
    let message = headers
        .get("grpc-message")
        .map(|v| String::from_utf8_lossy(v.as_bytes()).replace("%20", " "))
        .unwrap_or_default();
    // tonic's own text for an expired grpc-timeout (tonic::TimeoutExpired).
    if status.as_deref() == Some(b"1") && message == "Timeout expired" {
        headers.insert("grpc-status", http::HeaderValue::from_static("4"));
        headers.insert(
            "grpc-message",
            http::HeaderValue::from_static(
                "the%20call's%20deadline%20passed%20before%20it%20was%20answered",
            ),
        );
        return;
    }
    if status.as_deref() == Some(b"11") && message.contains("message length too large") {
        headers.insert("grpc-status", http::HeaderValue::from_static("8"));
        // Every limit's message names its setting; the transport's does not know ours.
        if let Some(v) = headers.get("grpc-message") {
            let mut named = v.as_bytes().to_vec();
            named.extend_from_slice(b"%20(setting%20max_message_bytes)");
            if let Ok(v) = http::HeaderValue::from_bytes(&named) {
                headers.insert("grpc-message", v);
            }
        }
    }
}

/// Loads the models and starts serving on `config.listen` (port 0 picks a free port), with the
/// models folder watched and, when configured, the control service on `config.control_listen`.
///
/// # Errors
/// Invalid settings, an address that cannot be bound, an unreadable models folder, an
/// unreadable or invalid TLS or trusted key file, a control service beyond loopback without
/// TLS.
pub async fn start(config: &ServeConfig) -> Result<RunningServer, StartError> {
    config.validate()?;
    // Security settings first: a bad file must stop the server before it loads or binds.
    tls::check_control_exposure(config)?;
    let transport = tls::server_builder(config)?;
    let trusted_keys = tls::trusted_keys(config)?;
    let telemetry = telemetry::install(config.metrics_listen)?;
    let registry = Arc::new(build_registry(config, trusted_keys));
    telemetry::drift::watch_drift(&registry, config.drift_alpha);
    let scheduler = Arc::new(Scheduler::start(&SchedulerConfig {
        compute_threads: config.compute_threads,
        batch_limit: config.batch_limit,
        batch_wait: std::time::Duration::from_secs_f64(config.batch_wait_ms / 1e3),
        queue_limit: config.queue_limit,
    }));
    let (reporter, health) = tonic_health::server::health_reporter();
    let rollout = Arc::new(Rollout::new(
        Arc::clone(&registry),
        Arc::clone(&scheduler),
        reporter,
        config.models.clone(),
    ));
    let first = load_first_models(config, &rollout).await?;
    let watcher = config.models.as_ref().map(|dir| {
        watch::spawn(
            Arc::clone(&rollout),
            WatchConfig {
                dir: dir.clone(),
                notifications: config.watch_models,
                poll_every: (config.rescan_interval_ms > 0)
                    .then(|| std::time::Duration::from_millis(config.rescan_interval_ms)),
                on_hangup: true,
            },
        )
    });

    let reflection = tonic_reflection::server::Builder::configure()
        .register_encoded_file_descriptor_set(api::FILE_DESCRIPTOR_SET)
        .register_encoded_file_descriptor_set(tonic_health::pb::FILE_DESCRIPTOR_SET)
        .build_v1()
        .map_err(|e| StartError::Reflection(e.to_string()))?;

    let shared = Arc::new(Shared {
        registry: Arc::clone(&registry),
        scheduler,
        limits: RequestLimits {
            max_samples_per_request: config.max_samples_per_request,
            image: ImageLimits {
                max_encoded_bytes: config.max_image_bytes,
                max_pixels: config.max_image_pixels,
            },
            stream_concurrency: config.stream_concurrency,
        },
        drift_alpha: config.drift_alpha,
        admission: drain::Admission::default(),
    });
    let predictor =
        api::predictor_server::PredictorServer::new(PredictorService::new(Arc::clone(&shared)))
            .max_decoding_message_size(config.max_message_bytes)
            .max_encoding_message_size(config.max_message_bytes);

    let listener = bind(config.listen).await?;
    let local_addr = local_addr_of(&listener, config.listen)?;
    let control = if config.control {
        Some(start_control(config, transport.clone(), Arc::clone(&rollout)).await?)
    } else {
        None
    };
    let (tx, rx) = oneshot::channel::<()>();
    let task = tokio::spawn(
        transport
            .layer(tower::util::MapResponseLayer::new(fix_transport_statuses))
            .add_service(health)
            .add_service(reflection)
            .add_service(predictor)
            // TCP_NODELAY: small replies must not wait for the peer's delayed ACK (~40 ms on
            // Linux); tonic applies its own nodelay setting only to listeners it binds itself.
            .serve_with_incoming_shutdown(
                tonic::transport::server::TcpIncoming::from(listener).with_nodelay(Some(true)),
                async {
                    let _ = rx.await;
                },
            ),
    );
    tracing::info!(%local_addr, "serving gRPC (convoy.v1.Predictor, grpc.health.v1.Health, reflection)");
    Ok(RunningServer {
        local_addr,
        control_addr: control.as_ref().map(|c| c.addr),
        registry,
        rollout,
        loads: first.loads,
        telemetry,
        watcher,
        control,
        shared,
        shutdown: Some(tx),
        task,
    })
}

/// The registry of loaded models, with the engine, warm-up, drift and retention settings of
/// `config`.
fn build_registry(config: &ServeConfig, trusted_keys: Vec<PublicKey>) -> Registry {
    Registry::new(
        LoadSettings {
            engine: EngineConfig {
                threads: 1,
                max_batch: config.batch_limit,
                ..EngineConfig::default()
            },
            // A batch of one (an idle server) and a full batch (a busy one).
            warm_up_batches: vec![1, config.batch_limit],
            drift: config.drift_monitoring.then_some(WindowConfig {
                capacity: config.drift_window,
                ..WindowConfig::default()
            }),
            trusted_keys,
        },
        Policy {
            pins: config.pinned_versions.clone(),
            keep_previous: config.keep_previous,
            retire_last: config.retire_last,
        },
        config.default_model.clone(),
    )
}

/// The models folder's bundles, or the built-in demo when no folder is configured.
async fn load_first_models(
    config: &ServeConfig,
    rollout: &Rollout,
) -> Result<ChangeReport, StartError> {
    match &config.models {
        Some(dir) => rollout.rescan().await.map_err(|e| match e {
            RolloutError::Folder { path, source } => StartError::Models { path, source },
            other => StartError::Models {
                path: dir.clone(),
                source: std::io::Error::other(other.to_string()),
            },
        }),
        None => Ok(rollout
            .load_bytes(DEMO_BUNDLE.to_vec(), "built-in demo")
            .await),
    }
}

/// Binds the control port and starts the control service behind its token.
async fn start_control(
    config: &ServeConfig,
    transport: tonic::transport::Server,
    rollout: Arc<Rollout>,
) -> Result<ControlServer, StartError> {
    let token = config.control_token()?.unwrap_or_default();
    let listener = bind(config.control_listen).await?;
    let addr = local_addr_of(&listener, config.control_listen)?;
    if !addr.ip().is_loopback() {
        // Reached only with TLS (tls::check_control_exposure): the token is encrypted,
        // but whoever holds it can still change what is served.
        tracing::warn!(%addr, "the control service listens beyond loopback (TLS); its token is its only guard");
    }
    serve_control(transport, listener, addr, rollout, &token)
}

async fn bind(addr: SocketAddr) -> Result<TcpListener, StartError> {
    TcpListener::bind(addr)
        .await
        .map_err(|source| StartError::Bind { addr, source })
}

fn local_addr_of(listener: &TcpListener, addr: SocketAddr) -> Result<SocketAddr, StartError> {
    listener
        .local_addr()
        .map_err(|source| StartError::Bind { addr, source })
}

/// The control service's own server: the service behind its token check, and reflection of
/// its own descriptors only.
struct ControlServer {
    addr: SocketAddr,
    shutdown: Option<oneshot::Sender<()>>,
    task: tokio::task::JoinHandle<Result<(), tonic::transport::Error>>,
}

fn serve_control(
    mut transport: tonic::transport::Server,
    listener: TcpListener,
    addr: SocketAddr,
    rollout: Arc<Rollout>,
    token: &str,
) -> Result<ControlServer, StartError> {
    let service = api::control::control_server::ControlServer::with_interceptor(
        ControlService::new(rollout),
        TokenCheck::new(token),
    );
    let reflection = tonic_reflection::server::Builder::configure()
        .register_encoded_file_descriptor_set(api::control::FILE_DESCRIPTOR_SET)
        .build_v1()
        .map_err(|e| StartError::Reflection(e.to_string()))?;
    let (tx, rx) = oneshot::channel::<()>();
    let task = tokio::spawn(
        transport
            .add_service(service)
            .add_service(reflection)
            .serve_with_incoming_shutdown(
                tonic::transport::server::TcpIncoming::from(listener).with_nodelay(Some(true)),
                async {
                    let _ = rx.await;
                },
            ),
    );
    tracing::info!(%addr, "serving the control service (convoy.control.v1.Control)");
    Ok(ControlServer {
        addr,
        shutdown: Some(tx),
        task,
    })
}

#[cfg(test)]
mod tests {
    use super::fix_status;

    fn headers(status: &'static str, message: &'static str) -> http::HeaderMap {
        let mut h = http::HeaderMap::new();
        h.insert("grpc-status", http::HeaderValue::from_static(status));
        h.insert("grpc-message", http::HeaderValue::from_static(message));
        h
    }

    #[test]
    fn an_expired_timeout_becomes_deadline_exceeded() {
        let mut h = headers("1", "Timeout%20expired");
        fix_status(&mut h);
        assert_eq!(h["grpc-status"], "4");
        // A client's own cancellation is left alone.
        let mut h = headers("1", "operation%20was%20canceled");
        fix_status(&mut h);
        assert_eq!(h["grpc-status"], "1");
    }

    #[test]
    fn an_oversized_message_becomes_resource_exhausted_naming_the_setting() {
        let mut h = headers(
            "11",
            "message%20length%20too%20large:%20found%20999%20bytes",
        );
        fix_status(&mut h);
        assert_eq!(h["grpc-status"], "8");
        assert!(
            h["grpc-message"]
                .to_str()
                .unwrap()
                .ends_with("(setting%20max_message_bytes)")
        );
        let mut h = headers("11", "index%20out%20of%20range");
        fix_status(&mut h);
        assert_eq!(h["grpc-status"], "11");
    }
}
