//! aarch64 Advanced SIMD implementation of [`Simd`].

use super::Simd;
use std::arch::aarch64::*;

/// Proof that the CPU runs Advanced SIMD: only [`super::Machine::new`] makes one.
#[derive(Clone, Copy, Debug)]
pub(crate) struct Neon(());

impl Neon {
    /// # Safety
    /// The CPU must support Advanced SIMD (every aarch64 Linux CPU does).
    pub(super) unsafe fn new_unchecked() -> Neon {
        Neon(())
    }
}

/// Calls intrinsics whose only requirement is the instruction set that `self` proves.
macro_rules! cpu {
    ($e:expr) => {{
        // SAFETY: a `Neon` exists only after `Machine::new` confirmed Advanced SIMD, which
        // is all these intrinsics require; any pointer argument is covered by the calling
        // method's own safety contract.
        #[allow(unused_unsafe)]
        unsafe {
            $e
        }
    }};
}

impl Simd for Neon {
    type V = float32x4_t;
    const LANES: usize = 4;
    type Narrow = Neon;

    #[inline(always)]
    fn narrow(self) -> Neon {
        self
    }
    #[inline(always)]
    fn zero(self) -> float32x4_t {
        cpu!(vdupq_n_f32(0.0))
    }
    #[inline(always)]
    fn splat(self, x: f32) -> float32x4_t {
        cpu!(vdupq_n_f32(x))
    }
    #[inline(always)]
    unsafe fn load(self, p: *const f32) -> float32x4_t {
        cpu!(vld1q_f32(p))
    }
    #[inline(always)]
    unsafe fn store(self, p: *mut f32, v: float32x4_t) {
        cpu!(vst1q_f32(p, v))
    }
    #[inline(always)]
    unsafe fn load_partial(self, p: *const f32, n: usize) -> float32x4_t {
        let mut buf = [0.0f32; 4];
        // SAFETY: the caller guarantees `p` is readable for n <= 4 floats.
        unsafe { std::ptr::copy_nonoverlapping(p, buf.as_mut_ptr(), n) };
        cpu!(vld1q_f32(buf.as_ptr()))
    }
    #[inline(always)]
    unsafe fn store_partial(self, p: *mut f32, v: float32x4_t, n: usize) {
        let mut buf = [0.0f32; 4];
        cpu!(vst1q_f32(buf.as_mut_ptr(), v));
        // SAFETY: the caller guarantees `p` is writable for n <= 4 floats.
        unsafe { std::ptr::copy_nonoverlapping(buf.as_ptr(), p, n) };
    }
    #[inline(always)]
    fn unzip(self, lo: float32x4_t, hi: float32x4_t) -> (float32x4_t, float32x4_t) {
        cpu!((vuzp1q_f32(lo, hi), vuzp2q_f32(lo, hi)))
    }
    #[inline(always)]
    fn shift_down(self, v: float32x4_t, by: usize) -> float32x4_t {
        // Through memory: only the direct convolution's epilogue uses it, once per run.
        let mut buf = [0.0f32; 8];
        cpu!(vst1q_f32(buf.as_mut_ptr(), v));
        cpu!(vld1q_f32(buf[by.min(4)..].as_ptr()))
    }
    #[inline(always)]
    fn shift_up(self, v: float32x4_t, by: usize) -> float32x4_t {
        let mut buf = [0.0f32; 8];
        cpu!(vst1q_f32(buf[by.min(4)..].as_mut_ptr(), v));
        cpu!(vld1q_f32(buf.as_ptr()))
    }
    #[inline(always)]
    fn fma(self, a: float32x4_t, b: float32x4_t, c: float32x4_t) -> float32x4_t {
        cpu!(vfmaq_f32(c, a, b))
    }
    #[inline(always)]
    fn fma_s(self, a: f32, b: f32, c: f32) -> f32 {
        a.mul_add(b, c)
    }
    #[inline(always)]
    fn add(self, a: float32x4_t, b: float32x4_t) -> float32x4_t {
        cpu!(vaddq_f32(a, b))
    }
    #[inline(always)]
    fn mul(self, a: float32x4_t, b: float32x4_t) -> float32x4_t {
        cpu!(vmulq_f32(a, b))
    }
    #[inline(always)]
    fn div(self, a: float32x4_t, b: float32x4_t) -> float32x4_t {
        cpu!(vdivq_f32(a, b))
    }
    #[inline(always)]
    fn max(self, a: float32x4_t, b: float32x4_t) -> float32x4_t {
        // `fmax` would propagate NaN from either side; the compare-select keeps the x86 rule.
        cpu!(vbslq_f32(vcgtq_f32(a, b), a, b))
    }
    #[inline(always)]
    fn min(self, a: float32x4_t, b: float32x4_t) -> float32x4_t {
        cpu!(vbslq_f32(vcltq_f32(a, b), a, b))
    }
    #[inline(always)]
    fn select_gt(
        self,
        a: float32x4_t,
        b: float32x4_t,
        t: float32x4_t,
        f: float32x4_t,
    ) -> float32x4_t {
        cpu!(vbslq_f32(vcgtq_f32(a, b), t, f))
    }
    #[inline(always)]
    fn round(self, a: float32x4_t) -> float32x4_t {
        cpu!(vrndnq_f32(a))
    }
    #[inline(always)]
    fn pow2i(self, n: float32x4_t) -> float32x4_t {
        cpu!(vreinterpretq_f32_s32(vshlq_n_s32::<23>(vaddq_s32(
            vcvtq_s32_f32(n),
            vdupq_n_s32(127)
        ))))
    }
}
