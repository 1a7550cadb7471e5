//! Short copies and fills for the packing and depthwise paths, and the column-pair loads of
//! the stride-2 ones.
//!
//! The runs these kernels move are often shorter than 64 floats, where a `memcpy`/`memset`
//! call costs more than the work; these helpers use fixed-size chunk moves the compiler emits
//! inline (and widens to the vector registers of the calling instruction-set wrapper).

use super::simd::Simd;

/// Copies a short run with fixed-size chunk moves the compiler emits inline (the last chunk
/// overlapping the previous one): im2col runs are often shorter than 64 floats, where a
/// `memcpy` call costs more than the copy.
#[inline(always)]
pub(crate) fn copy_short(dst: &mut [f32], src: &[f32]) {
    let n = dst.len();
    let src = &src[..n];
    if n >= 16 {
        let mut i = 0;
        while i + 16 <= n {
            dst[i..i + 16].copy_from_slice(&src[i..i + 16]);
            i += 16;
        }
        if i < n {
            dst[n - 16..].copy_from_slice(&src[n - 16..]);
        }
    } else if n >= 4 {
        let mut i = 0;
        while i + 4 <= n {
            dst[i..i + 4].copy_from_slice(&src[i..i + 4]);
            i += 4;
        }
        if i < n {
            dst[n - 4..].copy_from_slice(&src[n - 4..]);
        }
    } else {
        // Written out: a loop here would be turned back into a `memcpy` call.
        match n {
            3 => dst.copy_from_slice(&src[..3]),
            2 => dst.copy_from_slice(&src[..2]),
            1 => dst[0] = src[0],
            _ => {}
        }
    }
}

/// `dst[t] = src[2t]` (stride-2 convolutions), in fixed-size chunks the compiler turns into
/// vector shuffles; like [`copy_short`], a ragged end is one more chunk overlapping the
/// previous one (rows of 15 outputs are common: a stride-2 phase of a 32-wide row with its
/// first column in the padding). `src.len() == 2 * dst.len() - 1`.
#[inline(always)]
pub(crate) fn copy_even(dst: &mut [f32], src: &[f32]) {
    /// `dst[at..at + N] = src[2at..] step 2`, with a constant-length window so the compiler
    /// drops the bounds checks and vectorises.
    #[inline(always)]
    fn chunk<const N: usize>(dst: &mut [f32], src: &[f32], at: usize) {
        let s = &src[2 * at..][..2 * N - 1];
        for (t, d) in dst[at..at + N].iter_mut().enumerate() {
            *d = s[2 * t];
        }
    }
    let n = dst.len();
    let src = &src[..(2 * n).saturating_sub(1)];
    if n >= 16 {
        let mut at = 0;
        while at + 16 <= n {
            chunk::<16>(dst, src, at);
            at += 16;
        }
        if at < n {
            chunk::<16>(dst, src, n - 16);
        }
    } else if n >= 8 {
        chunk::<8>(dst, src, 0);
        if n > 8 {
            chunk::<8>(dst, src, n - 8);
        }
    } else {
        for (t, d) in dst.iter_mut().enumerate() {
            *d = src[2 * t];
        }
    }
}

/// Zero-fills a short run, like [`copy_short`].
#[inline(always)]
pub(crate) fn zero_short(dst: &mut [f32]) {
    let n = dst.len();
    if n >= 16 {
        let mut i = 0;
        while i + 16 <= n {
            dst[i..i + 16].fill(0.0);
            i += 16;
        }
        if i < n {
            dst[n - 16..].fill(0.0);
        }
    } else if n >= 4 {
        let mut i = 0;
        while i + 4 <= n {
            dst[i..i + 4].fill(0.0);
            i += 4;
        }
        if i < n {
            dst[n - 4..].fill(0.0);
        }
    } else {
        // Written out: a loop here would be turned back into a `memset` call.
        match n {
            3 => dst[..3].copy_from_slice(&[0.0; 3]),
            2 => dst[..2].copy_from_slice(&[0.0; 2]),
            1 => dst[0] = 0.0,
            _ => {}
        }
    }
}

/// The left and the right values of the column pairs in `pairs` (at most `LANES` pairs),
/// lanes past them unspecified.
#[inline(always)]
pub(crate) fn load_pairs<S: Simd>(s: S, pairs: &[f32]) -> (S::V, S::V) {
    let lanes = S::LANES;
    debug_assert!(pairs.len() <= 2 * lanes && pairs.len().is_multiple_of(2));
    // SAFETY: every load reads only floats of `pairs`.
    let (lo, hi) = unsafe {
        let p = pairs.as_ptr();
        if pairs.len() == 2 * lanes {
            (s.load(p), s.load(p.add(lanes)))
        } else if pairs.len() > lanes {
            (s.load(p), s.load_partial(p.add(lanes), pairs.len() - lanes))
        } else {
            (s.load_partial(p, pairs.len()), s.zero())
        }
    };
    s.unzip(lo, hi)
}
