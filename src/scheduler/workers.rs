//! The compute threads: dedicated OS threads (never tokio's) that run one batch each.

use std::sync::atomic::Ordering;
use std::sync::mpsc::{Receiver, Sender, channel};
use std::sync::{Arc, Mutex};
use std::thread::JoinHandle;
use std::time::{Duration, Instant};

use tokio::sync::OwnedSemaphorePermit;

use super::{ComputeError, Computed, Part};
use crate::engine::RunOptions;
use crate::registry::ModelVersion;
use crate::telemetry::BatchOutcome;

/// Runs one batch: `count` samples back to back in `inputs`, outputs into `out`.
pub trait BatchRunner: Send + Sync {
    /// # Errors
    /// The reason the batch could not be computed.
    fn run(
        &self,
        model: &ModelVersion,
        inputs: &[f32],
        count: usize,
        out: &mut [f32],
    ) -> Result<(), String>;
}

/// Runs batches with the model's own engine.
pub struct EngineRunner;

impl BatchRunner for EngineRunner {
    fn run(
        &self,
        model: &ModelVersion,
        inputs: &[f32],
        count: usize,
        out: &mut [f32],
    ) -> Result<(), String> {
        model
            .engine
            .run_into(inputs, count, RunOptions::default(), out)
            .map_err(|e| e.to_string())
    }
}

/// A batch on its way to a thread, holding the permit that reserved the thread.
pub(super) struct Job {
    pub model: Arc<ModelVersion>,
    /// Each part with the time it waited in the queue.
    pub parts: Vec<(Part, Duration)>,
    pub permit: OwnedSemaphorePermit,
    pub runner: Arc<dyn BatchRunner>,
}

pub(super) struct Pool {
    tx: Mutex<Option<Sender<Job>>>,
    workers: Mutex<Vec<JoinHandle<()>>>,
}

impl Pool {
    pub fn start(threads: usize) -> Pool {
        // Unbounded in type, bounded in use: a job is sent only with a semaphore permit, and
        // there are as many permits as threads.
        let (tx, rx) = channel::<Job>();
        // A std Mutex around the receiver: a worker holds it only while taking a job.
        let rx = Arc::new(Mutex::new(rx));
        let workers = (0..threads)
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
        Pool {
            tx: Mutex::new(Some(tx)),
            workers: Mutex::new(workers),
        }
    }

    pub fn send(&self, job: Job) {
        let tx = self.tx.lock().unwrap_or_else(|p| p.into_inner());
        if let Some(tx) = tx.as_ref()
            && let Err(err) = tx.send(job)
        {
            // The pool is stopping: fail the batch rather than lose it silently.
            let job = err.0;
            for (part, _) in &job.parts {
                part.request.finish(Err(ComputeError::Failed {
                    batch: 0,
                    reason: "the server is shutting down".into(),
                }));
            }
        }
    }
}

impl Drop for Pool {
    /// Lets the workers finish what they were given, then joins them.
    fn drop(&mut self) {
        self.tx.lock().unwrap_or_else(|p| p.into_inner()).take();
        for w in self
            .workers
            .lock()
            .unwrap_or_else(|p| p.into_inner())
            .drain(..)
        {
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
                Err(_) => return,
            }
        };
        run_job(job);
    }
}

fn run_job(job: Job) {
    let model = &job.model;
    let (in_len, out_len) = (model.input_len(), model.output_len());
    let total: usize = job.parts.iter().map(|(p, _)| p.count).sum();
    let mut inputs = Vec::with_capacity(total * in_len);
    for (p, _) in &job.parts {
        inputs.extend_from_slice(&p.request.inputs[p.start * in_len..(p.start + p.count) * in_len]);
    }
    let mut out = vec![0.0f32; total * out_len];
    let started = Instant::now();
    let result = std::panic::catch_unwind(std::panic::AssertUnwindSafe(|| {
        #[cfg(debug_assertions)]
        fault::panic_if_asked(&inputs);
        job.runner.run(model, &inputs, total, &mut out)
    }));
    let compute = started.elapsed();
    // The thread is free again before results are handed out.
    drop(job.permit);
    let failure = match result {
        Ok(Ok(())) => None,
        Ok(Err(reason)) => {
            tracing::error!(model = %model.name, version = %model.version, batch = total, %reason, "batch failed");
            Some(ComputeError::Failed {
                batch: total,
                reason,
            })
        }
        Err(panic) => {
            let reason = panic
                .downcast_ref::<&str>()
                .map(|s| s.to_string())
                .or_else(|| panic.downcast_ref::<String>().cloned())
                .unwrap_or_else(|| "unknown panic".into());
            tracing::error!(model = %model.name, version = %model.version, batch = total, %reason, "batch panicked");
            Some(ComputeError::Panicked {
                batch: total,
                reason,
            })
        }
    };
    let outcome = match &failure {
        None => BatchOutcome::Ok,
        Some(ComputeError::Panicked { .. }) => BatchOutcome::Panicked,
        Some(_) => BatchOutcome::Failed,
    };
    crate::telemetry::batch_computed(&model.name, &model.version, total, compute, outcome);
    let mut at = 0;
    for (part, waited) in &job.parts {
        let r = &part.request;
        if let Some(e) = &failure {
            r.finish(Err(e.clone()));
            continue;
        }
        {
            let mut outputs = r.outputs.lock().unwrap_or_else(|p| p.into_inner());
            outputs[part.start * out_len..(part.start + part.count) * out_len]
                .copy_from_slice(&out[at * out_len..(at + part.count) * out_len]);
        }
        at += part.count;
        let stats = {
            let mut s = r.stats.lock().unwrap_or_else(|p| p.into_inner());
            s.queued = s.queued.max(*waited);
            s.compute += compute;
            s.batch_size = total;
            (s.queued, s.compute, s.batch_size)
        };
        if r.remaining.fetch_sub(part.count, Ordering::AcqRel) == part.count {
            let outputs = std::mem::take(&mut *r.outputs.lock().unwrap_or_else(|p| p.into_inner()));
            r.finish(Ok(Computed {
                outputs,
                queued: stats.0,
                compute: stats.1,
                batch_size: stats.2,
            }));
        }
    }
}

/// Faults on demand, in debug builds only (tests): release builds have no such switch.
#[cfg(debug_assertions)]
mod fault {
    use std::sync::OnceLock;

    /// Environment variable: a batch holding this exact input value panics on its compute
    /// thread, so tests can check that a panic fails only its own batch.
    pub const PANIC_ON_INPUT: &str = "CONVOY_TEST_PANIC_ON_INPUT";

    pub fn panic_if_asked(inputs: &[f32]) {
        static TRIGGER: OnceLock<Option<f32>> = OnceLock::new();
        let trigger = TRIGGER.get_or_init(|| {
            std::env::var(PANIC_ON_INPUT)
                .ok()
                .and_then(|v| v.trim().parse().ok())
        });
        if let Some(t) = trigger
            && inputs.contains(t)
        {
            panic!("fault injected by {PANIC_ON_INPUT}={t}");
        }
    }
}
