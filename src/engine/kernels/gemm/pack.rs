//! Packing: weights into row panels once at plan time, the B operand into column panels per
//! call. The im2col packing IS the im2col: no unfolded copy of the input ever exists.
//!
//! All of this is safe Rust with bounds-checked slices; the kernels then read the packed
//! buffers, whose sizes this module fixes, through raw pointers.

use super::super::copy::{copy_even, copy_short, zero_short};
use super::{BSource, ConvGeom};

/// Copies row-major `a` (`m x k`) into panels of `mr` rows: panel `p` holds, for each `k`, the
/// `mr` values `a[p*mr + r][k]` contiguously (zero for rows past `m`), followed by `pad` zeros so
/// kernels may read a little past the last panel.
pub(super) fn pack_a(a: &[f32], m: usize, k: usize, mr: usize, pad: usize) -> Vec<f32> {
    let panels = m.div_ceil(mr);
    let mut out = vec![0.0f32; panels * k * mr + pad];
    for p in 0..panels {
        let dst = &mut out[p * k * mr..(p + 1) * k * mr];
        for r in 0..mr.min(m - p * mr) {
            let row = &a[(p * mr + r) * k..][..k];
            for (kk, &v) in row.iter().enumerate() {
                dst[kk * mr + r] = v;
            }
        }
    }
    out
}

/// Rows of packed B a transposed source fills at a time.
const T_BLOCK: usize = 32;

/// Writes `dst[kk*width + j] = B[kk][n0 + j]` for `kk < k`, `j < cols`, and zero for
/// `cols <= j < width`. `dst.len() == k * width`.
#[inline(always)] // compiled inside each instruction set's wrapper, for its wider moves
pub(super) fn pack_b(
    b: &BSource<'_>,
    k: usize,
    n0: usize,
    cols: usize,
    width: usize,
    ops: &mut Vec<Op>,
    dst: &mut [f32],
) {
    debug_assert_eq!(dst.len(), k * width);
    debug_assert!(cols <= width);
    match *b {
        BSource::Matrix { data, ld } => {
            for (kk, row) in dst.chunks_exact_mut(width).enumerate() {
                copy_short(&mut row[..cols], &data[kk * ld + n0..][..cols]);
                zero_short(&mut row[cols..]);
            }
        }
        BSource::MatrixT { data, ld } => {
            if cols < width {
                for row in dst.chunks_exact_mut(width) {
                    row[cols..].fill(0.0);
                }
            }
            // A transpose, in blocks of `T_BLOCK` rows of `dst` (a few KiB, in L1 as every
            // column visits them): column by column down all `k` rows would touch every
            // line of `dst` once per column.
            for (block, rows) in dst.chunks_mut(T_BLOCK * width).enumerate() {
                let k0 = block * T_BLOCK;
                for j in 0..cols {
                    let src = &data[(n0 + j) * ld + k0..][..rows.len() / width];
                    for (row, &v) in rows.chunks_exact_mut(width).zip(src) {
                        row[j] = v;
                    }
                }
            }
        }
        BSource::Im2col { input, geom, c0 } => {
            pack_im2col(input, &geom, c0, k, n0, (cols, width), ops, dst)
        }
    }
}

/// One step of an im2col packing program: fill `len` floats at column `at` of tap row `row`
/// (`i*kw + j` within a channel) with zeros, or from the channel's input plane starting at
/// `src`, every `step` floats.
#[derive(Clone, Copy, Debug)]
pub(super) struct Op {
    pub(super) row: usize,
    pub(super) at: usize,
    pub(super) len: usize,
    src: usize,
    step: usize,
}

/// `step` of a zero fill.
const ZERO: usize = 0;

/// Im2col packing; rows `kk = (c, i, j)` channel-major, then kernel row, then kernel column.
///
/// Which panel columns are padding, and where the others come from within a channel's plane,
/// is the same for every channel: it is compiled once per panel into `ops` (a few runs per tap
/// row, each within one output row), then replayed per channel. Runs are often shorter than
/// 64 floats, so the per-run cost matters as much as the copying.
#[allow(clippy::too_many_arguments)] // one call site; a struct would only rename the list
#[inline(always)]
fn pack_im2col(
    input: &[f32],
    g: &ConvGeom,
    c0: usize,
    k: usize,
    n0: usize,
    (cols, width): (usize, usize),
    ops: &mut Vec<Op>,
    dst: &mut [f32],
) {
    compile_im2col(g, n0, cols, width, ops);
    let taps = g.kh * g.kw;
    let plane_len = g.in_h * g.in_w;
    for (c, rows) in dst
        .chunks_exact_mut(taps * width)
        .take(k / taps)
        .enumerate()
    {
        let plane = &input[(c0 + c) * plane_len..][..plane_len];
        for op in ops.iter() {
            let d = &mut rows[op.row * width + op.at..][..op.len];
            match op.step {
                ZERO => zero_short(d),
                1 => copy_short(d, &plane[op.src..op.src + op.len]),
                2 => copy_even(d, &plane[op.src..op.src + 2 * op.len - 1]),
                step => {
                    let src = &plane[op.src..op.src + (op.len - 1) * step + 1];
                    for (x, y) in d.iter_mut().zip(src.iter().step_by(step)) {
                        *x = *y;
                    }
                }
            }
        }
    }
}

/// Builds the packing program of one panel (columns `n0..n0+cols`, row width `width`).
pub(super) fn compile_im2col(
    g: &ConvGeom,
    n0: usize,
    cols: usize,
    width: usize,
    ops: &mut Vec<Op>,
) {
    ops.clear();
    let mut push = |op: Op| {
        if op.len == 0 {
            return;
        }
        // Adjacent zero runs of one row merge (a run's right border and the next one's left).
        let merges = ops.last().is_some_and(|last| {
            op.step == ZERO
                && last.step == ZERO
                && last.row == op.row
                && last.at + last.len == op.at
        });
        match ops.last_mut() {
            Some(last) if merges => last.len += op.len,
            _ => ops.push(op),
        }
    };
    let sw = g.stride_w as isize;
    for i in 0..g.kh {
        for j in 0..g.kw {
            let row = i * g.kw + j;
            // Input column of output column ox is ox*stride_w + off_x; valid ox: [ox_lo, ox_hi).
            let off_x = (j * g.dil_w) as isize - g.pad_left as isize;
            let ox_lo = if off_x >= 0 {
                0
            } else {
                ((-off_x + sw - 1) / sw) as usize
            };
            let last = g.in_w as isize - 1 - off_x;
            let ox_hi = if last < 0 {
                0
            } else {
                (last / sw + 1) as usize
            };
            let (mut oy, mut ox) = (n0 / g.out_w, n0 % g.out_w);
            let mut at = 0;
            while at < cols {
                let len = (g.out_w - ox).min(cols - at);
                let iy = (oy * g.stride_h + i * g.dil_h) as isize - g.pad_top as isize;
                let zero = |at, len| Op {
                    row,
                    at,
                    len,
                    src: 0,
                    step: ZERO,
                };
                if iy < 0 || iy >= g.in_h as isize {
                    push(zero(at, len));
                } else {
                    let end = ox + len;
                    let lo = ox_lo.clamp(ox, end);
                    let hi = ox_hi.clamp(lo, end);
                    push(zero(at, lo - ox));
                    if hi > lo {
                        push(Op {
                            row,
                            at: at + lo - ox,
                            len: hi - lo,
                            src: iy as usize * g.in_w + (lo as isize * sw + off_x) as usize,
                            step: g.stride_w,
                        });
                    }
                    push(zero(at + hi - ox, end - hi));
                }
                at += len;
                oy += 1;
                ox = 0;
            }
            push(Op {
                row,
                at: cols,
                len: width - cols,
                src: 0,
                step: ZERO,
            });
        }
    }
}
