//! Instruction-set selection: which kernel family this CPU runs.
//!
//! The executor calls [`Isa::detect`] once when a model loads and hands the result to the packing
//! functions ([`super::gemm::PackedWeights::pack`], [`super::depthwise::PackedDepthwise::pack`]),
//! which bind the packed data to that path. The variable `CONVOY_ISA` forces a path, so tests and
//! benchmarks can exercise each one on a machine that supports several.

use std::fmt;

/// Name of the environment variable that forces an instruction set.
pub const ISA_VARIABLE: &str = "CONVOY_ISA";

/// A family of compute kernels, each tied to an instruction set.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Hash)]
pub enum Isa {
    /// Portable Rust, no SIMD intrinsics and no fused multiply-add; runs everywhere.
    Scalar,
    /// x86-64 AVX2 with FMA3 (256-bit vectors).
    Avx2,
    /// x86-64 AVX-512F (512-bit vectors), with AVX2 and FMA3 for narrow tails.
    Avx512,
    /// aarch64 Advanced SIMD (128-bit vectors, fused multiply-add).
    Neon,
}

/// Why `CONVOY_ISA` could not be honoured.
#[derive(Debug, thiserror::Error)]
pub enum IsaError {
    /// The value names no instruction set.
    #[error(
        "{variable}={value:?} names no instruction set; expected one of scalar, avx2, avx512, neon"
    )]
    Unknown {
        /// The variable read ([`ISA_VARIABLE`]).
        variable: &'static str,
        /// Its value as found (lossily decoded if it was not UTF-8).
        value: String,
    },
    /// The value names an instruction set this CPU cannot run.
    #[error("{variable}={value:?} asks for {isa}, which this CPU does not support (it supports: {})", IsaList(.supported))]
    Unsupported {
        /// The variable read ([`ISA_VARIABLE`]).
        variable: &'static str,
        /// Its value as found.
        value: String,
        /// The instruction set it named.
        isa: Isa,
        /// What this CPU can run instead.
        supported: Vec<Isa>,
    },
}

/// Displays a list of instruction sets as comma-separated names.
struct IsaList<'a>(&'a [Isa]);

impl fmt::Display for IsaList<'_> {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        for (i, isa) in self.0.iter().enumerate() {
            if i > 0 {
                f.write_str(", ")?;
            }
            f.write_str(isa.name())?;
        }
        Ok(())
    }
}

impl fmt::Display for Isa {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.write_str(self.name())
    }
}

impl Isa {
    /// Every variant, fastest first: the order [`Isa::best`] tries them in.
    pub const ALL: [Isa; 4] = [Isa::Avx512, Isa::Avx2, Isa::Neon, Isa::Scalar];

    /// The best supported instruction set, unless `CONVOY_ISA` forces one.
    ///
    /// An unset or empty variable means "no preference".
    ///
    /// # Errors
    /// [`IsaError::Unknown`] if the variable names no instruction set, [`IsaError::Unsupported`]
    /// if it names one this CPU cannot run.
    pub fn detect() -> Result<Isa, IsaError> {
        let value = match std::env::var_os(ISA_VARIABLE) {
            None => return Ok(Isa::best()),
            Some(v) => v.to_string_lossy().into_owned(),
        };
        Isa::from_setting(&value)
    }

    /// Interprets a value of `CONVOY_ISA` (split out of [`Isa::detect`] so it can be tested
    /// without touching the process environment).
    fn from_setting(value: &str) -> Result<Isa, IsaError> {
        if value.trim().is_empty() {
            return Ok(Isa::best());
        }
        let isa = Isa::parse(value).ok_or_else(|| IsaError::Unknown {
            variable: ISA_VARIABLE,
            value: value.to_owned(),
        })?;
        if isa.is_supported() {
            Ok(isa)
        } else {
            Err(IsaError::Unsupported {
                variable: ISA_VARIABLE,
                value: value.to_owned(),
                isa,
                supported: Isa::supported(),
            })
        }
    }

    /// The fastest instruction set this CPU supports, ignoring `CONVOY_ISA`.
    pub fn best() -> Isa {
        Isa::ALL
            .into_iter()
            .find(|isa| isa.is_supported())
            .unwrap_or(Isa::Scalar)
    }

    /// Whether this CPU can run the path (a run-time check; std caches the CPUID result).
    pub fn is_supported(self) -> bool {
        match self {
            Isa::Scalar => true,
            Isa::Avx2 => x86::has_avx2(),
            Isa::Avx512 => x86::has_avx512(),
            Isa::Neon => arm::has_neon(),
        }
    }

    /// Every path this CPU can run, fastest first; [`Isa::Scalar`] is always included.
    pub fn supported() -> Vec<Isa> {
        Isa::ALL
            .into_iter()
            .filter(|isa| isa.is_supported())
            .collect()
    }

    /// The lower-case name used by `CONVOY_ISA` and in logs.
    pub fn name(self) -> &'static str {
        match self {
            Isa::Scalar => "scalar",
            Isa::Avx2 => "avx2",
            Isa::Avx512 => "avx512",
            Isa::Neon => "neon",
        }
    }

    /// Parses a name as produced by [`Isa::name`], ignoring case and surrounding blanks.
    pub fn parse(s: &str) -> Option<Isa> {
        let s = s.trim();
        Isa::ALL
            .into_iter()
            .find(|isa| isa.name().eq_ignore_ascii_case(s))
    }
}

#[cfg(target_arch = "x86_64")]
mod x86 {
    pub(super) fn has_avx2() -> bool {
        std::arch::is_x86_feature_detected!("avx2") && std::arch::is_x86_feature_detected!("fma")
    }

    /// The AVX-512 kernels also use AVX2/FMA3 instructions for narrow tails, so all are
    /// required (every CPU with AVX-512F has them, but the check keeps that an explicit fact).
    pub(super) fn has_avx512() -> bool {
        std::arch::is_x86_feature_detected!("avx512f") && has_avx2()
    }
}

#[cfg(not(target_arch = "x86_64"))]
mod x86 {
    pub(super) fn has_avx2() -> bool {
        false
    }

    pub(super) fn has_avx512() -> bool {
        false
    }
}

#[cfg(target_arch = "aarch64")]
mod arm {
    pub(super) fn has_neon() -> bool {
        std::arch::is_aarch64_feature_detected!("neon")
    }
}

#[cfg(not(target_arch = "aarch64"))]
mod arm {
    pub(super) fn has_neon() -> bool {
        false
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn names_round_trip() {
        for isa in Isa::ALL {
            assert_eq!(Isa::parse(isa.name()), Some(isa));
            assert_eq!(Isa::parse(&isa.name().to_uppercase()), Some(isa));
        }
        assert_eq!(Isa::parse(" avx512 "), Some(Isa::Avx512));
        assert_eq!(Isa::parse("sse2"), None);
    }

    #[test]
    fn scalar_always_supported_and_best_is_supported() {
        assert!(Isa::Scalar.is_supported());
        let supported = Isa::supported();
        assert!(supported.contains(&Isa::Scalar));
        assert!(Isa::best().is_supported());
        assert_eq!(supported[0], Isa::best());
    }

    #[test]
    fn settings() {
        assert_eq!(Isa::from_setting("").unwrap(), Isa::best());
        assert_eq!(Isa::from_setting("scalar").unwrap(), Isa::Scalar);
        match Isa::from_setting("mmx") {
            Err(IsaError::Unknown { variable, value }) => {
                assert_eq!(variable, ISA_VARIABLE);
                assert_eq!(value, "mmx");
            }
            other => panic!("expected Unknown, got {other:?}"),
        }
        // On x86-64 NEON is never available, and vice versa for AVX2 on aarch64.
        let foreign = if cfg!(target_arch = "aarch64") {
            "avx2"
        } else {
            "neon"
        };
        let err = Isa::from_setting(foreign).unwrap_err();
        assert!(matches!(err, IsaError::Unsupported { .. }), "{err:?}");
        let text = err.to_string();
        assert!(
            text.contains(ISA_VARIABLE) && text.contains("scalar"),
            "{text}"
        );
    }

    #[test]
    fn detect_honours_the_variable_or_picks_the_best() {
        // Only read the variable: the test runner may set it to force a path.
        match std::env::var(ISA_VARIABLE) {
            Ok(v) if !v.trim().is_empty() => {
                let expected = Isa::from_setting(&v).map_err(|e| e.to_string());
                assert_eq!(Isa::detect().map_err(|e| e.to_string()), expected);
            }
            _ => assert_eq!(Isa::detect().unwrap(), Isa::best()),
        }
    }
}
