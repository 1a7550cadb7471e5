//! F(4×4, 3×3) against a double-precision direct convolution (the definition), on every
//! instruction set, and its invariances.

use super::*;
use crate::engine::kernels::activation::Activation;
use crate::engine::kernels::testutil::{Rng, isas_under_test, simd_isas};

/// Input channels, output channels, input height and width, padding (top, bottom, left,
/// right): odd sizes leave partial tiles on both edges, pads 0 to 2 cover the border patches.
const CASES: [(usize, usize, usize, usize, [usize; 4]); 7] = [
    (1, 1, 6, 6, [0; 4]),
    (3, 5, 9, 7, [1; 4]),
    (8, 16, 13, 11, [1, 1, 1, 1]),
    (16, 8, 8, 8, [2, 0, 0, 2]),
    (32, 24, 17, 5, [1, 2, 2, 1]),
    (64, 64, 14, 14, [1; 4]),
    (256, 16, 7, 7, [1; 4]),
];

fn geom((in_c, _, h, w, p): (usize, usize, usize, usize, [usize; 4])) -> ConvGeom {
    ConvGeom {
        in_c,
        in_h: h,
        in_w: w,
        kh: 3,
        kw: 3,
        stride_h: 1,
        stride_w: 1,
        dil_h: 1,
        dil_w: 1,
        pad_top: p[0],
        pad_left: p[2],
        out_h: h + p[0] + p[1] - 2,
        out_w: w + p[2] + p[3] - 2,
    }
}

struct Data {
    g: ConvGeom,
    out_c: usize,
    w: Vec<f32>,
    x: Vec<f32>,
    bias: Vec<f32>,
    residual: Vec<f32>,
}

fn data(case: (usize, usize, usize, usize, [usize; 4]), seed: u64) -> Data {
    let g = geom(case);
    let out_c = case.1;
    let mut rng = Rng::new(seed);
    Data {
        w: rng.vec(out_c * g.in_c * 9),
        x: rng.vec(g.in_c * g.in_h * g.in_w),
        bias: rng.vec(out_c),
        residual: rng.vec(out_c * g.out_h * g.out_w),
        g,
        out_c,
    }
}

impl Data {
    /// Every output in double precision, with `Σ|terms|` beside it.
    fn reference(&self) -> Vec<(f64, f64)> {
        let g = &self.g;
        let mut out = Vec::new();
        for m in 0..self.out_c {
            for oy in 0..g.out_h {
                for ox in 0..g.out_w {
                    let (mut acc, mut mag) =
                        (f64::from(self.bias[m]), f64::from(self.bias[m]).abs());
                    for c in 0..g.in_c {
                        for i in 0..3 {
                            for j in 0..3 {
                                let y = (oy + i) as isize - g.pad_top as isize;
                                let x = (ox + j) as isize - g.pad_left as isize;
                                if y < 0 || x < 0 || y as usize >= g.in_h || x as usize >= g.in_w {
                                    continue;
                                }
                                let t = f64::from(self.w[((m * g.in_c + c) * 3 + i) * 3 + j])
                                    * f64::from(
                                        self.x[(c * g.in_h + y as usize) * g.in_w + x as usize],
                                    );
                                acc += t;
                                mag += t.abs();
                            }
                        }
                    }
                    let r = f64::from(self.residual[(m * g.out_h + oy) * g.out_w + ox]);
                    out.push((acc + r, mag + r.abs()));
                }
            }
        }
        out
    }

    /// The kernel's output, the plane cut into bands of `rows_per_band` rows of tiles.
    fn run(&self, isa: Isa, rows_per_band: usize, act: Activation) -> Vec<f32> {
        let g = &self.g;
        let w = WinogradWeights::pack(isa, &self.w, self.out_c, g.in_c);
        let n = g.out_h * g.out_w;
        let mut out = vec![f32::NAN; self.out_c * n];
        let epi = Epilogue {
            bias: Some(&self.bias),
            residual: Some(&self.residual),
            act,
        };
        let step = rows_per_band.saturating_mul(TILE * g.out_w).min(n);
        let ranges: Vec<_> = (0..n).step_by(step).map(|s| s..(s + step).min(n)).collect();
        let mut buf = AlignedBuf::default();
        let mut scratch = GemmScratch::new();
        for band in Band::split(&mut out, self.out_c, n, &ranges) {
            conv_band(&w, g, &self.x, band, &epi, (&mut buf, &mut scratch));
        }
        out
    }
}

/// The direct sum's error bound `γ_n Σ|terms|` (Higham, Accuracy and Stability of Numerical
/// Algorithms, 2002, §3.1) times a factor for the transforms. Error analyses of Winograd
/// convolution (Barabasz, Anderson, Soodhalter & Gregg, ACM TOMS 46(4), 2020; from memory)
/// bound its error by the direct one scaled by constants of the transform matrices. On these
/// cases the error stayed under the direct bound itself (largest ratio 0.85 scalar, 0.43 AVX2,
/// printed by the test); 4 leaves room without hiding a wrong transform, which is off by
/// orders of magnitude.
const TRANSFORM_FACTOR: f64 = 4.0;

#[test]
fn matches_a_double_precision_direct_convolution() {
    for isa in isas_under_test() {
        let mut worst: f64 = 0.0;
        for (i, &case) in CASES.iter().enumerate() {
            let d = data(case, 11 + i as u64);
            let got = d.run(isa, usize::MAX, Activation::Identity);
            let n = (d.g.in_c * 9 + 2) as f64;
            let gamma = n * f64::from(f32::EPSILON) / 2.0;
            for (k, (&y, &(want, mag))) in got.iter().zip(&d.reference()).enumerate() {
                let err = (f64::from(y) - want).abs();
                let bound = gamma * mag;
                worst = worst.max(err / bound);
                assert!(
                    err <= TRANSFORM_FACTOR * bound,
                    "{isa:?} case {case:?} output {k}: {y} vs {want} (error {err:e}, bound {bound:e})"
                );
            }
        }
        eprintln!("{isa:?}: largest error / direct bound {worst:.2}");
    }
}

/// Bands of any number of tile rows hold the same bits as the whole plane in one call (what
/// makes the result independent of the thread count), and the SIMD paths agree bitwise.
#[test]
fn bands_and_instruction_sets_agree_bitwise() {
    let bits = |v: Vec<f32>| v.into_iter().map(f32::to_bits).collect::<Vec<_>>();
    for (i, &case) in CASES.iter().enumerate() {
        let d = data(case, 40 + i as u64);
        let mut first_simd: Option<Vec<u32>> = None;
        for isa in isas_under_test() {
            let whole = bits(d.run(isa, usize::MAX, Activation::Relu));
            for rows in [1, 2, 3] {
                assert_eq!(
                    bits(d.run(isa, rows, Activation::Relu)),
                    whole,
                    "{isa:?} {case:?}"
                );
            }
            if simd_isas().contains(&isa) {
                match &first_simd {
                    Some(f) => assert_eq!(f, &whole, "{isa:?} {case:?}"),
                    None => first_simd = Some(whole.clone()),
                }
            }
            assert!(
                whole.iter().all(|&b| f32::from_bits(b) >= 0.0),
                "ReLU applied"
            );
        }
    }
}

#[test]
#[should_panic(expected = "whole rows of tiles")]
fn a_band_must_cover_whole_rows_of_tiles() {
    let d = data(CASES[2], 1);
    let n = d.g.out_h * d.g.out_w;
    let mut out = vec![0.0; d.out_c * n];
    let w = WinogradWeights::pack(Isa::Scalar, &d.w, d.out_c, d.g.in_c);
    let band = Band::new(&mut out, d.out_c, n, 0..d.g.out_w);
    conv_band(
        &w,
        &d.g,
        &d.x,
        band,
        &Epilogue::default(),
        (&mut AlignedBuf::default(), &mut GemmScratch::new()),
    );
}
