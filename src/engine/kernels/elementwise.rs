//! Two-operand element-wise ops (add, sub, mul, div, max, min) with broadcasting, on one
//! sample.
//!
//! The common layouts have their own loops (equal shapes, one value per channel, a scalar);
//! every other broadcast walks the output with a stride per operand, 0 on broadcast axes.

use super::layout::for_each_run;
use crate::graph::BinaryKind;

/// How the operands line up with the output.
#[derive(Clone, Debug, PartialEq, Eq)]
pub enum Broadcast {
    /// `a` and `b` have the output's shape.
    Full,
    /// `a` has the output's shape; `b` holds one value per leading-axis entry, repeated over
    /// `inner` positions.
    PerChannel { inner: usize },
    /// `a` has the output's shape; `b` is one value.
    Scalar,
    /// Any other broadcast: output `shape` (axes merged where possible), each operand read
    /// through its strides.
    General {
        shape: Vec<usize>,
        a: Vec<isize>,
        b: Vec<isize>,
    },
}

/// `a ∘ b` with NaN rules of ONNX's operators (numpy's): max and min propagate NaN.
#[inline(always)]
pub fn apply(kind: BinaryKind, a: f32, b: f32) -> f32 {
    match kind {
        BinaryKind::Add => a + b,
        BinaryKind::Sub => a - b,
        BinaryKind::Mul => a * b,
        BinaryKind::Div => a / b,
        BinaryKind::Max if a.is_nan() || b.is_nan() => f32::NAN,
        BinaryKind::Max => a.max(b),
        BinaryKind::Min if a.is_nan() || b.is_nan() => f32::NAN,
        BinaryKind::Min => a.min(b),
    }
}

/// Element-wise `a ∘ b` (or `b ∘ a` when `swapped`) into `out`, `b` lined up as `how` says.
///
/// The operation and the operand order are settled here, once per call, so each layout's loop
/// is compiled for one operation and vectorises (a choice made per element measured several
/// times slower on the per-channel scaling of squeeze-and-excitation blocks).
pub fn binary(
    how: &Broadcast,
    kind: BinaryKind,
    swapped: bool,
    a: &[f32],
    b: &[f32],
    out: &mut [f32],
) {
    macro_rules! with {
        ($kind:path) => {
            if swapped {
                lined_up(how, a, b, out, |x, y| apply($kind, y, x))
            } else {
                lined_up(how, a, b, out, |x, y| apply($kind, x, y))
            }
        };
    }
    match kind {
        BinaryKind::Add => with!(BinaryKind::Add),
        BinaryKind::Sub => with!(BinaryKind::Sub),
        BinaryKind::Mul => with!(BinaryKind::Mul),
        BinaryKind::Div => with!(BinaryKind::Div),
        BinaryKind::Max => with!(BinaryKind::Max),
        BinaryKind::Min => with!(BinaryKind::Min),
    }
}

/// `out = f(a, b)` element by element, `b` lined up as `how` says.
#[inline(always)]
fn lined_up(how: &Broadcast, a: &[f32], b: &[f32], out: &mut [f32], f: impl Fn(f32, f32) -> f32) {
    match how {
        Broadcast::Full => {
            for ((o, &x), &y) in out.iter_mut().zip(a).zip(b) {
                *o = f(x, y);
            }
        }
        Broadcast::PerChannel { inner } => {
            for (ch, &y) in b.iter().enumerate() {
                let src = &a[ch * inner..][..*inner];
                let dst = &mut out[ch * inner..][..*inner];
                for (o, &x) in dst.iter_mut().zip(src) {
                    *o = f(x, y);
                }
            }
        }
        Broadcast::Scalar => {
            let y = b[0];
            for (o, &x) in out.iter_mut().zip(a) {
                *o = f(x, y);
            }
        }
        Broadcast::General {
            shape,
            a: sa,
            b: sb,
        } => {
            let (ia, ib) = (sa[sa.len() - 1], sb[sb.len() - 1]);
            for_each_run(shape, [sa, sb], [0, 0], |at, [oa, ob], n| {
                for (k, o) in out[at..at + n].iter_mut().enumerate() {
                    let k = k as isize;
                    *o = f(a[(oa + k * ia) as usize], b[(ob + k * ib) as usize]);
                }
            });
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::engine::kernels::layout::{merge_axes, row_major_strides};

    // numpy broadcasting of [2, 1] against [1, 3] (numpy's documented rule), as a subtraction
    // so that operand order shows.
    #[test]
    fn general_broadcast_keeps_operand_order() {
        let a = [10.0f32, 20.0]; // [2, 1]
        let b = [1.0f32, 2.0, 3.0]; // [1, 3]
        let sa = vec![row_major_strides(&[2, 1])[0], 0];
        let sb = vec![0, 1];
        let (shape, [sa, sb]) = merge_axes(&[2, 3], [&sa, &sb]);
        let how = Broadcast::General {
            shape,
            a: sa,
            b: sb,
        };
        let mut y = [0.0f32; 6];
        binary(&how, BinaryKind::Sub, false, &a, &b, &mut y);
        assert_eq!(y, [9.0, 8.0, 7.0, 19.0, 18.0, 17.0]);
        binary(&how, BinaryKind::Sub, true, &a, &b, &mut y);
        assert_eq!(y, [-9.0, -8.0, -7.0, -19.0, -18.0, -17.0]);
    }

    #[test]
    fn max_and_min_propagate_nan() {
        assert!(apply(BinaryKind::Max, f32::NAN, 1.0).is_nan());
        assert!(apply(BinaryKind::Min, 1.0, f32::NAN).is_nan());
        assert_eq!(apply(BinaryKind::Max, -1.0, 2.0), 2.0);
    }
}
