//! Hands prepared samples to compute threads and returns the results.
//!
//! This is the seam between the async service and the CPU: requests arrive on tokio's I/O
//! threads, become [`Job`]s in a bounded queue, and dedicated OS threads run them (never
//! tokio's workers, so compute cannot starve I/O). For now every request is its own batch
//! ("direct dispatch"); grouping waiting samples from several requests into one batch is the
//! batching scheduler's job and slots in here without changing callers: `submit` already
//! answers with the batch size and the time queued and computing.
//!
//! Bounded: a full queue is refused at once ([`SubmitError::Full`]), so memory never grows with
//! load. A job whose caller has gone (cancelled, timed out) is skipped, not computed. A panic
//! inside a computation fails that job only and the worker carries on.

use std::sync::mpsc::{Receiver, SyncSender, TrySendError, sync_channel};
use std::sync::{Arc, Mutex};
use std::thread::JoinHandle;
use std::time::{Duration, Instant};

use tokio::sync::oneshot;

use crate::engine::RunOptions;
use crate::registry::ModelVersion;

/// How many threads compute and how much may wait.
#[derive(Clone, Debug)]
pub struct SchedulerConfig {
    /// Compute threads; each runs one job at a time on one core.
    pub compute_threads: usize,
    /// Jobs that may wait for a thread before new ones are refused.
    pub queue_capacity: usize,
}

impl Default for SchedulerConfig {
    fn default() -> Self {
        SchedulerConfig {
            compute_threads: std::thread::available_parallelism().map_or(2, |n| n.get()),
            queue_capacity: 64,
        }
    }
}

/// A finished computation.
#[derive(Clone, Debug)]
pub struct Computed {
    /// `count · output_len` raw graph outputs.
    pub outputs: Vec<f32>,
    pub queued: Duration,
    pub compute: Duration,
    pub batch_size: usize,
}

/// Why a job was not accepted.
#[derive(Clone, Debug, PartialEq, Eq, thiserror::Error)]
pub enum SubmitError {
    #[error("the compute queue is full ({capacity} batches waiting); retry later")]
    Full { capacity: usize },
    #[error("the server is shutting down")]
    Closed,
}

/// Why an accepted job failed.
#[derive(Clone, Debug, PartialEq, Eq, thiserror::Error)]
pub enum ComputeError {
    #[error("computation failed: {reason}")]
    Failed { reason: String },
    #[error("computation panicked: {reason}")]
    Panicked { reason: String },
}

/// One unit of work: a request's prepared samples.
struct Job {
    model: Arc<ModelVersion>,
    inputs: Vec<f32>,
    count: usize,
    enqueued: Instant,
    reply: oneshot::Sender<Result<Computed, ComputeError>>,
}

/// The compute threads and their queue.
pub struct Scheduler {
    tx: Option<SyncSender<Job>>,
    capacity: usize,
    workers: Vec<JoinHandle<()>>,
}

impl Scheduler {
    /// Starts the compute threads.
    pub fn start(config: &SchedulerConfig) -> Scheduler {
        let capacity = config.queue_capacity.max(1);
        let (tx, rx) = sync_channel::<Job>(capacity);
        // A std Mutex around the receiver: workers hold it only while taking the next job.
        let rx = Arc::new(Mutex::new(rx));
        let workers = (0..config.compute_threads.max(1))
            .map(|i| {
                let rx = Arc::clone(&rx);
                std::thread::Builder::new()
                    .name(format!("convoy-compute-{i}"))
                    .spawn(move || worker(&rx))
                    // Spawning fails only when the OS is out of threads at start-up, where no
                    // server could run anyway.
                    .expect("spawn compute thread")
            })
            .collect();
        Scheduler {
            tx: Some(tx),
            capacity,
            workers,
        }
    }

    /// Queues `count` prepared samples for `model`; the receiver yields the result.
    ///
    /// # Errors
    /// The queue is full, or the scheduler is stopping.
    pub fn submit(
        &self,
        model: Arc<ModelVersion>,
        inputs: Vec<f32>,
        count: usize,
    ) -> Result<oneshot::Receiver<Result<Computed, ComputeError>>, SubmitError> {
        let (reply, rx) = oneshot::channel();
        let job = Job {
            model,
            inputs,
            count,
            enqueued: Instant::now(),
            reply,
        };
        let tx = self.tx.as_ref().ok_or(SubmitError::Closed)?;
        match tx.try_send(job) {
            Ok(()) => Ok(rx),
            Err(TrySendError::Full(_)) => Err(SubmitError::Full {
                capacity: self.capacity,
            }),
            Err(TrySendError::Disconnected(_)) => Err(SubmitError::Closed),
        }
    }
}

impl Drop for Scheduler {
    /// Closes the queue, lets the workers finish what was accepted, and joins them.
    fn drop(&mut self) {
        self.tx.take();
        for w in self.workers.drain(..) {
            let _ = w.join();
        }
    }
}

fn worker(rx: &Mutex<Receiver<Job>>) {
    loop {
        let job = {
            let guard = rx.lock().unwrap_or_else(|p| p.into_inner());
            match guard.recv() {
                Ok(job) => job,
                Err(_) => return, // queue closed: shutting down
            }
        };
        if job.reply.is_closed() {
            // The caller is gone (cancelled or timed out): do not compute for nobody.
            continue;
        }
        let queued = job.enqueued.elapsed();
        let started = Instant::now();
        let model = Arc::clone(&job.model);
        let result = std::panic::catch_unwind(std::panic::AssertUnwindSafe(|| {
            model
                .engine
                .run(&job.inputs, job.count, RunOptions::default())
        }));
        let compute = started.elapsed();
        let outcome = match result {
            Ok(Ok(outputs)) => Ok(Computed {
                outputs,
                queued,
                compute,
                batch_size: job.count,
            }),
            Ok(Err(e)) => Err(ComputeError::Failed {
                reason: e.to_string(),
            }),
            Err(panic) => {
                let reason = panic
                    .downcast_ref::<&str>()
                    .map(|s| s.to_string())
                    .or_else(|| panic.downcast_ref::<String>().cloned())
                    .unwrap_or_else(|| "unknown panic".into());
                tracing::error!(model = %job.model.name, version = %job.model.version, %reason, "batch panicked");
                Err(ComputeError::Panicked { reason })
            }
        };
        // The caller may have gone meanwhile; then there is no one to tell.
        let _ = job.reply.send(outcome);
    }
}
