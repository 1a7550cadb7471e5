//! The batching scheduler: groups waiting samples of one model version into batches and runs
//! them on dedicated compute threads.
//!
//! Data path: `submit` → the version's queue (a [`batcher`] task per model version) → a batch
//! → a compute thread ([`workers`]) → each request's reply. A batch forms from waiting requests
//! (a request larger than the batch limit is cut into several parts) and leaves when it is
//! full, when a compute thread is idle (nothing is gained by waiting: the samples would only
//! wait longer), or — when every thread is busy — once its oldest sample has waited
//! `batch_wait`; then it is sealed and goes to the next free thread while later arrivals form
//! the next batch.
//!
//! Bounded: each version's queue holds at most `queue_limit` samples; beyond that `submit`
//! refuses at once (load shedding). A request whose deadline passed before its batch started is
//! not computed ([`ComputeError::DeadlineExceeded`]); one whose caller went away is dropped.
//! A failure or panic in a batch fails that batch's requests only.
//!
//! How two cores are used: one batch per core (each compute thread runs its batch on one
//! core), not one batch over both. The engine splits a batch over threads only by whole
//! samples, so a two-thread engine does the same core-work per batch plus a hand-off; measured
//! with `convoy bench --local` on ResNet-20 (2026-12-02, this project's 2-core machine), one
//! engine over both cores reached 1,646 images/s at batch 8 where one thread alone reached
//! 1,101, i.e. two threads with a batch each have about 2,200 images/s to give; served with
//! two compute threads the model reached 1,761 requests/s (README, "Batching"). Separate
//! threads also let a second batch start while the first runs.

mod batcher;
mod workers;

use std::collections::HashMap;
use std::sync::atomic::{AtomicBool, AtomicUsize, Ordering};
use std::sync::{Arc, Mutex};
use std::time::Duration;

use tokio::sync::{Semaphore, mpsc, oneshot};
use tokio::time::Instant;

use crate::registry::ModelVersion;

pub use workers::{BatchRunner, EngineRunner};

/// The scheduler's knobs.
#[derive(Clone, Debug)]
pub struct SchedulerConfig {
    /// Compute threads; each runs one batch at a time on one core.
    pub compute_threads: usize,
    /// Most samples in one batch.
    pub batch_limit: usize,
    /// Longest a batch keeps collecting while every compute thread is busy.
    pub batch_wait: Duration,
    /// Most samples waiting per model version before new requests are refused.
    pub queue_limit: usize,
}

impl Default for SchedulerConfig {
    fn default() -> Self {
        SchedulerConfig {
            compute_threads: std::thread::available_parallelism().map_or(2, |n| n.get()),
            batch_limit: 8,
            batch_wait: Duration::from_millis(2),
            queue_limit: 256,
        }
    }
}

/// A finished request.
#[derive(Clone, Debug)]
pub struct Computed {
    /// `count · output_len` raw graph outputs, in sample order.
    pub outputs: Vec<f32>,
    /// Time from submission until the request's last part started computing.
    pub queued: Duration,
    /// Compute time of the batches the request rode in, added up.
    pub compute: Duration,
    /// Samples in the (last) batch the request rode in.
    pub batch_size: usize,
}

/// Why a request was not accepted.
#[derive(Clone, Debug, PartialEq, Eq, thiserror::Error)]
pub enum SubmitError {
    #[error(
        "the queue of {model} {version} is full ({limit} samples waiting; setting queue_limit); retry later"
    )]
    Full {
        model: String,
        version: String,
        limit: usize,
    },
    #[error("{model} {version} was retired after the request chose it")]
    Retired { model: String, version: String },
    #[error("the server is shutting down")]
    Closed,
}

/// Why an accepted request was not computed.
#[derive(Clone, Debug, PartialEq, Eq, thiserror::Error)]
pub enum ComputeError {
    #[error("the deadline passed after {waited_ms} ms in the queue, before computation began")]
    DeadlineExceeded { waited_ms: u64 },
    #[error("batch of {batch} samples failed: {reason}")]
    Failed { batch: usize, reason: String },
    #[error("batch of {batch} samples panicked: {reason}")]
    Panicked { batch: usize, reason: String },
}

type Reply = oneshot::Sender<Result<Computed, ComputeError>>;

/// One request: its prepared samples and where the answer goes. Parts of a large request
/// share it.
pub(crate) struct Request {
    inputs: Arc<Vec<f32>>,
    submitted: Instant,
    deadline: Option<Instant>,
    outputs: Mutex<Vec<f32>>,
    /// Samples not yet computed.
    remaining: AtomicUsize,
    reply: Mutex<Option<Reply>>,
    done: AtomicBool,
    stats: Mutex<PartStats>,
}

#[derive(Default)]
struct PartStats {
    queued: Duration,
    compute: Duration,
    batch_size: usize,
}

impl Request {
    fn is_cancelled(&self) -> bool {
        self.reply
            .lock()
            .unwrap_or_else(|p| p.into_inner())
            .as_ref()
            .is_none_or(|r| r.is_closed())
    }

    /// Sends the final answer once; later calls do nothing.
    fn finish(&self, result: Result<Computed, ComputeError>) {
        if self.done.swap(true, Ordering::AcqRel) {
            return;
        }
        if let Some(tx) = self.reply.lock().unwrap_or_else(|p| p.into_inner()).take() {
            let _ = tx.send(result);
        }
    }
}

/// A contiguous run of one request's samples: the unit a batch is made of.
pub(crate) struct Part {
    request: Arc<Request>,
    start: usize,
    count: usize,
}

/// One model version's queue: the sending side of its batcher.
struct Queue {
    tx: mpsc::UnboundedSender<Part>,
    /// Samples waiting (submitted, not yet taken into a batch).
    waiting: Arc<AtomicUsize>,
}

/// The compute threads and the per-version queues.
pub struct Scheduler {
    config: SchedulerConfig,
    /// Keyed by the version's address: two loads of the same name and version (a file
    /// replaced by a copy of itself) are different versions with queues of their own. An
    /// address cannot be reused while its entry exists, because the entry's batcher holds the
    /// version.
    queues: Mutex<HashMap<usize, Queue>>,
    permits: Arc<Semaphore>,
    pool: Arc<workers::Pool>,
    runner: Arc<dyn BatchRunner>,
}

impl Scheduler {
    /// Starts the compute threads, running batches with the model's engine.
    pub fn start(config: &SchedulerConfig) -> Scheduler {
        Self::with_runner(config, Arc::new(EngineRunner))
    }

    /// As [`Scheduler::start`] with another way to run a batch (tests use one that records
    /// batch sizes and can be held).
    pub fn with_runner(config: &SchedulerConfig, runner: Arc<dyn BatchRunner>) -> Scheduler {
        let threads = config.compute_threads.max(1);
        Scheduler {
            config: SchedulerConfig {
                compute_threads: threads,
                batch_limit: config.batch_limit.max(1),
                batch_wait: config.batch_wait,
                queue_limit: config.queue_limit.max(1),
            },
            queues: Mutex::new(HashMap::new()),
            permits: Arc::new(Semaphore::new(threads)),
            pool: Arc::new(workers::Pool::start(threads)),
            runner,
        }
    }

    /// Queues `count` prepared samples for `model`; the receiver yields the result. Must be
    /// called within a tokio runtime (the version's batcher is a task, started on first use).
    /// The inputs are shared, not copied: a caller told [`SubmitError::Retired`] can submit
    /// the same inputs to the version that replaced it.
    ///
    /// # Errors
    /// The version's queue is full, or the scheduler is stopping.
    pub fn submit(
        &self,
        model: Arc<ModelVersion>,
        inputs: impl Into<Arc<Vec<f32>>>,
        count: usize,
        deadline: Option<Instant>,
    ) -> Result<oneshot::Receiver<Result<Computed, ComputeError>>, SubmitError> {
        let key = Arc::as_ptr(&model) as usize;
        let mut queues = self.queues.lock().unwrap_or_else(|p| p.into_inner());
        // Checked under the queues lock, which `retire` also takes: a request either lands in
        // the queue before it is closed (and is computed), or sees the flag and is told to
        // choose again.
        if model.is_retired() {
            return Err(SubmitError::Retired {
                model: model.name.clone(),
                version: model.version.clone(),
            });
        }
        let queue = queues.entry(key).or_insert_with(|| {
            let (tx, rx) = mpsc::unbounded_channel();
            let waiting = Arc::new(AtomicUsize::new(0));
            tokio::spawn(batcher::run(batcher::Batcher {
                model: Arc::clone(&model),
                rx,
                waiting: Arc::clone(&waiting),
                permits: Arc::clone(&self.permits),
                pool: Arc::clone(&self.pool),
                runner: Arc::clone(&self.runner),
                batch_limit: self.config.batch_limit,
                batch_wait: self.config.batch_wait,
            }));
            Queue { tx, waiting }
        });
        // Reserve room first so that concurrent submitters cannot overshoot the limit.
        let before = queue.waiting.fetch_add(count, Ordering::AcqRel);
        if before + count > self.config.queue_limit {
            queue.waiting.fetch_sub(count, Ordering::AcqRel);
            crate::telemetry::shed(
                &model.name,
                &model.version,
                crate::telemetry::SHED_QUEUE_FULL,
            );
            return Err(SubmitError::Full {
                model: model.name.clone(),
                version: model.version.clone(),
                limit: self.config.queue_limit,
            });
        }
        let out_len = model.output_len();
        let (reply, rx) = oneshot::channel();
        let request = Arc::new(Request {
            inputs: inputs.into(),
            submitted: Instant::now(),
            deadline,
            outputs: Mutex::new(vec![0.0; count * out_len]),
            remaining: AtomicUsize::new(count),
            reply: Mutex::new(Some(reply)),
            done: AtomicBool::new(false),
            stats: Mutex::new(PartStats::default()),
        });
        let mut start = 0;
        while start < count {
            let n = (count - start).min(self.config.batch_limit);
            let part = Part {
                request: Arc::clone(&request),
                start,
                count: n,
            };
            if queue.tx.send(part).is_err() {
                queue.waiting.fetch_sub(count - start, Ordering::AcqRel);
                return Err(SubmitError::Closed);
            }
            start += n;
        }
        crate::telemetry::queue_depth(&model.name, &model.version, before + count);
        Ok(rx)
    }

    /// Closes the queue of a version the registry has released (its `retired` flag is already
    /// set): samples already queued are still batched and computed, then its batcher ends and
    /// lets go of the version. Later `submit`s for it fail with [`SubmitError::Retired`].
    pub fn retire(&self, model: &Arc<ModelVersion>) {
        let key = Arc::as_ptr(model) as usize;
        let mut queues = self.queues.lock().unwrap_or_else(|p| p.into_inner());
        // Dropping the sender lets the batcher see the end of its channel once it has taken
        // every part already sent.
        queues.remove(&key);
    }

    /// Model versions with an open queue (for tests and the shutdown log).
    pub fn open_queues(&self) -> usize {
        self.queues.lock().unwrap_or_else(|p| p.into_inner()).len()
    }
}
