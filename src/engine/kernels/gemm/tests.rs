//! GEMM tests: against a naive f64 reference on many shapes and every B source, on every
//! instruction set, plus the bitwise batch-invariance contract.
//!
//! Tolerance: a length-n inner product evaluated by recursive summation (with or without
//! fused multiply-add) satisfies |fl(s) - s| <= γ_n Σ|x_i y_i| with γ_n = n·u / (1 - n·u) and
//! u = 2^-24 (Higham, Accuracy and Stability of Numerical Algorithms, 2nd ed. 2002, §3.1,
//! eq. 3.5). The bias and residual are two more terms, so n = K + 2; the f64 reference itself is
//! exact to far below that. Activations used here are 1-Lipschitz or close (hard swish: 1.5),
//! and add one rounding of their own.
//!
//! Beyond the tolerance, every element must equal, bit for bit, the contract's own sequence
//! (`fma` per k in order, then bias, residual, activation), emulated with `f32::mul_add`
//! (correctly rounded, IEEE 754-2008 fusedMultiplyAdd) or, on the scalar path, `a*b + acc`.

use super::*;
use crate::engine::kernels::testutil::{Rng, isas_under_test, simd_isas};

const SIZES: [usize; 13] = [1, 2, 3, 5, 7, 8, 13, 16, 17, 31, 33, 64, 100];

fn gamma(n: usize) -> f64 {
    let u = f64::powi(2.0, -24);
    n as f64 * u / (1.0 - n as f64 * u)
}

/// Dense `K x N` B as a plain matrix (row-major), from any source, straight from its definition.
fn dense_b(b: &BSource<'_>, k: usize, n: usize) -> Vec<f32> {
    let mut out = vec![0.0; k * n];
    for kk in 0..k {
        for nn in 0..n {
            out[kk * n + nn] = match *b {
                BSource::Matrix { data, ld } => data[kk * ld + nn],
                BSource::MatrixT { data, ld } => data[nn * ld + kk],
                BSource::Im2col { input, geom: g, c0 } => {
                    let taps = g.kh * g.kw;
                    let (c, i, j) = (c0 + kk / taps, (kk % taps) / g.kw, kk % g.kw);
                    let (oy, ox) = (nn / g.out_w, nn % g.out_w);
                    let iy = (oy * g.stride_h + i * g.dil_h) as isize - g.pad_top as isize;
                    let ix = (ox * g.stride_w + j * g.dil_w) as isize - g.pad_left as isize;
                    if iy < 0 || ix < 0 || iy >= g.in_h as isize || ix >= g.in_w as isize {
                        0.0
                    } else {
                        input[(c * g.in_h + iy as usize) * g.in_w + ix as usize]
                    }
                }
            };
        }
    }
    out
}

/// Checks `gemm` over `cols` against the f64 reference, on every im2col route.
#[allow(clippy::too_many_arguments)]
fn check(
    isa: Isa,
    a: &[f32],
    shape: (usize, usize, usize),
    b: &BSource<'_>,
    cols: Range<usize>,
    bias: Option<&[f32]>,
    residual: Option<&[f32]>,
    act: Activation,
    what: &str,
) {
    let algos: &[Im2colAlgo] = match b {
        BSource::Im2col { .. } => &[Im2colAlgo::Packed, Im2colAlgo::Direct, Im2colAlgo::Auto],
        _ => &[Im2colAlgo::Auto],
    };
    for &algo in algos {
        let what = format!("{what} {algo:?}");
        check_one(
            isa,
            a,
            shape,
            b,
            cols.clone(),
            bias,
            residual,
            act,
            &what,
            algo,
        );
    }
}

#[allow(clippy::too_many_arguments)]
fn check_one(
    isa: Isa,
    a: &[f32],
    (m, k, n): (usize, usize, usize),
    b: &BSource<'_>,
    cols: Range<usize>,
    bias: Option<&[f32]>,
    residual: Option<&[f32]>,
    act: Activation,
    what: &str,
    algo: Im2colAlgo,
) {
    let ldc = n + 3;
    let pw = PackedWeights::pack(isa, a, m, k);
    assert_eq!(pw.isa(), isa);
    let mut c = vec![f32::NAN; m * ldc];
    let epi = Epilogue {
        bias,
        residual,
        act,
    };
    gemm(
        &pw,
        b,
        n,
        cols.clone(),
        &mut c,
        ldc,
        &epi,
        &mut GemmScratch::with_im2col(algo),
    );
    let bd = dense_b(b, k, n);
    for mm in 0..m {
        for nn in 0..n {
            let got = c[mm * ldc + nn];
            if !cols.contains(&nn) {
                assert!(got.is_nan(), "{what}: wrote outside cols at ({mm}, {nn})");
                continue;
            }
            // The contract, emulated exactly: one rounding per fused step on SIMD paths.
            let mut acc = 0.0f32;
            for kk in 0..k {
                let (x, y) = (a[mm * k + kk], bd[kk * n + nn]);
                acc = if isa == Isa::Scalar {
                    x * y + acc
                } else {
                    x.mul_add(y, acc)
                };
            }
            if let Some(b) = bias {
                acc += b[mm];
            }
            if let Some(r) = residual {
                acc += r[mm * ldc + nn];
            }
            let exact = vmath::apply_one(isa, act, acc);
            assert_eq!(
                got.to_bits(),
                exact.to_bits(),
                "{what} {isa:?} ({mm},{nn}): not the contract's sequence"
            );
            let (mut s, mut mag) = (0.0f64, 0.0f64);
            for kk in 0..k {
                let t = f64::from(a[mm * k + kk]) * f64::from(bd[kk * n + nn]);
                s += t;
                mag += t.abs();
            }
            for extra in [bias.map(|b| b[mm]), residual.map(|r| r[mm * ldc + nn])]
                .into_iter()
                .flatten()
            {
                s += f64::from(extra);
                mag += f64::from(extra).abs();
            }
            let want = f64::from(act.apply(s as f32));
            let tol = 1.5 * gamma(k + 2) * mag + 2.0 * f64::EPSILON * want.abs() + 1e-30;
            let tol = tol
                + f64::from(f32::EPSILON) * want.abs()
                + vmath::error_bound(act, s as f32, want);
            assert!(
                (f64::from(got) - want).abs() <= tol,
                "{what} {isa:?} m={m} k={k} n={n} at ({mm},{nn}): got {got}, want {want}, tol {tol}"
            );
        }
    }
}

#[test]
fn matrix_sources_match_reference_on_all_shapes() {
    let acts = [
        Activation::Identity,
        Activation::Relu,
        Activation::Clip {
            min: -0.5,
            max: 0.5,
        },
        Activation::HardSwish,
        Activation::Gelu,
    ];
    let mut rng = Rng::new(1);
    for isa in isas_under_test() {
        let mut case = 0usize;
        for &m in &SIZES {
            for &k in &SIZES {
                for &n in &SIZES {
                    case += 1;
                    // Every shape with Matrix; the others and the extras on a rotating subset,
                    // which still covers every size in every role.
                    let a = rng.vec(m * k);
                    let ld = n + 2;
                    let bm = rng.vec(k * ld);
                    let with_bias = matches!(case % 2, 0);
                    let bias = rng.vec(m);
                    let res = rng.vec(m * (n + 3));
                    let act = acts[case % acts.len()];
                    let source = BSource::Matrix { data: &bm, ld };
                    check(
                        isa,
                        &a,
                        (m, k, n),
                        &source,
                        0..n,
                        with_bias.then_some(&bias[..]),
                        matches!(case % 3, 0).then_some(&res[..]),
                        act,
                        "matrix",
                    );
                    if case % 3 == 1 {
                        let ldt = k + 1;
                        let bt = rng.vec(n * ldt);
                        let source = BSource::MatrixT { data: &bt, ld: ldt };
                        let lo = n / 3;
                        check(
                            isa,
                            &a,
                            (m, k, n),
                            &source,
                            lo..n,
                            None,
                            None,
                            act,
                            "transposed",
                        );
                    }
                }
            }
        }
    }
}

/// A convolution case: channels, input size, kernel, stride, dilation, pads (top, bottom,
/// left, right).
struct Conv {
    c: usize,
    hw: (usize, usize),
    kernel: (usize, usize),
    stride: (usize, usize),
    dil: (usize, usize),
    pad: (usize, usize, usize, usize),
}

impl Conv {
    /// A 3×3 convolution at stride 1 with padding 1 (output as large as the input): `c`
    /// channels of `hw × hw`.
    fn same_3x3(c: usize, hw: usize) -> ConvGeom {
        Conv {
            c,
            hw: (hw, hw),
            kernel: (3, 3),
            stride: (1, 1),
            dil: (1, 1),
            pad: (1, 1, 1, 1),
        }
        .geom()
    }

    fn geom(&self) -> ConvGeom {
        let out = |size: usize, k: usize, s: usize, d: usize, p0: usize, p1: usize| {
            (size + p0 + p1 - d * (k - 1) - 1) / s + 1
        };
        ConvGeom {
            in_c: self.c,
            in_h: self.hw.0,
            in_w: self.hw.1,
            kh: self.kernel.0,
            kw: self.kernel.1,
            stride_h: self.stride.0,
            stride_w: self.stride.1,
            dil_h: self.dil.0,
            dil_w: self.dil.1,
            pad_top: self.pad.0,
            pad_left: self.pad.2,
            out_h: out(
                self.hw.0,
                self.kernel.0,
                self.stride.0,
                self.dil.0,
                self.pad.0,
                self.pad.1,
            ),
            out_w: out(
                self.hw.1,
                self.kernel.1,
                self.stride.1,
                self.dil.1,
                self.pad.2,
                self.pad.3,
            ),
        }
    }
}

fn conv_cases() -> Vec<Conv> {
    let c = |c, hw, kernel, stride, dil, pad| Conv {
        c,
        hw,
        kernel,
        stride,
        dil,
        pad,
    };
    vec![
        c(3, (5, 7), (3, 3), (1, 1), (1, 1), (1, 1, 1, 1)),
        c(4, (9, 8), (3, 3), (2, 2), (1, 1), (1, 1, 1, 1)),
        c(2, (8, 8), (3, 3), (1, 1), (2, 2), (2, 2, 2, 2)),
        c(3, (8, 10), (3, 3), (2, 2), (1, 1), (0, 1, 1, 0)), // asymmetric ("same", stride 2)
        c(2, (6, 11), (1, 5), (1, 1), (1, 1), (0, 0, 2, 2)),
        c(2, (11, 6), (5, 1), (1, 2), (1, 1), (2, 2, 0, 0)),
        c(5, (9, 9), (1, 1), (2, 2), (1, 1), (0, 0, 0, 0)), // strided 1x1 shortcut
        c(3, (16, 16), (7, 7), (2, 2), (1, 1), (3, 3, 3, 3)),
        c(2, (3, 3), (5, 5), (1, 1), (1, 1), (2, 2, 2, 2)), // kernel larger than input
        c(1, (32, 32), (3, 3), (1, 1), (1, 1), (1, 1, 1, 1)),
        c(16, (8, 8), (3, 3), (1, 1), (1, 1), (1, 1, 1, 1)),
        c(3, (7, 9), (2, 3), (3, 2), (2, 1), (1, 0, 2, 1)),
        c(3, (16, 16), (3, 3), (2, 2), (1, 1), (1, 1, 1, 1)), // ResNet-20's stage change
        c(2, (12, 12), (5, 5), (1, 1), (1, 1), (0, 0, 0, 0)), // unpadded: right edge waste
        c(8, (16, 20), (3, 3), (1, 1), (1, 1), (1, 1, 1, 1)), // the pitched direct layout
    ]
}

#[test]
fn im2col_source_matches_reference() {
    let mut rng = Rng::new(2);
    for isa in isas_under_test() {
        for (ci, conv) in conv_cases().iter().enumerate() {
            let g = conv.geom();
            // A group convolution's second group: channels c0.. of a larger input.
            let c0 = ci % 2;
            let input = rng.vec((c0 + g.in_c) * g.in_h * g.in_w);
            let k = g.in_c * g.kh * g.kw;
            let n = g.out_h * g.out_w;
            let source = BSource::Im2col {
                input: &input,
                geom: g,
                c0,
            };
            for m in [1, 6, 8, 17] {
                let a = rng.vec(m * k);
                let bias = rng.vec(m);
                check(
                    isa,
                    &a,
                    (m, k, n),
                    &source,
                    0..n,
                    Some(&bias),
                    None,
                    Activation::Relu,
                    "im2col",
                );
                let residual = rng.vec(m * (n + 3));
                check(
                    isa,
                    &a,
                    (m, k, n),
                    &source,
                    0..n,
                    Some(&bias),
                    Some(&residual),
                    Activation::Silu,
                    "im2col residual",
                );
                if n > 4 {
                    check(
                        isa,
                        &a,
                        (m, k, n),
                        &source,
                        3..n - 1,
                        None,
                        None,
                        Activation::Identity,
                        "im2col part",
                    );
                }
            }
        }
    }
}

/// Weights larger than one L2 block (`shape::A_BLOCK_FLOATS`) run a block of panels at a time
/// past every column tile: a ragged last panel, a block not a whole number of the
/// row-vectorised kernel's groups, and one- and two-column tails, on every route.
#[test]
fn weights_over_several_blocks_match_reference() {
    let mut rng = Rng::new(5);
    // 6 panels of 8 rows at most, the last ragged; k*8 floats per panel, so 4-panel blocks.
    let (m, channels) = (44, 256);
    let g = Conv::same_3x3(channels, 7);
    let k = channels * 9;
    assert!(8 * k * 2 < shape::A_BLOCK_FLOATS && 8 * k * 4 > shape::A_BLOCK_FLOATS);
    let a = rng.vec(m * k);
    let bias = rng.vec(m);
    let input = rng.vec(channels * 49);
    let matrices: Vec<(Vec<f32>, usize)> = [49, 50].map(|n| (rng.vec(k * n), n)).into();
    let mut sources = vec![(
        BSource::Im2col {
            input: &input,
            geom: g,
            c0: 0,
        },
        49,
    )];
    for (bm, n) in &matrices {
        sources.push((BSource::Matrix { data: bm, ld: *n }, *n));
    }
    for isa in isas_under_test() {
        for (source, n) in &sources {
            let (act, what) = (Activation::Relu, "weights over several blocks");
            check(
                isa,
                &a,
                (m, k, *n),
                source,
                0..*n,
                Some(&bias),
                None,
                act,
                what,
            );
        }
    }
}

#[test]
fn empty_and_degenerate_shapes() {
    for isa in isas_under_test() {
        // K = 0: the output is the epilogue of zero.
        let pw = PackedWeights::pack(isa, &[], 3, 0);
        let mut c = vec![9.0; 3 * 4];
        let bias = [1.0, -2.0, 3.0];
        let epi = Epilogue {
            bias: Some(&bias),
            residual: None,
            act: Activation::Relu,
        };
        let b = BSource::Matrix { data: &[], ld: 4 };
        gemm(&pw, &b, 4, 0..4, &mut c, 4, &epi, &mut GemmScratch::new());
        assert_eq!(
            c,
            [1.0, 1.0, 1.0, 1.0, 0.0, 0.0, 0.0, 0.0, 3.0, 3.0, 3.0, 3.0]
        );
        // Empty column range and M = 0 do nothing.
        gemm(&pw, &b, 4, 2..2, &mut c, 4, &epi, &mut GemmScratch::new());
        let none = PackedWeights::pack(isa, &[], 0, 5);
        gemm(
            &none,
            &b,
            4,
            0..4,
            &mut [],
            4,
            &epi,
            &mut GemmScratch::new(),
        );
    }
}

/// Computes the listed columns of `act(A·B + bias + residual)` where B is `data` embedded in a
/// wider matrix at columns `at..`, over column splits of width `split`.
#[allow(clippy::too_many_arguments)]
fn embedded_run(
    pw: &PackedWeights,
    cols_data: &[Vec<f32>],
    n_total: usize,
    at: usize,
    split: usize,
    transposed: bool,
    bias: &[f32],
    act: Activation,
    rng: &mut Rng,
) -> Vec<u32> {
    let (m, k) = (pw.m(), pw.k());
    // Filler columns are random: they must not influence the embedded ones.
    let mut bt: Vec<Vec<f32>> = (0..n_total).map(|_| rng.vec(k)).collect();
    for (i, col) in cols_data.iter().enumerate() {
        bt[at + i] = col.clone();
    }
    let (data, ld) = if transposed {
        (bt.concat(), k)
    } else {
        let mut d = vec![0.0; k * n_total];
        for (nn, col) in bt.iter().enumerate() {
            for (kk, &v) in col.iter().enumerate() {
                d[kk * n_total + nn] = v;
            }
        }
        (d, n_total)
    };
    let b = if transposed {
        BSource::MatrixT { data: &data, ld }
    } else {
        BSource::Matrix { data: &data, ld }
    };
    // The residual of the embedded columns is a fixed function of (m, column index).
    let ldc = n_total;
    let mut res = rng.vec(m * ldc);
    for mm in 0..m {
        for i in 0..cols_data.len() {
            res[mm * ldc + at + i] = ((mm * 7 + i * 3) % 11) as f32 * 0.125 - 0.6;
        }
    }
    let epi = Epilogue {
        bias: Some(bias),
        residual: Some(&res),
        act,
    };
    let mut c = vec![0.0; m * ldc];
    let mut scratch = GemmScratch::new();
    let mut start = 0;
    while start < n_total {
        let end = (start + split).min(n_total);
        gemm(pw, &b, n_total, start..end, &mut c, ldc, &epi, &mut scratch);
        start = end;
    }
    let mut bits = Vec::new();
    for mm in 0..m {
        for i in 0..cols_data.len() {
            bits.push(c[mm * ldc + at + i].to_bits());
        }
    }
    bits
}

#[test]
fn columns_are_bitwise_invariant_to_batch_position_and_split() {
    let mut rng = Rng::new(3);
    for act in [Activation::Relu, Activation::HardSwish, Activation::Silu] {
        for (m, k) in [(13, 37), (8, 144), (3, 5), (20, 1)] {
            let a = rng.vec(m * k);
            let bias = rng.vec(m);
            let data: Vec<Vec<f32>> = (0..3).map(|_| rng.vec(k)).collect();
            let mut per_isa = Vec::new();
            for isa in isas_under_test() {
                let pw = PackedWeights::pack(isa, &a, m, k);
                let mut reference = None;
                // (n_total, position, split, transposed)
                let layouts = [
                    (3, 0, 3, false),
                    (3, 0, 1, true),
                    (5, 2, 5, false),
                    (5, 1, 2, true),
                    (32, 0, 32, false),
                    (32, 17, 32, true),
                    (32, 29, 7, false),
                    (100, 45, 100, false),
                    (100, 97, 100, true),
                    (100, 60, 17, false),
                    (100, 10, 9, true),
                    (100, 33, 48, false),
                ];
                for (n_total, at, split, transposed) in layouts {
                    let bits = embedded_run(
                        &pw, &data, n_total, at, split, transposed, &bias, act, &mut rng,
                    );
                    match &reference {
                        None => reference = Some(bits),
                        Some(r) => assert_eq!(
                            r, &bits,
                            "{isa:?} {act:?} m={m} k={k}: N={n_total} at {at} split {split}"
                        ),
                    }
                }
                per_isa.push((isa, reference.expect("layouts is not empty")));
            }
            // SIMD paths all fuse multiply-add: they agree bitwise with each other.
            let simd: Vec<_> = per_isa
                .iter()
                .filter(|(i, _)| simd_isas().contains(i))
                .collect();
            for pair in simd.windows(2) {
                assert_eq!(pair[0].1, pair[1].1, "{:?} vs {:?}", pair[0].0, pair[1].0);
            }
        }
    }
}

#[test]
fn simd_paths_agree_bitwise_on_convolutions() {
    let isas = simd_isas();
    if isas.len() < 2 {
        return;
    }
    let mut rng = Rng::new(4);
    for conv in conv_cases() {
        let g = conv.geom();
        let input = rng.vec(g.in_c * g.in_h * g.in_w);
        let (k, n, m) = (g.in_c * g.kh * g.kw, g.out_h * g.out_w, 19);
        let a = rng.vec(m * k);
        let bias = rng.vec(m);
        let b = BSource::Im2col {
            input: &input,
            geom: g,
            c0: 0,
        };
        let epi = Epilogue {
            bias: Some(&bias),
            residual: None,
            act: Activation::GeluTanh,
        };
        let results: Vec<Vec<u32>> = isas
            .iter()
            .map(|&isa| {
                let pw = PackedWeights::pack(isa, &a, m, k);
                let mut c = vec![0.0; m * n];
                gemm(&pw, &b, n, 0..n, &mut c, n, &epi, &mut GemmScratch::new());
                c.iter().map(|x| x.to_bits()).collect()
            })
            .collect();
        for r in &results[1..] {
            assert_eq!(&results[0], r);
        }
    }
}

#[test]
fn scratch_stops_allocating() {
    let mut rng = Rng::new(5);
    let g = Conv::same_3x3(16, 32);
    let input = rng.vec(16 * 32 * 32);
    for isa in isas_under_test() {
        let (m, k, n) = (16, 144, 1024);
        let pw = PackedWeights::pack(isa, &rng.vec(m * k), m, k);
        let bm = rng.vec(k * n);
        let sources = [
            BSource::Matrix { data: &bm, ld: n },
            BSource::Im2col {
                input: &input,
                geom: g,
                c0: 0,
            },
        ];
        let mut c = vec![0.0; m * n];
        let mut scratch = GemmScratch::new();
        let epi = Epilogue::default();
        let ranges = [0..n, 0..7, 500..1000, 3..4];
        // Warm up on every shape of the steady state...
        for cols in ranges.clone() {
            for b in &sources {
                gemm(&pw, b, n, cols.clone(), &mut c, n, &epi, &mut scratch);
            }
        }
        // ...after which nothing grows.
        let state = |s: &mut GemmScratch| (s.buf_ptr(), s.panels.capacity(), s.ops.capacity());
        let before = state(&mut scratch);
        for cols in ranges {
            for b in &sources {
                gemm(&pw, b, n, cols.clone(), &mut c, n, &epi, &mut scratch);
                assert_eq!(state(&mut scratch), before);
            }
        }
    }
}

impl GemmScratch {
    fn buf_ptr(&mut self) -> *const f32 {
        self.buf.get(0).as_ptr()
    }
}

#[test]
fn block_plan_covers_columns_once() {
    let mut panels = Vec::new();
    // AVX-512 shape: 16 lanes, 3 vectors, tails up to 7 go to the row-vectorised kernel.
    for (n0, nb) in [(0, 100), (5, 48), (0, 1), (3, 23), (0, 57), (10, 64)] {
        let total = plan_block((n0, nb), (16, 3, 7), 10, &mut panels);
        let mut next = n0;
        let mut offset = 0;
        for p in &panels {
            assert_eq!(p.n0, next);
            assert_eq!(p.offset, offset);
            assert!(p.nv <= 3 && p.cols <= p.width(16));
            next += p.cols;
            offset += 10 * p.width(16);
        }
        assert_eq!(next, n0 + nb);
        assert_eq!(total, offset);
    }
    plan_block((0, 100), (16, 3, 7), 1, &mut panels);
    let shapes: Vec<_> = panels.iter().map(|p| (p.cols, p.nv)).collect();
    assert_eq!(shapes, [(48, 3), (48, 3), (4, 0)]);
    plan_block((0, 60), (16, 3, 7), 1, &mut panels);
    let shapes: Vec<_> = panels.iter().map(|p| (p.cols, p.nv)).collect();
    assert_eq!(shapes, [(48, 3), (12, 1)]);
}

#[test]
fn im2col_program_writes_every_packed_cell_once() {
    let mut ops = Vec::new();
    for conv in conv_cases() {
        let g = conv.geom();
        let n = g.out_h * g.out_w;
        let taps = g.kh * g.kw;
        for (n0, cols, width) in [
            (0, n.min(48), 48),
            (n / 2, (n - n / 2).min(17), 32),
            (n - 1, 1, 1),
        ] {
            pack::compile_im2col(&g, n0, cols, width, &mut ops);
            let mut hits = vec![0u32; taps * width];
            for op in &ops {
                for c in op.at..op.at + op.len {
                    hits[op.row * width + c] += 1;
                }
            }
            assert!(
                hits.iter().all(|&h| h == 1),
                "{g:?} n0={n0} cols={cols}: {hits:?}"
            );
        }
    }
}

#[test]
fn packed_operands_are_shareable_across_threads() {
    fn shareable<T: Send + Sync>() {}
    shareable::<PackedWeights>();
    shareable::<crate::engine::kernels::depthwise::PackedDepthwise>();
    fn sendable<T: Send>() {}
    sendable::<GemmScratch>();
}

#[test]
fn direct_layout_choice() {
    // (channels, size, kernel, stride, pad) -> (pitched layout, direct by default). The rules
    // (`gemm/direct.rs`): the pitched layout where at most 1/16 of its columns are padding
    // and there are 8 channels or more; else planes, direct when they copy at most 3/4 of the
    // rows the packed route copies per kernel column (`kh * out_h`): at most 2/3.
    let cases = [
        (3, 32, 3, 1, 1, false, true), // pitch 33 but 3 channels; planes: 34 rows against 96
        (16, 32, 3, 1, 1, true, true), // pitch 33 for 32 outputs
        (32, 16, 3, 1, 1, true, true), // pitch 17 for 16
        (64, 8, 3, 1, 1, false, true), // pitch 9 for 8; planes: 10 rows against 24
        (16, 32, 3, 2, 1, true, true), // pitch 17 for 16 (2 column phases of 17)
        (32, 16, 3, 2, 1, false, false), // pitch 9 for 8; planes: 2 phases x 9 rows against 24
        (6, 14, 5, 1, 0, false, true), // pitch 14 for 10; planes: 14 rows against 50
        (5, 9, 1, 2, 0, false, false), // strided 1x1: the same rows either way
        (3, 11, 3, 3, 0, false, false), // stride 3 = kernel: 3 phases x 3 rows against 9
    ];
    for (c, hw, k, s, p, pitched, direct) in cases {
        let g = Conv {
            c,
            hw: (hw, hw),
            kernel: (k, k),
            stride: (s, s),
            dil: (1, 1),
            pad: (p, p, p, p),
        }
        .geom();
        let lay = direct::Layout::new(&g, c, false);
        assert_eq!(matches!(lay, direct::Layout::Pitched(_)), pitched, "{g:?}");
        assert_eq!(lay.pays_off(&g, c, (c, 16)), direct, "{g:?}");
    }
}

#[test]
fn direct_rows_layout_where_masked_loads_are_fast() {
    // The rows layout (`gemm/direct/rows.rs`) needs stride 1 and outputs as wide as the
    // input; elsewhere the choice is the one of `direct_layout_choice`.
    let cases = [
        (3, 32, 3, 1, 1, true),   // the ResNet-20 stem
        (64, 8, 3, 1, 1, true),   // its 8x8 stage
        (512, 7, 3, 1, 1, true),  // ResNet-18's last stage: 49 of 64 lanes, so packed
        (256, 14, 3, 1, 1, true), // and its 14x14 one: 196 of 208
        (2, 12, 5, 1, 0, false),  // unpadded: outputs narrower than the input
        (16, 32, 3, 2, 1, false), // strided
    ];
    for (c, hw, k, s, p, rows) in cases {
        let g = Conv {
            c,
            hw: (hw, hw),
            kernel: (k, k),
            stride: (s, s),
            dil: (1, 1),
            pad: (p, p, p, p),
        }
        .geom();
        let lay = direct::Layout::new(&g, c, true);
        assert_eq!(matches!(lay, direct::Layout::Rows(_)), rows, "{g:?}");
        if rows {
            // More than an eighth of 16-lane vectors left empty, with rows enough: the
            // packed route.
            assert_eq!(lay.pays_off(&g, c, (c, 16)), hw != 7, "{g:?}");
            assert!(lay.pays_off(&g, c, (8, 16)), "{g:?}");
        } else {
            assert_eq!(lay, direct::Layout::new(&g, c, false), "{g:?}");
        }
    }
}

#[test]
fn direct_prepare_matches_the_definition() {
    // Every offset + linear index of a kept output must read exactly B[k][n] (dense_b, the
    // definition from the BSource docs).
    let mut rng = Rng::new(6);
    for conv in conv_cases() {
        let g = conv.geom();
        let c0 = 1;
        let input = rng.vec((c0 + g.in_c) * g.in_h * g.in_w);
        let layouts = [
            direct::Layout::Pitched(direct::pitched::Pitched::new(&g)),
            direct::Layout::Planes(direct::Planes::new(&g)),
        ]
        .into_iter()
        .chain(direct::rows::Rows::new(&g).map(direct::Layout::Rows));
        for lay in layouts {
            let mut buf = vec![f32::NAN; lay.buffer_len(g.in_c)];
            lay.prepare(&input, &g, c0, g.in_c, &mut buf);
            let mut offs = Vec::new();
            lay.offsets(&g, g.in_c, &mut offs);
            let (k, n) = (g.in_c * g.kh * g.kw, g.out_h * g.out_w);
            let bd = dense_b(
                &BSource::Im2col {
                    input: &input,
                    geom: g,
                    c0,
                },
                k,
                n,
            );
            for kk in 0..k {
                for nn in 0..n {
                    let got = if lay.reads(&g, kk, nn) {
                        buf[offs[kk] as usize + lay.lin(&g, nn)]
                    } else {
                        0.0
                    };
                    assert_eq!(
                        got.to_bits(),
                        bd[kk * n + nn].to_bits(),
                        "{lay:?} {g:?} k={kk} n={nn}"
                    );
                }
            }
            assert!(
                buf.iter().all(|x| !x.is_nan()),
                "{lay:?} {g:?}: a cell left unwritten"
            );
        }
    }
}

/// Bands of rows computed apart (as threads share a small-plane GEMM) hold the same bits as
/// one call over every row: for matrix and convolution sources, with bias, residual and an
/// activation applied after the tile (SiLU) or in it (ReLU), on every instruction set. A band
/// that starts inside a weight panel is refused.
#[test]
fn row_bands_match_one_call_bitwise() {
    let mut rng = Rng::new(4);
    let g = conv_cases()[10].geom(); // 16 channels, 3x3 at 8x8
    for isa in isas_under_test() {
        for m in [8, 17, 40] {
            for act in [Activation::Relu, Activation::Silu] {
                for im2col in [false, true] {
                    let (k, n) = if im2col {
                        (g.in_c * 9, g.out_h * g.out_w)
                    } else {
                        (37, 49)
                    };
                    let a = rng.vec(m * k);
                    let pw = PackedWeights::pack(isa, &a, m, k);
                    let data = rng.vec(if im2col {
                        g.in_c * g.in_h * g.in_w
                    } else {
                        k * n
                    });
                    let b = if im2col {
                        BSource::Im2col {
                            input: &data,
                            geom: g,
                            c0: 0,
                        }
                    } else {
                        BSource::Matrix { data: &data, ld: n }
                    };
                    let bias = rng.vec(m);
                    let residual = rng.vec(m * n);
                    let epi = Epilogue {
                        bias: Some(&bias),
                        residual: Some(&residual),
                        act,
                    };
                    let mut whole = vec![0.0; m * n];
                    let mut scratch = GemmScratch::new();
                    gemm(&pw, &b, n, 0..n, &mut whole, n, &epi, &mut scratch);
                    let step = pw.panel_rows();
                    let mut banded = vec![f32::NAN; m * n];
                    let cut = (m / 2).next_multiple_of(step).min(m);
                    for band in Band::split_rows(&mut banded, m, n, 0..n, &[0..cut, cut..m]) {
                        gemm_band(&pw, &b, n, band, &epi, &mut scratch);
                    }
                    let bits = |v: &[f32]| v.iter().map(|x| x.to_bits()).collect::<Vec<_>>();
                    assert_eq!(
                        bits(&banded),
                        bits(&whole),
                        "{isa:?} m={m} {act:?} im2col={im2col} cut at {cut}"
                    );
                }
            }
        }
        {
            let pw = PackedWeights::pack(isa, &[0.0; 16 * 4], 16, 4);
            let b = [0.0; 4 * 3];
            let mut c = [0.0; 16 * 3];
            let bands = Band::split_rows(&mut c, 16, 3, 0..3, &[0..1, 1..16]);
            let inside = std::panic::catch_unwind(std::panic::AssertUnwindSafe(|| {
                for band in bands {
                    let src = BSource::Matrix { data: &b, ld: 3 };
                    gemm_band(
                        &pw,
                        &src,
                        3,
                        band,
                        &Epilogue::default(),
                        &mut GemmScratch::new(),
                    );
                }
            }));
            assert!(inside.is_err(), "{isa:?}: a band starting at row 1 runs");
        }
    }
}
