//! The engine alone, without a server: for each batch size, batches of seeded random input run
//! back to back on the calling thread (and the engine's own threads) for a fixed time;
//! reported as images per second and the median time of one batch.
//!
//! This is the ceiling a server can approach with that batch size and thread count: no
//! network, no decoding, no queueing.
//!
//! How close the engine comes to the machine: each row's work rate (the network's
//! multiply-adds, each counted as 2 floating-point operations, times images per second)
//! against the single-core multiply-add peak measured right after (`engine::kernels::peak`),
//! times the threads.

use std::path::PathBuf;
use std::time::{Duration, Instant};

use serde::Serialize;

use super::histogram::Histogram;
use super::inputs::SplitMix64;
use super::report::number;
use super::{LoadgenError, MAX_DURATION};
use crate::bundle::Bundle;
use crate::engine::kernels::peak::fma_peak;
use crate::engine::{Engine, EngineConfig, RunOptions, StepTime};

/// Batch sizes measured when none are given.
pub const DEFAULT_BATCHES: [usize; 7] = [1, 2, 4, 8, 16, 32, 64];
/// Largest batch size accepted (the engine's default batch limit).
pub const MAX_BATCH: usize = 1024;
/// Most batch sizes in one measurement.
pub const MAX_BATCH_SIZES: usize = 32;
/// Longest warm-up per batch size; at least one batch always runs first, so the workspace has
/// grown to the batch before timing starts.
const MAX_WARMUP: Duration = Duration::from_millis(500);
/// How long the multiply-add peak is measured (its fastest sixteenth counts).
const PEAK_TIME: Duration = Duration::from_millis(400);

/// What to measure.
#[derive(Clone, Debug)]
pub struct LocalConfig {
    pub bundle: PathBuf,
    pub batches: Vec<usize>,
    /// The engine's threads per batch.
    pub threads: usize,
    /// Measured time per batch size.
    pub duration: Duration,
    pub seed: u64,
    /// Also time each step of the plan at the largest batch size, for about `duration`.
    pub steps: bool,
}

/// One batch size's result.
#[derive(Clone, Debug, Serialize)]
pub struct LocalResult {
    pub batch: usize,
    /// Batches timed.
    pub runs: u64,
    pub images_per_s: f64,
    /// Median time of one batch, within the histogram's relative error.
    pub ms_per_batch_p50: f64,
    /// Billions of floating-point operations per second in convolutions and dense layers.
    pub gflops: f64,
    /// `gflops` over the measured peak of all the engine's threads (one core's × threads).
    pub of_fma_peak: f64,
}

/// Field names are the JSON keys.
#[derive(Clone, Debug, Serialize)]
pub struct LocalReport {
    /// Always true: tells this report from a server run's.
    pub local: bool,
    pub bundle: String,
    pub model: String,
    pub version: String,
    pub isa: String,
    pub threads: usize,
    /// Measured time per batch size.
    pub duration_s: f64,
    pub results: Vec<LocalResult>,
    pub best_images_per_s: f64,
    pub best_batch: usize,
    /// Opening the bundle (read, verify) and planning it, in milliseconds.
    pub load_ms: f64,
    /// Peak resident memory of the whole process at the end, in MiB (Linux only): run one batch
    /// size at a time to attribute it.
    pub peak_rss_mb: Option<f64>,
    /// Multiply-adds of one image in convolutions and dense layers (as `convoy inspect`).
    pub multiply_adds_per_image: u64,
    /// The single-core multiply-add peak of the engine's instruction set, measured after the
    /// batches, in billions of floating-point operations per second.
    pub fma_peak_gflops: f64,
    /// With `steps`: time in each step of the plan, in plan order, over `step_passes` batches
    /// of the largest size.
    #[serde(skip_serializing_if = "Vec::is_empty")]
    pub steps: Vec<StepTime>,
    #[serde(skip_serializing_if = "is_zero")]
    pub step_passes: usize,
}

fn is_zero(n: &usize) -> bool {
    *n == 0
}

impl LocalConfig {
    /// # Errors
    /// No batch sizes, too many, one outside 1..=[`MAX_BATCH`], or a duration outside
    /// (0, 3600 s].
    pub fn validate(&self) -> Result<(), LoadgenError> {
        let bad = self.batches.is_empty()
            || self.batches.len() > MAX_BATCH_SIZES
            || self.batches.iter().any(|b| !(1..=MAX_BATCH).contains(b));
        if bad {
            return Err(LoadgenError::Setting {
                name: "--batches",
                value: format!("{:?}", self.batches),
                allowed: "1 to 32 batch sizes, each between 1 and 1024",
            });
        }
        if self.duration.is_zero() || self.duration > MAX_DURATION {
            return Err(LoadgenError::Setting {
                name: "--duration",
                value: format!("{:?}", self.duration),
                allowed: "above 0 s and at most 3600 s",
            });
        }
        Ok(())
    }
}

/// Measures every batch size of `config` in turn; `on_batch(batch, index, count)` is called
/// before each.
///
/// # Errors
/// Bad settings, a bundle that does not open or verify, an engine that cannot be built (a
/// thread count out of range), or a batch the engine refuses.
pub fn run_local(
    config: &LocalConfig,
    mut on_batch: impl FnMut(usize, usize, usize),
) -> Result<LocalReport, LoadgenError> {
    config.validate()?;
    let loading = Instant::now();
    let bundle = Bundle::open(&config.bundle)?;
    let engine = Engine::new(
        &bundle,
        &EngineConfig {
            threads: config.threads,
            max_batch: MAX_BATCH,
            ..EngineConfig::default()
        },
    )?;
    let load_ms = loading.elapsed().as_secs_f64() * 1e3;
    let multiply_adds = bundle.summary().multiply_adds;
    let (in_len, out_len) = (engine.plan().input_len(), engine.plan().output_len());
    let largest = config.batches.iter().copied().max().unwrap_or(1);
    let mut rng = SplitMix64(config.seed);
    // One input for the largest batch; smaller batches use its beginning.
    let input: Vec<f32> = (0..largest * in_len)
        .map(|_| rng.unit() * 2.0 - 1.0)
        .collect();
    let mut output = vec![0.0f32; largest * out_len];
    let mut results = Vec::with_capacity(config.batches.len());
    for (index, &batch) in config.batches.iter().enumerate() {
        on_batch(batch, index, config.batches.len());
        let (x, y) = (&input[..batch * in_len], &mut output[..batch * out_len]);
        let run = |y: &mut [f32]| {
            engine
                .run_into(x, batch, RunOptions::default(), y)
                .map_err(|source| LoadgenError::Run { batch, source })
        };
        let warm = Instant::now();
        loop {
            run(y)?;
            if warm.elapsed() >= (config.duration / 10).min(MAX_WARMUP) {
                break;
            }
        }
        let mut times = Histogram::new();
        let start = Instant::now();
        let mut last = start;
        while last - start < config.duration {
            run(y)?;
            let now = Instant::now();
            times.record(u64::try_from((now - last).as_nanos()).unwrap_or(u64::MAX));
            last = now;
        }
        let elapsed = (last - start).as_secs_f64();
        let images_per_s = (times.len() * batch as u64) as f64 / elapsed;
        results.push(LocalResult {
            batch,
            runs: times.len(),
            images_per_s,
            // At least one batch ran (the loop body runs before the duration can pass).
            ms_per_batch_p50: times.quantile_ppm(500_000).unwrap_or(0) as f64 / 1e6,
            gflops: 2.0 * multiply_adds as f64 * images_per_s / 1e9,
            of_fma_peak: 0.0,
        });
    }
    let (steps, step_passes) = match results.iter().find(|r| r.batch == largest) {
        Some(r) if config.steps => profile_steps(&engine, &input, r, config.duration)?,
        _ => (Vec::new(), 0),
    };
    let peak = fma_peak(engine.plan().isa(), PEAK_TIME).gflops;
    for r in &mut results {
        r.of_fma_peak = r.gflops / (peak * config.threads as f64);
    }
    let best = results
        .iter()
        .max_by(|a, b| a.images_per_s.total_cmp(&b.images_per_s))
        .map_or((0.0, 0), |r| (r.images_per_s, r.batch));
    let manifest = bundle.manifest();
    Ok(LocalReport {
        local: true,
        bundle: config.bundle.display().to_string(),
        model: manifest.name.clone(),
        version: manifest.version.clone(),
        isa: engine.plan().isa().name().to_string(),
        threads: config.threads,
        duration_s: config.duration.as_secs_f64(),
        results,
        best_images_per_s: best.0,
        best_batch: best.1,
        load_ms,
        peak_rss_mb: peak_rss_mb(),
        multiply_adds_per_image: multiply_adds,
        fma_peak_gflops: peak,
        steps,
        step_passes,
    })
}

/// Times every step of the plan at `measured`'s batch size, over as many passes as fill about
/// `duration` at its measured speed; returns the step times and the passes.
fn profile_steps(
    engine: &Engine,
    input: &[f32],
    measured: &LocalResult,
    duration: Duration,
) -> Result<(Vec<StepTime>, usize), LoadgenError> {
    let batch = measured.batch;
    let per_pass = measured.ms_per_batch_p50.max(1e-3) / 1e3;
    let passes = ((duration.as_secs_f64() / per_pass) as usize).max(1);
    let x = &input[..batch * engine.plan().input_len()];
    let steps = engine
        .time_steps(x, batch, passes)
        .map_err(|source| LoadgenError::Run { batch, source })?;
    Ok((steps, passes))
}

/// The process's peak resident memory so far, in MiB (Linux: `VmHWM` of /proc/self/status,
/// see proc(5)); `None` elsewhere.
fn peak_rss_mb() -> Option<f64> {
    let status = std::fs::read_to_string("/proc/self/status").ok()?;
    let line = status.lines().find(|l| l.starts_with("VmHWM:"))?;
    let kib: f64 = line.split_whitespace().nth(1)?.parse().ok()?;
    Some(kib / 1024.0)
}

impl LocalReport {
    /// The report for people.
    pub fn to_text(&self) -> String {
        use std::fmt::Write as _;
        let mut s = String::new();
        let threads = if self.threads == 1 {
            "thread"
        } else {
            "threads"
        };
        // Writing to a String cannot fail.
        let _ = writeln!(
            s,
            "engine alone: {} {} from {}, {}, {} {threads}, {} s per batch size",
            self.model,
            self.version,
            self.bundle,
            self.isa,
            self.threads,
            number(self.duration_s)
        );
        let _ = writeln!(s);
        let _ = writeln!(
            s,
            "{:>6}  {:>12}  {:>16}  {:>10}  {:>8}  {:>9}  {:>8}",
            "batch", "images/s", "ms/batch (p50)", "ms/image", "batches", "GFLOP/s", "of peak"
        );
        for r in &self.results {
            let _ = writeln!(
                s,
                "{:>6}  {:>12}  {:>16}  {:>10}  {:>8}  {:>9}  {:>7.1}%",
                r.batch,
                number(r.images_per_s),
                number(r.ms_per_batch_p50),
                number(r.ms_per_batch_p50 / r.batch as f64),
                r.runs,
                number(r.gflops),
                100.0 * r.of_fma_peak
            );
        }
        let _ = writeln!(
            s,
            "\nbest: {} images/s at batch {}",
            number(self.best_images_per_s),
            self.best_batch
        );
        let _ = writeln!(
            s,
            "work: {} multiply-adds per image (2 FLOPs each, as a direct convolution counts \
             them; Winograd layers do fewer); peak: {} GFLOP/s on one core ({}), measured \
             after the batches; of peak = GFLOP/s / (peak x threads)",
            number(self.multiply_adds_per_image as f64),
            number(self.fma_peak_gflops),
            self.isa
        );
        let _ = write!(s, "load (read, verify, plan): {} ms", number(self.load_ms));
        if let Some(mb) = self.peak_rss_mb {
            let _ = write!(s, "; peak resident memory {} MiB", number(mb));
        }
        let _ = writeln!(s);
        self.render_steps(&mut s);
        s
    }

    /// The slowest steps of the profile, slowest first, and what the rest add up to.
    fn render_steps(&self, s: &mut String) {
        use std::fmt::Write as _;
        if self.steps.is_empty() {
            return;
        }
        let total: f64 = self.steps.iter().map(|t| t.seconds).sum();
        let batch = self.results.iter().map(|r| r.batch).max().unwrap_or(1);
        let per_batch = |seconds: f64| seconds / self.step_passes.max(1) as f64;
        let mut order: Vec<&StepTime> = self.steps.iter().collect();
        order.sort_by(|a, b| b.seconds.total_cmp(&a.seconds));
        let shown = order.len().min(SHOWN_STEPS);
        let threads = match self.threads {
            1 => "on one thread".to_string(),
            n => format!("each step spread over {n} threads"),
        };
        let _ = writeln!(
            s,
            "\ntime by step at batch {batch} ({} passes, {threads}); the {shown} slowest of {} \
             steps:",
            self.step_passes,
            self.steps.len()
        );
        let _ = writeln!(
            s,
            "{:>6}  {:>10}  {:>8}  {:<WHAT$}  step (graph node)",
            "share", "ms/batch", "GFLOP/s", "what"
        );
        for t in &order[..shown] {
            let gflops = if t.seconds > 0.0 && t.multiply_adds > 0 {
                number(2.0 * (t.multiply_adds * batch as u64) as f64 / per_batch(t.seconds) / 1e9)
            } else {
                "-".to_string()
            };
            let _ = writeln!(
                s,
                "{:>5.1}%  {:>10}  {gflops:>8}  {:<WHAT$}  {}",
                100.0 * t.seconds / total.max(f64::MIN_POSITIVE),
                number(per_batch(t.seconds) * 1e3),
                t.what,
                t.name
            );
        }
        let rest: f64 = order[shown..].iter().map(|t| t.seconds).sum();
        if shown < order.len() {
            let _ = writeln!(
                s,
                "{:>5.1}%  {:>10}  {:>8}  the other {} steps",
                100.0 * rest / total.max(f64::MIN_POSITIVE),
                number(per_batch(rest) * 1e3),
                "",
                order.len() - shown
            );
        }
    }
}

/// Steps listed in the text report's profile.
const SHOWN_STEPS: usize = 25;
/// Width of the profile's "what" column.
const WHAT: usize = 58;
