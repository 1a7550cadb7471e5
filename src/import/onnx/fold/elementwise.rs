//! Folding of the element-wise operators: arithmetic (`Add`, `Sub`, `Mul`, `Div`, `Min`,
//! `Max`), comparisons (`Equal`, `Less`, `Greater`, `LessOrEqual`, `GreaterOrEqual`), logic
//! (`And`, `Or`, `Not`, `Where`) and `Neg`, `Abs`, `Floor`, `Ceil`, `Sqrt`. Inputs broadcast
//! multidirectionally (numpy rules) through [`Walk::broadcast`].

use super::Ctx;
use super::layout::{Walk, broadcast_shapes};
use crate::import::ImportError;
use crate::import::onnx::tensor::{ConstData, ConstTensor};

/// Two-input element-wise operators with multidirectional broadcasting.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub(super) enum Binary {
    Arith(Arith),
    Compare(Compare),
    /// `And` (false) or `Or` (true), on booleans.
    Logic {
        or: bool,
    },
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

/// Applies `op` to two constants, broadcasting.
fn apply_binary(
    cx: &Ctx<'_>,
    op: Binary,
    a: &ConstTensor,
    b: &ConstTensor,
) -> Result<ConstTensor, ImportError> {
    use ConstData::{F32, I64};
    let shape = broadcast_shapes(&[&a.shape, &b.shape]).map_err(|p| cx.err(p))?;
    cx.count(&shape)?;
    let pairs = || Walk::broadcast(&a.shape, &shape).zip(Walk::broadcast(&b.shape, &shape));
    let data = match (op, &a.data, &b.data) {
        (Binary::Compare(c), F32(x), F32(y)) => {
            I64(pairs().map(|(i, j)| c.eval(x[i], y[j])).collect())
        }
        (Binary::Compare(c), I64(x), I64(y)) => {
            I64(pairs().map(|(i, j)| c.eval(x[i], y[j])).collect())
        }
        (Binary::Logic { or }, I64(x), I64(y)) => I64(pairs()
            .map(|(i, j)| {
                let (p, q) = (x[i] != 0, y[j] != 0);
                i64::from(if or { p || q } else { p && q })
            })
            .collect()),
        (Binary::Logic { .. }, F32(_), F32(_)) => {
            return Err(cx.err("inputs must be booleans"));
        }
        (Binary::Arith(o), F32(x), F32(y)) => {
            F32(pairs().map(|(i, j)| o.float(x[i], y[j])).collect())
        }
        (Binary::Arith(o), I64(x), I64(y)) => I64(pairs()
            .map(|(i, j)| o.int(x[i], y[j]))
            .collect::<Option<_>>()
            .ok_or_else(|| cx.err("integer division by zero"))?),
        _ => {
            return Err(cx.err(
                "inputs mix float and integer element types; the standard requires one type",
            ));
        }
    };
    Ok(ConstTensor { shape, data })
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

/// `Where(condition, X, Y)`: X where the condition is nonzero, else Y; all three broadcast.
pub(super) fn select_where(cx: &Ctx<'_>) -> Result<ConstTensor, ImportError> {
    cx.arity(3, 3)?;
    let (c, x, y) = (cx.input(0)?, cx.input(1)?, cx.input(2)?);
    let ConstData::I64(cond) = &c.data else {
        return Err(cx.err("condition must be boolean"));
    };
    let shape = broadcast_shapes(&[&c.shape, &x.shape, &y.shape]).map_err(|p| cx.err(p))?;
    cx.count(&shape)?;
    let picks = || {
        Walk::broadcast(&c.shape, &shape)
            .zip(Walk::broadcast(&x.shape, &shape))
            .zip(Walk::broadcast(&y.shape, &shape))
            .map(|((k, i), j)| (cond[k] != 0, i, j))
    };
    let data = match (&x.data, &y.data) {
        (ConstData::F32(a), ConstData::F32(b)) => ConstData::F32(
            picks()
                .map(|(t, i, j)| if t { a[i] } else { b[j] })
                .collect(),
        ),
        (ConstData::I64(a), ConstData::I64(b)) => ConstData::I64(
            picks()
                .map(|(t, i, j)| if t { a[i] } else { b[j] })
                .collect(),
        ),
        _ => return Err(cx.err("X and Y mix float and integer element types")),
    };
    Ok(ConstTensor { shape, data })
}

/// One-input element-wise operators.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub(super) enum Unary {
    Neg,
    Abs,
    Floor,
    Ceil,
    Sqrt,
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
            "Not" => Unary::Not,
            _ => return None,
        })
    }
}

pub(super) fn unary(cx: &Ctx<'_>, op: Unary) -> Result<ConstTensor, ImportError> {
    cx.arity(1, 1)?;
    let x = cx.input(0)?;
    let data = match (&x.data, op) {
        (ConstData::F32(v), Unary::Neg) => ConstData::F32(v.iter().map(|&a| -a).collect()),
        (ConstData::F32(v), Unary::Abs) => ConstData::F32(v.iter().map(|a| a.abs()).collect()),
        (ConstData::F32(v), Unary::Floor) => ConstData::F32(v.iter().map(|a| a.floor()).collect()),
        (ConstData::F32(v), Unary::Ceil) => ConstData::F32(v.iter().map(|a| a.ceil()).collect()),
        (ConstData::F32(v), Unary::Sqrt) => ConstData::F32(v.iter().map(|a| a.sqrt()).collect()),
        (ConstData::I64(v), Unary::Neg) => {
            ConstData::I64(v.iter().map(|a| a.wrapping_neg()).collect())
        }
        (ConstData::I64(v), Unary::Abs) => {
            ConstData::I64(v.iter().map(|a| a.wrapping_abs()).collect())
        }
        (ConstData::I64(v), Unary::Not) => {
            ConstData::I64(v.iter().map(|&a| i64::from(a == 0)).collect())
        }
        (ConstData::I64(_), _) => return Err(cx.err("input must be floating point")),
        (ConstData::F32(_), _) => return Err(cx.err("input must be boolean")),
    };
    Ok(ConstTensor {
        shape: x.shape.clone(),
        data,
    })
}
