//! Element-wise operators of two or more inputs, broadcast multidirectionally (numpy rules):
//! arithmetic (`Add`, `Sub`, `Mul`, `Div`, `Pow`; `Min`, `Max` over any number of inputs;
//! `Clip`), comparisons (`Equal`, `Less`, `Greater`, `LessOrEqual`, `GreaterOrEqual`) and
//! logic (`And`, `Or`, `Where`).
//!
//! Every operator goes the same way: the output shape from [`array::broadcast_shape`]
//! (checked against the folding limits), each input stretched to it as a zero-stride view,
//! and one `Zip` over the views that builds the output.

use ndarray::{ArrayD, ArrayRef, IxDyn, Zip};

use super::Ctx;
use super::array::{self, Elem, View};
use crate::import::ImportError;
use crate::import::onnx::tensor::ConstTensor;

/// Two-input element-wise operators.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub(super) enum Binary {
    Arith(Arith),
    Compare(Compare),
    /// `And` (false) or `Or` (true), on booleans.
    Logic {
        or: bool,
    },
    /// `Pow`, the one whose inputs may have different element types.
    Pow,
}

#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub(super) enum Arith {
    Add,
    Sub,
    Mul,
    Div,
    Min,
    Max,
}

#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub(super) enum Compare {
    Equal,
    Less,
    Greater,
    LessOrEqual,
    GreaterOrEqual,
}

impl Binary {
    pub(super) fn of(op: &str) -> Option<Binary> {
        Some(match op {
            "Add" => Binary::Arith(Arith::Add),
            "Sub" => Binary::Arith(Arith::Sub),
            "Mul" => Binary::Arith(Arith::Mul),
            "Div" => Binary::Arith(Arith::Div),
            "Pow" => Binary::Pow,
            "Equal" => Binary::Compare(Compare::Equal),
            "Less" => Binary::Compare(Compare::Less),
            "Greater" => Binary::Compare(Compare::Greater),
            "LessOrEqual" => Binary::Compare(Compare::LessOrEqual),
            "GreaterOrEqual" => Binary::Compare(Compare::GreaterOrEqual),
            "And" => Binary::Logic { or: false },
            "Or" => Binary::Logic { or: true },
            _ => return None,
        })
    }
}

impl Compare {
    /// 0 or 1, in either element type (IEEE comparison for floats: NaN is unequal to all).
    fn eval<T: PartialOrd>(self, a: T, b: T) -> i64 {
        i64::from(match self {
            Compare::Equal => a == b,
            Compare::Less => a < b,
            Compare::Greater => a > b,
            Compare::LessOrEqual => a <= b,
            Compare::GreaterOrEqual => a >= b,
        })
    }
}

impl Arith {
    fn float(self, a: f32, b: f32) -> f32 {
        match self {
            Arith::Add => a + b,
            Arith::Sub => a - b,
            Arith::Mul => a * b,
            Arith::Div => a / b,
            // numpy's minimum/maximum (the reference evaluator's): NaN in either propagates.
            Arith::Min => {
                if a <= b || a.is_nan() {
                    a
                } else {
                    b
                }
            }
            Arith::Max => {
                if a >= b || a.is_nan() {
                    a
                } else {
                    b
                }
            }
        }
    }

    /// Integer arithmetic wraps, as numpy's fixed-width integers do; `Div` truncates toward
    /// zero (the reference evaluator's Div: "C++-style"). `None`: division by zero.
    fn int(self, a: i64, b: i64) -> Option<i64> {
        Some(match self {
            Arith::Add => a.wrapping_add(b),
            Arith::Sub => a.wrapping_sub(b),
            Arith::Mul => a.wrapping_mul(b),
            Arith::Div if b == 0 => return None,
            Arith::Div => a.wrapping_div(b),
            Arith::Min => a.min(b),
            Arith::Max => a.max(b),
        })
    }
}

/// `f` over `a` and `b` broadcast together.
fn zip_with<A: Elem, B: Elem, R>(
    cx: &Ctx<'_>,
    a: &ArrayRef<A, IxDyn>,
    b: &ArrayRef<B, IxDyn>,
    mut f: impl FnMut(A, B) -> R,
) -> Result<ArrayD<R>, ImportError> {
    let shape = array::broadcast_shape(cx, &[a.shape(), b.shape()])?;
    let (a, b) = (
        array::stretch(cx, a, &shape)?,
        array::stretch(cx, b, &shape)?,
    );
    Ok(Zip::from(&a).and(&b).map_collect(|&x, &y| f(x, y)))
}

/// Applies `op` to two constants, broadcasting.
fn apply_binary(
    cx: &Ctx<'_>,
    op: Binary,
    a: &ConstTensor,
    b: &ConstTensor,
) -> Result<ConstTensor, ImportError> {
    use View::{F32, I64};
    let out = match (op, array::view(cx, a)?, array::view(cx, b)?) {
        (Binary::Pow, x, y) => return pow(cx, x, y),
        (Binary::Compare(c), F32(x), F32(y)) => zip_with(cx, &x, &y, |p, q| c.eval(p, q))?,
        (Binary::Compare(c), I64(x), I64(y)) => zip_with(cx, &x, &y, |p, q| c.eval(p, q))?,
        (Binary::Logic { or }, I64(x), I64(y)) => zip_with(cx, &x, &y, |p, q| {
            let (p, q) = (p != 0, q != 0);
            i64::from(if or { p || q } else { p && q })
        })?,
        (Binary::Logic { .. }, F32(_), F32(_)) => {
            return Err(cx.err("inputs must be booleans"));
        }
        (Binary::Arith(o), F32(x), F32(y)) => {
            return array::output(cx, &zip_with(cx, &x, &y, |p, q| o.float(p, q))?);
        }
        (Binary::Arith(o), I64(x), I64(y)) => {
            let results = zip_with(cx, &x, &y, |p, q| o.int(p, q))?;
            if results.iter().any(Option::is_none) {
                return Err(cx.err("integer division by zero"));
            }
            // Every value is Some (checked just above): the default is never taken.
            results.mapv(|v| v.unwrap_or_default())
        }
        _ => {
            return Err(cx.err(
                "inputs mix float and integer element types; the standard requires one type",
            ));
        }
    };
    array::output(cx, &out)
}

/// `Pow`, as the reference evaluator computes it: numpy's `power` of the two inputs, cast
/// back to the base's element type. A float result is computed in f64 and rounded once
/// (numpy itself promotes a float32 base with an int32/int64 exponent to float64); an
/// integer base with a float exponent truncates the f64 result toward zero (saturating, NaN
/// as 0, where numpy leaves the value undefined); integer powers wrap, and a negative integer
/// exponent of an integer base is refused, as numpy refuses it.
fn pow(cx: &Ctx<'_>, base: View<'_>, exponent: View<'_>) -> Result<ConstTensor, ImportError> {
    use View::{F32, I64};
    match (base, exponent) {
        (F32(b), F32(e)) => array::output(
            cx,
            &zip_with(cx, &b, &e, |b, e| f64::from(b).powf(e.into()) as f32)?,
        ),
        (F32(b), I64(e)) => array::output(
            cx,
            &zip_with(cx, &b, &e, |b, e| f64::from(b).powf(e as f64) as f32)?,
        ),
        (I64(b), F32(e)) => array::output(
            cx,
            &zip_with(cx, &b, &e, |b, e| (b as f64).powf(e.into()) as i64)?,
        ),
        (I64(b), I64(e)) => {
            if e.iter().any(|&e| e < 0) {
                return Err(cx.err("integers to negative integer powers are not defined"));
            }
            array::output(
                cx,
                &zip_with(cx, &b, &e, |b, e| int_pow(b, e.unsigned_abs()))?,
            )
        }
    }
}

/// `base^exp` by repeated squaring, wrapping on overflow (numpy's integer `power`).
fn int_pow(mut base: i64, mut exp: u64) -> i64 {
    let mut acc = 1i64;
    while exp > 0 {
        if exp & 1 == 1 {
            acc = acc.wrapping_mul(base);
        }
        base = base.wrapping_mul(base);
        exp >>= 1;
    }
    acc
}

pub(super) fn binary(cx: &Ctx<'_>, op: Binary) -> Result<ConstTensor, ImportError> {
    cx.arity(2, 2)?;
    apply_binary(cx, op, cx.input(0)?, cx.input(1)?)
}

/// `Min`/`Max` over one or more inputs, all broadcast together.
pub(super) fn variadic(cx: &Ctx<'_>) -> Result<ConstTensor, ImportError> {
    cx.arity(1, usize::MAX)?;
    let op = Binary::Arith(if cx.node.op_type == "Min" {
        Arith::Min
    } else {
        Arith::Max
    });
    let mut acc = cx.input(0)?.clone();
    for i in 1..cx.inputs.len() {
        acc = apply_binary(cx, op, &acc, cx.input(i)?)?;
    }
    Ok(acc)
}

/// `Clip`: `min(max(x, lo), hi)`, as numpy's `clip` (the reference evaluator's) computes it:
/// NaN in the input or a bound propagates, and a lower bound above the upper one gives the
/// upper one. From opset 11 the bounds are optional inputs (floats or integers) and an
/// omitted bound is no bound; before, they are float attributes whose defaults are the ends
/// of the float range, so only infinities are clipped when both are left out.
pub(super) fn clip(cx: &Ctx<'_>) -> Result<ConstTensor, ImportError> {
    let x = cx.input(0)?;
    let (lo, hi) = if cx.opset < 11 {
        cx.arity(1, 1)?;
        if !x.is_float() {
            return Err(cx.err("input must be floating point before opset 11"));
        }
        let lo = cx.attr_float("min")?.unwrap_or(f32::MIN);
        let hi = cx.attr_float("max")?.unwrap_or(f32::MAX);
        (
            Some(ConstTensor::scalar_f32(lo)),
            Some(ConstTensor::scalar_f32(hi)),
        )
    } else {
        cx.arity(1, 3)?;
        (cx.opt(1).cloned(), cx.opt(2).cloned())
    };
    let mut out = x.clone();
    for (bound, op) in [(lo, Arith::Max), (hi, Arith::Min)] {
        if let Some(bound) = bound {
            if bound.len() != 1 {
                return Err(cx.err(format!(
                    "bounds must be scalars, one is of shape {:?}",
                    bound.shape
                )));
            }
            out = apply_binary(cx, Binary::Arith(op), &out, &bound)?;
        }
    }
    Ok(out)
}

/// `Where(condition, X, Y)`: X where the condition is nonzero, else Y; all three broadcast.
pub(super) fn select_where(cx: &Ctx<'_>) -> Result<ConstTensor, ImportError> {
    cx.arity(3, 3)?;
    let View::I64(cond) = cx.view(0)? else {
        return Err(cx.err("condition must be boolean"));
    };
    match (cx.view(1)?, cx.view(2)?) {
        (View::F32(x), View::F32(y)) => pick(cx, &cond, &x, &y),
        (View::I64(x), View::I64(y)) => pick(cx, &cond, &x, &y),
        _ => Err(cx.err("X and Y mix float and integer element types")),
    }
}

fn pick<T: Elem>(
    cx: &Ctx<'_>,
    cond: &ArrayRef<i64, IxDyn>,
    x: &ArrayRef<T, IxDyn>,
    y: &ArrayRef<T, IxDyn>,
) -> Result<ConstTensor, ImportError> {
    let shape = array::broadcast_shape(cx, &[cond.shape(), x.shape(), y.shape()])?;
    let cond = array::stretch(cx, cond, &shape)?;
    let (x, y) = (
        array::stretch(cx, x, &shape)?,
        array::stretch(cx, y, &shape)?,
    );
    let out = Zip::from(&cond)
        .and(&x)
        .and(&y)
        .map_collect(|&c, &a, &b| if c != 0 { a } else { b });
    array::output(cx, &out)
}
