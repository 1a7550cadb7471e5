//! AVX2 and AVX-512 implementations of [`Simd`].

use super::Simd;
use std::arch::x86_64::*;

/// Proof that the CPU runs AVX2 and FMA3: only [`super::Machine::new`] makes one.
#[derive(Clone, Copy, Debug)]
pub(crate) struct Avx2(());

/// Proof that the CPU runs AVX-512F, AVX2 and FMA3: only [`super::Machine::new`] makes one.
#[derive(Clone, Copy, Debug)]
pub(crate) struct Avx512(());

impl Avx2 {
    /// # Safety
    /// The CPU must support AVX2 and FMA3.
    pub(super) unsafe fn new_unchecked() -> Avx2 {
        Avx2(())
    }
}

impl Avx512 {
    /// # Safety
    /// The CPU must support AVX-512F, AVX2 and FMA3.
    pub(super) unsafe fn new_unchecked() -> Avx512 {
        Avx512(())
    }
}

/// Calls intrinsics whose only requirement is the instruction set that `self` proves.
macro_rules! cpu {
    ($e:expr) => {{
        // SAFETY: a value of the token type exists only after `Machine::new` confirmed the
        // CPU supports its instruction set, which is all these intrinsics require; any
        // pointer argument is covered by the calling method's own safety contract.
        #[allow(unused_unsafe)]
        unsafe {
            $e
        }
    }};
}

/// Lane mask with the first `n` lanes set (sign bit), for `vmaskmovps`.
#[inline(always)]
fn avx2_mask(n: usize) -> __m256i {
    cpu!(_mm256_cmpgt_epi32(
        _mm256_set1_epi32(n as i32),
        _mm256_setr_epi32(0, 1, 2, 3, 4, 5, 6, 7)
    ))
}

impl Simd for Avx2 {
    type V = __m256;
    const LANES: usize = 8;
    type Narrow = Avx2;

    #[inline(always)]
    fn narrow(self) -> Avx2 {
        self
    }
    #[inline(always)]
    fn zero(self) -> __m256 {
        cpu!(_mm256_setzero_ps())
    }
    #[inline(always)]
    fn splat(self, x: f32) -> __m256 {
        cpu!(_mm256_set1_ps(x))
    }
    #[inline(always)]
    unsafe fn load(self, p: *const f32) -> __m256 {
        cpu!(_mm256_loadu_ps(p))
    }
    #[inline(always)]
    unsafe fn store(self, p: *mut f32, v: __m256) {
        cpu!(_mm256_storeu_ps(p, v))
    }
    #[inline(always)]
    unsafe fn load_partial(self, p: *const f32, n: usize) -> __m256 {
        // `vmaskmovps` suppresses faults on masked-off lanes.
        cpu!(_mm256_maskload_ps(p, avx2_mask(n)))
    }
    #[inline(always)]
    unsafe fn store_partial(self, p: *mut f32, v: __m256, n: usize) {
        cpu!(_mm256_maskstore_ps(p, avx2_mask(n), v))
    }
    #[inline(always)]
    fn prefetch(self, p: *const f32) {
        // A prefetch is a hint: it never faults, whatever the address.
        cpu!(_mm_prefetch::<_MM_HINT_T0>(p.cast::<i8>()))
    }
    #[inline(always)]
    fn unzip(self, lo: __m256, hi: __m256) -> (__m256, __m256) {
        cpu!({
            // Per 128-bit half: [lo0 lo2 hi0 hi2 | lo4 lo6 hi4 hi6]; then reorder the
            // 64-bit pairs (0, 2, 1, 3) to get lo0 lo2 lo4 lo6 hi0 hi2 hi4 hi6. The odd
            // lanes likewise.
            let even = _mm256_castps_pd(_mm256_shuffle_ps::<0b10_00_10_00>(lo, hi));
            let odd = _mm256_castps_pd(_mm256_shuffle_ps::<0b11_01_11_01>(lo, hi));
            (
                _mm256_castpd_ps(_mm256_permute4x64_pd::<0b11_01_10_00>(even)),
                _mm256_castpd_ps(_mm256_permute4x64_pd::<0b11_01_10_00>(odd)),
            )
        })
    }
    #[inline(always)]
    fn shift_down(self, v: __m256, by: usize) -> __m256 {
        // `vpermps` uses the low 3 bits of each index: lanes past the top wrap around.
        cpu!(_mm256_permutevar8x32_ps(
            v,
            _mm256_add_epi32(
                _mm256_setr_epi32(0, 1, 2, 3, 4, 5, 6, 7),
                _mm256_set1_epi32(by as i32)
            )
        ))
    }
    #[inline(always)]
    fn shift_up(self, v: __m256, by: usize) -> __m256 {
        cpu!(_mm256_permutevar8x32_ps(
            v,
            _mm256_sub_epi32(
                _mm256_setr_epi32(0, 1, 2, 3, 4, 5, 6, 7),
                _mm256_set1_epi32(by as i32)
            )
        ))
    }
    #[inline(always)]
    fn fma(self, a: __m256, b: __m256, c: __m256) -> __m256 {
        cpu!(_mm256_fmadd_ps(a, b, c))
    }
    #[inline(always)]
    fn fma_s(self, a: f32, b: f32, c: f32) -> f32 {
        // Inlined into an FMA-enabled function this is one `vfmadd`; elsewhere a correctly
        // rounded library call. Both round once, like the vector lanes.
        a.mul_add(b, c)
    }
    #[inline(always)]
    fn add(self, a: __m256, b: __m256) -> __m256 {
        cpu!(_mm256_add_ps(a, b))
    }
    #[inline(always)]
    fn mul(self, a: __m256, b: __m256) -> __m256 {
        cpu!(_mm256_mul_ps(a, b))
    }
    #[inline(always)]
    fn div(self, a: __m256, b: __m256) -> __m256 {
        cpu!(_mm256_div_ps(a, b))
    }
    #[inline(always)]
    fn max(self, a: __m256, b: __m256) -> __m256 {
        // `maxps` returns the second operand unless a > b: the trait's definition.
        cpu!(_mm256_max_ps(a, b))
    }
    #[inline(always)]
    fn min(self, a: __m256, b: __m256) -> __m256 {
        cpu!(_mm256_min_ps(a, b))
    }
    #[inline(always)]
    fn select_gt(self, a: __m256, b: __m256, t: __m256, f: __m256) -> __m256 {
        cpu!(_mm256_blendv_ps(f, t, _mm256_cmp_ps::<_CMP_GT_OQ>(a, b)))
    }
    #[inline(always)]
    fn round(self, a: __m256) -> __m256 {
        cpu!(_mm256_round_ps::<
            { _MM_FROUND_TO_NEAREST_INT | _MM_FROUND_NO_EXC },
        >(a))
    }
    #[inline(always)]
    fn pow2i(self, n: __m256) -> __m256 {
        cpu!(_mm256_castsi256_ps(_mm256_slli_epi32::<23>(
            _mm256_add_epi32(_mm256_cvtps_epi32(n), _mm256_set1_epi32(127))
        )))
    }
}

/// Mask with the first `n` (at most 16) lanes set.
#[inline(always)]
fn avx512_mask(n: usize) -> __mmask16 {
    (((1u32 << n) - 1) & 0xffff) as __mmask16
}

impl Simd for Avx512 {
    type V = __m512;
    const LANES: usize = 16;
    type Narrow = Avx2;

    #[inline(always)]
    fn narrow(self) -> Avx2 {
        // An Avx512 token proves AVX2 and FMA3 as well (see `Isa::is_supported`).
        Avx2(())
    }
    #[inline(always)]
    fn zero(self) -> __m512 {
        cpu!(_mm512_setzero_ps())
    }
    #[inline(always)]
    fn splat(self, x: f32) -> __m512 {
        cpu!(_mm512_set1_ps(x))
    }
    #[inline(always)]
    unsafe fn load(self, p: *const f32) -> __m512 {
        cpu!(_mm512_loadu_ps(p))
    }
    #[inline(always)]
    unsafe fn store(self, p: *mut f32, v: __m512) {
        cpu!(_mm512_storeu_ps(p, v))
    }
    #[inline(always)]
    unsafe fn load_partial(self, p: *const f32, n: usize) -> __m512 {
        // Masked-off lanes are not accessed (no fault), per the AVX-512 definition.
        cpu!(_mm512_maskz_loadu_ps(avx512_mask(n), p))
    }
    #[inline(always)]
    unsafe fn store_partial(self, p: *mut f32, v: __m512, n: usize) {
        cpu!(_mm512_mask_storeu_ps(p, avx512_mask(n), v))
    }
    const FAST_MASKED_LOAD: bool = true;
    #[inline(always)]
    unsafe fn load_masked(self, p: *const f32, mask: u32) -> __m512 {
        // One zero-masking load: masked-off lanes read as +0.0 and are not accessed.
        cpu!(_mm512_maskz_loadu_ps(mask as __mmask16, p))
    }
    #[inline(always)]
    fn prefetch(self, p: *const f32) {
        // A prefetch is a hint: it never faults, whatever the address.
        cpu!(_mm_prefetch::<_MM_HINT_T0>(p.cast::<i8>()))
    }
    #[inline(always)]
    fn unzip(self, lo: __m512, hi: __m512) -> (__m512, __m512) {
        cpu!({
            // Indices 0..15 pick from `lo`, 16..31 from `hi`.
            let even = _mm512_setr_epi32(0, 2, 4, 6, 8, 10, 12, 14, 16, 18, 20, 22, 24, 26, 28, 30);
            let odd = _mm512_setr_epi32(1, 3, 5, 7, 9, 11, 13, 15, 17, 19, 21, 23, 25, 27, 29, 31);
            (
                _mm512_permutex2var_ps(lo, even, hi),
                _mm512_permutex2var_ps(lo, odd, hi),
            )
        })
    }
    #[inline(always)]
    fn shift_down(self, v: __m512, by: usize) -> __m512 {
        // `vpermps` uses the low 4 bits of each index: lanes past the top wrap around.
        cpu!(_mm512_permutexvar_ps(
            _mm512_add_epi32(
                _mm512_setr_epi32(0, 1, 2, 3, 4, 5, 6, 7, 8, 9, 10, 11, 12, 13, 14, 15),
                _mm512_set1_epi32(by as i32)
            ),
            v
        ))
    }
    #[inline(always)]
    fn shift_up(self, v: __m512, by: usize) -> __m512 {
        cpu!(_mm512_permutexvar_ps(
            _mm512_sub_epi32(
                _mm512_setr_epi32(0, 1, 2, 3, 4, 5, 6, 7, 8, 9, 10, 11, 12, 13, 14, 15),
                _mm512_set1_epi32(by as i32)
            ),
            v
        ))
    }
    #[inline(always)]
    fn fma(self, a: __m512, b: __m512, c: __m512) -> __m512 {
        cpu!(_mm512_fmadd_ps(a, b, c))
    }
    #[inline(always)]
    fn fma_s(self, a: f32, b: f32, c: f32) -> f32 {
        a.mul_add(b, c)
    }
    #[inline(always)]
    fn add(self, a: __m512, b: __m512) -> __m512 {
        cpu!(_mm512_add_ps(a, b))
    }
    #[inline(always)]
    fn mul(self, a: __m512, b: __m512) -> __m512 {
        cpu!(_mm512_mul_ps(a, b))
    }
    #[inline(always)]
    fn div(self, a: __m512, b: __m512) -> __m512 {
        cpu!(_mm512_div_ps(a, b))
    }
    #[inline(always)]
    fn max(self, a: __m512, b: __m512) -> __m512 {
        cpu!(_mm512_max_ps(a, b))
    }
    #[inline(always)]
    fn min(self, a: __m512, b: __m512) -> __m512 {
        cpu!(_mm512_min_ps(a, b))
    }
    #[inline(always)]
    fn select_gt(self, a: __m512, b: __m512, t: __m512, f: __m512) -> __m512 {
        cpu!(_mm512_mask_blend_ps(
            _mm512_cmp_ps_mask::<_CMP_GT_OQ>(a, b),
            f,
            t
        ))
    }
    #[inline(always)]
    fn round(self, a: __m512) -> __m512 {
        cpu!(_mm512_roundscale_ps::<
            { _MM_FROUND_TO_NEAREST_INT | _MM_FROUND_NO_EXC },
        >(a))
    }
    #[inline(always)]
    fn pow2i(self, n: __m512) -> __m512 {
        cpu!(_mm512_castsi512_ps(_mm512_slli_epi32::<23>(
            _mm512_add_epi32(_mm512_cvtps_epi32(n), _mm512_set1_epi32(127))
        )))
    }
}
