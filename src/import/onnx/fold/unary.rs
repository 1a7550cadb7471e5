//! One-input element-wise operators: `Neg`, `Abs` (floats and integers), `Floor`, `Ceil`,
//! `Sqrt`, `Reciprocal`, `Exp`, `Log`, `Erf` (floats), `Not` (booleans), and `Cast` between
//! element types. Each maps the input's array element by element (`ArrayRef::mapv`); the
//! output has the input's shape.
//!
//! Transcendental functions (`Exp`, `Log`, `Erf`) are computed in f64 and rounded to f32
//! once: the correctly rounded float32 result except in rare near-ties, on every platform.
//! The reference evaluator's `Erf` does the same (Python's `math.erf` in double precision,
//! then `astype(float32)`); its `Exp` and `Log` are numpy's float32 functions, which may
//! differ from the correctly rounded value by a few units in the last place.

use super::Ctx;
use super::array::{self, View};
use crate::import::ImportError;
use crate::import::onnx::proto::{DataType, data_type_name};
use crate::import::onnx::tensor::{ConstData, ConstTensor, round_to_bf16, round_to_f16};

/// One-input element-wise operators.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub(super) enum Unary {
    Neg,
    Abs,
    Floor,
    Ceil,
    Sqrt,
    Reciprocal,
    Exp,
    Log,
    Erf,
    Not,
}

impl Unary {
    pub(super) fn of(op: &str) -> Option<Unary> {
        Some(match op {
            "Neg" => Unary::Neg,
            "Abs" => Unary::Abs,
            "Floor" => Unary::Floor,
            "Ceil" => Unary::Ceil,
            "Sqrt" => Unary::Sqrt,
            "Reciprocal" => Unary::Reciprocal,
            "Exp" => Unary::Exp,
            "Log" => Unary::Log,
            "Erf" => Unary::Erf,
            "Not" => Unary::Not,
            _ => return None,
        })
    }

    /// The function on floats, if the operator takes them.
    fn float(self) -> Option<fn(f32) -> f32> {
        Some(match self {
            Unary::Neg => |a| -a,
            Unary::Abs => f32::abs,
            Unary::Floor => f32::floor,
            Unary::Ceil => f32::ceil,
            Unary::Sqrt => f32::sqrt,
            Unary::Reciprocal => |a| 1.0 / a,
            Unary::Exp => |a| f64::from(a).exp() as f32,
            Unary::Log => |a| f64::from(a).ln() as f32,
            Unary::Erf => |a| erf(f64::from(a)) as f32,
            Unary::Not => return None,
        })
    }

    /// The function on integers (booleans for `Not`), if the operator takes them. Integer
    /// results wrap, as numpy's fixed-width integers do (`Neg`/`Abs` of `i64::MIN`).
    fn int(self) -> Option<fn(i64) -> i64> {
        Some(match self {
            Unary::Neg => i64::wrapping_neg,
            Unary::Abs => i64::wrapping_abs,
            Unary::Not => |a| i64::from(a == 0),
            _ => return None,
        })
    }
}

pub(super) fn unary(cx: &Ctx<'_>, op: Unary) -> Result<ConstTensor, ImportError> {
    cx.arity(1, 1)?;
    match cx.view(0)? {
        View::F32(a) => {
            let f = op.float().ok_or_else(|| cx.err("input must be boolean"))?;
            array::output(cx, &a.mapv(f))
        }
        View::I64(a) => {
            let f = op
                .int()
                .ok_or_else(|| cx.err("input must be floating point"))?;
            array::output(cx, &a.mapv(f))
        }
    }
}

/// The error function, in f64. Below |x| = 3 it sums the series
/// `erf x = 2/√π · exp(-x²) · Σ_{n≥0} 2ⁿ x^(2n+1) / (1·3·…·(2n+1))` (Abramowitz & Stegun
/// 7.1.6), whose terms are all positive, so nothing cancels; from 3 to 6 it takes `1 - erfc x`
/// with erfc from its continued fraction (A&S 7.1.14), which converges fast there; from 6 on,
/// `1 - erfc x` is 1 in f64 (erfc 6 ≈ 2·10⁻¹⁷).
fn erf(x: f64) -> f64 {
    use std::f64::consts::FRAC_2_SQRT_PI;
    if x.is_nan() {
        return x;
    }
    let a = x.abs();
    let y = if a < 3.0 {
        let (mut term, mut sum, mut n) = (a, a, 0.0);
        while term > sum * f64::EPSILON / 4.0 {
            n += 1.0;
            term *= 2.0 * a * a / (2.0 * n + 1.0);
            sum += term;
        }
        FRAC_2_SQRT_PI * (-a * a).exp() * sum
    } else if a < 6.0 {
        // erfc a = exp(-a²)/√π · 1/(a + (1/2)/(a + (2/2)/(a + (3/2)/(a + …)))), evaluated
        // from the 60th level up; at a = 3 the truncation error is far below f64's precision.
        let tail = (1..=60).rev().fold(a, |f, k| a + f64::from(k) / 2.0 / f);
        1.0 - FRAC_2_SQRT_PI / 2.0 * (-a * a).exp() / tail
    } else {
        1.0
    };
    // erf is odd; copysign also keeps the sign of -0.
    y.copysign(x)
}

/// `Cast` to a float, integer or BOOL type. Floats become integers by truncation toward zero;
/// integers narrower than 64 bits wrap to their width (as numpy's `astype`, which the
/// standard's reference evaluator uses); FLOAT16 and BFLOAT16 round to nearest even.
pub(super) fn cast(cx: &Ctx<'_>) -> Result<ConstTensor, ImportError> {
    cx.arity(1, 1)?;
    let x = cx.input(0)?;
    let Some(to) = cx.attr_int("to")? else {
        return Err(cx.err("attribute \"to\" is required"));
    };
    let to_type = i32::try_from(to)
        .ok()
        .and_then(|t| DataType::try_from(t).ok());
    let ints = |wrap: fn(i64) -> i64| {
        let v = match &x.data {
            ConstData::F32(v) => v.iter().map(|&f| wrap(f as i64)).collect(),
            ConstData::I64(v) => v.iter().map(|&i| wrap(i)).collect(),
        };
        ConstTensor::i64(x.shape.clone(), v)
    };
    let floats = |round: fn(f32) -> f32| {
        ConstTensor::f32(x.shape.clone(), x.to_f32().into_iter().map(round).collect())
    };
    Ok(match to_type {
        Some(DataType::Float | DataType::Double) => floats(|f| f),
        Some(DataType::Float16) => floats(round_to_f16),
        Some(DataType::Bfloat16) => floats(round_to_bf16),
        Some(DataType::Int64 | DataType::Uint64) => ints(|i| i),
        Some(DataType::Int32) => ints(|i| i64::from(i as i32)),
        Some(DataType::Uint32) => ints(|i| i64::from(i as u32)),
        Some(DataType::Int16) => ints(|i| i64::from(i as i16)),
        Some(DataType::Uint16) => ints(|i| i64::from(i as u16)),
        Some(DataType::Int8) => ints(|i| i64::from(i as i8)),
        Some(DataType::Uint8) => ints(|i| i64::from(i as u8)),
        Some(DataType::Bool) => {
            // Any nonzero value (NaN included) is true.
            let v = match &x.data {
                ConstData::F32(v) => v.iter().map(|&f| i64::from(f != 0.0)).collect(),
                ConstData::I64(v) => v.iter().map(|&i| i64::from(i != 0)).collect(),
            };
            ConstTensor::i64(x.shape.clone(), v)
        }
        _ => {
            let name = i32::try_from(to).map_or_else(|_| format!("{to}"), data_type_name);
            return Err(cx.err(format!("casting to {name} is not supported")));
        }
    })
}

#[cfg(test)]
mod tests {
    use super::erf;

    /// Values of erf from Abramowitz & Stegun, table 7.1 (erf to 15 decimals at x = 0.5,
    /// 1, 2), closed forms at 0 and ±∞, and oddness.
    #[test]
    fn erf_matches_the_table() {
        for (x, want) in [
            (0.5, 0.520_499_877_813_047),
            (1.0, 0.842_700_792_949_715),
            (2.0, 0.995_322_265_018_953),
        ] {
            assert!((erf(x) - want).abs() < 1e-15, "erf({x}) = {}", erf(x));
            assert!((erf(-x) + want).abs() < 1e-15);
        }
        assert_eq!(erf(0.0).to_bits(), 0f64.to_bits());
        assert_eq!(erf(-0.0).to_bits(), (-0f64).to_bits());
        assert_eq!(erf(f64::INFINITY), 1.0);
        assert_eq!(erf(f64::NEG_INFINITY), -1.0);
        assert!(erf(f64::NAN).is_nan());
    }
}
