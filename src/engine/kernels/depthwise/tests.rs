//! Depthwise tests against a naive f64 reference, on every instruction set, plus invariance.
//!
//! Tolerance as for the matrix multiply (Higham, Accuracy and Stability of Numerical
//! Algorithms, 2002, §3.1): γ_n Σ|terms| with n = taps + 2 (bias and residual). Beyond
//! that, every output must equal the contract's operation sequence bit for bit.

use super::*;
use crate::engine::kernels::testutil::{Rng, isas_under_test, simd_isas};

struct Case {
    c: usize,
    mult: usize,
    hw: (usize, usize),
    kernel: (usize, usize),
    stride: (usize, usize),
    dil: (usize, usize),
    /// top, bottom, left, right
    pad: (usize, usize, usize, usize),
}

impl Case {
    fn geom(&self) -> ConvGeom {
        let out =
            |n: usize, k: usize, s: usize, d: usize, p: usize| (n + p - d * (k - 1) - 1) / s + 1;
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
                self.pad.0 + self.pad.1,
            ),
            out_w: out(
                self.hw.1,
                self.kernel.1,
                self.stride.1,
                self.dil.1,
                self.pad.2 + self.pad.3,
            ),
        }
    }
}

fn cases() -> Vec<Case> {
    let c = |c, mult, hw, kernel, stride, dil, pad| Case {
        c,
        mult,
        hw,
        kernel,
        stride,
        dil,
        pad,
    };
    vec![
        c(3, 1, (112, 112), (3, 3), (1, 1), (1, 1), (1, 1, 1, 1)), // MobileNetV2-like, stride 1
        c(2, 1, (113, 111), (3, 3), (2, 2), (1, 1), (1, 1, 1, 1)), // stride 2, odd sizes
        c(4, 2, (9, 37), (3, 3), (1, 1), (1, 1), (1, 1, 1, 1)),    // multiplier 2
        c(3, 2, (10, 70), (3, 3), (2, 2), (1, 1), (0, 1, 0, 1)),   // asymmetric, stride 2
        c(2, 1, (17, 45), (3, 3), (1, 1), (2, 2), (2, 2, 2, 2)),   // dilation 2
        c(2, 1, (15, 53), (5, 5), (2, 2), (1, 1), (2, 2, 2, 2)),   // 5x5 stride 2
        c(1, 3, (7, 7), (3, 3), (1, 1), (1, 1), (1, 1, 1, 1)),     // too narrow for vectors
        c(2, 1, (11, 40), (3, 3), (3, 3), (1, 1), (1, 1, 1, 1)),   // stride 3 (scalar path)
        c(2, 1, (6, 50), (1, 7), (1, 1), (1, 3), (0, 0, 9, 3)),    // 1x7 dilated, wide pad
        c(2, 2, (20, 3), (7, 1), (2, 1), (1, 1), (3, 3, 0, 0)),    // 7x1
        c(1, 1, (3, 4), (5, 5), (1, 1), (1, 1), (2, 2, 2, 2)),     // kernel larger than input
        c(5, 1, (14, 14), (3, 3), (2, 2), (1, 1), (1, 1, 1, 1)),
        c(3, 1, (14, 14), (5, 5), (1, 1), (1, 1), (2, 2, 2, 2)), // 5x5 "same", rows span vectors
        c(2, 1, (1, 19), (3, 3), (1, 1), (1, 1), (1, 1, 1, 1)),  // one row, "same"
        c(3, 1, (14, 14), (5, 5), (2, 2), (1, 1), (2, 2, 2, 2)), // 5x5 stride 2, halving
        c(2, 2, (8, 40), (3, 3), (2, 2), (1, 1), (1, 1, 1, 1)),  // stride 2, multiplier 2
        c(1, 2, (4, 601), (3, 3), (1, 1), (1, 1), (1, 1, 1, 1)), // rows of several chunks
        c(1, 1, (3, 1300), (1, 3), (1, 2), (1, 1), (0, 0, 1, 1)), // stride-2 chunks
        c(1, 1, (2, 2300), (1, 3), (1, 1), (1, 1100), (0, 0, 0, 0)), // window too big: fallback
    ]
}

fn reference(
    case: &Case,
    g: &ConvGeom,
    w: &[f32],
    input: &[f32],
    bias: Option<&[f32]>,
    residual: Option<&[f32]>,
) -> (Vec<f64>, Vec<f64>) {
    let oc = case.c * case.mult;
    let plane = g.out_h * g.out_w;
    let (mut out, mut mag) = (vec![0.0f64; oc * plane], vec![0.0f64; oc * plane]);
    for o in 0..oc {
        let ci = o / case.mult;
        for oy in 0..g.out_h {
            for ox in 0..g.out_w {
                let (mut s, mut m) = (0.0f64, 0.0f64);
                for i in 0..g.kh {
                    for j in 0..g.kw {
                        let iy = (oy * g.stride_h + i * g.dil_h) as isize - g.pad_top as isize;
                        let ix = (ox * g.stride_w + j * g.dil_w) as isize - g.pad_left as isize;
                        if iy >= 0 && ix >= 0 && (iy as usize) < g.in_h && (ix as usize) < g.in_w {
                            let x = input[(ci * g.in_h + iy as usize) * g.in_w + ix as usize];
                            let t = f64::from(w[(o * g.kh + i) * g.kw + j]) * f64::from(x);
                            s += t;
                            m += t.abs();
                        }
                    }
                }
                let idx = o * plane + oy * g.out_w + ox;
                for e in [bias.map(|b| b[o]), residual.map(|r| r[idx])]
                    .into_iter()
                    .flatten()
                {
                    s += f64::from(e);
                    m += f64::from(e).abs();
                }
                out[idx] = s;
                mag[idx] = m;
            }
        }
    }
    (out, mag)
}

/// The contract's sequence for one output, emulated exactly: taps in kernel order, padded ones
/// skipped, one `mul_add` each on SIMD paths (`a*b + acc` on the scalar path), then bias,
/// residual, activation.
#[allow(clippy::too_many_arguments)]
fn exact_point(
    isa: Isa,
    g: &ConvGeom,
    w: &[f32],
    input: &[f32],
    mult: usize,
    (o, oy, ox): (usize, usize, usize),
    bias: Option<&[f32]>,
    residual: Option<&[f32]>,
    act: Activation,
) -> f32 {
    let mut acc = 0.0f32;
    for i in 0..g.kh {
        for j in 0..g.kw {
            let iy = (oy * g.stride_h + i * g.dil_h) as isize - g.pad_top as isize;
            let ix = (ox * g.stride_w + j * g.dil_w) as isize - g.pad_left as isize;
            if iy >= 0 && ix >= 0 && (iy as usize) < g.in_h && (ix as usize) < g.in_w {
                let x = input[((o / mult) * g.in_h + iy as usize) * g.in_w + ix as usize];
                let wt = w[(o * g.kh + i) * g.kw + j];
                acc = if isa == Isa::Scalar {
                    wt * x + acc
                } else {
                    wt.mul_add(x, acc)
                };
            }
        }
    }
    if let Some(b) = bias {
        acc += b[o];
    }
    if let Some(r) = residual {
        acc += r[(o * g.out_h + oy) * g.out_w + ox];
    }
    vmath::apply_one(isa, act, acc)
}

#[test]
fn matches_reference() {
    let mut rng = Rng::new(11);
    let u = f64::powi(2.0, -24);
    for isa in isas_under_test() {
        for (ci, case) in cases().iter().enumerate() {
            let g = case.geom();
            let oc = case.c * case.mult;
            let w = rng.vec(oc * g.kh * g.kw);
            // Exactly as long as the shape: the stride-2 loads must not read past the end.
            let input = rng.vec(case.c * g.in_h * g.in_w);
            let plane = g.out_h * g.out_w;
            let bias = rng.vec(oc);
            let res = rng.vec(oc * plane);
            let (bias, res) = (
                (ci % 2 == 0).then_some(&bias[..]),
                (ci % 3 != 1).then_some(&res[..]),
            );
            let act = [
                Activation::Identity,
                Activation::Clip { min: 0.0, max: 6.0 },
                Activation::Tanh,
            ][ci % 3];
            let packed = PackedDepthwise::pack(isa, &w, oc, g.kh, g.kw);
            assert_eq!(packed.isa(), isa);
            // Compute a sub-range of channels; the rest must stay untouched.
            let chans = if oc > 2 { 1..oc } else { 0..oc };
            let mut out = vec![f32::NAN; oc * plane];
            let epi = Epilogue {
                bias,
                residual: res,
                act,
            };
            let band = chans.start * plane..chans.end * plane;
            let epi_band = Epilogue {
                residual: res.map(|r| &r[band.clone()]),
                ..epi
            };
            depthwise(
                &packed,
                &g,
                &input,
                &mut out[band],
                chans.clone(),
                &epi_band,
            );
            let (want, mag) = reference(case, &g, &w, &input, bias, res);
            let n = (g.kh * g.kw + 2) as f64;
            for (idx, &got) in out.iter().enumerate() {
                if !chans.contains(&(idx / plane)) {
                    assert!(got.is_nan(), "case {ci}: wrote channel {}", idx / plane);
                    continue;
                }
                let (ch, oy, ox) = (idx / plane, idx % plane / g.out_w, idx % g.out_w);
                let exact =
                    exact_point(isa, &g, &w, &input, case.mult, (ch, oy, ox), bias, res, act);
                assert_eq!(
                    got.to_bits(),
                    exact.to_bits(),
                    "{isa:?} case {ci} ({ch},{oy},{ox}): not the contract's sequence"
                );
                let wv = f64::from(act.apply(want[idx] as f32));
                let tol = n * u / (1.0 - n * u) * mag[idx]
                    + f64::from(f32::EPSILON) * wv.abs()
                    + vmath::error_bound(act, want[idx] as f32, wv);
                assert!(
                    (f64::from(got) - wv).abs() <= tol,
                    "{isa:?} case {ci} at {idx} (ch {}, y {}, x {}): got {got}, want {wv}",
                    idx / plane,
                    idx % plane / g.out_w,
                    idx % g.out_w
                );
            }
        }
    }
}

#[test]
fn bitwise_invariant_to_channel_split_and_across_simd_paths() {
    let mut rng = Rng::new(12);
    for case in cases() {
        let g = case.geom();
        let oc = case.c * case.mult;
        let plane = g.out_h * g.out_w;
        let w = rng.vec(oc * g.kh * g.kw);
        let input = rng.vec(case.c * g.in_h * g.in_w);
        let bias = rng.vec(oc);
        let epi = Epilogue {
            bias: Some(&bias),
            residual: None,
            act: Activation::HardSwish,
        };
        let mut simd_results = Vec::new();
        for isa in isas_under_test() {
            let packed = PackedDepthwise::pack(isa, &w, oc, g.kh, g.kw);
            let mut whole = vec![0.0; oc * plane];
            depthwise(&packed, &g, &input, &mut whole, 0..oc, &epi);
            let mut split = vec![0.0; oc * plane];
            for o in 0..oc {
                let band = &mut split[o * plane..(o + 1) * plane];
                depthwise(&packed, &g, &input, band, o..o + 1, &epi);
            }
            let bits = |v: &[f32]| v.iter().map(|x| x.to_bits()).collect::<Vec<_>>();
            assert_eq!(bits(&whole), bits(&split), "{isa:?}");
            if simd_isas().contains(&isa) {
                simd_results.push((isa, bits(&whole)));
            }
        }
        for pair in simd_results.windows(2) {
            assert_eq!(pair[0].1, pair[1].1, "{:?} vs {:?}", pair[0].0, pair[1].0);
        }
    }
}
