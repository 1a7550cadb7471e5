//! Pooling, padding, concatenation, softmax and the other data-movement kernels of one sample.
//!
//! Each takes one sample's `[C, H, W]` (or flat) slice and writes one sample's output; the
//! caller loops over the batch, so every sample is computed alone and batch invariance holds.

use std::ops::Range;

use super::copy::load_pairs;
use super::simd::{Machine, Simd};

/// Checked geometry of a pooling window over one sample.
#[derive(Clone, Copy, Debug)]
pub struct PoolGeom {
    pub c: usize,
    pub in_h: usize,
    pub in_w: usize,
    pub out_h: usize,
    pub out_w: usize,
    pub kernel: [usize; 2],
    pub stride: [usize; 2],
    pub dilation: [usize; 2],
    /// Top, left, bottom, right.
    pub padding: [usize; 4],
}

/// Max pooling; padding never wins (it counts as −∞). 2×2 windows are vectorised on the
/// instruction set `machine` proves.
pub(crate) fn max_pool(machine: Machine, g: &PoolGeom, input: &[f32], output: &mut [f32]) {
    if g.kernel == [2, 2]
        && g.stride == [2, 2]
        && g.dilation == [1, 1]
        && g.padding == [0; 4]
        && 2 * g.out_h <= g.in_h
        && 2 * g.out_w <= g.in_w
    {
        return match machine {
            Machine::Scalar(s) => max_pool_2x2_inside(s, g, input, output),
            #[cfg(target_arch = "x86_64")]
            // SAFETY: the token proves the CPU runs the wrapper's target features.
            Machine::Avx2(s) => unsafe { max_pool_2x2_avx2(s, g, input, output) },
            #[cfg(target_arch = "x86_64")]
            // SAFETY: as above.
            Machine::Avx512(s) => unsafe { max_pool_2x2_avx512(s, g, input, output) },
            #[cfg(target_arch = "aarch64")]
            // SAFETY: as above.
            Machine::Neon(s) => unsafe { max_pool_2x2_neon(s, g, input, output) },
        };
    }
    max_pool_by_rows(g, input, output);
}

#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx2,fma")]
unsafe fn max_pool_2x2_avx2(s: super::simd::Avx2, g: &PoolGeom, x: &[f32], y: &mut [f32]) {
    max_pool_2x2_inside(s, g, x, y);
}

#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx512f,avx2,fma")]
unsafe fn max_pool_2x2_avx512(s: super::simd::Avx512, g: &PoolGeom, x: &[f32], y: &mut [f32]) {
    max_pool_2x2_inside(s, g, x, y);
}

#[cfg(target_arch = "aarch64")]
#[target_feature(enable = "neon")]
unsafe fn max_pool_2x2_neon(s: super::simd::Neon, g: &PoolGeom, x: &[f32], y: &mut [f32]) {
    max_pool_2x2_inside(s, g, x, y);
}

/// Any window, stride, dilation and padding, a whole output row at a time: for each tap
/// `(i, j)` in the window's row-major order, every output of the row folds in its tap, the
/// columns whose tap falls inside the input found once per tap instead of checked per output.
/// Each output thus folds the same taps in the same order as [`max_pool_general`] (the
/// definition), so the same bits. The input row is first dealt into `stride` phases (columns
/// `p, p + stride, …`; see [`in_phases`]), so each tap reads a contiguous run and the fold
/// vectorises.
fn max_pool_by_rows(g: &PoolGeom, input: &[f32], output: &mut [f32]) {
    let [sy, sx] = g.stride;
    let phase_len = g.in_w.div_ceil(sx);
    let mut phases = Vec::new();
    // Per tap column j: where its run starts (phase, index in the phase) and the outputs
    // `lo..hi` whose tap falls inside the input.
    let taps: Vec<(usize, usize, Range<usize>)> = (0..g.kernel[1])
        .filter_map(|j| {
            // Output column ox reads input column ox·sx + shift, inside for lo..hi.
            let shift = (j * g.dilation[1]) as isize - g.padding[1] as isize;
            let lo = if shift >= 0 {
                0
            } else {
                shift.unsigned_abs().div_ceil(sx)
            };
            let hi = (g.in_w as isize - shift).max(0) as usize;
            let hi = hi.div_ceil(sx).min(g.out_w);
            let first = ((lo * sx) as isize + shift) as usize;
            (lo < hi).then_some((first % sx, first / sx, lo..hi))
        })
        .collect();
    for c in 0..g.c {
        let plane = &input[c * g.in_h * g.in_w..][..g.in_h * g.in_w];
        let out = &mut output[c * g.out_h * g.out_w..][..g.out_h * g.out_w];
        for (oy, out_row) in out.chunks_exact_mut(g.out_w).enumerate() {
            out_row.fill(f32::NEG_INFINITY);
            for i in 0..g.kernel[0] {
                let Some(y) = (oy * sy + i * g.dilation[0]).checked_sub(g.padding[0]) else {
                    continue;
                };
                if y >= g.in_h {
                    continue;
                }
                let row = &plane[y * g.in_w..][..g.in_w];
                let phases = in_phases(row, sx, &mut phases);
                for (p, start, cols) in &taps {
                    let run = &phases[p * phase_len + start..][..cols.len()];
                    for (o, &v) in out_row[cols.clone()].iter_mut().zip(run) {
                        *o = keep_max(*o, v);
                    }
                }
            }
        }
    }
}

/// `row` dealt into `stride` phases, each `row.len().div_ceil(stride)` long, one after the
/// other: phase `p` holds columns `p, p + stride, …`. Stride 1 is the row itself; otherwise
/// the phases are written into `buf`. Stride 2, the common case, goes in pairs.
fn in_phases<'a>(row: &'a [f32], stride: usize, buf: &'a mut Vec<f32>) -> &'a [f32] {
    if stride == 1 {
        return row;
    }
    let phase_len = row.len().div_ceil(stride);
    buf.resize(stride * phase_len, 0.0);
    if stride == 2 {
        let (even, odd) = buf.split_at_mut(phase_len);
        let pairs = row.chunks_exact(2);
        if let [last] = pairs.remainder() {
            even[phase_len - 1] = *last;
        }
        for ((e, o), pair) in even.iter_mut().zip(odd.iter_mut()).zip(pairs) {
            *e = pair[0];
            *o = pair[1];
        }
    } else {
        for (p, phase) in buf.chunks_exact_mut(phase_len).enumerate() {
            for (d, &v) in phase.iter_mut().zip(row.iter().skip(p).step_by(stride)) {
                *d = v;
            }
        }
    }
    buf
}

/// Any window, stride, dilation and padding, one output at a time; taps outside the input
/// are skipped. The definition the faster paths are tested against.
#[cfg(test)]
fn max_pool_general(g: &PoolGeom, input: &[f32], output: &mut [f32]) {
    let (ih, iw) = (g.in_h as isize, g.in_w as isize);
    for c in 0..g.c {
        let plane = &input[c * g.in_h * g.in_w..][..g.in_h * g.in_w];
        let out = &mut output[c * g.out_h * g.out_w..][..g.out_h * g.out_w];
        for oy in 0..g.out_h {
            let y0 = (oy * g.stride[0]) as isize - g.padding[0] as isize;
            for ox in 0..g.out_w {
                let x0 = (ox * g.stride[1]) as isize - g.padding[1] as isize;
                let mut best = f32::NEG_INFINITY;
                for i in 0..g.kernel[0] {
                    let y = y0 + (i * g.dilation[0]) as isize;
                    if y < 0 || y >= ih {
                        continue;
                    }
                    let row = &plane[y as usize * g.in_w..][..g.in_w];
                    for j in 0..g.kernel[1] {
                        let x = x0 + (j * g.dilation[1]) as isize;
                        if x < 0 || x >= iw {
                            continue;
                        }
                        let v = row[x as usize];
                        // NaN propagates, as in PyTorch: a NaN input must not vanish.
                        if v > best || v.is_nan() {
                            best = v;
                        }
                    }
                }
                out[oy * g.out_w + ox] = best;
            }
        }
    }
}

/// The fold of [`max_pool`]: NaN wins (and stays), otherwise the larger value; on a tie the
/// earlier value stays (so -0.0 before +0.0 gives -0.0, as the general loop does).
#[inline(always)]
fn keep_max(best: f32, v: f32) -> f32 {
    if v > best || v.is_nan() { v } else { best }
}

/// 2×2 windows, stride 2, no padding, every window inside the input (the pooling of most small
/// CNNs), a vector of outputs at a time: the two input rows' column pairs unzipped into left
/// and right values, then folded in the general loop's tap order (top left, top right, bottom
/// left, bottom right), so the same bits as [`max_pool_general`]. A row's last outputs take
/// partial vectors (LeNet's rows are 14 and 7 outputs long).
#[inline(always)]
fn max_pool_2x2_inside<S: Simd>(s: S, g: &PoolGeom, input: &[f32], output: &mut [f32]) {
    let (w, ow, lanes) = (g.in_w, g.out_w, S::LANES);
    for c in 0..g.c {
        let plane = &input[c * g.in_h * w..][..g.in_h * w];
        let out = &mut output[c * g.out_h * ow..][..g.out_h * ow];
        for (oy, out_row) in out.chunks_exact_mut(ow).enumerate() {
            let top = &plane[2 * oy * w..][..2 * ow];
            let bottom = &plane[(2 * oy + 1) * w..][..2 * ow];
            for ((o, t), b) in out_row
                .chunks_mut(lanes)
                .zip(top.chunks(2 * lanes))
                .zip(bottom.chunks(2 * lanes))
            {
                let (t0, t1) = load_pairs(s, t);
                let (b0, b1) = load_pairs(s, b);
                let best = keep_max_v(s, keep_max_v(s, keep_max_v(s, t0, t1), b0), b1);
                // SAFETY: `o` holds `o.len() <= LANES` writable floats.
                unsafe { s.store_partial(o.as_mut_ptr(), best, o.len()) };
            }
        }
    }
}

/// [`keep_max`] on vectors: per lane, `v` if it is larger than `best` or NaN, else `best`.
#[inline(always)]
fn keep_max_v<S: Simd>(s: S, best: S::V, v: S::V) -> S::V {
    let larger = s.select_gt(v, best, v, best);
    // NaN is the one value that neither exceeds −∞ nor falls below +∞.
    let (low, high) = (s.splat(f32::NEG_INFINITY), s.splat(f32::INFINITY));
    s.select_gt(v, low, larger, s.select_gt(high, v, larger, v))
}

/// Average pooling. With `count_include_pad` the divisor counts padding cells inside the padded
/// input (but not cells past it that ceil mode adds); without, only real input cells — the
/// rule PyTorch's `AvgPool2d` documents.
pub fn avg_pool(g: &PoolGeom, count_include_pad: bool, input: &[f32], output: &mut [f32]) {
    let (ih, iw) = (g.in_h as isize, g.in_w as isize);
    let (pad_bottom, pad_right) = (g.padding[2] as isize, g.padding[3] as isize);
    for c in 0..g.c {
        let plane = &input[c * g.in_h * g.in_w..][..g.in_h * g.in_w];
        let out = &mut output[c * g.out_h * g.out_w..][..g.out_h * g.out_w];
        for oy in 0..g.out_h {
            let ys = (oy * g.stride[0]) as isize - g.padding[0] as isize;
            let ye_padded = (ys + g.kernel[0] as isize).min(ih + pad_bottom);
            let (y0, y1) = (ys.max(0), ye_padded.min(ih));
            for ox in 0..g.out_w {
                let xs = (ox * g.stride[1]) as isize - g.padding[1] as isize;
                let xe_padded = (xs + g.kernel[1] as isize).min(iw + pad_right);
                let (x0, x1) = (xs.max(0), xe_padded.min(iw));
                let mut sum = 0.0f32;
                for y in y0..y1 {
                    let row = &plane[y as usize * g.in_w..][..g.in_w];
                    for x in x0..x1 {
                        sum += row[x as usize];
                    }
                }
                let count = if count_include_pad {
                    (ye_padded - ys) * (xe_padded - xs)
                } else {
                    (y1 - y0).max(0) * (x1 - x0).max(0)
                };
                out[oy * g.out_w + ox] = if count > 0 { sum / count as f32 } else { 0.0 };
            }
        }
    }
}

/// Mean of each channel plane: `[C, H, W]` → `[C]`.
pub fn global_avg_pool(c: usize, plane: usize, input: &[f32], output: &mut [f32]) {
    for (ch, out) in output[..c].iter_mut().enumerate() {
        *out = lane_sum(&input[ch * plane..][..plane]) / plane as f32;
    }
}

/// Independent running sums in [`lane_sum`]: enough for the compiler to vectorise the loop
/// and hide the add latency (one running sum is a chain of dependent adds, a few floats per
/// nanosecond; squeeze-and-excitation blocks pool every expanded activation).
const SUM_LANES: usize = 16;

/// The sum of `xs`: lane `l` adds elements `l, l + 16, …` in order, the remainder goes to the
/// lanes in order, then the lanes are added pairwise in a fixed tree. The same bits on every
/// instruction set (each lane's adds are the code's own, vectorised or not), and no less
/// accurate than one running sum.
fn lane_sum(xs: &[f32]) -> f32 {
    let mut lanes = [0.0f32; SUM_LANES];
    let mut chunks = xs.chunks_exact(SUM_LANES);
    for chunk in &mut chunks {
        for (acc, &x) in lanes.iter_mut().zip(chunk) {
            *acc += x;
        }
    }
    for (acc, &x) in lanes.iter_mut().zip(chunks.remainder()) {
        *acc += x;
    }
    let mut width = SUM_LANES;
    while width > 1 {
        width /= 2;
        for l in 0..width {
            lanes[l] += lanes[l + width];
        }
    }
    lanes[0]
}

/// Softmax over the leading axis of a `[C, inner]` sample (inner = 1 for a flat vector),
/// stable against overflow by subtracting the maximum first.
pub fn softmax(c: usize, inner: usize, input: &[f32], output: &mut [f32]) {
    for p in 0..inner {
        let mut max = f32::NEG_INFINITY;
        for ch in 0..c {
            max = max.max(input[ch * inner + p]);
        }
        let mut sum = 0.0f32;
        for ch in 0..c {
            let e = (input[ch * inner + p] - max).exp();
            output[ch * inner + p] = e;
            sum += e;
        }
        let inv = 1.0 / sum;
        for ch in 0..c {
            output[ch * inner + p] *= inv;
        }
    }
}

/// Constant padding of a `[C, H, W]` sample by top, left, bottom, right, and by
/// `channels[0]` planes before and `channels[1]` after.
pub fn pad(
    [c, h, w]: [usize; 3],
    padding: [usize; 4],
    channels: [usize; 2],
    value: f32,
    input: &[f32],
    output: &mut [f32],
) {
    let (oh, ow) = (h + padding[0] + padding[2], w + padding[1] + padding[3]);
    output[..(c + channels[0] + channels[1]) * oh * ow].fill(value);
    for ch in 0..c {
        for y in 0..h {
            let src = &input[(ch * h + y) * w..][..w];
            let at = ((ch + channels[0]) * oh + y + padding[0]) * ow + padding[1];
            let dst = &mut output[at..][..w];
            dst.copy_from_slice(src);
        }
    }
}

/// `y = x · scale[c] + shift[c]` over a `[C, inner]` sample (batch normalisation folded to an
/// affine map).
pub fn channel_affine(
    scale: &[f32],
    shift: &[f32],
    inner: usize,
    input: &[f32],
    output: &mut [f32],
) {
    for (ch, (&s, &t)) in scale.iter().zip(shift).enumerate() {
        let src = &input[ch * inner..][..inner];
        let dst = &mut output[ch * inner..][..inner];
        for (d, &x) in dst.iter_mut().zip(src) {
            *d = x * s + t;
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::engine::kernels::isa::Isa;

    fn geom(h: usize, w: usize, k: usize, s: usize, p: usize, oh: usize, ow: usize) -> PoolGeom {
        PoolGeom {
            c: 1,
            in_h: h,
            in_w: w,
            out_h: oh,
            out_w: ow,
            kernel: [k, k],
            stride: [s, s],
            dilation: [1, 1],
            padding: [p, p, p, p],
        }
    }

    /// Global average pooling against a sum in f64: the error of any order of float
    /// additions is at most (n-1)·u·Σ|x| to first order, u = 2⁻²⁴ (Higham, "Accuracy and
    /// Stability of Numerical Algorithms", 2nd ed. 2002, §4.2); plus one rounding for the
    /// division. Lengths below, at and around the lane count, and a ResNet stem's 56×56.
    /// Exact on integers (1..=100 sums to 5050, Gauss's worked example).
    #[test]
    fn global_average_within_the_summation_bound() {
        let mut rng = crate::graph::build::SplitMix64::new(11);
        for plane in [1, 2, 7, 15, 16, 17, 31, 33, 49, 196, 3136] {
            let x = rng.vec(3 * plane, -4.0, 4.0);
            let mut out = [0.0f32; 3];
            global_avg_pool(3, plane, &x, &mut out);
            for (ch, &got) in out.iter().enumerate() {
                let xs = &x[ch * plane..][..plane];
                let exact: f64 = xs.iter().map(|&v| f64::from(v)).sum::<f64>() / plane as f64;
                let abs: f64 = xs.iter().map(|&v| f64::from(v).abs()).sum::<f64>() / plane as f64;
                let u = f64::from(f32::EPSILON) / 2.0;
                let bound =
                    (plane as f64) * u * abs + u * exact.abs() + f64::from(f32::MIN_POSITIVE);
                assert!(
                    (f64::from(got) - exact).abs() <= bound,
                    "plane {plane}: {got} vs {exact} (bound {bound})"
                );
            }
        }
        let ints: Vec<f32> = (1..=100).map(|v| v as f32).collect();
        let mut out = [0.0f32];
        global_avg_pool(1, 100, &ints, &mut out);
        assert_eq!(out[0], 50.5);
    }

    // Hand-worked 4x4 example (common practice: 2x2 max pooling keeps each block's maximum).
    #[test]
    fn max_pool_2x2() {
        let x: Vec<f32> = (0..16).map(|v| v as f32).collect();
        let mut y = vec![0.0; 4];
        for isa in Isa::supported() {
            max_pool(
                Machine::new_or_scalar(isa),
                &geom(4, 4, 2, 2, 0, 2, 2),
                &x,
                &mut y,
            );
            assert_eq!(y, [5.0, 7.0, 13.0, 15.0], "{isa}");
        }
    }

    // 3x3 average with padding 1 on a 2x2 input of ones: PyTorch's documented divisor rule
    // gives 4/9 with count_include_pad and 1 without.
    #[test]
    fn avg_pool_divisors() {
        let x = vec![1.0f32; 4];
        let mut y = vec![0.0; 4];
        avg_pool(&geom(2, 2, 3, 1, 1, 2, 2), true, &x, &mut y);
        assert!(y.iter().all(|&v| (v - 4.0 / 9.0).abs() < 1e-7));
        avg_pool(&geom(2, 2, 3, 1, 1, 2, 2), false, &x, &mut y);
        assert!(y.iter().all(|&v| (v - 1.0).abs() < 1e-7));
    }

    // The 2×2 fast path gives the general loop's bits on every instruction set, NaN (with
    // distinct payloads) and signed zeros included, on odd sizes too (the last row and column
    // are left out, as floor mode does) and on rows of whole, partial and several vectors.
    #[test]
    fn max_pool_2x2_fast_path_matches_the_general_loop() {
        let specials = [
            f32::NAN,
            -0.0,
            0.0,
            f32::NEG_INFINITY,
            f32::INFINITY,
            f32::from_bits(0x7fc0_0001),
            -f32::NAN,
        ];
        let bits = |v: &[f32]| v.iter().map(|f| f.to_bits()).collect::<Vec<_>>();
        for (c, h, w) in [(3, 7, 9), (2, 28, 28), (2, 5, 32), (1, 4, 67)] {
            let x: Vec<f32> = (0..c * h * w)
                .map(|i| match (i * 7) % 23 {
                    k @ 0..=6 => specials[k],
                    _ => ((i * 37) % 17) as f32 - 8.0,
                })
                .collect();
            let g = PoolGeom {
                c,
                ..geom(h, w, 2, 2, 0, h / 2, w / 2)
            };
            let len = c * (h / 2) * (w / 2);
            let mut general = vec![0.0; len];
            max_pool_general(&g, &x, &mut general);
            assert!(general.iter().any(|v| v.is_nan()));
            assert!(general.iter().any(|v| v.to_bits() == (-0.0f32).to_bits()));
            for isa in Isa::supported() {
                let mut fast = vec![0.0; len];
                max_pool(Machine::new_or_scalar(isa), &g, &x, &mut fast);
                assert_eq!(bits(&fast), bits(&general), "{isa} {c}x{h}x{w}");
            }
        }
    }

    // The row-at-a-time path gives the general loop's bits for windows, strides, dilations and
    // paddings of every kind (ceil mode's extra partial windows included), NaN and signed
    // zeros too.
    #[test]
    fn max_pool_by_rows_matches_the_general_loop() {
        let specials = [f32::NAN, -0.0, 0.0, f32::NEG_INFINITY, f32::INFINITY];
        let bits = |v: &[f32]| v.iter().map(|f| f.to_bits()).collect::<Vec<_>>();
        let mut checked = 0;
        for (h, w) in [(1, 1), (5, 7), (12, 9), (16, 16)] {
            for k in 1..=4 {
                for s in 1..=3 {
                    for d in 1..=2 {
                        for p in 0..k.min(3) {
                            let span = d * (k - 1) + 1;
                            if h + 2 * p < span || w + 2 * p < span {
                                continue;
                            }
                            // Ceil mode: one more output where the last window starts inside.
                            let out = |n: usize| (n + 2 * p - span).div_ceil(s) + 1;
                            let g = PoolGeom {
                                c: 2,
                                kernel: [k, k],
                                stride: [s, s],
                                dilation: [d, d],
                                ..geom(h, w, k, s, p, out(h), out(w))
                            };
                            let x: Vec<f32> = (0..2 * h * w)
                                .map(|i| match (i * 7) % 23 {
                                    r @ 0..=4 => specials[r],
                                    r => r as f32 - 12.0,
                                })
                                .collect();
                            let n = 2 * g.out_h * g.out_w;
                            let (mut rows, mut general) = (vec![1.0; n], vec![2.0; n]);
                            max_pool_by_rows(&g, &x, &mut rows);
                            max_pool_general(&g, &x, &mut general);
                            assert_eq!(bits(&rows), bits(&general), "{h}x{w} k{k} s{s} d{d} p{p}");
                            checked += 1;
                        }
                    }
                }
            }
        }
        assert!(checked > 100, "{checked} geometries");
    }

    #[test]
    fn softmax_is_stable_and_normalised() {
        let x = [1000.0f32, 1001.0, 1002.0];
        let mut y = [0.0; 3];
        softmax(3, 1, &x, &mut y);
        // softmax([0,1,2]) = e^k / (1 + e + e^2): 0.0900, 0.2447, 0.6652 (closed form).
        let e = std::f32::consts::E;
        let z = 1.0 + e + e * e;
        for (got, want) in y.iter().zip([1.0 / z, e / z, e * e / z]) {
            assert!((got - want).abs() < 1e-6);
        }
    }
}
