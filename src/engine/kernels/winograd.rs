//! Winograd's minimal filtering F(4×4, 3×3) for 3×3 convolutions of stride 1 and dilation 1
//! (Lavin & Gray, "Fast Algorithms for Convolutional Neural Networks", CVPR 2016, section 4;
//! the transform matrices `Bᵀ`, `G` and `Aᵀ` below are the paper's F(4×4, 3×3) ones, built on
//! the points 0, ±1, ±2 and ∞).
//!
//! The output plane is cut into 4×4 tiles; each reads a 6×6 patch of the input. Per tile:
//! `Y = Aᵀ [ Σ_c (G g_{m,c} Gᵀ) ⊙ (Bᵀ d_c B) ] A`. The weight transforms `U = G g Gᵀ` are made
//! once, at plan time, and packed as 36 matrices of `out_c × in_c` (one per position ξ of the
//! 6×6 transformed tile), so the sum over input channels becomes 36 ordinary GEMMs
//! (`M_ξ = U_ξ · V_ξ`, one column per tile) run by [`super::gemm`]. That is 36 multiply-adds per
//! tile and channel pair instead of 144: four times fewer, bought with the two transforms
//! (about 11 additions and multiplications per input and per output value, spread over the
//! channels) and four times the weights' memory for the layers that take this route.
//!
//! Each block of tiles: transform the inputs into `V` (`[ξ][c][tile]`), run the 36 GEMMs into
//! `M` (`[ξ][m][tile]`), transform `M` back into 4×4 outputs, then add bias and residual;
//! the activation follows over the band's rows. Eight tiles go through the transforms
//! together, one per lane, so the arithmetic vectorises.
//!
//! Numerics: the transforms are plain `f32` additions and multiplications (Rust never fuses
//! them), in a fixed order per tile, and every GEMM column is computed the same way whatever
//! the block (see `gemm`): an output's bits depend neither on the batch, nor on how the plane
//! is split over threads, nor on the SIMD width. They differ from the direct convolution's by
//! rounding: the transforms scale values by up to 8 (`Aᵀ`'s largest entry) and `G`'s entries
//! 1/6, 1/12 and 1/24 are inexact in binary, so the error grows with the channel count
//! roughly as a direct sum's does, several times larger. The tests bound it against a
//! double-precision direct convolution.

use std::fmt;

use super::aligned::AlignedBuf;
use super::gemm::{BSource, Band, ConvGeom, Epilogue, GemmScratch, PackedWeights, gemm};
use super::isa::Isa;
use super::simd::Machine;
use super::vmath;

/// Output tile side (`m` of F(m×m, 3×3)).
pub const TILE: usize = 4;
/// Input patch side: `m + 3 - 1`.
const PATCH: usize = 6;
/// Positions of a transformed tile: one GEMM each.
const XI: usize = PATCH * PATCH;
/// Tiles transformed together, one per lane.
const LANES: usize = 8;
/// Blocks hold a multiple of this many tiles: whole cache lines, so that each position's
/// GEMM reads its B rows from line starts (the scratch starts on one).
const BLOCK_STEP: usize = 16;
/// Floats of `V` and `M` one block of tiles may hold (1 MiB: the transformed block and the
/// GEMM's working set share a core's L2 of 1–2 MiB on current x86 server parts).
const BLOCK_FLOATS: usize = 256 * 1024;

/// `G` (6×3) of F(4×4, 3×3): `U = G g Gᵀ` (Lavin & Gray 2016).
const G: [[f64; 3]; PATCH] = [
    [1.0 / 4.0, 0.0, 0.0],
    [-1.0 / 6.0, -1.0 / 6.0, -1.0 / 6.0],
    [-1.0 / 6.0, 1.0 / 6.0, -1.0 / 6.0],
    [1.0 / 24.0, 1.0 / 12.0, 1.0 / 6.0],
    [1.0 / 24.0, -1.0 / 12.0, 1.0 / 6.0],
    [0.0, 0.0, 1.0],
];

/// Whether a convolution can take this route: 3×3 kernel, stride 1, dilation 1, one group.
pub fn fits(geom: &ConvGeom, groups: usize) -> bool {
    groups == 1
        && (geom.kh, geom.kw) == (3, 3)
        && (geom.stride_h, geom.stride_w) == (1, 1)
        && (geom.dil_h, geom.dil_w) == (1, 1)
}

/// A 3×3 convolution's weights, transformed and packed for one instruction set.
pub struct WinogradWeights {
    machine: Machine,
    out_c: usize,
    in_c: usize,
    /// `U_ξ`, `out_c × in_c`, for ξ = 6·row + column of the transformed tile.
    u: Vec<PackedWeights>,
}

impl fmt::Debug for WinogradWeights {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.debug_struct("WinogradWeights")
            .field("isa", &self.machine.isa())
            .field("out_c", &self.out_c)
            .field("in_c", &self.in_c)
            .finish_non_exhaustive()
    }
}

impl WinogradWeights {
    /// Transforms `weight` (`[out_c][in_c][3][3]`) in double precision, rounds once to `f32`
    /// and packs the 36 matrices for `isa`.
    ///
    /// # Panics
    /// If `weight.len() != out_c * in_c * 9` (the caller validates shapes).
    pub fn pack(isa: Isa, weight: &[f32], out_c: usize, in_c: usize) -> WinogradWeights {
        assert_eq!(
            weight.len(),
            out_c * in_c * 9,
            "weights are not {out_c}x{in_c}x3x3"
        );
        let mut u = vec![vec![0.0f32; out_c * in_c]; XI];
        for (mc, g) in weight.chunks_exact(9).enumerate() {
            // G g Gᵀ: first G g (6×3), then (G g) Gᵀ (6×6).
            let mut gg = [[0.0f64; 3]; PATCH];
            for (r, row) in gg.iter_mut().enumerate() {
                for (j, v) in row.iter_mut().enumerate() {
                    *v = (0..3).map(|i| G[r][i] * f64::from(g[i * 3 + j])).sum();
                }
            }
            for r in 0..PATCH {
                for s in 0..PATCH {
                    let v: f64 = (0..3).map(|j| gg[r][j] * G[s][j]).sum();
                    u[r * PATCH + s][mc] = v as f32;
                }
            }
        }
        WinogradWeights {
            machine: Machine::new_or_scalar(isa),
            out_c,
            in_c,
            u: u.iter()
                .map(|m| PackedWeights::pack(isa, m, out_c, in_c))
                .collect(),
        }
    }

    pub fn isa(&self) -> Isa {
        self.machine.isa()
    }
}

/// One sample's 3×3 convolution into `c`, a band of its `[out_c, out_h·out_w]` output whose
/// columns start and end at whole rows of tiles (multiples of `4·out_w`, or the plane's end).
/// `buf` is the caller's scratch for the transformed tiles; `epi.residual` has the whole
/// output's layout.
///
/// # Panics
/// If the band does not cover whole rows of tiles, or the operands are too short for `geom`.
pub fn conv_band(
    w: &WinogradWeights,
    geom: &ConvGeom,
    input: &[f32],
    mut c: Band<'_>,
    epi: &Epilogue<'_>,
    (buf, scratch): (&mut AlignedBuf, &mut GemmScratch),
) {
    let (in_c, out_c) = (w.in_c, w.out_c);
    let (out_h, out_w) = (geom.out_h, geom.out_w);
    let cols = c.cols();
    let tile_row = TILE * out_w;
    assert!(
        cols.start.is_multiple_of(tile_row)
            && (cols.end.is_multiple_of(tile_row) || cols.end == out_h * out_w),
        "band {cols:?} does not cover whole rows of tiles"
    );
    assert_eq!(geom.in_c, in_c, "input channels");
    assert!(
        input.len() >= in_c * geom.in_h * geom.in_w,
        "input too short"
    );
    let tiles_w = out_w.div_ceil(TILE);
    let first_tile = cols.start / tile_row * tiles_w;
    let tiles = cols.end.div_ceil(tile_row) * tiles_w - first_tile;
    let block = (BLOCK_FLOATS / (XI * (in_c + out_c)) / BLOCK_STEP * BLOCK_STEP)
        .max(BLOCK_STEP)
        .min(tiles.next_multiple_of(BLOCK_STEP));
    let (v_len, m_len) = (XI * in_c * block, XI * out_c * block);
    let (v, m) = buf.get(v_len + m_len).split_at_mut(v_len);
    let no_epilogue = Epilogue::default();
    let mut b0 = 0;
    while b0 < tiles {
        let tb = block.min(tiles - b0);
        let at = Tiles {
            geom,
            tiles_w,
            first: first_tile + b0,
            count: tb,
            ld: block,
        };
        transform_inputs(w.machine, &at, input, in_c, v);
        for xi in 0..XI {
            gemm(
                &w.u[xi],
                &BSource::Matrix {
                    data: &v[xi * block..],
                    ld: XI * block,
                },
                tb,
                0..tb,
                &mut m[xi * block..],
                XI * block,
                &no_epilogue,
                scratch,
            );
        }
        transform_outputs(w.machine, &at, m, out_c, epi, &mut c);
        b0 += tb;
    }
    if epi.act != Default::default() {
        for row in 0..out_c {
            vmath::apply_on(w.machine, epi.act, c.row(row));
        }
    }
}

/// Every input channel of the block's tiles into `v`, compiled for AVX2 where the CPU has it
/// (wider lanes, the same operations in the same order: the same bits).
fn transform_inputs(machine: Machine, at: &Tiles<'_>, input: &[f32], in_c: usize, v: &mut [f32]) {
    #[inline(always)]
    fn all(at: &Tiles<'_>, input: &[f32], in_c: usize, v: &mut [f32]) {
        for ch in 0..in_c {
            for g0 in (0..at.count).step_by(LANES) {
                at.transform_input(input, ch, g0, v);
            }
        }
    }
    #[cfg(target_arch = "x86_64")]
    #[target_feature(enable = "avx2")]
    fn all_avx2(at: &Tiles<'_>, input: &[f32], in_c: usize, v: &mut [f32]) {
        all(at, input, in_c, v);
    }
    match machine {
        #[cfg(target_arch = "x86_64")]
        // SAFETY: the token proves the CPU runs AVX2.
        Machine::Avx2(_) | Machine::Avx512(_) => unsafe { all_avx2(at, input, in_c, v) },
        _ => all(at, input, in_c, v),
    }
}

/// Every output channel of the block's tiles from `m` into the band `c`, with bias and
/// residual; compiled as [`transform_inputs`] is.
fn transform_outputs(
    machine: Machine,
    at: &Tiles<'_>,
    m: &[f32],
    out_c: usize,
    epi: &Epilogue<'_>,
    c: &mut Band<'_>,
) {
    #[inline(always)]
    fn all(at: &Tiles<'_>, m: &[f32], out_c: usize, epi: &Epilogue<'_>, c: &mut Band<'_>) {
        let col0 = c.cols().start;
        for row in 0..out_c {
            let out = c.row(row);
            for g0 in (0..at.count).step_by(LANES) {
                at.transform_output(m, row, g0, epi, col0, out);
            }
        }
    }
    #[cfg(target_arch = "x86_64")]
    #[target_feature(enable = "avx2")]
    fn all_avx2(at: &Tiles<'_>, m: &[f32], out_c: usize, epi: &Epilogue<'_>, c: &mut Band<'_>) {
        all(at, m, out_c, epi, c);
    }
    match machine {
        #[cfg(target_arch = "x86_64")]
        // SAFETY: the token proves the CPU runs AVX2.
        Machine::Avx2(_) | Machine::Avx512(_) => unsafe { all_avx2(at, m, out_c, epi, c) },
        _ => all(at, m, out_c, epi, c),
    }
}

/// One block of tiles: `count` tiles from tile `first` (numbered row by row over the plane),
/// stored `ld` apart per channel in `V` and `M`.
struct Tiles<'g> {
    geom: &'g ConvGeom,
    tiles_w: usize,
    first: usize,
    count: usize,
    ld: usize,
}

type Lanes = [f32; LANES];

impl Tiles<'_> {
    /// Top-left output position of the block's tile `t`.
    #[inline(always)]
    fn origin(&self, t: usize) -> (usize, usize) {
        let tile = self.first + t;
        (tile / self.tiles_w * TILE, tile % self.tiles_w * TILE)
    }

    /// `Bᵀ d B` of channel `ch` for tiles `g0..g0 + LANES` of the block (zeros past its end),
    /// into `v[ch][ξ][g0..]`.
    #[inline(always)]
    fn transform_input(&self, input: &[f32], ch: usize, g0: usize, v: &mut [f32]) {
        let g = self.geom;
        let plane = &input[ch * g.in_h * g.in_w..][..g.in_h * g.in_w];
        let mut d = [[[0.0f32; LANES]; PATCH]; PATCH];
        for lane in 0..LANES.min(self.count - g0) {
            let (oy, ox) = self.origin(g0 + lane);
            // Patch row i, column j reads input (oy + i - pad_top, ox + j - pad_left).
            let y0 = oy as isize - g.pad_top as isize;
            let x0 = ox as isize - g.pad_left as isize;
            let inside = y0 >= 0
                && x0 >= 0
                && y0 as usize + PATCH <= g.in_h
                && x0 as usize + PATCH <= g.in_w;
            if inside {
                let (y0, x0) = (y0 as usize, x0 as usize);
                for (i, row) in d.iter_mut().enumerate() {
                    let src = &plane[(y0 + i) * g.in_w + x0..][..PATCH];
                    for (j, &x) in src.iter().enumerate() {
                        row[j][lane] = x;
                    }
                }
            } else {
                for (i, row) in d.iter_mut().enumerate() {
                    let y = y0 + i as isize;
                    if y < 0 || y as usize >= g.in_h {
                        continue;
                    }
                    for (j, cell) in row.iter_mut().enumerate() {
                        let x = x0 + j as isize;
                        if x >= 0 && (x as usize) < g.in_w {
                            cell[lane] = plane[y as usize * g.in_w + x as usize];
                        }
                    }
                }
            }
        }
        // Bᵀ on the columns, then on the rows: t = Bᵀ d, then v = t B.
        let mut t = [[[0.0f32; LANES]; PATCH]; PATCH];
        for j in 0..PATCH {
            let mut col = [[0.0f32; LANES]; PATCH];
            for (c, drow) in col.iter_mut().zip(&d) {
                *c = drow[j];
            }
            for (r, x) in bt(col).into_iter().enumerate() {
                t[r][j] = x;
            }
        }
        for (r, row) in t.iter().enumerate() {
            for (s, x) in bt(*row).into_iter().enumerate() {
                let at = (ch * XI + r * PATCH + s) * self.ld + g0;
                v[at..at + LANES].copy_from_slice(&x);
            }
        }
    }

    /// `Aᵀ M A` of output channel `row` for tiles `g0..` of the block, plus bias and residual,
    /// written to that channel's row `out` of the band (which starts at column `col0`).
    #[allow(clippy::too_many_arguments)]
    #[inline(always)]
    fn transform_output(
        &self,
        m: &[f32],
        row: usize,
        g0: usize,
        epi: &Epilogue<'_>,
        col0: usize,
        out: &mut [f32],
    ) {
        let g = self.geom;
        // Aᵀ on the columns, then on the rows.
        let mut t = [[[0.0f32; LANES]; PATCH]; TILE];
        for s in 0..PATCH {
            let mut col = [[0.0f32; LANES]; PATCH];
            for (r, lanes) in col.iter_mut().enumerate() {
                let at = (row * XI + r * PATCH + s) * self.ld + g0;
                lanes.copy_from_slice(&m[at..at + LANES]);
            }
            for (ti, v) in t.iter_mut().zip(at(col)) {
                ti[s] = v;
            }
        }
        let mut y = [[[0.0f32; LANES]; TILE]; TILE];
        for (yi, ti) in y.iter_mut().zip(&t) {
            *yi = at(*ti);
        }
        if let Some(b) = epi.bias.map(|b| b[row]) {
            for v in y.iter_mut().flatten().flatten() {
                *v += b;
            }
        }
        let plane = g.out_h * g.out_w;
        let residual = epi.residual.map(|r| &r[row * plane..][..plane]);
        for lane in 0..LANES.min(self.count - g0) {
            let (oy, ox) = self.origin(g0 + lane);
            let cols = (g.out_w - ox).min(TILE);
            for (i, yrow) in y.iter().enumerate().take(g.out_h - oy) {
                let at = (oy + i) * g.out_w + ox;
                let dst = &mut out[at - col0..][..cols];
                match residual {
                    Some(r) => {
                        for ((d, v), r) in dst.iter_mut().zip(yrow).zip(&r[at..at + cols]) {
                            *d = v[lane] + r;
                        }
                    }
                    None => {
                        for (d, v) in dst.iter_mut().zip(yrow) {
                            *d = v[lane];
                        }
                    }
                }
            }
        }
    }
}

/// `Bᵀ x` for six lane vectors (Lavin & Gray 2016, F(4×4, 3×3)):
/// rows `[4 0 -5 0 1 0] [0 -4 -4 1 1 0] [0 4 -4 -1 1 0] [0 -2 -1 2 1 0] [0 2 -1 -2 1 0]
/// [0 4 0 -5 0 1]`, with shared partial sums.
#[inline(always)]
fn bt(x: [Lanes; PATCH]) -> [Lanes; PATCH] {
    let mut y = [[0.0f32; LANES]; PATCH];
    for l in 0..LANES {
        let [x0, x1, x2, x3, x4, x5] = [x[0][l], x[1][l], x[2][l], x[3][l], x[4][l], x[5][l]];
        let a = x3 + x4;
        let b = x1 + x2;
        let c = x4 - x3;
        let d = x1 - x2;
        let e = x4 - x2;
        let f = x3 - x1;
        y[0][l] = 4.0 * x0 - 5.0 * x2 + x4;
        y[1][l] = a - 4.0 * b;
        y[2][l] = c + 4.0 * d;
        y[3][l] = e + 2.0 * f;
        y[4][l] = e - 2.0 * f;
        y[5][l] = 4.0 * x1 - 5.0 * x3 + x5;
    }
    y
}

/// `Aᵀ x` for six lane vectors: rows `[1 1 1 1 1 0] [0 1 -1 2 -2 0] [0 1 1 4 4 0]
/// [0 1 -1 8 -8 1]`.
#[inline(always)]
fn at(x: [Lanes; PATCH]) -> [Lanes; TILE] {
    let mut y = [[0.0f32; LANES]; TILE];
    for l in 0..LANES {
        let [x0, x1, x2, x3, x4, x5] = [x[0][l], x[1][l], x[2][l], x[3][l], x[4][l], x[5][l]];
        let a = x1 + x2;
        let b = x1 - x2;
        let c = x3 + x4;
        let d = x3 - x4;
        y[0][l] = x0 + a + c;
        y[1][l] = b + 2.0 * d;
        y[2][l] = a + 4.0 * c;
        y[3][l] = b + 8.0 * d + x5;
    }
    y
}

#[cfg(test)]
mod tests;
