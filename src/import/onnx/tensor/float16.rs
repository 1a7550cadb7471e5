//! The 16-bit float formats ONNX stores constants in (FLOAT16, BFLOAT16): exact widening
//! to `f32`, and rounding an `f32` to them (what `Cast` to those types computes).

/// IEEE 754 binary16 bits to the `f32` of the same value (every binary16 value is exact in
/// binary32). NaN payloads are kept in the high mantissa bits.
pub fn f16_bits_to_f32(bits: u16) -> f32 {
    let negative = bits & 0x8000 != 0;
    let exponent = (bits >> 10) & 0x1f;
    let mantissa = u32::from(bits & 0x03ff);
    let magnitude = match exponent {
        // Zero and subnormals: mantissa · 2^-24, exact since mantissa < 2^10.
        0 => mantissa as f32 * f32::from_bits(0x3380_0000),
        0x1f => f32::from_bits(0x7f80_0000 | (mantissa << 13)),
        // Normal: rebias the exponent from 15 to 127 and widen the mantissa.
        _ => f32::from_bits(((u32::from(exponent) + 127 - 15) << 23) | (mantissa << 13)),
    };
    if negative { -magnitude } else { magnitude }
}

/// bfloat16 bits to `f32`: bfloat16 is the upper half of a binary32, so this is exact.
pub fn bf16_bits_to_f32(bits: u16) -> f32 {
    f32::from_bits(u32::from(bits) << 16)
}

/// Drops the low `k` bits of `bits`, rounding to nearest with ties to even.
fn shift_round_even(bits: u32, k: u32) -> u32 {
    let kept = bits >> k;
    let rest = bits & ((1 << k) - 1);
    let half = 1 << (k - 1);
    if rest > half || (rest == half && kept & 1 == 1) {
        kept + 1
    } else {
        kept
    }
}

/// `x` rounded to the nearest binary16 value (ties to even, overflow to infinity), as `f32`:
/// what `Cast` to FLOAT16 and back yields.
pub fn round_to_f16(x: f32) -> f32 {
    if x.is_nan() {
        return x;
    }
    let bits = x.to_bits();
    let sign = bits & 0x8000_0000;
    let abs = bits & 0x7fff_ffff;
    let half_bits: u32 = if abs >= 0x477f_f000 {
        // 65520 = 65504 + half a binary16 step at the top; ties go to the even neighbour,
        // which is infinity.
        0x7c00
    } else if abs < 0x3880_0000 {
        // Below 2^-14 binary16 is subnormal with a fixed step of 2^-24: count the steps.
        // Scaling by 2^24 is exact in f32.
        (f32::from_bits(abs) * f32::from_bits(0x4b80_0000)).round_ties_even() as u32
    } else {
        // Normal: rebias the exponent (127 → 15), then drop 13 mantissa bits; a carry out of
        // the mantissa correctly bumps the exponent.
        shift_round_even(abs - ((127 - 15) << 23), 13)
    };
    let magnitude = f16_bits_to_f32(half_bits as u16);
    if sign != 0 { -magnitude } else { magnitude }
}

/// `x` rounded to the nearest bfloat16 value (ties to even), as `f32`.
pub fn round_to_bf16(x: f32) -> f32 {
    if x.is_nan() {
        return x;
    }
    // The sign sits above the rounded field, and only NaN (handled above) or infinity has
    // an all-ones exponent, so a carry can at most turn the largest finite value into
    // infinity, as rounding should.
    f32::from_bits(shift_round_even(x.to_bits(), 16) << 16)
}

#[cfg(test)]
mod tests {
    use super::*;

    /// IEEE 754-2008 binary16 (section 3.6, interchange format: 1 sign, 5 exponent bits with
    /// bias 15, 10 fraction bits); values of the extremes as tabulated for binary16.
    #[test]
    fn float16_values_are_exact() {
        let cases: [(u16, f32); 12] = [
            (0x3c00, 1.0),
            (0xc000, -2.0),
            (0x7bff, 65504.0),                 // largest finite
            (0x0400, 2f32.powi(-14)),          // smallest normal
            (0x0001, 2f32.powi(-24)),          // smallest subnormal
            (0x03ff, 1023.0 * 2f32.powi(-24)), // largest subnormal
            (0x3555, 0.333_251_95),            // 0x555/1024 · 2^-2 + 2^-2
            (0x0000, 0.0),
            (0x8000, -0.0),
            (0x7c00, f32::INFINITY),
            (0xfc00, f32::NEG_INFINITY),
            (0x3bff, 1.0 - 2f32.powi(-11)), // largest below 1
        ];
        for (bits, want) in cases {
            let got = f16_bits_to_f32(bits);
            assert_eq!(
                got.to_bits(),
                want.to_bits(),
                "{bits:#06x}: {got} vs {want}"
            );
        }
        assert!(f16_bits_to_f32(0x7e00).is_nan());
        assert!(f16_bits_to_f32(0xfc01).is_nan());
    }

    /// bfloat16 is the upper 16 bits of an IEEE 754 binary32 (Intel, "BFLOAT16 – Hardware
    /// Numerics Definition", 2018, section 2).
    #[test]
    fn bfloat16_values_are_exact() {
        let cases: [(u16, f32); 7] = [
            (0x3f80, 1.0),
            (0x4049, 3.140625),
            (0xc000, -2.0),
            (0x7f7f, f32::from_bits(0x7f7f_0000)), // largest finite, about 3.3895e38
            (0x0001, f32::from_bits(0x0001_0000)), // smallest subnormal, 2^-133
            (0x8000, -0.0),
            (0xff80, f32::NEG_INFINITY),
        ];
        for (bits, want) in cases {
            assert_eq!(
                bf16_bits_to_f32(bits).to_bits(),
                want.to_bits(),
                "{bits:#06x}"
            );
        }
        assert_eq!(f32::from_bits(0x7f7f_0000), 3.389_531_4e38);
    }

    /// Exhaustive over all 2^16 patterns: every binary16 (bfloat16) value rounds to itself,
    /// and the midpoint between two neighbours rounds to the one with an even last bit (IEEE
    /// 754-2008 section 4.3.1, roundTiesToEven); values just off the midpoint round to the
    /// nearer neighbour.
    #[test]
    fn rounding_to_16_bit_floats_is_nearest_even() {
        type Narrow = (fn(u16) -> f32, fn(f32) -> f32);
        let kinds: [Narrow; 2] = [
            (f16_bits_to_f32, round_to_f16),
            (bf16_bits_to_f32, round_to_bf16),
        ];
        for (widen, round) in kinds {
            for bits in 0..=u16::MAX {
                let v = widen(bits);
                if v.is_nan() {
                    assert!(round(v).is_nan());
                    continue;
                }
                assert_eq!(round(v).to_bits(), v.to_bits(), "{bits:#06x}");
                let next = widen(bits.wrapping_add(1));
                // Neighbours of the same sign, both finite: check the midpoint.
                if bits & 0x7fff == 0x7fff || !next.is_finite() || !v.is_finite() {
                    continue;
                }
                let mid = ((f64::from(v) + f64::from(next)) / 2.0) as f32;
                if f64::from(mid) != (f64::from(v) + f64::from(next)) / 2.0 {
                    continue; // midpoint not representable in f32 (cannot happen for 16-bit)
                }
                let even = if bits & 1 == 0 { v } else { next };
                assert_eq!(
                    round(mid).to_bits(),
                    even.to_bits(),
                    "midpoint after {bits:#06x}"
                );
                // One f32 step off the midpoint, in magnitude (bit patterns order magnitudes
                // within one sign).
                let toward_lo = f32::from_bits(mid.to_bits() - 1);
                let toward_hi = f32::from_bits(mid.to_bits() + 1);
                let (lo, hi) = if v.abs() < next.abs() {
                    (v, next)
                } else {
                    (next, v)
                };
                assert_eq!(round(toward_lo).to_bits(), lo.to_bits(), "{bits:#06x}");
                assert_eq!(round(toward_hi).to_bits(), hi.to_bits(), "{bits:#06x}");
            }
        }
        // Overflow: 65520 is the midpoint between 65504 and 2^16 (infinity) and goes even.
        assert_eq!(round_to_f16(65519.996), 65504.0);
        assert_eq!(round_to_f16(65520.0), f32::INFINITY);
        assert_eq!(round_to_f16(-1e9), f32::NEG_INFINITY);
        assert_eq!(round_to_bf16(f32::MAX), f32::INFINITY);
    }
}
