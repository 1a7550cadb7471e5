//! Helpers shared by the kernel tests: a deterministic generator and the instruction sets
//! to exercise.

use super::isa::{ISA_VARIABLE, Isa};

/// SplitMix64 (Steele, Lea & Flood, "Fast splittable pseudorandom number generators",
/// OOPSLA 2014): tiny, deterministic, good enough for test data.
pub(crate) struct Rng(u64);

impl Rng {
    pub(crate) fn new(seed: u64) -> Rng {
        Rng(seed)
    }

    pub(crate) fn next_u64(&mut self) -> u64 {
        self.0 = self.0.wrapping_add(0x9E37_79B9_7F4A_7C15);
        let mut z = self.0;
        z = (z ^ (z >> 30)).wrapping_mul(0xBF58_476D_1CE4_E5B9);
        z = (z ^ (z >> 27)).wrapping_mul(0x94D0_49BB_1331_11EB);
        z ^ (z >> 31)
    }

    /// Uniform in [-1, 1).
    pub(crate) fn sym(&mut self) -> f32 {
        ((self.next_u64() >> 40) as f32 / (1u64 << 24) as f32) * 2.0 - 1.0
    }

    pub(crate) fn vec(&mut self, n: usize) -> Vec<f32> {
        (0..n).map(|_| self.sym()).collect()
    }
}

/// The paths to test: the one `CONVOY_ISA` forces if set (so `CONVOY_ISA=scalar cargo test`
/// checks only that path), else every path this CPU supports.
pub(crate) fn isas_under_test() -> Vec<Isa> {
    match std::env::var(ISA_VARIABLE) {
        Ok(v) if !v.trim().is_empty() => {
            vec![Isa::detect().expect("CONVOY_ISA names a supported instruction set")]
        }
        _ => Isa::supported(),
    }
}

/// The SIMD paths (fused multiply-add) this CPU supports.
pub(crate) fn simd_isas() -> Vec<Isa> {
    Isa::supported()
        .into_iter()
        .filter(|&i| i != Isa::Scalar)
        .collect()
}
