//! Direct depthwise convolution (groups == input channels, channel multiplier >= 1).
//!
//! Where masked loads are fast (AVX-512), the layers of inverted-residual blocks ("same" at
//! stride 1, or halving at stride 2) run flat ([`flat`]): each output plane one run of vectors
//! that may span rows, taps read at fixed offsets with the lanes outside the input masked
//! off. Every other layer, and every layer elsewhere, runs in tiles:
//!
//! Each output plane is cut into tiles of up to `MAX_TILE_ROWS` rows by `CHUNK` columns.
//! Every input row a tile reads is copied once into a window on the stack with its padding made
//! explicit, so every output, borders included, is computed by the same vector loop with no
//! bounds logic: contiguous loads for stride 1, even-lane de-interleaving loads for stride 2,
//! gathers otherwise, vectorised along the output row. Tiles whose windows would not fit on the
//! stack (huge strides or dilations) fall back to an element-by-element loop with the same
//! summation order.
//!
//! Invariance: every output element is `acc = 0; for (i, j) in kernel order: acc = fma(w, x,
//! acc)` with padded taps reading `x = 0` (which, for finite weights, equals skipping them:
//! `acc` is never -0), then `+ bias`, `+ residual`, activation, whatever its position. The
//! SIMD paths therefore agree bitwise; [`Isa::Scalar`] rounds multiply and add separately.

use std::fmt;
use std::ops::Range;

use super::activation::{Activation, apply_vec};
use super::copy::{copy_short, load_pairs, zero_short};
use super::gemm::{ConvGeom, Epilogue};
use super::isa::Isa;
use super::simd::{Machine, Scalar, Simd};
use super::vmath;

/// Depthwise weights `[C*mult, 1, kh, kw]`, bound to the instruction set that will run them.
pub struct PackedDepthwise {
    machine: Machine,
    out_c: usize,
    kh: usize,
    kw: usize,
    /// `[out_c][kh][kw]`, as given: the kernel broadcasts one tap at a time.
    w: Vec<f32>,
}

impl fmt::Debug for PackedDepthwise {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.debug_struct("PackedDepthwise")
            .field("isa", &self.isa())
            .field("out_c", &self.out_c)
            .field("kh", &self.kh)
            .field("kw", &self.kw)
            .finish_non_exhaustive()
    }
}

impl PackedDepthwise {
    /// Prepares `weights` (`[out_c, 1, kh, kw]`) for `isa`; an `isa` this CPU cannot run falls
    /// back to [`Isa::Scalar`].
    ///
    /// # Panics
    /// If `weights.len() != out_c * kh * kw` (the caller validates shapes).
    pub fn pack(isa: Isa, weights: &[f32], out_c: usize, kh: usize, kw: usize) -> Self {
        assert_eq!(
            weights.len(),
            out_c * kh * kw,
            "weights are not {out_c} x {kh} x {kw}"
        );
        PackedDepthwise {
            machine: Machine::new_or_scalar(isa),
            out_c,
            kh,
            kw,
            w: weights.to_vec(),
        }
    }

    pub fn out_c(&self) -> usize {
        self.out_c
    }

    /// The instruction set [`depthwise`] will use.
    pub fn isa(&self) -> Isa {
        self.machine.isa()
    }
}

/// One sample: `input` `[in_c, in_h, in_w]` -> `output` `[in_c*mult, out_h, out_w]`; output
/// channel `o` reads input channel `o / mult`. Only output channels in `channels` are written.
///
/// `output` holds the planes of `channels` only (its first float is the first of channel
/// `channels.start`), and so does `epi.residual`: disjoint channel ranges of one output are
/// disjoint slices, which different threads may fill. `epi.bias` has one value per output
/// channel, indexed by the channel number.
///
/// # Panics
/// If the shapes disagree or the slices are too short (the caller validates shapes first).
pub fn depthwise(
    w: &PackedDepthwise,
    geom: &ConvGeom,
    input: &[f32],
    output: &mut [f32],
    channels: Range<usize>,
    epi: &Epilogue<'_>,
) {
    let g = geom;
    assert!(
        g.kh == w.kh && g.kw == w.kw,
        "kernel size differs from the weights'"
    );
    assert!(
        w.out_c.checked_rem(g.in_c) == Some(0),
        "{} output channels are not a multiple of {} input channels",
        w.out_c,
        g.in_c
    );
    assert!(g.stride_h > 0 && g.stride_w > 0, "zero stride");
    assert!(
        channels.start <= channels.end && channels.end <= w.out_c,
        "channels {channels:?} outside 0..{}",
        w.out_c
    );
    if channels.is_empty() || g.out_h == 0 || g.out_w == 0 {
        return;
    }
    let plane_out = g.out_h * g.out_w;
    let need_out = channels.len() * plane_out;
    assert!(
        input.len() >= g.in_c * g.in_h * g.in_w,
        "input shorter than its shape"
    );
    assert!(output.len() >= need_out, "output shorter than its shape");
    if let Some(r) = epi.residual {
        assert!(r.len() >= need_out, "residual shorter than the output");
    }
    if let Some(b) = epi.bias {
        assert!(
            b.len() >= channels.end,
            "bias shorter than the channel count"
        );
    }
    let job = Job {
        w,
        g,
        input,
        out: output.as_mut_ptr(),
        residual: epi.residual.map_or(std::ptr::null(), <[f32]>::as_ptr),
        bias: epi.bias,
        act: epi.act,
        channels,
    };
    match w.machine {
        Machine::Scalar(s) => {
            // SAFETY: the asserts above bound every output and residual element written or read.
            unsafe { run::<Scalar>(s, &job) }
        }
        #[cfg(target_arch = "x86_64")]
        Machine::Avx2(s) => {
            // SAFETY: as above; the token proves the CPU runs the wrapper's target features.
            unsafe { run_avx2(s, &job) }
        }
        #[cfg(target_arch = "x86_64")]
        Machine::Avx512(s) => {
            // SAFETY: as above; the token proves the CPU runs the wrapper's target features.
            unsafe { run_avx512(s, &job) }
        }
        #[cfg(target_arch = "aarch64")]
        Machine::Neon(s) => {
            // SAFETY: as above; the token proves the CPU runs the wrapper's target features.
            unsafe { run_neon(s, &job) }
        }
    }
}

/// One call's operands, checked.
struct Job<'a> {
    w: &'a PackedDepthwise,
    g: &'a ConvGeom,
    input: &'a [f32],
    out: *mut f32,
    residual: *const f32,
    bias: Option<&'a [f32]>,
    act: Activation,
    channels: Range<usize>,
}

impl<'a> Job<'a> {
    /// The input plane output channel `o` reads.
    fn input_plane(&self, o: usize) -> &'a [f32] {
        let (g, mult) = (self.g, self.w.out_c / self.g.in_c);
        let plane_in = g.in_h * g.in_w;
        &self.input[(o / mult) * plane_in..][..plane_in]
    }

    /// Output channel `o` (one of `channels`), its taps reading `input`.
    fn plane<'p>(&self, o: usize, input: &'p [f32]) -> Plane<'p>
    where
        'a: 'p,
    {
        let taps = self.g.kh * self.g.kw;
        let offset = (o - self.channels.start) * self.g.out_h * self.g.out_w;
        Plane {
            input,
            taps: &self.w.w[o * taps..][..taps],
            // Stays in bounds: channel `o`'s plane is inside the output (the caller of
            // `depthwise` sized it); only the kernels dereference it.
            out: self.out.wrapping_add(offset),
            // Stays null when there is no residual: null is what the epilogue tests for.
            residual: if self.residual.is_null() {
                self.residual
            } else {
                self.residual.wrapping_add(offset)
            },
            bias: self.bias.map_or(0.0, |b| b[o]),
            has_bias: self.bias.is_some(),
        }
    }

    /// Applies an activation too costly for registers to a finished plane.
    ///
    /// # Safety
    /// `plane` must be one of this job's output planes, with nothing else referring to it.
    #[inline(always)]
    unsafe fn finish_plane<S: Simd>(&self, s: S, plane: &Plane<'_>) {
        if !self.act.is_cheap() {
            let len = self.g.out_h * self.g.out_w;
            // SAFETY: the plane is inside the output (caller).
            let out = unsafe { std::slice::from_raw_parts_mut(plane.out, len) };
            vmath::apply_slice(s, self.act, out);
        }
    }
}

/// Runs `$group!(U)` with the literal `U` that equals `$u` (1 to 8; more counts as 8): a group's
/// accumulator count must be a constant.
macro_rules! with_group_size {
    ($u:expr, $group:ident) => {
        match $u {
            1 => $group!(1),
            2 => $group!(2),
            3 => $group!(3),
            4 => $group!(4),
            5 => $group!(5),
            6 => $group!(6),
            7 => $group!(7),
            _ => $group!(8),
        }
    };
}

#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx2,fma")]
unsafe fn run_avx2(s: super::simd::Avx2, job: &Job<'_>) {
    // SAFETY: forwarded from the caller.
    unsafe { run(s, job) }
}

#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx512f,avx2,fma")]
unsafe fn run_avx512(s: super::simd::Avx512, job: &Job<'_>) {
    // SAFETY: forwarded from the caller.
    unsafe { run(s, job) }
}

#[cfg(target_arch = "aarch64")]
#[target_feature(enable = "neon")]
unsafe fn run_neon(s: super::simd::Neon, job: &Job<'_>) {
    // SAFETY: forwarded from the caller.
    unsafe { run(s, job) }
}

/// Most output columns per tile.
const CHUNK: usize = 256;
/// Most output rows per tile.
const MAX_TILE_ROWS: usize = 16;
/// Floats of padded input windows, all input rows of a tile together (32 KiB of stack).
const WINDOWS: usize = 8192;

/// How one call cuts each output plane into tiles.
#[derive(Clone, Copy, Debug)]
struct Tiling {
    cols: usize,
    rows: usize,
}

/// The largest tiles whose windows fit [`WINDOWS`], or `None` if even one vector's do not
/// (huge strides or dilations).
fn tiling(g: &ConvGeom, lanes: usize) -> Option<Tiling> {
    let reach = (g.kw - 1) * g.dil_w + 1;
    let vspan = (g.kh - 1) * g.dil_h + 1;
    let window = |cols: usize| cols.div_ceil(lanes) * lanes * g.stride_w + reach;
    let mut cols = g.out_w.min(CHUNK);
    while vspan * window(cols) > WINDOWS {
        if cols <= lanes {
            return None;
        }
        cols = (cols / 2).div_ceil(lanes) * lanes;
    }
    let spans = WINDOWS / window(cols);
    let rows = ((spans - vspan) / g.stride_h + 1)
        .min(MAX_TILE_ROWS)
        .min(g.out_h);
    Some(Tiling { cols, rows })
}

/// Where one channel's results go.
struct Plane<'a> {
    /// Input plane of the channel.
    input: &'a [f32],
    /// `[kh][kw]` weights.
    taps: &'a [f32],
    /// Output plane (and residual plane, or null).
    out: *mut f32,
    residual: *const f32,
    bias: f32,
    has_bias: bool,
}

/// The one generic body, inlined into each instruction set's wrapper: the layers [`flat`]
/// takes where masked loads are fast; otherwise output rows no wider than the narrow
/// vectors run on them (a 7-wide row fills 7 of AVX-512's 16 lanes but 7 of its ymm's 8),
/// the rest on the full ones. Lanes never mix, so all give the same bits.
///
/// # Safety
/// As [`planes`].
#[inline(always)]
unsafe fn run<S: Simd>(s: S, job: &Job<'_>) {
    let g = job.g;
    // SAFETY: forwarded from the caller.
    unsafe {
        if let Some(source) = FlatSource::of(g).filter(|_| S::FAST_MASKED_LOAD) {
            flat(s, job, source);
        } else if S::Narrow::LANES < S::LANES && g.out_w <= S::Narrow::LANES {
            planes(s.narrow(), job);
        } else {
            planes(s, job);
        }
    }
}

/// What the taps of [`flat`] read.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
enum FlatSource {
    /// Stride 1, output planes the input's size (a "same" convolution, the depthwise layer of
    /// every inverted-residual block): the input plane itself.
    Input,
    /// Stride 2, input planes twice the output's size each way (the blocks that halve the
    /// resolution) and no larger than [`PHASES_MAX`]: the input plane dealt into its four
    /// phases (even and odd rows by even and odd columns), each the output's size, so that
    /// every tap again reads a fixed offset.
    Phases,
}

/// Largest input plane, in floats, that [`FlatSource::Phases`] deals: the plane and its
/// phases then stay in a core's L1 data cache together (2 × 16 KiB). Measured (2026-12-05,
/// 2-core AVX-512 Xeon, `convoy bench --local --steps`, MobileNetV3-small at batch 1): its
/// 16-channel layer from 112×112 took 118 µs dealt against 83 µs by windows, while its layers
/// from 56×56, 28×28 and 14×14 went from 105, 68 and 81 µs to 72, 46 and 55 µs.
const PHASES_MAX: usize = 64 * 64;

impl FlatSource {
    fn of(g: &ConvGeom) -> Option<FlatSource> {
        match (g.stride_h, g.stride_w) {
            (1, 1) if (g.out_h, g.out_w) == (g.in_h, g.in_w) => Some(FlatSource::Input),
            (2, 2)
                if (g.in_h, g.in_w) == (2 * g.out_h, 2 * g.out_w)
                    && g.in_h * g.in_w <= PHASES_MAX =>
            {
                Some(FlatSource::Phases)
            }
            _ => None,
        }
    }

    /// A tap's shift `d` in input rows (or columns) as (shift in the source, phase).
    fn split(self, d: isize) -> (isize, usize) {
        match self {
            FlatSource::Input => (d, 0),
            FlatSource::Phases => (d.div_euclid(2), d.rem_euclid(2) as usize),
        }
    }
}

/// For the layers [`FlatSource`] describes, where masked loads cost no more than plain ones
/// (AVX-512): each output plane is one flat run of `LANES`-wide vectors that may span rows,
/// every tap read at a fixed offset in the source planes, and the lanes whose tap falls
/// outside the input masked off (read as zero, as the windows' padding is). No window copies,
/// and a 7×7 plane takes 4 vectors instead of one per row. The masks depend on the vector and
/// the tap only, so they are worked out once per call.
///
/// # Safety
/// As [`planes`].
#[inline(always)]
unsafe fn flat<S: Simd>(s: S, job: &Job<'_>, source: FlatSource) {
    let g = job.g;
    let lanes = S::LANES;
    let plane = g.out_h * g.out_w;
    let nvec = plane.div_ceil(lanes);
    let taps = g.kh * g.kw;
    // Per kernel row and column: the shift in source rows (columns) and the phase.
    let rows_of: Vec<(isize, usize)> = (0..g.kh)
        .map(|i| source.split((i * g.dil_h) as isize - g.pad_top as isize))
        .collect();
    let cols_of: Vec<(isize, usize)> = (0..g.kw)
        .map(|j| source.split((j * g.dil_w) as isize - g.pad_left as isize))
        .collect();
    // Tap (i, j) of output position q reads source position q + offsets[i*kw + j].
    let offsets: Vec<isize> = (0..taps)
        .map(|t| {
            let ((dy, py), (dx, px)) = (rows_of[t / g.kw], cols_of[t % g.kw]);
            ((2 * py + px) * plane) as isize + dy * g.out_w as isize + dx
        })
        .collect();
    // masks[v*taps + t]: the lanes of vector v whose tap t is inside the input, the product
    // of the lanes whose tap row is inside and those whose tap column is.
    let mut masks = vec![0u32; nvec * taps];
    let (mut rows, mut cols) = (vec![0u32; g.kh], vec![0u32; g.kw]);
    let (mut y, mut x) = (0, 0);
    for vm in masks.chunks_exact_mut(taps) {
        rows.fill(0);
        cols.fill(0);
        for l in 0..lanes {
            if y == g.out_h {
                break;
            }
            for (r, &(dy, _)) in rows.iter_mut().zip(&rows_of) {
                *r |= u32::from((0..g.out_h as isize).contains(&(y as isize + dy))) << l;
            }
            for (c, &(dx, _)) in cols.iter_mut().zip(&cols_of) {
                *c |= u32::from((0..g.out_w as isize).contains(&(x as isize + dx))) << l;
            }
            x += 1;
            if x == g.out_w {
                (y, x) = (y + 1, 0);
            }
        }
        for (t, m) in vm.iter_mut().enumerate() {
            *m = rows[t / g.kw] & cols[t % g.kw];
        }
    }
    let tables = FlatTables {
        offsets: &offsets,
        masks: &masks,
    };
    let mut phases = match source {
        FlatSource::Input => Vec::new(),
        FlatSource::Phases => vec![0.0f32; 4 * plane],
    };
    // The input plane `phases` holds: output channels of one input channel (a multiplier
    // above 1) are dealt once.
    let mut dealt = None;
    for o in job.channels.clone() {
        let input = job.input_plane(o);
        let plane_ref = job.plane(
            o,
            match source {
                FlatSource::Input => input,
                FlatSource::Phases => {
                    if dealt != Some(input.as_ptr()) {
                        deal_phases(s, input, g.out_w, &mut phases);
                        dealt = Some(input.as_ptr());
                    }
                    &phases
                }
            },
        );
        let mut v = 0;
        while v < nvec {
            let u = (nvec - v).min(8);
            macro_rules! group {
                ($u:literal) => {{
                    let pairs: [(usize, usize); $u] = std::array::from_fn(|k| (0, v + k));
                    // SAFETY: the masks let through only lanes inside the source planes; the
                    // vectors' outputs are inside the output plane, one row `plane` long.
                    unsafe {
                        let acc = accumulate_flat::<S, $u>(s, &plane_ref, &tables, v);
                        store::<S, $u>(s, g, &plane_ref, job.act, (0, 0, plane), &pairs, &acc);
                    }
                }};
            }
            with_group_size!(u, group);
            v += u;
        }
        // SAFETY: the plane is this job's, and its last store is done.
        unsafe { job.finish_plane(s, &plane_ref) };
    }
}

/// Deals an input plane `2·out_h` rows by `2·out_w` columns into its four phases, one after
/// the other in `phases`: (even rows, even columns), (even, odd), (odd, even), (odd, odd),
/// each `out_h` by `out_w`.
#[inline(always)]
fn deal_phases<S: Simd>(s: S, input: &[f32], out_w: usize, phases: &mut [f32]) {
    let plane = phases.len() / 4;
    for (iy, row) in input.chunks_exact(2 * out_w).enumerate() {
        let (py, r) = (iy % 2, iy / 2);
        let (even, odd) = phases[2 * py * plane..][..2 * plane].split_at_mut(plane);
        let (even, odd) = (
            &mut even[r * out_w..][..out_w],
            &mut odd[r * out_w..][..out_w],
        );
        for ((pairs, e), o) in row
            .chunks(2 * S::LANES)
            .zip(even.chunks_mut(S::LANES))
            .zip(odd.chunks_mut(S::LANES))
        {
            let (ve, vo) = load_pairs(s, pairs);
            // SAFETY: `e` and `o` hold `e.len() <= LANES` writable floats each.
            unsafe {
                s.store_partial(e.as_mut_ptr(), ve, e.len());
                s.store_partial(o.as_mut_ptr(), vo, o.len());
            }
        }
    }
}

/// The per-tap offsets and per-(vector, tap) lane masks of [`flat`].
struct FlatTables<'a> {
    offsets: &'a [isize],
    masks: &'a [u32],
}

/// Vectors `first .. first + U` of one plane over every tap in kernel order, as
/// [`accumulate`] sums them.
///
/// # Safety
/// The masks must let through only lanes whose reads are inside `plane.input`.
#[inline(always)]
unsafe fn accumulate_flat<S: Simd, const U: usize>(
    s: S,
    plane: &Plane<'_>,
    tables: &FlatTables<'_>,
    first: usize,
) -> [S::V; U] {
    let taps = plane.taps.len();
    let masks = &tables.masks[first * taps..][..U * taps];
    let base = plane.input.as_ptr().wrapping_add(first * S::LANES);
    let mut acc = [s.zero(); U];
    for (t, (&wt, &off)) in plane.taps.iter().zip(tables.offsets).enumerate() {
        let wv = s.splat(wt);
        let p = base.wrapping_offset(off);
        let m: [u32; U] = std::array::from_fn(|u| masks[u * taps + t]);
        for (u, a) in acc.iter_mut().enumerate() {
            // SAFETY: masked-off lanes are not accessed; the others are inside the plane
            // (caller). The address itself may point outside, hence `wrapping_add`.
            let x = unsafe { s.load_masked(p.wrapping_add(u * S::LANES), m[u]) };
            *a = s.fma(wv, x, *a);
        }
    }
    acc
}

/// Every channel of `job`, a tile at a time.
///
/// # Safety
/// `job.out` (and `job.residual` if not null) must be valid for the planes of the channels in
/// `job.channels`, counted from `job.channels.start`; the input holds `in_c` planes.
#[inline(always)]
unsafe fn planes<S: Simd>(s: S, job: &Job<'_>) {
    let g = job.g;
    let tiling = tiling(g, S::LANES);
    let mut windows = [0.0f32; WINDOWS];
    for o in job.channels.clone() {
        let plane = job.plane(o, job.input_plane(o));
        match tiling {
            Some(t) => {
                for oy0 in (0..g.out_h).step_by(t.rows) {
                    let rows = t.rows.min(g.out_h - oy0);
                    for ox0 in (0..g.out_w).step_by(t.cols) {
                        let cols = t.cols.min(g.out_w - ox0);
                        // SAFETY: the tile is inside the plane; `tiling` sized the windows.
                        unsafe {
                            tile(
                                s,
                                g,
                                &plane,
                                job.act,
                                (oy0, rows),
                                (ox0, cols),
                                &mut windows,
                            );
                        }
                    }
                }
            }
            None => {
                for oy in 0..g.out_h {
                    for ox in 0..g.out_w {
                        // SAFETY: (oy, ox) is inside the plane.
                        unsafe { scalar_point(s, g, &plane, job.act, (oy, ox)) };
                    }
                }
            }
        }
        // SAFETY: the plane is this job's, and its last store is done.
        unsafe { job.finish_plane(s, &plane) };
    }
}

/// The padded windows of one tile: input row `iy_min + t` at `base + t*len`, its column
/// `ix_min + x` at offset `x`.
struct Windows {
    base: *const f32,
    len: usize,
}

/// Output rows `oy0 .. oy0 + rows`, columns `ox0 .. ox0 + cols` of one plane.
///
/// Every input row the tile reads is copied once into a window with its padding made
/// explicit (zero rows above and below, zero columns left and right), then the (row, vector)
/// pairs of the tile are accumulated in groups of up to 8: independent FMA chains that hide
/// the FMA latency (a 3x3 kernel is a chain of 9).
///
/// # Safety
/// The tile must be inside the plane, and its windows must fit [`WINDOWS`] (see `tiling`).
#[inline(always)]
unsafe fn tile<S: Simd>(
    s: S,
    g: &ConvGeom,
    plane: &Plane<'_>,
    act: Activation,
    (oy0, rows): (usize, usize),
    (ox0, cols): (usize, usize),
    windows: &mut [f32; WINDOWS],
) {
    let lanes = S::LANES;
    let nvec = cols.div_ceil(lanes);
    // Vector v, tap j reads from v*lanes*stride_w + j*dil_w on, up to lanes*stride_w
    // floats (stride 2 reads one past its last).
    let len = nvec * lanes * g.stride_w + (g.kw - 1) * g.dil_w + 1;
    let span = (rows - 1) * g.stride_h + (g.kh - 1) * g.dil_h + 1;
    let iy_min = (oy0 * g.stride_h) as isize - g.pad_top as isize;
    let ix_min = (ox0 * g.stride_w) as isize - g.pad_left as isize;
    let lo = (-ix_min).clamp(0, len as isize) as usize;
    let hi = (g.in_w as isize - ix_min).clamp(lo as isize, len as isize) as usize;
    for (t, win) in windows.chunks_exact_mut(len).take(span).enumerate() {
        let iy = iy_min + t as isize;
        if iy < 0 || iy >= g.in_h as isize {
            zero_short(win);
            continue;
        }
        let src = &plane.input[iy as usize * g.in_w..][..g.in_w];
        zero_short(&mut win[..lo]);
        if hi > lo {
            let from = (ix_min + lo as isize) as usize;
            copy_short(&mut win[lo..hi], &src[from..from + (hi - lo)]);
        }
        zero_short(&mut win[hi..]);
    }
    let win = Windows {
        base: windows.as_ptr(),
        len,
    };
    let total = rows * nvec;
    let mut q = 0;
    // (row, vector) of pair q, advanced without dividing.
    let mut next = (0usize, 0usize);
    while q < total {
        let u = (total - q).min(8);
        macro_rules! group {
            ($u:literal) => {{
                let pairs: [(usize, usize); $u] = std::array::from_fn(|_| {
                    let here = next;
                    next = if next.1 + 1 == nvec {
                        (next.0 + 1, 0)
                    } else {
                        (next.0, next.1 + 1)
                    };
                    here
                });
                // SAFETY: every pair is a (row, vector) of this tile, which the windows
                // cover and whose valid columns are inside the plane.
                unsafe {
                    let acc = accumulate::<S, $u>(s, g, plane.taps, &win, &pairs);
                    store::<S, $u>(s, g, plane, act, (oy0, ox0, cols), &pairs, &acc);
                }
            }};
        }
        with_group_size!(u, group);
        q += u;
    }
}

/// Accumulates the (tile row, vector) `pairs` over every tap in kernel order.
///
/// # Safety
/// The windows must hold every float these vectors read (as sized by [`tile`]).
#[inline(always)]
unsafe fn accumulate<S: Simd, const U: usize>(
    s: S,
    g: &ConvGeom,
    taps: &[f32],
    win: &Windows,
    pairs: &[(usize, usize); U],
) -> [S::V; U] {
    let (sw, dw) = (g.stride_w, g.dil_w);
    let step = S::LANES * sw;
    // SAFETY (pointer arithmetic here and below): inside the windows (caller).
    let bases: [*const f32; U] = std::array::from_fn(|u| {
        let (r, v) = pairs[u];
        unsafe { win.base.add(r * g.stride_h * win.len + v * step) }
    });
    let mut acc = [s.zero(); U];
    for i in 0..g.kh {
        let row_off = i * g.dil_h * win.len;
        for (j, &t) in taps[i * g.kw..][..g.kw].iter().enumerate() {
            let wv = s.splat(t);
            let off = row_off + j * dw;
            for (a, &base) in acc.iter_mut().zip(&bases) {
                // SAFETY: inside the windows (caller).
                let x = unsafe {
                    let p = base.add(off);
                    match sw {
                        1 => s.load(p),
                        2 => s.load_even(p),
                        _ => {
                            let mut tmp = [0.0f32; 16];
                            for (l, x) in tmp.iter_mut().enumerate().take(S::LANES) {
                                *x = *p.add(l * sw);
                            }
                            s.load(tmp.as_ptr())
                        }
                    }
                };
                *a = s.fma(wv, x, *a);
            }
        }
    }
    acc
}

/// Stores the (tile row, vector) `pairs` through the epilogue; a ragged last vector with
/// masked loads and stores.
///
/// # Safety
/// The tile at `(oy0, ox0)`, `cols` wide, must be inside the plane.
#[inline(always)]
unsafe fn store<S: Simd, const U: usize>(
    s: S,
    g: &ConvGeom,
    plane: &Plane<'_>,
    act: Activation,
    (oy0, ox0, cols): (usize, usize, usize),
    pairs: &[(usize, usize); U],
    acc: &[S::V; U],
) {
    let act = cheap(act);
    let bias = s.splat(plane.bias);
    for (&(r, v), &a) in pairs.iter().zip(acc) {
        let at = (oy0 + r) * g.out_w + ox0 + v * S::LANES;
        let lanes = (cols - v * S::LANES).min(S::LANES);
        let mut x = a;
        if plane.has_bias {
            x = s.add(x, bias);
        }
        // SAFETY: `lanes` columns from `at` are inside the output (and residual) plane.
        unsafe {
            if lanes == S::LANES {
                if !plane.residual.is_null() {
                    x = s.add(x, s.load(plane.residual.add(at)));
                }
                s.store(plane.out.add(at), apply_vec(s, act, x));
            } else {
                if !plane.residual.is_null() {
                    x = s.add(x, s.load_partial(plane.residual.add(at), lanes));
                }
                s.store_partial(plane.out.add(at), apply_vec(s, act, x), lanes);
            }
        }
    }
}

/// One output element, any position; the fallback for windows too large for the stack.
/// Padded taps read 0, as in the windowed path.
///
/// # Safety
/// `(oy, ox)` must be inside the plane.
#[inline(always)]
unsafe fn scalar_point<S: Simd>(
    s: S,
    g: &ConvGeom,
    plane: &Plane<'_>,
    act: Activation,
    (oy, ox): (usize, usize),
) {
    let mut acc = 0.0f32;
    let y0 = (oy * g.stride_h) as isize - g.pad_top as isize;
    let x0 = (ox * g.stride_w) as isize - g.pad_left as isize;
    for i in 0..g.kh {
        let iy = y0 + (i * g.dil_h) as isize;
        for j in 0..g.kw {
            let ix = x0 + (j * g.dil_w) as isize;
            let inside = iy >= 0 && ix >= 0 && (iy as usize) < g.in_h && (ix as usize) < g.in_w;
            let x = if inside {
                plane.input[iy as usize * g.in_w + ix as usize]
            } else {
                0.0
            };
            acc = s.fma_s(plane.taps[i * g.kw + j], x, acc);
        }
    }
    if plane.has_bias {
        acc += plane.bias;
    }
    let at = oy * g.out_w + ox;
    // SAFETY: (oy, ox) is inside the output (and residual) plane (caller).
    unsafe {
        if !plane.residual.is_null() {
            acc += *plane.residual.add(at);
        }
        *plane.out.add(at) = act.apply_cheap(acc);
    }
}

/// The activation applied in registers: cheap ones only, the others come after.
#[inline(always)]
fn cheap(act: Activation) -> Activation {
    if act.is_cheap() {
        act
    } else {
        Activation::Identity
    }
}

#[cfg(test)]
mod tests;
