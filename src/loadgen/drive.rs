//! The run against a server: connect, choose inputs, pace requests (closed or open loop),
//! tally each reply, report.
//!
//! Closed loop: `concurrency` tasks, each sending a request, waiting for its reply, and
//! sending the next; latency runs from send to reply.
//!
//! Open loop: a pacing thread wakes at each request's due time (`start + i / rate`) and hands
//! the request to the runtime as its own task, whether or not earlier ones have returned.
//! A plain thread sleeping with `std::thread::sleep` keeps to the schedule more closely than
//! tokio's timer, whose ticks are a millisecond apart. Latency runs from the *due* time, so
//! any delay before sending — the pacer falling behind, a full in-flight cap, a stalled
//! server — is charged to the request (see the module doc of `loadgen`). How late requests
//! actually left is reported separately as the generator's lag.
//!
//! Stopping early (the caller's `stop` future completing) ends pacing at once and abandons
//! requests still in flight; only what completed is reported.
//!
//! Both loops record into one [`Tally`] behind a std `Mutex`: it is held for a few counter
//! updates, never across an await, so contention is negligible next to a network round trip.

use crate::service::error::error_chain;
use std::collections::BTreeMap;
use std::future::Future;
use std::sync::atomic::{AtomicU64, AtomicUsize, Ordering};
use std::sync::{Arc, Mutex, OnceLock};
use std::time::{Duration, Instant};

use tokio::sync::{Notify, watch};
use tonic::transport::{Channel, Endpoint};

use super::histogram::Histogram;
use super::inputs::{self, InputSource, RequestMaker};
use super::report::{LoadReport, code_name};
use super::{LoadConfig, LoadgenError, Pace};
use crate::service::api::{self, predictor_client::PredictorClient};

/// What the progress callback is told, once a second.
#[derive(Clone, Debug)]
pub struct Progress {
    /// Since the start of the warm-up.
    pub elapsed: Duration,
    /// Warm-up plus measurement.
    pub total: Duration,
    pub warming_up: bool,
    /// Replies (and failures) so far, warm-up included.
    pub requests: u64,
    pub errors: u64,
    /// Replies per second over the last second.
    pub per_s: f64,
}

/// Largest gRPC message either way: the transport's default of 4 MiB is too small for a
/// request of many images.
const MAX_MESSAGE_BYTES: usize = 64 << 20;
/// How long connecting may take.
const CONNECT_TIMEOUT: Duration = Duration::from_secs(10);
/// Longest the pacing thread sleeps at a time, so a stop is noticed promptly even at low rates.
const PACER_SLICE: Duration = Duration::from_millis(50);

/// Why a request did not count as ok, as it appears in the report's `errors`.
type ErrorLabel = &'static str;
const CLIENT_OVERLOAD: ErrorLabel = "client overload";
const CLIENT_TIMEOUT: ErrorLabel = "client timeout";
const BAD_REPLY: ErrorLabel = "bad reply";

/// Everything counted during the measured window.
#[derive(Default)]
pub(crate) struct Tally {
    pub(crate) latency: Histogram,
    /// Open loop: how long after its due time each request actually left.
    pub(crate) lag: Histogram,
    pub(crate) requests: u64,
    pub(crate) ok: u64,
    pub(crate) ok_samples: u64,
    pub(crate) errors: BTreeMap<ErrorLabel, u64>,
    /// Sums over ok replies that carried a `Timing`.
    pub(crate) timed: u64,
    pub(crate) queued_us: u64,
    pub(crate) compute_us: u64,
    pub(crate) total_us: u64,
    pub(crate) batch_size: u64,
    /// Model and version of the first ok reply.
    pub(crate) model: Option<(String, String)>,
    /// Ok replies by the version that computed them (a run across a version swap sees
    /// several). At most [`MAX_VERSIONS`] entries; later versions count under "other".
    pub(crate) ok_by_version: BTreeMap<String, u64>,
}

/// Versions tallied by name; a server answering with more would be misbehaving.
const MAX_VERSIONS: usize = 64;

struct Shared {
    tally: Mutex<Tally>,
    /// Every outcome, warm-up included, for the progress line.
    done: AtomicU64,
    failed: AtomicU64,
    in_flight: AtomicUsize,
    /// Woken when `in_flight` drops to zero.
    idle: Notify,
    /// Set once when the run is stopped early; requests still in flight are then abandoned
    /// (and not counted), so stopping never waits for a stalled server.
    stop: watch::Sender<bool>,
    stopped_at: OnceLock<Instant>,
}

impl Shared {
    fn finish(
        &self,
        outcome: Result<api::PredictReply, ErrorLabel>,
        latency: Duration,
        lag: Option<Duration>,
        measured: bool,
    ) {
        self.done.fetch_add(1, Ordering::Relaxed);
        if outcome.is_err() {
            self.failed.fetch_add(1, Ordering::Relaxed);
        }
        if !measured {
            return;
        }
        // A poisoned lock means a recording thread panicked mid-update; the counts are still
        // plain numbers worth reporting.
        let mut t = self.tally.lock().unwrap_or_else(|p| p.into_inner());
        t.requests += 1;
        if let Some(lag) = lag {
            t.lag.record(nanos(lag));
        }
        match outcome {
            Ok(reply) => {
                t.ok += 1;
                t.ok_samples += reply.outcomes.len() as u64;
                t.latency.record(nanos(latency));
                if let Some(timing) = reply.timing {
                    t.timed += 1;
                    t.queued_us += timing.queued_us;
                    t.compute_us += timing.compute_us;
                    t.total_us += timing.total_us;
                    t.batch_size += u64::from(timing.batch_size);
                }
                let key = if t.ok_by_version.len() < MAX_VERSIONS
                    || t.ok_by_version.contains_key(&reply.version)
                {
                    reply.version.clone()
                } else {
                    "other".to_string()
                };
                *t.ok_by_version.entry(key).or_default() += 1;
                if t.model.is_none() {
                    t.model = Some((reply.model, reply.version));
                }
            }
            Err(label) => *t.errors.entry(label).or_default() += 1,
        }
    }

    fn stopped(&self) -> bool {
        *self.stop.borrow()
    }

    /// Completes when the run is stopped.
    fn stopping(&self) -> impl Future<Output = ()> + Send + 'static {
        let mut rx = self.stop.subscribe();
        async move {
            // An error means the sender is gone, i.e. the run is over: stop too.
            let _ = rx.wait_for(|&stopped| stopped).await;
        }
    }
}

fn nanos(d: Duration) -> u64 {
    u64::try_from(d.as_nanos()).unwrap_or(u64::MAX)
}

async fn connect(
    server: &str,
    tls: Option<&tonic::transport::ClientTlsConfig>,
) -> Result<PredictorClient<Channel>, LoadgenError> {
    let url = if server.contains("://") {
        server.to_string()
    } else {
        format!("http://{server}")
    };
    let endpoint = Endpoint::from_shared(url.clone()).map_err(|e| LoadgenError::Address {
        address: server.to_string(),
        reason: error_chain(&e),
    })?;
    let endpoint = match tls {
        Some(config) => endpoint
            .tls_config(config.clone())
            .map_err(|e| LoadgenError::Connect {
                server: url.clone(),
                reason: error_chain(&e),
            })?,
        None => endpoint,
    };
    let channel = endpoint
        .connect_timeout(CONNECT_TIMEOUT)
        .connect()
        .await
        .map_err(|e| LoadgenError::Connect {
            server: url,
            reason: error_chain(&e),
        })?;
    Ok(PredictorClient::new(channel)
        .max_decoding_message_size(MAX_MESSAGE_BYTES)
        .max_encoding_message_size(MAX_MESSAGE_BYTES))
}

/// The per-sample input shape of the model (and version) requests will name.
async fn input_shape(
    client: &mut PredictorClient<Channel>,
    config: &LoadConfig,
) -> Result<Vec<u32>, LoadgenError> {
    let catalog = client
        .catalog(api::CatalogRequest {})
        .await
        .map_err(|s| LoadgenError::Catalog {
            server: config.server.clone(),
            code: code_name(s.code()),
            message: s.message().to_string(),
        })?
        .into_inner();
    let name = if !config.model.is_empty() {
        config.model.clone()
    } else if !catalog.default_model.is_empty() {
        catalog.default_model.clone()
    } else if let [only] = catalog.models.as_slice() {
        only.name.clone()
    } else {
        return Err(LoadgenError::NoDefaultModel);
    };
    let entry = catalog
        .models
        .iter()
        .find(|m| m.name == name)
        .ok_or_else(|| LoadgenError::UnknownModel {
            model: name.clone(),
        })?;
    let version = if config.version.is_empty() {
        if entry.active_version.is_empty() {
            return Err(LoadgenError::NoActiveVersion { model: name });
        }
        entry.active_version.clone()
    } else {
        config.version.clone()
    };
    entry
        .versions
        .iter()
        .find(|v| v.version == version)
        .map(|v| v.input_shape.clone())
        .ok_or(LoadgenError::UnknownVersion {
            model: name,
            version,
        })
}

/// One request, with the client-side timeout; the same timeout travels to the server as the
/// call's deadline so it can drop work nobody waits for.
async fn call(
    client: &mut PredictorClient<Channel>,
    request: api::PredictRequest,
    timeout: Duration,
) -> Result<api::PredictReply, ErrorLabel> {
    let samples = request.samples.len();
    let mut request = tonic::Request::new(request);
    request.set_timeout(timeout);
    match tokio::time::timeout(timeout, client.predict(request)).await {
        Err(_) => Err(CLIENT_TIMEOUT),
        Ok(Err(status)) => Err(code_name(status.code())),
        // A reply with the wrong number of outcomes would make the sample counts lie.
        Ok(Ok(reply)) if reply.get_ref().outcomes.len() != samples => Err(BAD_REPLY),
        Ok(Ok(reply)) => Ok(reply.into_inner()),
    }
}

/// Reports progress once a second until aborted.
fn spawn_ticker<P: FnMut(&Progress) + Send + 'static>(
    shared: Arc<Shared>,
    mut progress: P,
    start: Instant,
    measure_from: Instant,
    total: Duration,
) -> tokio::task::JoinHandle<()> {
    tokio::spawn(async move {
        let mut tick = tokio::time::interval(Duration::from_secs(1));
        tick.tick().await; // the first tick is immediate
        let (mut last_done, mut last_at) = (0u64, Instant::now());
        loop {
            tick.tick().await;
            let now = Instant::now();
            let done = shared.done.load(Ordering::Relaxed);
            let per_s = (done - last_done) as f64 / (now - last_at).as_secs_f64().max(1e-9);
            (last_done, last_at) = (done, now);
            progress(&Progress {
                elapsed: now - start,
                total,
                warming_up: now < measure_from,
                requests: done,
                errors: shared.failed.load(Ordering::Relaxed),
                per_s,
            });
        }
    })
}

/// Runs `config` against its server and reports. `stop` ends the run early when it completes
/// (the report then covers the time measured so far); `progress` is called once a second.
///
/// # Errors
/// Settings out of range, an unreachable server, inputs that cannot be read, or (for random
/// inputs) a catalog without the model. Failed requests are not errors of the run: they are
/// counted in the report.
pub async fn run<S, P>(
    config: &LoadConfig,
    stop: S,
    progress: P,
) -> Result<LoadReport, LoadgenError>
where
    S: Future<Output = ()> + Send + 'static,
    P: FnMut(&Progress) + Send + 'static,
{
    config.validate()?;
    let mut client = connect(&config.server, config.tls.as_ref()).await?;
    // Inputs are read before any request is in flight, so blocking file I/O here holds up
    // nothing else.
    let samples = match &config.inputs {
        InputSource::Random { seed } => {
            let shape = input_shape(&mut client, config).await?;
            inputs::random(&shape, *seed)?
        }
        InputSource::Images(dir) => inputs::images(dir)?,
        InputSource::Tensors(path) => inputs::tensors(path)?,
    };
    let maker = RequestMaker {
        pool: Arc::new(samples.pool),
        per_request: config.samples_per_request,
        model: config.model.clone(),
        version: config.version.clone(),
    };

    let shared = Arc::new(Shared {
        tally: Mutex::new(Tally::default()),
        done: AtomicU64::new(0),
        failed: AtomicU64::new(0),
        in_flight: AtomicUsize::new(0),
        idle: Notify::new(),
        stop: watch::Sender::new(false),
        stopped_at: OnceLock::new(),
    });
    let start = Instant::now();
    let measure_from = start + config.warmup;
    let end = measure_from + config.duration;

    let stopper = {
        let shared = Arc::clone(&shared);
        tokio::spawn(async move {
            stop.await;
            let _ = shared.stopped_at.set(Instant::now());
            shared.stop.send_replace(true);
        })
    };
    let ticker = spawn_ticker(
        Arc::clone(&shared),
        progress,
        start,
        measure_from,
        config.warmup + config.duration,
    );

    match config.pace {
        Pace::Closed { concurrency } => {
            closed_loop(
                concurrency,
                &client,
                &maker,
                &shared,
                config.timeout,
                measure_from,
                end,
            )
            .await;
        }
        Pace::Open { rate_per_s } => {
            open_loop(rate_per_s, &client, &maker, &shared, config, start, end).await;
        }
    }
    ticker.abort();
    stopper.abort();

    let window_end = shared.stopped_at.get().map_or(end, |&s| s.min(end));
    let measured = window_end.saturating_duration_since(measure_from);
    let tally = std::mem::take(&mut *shared.tally.lock().unwrap_or_else(|p| p.into_inner()));
    Ok(LoadReport::new(
        config,
        &samples.description,
        measured,
        shared.stopped(),
        tally,
    ))
}

async fn closed_loop(
    concurrency: usize,
    client: &PredictorClient<Channel>,
    maker: &RequestMaker,
    shared: &Arc<Shared>,
    timeout: Duration,
    measure_from: Instant,
    end: Instant,
) {
    // One counter for all callers, so together they walk the input pool in order.
    let next = Arc::new(AtomicU64::new(0));
    let mut callers = tokio::task::JoinSet::new();
    for _ in 0..concurrency {
        let (mut client, maker, shared, next) = (
            client.clone(),
            maker.clone(),
            Arc::clone(shared),
            Arc::clone(&next),
        );
        callers.spawn(async move {
            while !shared.stopped() {
                let request = maker.request(next.fetch_add(1, Ordering::Relaxed));
                let sent = Instant::now();
                if sent >= end {
                    break;
                }
                let outcome = tokio::select! {
                    outcome = call(&mut client, request, timeout) => outcome,
                    () = shared.stopping() => break,
                };
                shared.finish(outcome, sent.elapsed(), None, sent >= measure_from);
            }
        });
    }
    while callers.join_next().await.is_some() {}
}

async fn open_loop(
    rate_per_s: f64,
    client: &PredictorClient<Channel>,
    maker: &RequestMaker,
    shared: &Arc<Shared>,
    config: &LoadConfig,
    start: Instant,
    end: Instant,
) {
    let runtime = tokio::runtime::Handle::current();
    let measure_from = start + config.warmup;
    let (timeout, cap) = (config.timeout, config.max_in_flight);
    let pacer = {
        let (client, maker, shared) = (client.clone(), maker.clone(), Arc::clone(shared));
        tokio::task::spawn_blocking(move || {
            for i in 0u64.. {
                let due = start + Duration::from_secs_f64(i as f64 / rate_per_s);
                if due >= end {
                    break;
                }
                loop {
                    let now = Instant::now();
                    if now >= due || shared.stopped() {
                        break;
                    }
                    std::thread::sleep((due - now).min(PACER_SLICE));
                }
                if shared.stopped() {
                    break;
                }
                let measured = due >= measure_from;
                if shared.in_flight.load(Ordering::Acquire) >= cap {
                    shared.finish(Err(CLIENT_OVERLOAD), Duration::ZERO, None, measured);
                    continue;
                }
                shared.in_flight.fetch_add(1, Ordering::AcqRel);
                let (mut client, request, shared) =
                    (client.clone(), maker.request(i), Arc::clone(&shared));
                runtime.spawn(async move {
                    let lag = due.elapsed();
                    tokio::select! {
                        outcome = call(&mut client, request, timeout) => {
                            shared.finish(outcome, due.elapsed(), Some(lag), measured);
                        }
                        () = shared.stopping() => {}
                    }
                    if shared.in_flight.fetch_sub(1, Ordering::AcqRel) == 1 {
                        shared.idle.notify_one();
                    }
                });
            }
        })
    };
    // The pacer only sleeps, counts and spawns; should it still panic, the requests it started
    // are awaited below all the same.
    let _ = pacer.await;
    // Every request ends within its timeout, or at once when the run is stopped, so this wait
    // is bounded. `notify_one` keeps a
    // permit when nobody waits, so a wake-up between the check and the wait is not lost.
    while shared.in_flight.load(Ordering::Acquire) > 0 {
        shared.idle.notified().await;
    }
}
