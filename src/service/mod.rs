//! The gRPC server: the `Predictor` service, the standard health service and reflection.
//!
//! A request travels proto → [`predictor`] (resolve the model in the [`Registry`], prepare
//! samples with [`crate::prepare`]) → [`Scheduler`] (compute threads) → back, and
//! [`error::ServiceError`] turns failures into gRPC status codes in one place.
//!
//! [`start`] binds, loads the models, and serves until the returned handle is shut down.

pub mod api;
pub mod config;
pub mod error;
pub mod predictor;

use std::net::SocketAddr;
use std::sync::Arc;

use tokio::net::TcpListener;
use tokio::sync::oneshot;
use tonic_health::ServingStatus;

pub use config::{ConfigError, ServeConfig};

use crate::engine::EngineConfig;
use crate::prepare::ImageLimits;
use crate::registry::{LoadOutcome, Registry};
use crate::scheduler::{Scheduler, SchedulerConfig};
use crate::telemetry::{self, TelemetryError, TelemetryHandle};
use predictor::{PredictorService, RequestLimits, Shared};

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
}

/// A running server.
pub struct RunningServer {
    pub local_addr: SocketAddr,
    pub registry: Arc<Registry>,
    pub loads: Vec<LoadOutcome>,
    /// The metrics endpoint (its address, if served); stops with the server.
    pub telemetry: TelemetryHandle,
    shutdown: Option<oneshot::Sender<()>>,
    task: tokio::task::JoinHandle<Result<(), tonic::transport::Error>>,
}

impl RunningServer {
    /// Stops accepting calls, finishes those in flight, and waits for the server to end.
    ///
    /// # Errors
    /// The transport's own failure, if it had one.
    pub async fn shutdown(mut self) -> Result<(), tonic::transport::Error> {
        if let Some(tx) = self.shutdown.take() {
            let _ = tx.send(());
        }
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
    pub async fn wait(self) -> Result<(), tonic::transport::Error> {
        match self.task.await {
            Ok(r) => r,
            Err(_) => Ok(()),
        }
    }

    /// A sender that stops the server when sent to (or dropped).
    pub fn take_shutdown(&mut self) -> Option<oneshot::Sender<()>> {
        self.shutdown.take()
    }
}

/// The transport refuses a message over `max_message_bytes` with OUT_OF_RANGE; a size limit is
/// a resource limit, so clients see RESOURCE_EXHAUSTED instead, with the transport's message
/// (which names the size and the limit). The status travels in the headers of a trailers-only
/// response, or in the trailers, so both are checked.
fn oversize_is_resource_exhausted(
    response: http::Response<tonic::body::Body>,
) -> http::Response<tonic::body::Body> {
    // Trailers-only responses carry the status in the headers; others in the trailers.
    let mut response = response;
    fix_oversize_status(response.headers_mut());
    response.map(|body| tonic::body::Body::new(OversizeStatus { inner: body }))
}

/// A response body whose trailers get [`fix_oversize_status`].
struct OversizeStatus {
    inner: tonic::body::Body,
}

impl http_body::Body for OversizeStatus {
    type Data = <tonic::body::Body as http_body::Body>::Data;
    type Error = <tonic::body::Body as http_body::Body>::Error;

    fn poll_frame(
        mut self: std::pin::Pin<&mut Self>,
        cx: &mut std::task::Context<'_>,
    ) -> std::task::Poll<Option<Result<http_body::Frame<Self::Data>, Self::Error>>> {
        match std::pin::Pin::new(&mut self.inner).poll_frame(cx) {
            std::task::Poll::Ready(Some(Ok(frame))) => match frame.into_trailers() {
                Ok(mut trailers) => {
                    fix_oversize_status(&mut trailers);
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

fn fix_oversize_status(headers: &mut http::HeaderMap) {
    let out_of_range = headers
        .get("grpc-status")
        .is_some_and(|v| v.as_bytes() == b"11");
    // grpc-message is percent-encoded on the wire (gRPC over HTTP/2 specification).
    let oversize = headers.get("grpc-message").is_some_and(|v| {
        let text = String::from_utf8_lossy(v.as_bytes()).replace("%20", " ");
        text.contains("message length too large")
    });
    if out_of_range && oversize {
        headers.insert("grpc-status", http::HeaderValue::from_static("8"));
    }
}

/// Loads the models and starts serving on `config.listen` (port 0 picks a free port).
///
/// # Errors
/// Invalid settings, an address that cannot be bound, an unreadable models folder.
pub async fn start(config: &ServeConfig) -> Result<RunningServer, StartError> {
    config.validate()?;
    let telemetry = telemetry::install(config.metrics_listen)?;
    let registry = Arc::new(Registry::new(
        EngineConfig {
            threads: 1,
            max_batch: config.batch_limit,
            ..EngineConfig::default()
        },
        config.default_model.clone(),
    ));
    let loads = match &config.models {
        Some(dir) => registry
            .load_dir(dir)
            .map_err(|source| StartError::Models {
                path: dir.clone(),
                source,
            })?,
        None => vec![registry.load_bytes(DEMO_BUNDLE.to_vec(), "built-in demo")],
    };
    for l in &loads {
        match &l.result {
            Ok(()) => tracing::info!(
                origin = %l.origin,
                model = l.name.as_deref().unwrap_or(""),
                version = l.version.as_deref().unwrap_or(""),
                "loaded"
            ),
            Err(reason) => tracing::warn!(origin = %l.origin, %reason, "refused"),
        }
    }
    telemetry::record_loads(&loads, &registry);

    let (reporter, health) = tonic_health::server::health_reporter();
    let snapshot = registry.snapshot();
    let any = snapshot.values().any(|s| s.active().is_some());
    reporter
        .set_service_status(
            "",
            if any {
                ServingStatus::Serving
            } else {
                ServingStatus::NotServing
            },
        )
        .await;
    reporter
        .set_service_status(
            "convoy.v1.Predictor",
            if any {
                ServingStatus::Serving
            } else {
                ServingStatus::NotServing
            },
        )
        .await;
    for (name, slot) in &snapshot {
        let status = if slot.active().is_some() {
            ServingStatus::Serving
        } else {
            ServingStatus::NotServing
        };
        reporter.set_service_status(name, status).await;
    }

    let reflection = tonic_reflection::server::Builder::configure()
        .register_encoded_file_descriptor_set(api::FILE_DESCRIPTOR_SET)
        .register_encoded_file_descriptor_set(tonic_health::pb::FILE_DESCRIPTOR_SET)
        .build_v1()
        .map_err(|e| StartError::Reflection(e.to_string()))?;

    let shared = Arc::new(Shared {
        registry: Arc::clone(&registry),
        scheduler: Scheduler::start(&SchedulerConfig {
            compute_threads: config.compute_threads,
            batch_limit: config.batch_limit,
            batch_wait: std::time::Duration::from_secs_f64(config.batch_wait_ms / 1e3),
            queue_limit: config.queue_limit,
        }),
        limits: RequestLimits {
            max_samples_per_request: config.max_samples_per_request,
            image: ImageLimits {
                max_encoded_bytes: config.max_image_bytes,
                max_pixels: config.max_image_pixels,
            },
            stream_concurrency: config.stream_concurrency,
        },
    });
    let predictor = api::predictor_server::PredictorServer::new(PredictorService::new(shared))
        .max_decoding_message_size(config.max_message_bytes)
        .max_encoding_message_size(config.max_message_bytes);

    let listener = TcpListener::bind(config.listen)
        .await
        .map_err(|source| StartError::Bind {
            addr: config.listen,
            source,
        })?;
    let local_addr = listener.local_addr().map_err(|source| StartError::Bind {
        addr: config.listen,
        source,
    })?;
    let (tx, rx) = oneshot::channel::<()>();
    let task = tokio::spawn(
        tonic::transport::Server::builder()
            .layer(tower::util::MapResponseLayer::new(
                oversize_is_resource_exhausted,
            ))
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
        registry,
        loads,
        telemetry,
        shutdown: Some(tx),
        task,
    })
}
