//! Register-blocked microkernels and their fused epilogue.
//!
//! Two shapes, one summation order. [`tile`] vectorises along the output columns: an
//! `MR x (NV*LANES)` block of accumulators, each step broadcasting one weight and loading `NV`
//! vectors of a packed B row. [`small_tile`] vectorises along the weight rows for a handful of
//! columns (batch-1 dense layers, ragged tails), where a column-vector tile would be mostly
//! padding. In both, every accumulator starts at zero and takes one `fma` per `k` in increasing
//! `k`, so an output element has the same bits whichever kernel, tile position or column split
//! produced it. The epilogue then adds bias, then residual, then applies the activation, in that
//! order, again identically in vector and scalar form.

use std::ops::Range;

use super::super::activation::{Activation, apply_vec};
use super::super::simd::Simd;

/// Where a tile's results go and what is added to them. Pointers are absolute: element
/// `(m, n)` of C is at `c + m*ldc + n`, of the residual at `residual + m*ldc + n`, its bias at
/// `bias + m`.
#[derive(Clone, Copy)]
pub(super) struct Out {
    pub c: *mut f32,
    pub ldc: usize,
    pub bias: *const f32,
    pub residual: *const f32,
    /// The activation if it is cheap (applied here), else identity (applied by the caller).
    pub act: Activation,
}

impl Out {
    /// The scalar epilogue for one element.
    ///
    /// # Safety
    /// `(m, n)` must be inside C, the residual and the bias.
    #[inline(always)]
    unsafe fn finish(&self, m: usize, n: usize, acc: f32) {
        let mut x = acc;
        // SAFETY: the caller guarantees (m, n) is inside all three arrays.
        unsafe {
            if !self.bias.is_null() {
                x += *self.bias.add(m);
            }
            if !self.residual.is_null() {
                x += *self.residual.add(m * self.ldc + n);
            }
            *self.c.add(m * self.ldc + n) = self.act.apply_cheap(x);
        }
    }

    /// The vector epilogue for lanes `from..from + len` of `acc`, which go to row `m`,
    /// columns `n..n + len`; the same bits as [`Out::finish`] per element.
    ///
    /// # Safety
    /// Those elements must be inside C and the residual, and `m` inside the bias;
    /// `from + len <= LANES`.
    #[inline(always)]
    pub(super) unsafe fn finish_lanes<S: Simd>(
        &self,
        s: S,
        m: usize,
        n: usize,
        acc: S::V,
        (from, len): (usize, usize),
    ) {
        // SAFETY: the caller guarantees the row segment and the bias entry exist; partial
        // loads and stores touch only the first `len` floats.
        unsafe {
            let mut x = acc;
            if !self.bias.is_null() {
                x = s.add(x, s.splat(*self.bias.add(m)));
            }
            if !self.residual.is_null() {
                let r = s.load_partial(self.residual.add(m * self.ldc + n), len);
                x = s.add(x, s.shift_up(r, from));
            }
            let y = apply_vec(s, self.act, x);
            let c = self.c.add(m * self.ldc + n);
            if len == S::LANES {
                s.store(c, y);
            } else {
                s.store_partial(c, s.shift_down(y, from), len);
            }
        }
    }
}

/// Accumulates an `MR x (NV*LANES)` tile like [`tile`], with B row `k` at `b + offs[k]`
/// instead of at a fixed stride (the direct convolution route, `super::direct`).
///
/// # Safety
/// `a` must be readable for `k*MR` floats, `offs` for `k` entries, and `b + offs[kk]` for
/// `NV*LANES` floats for every `kk < k`.
#[inline(always)]
pub(super) unsafe fn tile_gather<S: Simd, const MR: usize, const NV: usize>(
    s: S,
    k: usize,
    a: *const f32,
    b: *const f32,
    offs: *const u32,
) -> [[S::V; NV]; MR] {
    let mut acc = [[s.zero(); NV]; MR];
    let mut a = a;
    for kk in 0..k {
        s.prefetch(a.wrapping_add(A_PREFETCH));
        // SAFETY: `kk < k` entries of `offs`, and that B row (the caller's bounds).
        let row = unsafe { b.add(*offs.add(kk) as usize) };
        let mut bv = [s.zero(); NV];
        for (v, x) in bv.iter_mut().enumerate() {
            // SAFETY: within this step's B row (the caller's bound).
            *x = unsafe { s.load(row.add(v * S::LANES)) };
        }
        for (r, acc_r) in acc.iter_mut().enumerate() {
            // SAFETY: within this step's A column (the caller's bound on `a`).
            let av = s.splat(unsafe { *a.add(r) });
            for (acc_rv, &bx) in acc_r.iter_mut().zip(&bv) {
                *acc_rv = s.fma(av, bx, *acc_rv);
            }
        }
        // SAFETY: advancing to the next step stays within (or one past) the A panel.
        a = unsafe { a.add(MR) };
    }
    acc
}

/// [`tile_gather`] for the rows layout (`super::direct::rows`): step `kk` reads kernel column
/// `j = kk % kw`, whose B row holds neighbouring rows' values where the convolution reads
/// padding; `masks[j*NV + v]` keeps vector `v`'s lanes that are inside the row, the others
/// load as +0.0, exactly the padding the other routes store.
///
/// # Safety
/// As [`tile_gather`]; `masks` readable for `kw*NV` entries, `kw > 0`.
#[inline(always)]
pub(super) unsafe fn tile_masked<S: Simd, const MR: usize, const NV: usize>(
    s: S,
    (k, kw): (usize, usize),
    a: *const f32,
    b: *const f32,
    offs: *const u32,
    masks: *const u32,
) -> [[S::V; NV]; MR] {
    let mut acc = [[s.zero(); NV]; MR];
    let mut a = a;
    // `masks` index of this step's kernel column: one counter that wraps, rather than a
    // division per step.
    let (mut mj, m_end) = (0, kw * NV);
    for kk in 0..k {
        s.prefetch(a.wrapping_add(A_PREFETCH));
        // SAFETY: `kk < k` entries of `offs`, and that B row (the caller's bounds).
        let row = unsafe { b.add(*offs.add(kk) as usize) };
        let mut bv = [s.zero(); NV];
        for (v, x) in bv.iter_mut().enumerate() {
            // SAFETY: within this step's B row and the masks (the caller's bounds).
            *x = unsafe { s.load_masked(row.add(v * S::LANES), *masks.add(mj + v)) };
        }
        for (r, acc_r) in acc.iter_mut().enumerate() {
            // SAFETY: within this step's A column (the caller's bound on `a`).
            let av = s.splat(unsafe { *a.add(r) });
            for (acc_rv, &bx) in acc_r.iter_mut().zip(&bv) {
                *acc_rv = s.fma(av, bx, *acc_rv);
            }
        }
        // SAFETY: advancing to the next step stays within (or one past) the A panel.
        a = unsafe { a.add(MR) };
        mj += NV;
        if mj == m_end {
            mj = 0;
        }
    }
    acc
}

/// [`tile_masked`] for a kernel `KW` columns wide known at compile time (3x3 convolutions):
/// the `KW` steps of one `(channel, kernel row)` are unrolled, read B rows `dil_w` floats
/// apart from one offset (`offs[g*KW]`, the group's first column) and keep their `KW*NV`
/// masks in registers, which leaves the loop only the FMAs' own loads.
///
/// # Safety
/// As [`tile_masked`] with `kw == KW`, `k` a multiple of `KW`, and `offs[g*KW + j] ==
/// offs[g*KW] + j*dil_w` for every group `g` and column `j`.
#[inline(always)]
pub(super) unsafe fn tile_masked_kw<S: Simd, const MR: usize, const NV: usize, const KW: usize>(
    s: S,
    (k, dil_w): (usize, usize),
    a: *const f32,
    b: *const f32,
    offs: *const u32,
    masks: *const u32,
) -> [[S::V; NV]; MR] {
    let mut acc = [[s.zero(); NV]; MR];
    let mut m = [[0u32; NV]; KW];
    for (j, m_j) in m.iter_mut().enumerate() {
        for (v, x) in m_j.iter_mut().enumerate() {
            // SAFETY: `KW*NV` entries (the caller's bound).
            *x = unsafe { *masks.add(j * NV + v) };
        }
    }
    let mut a = a;
    for group in 0..k / KW {
        // SAFETY: entry `group*KW < k` of `offs`, and the group's B rows (the caller's bounds).
        let row0 = unsafe { b.add(*offs.add(group * KW) as usize) };
        for (j, m_j) in m.iter().enumerate() {
            s.prefetch(a.wrapping_add(A_PREFETCH));
            // SAFETY: column `j`'s B row is `j*dil_w` floats on (the caller's contract), and
            // this step's A column is inside the panel.
            unsafe {
                let row = row0.add(j * dil_w);
                let mut bv = [s.zero(); NV];
                for (v, x) in bv.iter_mut().enumerate() {
                    *x = s.load_masked(row.add(v * S::LANES), m_j[v]);
                }
                for (r, acc_r) in acc.iter_mut().enumerate() {
                    let av = s.splat(*a.add(r));
                    for (acc_rv, &bx) in acc_r.iter_mut().zip(&bv) {
                        *acc_rv = s.fma(av, bx, *acc_rv);
                    }
                }
                a = a.add(MR);
            }
        }
    }
    acc
}

/// Floats ahead of the current step at which the kernels ask for their A panel to be fetched
/// (2 KiB: 64 steps of an 8-row panel). Weights too large to stay in cache between calls
/// stream from memory as a tile runs. Measured (2026-12-05, 2-core AVX-512 Xeon, B/A medians
/// of three alternated pairs, one thread, batch 1 unless said): in [`tile`] alone, MobileNetV2
/// 1.07× and EfficientNet-B0 1.06× (its 1×1 layers at 7×7 2.5 → 2.0 ms); in every kernel,
/// ResNet-18 1.15× (batch 32: 1.06×), RegNetY-400MF 1.13×, ResNet-20 and ShuffleNetV2 0.99×.
const A_PREFETCH: usize = 512;

/// Accumulates an `MR x (NV*LANES)` tile over `k` steps: `a` is an A panel (`MR` values per
/// step), `b` the tile's B columns, `NV*LANES` values per step, steps `b_step` floats apart (a
/// packed panel's width, or a plain matrix's row stride).
///
/// # Safety
/// `a` must be readable for `k*MR` floats, and `b` for `NV*LANES` floats from each
/// `b + i*b_step`, `i < k`.
#[inline(always)]
pub(super) unsafe fn tile<S: Simd, const MR: usize, const NV: usize>(
    s: S,
    k: usize,
    a: *const f32,
    (b, b_step): (*const f32, usize),
) -> [[S::V; NV]; MR] {
    let mut acc = [[s.zero(); NV]; MR];
    let (mut a, mut b) = (a, b);
    for _ in 0..k {
        s.prefetch(a.wrapping_add(A_PREFETCH));
        let mut bv = [s.zero(); NV];
        for (v, x) in bv.iter_mut().enumerate() {
            // SAFETY: within this step's B row (the caller's bound on `b`).
            *x = unsafe { s.load(b.add(v * S::LANES)) };
        }
        for (r, acc_r) in acc.iter_mut().enumerate() {
            // SAFETY: within this step's A column (the caller's bound on `a`).
            let av = s.splat(unsafe { *a.add(r) });
            for (acc_rv, &bx) in acc_r.iter_mut().zip(&bv) {
                *acc_rv = s.fma(av, bx, *acc_rv);
            }
        }
        // SAFETY: advancing to the next step stays within (or one past) A's panel; B's next
        // step is only read if it is inside (the caller's bound), so `wrapping_add`.
        unsafe {
            a = a.add(MR);
        }
        b = b.wrapping_add(b_step);
    }
    acc
}

/// Writes rows `0..rows` and columns `0..cols` of a tile whose top-left element is `(m0, n0)`,
/// through the epilogue. A full-width tile is finished in registers; a ragged one goes through
/// a stack buffer and the scalar epilogue, which computes the same bits.
///
/// # Safety
/// Every `(m0 + r, n0 + j)` with `r < rows`, `j < cols` must be inside C, the residual and the
/// bias; `rows <= MR`, `cols <= NV*LANES <= 64`.
#[inline(always)]
pub(super) unsafe fn store_tile<S: Simd, const MR: usize, const NV: usize>(
    s: S,
    acc: &[[S::V; NV]; MR],
    out: &Out,
    (m0, rows): (usize, usize),
    (n0, cols): (usize, usize),
) {
    let full = cols == NV * S::LANES;
    for (r, acc_r) in acc.iter().enumerate().take(rows) {
        let m = m0 + r;
        if full {
            // SAFETY: the whole row segment n0..n0+cols is inside the arrays (caller), and
            // bias + m is inside the bias.
            unsafe {
                let bias = (!out.bias.is_null()).then(|| s.splat(*out.bias.add(m)));
                let c_row = out.c.add(m * out.ldc + n0);
                let res_row = out.residual.wrapping_add(m * out.ldc + n0);
                for (v, &x) in acc_r.iter().enumerate() {
                    let mut x = x;
                    if let Some(bv) = bias {
                        x = s.add(x, bv);
                    }
                    if !out.residual.is_null() {
                        x = s.add(x, s.load(res_row.add(v * S::LANES)));
                    }
                    s.store(c_row.add(v * S::LANES), apply_vec(s, out.act, x));
                }
            }
        } else {
            let mut buf = [0.0f32; 64];
            for (v, &x) in acc_r.iter().enumerate() {
                // SAFETY: NV*LANES <= 64 floats fit in `buf` (caller).
                unsafe { s.store(buf.as_mut_ptr().add(v * S::LANES), x) };
            }
            for (j, &x) in buf.iter().enumerate().take(cols) {
                // SAFETY: (m, n0 + j) is inside the arrays (caller).
                unsafe { out.finish(m, n0 + j, x) };
            }
        }
    }
}

/// Accumulates `PM` A panels (rows `p*MR .. p*MR + MR` of each, `VM` narrow vectors covering
/// them) against `NB` columns of a small B panel of row width `bw`.
///
/// # Safety
/// `a` must be readable for `(PM-1)*a_stride + (k-1)*MR + VM*LANES` floats (the last vector of
/// a panel may run past `MR` into padding), `b` for `(k-1)*bw + NB` when `k > 0`.
#[inline(always)]
pub(super) unsafe fn small_tile<
    N: Simd,
    const MR: usize,
    const VM: usize,
    const PM: usize,
    const NB: usize,
>(
    s: N,
    k: usize,
    a: *const f32,
    a_stride: usize,
    b: *const f32,
    bw: usize,
) -> [[[N::V; VM]; NB]; PM] {
    let mut acc = [[[s.zero(); VM]; NB]; PM];
    for kk in 0..k {
        let mut av = [[s.zero(); VM]; PM];
        for (p, av_p) in av.iter_mut().enumerate() {
            s.prefetch(a.wrapping_add(p * a_stride + kk * MR + A_PREFETCH));
            for (v, x) in av_p.iter_mut().enumerate() {
                // SAFETY: inside the caller's bound on `a`.
                *x = unsafe { s.load(a.add(p * a_stride + kk * MR + v * N::LANES)) };
            }
        }
        for j in 0..NB {
            // SAFETY: inside the caller's bound on `b`.
            let bj = s.splat(unsafe { *b.add(kk * bw + j) });
            for (acc_p, av_p) in acc.iter_mut().zip(&av) {
                for (x, &a) in acc_p[j].iter_mut().zip(av_p) {
                    *x = s.fma(a, bj, *x);
                }
            }
        }
    }
    acc
}

/// Writes a [`small_tile`] result: panel `p`, lane `v*LANES + l` is row
/// `m0 + p*MR + v*LANES + l` (kept if below `MR` within its panel and below `m_end`), column
/// `j` is `n0 + j`.
///
/// # Safety
/// Every kept `(row, n0 + j)` must be inside C, the residual and the bias.
#[inline(always)]
pub(super) unsafe fn store_small<
    N: Simd,
    const MR: usize,
    const VM: usize,
    const PM: usize,
    const NB: usize,
>(
    s: N,
    acc: &[[[N::V; VM]; NB]; PM],
    out: &Out,
    (m0, m_end): (usize, usize),
    n0: usize,
) {
    let mut buf = [0.0f32; 16];
    for (p, acc_p) in acc.iter().enumerate() {
        for (j, acc_pj) in acc_p.iter().enumerate() {
            for (v, &x) in acc_pj.iter().enumerate() {
                // SAFETY: one narrow vector (at most 16 lanes) fits in `buf`.
                unsafe { s.store(buf.as_mut_ptr(), x) };
                for (l, &y) in buf.iter().enumerate().take(N::LANES) {
                    let r = v * N::LANES + l;
                    let m = m0 + p * MR + r;
                    if r < MR && m < m_end {
                        // SAFETY: (m, n0 + j) is a kept element (caller).
                        unsafe { out.finish(m, n0 + j, y) };
                    }
                }
            }
        }
    }
}

/// A panels the row-vectorised kernel takes at once for a single column.
pub(super) const SMALL_PANELS: usize = 4;

/// The row-vectorised kernel over A panels `a.2` for the columns of one small B panel, in
/// chunks of up to 4 columns; with one column, 4 panels at a time keep 4 FMA chains in flight.
///
/// # Safety
/// As the driver's `run`, for columns `n0..n0+cols`; `b` is that panel (row width `cols`);
/// the panels exist.
#[inline(always)]
pub(super) unsafe fn run_small<N: Simd, const MR: usize, const VM: usize>(
    s: N,
    a: (*const f32, usize, Range<usize>, usize),
    k: usize,
    b: *const f32,
    (n0, cols): (usize, usize),
    out: &Out,
) {
    let mut j = 0;
    while j < cols {
        let nb = (cols - j).min(4);
        // SAFETY: columns j..j+nb of the panel; forwarded bounds from the caller.
        unsafe {
            let bj = b.add(j);
            match nb {
                1 => small_group::<N, MR, VM, SMALL_PANELS, 1>(
                    s,
                    a.clone(),
                    k,
                    bj,
                    cols,
                    n0 + j,
                    out,
                ),
                2 => small_group::<N, MR, VM, 2, 2>(s, a.clone(), k, bj, cols, n0 + j, out),
                3 => small_group::<N, MR, VM, 1, 3>(s, a.clone(), k, bj, cols, n0 + j, out),
                _ => small_group::<N, MR, VM, 1, 4>(s, a.clone(), k, bj, cols, n0 + j, out),
            }
        }
        j += nb;
    }
}

/// `NB` columns against A panels `panels`, `PM` at a time, then one at a time.
///
/// # Safety
/// As [`run_small`].
#[inline(always)]
unsafe fn small_group<
    N: Simd,
    const MR: usize,
    const VM: usize,
    const PM: usize,
    const NB: usize,
>(
    s: N,
    (a_base, a_stride, panels, m): (*const f32, usize, Range<usize>, usize),
    k: usize,
    b: *const f32,
    bw: usize,
    n: usize,
    out: &Out,
) {
    let (mut ap, a_panels) = (panels.start, panels.end);
    // SAFETY (both loops): the panels read exist (plus padding), B columns are in the panel,
    // and the stored rows are clipped to m.
    unsafe {
        while ap + PM <= a_panels {
            let acc =
                small_tile::<N, MR, VM, PM, NB>(s, k, a_base.add(ap * a_stride), a_stride, b, bw);
            store_small::<N, MR, VM, PM, NB>(s, &acc, out, (ap * MR, m), n);
            ap += PM;
        }
        while ap < a_panels {
            let acc =
                small_tile::<N, MR, VM, 1, NB>(s, k, a_base.add(ap * a_stride), a_stride, b, bw);
            store_small::<N, MR, VM, 1, NB>(s, &acc, out, (ap * MR, m), n);
            ap += 1;
        }
    }
}
