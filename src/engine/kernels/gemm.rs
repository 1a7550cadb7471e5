//! Matrix multiply with a fused epilogue: `C = act(A·B + bias + residual)`.
//!
//! A is a layer's weights, packed once at plan time into row panels ([`PackedWeights`]). B comes
//! from one of three sources ([`BSource`]): a matrix, a transposed matrix (dense layers) or the
//! implicit im2col of a convolution input. Each call walks the requested columns in blocks sized
//! for the L2 cache; per block it packs B into column panels (`pack`), then runs register-blocked
//! microkernels (`kernel`) over every (A panel, B panel) pair, finishing bias, residual and
//! cheap activations in registers.
//!
//! A convolution's im2col has a second route ([`Im2colAlgo::Direct`], module `direct`): a
//! zero-padded copy of the input per call (one, or one per kernel column; with AVX-512 at
//! stride 1, a plain copy whose padding columns masked loads supply), read by the
//! microkernels through a per-`k` offset table, with no packed B panels;
//! [`Im2colAlgo::Auto`] picks it where it pays off.
//!
//! Batch invariance: every output element is `acc = 0; for k in 0..K { acc = fma(a, b, acc) }`,
//! then `+ bias`, then `+ residual`, then the activation, whichever kernel, tile, block, column
//! split or batch size produced it. Vector lanes never exchange values, so padding columns and
//! rows are harmless. The SIMD paths agree bitwise with each other; [`Isa::Scalar`] rounds the
//! multiply and the add separately and may differ from them by rounding.

mod direct;
mod kernel;
mod pack;
#[cfg(test)]
mod tests;

use std::fmt;
use std::marker::PhantomData;
use std::ops::Range;

use super::activation::Activation;
use super::aligned::AlignedBuf;
use super::isa::Isa;
use super::simd::{Machine, Scalar, Simd};
use super::vmath;
use kernel::Out;

/// Microkernel shapes per instruction set: `MR` weight rows by `NV` vectors of columns.
///
/// AVX-512 (32 zmm): 8 x 48 holds 24 accumulators, 3 B vectors and a broadcast; 8 rows match
/// the channel counts of common networks (multiples of 8), where 12 rows would waste a third of
/// a 16-channel layer. AVX2 (16 ymm): the classic 6 x 16, 12 accumulators. NEON (32 q): 8 x 12.
/// Scalar: 4 x 4, small enough for any register file.
mod shape {
    pub(super) const SCALAR_MR: usize = 4;
    pub(super) const SCALAR_NV: usize = 4;
    #[cfg(target_arch = "x86_64")]
    pub(super) const AVX2_MR: usize = 6;
    #[cfg(target_arch = "x86_64")]
    pub(super) const AVX2_NV: usize = 2;
    #[cfg(target_arch = "x86_64")]
    pub(super) const AVX512_MR: usize = 8;
    #[cfg(target_arch = "x86_64")]
    pub(super) const AVX512_NV: usize = 3;
    #[cfg(target_arch = "aarch64")]
    pub(super) const NEON_MR: usize = 8;
    #[cfg(target_arch = "aarch64")]
    pub(super) const NEON_NV: usize = 3;
    /// Narrow vectors covering one A panel in the row-vectorised kernel.
    #[cfg(target_arch = "x86_64")]
    pub(super) const AVX2_VM: usize = 1; // 6 rows in one 8-lane ymm
    #[cfg(target_arch = "x86_64")]
    pub(super) const AVX512_VM: usize = 1; // 8 rows in one ymm (the narrow set of AVX-512)
    #[cfg(target_arch = "aarch64")]
    pub(super) const NEON_VM: usize = 2; // 8 rows in two 4-lane q registers
    /// Ragged column tails up to this width use the row-vectorised kernel. It costs one FMA
    /// instruction per column per panel; a column-vector tile costs MR of them per vector, so
    /// it wins below MR columns, and with AVX-512's narrow ymm it wins below 8.
    #[cfg(target_arch = "x86_64")]
    pub(super) const AVX2_SMALL: usize = 5;
    #[cfg(target_arch = "x86_64")]
    pub(super) const AVX512_SMALL: usize = 7;
    #[cfg(target_arch = "aarch64")]
    pub(super) const NEON_SMALL: usize = 3;
    /// Floats of zero padding after packed weights: the row-vectorised kernel's last vector
    /// may read up to (VM*narrow lanes - MR) floats past a panel.
    pub(super) const A_PAD: usize = 16;
    /// Target size, in floats, of one block of packed B (256 KiB: well inside L2 together
    /// with the weights it meets).
    pub(super) const B_BLOCK_FLOATS: usize = 64 * 1024;
    /// Most floats of packed weights that meet every column tile before the next ones are
    /// read (256 KiB).
    pub(super) const A_BLOCK_FLOATS: usize = 64 * 1024;
}

/// Weights (the A operand, row-major `M x K`) packed once at plan time for one instruction set.
pub struct PackedWeights {
    machine: Machine,
    m: usize,
    k: usize,
    /// Panels of `mr` rows, `[panel][k][mr]`, then [`shape::A_PAD`] zeros.
    data: Vec<f32>,
}

impl fmt::Debug for PackedWeights {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.debug_struct("PackedWeights")
            .field("isa", &self.isa())
            .field("m", &self.m)
            .field("k", &self.k)
            .finish_non_exhaustive()
    }
}

impl PackedWeights {
    /// Packs row-major `a` (`m x k`) for `isa`.
    ///
    /// An `isa` this CPU cannot run falls back to [`Isa::Scalar`] (see [`PackedWeights::isa`]);
    /// the executor only passes the result of [`Isa::detect`].
    ///
    /// # Panics
    /// If `a.len() != m * k` (the caller validates shapes).
    pub fn pack(isa: Isa, a: &[f32], m: usize, k: usize) -> PackedWeights {
        assert_eq!(a.len(), m * k, "weights are not {m} x {k}");
        let machine = Machine::new_or_scalar(isa);
        let mr = mr_of(machine);
        PackedWeights {
            machine,
            m,
            k,
            data: pack::pack_a(a, m, k, mr, shape::A_PAD),
        }
    }

    /// Rows of A (output channels).
    pub fn m(&self) -> usize {
        self.m
    }

    /// Columns of A (the reduction length).
    pub fn k(&self) -> usize {
        self.k
    }

    /// Rows per panel: a band of rows given to [`gemm_band`] starts at a multiple of this.
    pub fn panel_rows(&self) -> usize {
        mr_of(self.machine)
    }

    /// The instruction set the weights were packed for, and that [`gemm`] will use.
    pub fn isa(&self) -> Isa {
        self.machine.isa()
    }
}

fn mr_of(machine: Machine) -> usize {
    match machine {
        Machine::Scalar(_) => shape::SCALAR_MR,
        #[cfg(target_arch = "x86_64")]
        Machine::Avx2(_) => shape::AVX2_MR,
        #[cfg(target_arch = "x86_64")]
        Machine::Avx512(_) => shape::AVX512_MR,
        #[cfg(target_arch = "aarch64")]
        Machine::Neon(_) => shape::NEON_MR,
    }
}

/// Geometry of one convolution for one group, validated by the caller (output sizes already
/// computed).
#[derive(Clone, Copy, Debug)]
pub struct ConvGeom {
    pub in_c: usize,
    pub in_h: usize,
    pub in_w: usize,
    pub kh: usize,
    pub kw: usize,
    pub stride_h: usize,
    pub stride_w: usize,
    pub dil_h: usize,
    pub dil_w: usize,
    pub pad_top: usize,
    pub pad_left: usize,
    pub out_h: usize,
    pub out_w: usize,
}

/// The B operand (`K x N`).
#[derive(Clone, Copy, Debug)]
pub enum BSource<'a> {
    /// `B[k][n] = data[k * ld + n]`.
    Matrix { data: &'a [f32], ld: usize },
    /// `B[k][n] = data[n * ld + k]` (dense layers: `B = Xᵀ` where X is `[batch, in]`).
    MatrixT { data: &'a [f32], ld: usize },
    /// Implicit im2col of ONE sample's `input`, laid out `[in_c_total, in_h, in_w]`: row
    /// `k = (c, i, j)` with `c` in `c0..c0 + K/(kh*kw)` (channel-major, then kernel row, then
    /// kernel column), column `n = oy*out_w + ox`; the value is
    /// `input[c][oy*stride_h + i*dil_h - pad_top][ox*stride_w + j*dil_w - pad_left]`, 0 outside.
    Im2col {
        input: &'a [f32],
        geom: ConvGeom,
        c0: usize,
    },
}

/// What is done to `A·B` before it is stored.
#[derive(Clone, Copy, Debug, Default)]
pub struct Epilogue<'a> {
    /// Per row `m` (length at least M).
    pub bias: Option<&'a [f32]>,
    /// Same layout and strides as C; added after the bias, before the activation.
    pub residual: Option<&'a [f32]>,
    pub act: Activation,
}

/// One column panel of packed B.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
struct Panel {
    /// First column (absolute).
    n0: usize,
    /// Real columns.
    cols: usize,
    /// Vectors per row for the column-vector kernel, or 0 for the row-vectorised one.
    nv: usize,
    /// Start in the packed buffer.
    offset: usize,
}

impl Panel {
    /// Floats per packed row: whole vectors, or exactly `cols` for the row-vectorised kernel.
    fn width(&self, lanes: usize) -> usize {
        if self.nv == 0 {
            self.cols
        } else {
            self.nv * lanes
        }
    }
}

/// How a convolution's implicit im2col ([`BSource::Im2col`]) reaches the microkernels. Both
/// routes compute the same bits; they differ only in speed.
#[derive(Clone, Copy, Debug, Default, PartialEq, Eq, Hash)]
pub enum Im2colAlgo {
    /// Direct where it pays off, else packed (the default; the rule is `Layout::pays_off` in
    /// `gemm/direct.rs`, measured: direct whenever it copies at most 2/3 of what the packed
    /// route would, which holds for 3x3 convolutions at stride 1, and at stride 2 where
    /// the pitched layout suits the shape (16 outputs per row and up), not for strided 1x1;
    /// the rows layout, where the instruction set has cheap masked loads, always).
    #[default]
    Auto,
    /// Pack B into column panels per block of columns (any geometry; best where the direct
    /// layout would copy as much, such as strided 1x1 shortcuts).
    Packed,
    /// Copy the input into a zero-padded layout (once, or once per kernel column) and read B
    /// rows from it in place (any geometry; best for small channel counts, where packing
    /// dominated).
    Direct,
}

/// Reusable packing buffers; grows to the largest block seen, then never allocates again.
#[derive(Default)]
pub struct GemmScratch {
    buf: AlignedBuf,
    panels: Vec<Panel>,
    /// The im2col packing program of the current panel.
    ops: Vec<pack::Op>,
    /// The direct route's B row offsets.
    offs: Vec<u32>,
    /// The im2col route to take.
    algo: Im2colAlgo,
}

impl GemmScratch {
    /// Scratch that lets [`Im2colAlgo::Auto`] choose the im2col route.
    pub fn new() -> GemmScratch {
        GemmScratch::default()
    }

    /// Scratch that forces one im2col route (tests and benchmarks compare the two).
    pub fn with_im2col(algo: Im2colAlgo) -> GemmScratch {
        GemmScratch {
            algo,
            ..GemmScratch::default()
        }
    }
}

impl fmt::Debug for GemmScratch {
    fn fmt(&self, f: &mut fmt::Formatter<'_>) -> fmt::Result {
        f.debug_struct("GemmScratch").finish_non_exhaustive()
    }
}

/// Splits columns `n0..n0+nb` into panels: whole `nv_max`-vector panels, then one panel for the
/// whole vectors of the rest and, if the ragged tail is at most `small_max` columns, a
/// row-vectorised panel for it (else the tail is padded into the vector panel). Returns the
/// floats the packed block needs.
fn plan_block(
    (n0, nb): (usize, usize),
    (lanes, nv_max, small_max): (usize, usize, usize),
    k: usize,
    panels: &mut Vec<Panel>,
) -> usize {
    panels.clear();
    let mut offset = 0;
    let mut push = |n0: usize, cols: usize, nv: usize| {
        let p = Panel {
            n0,
            cols,
            nv,
            offset,
        };
        offset += k * p.width(lanes);
        panels.push(p);
    };
    let nr = nv_max * lanes;
    let end = n0 + nb;
    let mut n = n0;
    while end - n >= nr {
        push(n, nr, nv_max);
        n += nr;
    }
    let rest = end - n;
    if rest > 0 {
        let tail = rest % lanes;
        let vec_cols = if tail > 0 && tail <= small_max {
            rest - tail
        } else {
            rest
        };
        if vec_cols > 0 {
            push(n, vec_cols, vec_cols.div_ceil(lanes));
            n += vec_cols;
        }
        if end > n {
            push(n, end - n, 0);
        }
    }
    offset
}

/// Columns per block: as many whole panels as keep one packed block near
/// [`shape::B_BLOCK_FLOATS`], at least one panel.
fn block_cols(k: usize, nr: usize) -> usize {
    (shape::B_BLOCK_FLOATS / k.max(1) / nr).max(1) * nr
}

/// A block of a row-major matrix with row stride `ldc`, borrowed mutably: columns `cols` of
/// a range of rows (all rows for [`Band::new`] and [`Band::split`]); what one [`gemm_band`]
/// call writes. Bands split from one matrix ([`Band::split`], [`Band::split_rows`]) are
/// disjoint, so different threads may fill them at once.
pub struct Band<'a> {
    ptr: *mut f32,
    /// Rows `first_row .. first_row + rows` of C (`ptr` is row 0).
    first_row: usize,
    rows: usize,
    ldc: usize,
    cols: Range<usize>,
    _borrow: PhantomData<&'a mut [f32]>,
}

// SAFETY: a band stands for `&mut` access to its own elements only (disjoint from every other
// band of the matrix), and `&mut [f32]` is `Send`.
unsafe impl Send for Band<'_> {}

impl<'a> Band<'a> {
    /// Columns `cols` of all `rows` rows of `c`.
    ///
    /// # Panics
    /// If `c` is too short for them or `cols` does not fit in `ldc`.
    pub fn new(c: &'a mut [f32], rows: usize, ldc: usize, cols: Range<usize>) -> Band<'a> {
        Self::check(c.len(), rows, ldc, &cols);
        Self::at(c.as_mut_ptr(), 0..rows, ldc, cols)
    }

    /// The band of rows `rows` and columns `cols` of the C at `ptr` (checked by the caller).
    fn at(ptr: *mut f32, rows: Range<usize>, ldc: usize, cols: Range<usize>) -> Band<'a> {
        Band {
            ptr,
            first_row: rows.start,
            rows: rows.len(),
            ldc,
            cols,
            _borrow: PhantomData,
        }
    }

    /// One band per range of `parts` (ascending, non-overlapping column ranges).
    ///
    /// # Panics
    /// If the ranges overlap, descend, or do not fit `c` (as [`Band::new`]).
    pub fn split(
        c: &'a mut [f32],
        rows: usize,
        ldc: usize,
        parts: &[Range<usize>],
    ) -> Vec<Band<'a>> {
        let mut end = 0;
        for r in parts {
            assert!(
                r.start >= end,
                "column ranges overlap or descend: {parts:?}"
            );
            Self::check(c.len(), rows, ldc, r);
            end = r.end;
        }
        let ptr = c.as_mut_ptr();
        parts
            .iter()
            .map(|r| Self::at(ptr, 0..rows, ldc, r.clone()))
            .collect()
    }

    /// Columns `cols` of each row range of `parts` (ascending, non-overlapping ranges inside
    /// `0..rows`): one band per range, for threads that share a GEMM by output rows. A range
    /// that starts inside a panel of the weights is refused by [`gemm_band`].
    ///
    /// # Panics
    /// If the ranges overlap, descend, or do not fit `c` (as [`Band::new`]).
    pub fn split_rows(
        c: &'a mut [f32],
        rows: usize,
        ldc: usize,
        cols: Range<usize>,
        parts: &[Range<usize>],
    ) -> Vec<Band<'a>> {
        Self::check(c.len(), rows, ldc, &cols);
        let mut end = 0;
        for r in parts {
            assert!(
                r.start >= end && r.start <= r.end && r.end <= rows,
                "row ranges overlap, descend or pass {rows} rows: {parts:?}"
            );
            end = r.end;
        }
        let ptr = c.as_mut_ptr();
        parts
            .iter()
            .map(|r| Self::at(ptr, r.clone(), ldc, cols.clone()))
            .collect()
    }

    fn check(len: usize, rows: usize, ldc: usize, cols: &Range<usize>) {
        assert!(
            cols.start <= cols.end && cols.end <= ldc,
            "columns {cols:?} outside a row of {ldc}"
        );
        if rows > 0 && !cols.is_empty() {
            let need = (rows - 1) * ldc + cols.end;
            assert!(len >= need, "C has {len} floats, needs {need}");
        }
    }

    pub fn cols(&self) -> Range<usize> {
        self.cols.clone()
    }

    /// The band's part of row `r` of C: columns `cols()` of it.
    ///
    /// # Panics
    /// If `r` is not one of the band's rows.
    pub fn row(&mut self, r: usize) -> &mut [f32] {
        assert!(
            (self.first_row..self.first_row + self.rows).contains(&r),
            "row {r} of a band of rows {}..{}",
            self.first_row,
            self.first_row + self.rows
        );
        // SAFETY: the band stands for `&mut` access to columns `cols` of its rows, all inside
        // the matrix (checked when it was made), and `&mut self` makes this slice the only
        // reference to them while it lives.
        unsafe {
            std::slice::from_raw_parts_mut(
                self.ptr.add(r * self.ldc + self.cols.start),
                self.cols.len(),
            )
        }
    }
}

/// Computes `C[m][n]` for all `m` in `0..M` and `n` in `cols` (a sub-range of `0..n_total`):
/// `C[m*ldc + n] = act(Σ_k A[m][k]·B[k][n] + bias[m] + residual[m*ldc + n])`.
///
/// Uses the instruction set `a` was packed for. See the module documentation for the
/// bitwise-invariance guarantee.
///
/// # Panics
/// If the operands are too short for the shapes (the caller validates shapes first).
#[allow(clippy::too_many_arguments)] // the API agreed with the executor
pub fn gemm(
    a: &PackedWeights,
    b: &BSource<'_>,
    n_total: usize,
    cols: Range<usize>,
    c: &mut [f32],
    ldc: usize,
    epi: &Epilogue<'_>,
    scratch: &mut GemmScratch,
) {
    let band = Band::new(c, a.m, ldc, cols);
    gemm_band(a, b, n_total, band, epi, scratch);
}

/// [`gemm`] into one band of C: its rows (weight rows, the band starting at a whole panel of
/// them) and its columns `c.cols()` (a sub-range of `0..n_total`). Bands of one C computed
/// apart hold the same bits as one call over all of it.
///
/// # Panics
/// If the band's rows pass the weights' rows or start inside a panel, or the operands are too
/// short for the shapes (the caller validates shapes first).
pub fn gemm_band(
    a: &PackedWeights,
    b: &BSource<'_>,
    n_total: usize,
    c: Band<'_>,
    epi: &Epilogue<'_>,
    scratch: &mut GemmScratch,
) {
    let k = a.k;
    let cols = c.cols.clone();
    let ldc = c.ldc;
    assert!(
        cols.start <= cols.end && cols.end <= n_total,
        "columns {cols:?} outside 0..{n_total}"
    );
    let (first, m) = (c.first_row, c.rows);
    assert!(
        first + m <= a.m,
        "rows {first}..{} outside the weights' {}",
        first + m,
        a.m
    );
    if m == 0 || cols.is_empty() {
        return;
    }
    let mr = mr_of(a.machine);
    assert!(
        first % mr == 0,
        "a band of rows starts at {first}, inside a panel of {mr} weight rows"
    );
    let c_len = (first + m - 1) * ldc + cols.end;
    if let Some(r) = epi.residual {
        assert!(
            r.len() >= c_len,
            "residual has {} floats, needs {c_len}",
            r.len()
        );
    }
    if let Some(bias) = epi.bias {
        assert!(
            bias.len() >= first + m,
            "bias has {} values, needs {}",
            bias.len(),
            first + m
        );
    }
    check_b(b, k, n_total);

    // The band's rows as a GEMM of their own: its weight panels, and C, residual and bias
    // from its first row (all inside their arrays: checked above and when the band was made).
    let out = Out {
        c: c.ptr.wrapping_add(first * ldc),
        ldc,
        bias: epi.bias.map_or(std::ptr::null(), |b| b[first..].as_ptr()),
        residual: epi
            .residual
            .map_or(std::ptr::null(), |r| r[first * ldc..].as_ptr()),
        act: if epi.act.is_cheap() {
            epi.act
        } else {
            Activation::Identity
        },
    };
    let job = Job {
        a: PanelRows {
            data: &a.data[first * k..],
            m,
            k,
        },
        b,
        cols,
        out,
        act: epi.act,
    };
    use shape::*;
    match a.machine {
        Machine::Scalar(s) => {
            // SAFETY: the band (checked when made) holds every C element the job writes, and
            // no other band of C overlaps it; the asserts above bound every residual and bias
            // element the job reads; packed buffers are sized by this module.
            unsafe { run::<Scalar, SCALAR_MR, SCALAR_NV, 1, 0>(s, &job, scratch) }
        }
        #[cfg(target_arch = "x86_64")]
        Machine::Avx2(s) => {
            // SAFETY: as above; the token proves the CPU runs the wrapper's target features.
            unsafe { run_avx2(s, &job, scratch) }
        }
        #[cfg(target_arch = "x86_64")]
        Machine::Avx512(s) => {
            // SAFETY: as above; the token proves the CPU runs the wrapper's target features.
            unsafe { run_avx512(s, &job, scratch) }
        }
        #[cfg(target_arch = "aarch64")]
        Machine::Neon(s) => {
            // SAFETY: as above; the token proves the CPU runs the wrapper's target features.
            unsafe { run_neon(s, &job, scratch) }
        }
    }
}

/// Checks that B holds every element the shapes promise.
fn check_b(b: &BSource<'_>, k: usize, n_total: usize) {
    if k == 0 || n_total == 0 {
        return;
    }
    match *b {
        BSource::Matrix { data, ld } => {
            assert!(ld >= n_total, "B row stride {ld} < N {n_total}");
            assert!(
                data.len() >= (k - 1) * ld + n_total,
                "B is shorter than K x N"
            );
        }
        BSource::MatrixT { data, ld } => {
            assert!(ld >= k, "Bᵀ row stride {ld} < K {k}");
            assert!(
                data.len() >= (n_total - 1) * ld + k,
                "Bᵀ is shorter than N x K"
            );
        }
        BSource::Im2col { input, geom, c0 } => {
            let taps = geom.kh * geom.kw;
            assert!(
                k.checked_rem(taps) == Some(0),
                "K {k} is not channels x {taps} taps"
            );
            assert!(geom.stride_h > 0 && geom.stride_w > 0, "zero stride");
            assert_eq!(n_total, geom.out_h * geom.out_w, "N is not out_h x out_w");
            let need = (c0 + k / taps) * geom.in_h * geom.in_w;
            assert!(
                input.len() >= need,
                "input has {} floats, needs {need}",
                input.len()
            );
        }
    }
}

/// Consecutive weight panels of [`PackedWeights`]: rows `m` of them, from the first panel's
/// first row, then the panels after them and the padding (the row-vectorised kernel may read
/// past the last panel).
struct PanelRows<'j> {
    data: &'j [f32],
    m: usize,
    k: usize,
}

/// One call's operands, checked.
struct Job<'j, 'b> {
    a: PanelRows<'j>,
    b: &'j BSource<'b>,
    cols: Range<usize>,
    out: Out,
    act: Activation,
}

#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx2,fma")]
unsafe fn run_avx2(s: super::simd::Avx2, job: &Job<'_, '_>, scratch: &mut GemmScratch) {
    use shape::*;
    // SAFETY: forwarded from the caller.
    unsafe { run::<_, AVX2_MR, AVX2_NV, AVX2_VM, AVX2_SMALL>(s, job, scratch) }
}

#[cfg(target_arch = "x86_64")]
#[target_feature(enable = "avx512f,avx2,fma")]
unsafe fn run_avx512(s: super::simd::Avx512, job: &Job<'_, '_>, scratch: &mut GemmScratch) {
    use shape::*;
    // SAFETY: forwarded from the caller.
    unsafe { run::<_, AVX512_MR, AVX512_NV, AVX512_VM, AVX512_SMALL>(s, job, scratch) }
}

#[cfg(target_arch = "aarch64")]
#[target_feature(enable = "neon")]
unsafe fn run_neon(s: super::simd::Neon, job: &Job<'_, '_>, scratch: &mut GemmScratch) {
    use shape::*;
    // SAFETY: forwarded from the caller.
    unsafe { run::<_, NEON_MR, NEON_NV, NEON_VM, NEON_SMALL>(s, job, scratch) }
}

/// The one generic body, inlined into each instruction set's wrapper.
///
/// # Safety
/// `job.out` must be valid for every element of rows `0..M`, columns `job.cols` (and the
/// bias for rows `0..M`); the weights must have been packed with row panels of `MR`.
#[inline(always)]
unsafe fn run<S: Simd, const MR: usize, const NV: usize, const VM: usize, const SMALL: usize>(
    s: S,
    job: &Job<'_, '_>,
    scratch: &mut GemmScratch,
) {
    if let BSource::Im2col { input, geom, c0 } = *job.b {
        let channels = job.a.k / (geom.kh * geom.kw);
        let lay = direct::Layout::new(&geom, channels, S::FAST_MASKED_LOAD);
        let take = match scratch.algo {
            Im2colAlgo::Auto => lay.pays_off(&geom, channels, (job.a.m, S::LANES)),
            Im2colAlgo::Packed => false,
            Im2colAlgo::Direct => true,
        };
        if take {
            // SAFETY: forwarded from the caller.
            unsafe { direct::run::<S, MR, NV>(s, job, (input, &geom, c0), &lay, scratch) };
            return;
        }
    }
    let (m, k) = (job.a.m, job.a.k);
    let lanes = S::LANES;
    let nc = block_cols(k, NV * lanes);
    // A plain matrix's full-width panels are read where they lie (one row of the panel per
    // step, `ld` apart) rather than copied into the block first: the microkernel reads them
    // the same number of times either way, and the copy was pure overhead. Ragged panels are
    // packed, since their whole-vector loads would pass the matrix's last row.
    let in_place = match *job.b {
        BSource::Matrix { data, ld } => Some((data.as_ptr(), ld)),
        _ => None,
    };
    let a_stride = k * MR;
    let a_panels = m.div_ceil(MR);
    let a_base = job.a.data.as_ptr();
    let out = &job.out;
    let mut n0 = job.cols.start;
    while n0 < job.cols.end {
        // A remainder narrower than one panel joins this block rather than making a block
        // of its own, which would stream every weight panel again for a few columns.
        let left = job.cols.end - n0;
        let nb = if left < nc + NV * lanes { left } else { nc };
        let total = plan_block((n0, nb), (lanes, NV, SMALL), k, &mut scratch.panels);
        let buf = scratch.buf.get(total);
        // Pack the whole block, then let each A panel (kept in L1, where the kernel's
        // broadcasts read it) meet every B panel (streamed from L2 by full-vector loads).
        // Multiplying each B panel right after packing it, with A re-read from L2, measured
        // slower on every shape of the benchmark.
        for p in &scratch.panels {
            if in_place.is_some() && p.nv == NV {
                continue;
            }
            let len = k * p.width(lanes);
            let dst = &mut buf[p.offset..][..len];
            pack::pack_b(
                job.b,
                k,
                p.n0,
                p.cols,
                p.width(lanes),
                &mut scratch.ops,
                dst,
            );
        }
        let b_base = buf.as_mut_ptr().cast_const();
        let a = (a_base, a_stride, m, k);
        for panels in a_blocks(a_panels, k * MR, kernel::SMALL_PANELS) {
            for ap in panels.clone() {
                for p in scratch.panels.iter().filter(|p| p.nv > 0) {
                    let b = match in_place {
                        Some((data, ld)) if p.nv == NV => (data.wrapping_add(p.n0), ld),
                        _ => (b_base.wrapping_add(p.offset), p.width(lanes)),
                    };
                    // SAFETY: `ap` is a panel of the packed weights; B is the packed panel,
                    // or full-width columns of a matrix `check_b` bounded.
                    unsafe { tile_at::<S, MR, NV>(s, a, ap, b, p, out) };
                }
            }
            if let Some(p) = scratch.panels.iter().find(|p| p.nv == 0) {
                // SAFETY: as above; the weights carry A_PAD floats of padding for the narrow
                // vectors' over-read.
                unsafe {
                    kernel::run_small::<S::Narrow, MR, VM>(
                        s.narrow(),
                        (a_base, a_stride, panels, m),
                        k,
                        b_base.add(p.offset),
                        (p.n0, p.cols),
                        out,
                    );
                }
            }
        }
        if !job.act.is_cheap() {
            for row in 0..m {
                // SAFETY: row `row`, columns n0..n0+nb are inside C (caller), and no other
                // reference to C is live.
                let seg =
                    unsafe { std::slice::from_raw_parts_mut(out.c.add(row * out.ldc + n0), nb) };
                vmath::apply_slice(s, job.act, seg);
            }
        }
        n0 += nb;
    }
}

/// The weight panels in blocks that stay in L2 while every column tile of a call meets them
/// (one block when all fit), so that large weights come from memory once per call rather
/// than once per tile. Blocks are whole groups of `group` panels: the packed route passes the
/// row-vectorised kernel's ([`kernel::SMALL_PANELS`]), which runs a lone panel on a single
/// chain of FMAs; the direct route, which has no such kernel, passes 1.
fn a_blocks(
    panels: usize,
    panel_floats: usize,
    group: usize,
) -> impl Iterator<Item = Range<usize>> {
    let block = (shape::A_BLOCK_FLOATS / panel_floats.max(1))
        .next_multiple_of(group)
        .max(group);
    (0..panels)
        .step_by(block)
        .map(move |first| first..panels.min(first + block))
}

/// Multiplies B panel `p` (`b`: its first step and the floats between steps) by A panel `ap`
/// into C.
///
/// # Safety
/// `ap` is a panel of the weights at `a_base`; `b` is readable for the panel's width at each
/// of the `k` steps; the tile's rows and columns are inside C (as [`run`]).
#[inline(always)]
unsafe fn tile_at<S: Simd, const MR: usize, const NV: usize>(
    s: S,
    (a_base, a_stride, m, k): (*const f32, usize, usize, usize),
    ap: usize,
    b: (*const f32, usize),
    p: &Panel,
    out: &Out,
) {
    let rows = (ap * MR, MR.min(m - ap * MR));
    let cols = (p.n0, p.cols);
    // SAFETY: guaranteed by the caller.
    unsafe {
        let a_ptr = a_base.add(ap * a_stride);
        macro_rules! tile_nv {
            ($nv:literal) => {{
                let acc = kernel::tile::<S, MR, $nv>(s, k, a_ptr, b);
                kernel::store_tile::<S, MR, $nv>(s, &acc, out, rows, cols);
            }};
        }
        match p.nv {
            1 => tile_nv!(1),
            2 if NV >= 2 => tile_nv!(2),
            3 if NV >= 3 => tile_nv!(3),
            _ if NV >= 4 => tile_nv!(4),
            // plan_block never makes a panel wider than NV vectors.
            _ => {}
        }
    }
}
