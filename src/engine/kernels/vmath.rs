//! Transcendental activations in vector registers: `exp`, sigmoid, SiLU, tanh and GELU as
//! fixed sequences of [`Simd`] operations.
//!
//! Every element goes through the same operations whether it sits in a full vector or in the
//! tail of a slice (tails use partial loads and stores of the same vector code), so a value's
//! result never depends on where it lies in a buffer, and so never on the batch size. The
//! sequences differ between the scalar set (whose `fma` rounds twice) and the SIMD sets (fused),
//! as the matrix kernels do.
//!
//! Methods and error bounds (the tests check them against `f64` over sampled ranges):
//! - `exp`: Cody and Waite's range reduction `x = n·ln 2 + r` with `ln 2` split in two, then
//!   the degree-7 polynomial of Cephes' `expf` (Moshier 1989) and an exact `2^n`; within
//!   3 ulp on `[-87, 88]`, the arguments clamped to that range.
//! - sigmoid `1 / (1 + e^-x)`, SiLU `x / (1 + e^-x)`: within 4 ulp where the result is at
//!   least 1e-30 in magnitude; below that (x < -69) within 1e-30 absolutely.
//! - tanh: Cephes' odd polynomial below |x| = 0.625, `1 - 2 / (e^2|x| + 1)` above; within 4 ulp.
//! - GELU `x/2 · erfc(-x/√2)`: `erfc` by the Chebyshev fit of Press et al., *Numerical
//!   Recipes* §6.2 (`erfcc`, fractional error below 1.2e-7); within `(1e-6 + 2e-7·x²)`
//!   relative plus 1e-30 absolute (the rounding of `x/√2` grows through `e^(-x²/2)`: at
//!   x = -10, where GELU is about 1e-22, that is 2e-5 relative).

use super::activation::Activation;
use super::simd::{Machine, Simd};

/// Bounds of `exp`'s argument: `2^n` stays a normal number and finite.
const EXP_LO: f32 = -87.0;
const EXP_HI: f32 = 88.0;

/// `e^x` for `x` clamped to `[EXP_LO, EXP_HI]`.
// Constants written as published (more digits than f32 keeps), checkable against the source.
#[allow(clippy::excessive_precision)]
#[inline(always)]
pub(crate) fn exp<S: Simd>(s: S, x: S::V) -> S::V {
    // Cody–Waite constants of Cephes' expf: ln 2 = C1 + C2, C1 exact in few bits.
    const C1: f32 = 0.693_359_4;
    const C2: f32 = -2.121_944_4e-4;
    const P: [f32; 6] = [
        1.987_569_1e-4,
        1.398_199_9e-3,
        8.333_452e-3,
        4.166_579_6e-2,
        1.666_666_5e-1,
        5.000_000_1e-1,
    ];
    let x = s.min(s.splat(EXP_HI), s.max(s.splat(EXP_LO), x));
    let n = s.round(s.mul(x, s.splat(std::f32::consts::LOG2_E)));
    let r = s.fma(n, s.splat(-C1), x);
    let r = s.fma(n, s.splat(-C2), r);
    let mut p = s.splat(P[0]);
    for &c in &P[1..] {
        p = s.fma(p, r, s.splat(c));
    }
    // e^r = 1 + r + r²·p(r)
    let r2 = s.mul(r, r);
    let er = s.add(s.fma(p, r2, r), s.splat(1.0));
    s.mul(er, s.pow2i(n))
}

/// `1 / (1 + e^-x)`.
#[inline(always)]
pub(crate) fn sigmoid<S: Simd>(s: S, x: S::V) -> S::V {
    let e = exp(s, s.mul(x, s.splat(-1.0)));
    s.div(s.splat(1.0), s.add(s.splat(1.0), e))
}

/// `x / (1 + e^-x)`.
#[inline(always)]
pub(crate) fn silu<S: Simd>(s: S, x: S::V) -> S::V {
    let e = exp(s, s.mul(x, s.splat(-1.0)));
    s.div(x, s.add(s.splat(1.0), e))
}

/// `tanh(x)`.
// Constants written as published (more digits than f32 keeps), checkable against the source.
#[allow(clippy::excessive_precision)]
#[inline(always)]
pub(crate) fn tanh<S: Simd>(s: S, x: S::V) -> S::V {
    // Cephes tanhf: x + x·x²·P(x²) for |x| < 0.625.
    const P: [f32; 5] = [
        -5.704_988_7e-3,
        2.063_908_9e-2,
        -5.373_971_6e-2,
        1.333_144_2e-1,
        -3.333_328_2e-1,
    ];
    let ax = s.max(x, s.mul(x, s.splat(-1.0)));
    let z = s.mul(x, x);
    let mut p = s.splat(P[0]);
    for &c in &P[1..] {
        p = s.fma(p, z, s.splat(c));
    }
    let small = s.fma(s.mul(x, z), p, x);
    let e = exp(s, s.add(ax, ax));
    let big = s.sub_from_one(s.div(s.splat(2.0), s.add(e, s.splat(1.0))));
    let signed = s.select_gt(x, s.zero(), big, s.mul(big, s.splat(-1.0)));
    s.select_gt(s.splat(0.625), ax, small, signed)
}

/// `x/2 · erfc(-x/√2)`, the exact (erf) GELU.
// Constants written as published (more digits than f32 keeps), checkable against the source.
#[allow(clippy::excessive_precision)]
#[inline(always)]
pub(crate) fn gelu<S: Simd>(s: S, x: S::V) -> S::V {
    // Numerical Recipes' erfcc for z = |x|/√2 ≥ 0: t·exp(-z² + poly(t)), t = 1/(1 + z/2).
    const C: [f32; 10] = [
        0.170_872_77,
        -0.822_152_23,
        1.488_515_87,
        -1.135_203_98,
        0.278_868_07,
        -0.186_288_06,
        0.096_784_18,
        0.374_091_96,
        1.000_023_68,
        -1.265_512_23,
    ];
    let z = s.mul(
        s.max(x, s.mul(x, s.splat(-1.0))),
        s.splat(std::f32::consts::FRAC_1_SQRT_2),
    );
    let t = s.div(s.splat(1.0), s.fma(z, s.splat(0.5), s.splat(1.0)));
    let mut p = s.splat(C[0]);
    for &c in &C[1..] {
        p = s.fma(p, t, s.splat(c));
    }
    let tail = s.mul(t, exp(s, s.fma(s.mul(z, s.splat(-1.0)), z, p)));
    // erfc(-x/√2) is `tail` for x < 0 and `2 - tail` for x ≥ 0.
    let half_x = s.mul(x, s.splat(0.5));
    let neg = s.mul(half_x, tail);
    let pos = s.sub_from_one(s.mul(tail, s.splat(0.5)));
    s.select_gt(s.zero(), x, neg, s.mul(x, pos))
}

/// `1 - a`, written with the operations the trait has.
trait SubFromOne: Simd {
    fn sub_from_one(self, a: Self::V) -> Self::V {
        self.add(self.splat(1.0), self.mul(a, self.splat(-1.0)))
    }
}

impl<S: Simd> SubFromOne for S {}

/// Whether [`apply_slice`] computes `act` in vector registers.
pub(crate) fn is_vectorised(act: Activation) -> bool {
    matches!(
        act,
        Activation::Sigmoid | Activation::Silu | Activation::Tanh | Activation::Gelu
    )
}

/// One vector of `act`, for the activations [`is_vectorised`] names (others unchanged).
#[inline(always)]
fn apply_v<S: Simd>(s: S, act: Activation, x: S::V) -> S::V {
    match act {
        Activation::Sigmoid => sigmoid(s, x),
        Activation::Silu => silu(s, x),
        Activation::Tanh => tanh(s, x),
        Activation::Gelu => gelu(s, x),
        _ => x,
    }
}

/// Applies `act` to every element of `xs`: the vectorised activations through [`Simd`]
/// (full vectors, then one partial vector), the others by [`Activation::apply_slice`].
#[inline(always)]
pub(crate) fn apply_slice<S: Simd>(s: S, act: Activation, xs: &mut [f32]) {
    if !is_vectorised(act) {
        act.apply_slice(xs);
        return;
    }
    let mut chunks = xs.chunks_exact_mut(S::LANES);
    for c in &mut chunks {
        // SAFETY: `c` holds exactly LANES floats.
        unsafe { s.store(c.as_mut_ptr(), apply_v(s, act, s.load(c.as_ptr()))) };
    }
    let rest = chunks.into_remainder();
    if !rest.is_empty() {
        let n = rest.len();
        // SAFETY: the partial load and store touch only the `n < LANES` floats of `rest`.
        unsafe {
            let v = s.load_partial(rest.as_ptr(), n);
            s.store_partial(rest.as_mut_ptr(), apply_v(s, act, v), n);
        }
    }
}

/// [`apply_slice`] on the instruction set `machine` proves, compiled for that set.
pub(crate) fn apply_on(machine: Machine, act: Activation, xs: &mut [f32]) {
    match machine {
        Machine::Scalar(s) => apply_slice(s, act, xs),
        #[cfg(target_arch = "x86_64")]
        // SAFETY: the token proves the CPU runs the wrapper's target features.
        Machine::Avx2(s) => unsafe { apply_avx2(s, act, xs) },
        #[cfg(target_arch = "x86_64")]
        // SAFETY: as above.
        Machine::Avx512(s) => unsafe { apply_avx512(s, act, xs) },
        #[cfg(target_arch = "aarch64")]
        // SAFETY: as above.
        Machine::Neon(s) => unsafe { apply_neon(s, act, xs) },
    }
}

#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx2,fma")]
unsafe fn apply_avx2(s: super::simd::Avx2, act: Activation, xs: &mut [f32]) {
    apply_slice(s, act, xs);
}

#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx512f,avx2,fma")]
unsafe fn apply_avx512(s: super::simd::Avx512, act: Activation, xs: &mut [f32]) {
    apply_slice(s, act, xs);
}

#[cfg(target_arch = "aarch64")]
#[target_feature(enable = "neon")]
unsafe fn apply_neon(s: super::simd::Neon, act: Activation, xs: &mut [f32]) {
    apply_slice(s, act, xs);
}

/// One value through [`apply_on`] for `isa`: the exact result the kernels give (for tests
/// that emulate a kernel's arithmetic).
#[cfg(test)]
pub(crate) fn apply_one(isa: super::isa::Isa, act: Activation, x: f32) -> f32 {
    let mut v = [x];
    apply_on(Machine::new_or_scalar(isa), act, &mut v);
    v[0]
}

/// The relative error bound stated above for `act` at `x` (0 for the activations computed
/// through [`Activation::apply`]), plus 1e-30 absolute.
#[cfg(test)]
pub(crate) fn error_bound(act: Activation, x: f32, value: f64) -> f64 {
    let relative = match act {
        Activation::Sigmoid | Activation::Silu | Activation::Tanh => {
            4.0 * f64::from(f32::EPSILON) / 2.0
        }
        Activation::Gelu => 1e-6 + 2e-7 * f64::from(x) * f64::from(x),
        _ => 0.0,
    };
    relative * value.abs() + 1e-30
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::engine::kernels::isa::Isa;

    fn sets() -> Vec<Isa> {
        Isa::ALL
            .iter()
            .copied()
            .filter(|i| i.is_supported())
            .collect()
    }

    fn run(isa: Isa, act: Activation, xs: &[f32]) -> Vec<f32> {
        let mut ys = xs.to_vec();
        apply_on(Machine::new_or_scalar(isa), act, &mut ys);
        ys
    }

    /// Evenly spaced points plus a random sample of bit patterns in `[lo, hi]`.
    fn samples(lo: f32, hi: f32) -> Vec<f32> {
        let mut xs: Vec<f32> = (0..=20_000)
            .map(|i| lo + (hi - lo) * i as f32 / 20_000.0)
            .collect();
        let mut state = 0x9E37_79B9_7F4A_7C15u64;
        while xs.len() < 40_000 {
            state = state
                .wrapping_mul(6_364_136_223_846_793_005)
                .wrapping_add(1);
            let x = f32::from_bits((state >> 32) as u32);
            if x.is_finite() && (lo..=hi).contains(&x) {
                xs.push(x);
            }
        }
        xs.extend([0.0, -0.0, lo, hi, 1e-30, -1e-30, 1e-7, -1e-7]);
        xs
    }

    /// Distance from `want` in units of the f32 spacing at `want`.
    fn ulps(got: f32, want: f64) -> f64 {
        let w = (want as f32).abs();
        let ulp = f64::from(f32::from_bits(w.to_bits() + 1) - w).max(1e-45);
        (f64::from(got) - want).abs() / ulp
    }

    /// `act` on every set against `reference` (f64): within `max_ulps` where |reference| ≥
    /// `floor`, within `floor` absolutely below it.
    fn check_ulps(act: Activation, range: (f32, f32), reference: fn(f64) -> f64, max_ulps: f64) {
        let floor = 1e-30;
        let xs = samples(range.0, range.1);
        for isa in sets() {
            let ys = run(isa, act, &xs);
            for (&x, &y) in xs.iter().zip(&ys) {
                let want = reference(f64::from(x));
                if want.abs() >= floor {
                    let u = ulps(y, want);
                    assert!(
                        u <= max_ulps,
                        "{act:?} {isa:?}: x = {x:e}: {y:e} vs {want:e} ({u:.1} ulp)"
                    );
                } else {
                    let err = (f64::from(y) - want).abs();
                    assert!(
                        err <= floor,
                        "{act:?} {isa:?}: x = {x:e}: {y:e} vs {want:e}"
                    );
                }
            }
        }
    }

    fn sigmoid64(x: f64) -> f64 {
        1.0 / (1.0 + (-x).exp())
    }

    fn one_exp<S: Simd>(s: S, x: f32) -> f32 {
        let mut v = [x];
        // SAFETY: one float read and written.
        unsafe {
            let y = exp(s, s.load_partial(v.as_ptr(), 1));
            s.store_partial(v.as_mut_ptr(), y, 1);
        }
        v[0]
    }

    #[test]
    fn exp_is_within_3_ulp() {
        let xs = samples(EXP_LO, EXP_HI);
        for isa in sets() {
            for &x in &xs {
                let y = match Machine::new_or_scalar(isa) {
                    Machine::Scalar(s) => one_exp(s, x),
                    #[cfg(target_arch = "x86_64")]
                    Machine::Avx2(s) => one_exp(s, x),
                    #[cfg(target_arch = "x86_64")]
                    Machine::Avx512(s) => one_exp(s, x),
                    #[cfg(target_arch = "aarch64")]
                    Machine::Neon(s) => one_exp(s, x),
                };
                let u = ulps(y, f64::from(x).exp());
                assert!(u <= 3.0, "exp on {isa:?}: x = {x:e}: {u:.2} ulp");
            }
        }
    }

    #[test]
    fn sigmoid_silu_and_tanh_are_within_4_ulp() {
        check_ulps(Activation::Sigmoid, (-100.0, 100.0), sigmoid64, 4.0);
        check_ulps(Activation::Silu, (-100.0, 100.0), |x| x * sigmoid64(x), 4.0);
        check_ulps(Activation::Tanh, (-20.0, 20.0), f64::tanh, 4.0);
    }

    #[test]
    fn gelu_is_within_its_bound() {
        // The reference: `Activation::apply`, fdlibm's erfc evaluated in f64, rounded once.
        let xs = samples(-20.0, 20.0);
        for isa in sets() {
            let ys = run(isa, Activation::Gelu, &xs);
            for (&x, &y) in xs.iter().zip(&ys) {
                let want = f64::from(Activation::Gelu.apply(x));
                let err = (f64::from(y) - want).abs();
                let bound = (1e-6 + 2e-7 * f64::from(x) * f64::from(x)) * want.abs() + 1e-30;
                assert!(err <= bound, "gelu {isa:?}: x = {x:e}: {y:e} vs {want:e}");
            }
        }
    }

    #[test]
    fn nan_stays_nan_and_limits_hold() {
        for act in [
            Activation::Sigmoid,
            Activation::Silu,
            Activation::Tanh,
            Activation::Gelu,
        ] {
            let xs = [f32::NAN, 1e9, -1e9, 0.0];
            for isa in sets() {
                let ys = run(isa, act, &xs);
                assert!(ys[0].is_nan(), "{act:?} {isa:?}: NaN gave {}", ys[0]);
                assert!(
                    ys[1].is_finite() && ys[2].is_finite(),
                    "{act:?} {isa:?}: {ys:?}"
                );
                assert_eq!(ys[3], act.apply(0.0), "{act:?} {isa:?}");
            }
        }
    }

    /// A value's bits do not depend on its place in the slice (full vector or tail).
    #[test]
    fn position_does_not_change_the_bits() {
        let xs = samples(-10.0, 10.0);
        for act in [
            Activation::Sigmoid,
            Activation::Silu,
            Activation::Tanh,
            Activation::Gelu,
        ] {
            for isa in sets() {
                let whole = run(isa, act, &xs[..37]);
                for start in 1..5 {
                    let part = run(isa, act, &xs[start..37]);
                    for (i, (a, b)) in whole[start..].iter().zip(&part).enumerate() {
                        assert_eq!(a.to_bits(), b.to_bits(), "{act:?} {isa:?} at {i}");
                    }
                }
            }
        }
    }
}
