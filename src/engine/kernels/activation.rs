//! Element-wise activations fused into the kernels' epilogues.
//!
//! [`Activation::apply`] is the reference definition. The piecewise-linear activations ("cheap"
//! ones: identity, ReLU, clip, leaky ReLU, hard sigmoid, hard swish) are also applied in vector
//! registers by the kernels (`apply_vec`); both versions are written as the same sequence of
//! IEEE operations with the same comparison rules, so a value gets the same bits whichever one
//! computes it. The transcendental ones are defined here in `f64`, rounded once to `f32` (about
//! half an `f32` ulp); the kernels compute sigmoid, SiLU, tanh and the erf GELU in vector
//! registers instead (`vmath.rs`, a few ulp, the same bits wherever a value lies in a buffer),
//! and the rest (the tanh GELU, exp, log, erf, ...) element by element through this code.

use super::simd::Simd;

/// An element-wise function applied after the bias and residual.
#[derive(Clone, Copy, Debug, PartialEq, Default)]
pub enum Activation {
    /// `x`.
    #[default]
    Identity,
    /// `max(x, 0)`; NaN stays NaN.
    Relu,
    /// `min(max(x, min), max)` (ReLU6 is `Clip { min: 0.0, max: 6.0 }`); NaN stays NaN.
    Clip { min: f32, max: f32 },
    /// `x` if `x > 0`, else `slope * x`.
    LeakyRelu { slope: f32 },
    /// `1 / (1 + e^-x)`.
    Sigmoid,
    /// `tanh(x)`.
    Tanh,
    /// `clamp(alpha * x + beta, 0, 1)`.
    HardSigmoid { alpha: f32, beta: f32 },
    /// `x * clamp(x + 3, 0, 6) / 6`.
    HardSwish,
    /// `x * sigmoid(x)`.
    Silu,
    /// `x/2 * (1 + erf(x / sqrt 2))`.
    Gelu,
    /// `x/2 * (1 + tanh(sqrt(2/pi) * (x + 0.044715 x^3)))`.
    GeluTanh,
    /// `√x` (NaN below 0).
    Sqrt,
    /// `1 / x`.
    Reciprocal,
    /// `|x|`.
    Abs,
    /// `-x`.
    Neg,
    /// `e^x`.
    Exp,
    /// `ln x` (NaN below 0, -∞ at 0).
    Log,
    /// The error function.
    Erf,
    /// `x^exponent`.
    Pow { exponent: f32 },
}

/// `if a > b { a } else { b }`: the rule of [`Simd::max`], so scalar and vector code agree,
/// NaN in `b` included.
#[inline(always)]
fn max_rule(a: f32, b: f32) -> f32 {
    if a > b { a } else { b }
}

/// `if a < b { a } else { b }`: the rule of [`Simd::min`].
#[inline(always)]
fn min_rule(a: f32, b: f32) -> f32 {
    if a < b { a } else { b }
}

impl Activation {
    /// The reference definition for one value.
    ///
    /// Formulas follow PyTorch's documentation of the modules of the same names; hard swish is
    /// evaluated as `x * min(max(x + 3, 0), 6) / 6`, the order PyTorch's CPU kernel uses (from
    /// memory), which equals `x * clamp(x/6 + 1/2, 0, 1)` mathematically.
    pub fn apply(self, x: f32) -> f32 {
        match self {
            Activation::Sigmoid => sigmoid64(f64::from(x)) as f32,
            Activation::Tanh => f64::from(x).tanh() as f32,
            Activation::Silu => {
                let x = f64::from(x);
                (x * sigmoid64(x)) as f32
            }
            Activation::Gelu => {
                // 1 + erf(t) = erfc(-t) without the cancellation for negative x.
                let x = f64::from(x);
                (0.5 * x * erfc64(-x * std::f64::consts::FRAC_1_SQRT_2)) as f32
            }
            Activation::GeluTanh => {
                // (1 + tanh u) / 2 = sigmoid(2u), again free of cancellation.
                let x = f64::from(x);
                let u = (2.0 / std::f64::consts::PI).sqrt() * (x + 0.044715 * x * x * x);
                (x * sigmoid64(2.0 * u)) as f32
            }
            Activation::Sqrt => f64::from(x).sqrt() as f32,
            Activation::Reciprocal => (1.0 / f64::from(x)) as f32,
            Activation::Abs => x.abs(),
            Activation::Neg => -x,
            Activation::Exp => f64::from(x).exp() as f32,
            Activation::Log => f64::from(x).ln() as f32,
            Activation::Erf => erf(x),
            Activation::Pow { exponent } => pow(x, exponent),
            cheap => cheap.apply_cheap(x),
        }
    }

    /// Applies the activation in place; vectorised by the compiler for the piecewise-linear
    /// ones (the loops are branch-free selects), element by element for the others.
    pub fn apply_slice(self, xs: &mut [f32]) {
        match self {
            Activation::Identity => {}
            Activation::Relu => xs.iter_mut().for_each(|x| *x = max_rule(0.0, *x)),
            Activation::Clip { min, max } => xs
                .iter_mut()
                .for_each(|x| *x = min_rule(max, max_rule(min, *x))),
            Activation::LeakyRelu { slope } => xs.iter_mut().for_each(|x| {
                let y = *x * slope;
                *x = if *x > 0.0 { *x } else { y };
            }),
            Activation::HardSigmoid { alpha, beta } => xs
                .iter_mut()
                .for_each(|x| *x = min_rule(1.0, max_rule(0.0, alpha * *x + beta))),
            Activation::HardSwish => xs
                .iter_mut()
                .for_each(|x| *x = *x * min_rule(6.0, max_rule(0.0, *x + 3.0)) / 6.0),
            other => xs.iter_mut().for_each(|x| *x = other.apply(*x)),
        }
    }

    /// Whether the kernels apply this activation in vector registers ([`apply_vec`]); the
    /// others are applied afterwards with [`Activation::apply_slice`].
    pub(crate) fn is_cheap(self) -> bool {
        matches!(
            self,
            Activation::Identity
                | Activation::Relu
                | Activation::Clip { .. }
                | Activation::LeakyRelu { .. }
                | Activation::HardSigmoid { .. }
                | Activation::HardSwish
        )
    }

    /// [`Activation::apply`] for cheap activations, identity for the others (which the caller
    /// applies later): the scalar twin of [`apply_vec`], and the definition `apply` uses.
    #[inline(always)]
    pub(crate) fn apply_cheap(self, x: f32) -> f32 {
        match self {
            Activation::Relu => max_rule(0.0, x),
            Activation::Clip { min, max } => min_rule(max, max_rule(min, x)),
            Activation::LeakyRelu { slope } => {
                if x > 0.0 {
                    x
                } else {
                    x * slope
                }
            }
            Activation::HardSigmoid { alpha, beta } => {
                min_rule(1.0, max_rule(0.0, alpha * x + beta))
            }
            Activation::HardSwish => x * min_rule(6.0, max_rule(0.0, x + 3.0)) / 6.0,
            _ => x,
        }
    }
}

/// The vector twin of [`Activation::apply_cheap`]: the same operations in the same order.
#[inline(always)]
pub(crate) fn apply_vec<S: Simd>(s: S, act: Activation, x: S::V) -> S::V {
    match act {
        Activation::Relu => s.max(s.zero(), x),
        Activation::Clip { min, max } => s.min(s.splat(max), s.max(s.splat(min), x)),
        Activation::LeakyRelu { slope } => s.select_gt(x, s.zero(), x, s.mul(x, s.splat(slope))),
        Activation::HardSigmoid { alpha, beta } => {
            let t = s.add(s.mul(s.splat(alpha), x), s.splat(beta));
            s.min(s.splat(1.0), s.max(s.zero(), t))
        }
        Activation::HardSwish => {
            let t = s.min(s.splat(6.0), s.max(s.zero(), s.add(x, s.splat(3.0))));
            s.div(s.mul(x, t), s.splat(6.0))
        }
        _ => x,
    }
}

/// `x^e` as ONNX's `Pow` (numpy's `power` for floats): squares, square roots and whole powers
/// exactly as their own operations round; anything else through `f64`.
fn pow(x: f32, e: f32) -> f32 {
    if e == 2.0 {
        x * x
    } else if e == 1.0 {
        x
    } else if e == 0.5 {
        f64::from(x).sqrt() as f32
    } else {
        f64::from(x).powf(f64::from(e)) as f32
    }
}

/// The error function in `f32` (for graphs with a bare `Erf`), correctly rounded from the
/// `f64` evaluation below in all but rare double-rounding cases.
pub fn erf(x: f32) -> f32 {
    erf64(f64::from(x)) as f32
}

/// Logistic function without overflow: `e^-|x|` never exceeds 1.
fn sigmoid64(x: f64) -> f64 {
    if x >= 0.0 {
        1.0 / (1.0 + (-x).exp())
    } else {
        let e = x.exp();
        e / (1.0 + e)
    }
}

// Error function, following the method and rational approximations of Sun Microsystems' fdlibm
// `s_erf.c` (1993; the same code ships as FreeBSD msun and musl `erf`), evaluated in f64: the
// stated approximation errors are below 2^-57 on every interval, far inside the ~1e-7 an `f32`
// result needs. Coefficients are fdlibm's (named as there: pp/qq on [0, 0.84375], pa/qa on
// [0.84375, 1.25], ra/sa on [1.25, 1/0.35], rb/sb on [1/0.35, 28]).
use fdlibm::*;

/// The published constants.
// Written exactly as published (more digits than f64 keeps), so they can be checked against
// the source; each rounds to the intended f64.
#[allow(clippy::excessive_precision)]
mod fdlibm {
    pub(super) const EFX: f64 = 1.283_791_670_955_125_863_16e-1; // 2/sqrt(pi) - 1
    pub(super) const ERX: f64 = 8.450_629_115_104_675_292_97e-1; // erf(1) rounded to 24 bits
    pub(super) const PP: [f64; 5] = [
        1.283_791_670_955_125_585_61e-1,
        -3.250_421_072_470_014_993_70e-1,
        -2.848_174_957_559_851_047_66e-2,
        -5.770_270_296_489_441_591_57e-3,
        -2.376_301_665_665_016_260_84e-5,
    ];
    pub(super) const QQ: [f64; 6] = [
        1.0,
        3.979_172_239_591_553_528_19e-1,
        6.502_224_998_876_729_444_85e-2,
        5.081_306_281_875_765_627_76e-3,
        1.324_947_380_043_216_445_26e-4,
        -3.960_228_278_775_368_123_20e-6,
    ];
    pub(super) const PA: [f64; 7] = [
        -2.362_118_560_752_659_440_77e-3,
        4.148_561_186_837_483_316_66e-1,
        -3.722_078_760_357_013_238_47e-1,
        3.183_466_199_011_617_536_74e-1,
        -1.108_946_942_823_966_774_76e-1,
        3.547_830_432_561_823_593_71e-2,
        -2.166_375_594_868_790_843_00e-3,
    ];
    pub(super) const QA: [f64; 7] = [
        1.0,
        1.064_208_804_008_442_282_86e-1,
        5.403_979_177_021_710_489_37e-1,
        7.182_865_441_419_626_628_68e-2,
        1.261_712_198_087_616_421_12e-1,
        1.363_708_391_202_905_073_62e-2,
        1.198_449_984_679_910_741_70e-2,
    ];
    pub(super) const RA: [f64; 8] = [
        -9.864_944_034_847_148_227_05e-3,
        -6.938_585_727_071_817_643_72e-1,
        -1.055_862_622_532_329_098_14e1,
        -6.237_533_245_032_600_603_96e1,
        -1.623_966_694_625_734_703_55e2,
        -1.846_050_929_067_110_359_94e2,
        -8.128_743_550_630_659_342_46e1,
        -9.814_329_344_169_145_485_92,
    ];
    pub(super) const SA: [f64; 9] = [
        1.0,
        1.965_127_166_743_925_712_92e1,
        1.376_577_541_435_190_426_00e2,
        4.345_658_774_752_292_288_21e2,
        6.453_872_717_332_678_803_36e2,
        4.290_081_400_275_678_333_86e2,
        1.086_350_055_417_794_351_34e2,
        6.570_249_770_319_281_701_35,
        -6.042_441_521_485_809_874_38e-2,
    ];
    pub(super) const RB: [f64; 7] = [
        -9.864_942_924_700_099_285_97e-3,
        -7.992_832_376_805_230_065_74e-1,
        -1.775_795_491_775_475_198_89e1,
        -1.606_363_848_558_219_160_62e2,
        -6.375_664_433_683_896_277_22e2,
        -1.025_095_131_611_077_249_54e3,
        -4.835_191_916_086_513_970_19e2,
    ];
    pub(super) const SB: [f64; 8] = [
        1.0,
        3.033_806_074_348_245_829_24e1,
        3.257_925_129_965_739_188_26e2,
        1.536_729_586_084_436_959_94e3,
        3.199_858_219_508_595_539_08e3,
        2.553_050_406_433_164_425_83e3,
        4.745_285_412_069_553_672_15e2,
        -2.244_095_244_658_581_833_62e1,
    ];
}

/// `c[0] + z*c[1] + z^2*c[2] + ...` by Horner's rule.
fn poly(z: f64, c: &[f64]) -> f64 {
    c.iter().rev().fold(0.0, |acc, &ci| acc * z + ci)
}

/// `erfc(|x|)` for `|x| >= 1.25`, as `exp(-x^2 - 0.5625 + R/S) / |x|`.
fn erfc_tail(ax: f64) -> f64 {
    if ax >= 28.0 {
        return 0.0;
    }
    let s = 1.0 / (ax * ax);
    let (r, q) = if ax < 1.0 / 0.35 {
        (poly(s, &RA), poly(s, &SA))
    } else {
        (poly(s, &RB), poly(s, &SB))
    };
    // fdlibm's splitting: z is ax with its low 32 bits cleared, so z*z is exact and
    // -ax^2 = -z^2 + (z - ax)(z + ax) loses nothing before the exponential.
    let z = f64::from_bits(ax.to_bits() & 0xffff_ffff_0000_0000);
    (-z * z - 0.5625).exp() * ((z - ax) * (z + ax) + r / q).exp() / ax
}

/// The error function, to within a few f64 ulps (see the constants above).
fn erf64(x: f64) -> f64 {
    let ax = x.abs();
    if x.is_nan() {
        return x;
    }
    if ax < 0.84375 {
        if ax < f64::powi(2.0, -28) {
            return x + EFX * x;
        }
        let z = x * x;
        return x + x * (poly(z, &PP) / poly(z, &QQ));
    }
    let magnitude = if ax < 1.25 {
        let s = ax - 1.0;
        ERX + poly(s, &PA) / poly(s, &QA)
    } else if ax < 6.0 {
        1.0 - erfc_tail(ax)
    } else {
        1.0
    };
    magnitude.copysign(x)
}

/// The complementary error function `1 - erf(x)`, accurate in relative terms also where it is
/// tiny (large positive `x`).
fn erfc64(x: f64) -> f64 {
    let ax = x.abs();
    if x.is_nan() {
        return x;
    }
    if ax < 0.84375 {
        let z = x * x;
        let xy = x * (poly(z, &PP) / poly(z, &QQ));
        return if x < 0.25 {
            1.0 - (x + xy)
        } else {
            0.5 - (x - 0.5 + xy)
        };
    }
    if ax < 1.25 {
        let s = ax - 1.0;
        let pq = poly(s, &PA) / poly(s, &QA);
        return if x > 0.0 {
            1.0 - ERX - pq
        } else {
            1.0 + ERX + pq
        };
    }
    let tail = erfc_tail(ax);
    if x > 0.0 { tail } else { 2.0 - tail }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn close(got: f64, want: f64, rel: f64) -> bool {
        (got - want).abs() <= rel * want.abs()
    }

    #[test]
    fn erf_matches_tables() {
        // Values of erf from Abramowitz & Stegun (1964), Table 7.1 (10 digits there), written
        // from memory to 16 digits and confirmed with Python 3.11's math.erf.
        let table = [
            (0.1, 0.1124629160182849),
            (0.5, 0.5204998778130465),
            (1.0, 0.8427007929497149),
            (1.5, 0.9661051464753108),
            (2.0, 0.9953222650189527),
            (2.5, 0.999593047982555),
            (3.0, 0.9999779095030014),
        ];
        for (x, want) in table {
            assert!(close(erf64(x), want, 1e-14), "erf({x}) = {}", erf64(x));
            assert!(close(erf64(-x), -want, 1e-14));
        }
        assert_eq!(erf64(0.0), 0.0);
        assert_eq!(erf64(40.0), 1.0);
        assert_eq!(erf64(f64::NEG_INFINITY), -1.0);
        assert!(erf64(f64::NAN).is_nan());
        // Small arguments: erf(x) ~ 2x/sqrt(pi) (Taylor series, A&S 7.1.5).
        let x = 1e-10;
        assert!(close(erf64(x), x * std::f64::consts::FRAC_2_SQRT_PI, 1e-15));
    }

    #[test]
    fn erfc_keeps_relative_accuracy_in_the_tail() {
        // erfc values from memory, confirmed with Python 3.11's math.erfc.
        let table = [
            (3.0, 2.2090496998585438e-05),
            (4.0, 1.541725790028002e-08),
            (5.0, 1.5374597944280351e-12),
            (10.0, 2.088487583762545e-45),
            (-1.0, 1.842700792949715),
        ];
        for (x, want) in table {
            assert!(close(erfc64(x), want, 1e-13), "erfc({x}) = {}", erfc64(x));
        }
        // erf + erfc = 1 across the interval boundaries.
        for i in -300..300 {
            let x = f64::from(i) * 0.0213;
            assert!((erf64(x) + erfc64(x) - 1.0).abs() < 1e-15, "x = {x}");
        }
    }

    #[test]
    fn closed_form_values() {
        use Activation::*;
        let cases: [(Activation, f32, f32); 22] = [
            (Identity, -2.5, -2.5),
            (Relu, -2.5, 0.0),
            (Relu, 2.5, 2.5),
            (Clip { min: 0.0, max: 6.0 }, 7.0, 6.0),
            (Clip { min: 0.0, max: 6.0 }, -1.0, 0.0),
            (Clip { min: 0.0, max: 6.0 }, 3.5, 3.5),
            (LeakyRelu { slope: 0.25 }, -4.0, -1.0),
            (LeakyRelu { slope: 0.25 }, 4.0, 4.0),
            (
                HardSigmoid {
                    alpha: 0.2,
                    beta: 0.5,
                },
                0.0,
                0.5,
            ),
            (
                HardSigmoid {
                    alpha: 0.2,
                    beta: 0.5,
                },
                3.0,
                1.0,
            ),
            (
                HardSigmoid {
                    alpha: 0.2,
                    beta: 0.5,
                },
                -3.0,
                0.0,
            ),
            (HardSwish, 3.0, 3.0),
            (HardSwish, -3.0, 0.0),
            (HardSwish, 1.5, 1.125), // 1.5 * 4.5 / 6
            (Sigmoid, 0.0, 0.5),
            (Sigmoid, -200.0, 0.0), // e^-200 underflows f32: no NaN, no overflow
            (Sigmoid, 200.0, 1.0),
            (Tanh, 0.0, 0.0),
            (Silu, 0.0, 0.0),
            (Gelu, 0.0, 0.0),
            (Gelu, -40.0, -0.0),
            (GeluTanh, 40.0, 40.0),
        ];
        for (act, x, want) in cases {
            let got = act.apply(x);
            assert_eq!(got, want, "{act:?}({x})");
            assert!(!got.is_nan());
        }
    }

    #[test]
    fn transcendental_values() {
        use Activation::*;
        // Reference values in f64 from closed forms (sigmoid(1) = 1/(1+e^-1), tanh(0.5),
        // GELU(x) = x * Phi(x) with the normal CDF Phi), computed with Python 3.11's math module.
        let cases = [
            (Sigmoid, 1.0, 0.7310585786300049),
            (Tanh, 0.5, 0.46211715726000974),
            (Silu, 1.0, 0.7310585786300049),
            (Gelu, 1.0, 0.8413447460685429),
            (Gelu, -1.0, -0.15865525393145707),
            (Gelu, 2.0, 1.9544997361036416),
            (Gelu, -3.0, -0.004049694094890287),
            (GeluTanh, 1.0, 0.8411919906082768),
            (GeluTanh, -1.0, -0.15880800939172324),
            (GeluTanh, -3.0, -0.0036373920817729943),
        ];
        for (act, x, want) in cases {
            let got = f64::from(act.apply(x));
            // One rounding to f32 (relative 2^-24 ~ 6e-8) on top of the f64 evaluation.
            assert!(
                close(got, want, 1.2e-7),
                "{act:?}({x}) = {got}, want {want}"
            );
        }
    }

    #[test]
    fn nan_propagates_through_the_piecewise_ones() {
        use Activation::*;
        for act in [
            Relu,
            Clip { min: 0.0, max: 6.0 },
            LeakyRelu { slope: 0.1 },
            HardSigmoid {
                alpha: 0.2,
                beta: 0.5,
            },
            HardSwish,
            Sigmoid,
            Gelu,
        ] {
            assert!(act.apply(f32::NAN).is_nan(), "{act:?}");
        }
    }

    #[test]
    fn slice_equals_pointwise_bitwise() {
        use Activation::*;
        let xs: Vec<f32> = (-300..300).map(|i| i as f32 * 0.031 - 0.007).collect();
        for act in [
            Identity,
            Relu,
            Clip {
                min: -1.0,
                max: 6.0,
            },
            LeakyRelu { slope: 0.01 },
            HardSigmoid {
                alpha: 1.0 / 6.0,
                beta: 0.5,
            },
            HardSwish,
            Sigmoid,
            Tanh,
            Silu,
            Gelu,
            GeluTanh,
        ] {
            let mut ys = xs.clone();
            act.apply_slice(&mut ys);
            for (x, y) in xs.iter().zip(&ys) {
                assert_eq!(y.to_bits(), act.apply(*x).to_bits(), "{act:?}({x})");
            }
        }
    }
}
