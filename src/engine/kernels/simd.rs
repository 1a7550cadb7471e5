//! The vector operations the kernels are written in, one zero-sized type per instruction set.
//!
//! Each kernel is ONE generic `#[inline(always)]` body over [`Simd`]; per instruction set a
//! `#[target_feature]` wrapper instantiates it, so the body is compiled for that set. A value of
//! [`Avx2`], [`Avx512`] or `Neon` can only be made after a run-time check ([`Machine::new`]), which
//! is what makes calling their intrinsics sound; [`Scalar`] is plain Rust and always available.
//!
//! Every operation here is exactly one IEEE-754 operation per lane (or a comparison/select), so a
//! lane computes the same bits as the [`Scalar`] version of the same op sequence. The one
//! difference is [`Simd::fma`]: fused on the SIMD sets, `a*b + c` with two roundings on
//! [`Scalar`], which may run on CPUs without fused multiply-add.

use super::isa::Isa;

/// One instruction set's vector type and operations.
///
/// Comparison-based operations mirror the x86 `maxps`/`minps` rule so NaN handling is identical
/// everywhere: [`Simd::max`] is `if a > b { a } else { b }`, [`Simd::min`] is
/// `if a < b { a } else { b }`.
pub(crate) trait Simd: Copy {
    /// A vector of [`Simd::LANES`] `f32`.
    type V: Copy;
    /// Number of `f32` lanes in [`Simd::V`].
    const LANES: usize;
    /// A narrower vector set usable in the same target-feature context (for short tails and
    /// for the matrix kernel that vectorises along the weight rows).
    type Narrow: Simd;

    fn narrow(self) -> Self::Narrow;
    fn zero(self) -> Self::V;
    fn splat(self, x: f32) -> Self::V;
    /// Loads `LANES` consecutive values.
    ///
    /// # Safety
    /// `p` must be valid for reading `LANES` floats (no alignment needed).
    unsafe fn load(self, p: *const f32) -> Self::V;
    /// Stores `LANES` consecutive values.
    ///
    /// # Safety
    /// `p` must be valid for writing `LANES` floats (no alignment needed).
    unsafe fn store(self, p: *mut f32, v: Self::V);
    /// Loads the first `n` lanes from `p`, zero in the others.
    ///
    /// # Safety
    /// `p` must be valid for reading `n <= LANES` floats; nothing past them is touched.
    unsafe fn load_partial(self, p: *const f32, n: usize) -> Self::V;
    /// Stores the first `n` lanes of `v` to `p`.
    ///
    /// # Safety
    /// `p` must be valid for writing `n <= LANES` floats; nothing past them is touched.
    unsafe fn store_partial(self, p: *mut f32, v: Self::V, n: usize);
    /// Whether [`Simd::load_masked`] costs no more than [`Simd::load`] (AVX-512's zero-masking
    /// loads): the direct convolution route relies on it for its copy-once layout only then.
    const FAST_MASKED_LOAD: bool = false;
    /// Loads lane `l` from `p + l` where bit `l` of `mask` is set, +0.0 in the others.
    ///
    /// The default goes through memory lane by lane (correct anywhere, slow: see
    /// [`Simd::FAST_MASKED_LOAD`]).
    ///
    /// # Safety
    /// `p` must be valid for reading `LANES` floats (no alignment needed).
    #[inline(always)]
    unsafe fn load_masked(self, p: *const f32, mask: u32) -> Self::V {
        let mut lanes = [0.0f32; 16];
        for (l, x) in lanes.iter_mut().enumerate().take(Self::LANES) {
            if (mask >> l) & 1 == 1 {
                // SAFETY: lane `l < LANES` of the caller's readable run.
                *x = unsafe { p.add(l).read_unaligned() };
            }
        }
        // SAFETY: `lanes` holds 16 >= LANES floats (every set has at most 16 lanes).
        unsafe { self.load(lanes.as_ptr()) }
    }
    /// Asks the cache to fetch the line holding `p` (no effect on results; any address, no
    /// access is made). A no-op unless the set overrides it.
    #[inline(always)]
    fn prefetch(self, _p: *const f32) {}
    /// The even and the odd lanes of the `2*LANES` values `lo` then `hi`:
    /// `(lo0, lo2, .., hi0, hi2, ..)` and `(lo1, lo3, .., hi1, hi3, ..)`.
    fn unzip(self, lo: Self::V, hi: Self::V) -> (Self::V, Self::V);
    /// Loads `p[0], p[2], .., p[2*(LANES-1)]`.
    ///
    /// # Safety
    /// `p` must be valid for reading `2*LANES` floats (one more than the last one used).
    #[inline(always)]
    unsafe fn load_even(self, p: *const f32) -> Self::V {
        // SAFETY: the caller's 2*LANES readable floats, in two loads.
        unsafe { self.unzip(self.load(p), self.load(p.add(Self::LANES))).0 }
    }
    /// Lane `i` of the result is lane `i + by` of `v` for `i + by < LANES`; the top `by`
    /// lanes are unspecified. `by < LANES`.
    fn shift_down(self, v: Self::V, by: usize) -> Self::V;
    /// Lane `i + by` of the result is lane `i` of `v` for `i + by < LANES`; the low `by`
    /// lanes are unspecified. `by < LANES`.
    fn shift_up(self, v: Self::V, by: usize) -> Self::V;
    /// `a*b + c`, fused except on [`Scalar`].
    fn fma(self, a: Self::V, b: Self::V, c: Self::V) -> Self::V;
    /// The scalar twin of [`Simd::fma`], rounding exactly as one lane of it does.
    fn fma_s(self, a: f32, b: f32, c: f32) -> f32;
    fn add(self, a: Self::V, b: Self::V) -> Self::V;
    fn mul(self, a: Self::V, b: Self::V) -> Self::V;
    fn div(self, a: Self::V, b: Self::V) -> Self::V;
    /// `if a > b { a } else { b }` per lane.
    fn max(self, a: Self::V, b: Self::V) -> Self::V;
    /// `if a < b { a } else { b }` per lane.
    fn min(self, a: Self::V, b: Self::V) -> Self::V;
    /// `if a > b { t } else { f }` per lane.
    fn select_gt(self, a: Self::V, b: Self::V, t: Self::V, f: Self::V) -> Self::V;
    /// Rounds to the nearest integer, ties to even (IEEE `roundTiesToEven`).
    fn round(self, a: Self::V) -> Self::V;
    /// `2^n` for lanes holding whole numbers `n` in `-126..=127` (exact: the exponent field
    /// is written directly); other lanes are unspecified.
    fn pow2i(self, n: Self::V) -> Self::V;
}

/// Plain Rust, one lane, no fused multiply-add.
#[derive(Clone, Copy, Debug, Default)]
pub(crate) struct Scalar;

impl Simd for Scalar {
    type V = f32;
    const LANES: usize = 1;
    type Narrow = Scalar;

    #[inline(always)]
    fn narrow(self) -> Scalar {
        self
    }
    #[inline(always)]
    fn zero(self) -> f32 {
        0.0
    }
    #[inline(always)]
    fn splat(self, x: f32) -> f32 {
        x
    }
    #[inline(always)]
    unsafe fn load(self, p: *const f32) -> f32 {
        // SAFETY: the caller guarantees `p` is readable for one float.
        unsafe { p.read_unaligned() }
    }
    #[inline(always)]
    unsafe fn store(self, p: *mut f32, v: f32) {
        // SAFETY: the caller guarantees `p` is writable for one float.
        unsafe { p.write_unaligned(v) }
    }
    #[inline(always)]
    unsafe fn load_partial(self, p: *const f32, n: usize) -> f32 {
        // SAFETY: the caller guarantees `p` is readable for n floats.
        if n > 0 {
            unsafe { p.read_unaligned() }
        } else {
            0.0
        }
    }
    #[inline(always)]
    unsafe fn store_partial(self, p: *mut f32, v: f32, n: usize) {
        if n > 0 {
            // SAFETY: the caller guarantees `p` is writable for n floats.
            unsafe { p.write_unaligned(v) }
        }
    }
    #[inline(always)]
    fn unzip(self, lo: f32, hi: f32) -> (f32, f32) {
        (lo, hi)
    }
    #[inline(always)]
    fn shift_down(self, v: f32, _by: usize) -> f32 {
        v
    }
    #[inline(always)]
    fn shift_up(self, v: f32, _by: usize) -> f32 {
        v
    }
    #[inline(always)]
    fn fma(self, a: f32, b: f32, c: f32) -> f32 {
        a * b + c
    }
    #[inline(always)]
    fn fma_s(self, a: f32, b: f32, c: f32) -> f32 {
        a * b + c
    }
    #[inline(always)]
    fn add(self, a: f32, b: f32) -> f32 {
        a + b
    }
    #[inline(always)]
    fn mul(self, a: f32, b: f32) -> f32 {
        a * b
    }
    #[inline(always)]
    fn div(self, a: f32, b: f32) -> f32 {
        a / b
    }
    #[inline(always)]
    fn max(self, a: f32, b: f32) -> f32 {
        if a > b { a } else { b }
    }
    #[inline(always)]
    fn min(self, a: f32, b: f32) -> f32 {
        if a < b { a } else { b }
    }
    #[inline(always)]
    fn select_gt(self, a: f32, b: f32, t: f32, f: f32) -> f32 {
        if a > b { t } else { f }
    }
    #[inline(always)]
    fn round(self, a: f32) -> f32 {
        a.round_ties_even()
    }
    #[inline(always)]
    fn pow2i(self, n: f32) -> f32 {
        f32::from_bits(((n as i32 + 127) as u32) << 23)
    }
}

#[cfg(target_arch = "x86_64")]
mod x86;
#[cfg(target_arch = "x86_64")]
pub(crate) use x86::{Avx2, Avx512};

#[cfg(target_arch = "aarch64")]
mod arm;
#[cfg(target_arch = "aarch64")]
pub(crate) use arm::Neon;

/// A checked instruction set: the token its kernels need, made once at packing time.
#[derive(Clone, Copy, Debug)]
pub(crate) enum Machine {
    Scalar(Scalar),
    #[cfg(target_arch = "x86_64")]
    Avx2(Avx2),
    #[cfg(target_arch = "x86_64")]
    Avx512(Avx512),
    #[cfg(target_arch = "aarch64")]
    Neon(Neon),
}

impl Machine {
    /// The token for `isa`, or `None` if this CPU cannot run it.
    pub(crate) fn new(isa: Isa) -> Option<Machine> {
        if !isa.is_supported() {
            return None;
        }
        match isa {
            Isa::Scalar => Some(Machine::Scalar(Scalar)),
            // SAFETY (both x86 arms): `is_supported` just confirmed the instruction sets.
            #[cfg(target_arch = "x86_64")]
            Isa::Avx2 => Some(Machine::Avx2(unsafe { Avx2::new_unchecked() })),
            #[cfg(target_arch = "x86_64")]
            Isa::Avx512 => Some(Machine::Avx512(unsafe { Avx512::new_unchecked() })),
            // SAFETY: `is_supported` just confirmed Advanced SIMD.
            #[cfg(target_arch = "aarch64")]
            Isa::Neon => Some(Machine::Neon(unsafe { Neon::new_unchecked() })),
            #[allow(unreachable_patterns)]
            _ => None,
        }
    }

    /// The token for `isa`, falling back to [`Scalar`] when this CPU cannot run it.
    pub(crate) fn new_or_scalar(isa: Isa) -> Machine {
        Machine::new(isa).unwrap_or(Machine::Scalar(Scalar))
    }

    pub(crate) fn isa(self) -> Isa {
        match self {
            Machine::Scalar(_) => Isa::Scalar,
            #[cfg(target_arch = "x86_64")]
            Machine::Avx2(_) => Isa::Avx2,
            #[cfg(target_arch = "x86_64")]
            Machine::Avx512(_) => Isa::Avx512,
            #[cfg(target_arch = "aarch64")]
            Machine::Neon(_) => Isa::Neon,
        }
    }

    /// This set's [`Simd::FAST_MASKED_LOAD`], for choices made before any kernel runs.
    pub(crate) fn fast_masked_load(self) -> bool {
        match self {
            Machine::Scalar(_) => Scalar::FAST_MASKED_LOAD,
            #[cfg(target_arch = "x86_64")]
            Machine::Avx2(_) => Avx2::FAST_MASKED_LOAD,
            #[cfg(target_arch = "x86_64")]
            Machine::Avx512(_) => Avx512::FAST_MASKED_LOAD,
            #[cfg(target_arch = "aarch64")]
            Machine::Neon(_) => Neon::FAST_MASKED_LOAD,
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Checks one instruction set's operations lane by lane against the scalar definitions.
    fn check_ops<S: Simd>(s: S) {
        let l = S::LANES;
        let xs: Vec<f32> = (0..4 * l)
            .map(|i| match i % 7 {
                0 => f32::NAN,
                1 => -0.0,
                2 => 0.0,
                _ => (i as f32 - 9.5) * 0.37,
            })
            .collect();
        let ys: Vec<f32> = xs.iter().rev().copied().collect();
        let mut out = vec![0.0f32; l];
        let sc = Scalar;
        // SAFETY: every pointer below addresses at least 2*LANES readable floats of `xs`/`ys`
        // or LANES writable floats of `out`.
        unsafe {
            let (a, b) = (s.load(xs.as_ptr()), s.load(ys.as_ptr()));
            type Op<S> = fn(S, <S as Simd>::V, <S as Simd>::V) -> <S as Simd>::V;
            type ScalarOp = fn(Scalar, f32, f32) -> f32;
            let ops: [(Op<S>, ScalarOp); 5] = [
                (S::add, Scalar::add),
                (S::mul, Scalar::mul),
                (S::div, Scalar::div),
                (S::max, Scalar::max),
                (S::min, Scalar::min),
            ];
            for (op, sop) in ops {
                s.store(out.as_mut_ptr(), op(s, a, b));
                for i in 0..l {
                    assert_eq!(
                        out[i].to_bits(),
                        sop(sc, xs[i], ys[i]).to_bits(),
                        "lane {i}"
                    );
                }
            }
            s.store(out.as_mut_ptr(), s.select_gt(a, b, a, s.splat(7.0)));
            for i in 0..l {
                let e = if xs[i] > ys[i] { xs[i] } else { 7.0 };
                assert_eq!(out[i].to_bits(), e.to_bits());
            }
            // Ties go to even (2.5 → 2, -0.5 → -0), and 2^n is exact across the normal range.
            let ties: Vec<f32> = (0..l).map(|i| i as f32 * 0.75 - 5.5).collect();
            s.store(out.as_mut_ptr(), s.round(s.load(ties.as_ptr())));
            for i in 0..l {
                let e = ties[i].round_ties_even();
                assert_eq!(out[i].to_bits(), e.to_bits(), "round lane {i}");
            }
            for base in [-126i32, -40, 0, 100, 127 - l as i32 + 1] {
                let ns: Vec<f32> = (0..l).map(|i| (base + i as i32) as f32).collect();
                s.store(out.as_mut_ptr(), s.pow2i(s.load(ns.as_ptr())));
                for i in 0..l {
                    assert_eq!(out[i], 2f32.powi(base + i as i32), "pow2i lane {i}");
                    assert_eq!(out[i], sc.pow2i(ns[i]));
                }
            }
            for n in 0..=l {
                let mut dst = vec![-1.0f32; l];
                s.store_partial(dst.as_mut_ptr(), s.load_partial(xs.as_ptr().add(2), n), n);
                for i in 0..l {
                    let e = if i < n { xs[2 + i] } else { -1.0 };
                    assert_eq!(dst[i].to_bits(), e.to_bits(), "partial {n} lane {i}");
                }
            }
            for mask in [0u32, 1, 0b1010_0110_0111_0001, (1 << l) - 1, 1 << (l - 1)] {
                s.store(out.as_mut_ptr(), s.load_masked(xs.as_ptr().add(3), mask));
                for i in 0..l {
                    let e = if (mask >> i) & 1 == 1 { xs[3 + i] } else { 0.0 };
                    assert_eq!(out[i].to_bits(), e.to_bits(), "masked {mask:b} lane {i}");
                }
            }
            s.store(out.as_mut_ptr(), s.load_even(xs.as_ptr().add(1)));
            for i in 0..l {
                assert_eq!(out[i].to_bits(), xs[1 + 2 * i].to_bits());
            }
            let (even, odd) = s.unzip(a, s.load(xs.as_ptr().add(l)));
            for (half, v) in [even, odd].into_iter().enumerate() {
                s.store(out.as_mut_ptr(), v);
                for i in 0..l {
                    assert_eq!(out[i].to_bits(), xs[2 * i + half].to_bits(), "unzip {half}");
                }
            }
            for by in 0..l {
                s.store(out.as_mut_ptr(), s.shift_down(a, by));
                for i in 0..l - by {
                    assert_eq!(out[i].to_bits(), xs[i + by].to_bits(), "down {by} lane {i}");
                }
                s.store(out.as_mut_ptr(), s.shift_up(a, by));
                for i in 0..l - by {
                    assert_eq!(out[i + by].to_bits(), xs[i].to_bits(), "up {by} lane {i}");
                }
            }
        }
    }

    #[test]
    fn every_supported_set_matches_the_scalar_definitions() {
        for isa in Isa::supported() {
            match Machine::new(isa).expect("supported") {
                Machine::Scalar(s) => check_ops(s),
                #[cfg(target_arch = "x86_64")]
                Machine::Avx2(s) => check_ops(s),
                #[cfg(target_arch = "x86_64")]
                Machine::Avx512(s) => {
                    check_ops(s);
                    check_ops(s.narrow());
                }
                #[cfg(target_arch = "aarch64")]
                Machine::Neon(s) => check_ops(s),
            }
        }
    }
}
