//! One model version's batcher: a small tokio task that only decides when a batch leaves; it
//! never computes.

use std::collections::VecDeque;
use std::sync::Arc;
use std::sync::atomic::{AtomicUsize, Ordering};
use std::time::Duration;

use tokio::sync::{OwnedSemaphorePermit, Semaphore, mpsc};
use tokio::time::Instant;

use super::workers::{BatchRunner, Job, Pool};
use super::{ComputeError, Part};
use crate::registry::ModelVersion;

pub(super) struct Batcher {
    pub model: Arc<ModelVersion>,
    pub rx: mpsc::UnboundedReceiver<Part>,
    pub waiting: Arc<AtomicUsize>,
    pub permits: Arc<Semaphore>,
    pub pool: Arc<Pool>,
    pub runner: Arc<dyn BatchRunner>,
    pub batch_limit: usize,
    pub batch_wait: Duration,
}

async fn permit(permits: &Arc<Semaphore>) -> Option<OwnedSemaphorePermit> {
    Arc::clone(permits).acquire_owned().await.ok()
}

pub(super) async fn run(mut b: Batcher) {
    let mut pending: VecDeque<Part> = VecDeque::new();
    loop {
        if pending.is_empty() {
            match b.rx.recv().await {
                Some(p) => pending.push_back(p),
                None => return,
            }
        }
        while let Ok(p) = b.rx.try_recv() {
            pending.push_back(p);
        }
        drop_dead(&mut pending, &b.waiting, &b.model);
        let Some(oldest) = pending.front().map(|p| p.request.submitted) else {
            continue;
        };
        let queued: usize = pending.iter().map(|p| p.count).sum();
        let slot = if queued >= b.batch_limit {
            // Full: it leaves for the next free thread.
            permit(&b.permits).await
        } else if let Ok(p) = Arc::clone(&b.permits).try_acquire_owned() {
            // A thread is idle: waiting would only add latency.
            Some(p)
        } else {
            // Every thread is busy: keep collecting until a thread frees up, or seal the
            // batch once its oldest sample has waited `batch_wait`.
            tokio::select! {
                p = permit(&b.permits) => p,
                _ = tokio::time::sleep_until(oldest + b.batch_wait) => permit(&b.permits).await,
                part = b.rx.recv() => match part {
                    Some(p) => {
                        pending.push_back(p);
                        continue;
                    }
                    None => permit(&b.permits).await,
                },
            }
        };
        let Some(slot) = slot else {
            return; // the semaphore was closed: shutting down
        };
        // Waiting for a thread takes time: deadlines may have passed, callers may have gone.
        drop_dead(&mut pending, &b.waiting, &b.model);
        if pending.is_empty() {
            continue; // `slot` is dropped: the thread stays free
        }
        // Whole parts, oldest first, while they fit (every part fits an empty batch).
        let now = Instant::now();
        let mut parts = Vec::new();
        let mut samples = 0;
        while let Some(p) = pending.front() {
            if samples + p.count > b.batch_limit {
                break;
            }
            samples += p.count;
            // `front()` just returned Some.
            let p = pending.pop_front().expect("front exists");
            let waited = now.saturating_duration_since(p.request.submitted);
            parts.push((p, waited));
        }
        let left = b.waiting.fetch_sub(samples, Ordering::AcqRel) - samples;
        crate::telemetry::queue_depth(&b.model.name, &b.model.version, left);
        b.pool.send(Job {
            model: Arc::clone(&b.model),
            parts,
            permit: slot,
            runner: Arc::clone(&b.runner),
        });
    }
}

/// Removes parts whose caller went away, and fails those whose deadline has passed.
fn drop_dead(pending: &mut VecDeque<Part>, waiting: &AtomicUsize, model: &ModelVersion) {
    let now = Instant::now();
    pending.retain(|p| {
        let r = &p.request;
        if r.is_cancelled() {
            waiting.fetch_sub(p.count, Ordering::AcqRel);
            crate::telemetry::shed(
                &model.name,
                &model.version,
                crate::telemetry::SHED_CANCELLED,
            );
            return false;
        }
        if r.deadline.is_some_and(|d| d <= now) {
            waiting.fetch_sub(p.count, Ordering::AcqRel);
            crate::telemetry::shed(&model.name, &model.version, crate::telemetry::SHED_DEADLINE);
            r.finish(Err(ComputeError::DeadlineExceeded {
                waited_ms: now.saturating_duration_since(r.submitted).as_millis() as u64,
            }));
            return false;
        }
        true
    });
}
