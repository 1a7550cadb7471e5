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
//! Threads: an engine of more than one thread starts a pool of that many on its first batch
//! and keeps it until dropped, so a batch costs wake-ups rather than thread starts. A batch of
//! at least as many samples as threads is split into contiguous runs of samples, several per
//! thread, each in its own workspace, which the calling thread and the pool's take as they come
//! free: samples never interact, so nothing synchronises inside the batch but the hand-out. A
//! smaller batch (one image, most often) runs on the pool as one pass whose convolutions are
//! each spread over all threads (see [`run`]), unless the network is so small that handing it
//! over costs more than it saves. Either way, results are bitwise the same for any thread count.

pub mod kernels;
pub mod plan;
pub mod run;

use std::sync::atomic::{AtomicUsize, Ordering};
use std::sync::{Mutex, OnceLock, PoisonError};

use rayon_core::{ThreadPool, ThreadPoolBuilder};
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
    /// The threads of batches that use more than one, started by the first such batch;
    /// `None` inside if the OS refused them (batches then run on the calling thread). Callers
    /// running batches at the same time share it: their parts queue for its threads.
    pool: OnceLock<Option<ThreadPool>>,
    /// Whether a batch smaller than the thread count is spread over the threads
    /// ([`Plan::worth_spreading`]) or runs on the calling thread.
    spread: bool,
}

/// One step's share of [`Engine::time_steps`].
#[derive(Clone, Debug, serde::Serialize)]
pub struct StepTime {
    /// The graph node the step came from (after fusion, the producing node).
    pub name: String,
    /// What the step does, in a few words.
    pub what: String,
    /// Multiply-adds of one sample, as a direct convolution counts them (0 outside
    /// convolutions and dense layers).
    pub multiply_adds: u64,
    /// Time in the step over all passes.
    pub seconds: f64,
}

/// One run's input and output, until a thread takes it.
type RunSlices<'a> = (&'a [f32], &'a mut [f32]);

/// Runs of samples per thread a batch is cut into (see `Engine::run_shared_out`): enough that a
/// slowed thread costs a fraction of a run, few enough that each run still batches its dense
/// layers.
const RUNS_PER_THREAD: usize = 4;

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
        let plan = Plan::new(bundle, isa);
        Ok(Engine {
            spread: plan.worth_spreading(),
            plan,
            threads: config.threads,
            max_batch: config.max_batch,
            workspaces: Mutex::new(Vec::new()),
            pool: OnceLock::new(),
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

    /// The engine's threads, started on first use; `None` for an engine of one thread, or
    /// when the OS would not start them.
    fn pool(&self) -> Option<&ThreadPool> {
        if self.threads == 1 {
            return None;
        }
        self.pool
            .get_or_init(|| {
                let built = ThreadPoolBuilder::new()
                    .num_threads(self.threads)
                    .thread_name(|i| format!("convoy-engine-{i}"))
                    .build();
                built
                    .inspect_err(|e| {
                        tracing::warn!(error = %e, "could not start the engine's threads; \
                            batches run on the calling thread");
                    })
                    .ok()
            })
            .as_ref()
    }

    /// The checks of [`Engine::run`].
    fn check_input(
        &self,
        input: &[f32],
        batch: usize,
        options: RunOptions,
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
        let expected = batch.saturating_mul(in_len);
        if input.len() != expected {
            return Err(RunError::InputLength {
                batch,
                shape: self.plan.input_shape().to_vec(),
                expected,
                found: input.len(),
            });
        }
        if options.reject_non_finite
            && let Some(i) = input.iter().position(|v| !v.is_finite())
        {
            return Err(RunError::NonFinite {
                sample: i / in_len,
                index: i % in_len,
            });
        }
        Ok(())
    }

    /// Runs `passes` batches of `batch` samples in one workspace and returns the time spent in
    /// each step of the plan, in plan order: a profile for people tuning a model or the
    /// engine. An engine of one thread runs on the calling thread; a larger one spreads every
    /// step over all its threads (as it runs a batch smaller than its thread count), since a
    /// batch split into per-thread runs would time each step several times over.
    ///
    /// # Errors
    /// As [`Engine::run`].
    pub fn time_steps(
        &self,
        input: &[f32],
        batch: usize,
        passes: usize,
    ) -> Result<Vec<StepTime>, RunError> {
        self.check_input(input, batch, RunOptions::default())?;
        let mut output = vec![0.0; batch * self.plan.output_len()];
        let mut ws = Workspace::timing_steps();
        let pool = self.pool();
        for _ in 0..passes {
            match pool {
                Some(pool) => pool.install(|| {
                    self.plan
                        .run_unchecked(input, batch, &mut ws, &mut output, Some(pool));
                }),
                None => self
                    .plan
                    .run_unchecked(input, batch, &mut ws, &mut output, None),
            }
        }
        let times = ws.step_times();
        Ok(self
            .plan
            .steps()
            .iter()
            .zip(times)
            .map(|(step, time)| StepTime {
                name: step.name.clone(),
                what: step.describe(),
                multiply_adds: self.plan.step_multiply_adds(step) as u64,
                seconds: time.as_secs_f64(),
            })
            .collect())
    }

    /// `batch` samples in one workspace, each step spread over `team`.
    fn run_pass(&self, input: &[f32], batch: usize, output: &mut [f32], team: run::Team<'_>) {
        let mut ws = self.take_workspace();
        self.plan.run_unchecked(input, batch, &mut ws, output, team);
        self.give_workspace(ws);
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
        self.check_input(input, batch, options)?;
        assert_eq!(
            output.len(),
            batch * self.plan.output_len(),
            "output buffer length"
        );
        let pool = match self.pool() {
            Some(pool) if batch >= self.threads || self.spread => pool,
            _ => {
                self.run_pass(input, batch, output, None);
                return Ok(());
            }
        };
        if batch < self.threads {
            // Too few samples to go round: every thread works on every step.
            pool.install(|| self.run_pass(input, batch, output, Some(pool)));
            return Ok(());
        }
        self.run_shared_out(pool, input, batch, output);
        Ok(())
    }

    /// A batch of at least as many samples as threads: cut into contiguous runs of samples,
    /// several per thread ([`RUNS_PER_THREAD`]), which the calling thread and `threads - 1` of
    /// the pool's take one at a time as they come free. On a shared machine a core slowed by
    /// its neighbours then takes fewer runs instead of holding up the whole batch. Samples
    /// never interact and each run has its own workspace, so which thread takes which run
    /// changes no result.
    fn run_shared_out(&self, pool: &ThreadPool, input: &[f32], batch: usize, output: &mut [f32]) {
        let (in_len, out_len) = (self.plan.input_len(), self.plan.output_len());
        let len = batch.div_ceil(self.threads * RUNS_PER_THREAD).max(1);
        let runs: Vec<Mutex<Option<RunSlices<'_>>>> = input
            .chunks(len * in_len)
            .zip(output.chunks_mut(len * out_len))
            .map(|run| Mutex::new(Some(run)))
            .collect();
        let next = AtomicUsize::new(0);
        let take_runs = || {
            while let Some(slot) = runs.get(next.fetch_add(1, Ordering::Relaxed)) {
                // A poisoned lock only means a run panicked; its slot is still valid.
                let run = slot.lock().unwrap_or_else(PoisonError::into_inner).take();
                if let Some((i, o)) = run {
                    self.run_pass(i, i.len() / in_len, o, None);
                }
            }
        };
        pool.in_place_scope(|scope| {
            for _ in 1..self.threads {
                scope.spawn(|_| take_runs());
            }
            take_runs();
        });
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
