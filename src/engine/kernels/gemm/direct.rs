//! The direct route for a convolution's implicit im2col: no packed B panels at all.
//!
//! The packed route ([`super::pack`]) writes K x N floats per call (nine copies of the input for
//! a 3x3 kernel), in runs as short as an output row; with 16 to 64 output channels that copy
//! costs as much as the multiply itself. Here the input is instead copied into a zero-padded
//! buffer in which every row of B is a contiguous run of memory, found through a per-`k` offset
//! table (`off[k]`), in one of two layouts ([`Layout`]):
//!
//! - Planes ([`Planes`], this file): per channel, per row phase `rp` (`i*dil_h % stride_h` of
//!   some kernel row `i`) and per kernel column `j`, a plane of `rows x out_w` floats holding
//!   `input[y'*stride_h + rp - pad_top][x*stride_w + j*dil_w - pad_left]` (0 outside). Tap
//!   `(c, i, j)` reads its plane from row `i*dil_h / stride_h` on, so B row `k` is element
//!   `n + off[k]` for output column `n = oy*out_w + ox` itself: no padding columns, tiles that
//!   store straight into C, at the price of one copy per kernel column (three for a 3x3 at
//!   stride 1, where the packed route makes nine).
//! - Pitched (`pitched`): one copy per channel, rows `pitch > out_w` apart so that a row's
//!   right padding is the next one's left; padding columns are computed and thrown away and
//!   stores split at every output row. Cheaper to copy; chosen where the waste is small.
//! - Rows (`rows`): one plain copy per channel between zero rows, the padding columns
//!   supplied by masked loads ([`super::kernel::tile_masked`]); stride 1 with outputs as wide
//!   as the input, on instruction sets where a masked load is as cheap as a plain one
//!   (AVX-512). Cheapest copy, no waste, whole-vector stores: taken wherever it applies.
//!
//! The microkernel ([`super::kernel::tile_gather`]) is the usual register tile with B rows
//! found through `off` instead of at a fixed stride, and the summation order is the contract's
//! (`fma` per `k` in increasing order, padding read as +0.0 exactly as the packed route stores
//! it), so every route and layout produces the same bits.

pub(super) mod pitched;
pub(super) mod rows;

use super::super::copy::{copy_even, copy_short, zero_short};
use super::super::simd::Simd;
use super::super::vmath;
use super::kernel::{self, Out};
use super::{ConvGeom, GemmScratch, Job};

/// Rows of weights from which the packed route's nine copies of the input cost little next to
/// the multiply-adds (see [`Layout::pays_off`]).
const ROWS_FOR_PACKED: usize = 64;

/// Where the copied input lives and how B rows are found in it.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub(super) enum Layout {
    Pitched(pitched::Pitched),
    Planes(Planes),
    Rows(rows::Rows),
}

impl Layout {
    /// The rows layout where the geometry allows it and `fast_masked_load` (the instruction
    /// set's [`Simd::FAST_MASKED_LOAD`]), else pitched where it suits the geometry, else
    /// planes (either is correct for any geometry).
    pub(super) fn new(g: &ConvGeom, channels: usize, fast_masked_load: bool) -> Layout {
        if fast_masked_load
            && let Some(r) = rows::Rows::new(g)
            && r.buffer_len(channels) <= u32::MAX as usize
        {
            return Layout::Rows(r);
        }
        let p = pitched::Pitched::new(g);
        if p.suits(g, channels) {
            Layout::Pitched(p)
        } else {
            Layout::Planes(Planes::new(g))
        }
    }

    /// Whether the direct route beats the packed one for this geometry, `rows` rows of
    /// weights and vectors of `lanes` floats.
    pub(super) fn pays_off(
        &self,
        g: &ConvGeom,
        channels: usize,
        (rows, lanes): (usize, usize),
    ) -> bool {
        match self {
            // `suits` already asked for little waste and a small enough buffer.
            Layout::Pitched(_) => true,
            Layout::Planes(p) => p.pays_off(g, channels),
            // One plain copy of the input, less than the packed route's nine; but its tiles
            // are whole vectors of the plane, while the packed route ends on a panel as
            // narrow as the last few columns. With more than an eighth of the lanes empty,
            // and rows enough to pay for the nine copies, the packed route wins: a 7×7 plane
            // fills 49 of 64 lanes, and ResNet-18's 512-channel 7×7 layers took 2.08–2.10 ms
            // packed against 2.53–2.54 direct (2026-12-05, AVX-512, batch 1, one thread; the
            // 14×14 and 28×28 layers, at 94 % and 100 %, ran within noise of each other),
            // while RegNetY-400MF's 7×7 group convolutions (a few rows per group) took a
            // quarter longer packed.
            Layout::Rows(_) => {
                let n = g.out_h * g.out_w;
                rows < ROWS_FOR_PACKED || 8 * n >= 7 * n.next_multiple_of(lanes)
            }
        }
    }

    /// Floats of buffer for `channels` channels.
    pub(super) fn buffer_len(&self, channels: usize) -> usize {
        match self {
            Layout::Pitched(p) => p.buffer_len(channels),
            Layout::Planes(p) => p.buffer_len(channels),
            Layout::Rows(r) => r.buffer_len(channels),
        }
    }

    /// Copies channels `c0..c0 + channels` of `input` into `buf` in the layout.
    #[inline(always)]
    pub(super) fn prepare(
        &self,
        input: &[f32],
        g: &ConvGeom,
        c0: usize,
        channels: usize,
        buf: &mut [f32],
    ) {
        match self {
            Layout::Pitched(p) => pitched::prepare(input, g, c0, channels, p, buf),
            Layout::Planes(p) => prepare(input, g, c0, channels, p, buf),
            Layout::Rows(r) => rows::prepare(input, g, c0, channels, r, buf),
        }
    }

    /// `offs[k]` = where row `k` of B starts, relative to the linear index of an output.
    pub(super) fn offsets(&self, g: &ConvGeom, channels: usize, offs: &mut Vec<u32>) {
        match self {
            Layout::Pitched(p) => pitched::offsets(g, p, channels, offs),
            Layout::Planes(p) => offsets(g, p, channels, offs),
            Layout::Rows(r) => rows::offsets(g, r, channels, offs),
        }
    }

    /// Linear index of output column `n`.
    pub(super) fn lin(&self, g: &ConvGeom, n: usize) -> usize {
        match self {
            Layout::Pitched(p) => p.lin(g, n),
            Layout::Planes(_) | Layout::Rows(_) => n,
        }
    }

    /// Whether the microkernel reads element `off[k] + lin(n)` for B row `k`, column `n`
    /// (else it loads +0.0 there: the rows layout's masked lanes).
    #[cfg(test)]
    pub(super) fn reads(&self, g: &ConvGeom, k: usize, n: usize) -> bool {
        match self {
            Layout::Rows(_) => rows::Rows::reads(g, k, n),
            Layout::Pitched(_) | Layout::Planes(_) => true,
        }
    }
}

/// The planes layout (see the module documentation).
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub(super) struct Planes {
    /// Row phases some kernel row reads (at most `stride_h`, and at most `kh`).
    phases: usize,
    /// Rows stored per plane: every row a valid output reads.
    rows: usize,
    /// Floats per plane: `rows * out_w`, rounded up to whole cache lines so that every plane
    /// starts on one (the buffer does).
    plane_len: usize,
    /// Floats per channel (`phases * kw` planes).
    chan_len: usize,
}

/// Floats of zeros after the last plane (planes layout): a tile's last vector reads up to one vector (at most
/// 16 floats) past the last output of a plane; 64 is one whole tile of margin.
const SLACK: usize = 64;

/// Floats per cache line: plane starts are rounded to it.
const LINE: usize = 16;

/// Whether some kernel row `i` has row phase `rp`.
fn phase_used(g: &ConvGeom, rp: usize) -> bool {
    (0..g.kh).any(|i| i * g.dil_h % g.stride_h == rp)
}

impl Planes {
    pub(super) fn new(g: &ConvGeom) -> Planes {
        let sh = g.stride_h;
        let phases = (0..sh).filter(|&rp| phase_used(g, rp)).count();
        let iq_max = (0..g.kh).map(|i| i * g.dil_h / sh).max().unwrap_or(0);
        let rows = g.out_h + iq_max;
        let plane_len = (rows * g.out_w).next_multiple_of(LINE);
        Planes {
            phases,
            rows,
            plane_len,
            chan_len: plane_len * phases * g.kw,
        }
    }

    /// Floats of buffer for `channels` channels.
    pub(super) fn buffer_len(&self, channels: usize) -> usize {
        channels * self.chan_len + SLACK
    }

    /// Whether the direct route beats the packed one for this geometry: it copies
    /// `phases * rows` input rows per kernel column where the packed route copies
    /// `kh * out_h`, and pays for the copy whatever columns the call computes. Measured on
    /// the ResNet-20 shapes of the `kernels` benchmark (AVX-512): 1.1x to 1.2x faster at
    /// stride 1 (0.35 to 0.42 of the packed copy), 0.87x at stride 2 with 8 outputs per row
    /// (0.75 of it). The 3 → 32 and 3 → 16 stems of MobileNetV2, EfficientNet-B0 and
    /// MobileNetV3 (3×3 at stride 2 to 112×112, 0.67 of it) took 254, 421 and 177 µs against
    /// 293, 441 and 192 packed (2026-12-05, `convoy bench --local --steps`, batch 1, one
    /// thread), while ResNet-18's 64 → 128 layer to 28×28 and RegNetY-400MF's 6-group one to
    /// 56×56 (0.69 and 0.68) kept their shares of their networks' time (3.1–3.8 % and
    /// 4.7–4.8 %, three alternated runs). Hence: at most 0.7 of the packed route's copy, and
    /// offsets that fit the u32 table.
    pub(super) fn pays_off(&self, g: &ConvGeom, channels: usize) -> bool {
        10 * self.phases * self.rows <= 7 * g.kh * g.out_h
            && self.buffer_len(channels) <= u32::MAX as usize
    }
}

/// Copies channels `c0..c0 + channels` of `input` (`[in_c_total, in_h, in_w]`) into `buf` in
/// the layout, zeros included, and fills the slack with zeros.
#[inline(always)] // compiled inside each instruction set's wrapper, for its wider moves
pub(super) fn prepare(
    input: &[f32],
    g: &ConvGeom,
    c0: usize,
    channels: usize,
    lay: &Planes,
    buf: &mut [f32],
) {
    let plane = g.in_h * g.in_w;
    let (body, tail) = buf.split_at_mut(channels * lay.chan_len);
    tail.fill(0.0);
    for (c, dst_c) in body.chunks_exact_mut(lay.chan_len).enumerate() {
        let src_c = &input[(c0 + c) * plane..][..plane];
        let mut planes = dst_c.chunks_exact_mut(lay.plane_len);
        for rp in (0..g.stride_h).filter(|&rp| phase_used(g, rp)) {
            for j in 0..g.kw {
                // `chan_len` is `phases * kw` planes: one per (used phase, column).
                let Some(dst) = planes.next() else { return };
                let (dst, pad) = dst.split_at_mut(lay.rows * g.out_w);
                zero_short(pad);
                copy_plane(src_c, g, (rp, j), dst);
            }
        }
    }
}

/// Fills one plane (`rows x out_w`): row `y'`, column `x` is input
/// `[y'*stride_h + rp - pad_top][x*stride_w + j*dil_w - pad_left]`, 0 outside.
#[inline(always)]
fn copy_plane(src: &[f32], g: &ConvGeom, (rp, j): (usize, usize), dst: &mut [f32]) {
    let (w, sw) = (g.out_w, g.stride_w);
    // Input column of output column x is x*sw + d; valid columns x in xa..xb.
    let d = (j * g.dil_w) as isize - g.pad_left as isize;
    let xa = ((-d).max(0) as usize).div_ceil(sw).min(w);
    let xb = (g.in_w as isize - d)
        .max(0)
        .unsigned_abs()
        .div_ceil(sw)
        .clamp(xa, w);
    // Valid plane rows y in ya..yb: input row y*sh + rp - pad_top inside 0..in_h.
    let sh = g.stride_h;
    let rows = dst.len() / w.max(1);
    let ya = g.pad_top.saturating_sub(rp).div_ceil(sh).min(rows);
    let yb = (g.in_h + g.pad_top)
        .saturating_sub(rp)
        .div_ceil(sh)
        .clamp(ya, rows);
    let (top, rest) = dst.split_at_mut(ya * w);
    let (mid, bottom) = rest.split_at_mut((yb - ya) * w);
    top.fill(0.0);
    bottom.fill(0.0);
    if ya == yb {
        return;
    }
    let first_row = ya * sh + rp - g.pad_top;
    if sh == 1 && sw == 1 && w == g.in_w {
        // The valid rows are one contiguous run in both: copy them in one shifted move, then
        // zero the columns that came from a neighbouring row (|d| per row at most).
        let src = &src[first_row * w..][..mid.len()];
        let n = mid.len();
        let shift = d.unsigned_abs().min(n);
        if d >= 0 {
            mid[..n - shift].copy_from_slice(&src[shift..]);
        } else {
            mid[shift..].copy_from_slice(&src[..n - shift]);
        }
        for row in mid.chunks_exact_mut(w) {
            zero_short(&mut row[..xa]);
            zero_short(&mut row[xb..]);
        }
        return;
    }
    for (y, row) in mid.chunks_exact_mut(w).enumerate() {
        zero_short(&mut row[..xa]);
        zero_short(&mut row[xb..]);
        if xa == xb {
            continue;
        }
        let src_row = &src[(first_row + y * sh) * g.in_w..][..g.in_w];
        // Input column of xa is xa*sw + d >= 0.
        let first = (xa * sw) as isize + d;
        let first = first.unsigned_abs();
        let len = xb - xa;
        match sw {
            1 => copy_short(&mut row[xa..xb], &src_row[first..first + len]),
            2 => copy_even(&mut row[xa..xb], &src_row[first..first + 2 * len - 1]),
            _ => {
                for (o, s) in row[xa..xb]
                    .iter_mut()
                    .zip(src_row[first..].iter().step_by(sw))
                {
                    *o = *s;
                }
            }
        }
    }
}

/// `offs[k]` = where row `k = (c, i, j)` of B starts, relative to the output column.
pub(super) fn offsets(g: &ConvGeom, lay: &Planes, channels: usize, offs: &mut Vec<u32>) {
    offs.clear();
    let sh = g.stride_h;
    for c in 0..channels {
        for i in 0..g.kh {
            let py = i * g.dil_h;
            let phase = (0..py % sh).filter(|&rp| phase_used(g, rp)).count();
            for j in 0..g.kw {
                let plane = phase * g.kw + j;
                let off = c * lay.chan_len + plane * lay.plane_len + (py / sh) * g.out_w;
                // `pays_off` or the caller's size check keeps the buffer below 2^32 floats.
                offs.push(off as u32);
            }
        }
    }
}

/// The route's driver: copy the input once, then run register tiles over the output columns,
/// tiles outermost so a tile's slice of the input stays in L1 while every A panel meets it.
///
/// # Safety
/// As the packed driver, `super::run`.
#[inline(always)]
pub(super) unsafe fn run<S: Simd, const MR: usize, const NV: usize>(
    s: S,
    job: &Job<'_, '_>,
    (input, g, c0): (&[f32], &ConvGeom, usize),
    lay: &Layout,
    scratch: &mut GemmScratch,
) {
    let (m, k) = (job.a.m, job.a.k);
    let channels = k / (g.kh * g.kw);
    let len = lay.buffer_len(channels);
    assert!(
        len <= u32::MAX as usize,
        "direct im2col buffer of {len} floats exceeds the u32 offsets"
    );
    let buf = scratch.buf.get(len);
    lay.prepare(input, g, c0, channels, buf);
    lay.offsets(g, channels, &mut scratch.offs);
    let (lo, hi) = (lay.lin(g, job.cols.start), lay.lin(g, job.cols.end - 1) + 1);
    // Every read is b + t + off + lane with t + nv*LANES < hi + LANES; checked once here
    // rather than trusted (the layout guarantees it, see `SLACK`).
    let max_off = scratch.offs.iter().copied().max().unwrap_or(0) as usize;
    assert!(
        max_off + hi + S::LANES <= buf.len(),
        "direct im2col layout too short"
    );
    let (b_base, offs) = (buf.as_ptr(), scratch.offs.as_ptr());
    let a_base = job.a.data.as_ptr();
    let a_panels = m.div_ceil(MR);
    let out = &job.out;
    // The pitched layout's store pieces depend on the tile only, not on the A panel: worked
    // out once per tile rather than once per panel.
    let mut list = [pitched::Piece::default(); pitched::MAX_PIECES];
    // The rows layout's lane masks, likewise per tile.
    let mut masks = [0u32; rows::MASKS];
    let mut masks_for = (usize::MAX, 0);
    for panels in super::a_blocks(a_panels, k * MR, 1) {
        let mut t = lo;
        while t < hi {
            // The vectors left, split evenly over the fewest tiles that hold them: 4 vectors
            // (an 8x8 output at 16 lanes) make two tiles of 2, not 3 + 1, whose lone vector
            // would wait on 8 broadcasts per step with 8 accumulator chains.
            let left = (hi - t).div_ceil(S::LANES);
            let nv = left.div_ceil(left.div_ceil(NV));
            let count = match lay {
                Layout::Pitched(p) => pitched::pieces(
                    (t, nv * S::LANES, S::LANES),
                    (lo, hi),
                    (p.pitch, g.out_w),
                    &mut list,
                ),
                Layout::Planes(_) => 0,
                Layout::Rows(_) => {
                    // The masks depend on the tile's first output column and width only: at 16
                    // or 32 outputs per row every tile (or every other) repeats the last one's.
                    let key = (t % g.out_w, nv);
                    if key != masks_for {
                        rows::masks(g, (t, nv, S::LANES), &mut masks);
                        masks_for = key;
                    }
                    0
                }
            };
            for ap in panels.clone() {
                let rows = (ap * MR, MR.min(m - ap * MR));
                // SAFETY: panel `ap` exists; B reads are inside the buffer (checked above); the
                // rows layout's masks hold `kw * nv` entries for this tile and its offsets step
                // by `dil_w` along a kernel row (`rows::offsets`); the stored columns are those
                // of `job.cols` (caller's bounds).
                unsafe {
                    let a_ptr = a_base.add(ap * k * MR);
                    let b_ptr = b_base.add(t);
                    macro_rules! tile_nv {
                        ($nv:literal) => {{
                            let acc = match lay {
                                // 3 kernel columns: the unrolled kernel (the rows layout's
                                // offsets step by `dil_w` along a kernel row).
                                Layout::Rows(_) if g.kw == 3 => {
                                    kernel::tile_masked_kw::<S, MR, $nv, 3>(
                                        s,
                                        (k, g.dil_w),
                                        a_ptr,
                                        b_ptr,
                                        offs,
                                        masks.as_ptr(),
                                    )
                                }
                                Layout::Rows(_) => kernel::tile_masked::<S, MR, $nv>(
                                    s,
                                    (k, g.kw),
                                    a_ptr,
                                    b_ptr,
                                    offs,
                                    masks.as_ptr(),
                                ),
                                _ => kernel::tile_gather::<S, MR, $nv>(s, k, a_ptr, b_ptr, offs),
                            };
                            match lay {
                                Layout::Planes(_) | Layout::Rows(_) => {
                                    store::<S, MR, $nv>(s, &acc, out, rows, (t, hi))
                                }
                                Layout::Pitched(_) => {
                                    pitched::store::<S, MR, $nv>(s, &acc, out, rows, &list[..count])
                                }
                            }
                        }};
                    }
                    match nv {
                        1 => tile_nv!(1),
                        2 if NV >= 2 => tile_nv!(2),
                        3 if NV >= 3 => tile_nv!(3),
                        _ if NV >= 4 => tile_nv!(4),
                        // nv <= NV by construction.
                        _ => {}
                    }
                }
            }
            t += nv * S::LANES;
        }
    }
    if !job.act.is_cheap() {
        for row in 0..m {
            // SAFETY: row `row`, columns `job.cols` are inside C (caller), and no other
            // reference to C is live.
            let seg = unsafe {
                std::slice::from_raw_parts_mut(
                    out.c.add(row * out.ldc + job.cols.start),
                    job.cols.len(),
                )
            };
            vmath::apply_slice(s, job.act, seg);
        }
    }
}

/// Stores a [`kernel::tile_gather`] result whose lanes are output columns `t..`, the ones
/// below `hi`, finishing them in registers.
///
/// # Safety
/// Every `(m, n)` with `m` in `m0..m0 + rows` and `n` in `t..hi` must be inside C, the
/// residual and the bias.
#[inline(always)]
unsafe fn store<S: Simd, const MR: usize, const NV: usize>(
    s: S,
    acc: &[[S::V; NV]; MR],
    out: &Out,
    (m0, rows): (usize, usize),
    (t, hi): (usize, usize),
) {
    for (r, acc_r) in acc.iter().enumerate().take(rows) {
        for (v, &x) in acc_r.iter().enumerate() {
            let n = t + v * S::LANES;
            let len = S::LANES.min(hi.saturating_sub(n));
            if len > 0 {
                // SAFETY: columns n..n + len are below `hi` (caller).
                unsafe { out.finish_lanes(s, m0 + r, n, x, (0, len)) };
            }
        }
    }
}
