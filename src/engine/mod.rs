//! The executor: turns a verified bundle into a plan and runs batches through it.
//!
//! Layout:
//! - [`plan`]: bundle → [`Plan`] (folding, fusion, weight packing, buffer layout), once per
//!   model version;
//! - [`run`]: a batch through a plan in a reusable [`Workspace`];
//! - [`kernels`]: the inner loops, picked per instruction set when the plan is built;
//! - this file: [`Engine`], which owns a plan, checks inputs, splits a batch over threads and
//!   replays a bundle's check samples.
//!
//! Threads: a batch is split into contiguous runs of samples, one per thread, each run in its
//! own workspace. Samples never interact, so results are bitwise the same for any split, and
//! no synchronisation happens inside a batch. The calling thread computes the first run; the
//! others go to helper threads the engine starts on its first split batch and keeps until it
//! is dropped (`Helpers`), so a batch costs a wake-up per helper rather than a thread start.
//! A batch of one sample (or an engine of one thread) never leaves the calling thread.

pub mod kernels;
pub mod plan;
pub mod run;

use std::any::Any;
use std::panic::{AssertUnwindSafe, catch_unwind, resume_unwind};
use std::sync::mpsc::{self, Sender};
use std::sync::{Arc, Condvar, Mutex, TryLockError};
use std::thread::JoinHandle;

use thiserror::Error;

use crate::bundle::{Bundle, CHECK_TOLERANCE};
pub use kernels::isa::{Isa, IsaError};
pub use plan::Plan;
pub use run::Workspace;

/// How an engine runs.
#[derive(Clone, Debug)]
pub struct EngineConfig {
    /// Threads one batch may use (1 = the calling thread only).
    pub threads: usize,
    /// Instruction set; `None` picks the best the CPU has (or `CONVOY_ISA`).
    pub isa: Option<Isa>,
    /// Largest batch one run accepts; the batching scheduler stays below it. The engine's own
    /// buffers do not grow with the batch (a batch runs in slices, see
    /// [`Plan::slice_samples`]); this bounds the inputs and outputs callers hand it.
    pub max_batch: usize,
}

impl Default for EngineConfig {
    fn default() -> Self {
        EngineConfig {
            threads: 1,
            isa: None,
            max_batch: 1024,
        }
    }
}

/// Why an engine could not be built.
#[derive(Debug, Error)]
pub enum EngineError {
    #[error(transparent)]
    Isa(#[from] IsaError),
    #[error("instruction set {isa:?} is not supported by this CPU")]
    UnsupportedIsa { isa: Isa },
    #[error("threads must be between 1 and {max}, got {threads}")]
    Threads { threads: usize, max: usize },
}

/// Why a batch was refused.
#[derive(Clone, Debug, PartialEq, Error)]
pub enum RunError {
    #[error("empty batch")]
    EmptyBatch,
    #[error("batch of {batch} samples exceeds this engine's limit of {limit}")]
    BatchTooLarge { batch: usize, limit: usize },
    #[error(
        "input has {found} values; a batch of {batch} samples of shape {shape:?} needs {expected}"
    )]
    InputLength {
        batch: usize,
        shape: Vec<usize>,
        expected: usize,
        found: usize,
    },
    #[error("sample {sample} has a non-finite value at element {index}")]
    NonFinite { sample: usize, index: usize },
}

/// Options of one run.
#[derive(Clone, Copy, Debug, Default)]
pub struct RunOptions {
    /// Refuse inputs holding NaN or infinity instead of computing with them.
    pub reject_non_finite: bool,
}

/// A plan with its workspaces: the thing that answers batches.
pub struct Engine {
    plan: Plan,
    threads: usize,
    max_batch: usize,
    /// Idle workspaces; a std `Mutex` because it is held for a push or pop only, never across
    /// an await or a kernel.
    workspaces: Mutex<Vec<Workspace>>,
    /// Helper threads for split batches, started by the first one. The lock is held for a
    /// whole batch: a second caller splitting a batch at the same time finds it taken and
    /// starts scoped threads of its own instead of waiting.
    helpers: Mutex<Option<Helpers>>,
}

/// Result of replaying a bundle's check samples.
#[derive(Clone, Debug, PartialEq)]
pub struct CheckReport {
    pub samples: usize,
    /// Largest `|ours - stored|`.
    pub max_abs_error: f32,
    /// The bound it had to stay under: `CHECK_TOLERANCE · max(1, max |stored|)`.
    pub bound: f32,
    pub passed: bool,
    pub produced_by: String,
}

impl Engine {
    /// Plans `bundle`.
    ///
    /// # Errors
    /// An instruction set forced by configuration or `CONVOY_ISA` that the CPU lacks; a thread
    /// count of 0 or above 256.
    pub fn new(bundle: &Bundle, config: &EngineConfig) -> Result<Engine, EngineError> {
        if config.threads == 0 || config.threads > 256 {
            return Err(EngineError::Threads {
                threads: config.threads,
                max: 256,
            });
        }
        let isa = match config.isa {
            Some(isa) if isa.is_supported() => isa,
            Some(isa) => return Err(EngineError::UnsupportedIsa { isa }),
            None => Isa::detect()?,
        };
        Ok(Engine {
            plan: Plan::new(bundle, isa),
            threads: config.threads,
            max_batch: config.max_batch,
            workspaces: Mutex::new(Vec::new()),
            helpers: Mutex::new(None),
        })
    }

    pub fn plan(&self) -> &Plan {
        &self.plan
    }

    pub fn threads(&self) -> usize {
        self.threads
    }

    fn take_workspace(&self) -> Workspace {
        // A poisoned lock only means another thread panicked between push and pop; the Vec
        // is still a valid list of workspaces.
        let mut pool = self.workspaces.lock().unwrap_or_else(|p| p.into_inner());
        pool.pop().unwrap_or_default()
    }

    fn give_workspace(&self, ws: Workspace) {
        let mut pool = self.workspaces.lock().unwrap_or_else(|p| p.into_inner());
        pool.push(ws);
    }

    /// Runs `batch` samples (row-major, back to back) and returns the outputs, back to back.
    ///
    /// # Errors
    /// An empty batch, a batch above the configured limit, an input of the wrong length, or
    /// (if asked) non-finite input values.
    pub fn run(
        &self,
        input: &[f32],
        batch: usize,
        options: RunOptions,
    ) -> Result<Vec<f32>, RunError> {
        let mut out = vec![0.0; batch * self.plan.output_len()];
        self.run_into(input, batch, options, &mut out)?;
        Ok(out)
    }

    /// As [`Engine::run`], writing into `output` (`batch · output_len` values).
    ///
    /// # Errors
    /// As [`Engine::run`].
    ///
    /// # Panics
    /// If `output` does not hold `batch · output_len` values: that is a bug in the caller,
    /// not bad input.
    pub fn run_into(
        &self,
        input: &[f32],
        batch: usize,
        options: RunOptions,
        output: &mut [f32],
    ) -> Result<(), RunError> {
        if batch == 0 {
            return Err(RunError::EmptyBatch);
        }
        if batch > self.max_batch {
            return Err(RunError::BatchTooLarge {
                batch,
                limit: self.max_batch,
            });
        }
        let in_len = self.plan.input_len();
        let out_len = self.plan.output_len();
        let expected = batch.saturating_mul(in_len);
        if input.len() != expected {
            return Err(RunError::InputLength {
                batch,
                shape: self.plan.input_shape().to_vec(),
                expected,
                found: input.len(),
            });
        }
        assert_eq!(output.len(), batch * out_len, "output buffer length");
        if options.reject_non_finite
            && let Some(i) = input.iter().position(|v| !v.is_finite())
        {
            return Err(RunError::NonFinite {
                sample: i / in_len,
                index: i % in_len,
            });
        }
        let parts = self.threads.min(batch);
        if parts == 1 {
            let mut ws = self.take_workspace();
            self.plan.run_unchecked(input, batch, &mut ws, output);
            self.give_workspace(ws);
            return Ok(());
        }
        // Contiguous runs of samples, the first ones one sample longer when it does not divide.
        let base = batch / parts;
        let extra = batch % parts;
        let mut runs = Vec::with_capacity(parts);
        let mut rest_in = input;
        let mut rest_out = &mut *output;
        for p in 0..parts {
            let n = base + usize::from(p < extra);
            let (i, ri) = rest_in.split_at(n * in_len);
            let (o, ro) = std::mem::take(&mut rest_out).split_at_mut(n * out_len);
            rest_in = ri;
            rest_out = ro;
            runs.push((i, o, n));
        }
        let run = |(i, o, n): (&[f32], &mut [f32], usize)| {
            let mut ws = self.take_workspace();
            self.plan.run_unchecked(i, n, &mut ws, o);
            self.give_workspace(ws);
        };
        let mut runs = runs.into_iter();
        // `parts >= 2`, so there is a first run.
        let mine = runs.next().expect("at least two runs");
        let helpers = match self.helpers.try_lock() {
            Ok(guard) => Some(guard),
            // A panic inside a batch poisons the lock; the helpers survive it (they catch
            // their tasks' panics), so the set is still usable.
            Err(TryLockError::Poisoned(p)) => Some(p.into_inner()),
            Err(TryLockError::WouldBlock) => None,
        };
        match helpers {
            Some(mut slot) => {
                let helpers = slot.get_or_insert_with(|| Helpers::start(self.threads - 1));
                helpers.run_scoped(runs.map(|r| move || run(r)), || run(mine));
            }
            None => std::thread::scope(|scope| {
                for r in runs {
                    scope.spawn(move || run(r));
                }
                run(mine);
            }),
        }
        Ok(())
    }

    /// Replays the bundle's check samples and compares with the stored outputs.
    /// Returns `None` when the bundle carries none.
    pub fn replay_check_samples(&self, bundle: &Bundle) -> Option<CheckReport> {
        let cs = bundle.manifest().check_samples.as_ref()?;
        let input = bundle.tensor(&cs.input)?;
        let expected = bundle.tensor(&cs.output)?;
        let got = self.run(&input, cs.count, RunOptions::default()).ok()?;
        let (max_abs_error, bound) = tolerance_check(&got, &expected);
        Some(CheckReport {
            samples: cs.count,
            max_abs_error,
            bound,
            passed: max_abs_error <= bound,
            produced_by: cs.produced_by.clone(),
        })
    }
}

/// `(max |got - want|, CHECK_TOLERANCE · max(1, max |want|))`; a NaN anywhere counts as an
/// infinite error.
pub fn tolerance_check(got: &[f32], want: &[f32]) -> (f32, f32) {
    let scale = want.iter().fold(1.0f32, |m, v| m.max(v.abs()));
    let mut err = if got.len() == want.len() {
        0.0f32
    } else {
        f32::INFINITY
    };
    for (g, w) in got.iter().zip(want) {
        let d = (g - w).abs();
        err = if d.is_nan() {
            f32::INFINITY
        } else {
            err.max(d)
        };
    }
    (err, CHECK_TOLERANCE * scale)
}

/// A task as a helper thread receives it: lifetime-erased by [`Helpers::run_scoped`], which
/// does not return before the task has finished.
type Task = Box<dyn FnOnce() + Send + 'static>;

/// Long-lived threads that run the later runs of a split batch; the caller runs the first.
/// Each helper has its own queue, so a batch of `k` runs wakes exactly `k - 1` of them.
struct Helpers {
    queues: Vec<Sender<Task>>,
    threads: Vec<JoinHandle<()>>,
}

impl Helpers {
    /// Starts up to `n` helpers. A thread the OS refuses is simply missing: its runs then
    /// execute on the calling thread.
    fn start(n: usize) -> Helpers {
        let mut queues = Vec::with_capacity(n);
        let mut threads = Vec::with_capacity(n);
        for i in 0..n {
            let (tx, rx) = mpsc::channel::<Task>();
            let spawned = std::thread::Builder::new()
                .name(format!("convoy-engine-{}", i + 1))
                .spawn(move || {
                    // Ends when the engine drops the sending side.
                    while let Ok(task) = rx.recv() {
                        task();
                    }
                });
            match spawned {
                Ok(handle) => {
                    queues.push(tx);
                    threads.push(handle);
                }
                Err(e) => {
                    tracing::warn!(error = %e, "could not start an engine helper thread");
                    break;
                }
            }
        }
        Helpers { queues, threads }
    }

    /// Runs each of `tasks` on a helper (the i-th on the i-th helper, the ones beyond the
    /// helpers on this thread) and `mine` on this thread; returns when all have finished.
    /// A panic in any of them is re-raised here once all have finished, as
    /// `std::thread::scope` would.
    fn run_scoped<'a, F: FnOnce() + Send + 'a>(
        &self,
        tasks: impl Iterator<Item = F>,
        mine: impl FnOnce(),
    ) {
        let latch = Arc::new(Latch::default());
        // Waits for the helpers' tasks on every way out of this function, unwinding included:
        // they borrow from the caller's frame.
        let wait = WaitFor(&latch);
        let mut inline = Vec::new();
        let mut queues = self.queues.iter();
        for task in tasks {
            let Some(queue) = queues.next() else {
                inline.push(task);
                continue;
            };
            latch.add();
            let done = Arc::clone(&latch);
            let wrapped: Box<dyn FnOnce() + Send + 'a> = Box::new(move || {
                let result = catch_unwind(AssertUnwindSafe(task));
                done.finish(result.err());
            });
            // SAFETY: the task borrows data that lives for 'a, which outlasts this call; the
            // task finishes before this call returns or unwinds, because `wait` blocks until
            // the latch has counted every task added to it, and every such task counts itself
            // down when it ends (panics are caught above). Only the lifetime changes; the
            // type is otherwise the same.
            let erased: Task =
                unsafe { std::mem::transmute::<Box<dyn FnOnce() + Send + 'a>, Task>(wrapped) };
            if let Err(mpsc::SendError(task)) = queue.send(erased) {
                // The helper is gone (it cannot be, short of the process ending); run here.
                task();
            }
        }
        let mine = catch_unwind(AssertUnwindSafe(|| {
            mine();
            for task in inline {
                task();
            }
        }));
        drop(wait);
        if let Err(payload) = mine {
            resume_unwind(payload);
        }
        if let Some(payload) = latch.take_panic() {
            resume_unwind(payload);
        }
    }
}

impl Drop for Helpers {
    fn drop(&mut self) {
        // Closing the queues ends the helpers' loops.
        self.queues.clear();
        for t in self.threads.drain(..) {
            // A helper never panics (tasks' panics are caught), so join cannot fail.
            let _ = t.join();
        }
    }
}

/// Counts a batch's unfinished helper tasks and keeps the first panic among them.
#[derive(Default)]
struct Latch {
    state: Mutex<LatchState>,
    done: Condvar,
}

#[derive(Default)]
struct LatchState {
    pending: usize,
    panic: Option<Box<dyn Any + Send>>,
}

impl Latch {
    fn lock(&self) -> std::sync::MutexGuard<'_, LatchState> {
        // Nothing panics while holding this lock; a poisoned one still holds a valid count.
        self.state.lock().unwrap_or_else(|p| p.into_inner())
    }

    fn add(&self) {
        self.lock().pending += 1;
    }

    fn finish(&self, panic: Option<Box<dyn Any + Send>>) {
        let mut state = self.lock();
        state.pending -= 1;
        if state.panic.is_none() {
            state.panic = panic;
        }
        if state.pending == 0 {
            self.done.notify_all();
        }
    }

    fn wait(&self) {
        let mut state = self.lock();
        while state.pending > 0 {
            state = self.done.wait(state).unwrap_or_else(|p| p.into_inner());
        }
    }

    fn take_panic(&self) -> Option<Box<dyn Any + Send>> {
        self.lock().panic.take()
    }
}

/// Waits for a latch when dropped.
struct WaitFor<'l>(&'l Latch);

impl Drop for WaitFor<'_> {
    fn drop(&mut self) {
        self.0.wait();
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use std::sync::atomic::{AtomicUsize, Ordering};

    /// The contract of `std::thread::scope`, which the helpers replace: every task runs once,
    /// borrowed data is usable, and a task's panic reaches the caller after all have ended.
    #[test]
    fn helpers_run_every_task_and_pass_panics_on() {
        let helpers = Helpers::start(2);
        let hits: Vec<AtomicUsize> = (0..4).map(|_| AtomicUsize::new(0)).collect();
        for _ in 0..3 {
            // Three tasks for two helpers: the third runs on this thread.
            helpers.run_scoped(
                (1..4).map(|i| {
                    let hits = &hits;
                    move || {
                        hits[i].fetch_add(1, Ordering::SeqCst);
                    }
                }),
                || {
                    hits[0].fetch_add(1, Ordering::SeqCst);
                },
            );
        }
        let counts: Vec<usize> = hits.iter().map(|h| h.load(Ordering::SeqCst)).collect();
        assert_eq!(counts, [3, 3, 3, 3]);

        let finished = AtomicUsize::new(0);
        let caught = catch_unwind(AssertUnwindSafe(|| {
            helpers.run_scoped(
                [
                    Box::new(|| {
                        if finished.load(Ordering::SeqCst) < 10 {
                            panic!("boom");
                        }
                    }) as Box<dyn FnOnce() + Send>,
                    Box::new(|| {
                        std::thread::sleep(std::time::Duration::from_millis(20));
                        finished.fetch_add(1, Ordering::SeqCst);
                    }),
                ]
                .into_iter(),
                || {},
            )
        }));
        let payload = caught.expect_err("the helper's panic is re-raised");
        assert_eq!(payload.downcast_ref::<&str>(), Some(&"boom"));
        assert_eq!(
            finished.load(Ordering::SeqCst),
            1,
            "re-raised after all ended"
        );

        // The helpers survive a task's panic.
        helpers.run_scoped(
            std::iter::once(|| {
                hits[1].fetch_add(1, Ordering::SeqCst);
            }),
            || {},
        );
        assert_eq!(hits[1].load(Ordering::SeqCst), 4);
    }
}
