//! The rows layout of the direct route, for instruction sets with cheap masked loads: each
//! channel copied once, unchanged, between rows of zeros.
//!
//! It serves stride-1 convolutions whose output rows are as wide as the input's (3x3 "same"
//! and the like). Row `r` of a channel holds input row `r - pad_top` (zeros outside), rows
//! `out_w` floats apart with no padding columns, so output `n = oy*out_w + ox` is its own
//! linear index and tap `(c, i, j)` reads element `n + off[k]`. Where a tap reaches past the
//! left or right edge, that element is the end of the neighbouring row: the microkernel
//! ([`super::super::kernel::tile_masked`]) loads those lanes as +0.0 through per-tile masks
//! ([`masks`]), the padding value the other layouts store. Compared with the planes layout
//! (one copy per kernel column) and the pitched one (a padding column computed per row, stores
//! split at row ends), the copy is one `memcpy` per channel, no column is wasted and tiles
//! store straight into C.

use super::super::ConvGeom;
use super::LINE;

/// The rows layout (see the module documentation).
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub(in super::super) struct Rows {
    /// Zeros before the first channel, so that a tap left of the first column (offset down to
    /// `-pad_left`) still has a non-negative offset; whole cache lines, so that channels
    /// start on one (the buffer does).
    lead: usize,
    /// Rows per channel: every row an output reads, the first being input row `-pad_top`.
    rows: usize,
    /// Floats per channel: `rows * out_w`, rounded up to whole cache lines.
    chan_len: usize,
    /// Zeros after the last channel: the last tile's vectors run up to 64 floats past the
    /// last output, shifted by the rightmost tap.
    tail: usize,
}

/// Kernel columns the per-tile mask table holds (4 vectors each, see [`MASKS`]).
const MAX_KW: usize = 16;

/// Entries of the per-tile mask table: one per kernel column and vector of a tile.
pub(in super::super) const MASKS: usize = MAX_KW * 4;

impl Rows {
    /// The layout, if the geometry suits it: stride 1 both ways, outputs as wide as the
    /// input (so a row's outputs are consecutive in the input), at most [`MAX_KW`] kernel
    /// columns.
    pub(in super::super) fn new(g: &ConvGeom) -> Option<Rows> {
        if g.stride_h != 1 || g.stride_w != 1 || g.out_w != g.in_w || g.kw > MAX_KW {
            return None;
        }
        let rows = g.out_h + (g.kh.max(1) - 1) * g.dil_h;
        Some(Rows {
            lead: g.pad_left.next_multiple_of(LINE),
            rows,
            chan_len: (rows * g.out_w).next_multiple_of(LINE),
            tail: 64 + (g.kw.max(1) - 1) * g.dil_w,
        })
    }

    /// Floats of buffer for `channels` channels.
    pub(in super::super) fn buffer_len(&self, channels: usize) -> usize {
        self.lead + channels * self.chan_len + self.tail
    }

    /// Whether the masked load reads lane `n` of row `k = (c, i, j)`: the tap's input
    /// column is inside the row.
    #[cfg(test)]
    pub(in super::super) fn reads(g: &ConvGeom, k: usize, n: usize) -> bool {
        let j = k % g.kw;
        let x = (n % g.out_w + j * g.dil_w) as isize - g.pad_left as isize;
        (0..g.in_w as isize).contains(&x)
    }
}

/// Copies channels `c0..c0 + channels` of `input` (`[in_c_total, in_h, in_w]`) into `buf` in
/// the layout, zeros included.
#[inline(always)] // compiled inside each instruction set's wrapper, for its wider moves
pub(in super::super) fn prepare(
    input: &[f32],
    g: &ConvGeom,
    c0: usize,
    channels: usize,
    lay: &Rows,
    buf: &mut [f32],
) {
    let plane = g.in_h * g.in_w;
    let (lead, rest) = buf.split_at_mut(lay.lead);
    lead.fill(0.0);
    let (body, tail) = rest.split_at_mut(channels * lay.chan_len);
    tail.fill(0.0);
    let w = g.out_w;
    // Stored rows 0..top are above the input, top..top + mid are its rows, the rest below.
    let top = g.pad_top.min(lay.rows);
    let mid = g.in_h.min(lay.rows - top);
    for (c, dst) in body.chunks_exact_mut(lay.chan_len).enumerate() {
        let src = &input[(c0 + c) * plane..][..mid * w];
        let (above, dst) = dst.split_at_mut(top * w);
        let (inside, below) = dst.split_at_mut(mid * w);
        above.fill(0.0);
        // `out_w == in_w`: the channel's rows are one contiguous run in both.
        inside.copy_from_slice(src);
        below.fill(0.0);
    }
}

/// `offs[k]` = where row `k = (c, i, j)` of B starts, relative to the output column.
pub(in super::super) fn offsets(g: &ConvGeom, lay: &Rows, channels: usize, offs: &mut Vec<u32>) {
    offs.clear();
    for c in 0..channels {
        for i in 0..g.kh {
            for j in 0..g.kw {
                // `lead >= pad_left` keeps this non-negative.
                let off =
                    lay.lead + c * lay.chan_len + i * g.dil_h * g.out_w + j * g.dil_w - g.pad_left;
                // The caller's size check keeps the buffer below 2^32 floats.
                offs.push(off as u32);
            }
        }
    }
}

/// Fills `masks[j*nv + v]`: bit `l` set where lane `l` of vector `v` of the tile starting at
/// output `t` reads inside its row for kernel column `j` (see [`Rows::reads`]). Works per run
/// of lanes in one output row (one to three per vector at the usual widths), not per lane:
/// done per tile, a per-lane loop cost a tenth of a 16-channel layer's time.
pub(in super::super) fn masks(
    g: &ConvGeom,
    (t, nv, lanes): (usize, usize, usize),
    masks: &mut [u32; MASKS],
) {
    let w = g.out_w;
    /// Bits `lo..hi` (empty when `hi <= lo`); `hi <= 16`.
    fn bits(lo: usize, hi: usize) -> u32 {
        if hi > lo {
            (1u32 << hi) - (1u32 << lo)
        } else {
            0
        }
    }
    masks[..g.kw * nv].fill(0);
    for v in 0..nv {
        let mut l = 0;
        let mut ox = (t + v * lanes) % w;
        while l < lanes {
            // Lanes l..l + len are output columns ox..ox + len of one row.
            let len = (w - ox).min(lanes - l);
            for j in 0..g.kw {
                // Columns whose tap `j` is inside the input: `ox + j*dil_w - pad_left` in
                // `0..in_w`, i.e. `lo..hi`.
                let shift = j * g.dil_w;
                let lo = g.pad_left.saturating_sub(shift);
                let hi = (g.in_w + g.pad_left).saturating_sub(shift);
                let (a, b) = (lo.max(ox), hi.min(ox + len));
                if a < b {
                    masks[j * nv + v] |= bits(l + a - ox, l + b - ox);
                }
            }
            l += len;
            ox = 0;
        }
    }
}
