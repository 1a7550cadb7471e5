//! The machine's single-precision multiply-add peak, measured: the yardstick the convolution
//! benchmarks are compared against ("x % of peak").
//!
//! [`fma_peak`] runs, on the calling thread (so on one core), a loop of independent `fma`
//! chains that never leave registers, for about the requested time, and reports FLOP/s with
//! one multiply-add counted as 2 FLOPs. Nothing is loaded or stored inside the loop, so what
//! it measures is the issue rate of the vector multiply-add units: no real kernel can beat it.
//!
//! The run is cut into slices (about 1/16 of the duration each) and the fastest slice is the
//! peak: on a shared machine other processes' time slices can only make a slice slower, so
//! the fastest one is the closest estimate of what the core itself can do. The average over
//! the whole run is reported beside it.
//!
//! The number of chains covers the multiply-add latency times the units' throughput (common
//! practice: 4 cycles × 2 units on recent x86 cores, so at least 8 chains); 12 leaves slack
//! for cores with longer latency and still fits AVX2's 16 registers with the two operands.

use std::hint::black_box;
use std::time::{Duration, Instant};

use super::isa::Isa;
use super::simd::{Machine, Scalar, Simd};

/// Independent accumulator chains.
const CHAINS: usize = 12;
/// Inner iterations between two looks at the clock (each does [`CHAINS`] vector `fma`s):
/// long enough that reading the clock costs nothing measurable, short enough to stop close
/// to the requested duration.
const ROUNDS: usize = 1 << 14;
/// Slices the run is cut into (see the module documentation).
const SLICES: u32 = 16;

/// What one measurement found.
#[derive(Clone, Copy, Debug, PartialEq)]
pub struct PeakResult {
    /// The instruction set that ran (a path this CPU cannot run falls back to scalar).
    pub isa: Isa,
    /// Billions of floating-point operations per second (a multiply-add counts 2), in the
    /// fastest slice of the run.
    pub gflops: f64,
    /// The same over the whole run (lower when other processes shared the core).
    pub mean_gflops: f64,
    /// Multiply-adds performed, counted per lane.
    pub fmas: u64,
    /// Time the loop ran.
    pub elapsed: Duration,
}

/// Measures the single-core multiply-add peak of `isa` over about `duration`.
///
/// The loop stops at the first clock check past `duration` (checks are a few microseconds
/// apart), and always runs at least once, so a zero duration still gives a finite result.
pub fn fma_peak(isa: Isa, duration: Duration) -> PeakResult {
    let machine = Machine::new_or_scalar(isa);
    let (lane_fmas_per_batch, batches, elapsed, best) = match machine {
        Machine::Scalar(s) => timed(s, duration, chains),
        #[cfg(target_arch = "x86_64")]
        Machine::Avx2(s) => timed(s, duration, |s| {
            // SAFETY: the token proves the CPU runs AVX2 and FMA3.
            unsafe { chains_avx2(s) }
        }),
        #[cfg(target_arch = "x86_64")]
        Machine::Avx512(s) => timed(s, duration, |s| {
            // SAFETY: the token proves the CPU runs AVX-512F, AVX2 and FMA3.
            unsafe { chains_avx512(s) }
        }),
        #[cfg(target_arch = "aarch64")]
        Machine::Neon(s) => timed(s, duration, |s| {
            // SAFETY: the token proves the CPU runs Advanced SIMD.
            unsafe { chains_neon(s) }
        }),
    };
    let fmas = lane_fmas_per_batch * batches;
    let secs = elapsed.as_secs_f64().max(1e-9);
    PeakResult {
        isa: machine.isa(),
        gflops: 2.0 * best / 1e9,
        mean_gflops: 2.0 * fmas as f64 / secs / 1e9,
        fmas,
        elapsed,
    }
}

/// Runs one fixed batch of the peak loop, for benchmarks that time it themselves; returns
/// its result (hand it to `black_box`) and the FLOPs it performed (a multiply-add counts 2).
pub fn fma_batch(isa: Isa) -> (f32, u64) {
    let machine = Machine::new_or_scalar(isa);
    fn lanes<S: Simd>(_: S) -> usize {
        S::LANES
    }
    let (sum, lanes) = match machine {
        Machine::Scalar(s) => (chains(s), lanes(s)),
        #[cfg(target_arch = "x86_64")]
        // SAFETY: the token proves the CPU runs AVX2 and FMA3.
        Machine::Avx2(s) => (unsafe { chains_avx2(s) }, lanes(s)),
        #[cfg(target_arch = "x86_64")]
        // SAFETY: the token proves the CPU runs AVX-512F, AVX2 and FMA3.
        Machine::Avx512(s) => (unsafe { chains_avx512(s) }, lanes(s)),
        #[cfg(target_arch = "aarch64")]
        // SAFETY: the token proves the CPU runs Advanced SIMD.
        Machine::Neon(s) => (unsafe { chains_neon(s) }, lanes(s)),
    };
    (sum, 2 * (ROUNDS * CHAINS * lanes) as u64)
}

/// Calls `body` (one batch of [`ROUNDS`]) until `duration` has passed; returns the lane
/// multiply-adds per batch, the batches run, the time taken and the best slice's rate in
/// lane multiply-adds per second.
fn timed<S: Simd>(s: S, duration: Duration, body: impl Fn(S) -> f32) -> (u64, u64, Duration, f64) {
    let per_batch = (ROUNDS * CHAINS * S::LANES) as u64;
    let slice = duration / SLICES;
    // One untimed batch brings the core's vector units to their working clock.
    black_box(body(black_box(s)));
    let start = Instant::now();
    let (mut batches, mut best) = (0u64, 0.0f64);
    let (mut slice_start, mut slice_batches) = (start, 0u64);
    loop {
        black_box(body(black_box(s)));
        batches += 1;
        slice_batches += 1;
        let now = Instant::now();
        let in_slice = now - slice_start;
        let elapsed = now - start;
        if in_slice >= slice || elapsed >= duration {
            let rate = (slice_batches * per_batch) as f64 / in_slice.as_secs_f64().max(1e-9);
            best = best.max(rate);
            (slice_start, slice_batches) = (now, 0);
        }
        if elapsed >= duration {
            return (per_batch, batches, elapsed, best);
        }
    }
}

#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx2,fma")]
unsafe fn chains_avx2(s: super::simd::Avx2) -> f32 {
    chains(s)
}

#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx512f,avx2,fma")]
unsafe fn chains_avx512(s: super::simd::Avx512) -> f32 {
    chains(s)
}

#[cfg(target_arch = "aarch64")]
#[target_feature(enable = "neon")]
unsafe fn chains_neon(s: super::simd::Neon) -> f32 {
    chains(s)
}

/// [`ROUNDS`] rounds of one `fma` on each of [`CHAINS`] accumulators, then their sum (so the
/// work has a result that `black_box` keeps alive).
///
/// `x ← x·a + b` with `a` just below 1 converges to `b / (1 - a)` ≈ 1: no overflow, no
/// subnormal numbers (which would slow some cores down), whatever the number of rounds. The
/// operands pass through `black_box` so the compiler cannot fold the recurrence.
#[inline(always)]
fn chains<S: Simd>(s: S) -> f32 {
    let a = s.splat(black_box(0.999_999_9));
    let b = s.splat(black_box(1.0e-7));
    let mut acc = [s.zero(); CHAINS];
    for (i, x) in acc.iter_mut().enumerate() {
        *x = s.splat(black_box(i as f32 * 0.01));
    }
    for _ in 0..ROUNDS {
        for x in acc.iter_mut() {
            *x = s.fma(*x, a, b);
        }
    }
    let mut sum = s.zero();
    for x in acc {
        sum = s.add(sum, x);
    }
    let mut lanes = [0.0f32; 16];
    // SAFETY: a vector has at most 16 lanes, all inside `lanes`.
    unsafe { s.store(lanes.as_mut_ptr(), sum) };
    let scalar = Scalar;
    lanes.iter().fold(0.0, |t, &x| scalar.add(t, x))
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::engine::kernels::testutil::isas_under_test;

    #[test]
    fn peak_is_finite_positive_and_counts_the_work() {
        for isa in isas_under_test() {
            let r = fma_peak(isa, Duration::from_millis(20));
            assert_eq!(r.isa, isa);
            assert!(r.gflops.is_finite() && r.gflops > 0.0, "{r:?}");
            assert!(r.mean_gflops.is_finite() && r.mean_gflops > 0.0, "{r:?}");
            // The fastest slice is at least the average (up to rounding of the two divisions).
            assert!(r.gflops >= r.mean_gflops * (1.0 - 1e-9), "{r:?}");
            // Whole batches ran, at least one, and the clock covered the requested time.
            let batch = (ROUNDS * CHAINS) as u64;
            assert!(r.fmas >= batch && r.fmas.is_multiple_of(batch), "{r:?}");
            assert!(r.elapsed >= Duration::from_millis(20), "{r:?}");
            let (sum, flops) = fma_batch(isa);
            assert!(sum.is_finite(), "{r:?}");
            assert!(
                [1, 4, 8, 16].map(|l| 2 * batch * l).contains(&flops),
                "{flops}"
            );
        }
    }

    #[test]
    fn the_chains_really_run() {
        // The scalar path rounds the multiply and the add separately (see `Simd::fma`), so
        // the same recurrence written out in f32 must give the same bits; had the compiler
        // dropped or shortened the loop, the sum would differ.
        let (a, b) = (0.999_999_9f32, 1.0e-7f32);
        let mut sum = 0.0f32;
        for i in 0..CHAINS {
            let mut x = i as f32 * 0.01;
            for _ in 0..ROUNDS {
                x = x * a + b;
            }
            sum += x;
        }
        let start: f32 = (0..CHAINS).map(|i| i as f32 * 0.01).sum();
        let got = chains(Scalar);
        assert_eq!(got.to_bits(), sum.to_bits(), "{got} vs {sum}");
        assert!(
            (got - start).abs() > 1e-3,
            "the loop moved the values: {got} vs {start}"
        );
    }
}
