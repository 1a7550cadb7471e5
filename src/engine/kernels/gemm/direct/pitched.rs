//! The pitched layout of the direct route: each channel copied once, split into stride-phase
//! planes whose rows are `pitch >= out_w` floats apart.
//!
//! - Plane `(rp, cp)` holds the padded input's rows `y'*stride_h + rp` and columns
//!   `x'*stride_w + cp`, so a strided tap reads consecutive floats.
//! - Output position `(oy, ox)` gets the linear index `oy*pitch + ox`; tap `(c, i, j)` reads
//!   element `lin + off[k]` of the buffer. Positions with `ox >= out_w` are computed and thrown
//!   away (padding columns; the pitch exceeds `out_w` by one for a 3x3 "same" convolution at
//!   stride 1, because the zero right of one row is also the zero left of the next), and a
//!   tile's stores split at every output row ([`pieces`]).

use super::super::super::copy::{copy_even, copy_short, zero_short};
use super::super::super::simd::Simd;
use super::super::ConvGeom;
use super::super::kernel::Out;

/// The pitched layout: one copy per stride phase, rows `pitch` apart (see the module
/// documentation).
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub(in super::super) struct Pitched {
    /// Linear index of output `(oy, ox)` is `oy * pitch + ox`.
    pub(in super::super) pitch: usize,
    /// Rows stored per phase plane (every row a valid output reads, plus one of zeros that
    /// reads running past a row's end may reach).
    rows: usize,
    /// Floats per phase plane (`rows * pitch`).
    plane_len: usize,
    /// Floats per channel (all phase planes).
    chan_len: usize,
    /// Whether every phase plane is read by some tap (else copying it is wasted work).
    all_phases_used: bool,
}

/// Floats of zeros after the last plane: the last tile's padding lanes read up to one tile
/// (at most 64 floats) past the last output, plus a pitch of spill.
fn pitched_slack(pitch: usize) -> usize {
    64 + pitch
}

impl Pitched {
    pub(in super::super) fn new(g: &ConvGeom) -> Pitched {
        let (sh, sw) = (g.stride_h, g.stride_w);
        let mut pitch = g.out_w;
        let iq_max = (0..g.kh).map(|i| i * g.dil_h / sh).max().unwrap_or(0);
        // Tap (i, j) reads plane (i*dil_h % sh, j*dil_w % sw): the planes read are every
        // pair of a row phase and a column phase that some tap has.
        let all_phases_used = (0..sh).all(|rp| (0..g.kh).any(|i| i * g.dil_h % sh == rp))
            && (0..sw).all(|cp| (0..g.kw).any(|j| j * g.dil_w % sw == cp));
        for cp in 0..sw {
            // Stored columns x' of this phase that hold input (the others are zeros):
            // x'*sw + cp - pad_left in 0..in_w, i.e. x' in xa..xb.
            let xa = g.pad_left.saturating_sub(cp).div_ceil(sw);
            let xb = (g.in_w + g.pad_left).saturating_sub(cp).div_ceil(sw);
            // Reads by valid outputs: x' = ox + jq, ox < out_w, below xr.
            let jq_max = (0..g.kw)
                .map(|j| j * g.dil_w)
                .filter(|px| px % sw == cp)
                .map(|px| px / sw)
                .max();
            // Row y' starts at y'*pitch. The previous row's input must end before it
            // (pitch >= xb), and this row's reads past its input must reach no further than
            // the zeros before the next row's input (pitch >= xr - xa).
            pitch = pitch.max(xb);
            if let Some(jq) = jq_max {
                pitch = pitch.max((g.out_w + jq).saturating_sub(xa));
            }
        }
        let rows = g.out_h + iq_max + 1;
        let plane_len = rows * pitch;
        Pitched {
            pitch,
            rows,
            plane_len,
            chan_len: plane_len * sh * sw,
            all_phases_used,
        }
    }

    /// Floats of buffer for `channels` channels.
    pub(in super::super) fn buffer_len(&self, channels: usize) -> usize {
        channels * self.chan_len + pitched_slack(self.pitch)
    }

    /// Whether this layout serves the geometry better than [`super::Planes`]: it copies the
    /// input once where the planes copy it once per kernel column, but computes padding
    /// columns and splits its stores at every output row. Measured on the ResNet-20 shapes of
    /// the `kernels` benchmark (AVX-512): better with at most 1/16 padding columns (3x3
    /// "same" from 16 outputs per row, stride 1 or 2) and 8 or more channels (the stem's 3,
    /// K = 27, is store-bound and does better on planes).
    pub(in super::super) fn suits(&self, g: &ConvGeom, channels: usize) -> bool {
        self.pitch * 16 <= g.out_w * 17
            && channels >= 8
            && self.all_phases_used
            && self.buffer_len(channels) <= u32::MAX as usize
    }

    /// Linear index of real output column `n`.
    pub(in super::super) fn lin(&self, g: &ConvGeom, n: usize) -> usize {
        (n / g.out_w) * self.pitch + n % g.out_w
    }
}

/// Copies channels `c0..c0 + channels` of `input` (`[in_c_total, in_h, in_w]`) into `buf` in
/// the layout, zeros included, and fills the slack with zeros.
#[inline(always)] // compiled inside each instruction set's wrapper, for its wider moves
pub(in super::super) fn prepare(
    input: &[f32],
    g: &ConvGeom,
    c0: usize,
    channels: usize,
    lay: &Pitched,
    buf: &mut [f32],
) {
    let (sh, sw) = (g.stride_h, g.stride_w);
    let plane = g.in_h * g.in_w;
    let (body, tail) = buf.split_at_mut(channels * lay.chan_len);
    tail.fill(0.0);
    for (c, dst_c) in body.chunks_exact_mut(lay.chan_len).enumerate() {
        let src_c = &input[(c0 + c) * plane..][..plane];
        for (ph, dst_p) in dst_c.chunks_exact_mut(lay.plane_len).enumerate() {
            let (rp, cp) = (ph / sw, ph % sw);
            let xa = g.pad_left.saturating_sub(cp).div_ceil(sw);
            let xb = (g.in_w + g.pad_left)
                .saturating_sub(cp)
                .div_ceil(sw)
                .min(lay.pitch);
            for (y, row) in dst_p.chunks_exact_mut(lay.pitch).enumerate() {
                let py = y * sh + rp;
                if py < g.pad_top || py - g.pad_top >= g.in_h || xa >= xb {
                    zero_short(row);
                    continue;
                }
                let src = &src_c[(py - g.pad_top) * g.in_w..][..g.in_w];
                zero_short(&mut row[..xa]);
                zero_short(&mut row[xb..]);
                // Input column of x' is x'*sw + cp - pad_left (>= 0 from xa on).
                let first = xa * sw + cp - g.pad_left;
                let len = xb - xa;
                match sw {
                    1 => copy_short(&mut row[xa..xb], &src[first..first + len]),
                    2 => copy_even(&mut row[xa..xb], &src[first..first + 2 * len - 1]),
                    _ => {
                        for (d, s) in row[xa..xb].iter_mut().zip(src[first..].iter().step_by(sw)) {
                            *d = *s;
                        }
                    }
                }
            }
        }
    }
    debug_assert_eq!(lay.rows * lay.pitch, lay.plane_len);
}

/// `offs[k]` = where row `k = (c, i, j)` of B starts, relative to the linear output index.
pub(in super::super) fn offsets(g: &ConvGeom, lay: &Pitched, channels: usize, offs: &mut Vec<u32>) {
    offs.clear();
    let (sh, sw) = (g.stride_h, g.stride_w);
    for c in 0..channels {
        for i in 0..g.kh {
            let py = i * g.dil_h;
            for j in 0..g.kw {
                let px = j * g.dil_w;
                let phase = (py % sh) * sw + px % sw;
                let off =
                    c * lay.chan_len + phase * lay.plane_len + (py / sh) * lay.pitch + px / sw;
                // `pays_off` or the caller's size check keeps the buffer below 2^32 floats.
                offs.push(off as u32);
            }
        }
    }
}

/// Kept lanes `from..from + len` of vector `v` of a tile go to columns `n..n + len`.
#[derive(Clone, Copy, Debug, Default, PartialEq, Eq)]
pub(in super::super) struct Piece {
    v: usize,
    from: usize,
    len: usize,
    n: usize,
}

/// Most pieces a tile can have: at most one per lane.
pub(in super::super) const MAX_PIECES: usize = 64;

/// The pieces of the tile whose `width` lanes are linear indices `t..t + width`, kept where
/// inside `lo..hi` and not a padding column, in lane order; one division per tile.
pub(in super::super) fn pieces(
    (t, width, lanes): (usize, usize, usize),
    (lo, hi): (usize, usize),
    (pitch, out_w): (usize, usize),
    out: &mut [Piece; MAX_PIECES],
) -> usize {
    let end = (t + width).min(hi);
    let mut j = t.max(lo);
    let (mut oy, mut ox) = (j / pitch, j % pitch);
    let mut count = 0;
    while j < end {
        if ox >= out_w {
            j += pitch - ox;
            oy += 1;
            ox = 0;
            continue;
        }
        // A run of kept lanes ends at the output row's end, the tile's end or the vector's.
        let at = j - t;
        let (v, from) = (at / lanes, at % lanes);
        let len = (out_w - ox).min(end - j).min(lanes - from);
        out[count] = Piece {
            v,
            from,
            len,
            n: oy * out_w + ox,
        };
        count += 1;
        j += len;
        ox += len;
    }
    count
}

/// Stores a `tile_gather` result through its [`pieces`] (worked out by the caller for a tile
/// of `NV` vectors), finishing each piece in registers.
///
/// # Safety
/// Every piece's `(m, n)` for rows `m0..m0 + rows` must be inside C, the residual and the
/// bias.
#[inline(always)]
pub(in super::super) unsafe fn store<S: Simd, const MR: usize, const NV: usize>(
    s: S,
    acc: &[[S::V; NV]; MR],
    out: &Out,
    (m0, rows): (usize, usize),
    list: &[Piece],
) {
    for (r, acc_r) in acc.iter().enumerate().take(rows) {
        for p in list {
            // SAFETY: a piece's columns are kept ones (caller); `p.v < NV` as the caller
            // worked the pieces out for a tile of NV vectors.
            unsafe { out.finish_lanes(s, m0 + r, p.n, acc_r[p.v], (p.from, p.len)) };
        }
    }
}
