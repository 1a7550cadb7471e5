//! Reductions: `ReduceProd`. The kept axes are moved to the front and the reduced ones to the
//! back (`permuted_axes`), the result is read as a matrix of one row per output element
//! (`to_shape`), and each row is multiplied out in order — the row-major order of the
//! reduced elements, as a walk of the input accumulating into each output would take them.

use ndarray::{ArrayRef, Axis, IxDyn};

use super::Ctx;
use super::array::{Elem, View};
use crate::import::ImportError;
use crate::import::onnx::tensor::ConstTensor;

/// `ReduceProd` over `axes` (attribute before opset 18, input from 18; none = all axes,
/// unless `noop_with_empty_axes`), keeping reduced dims as 1 when `keepdims` (default 1).
/// Integer products wrap, as numpy's do.
pub(super) fn reduce_prod(cx: &Ctx<'_>) -> Result<ConstTensor, ImportError> {
    let data = cx.input(0)?;
    let list = if cx.opset < 18 {
        cx.arity(1, 1)?;
        cx.attr_ints("axes")?
    } else {
        cx.arity(1, 2)?;
        cx.opt(1).map(|_| cx.ints(1, "axes")).transpose()?
    };
    let keep = cx.attr_int("keepdims")?.unwrap_or(1) != 0;
    let noop = cx.opset >= 18 && cx.attr_int("noop_with_empty_axes")?.unwrap_or(0) != 0;
    let rank = data.shape.len();
    let mut reduced = vec![false; rank];
    match list {
        Some(l) if !l.is_empty() => {
            for a in cx.axes("axis", &l, rank)? {
                reduced[a] = true;
            }
        }
        _ if noop => return Ok(data.clone()),
        _ => reduced.fill(true),
    }
    let shape: Vec<usize> = (0..rank)
        .filter_map(|d| match (reduced[d], keep) {
            (false, _) => Some(data.shape[d]),
            (true, true) => Some(1),
            (true, false) => None,
        })
        .collect();
    // An empty input may have huge other dims, and then so may the output.
    cx.count(&shape)?;
    Ok(match cx.view(0)? {
        View::F32(a) => ConstTensor::f32(shape, products(cx, &a, &reduced, 1.0, |p, x| p * x)?),
        View::I64(a) => ConstTensor::i64(shape, products(cx, &a, &reduced, 1, i64::wrapping_mul)?),
    })
}

/// The products over the `reduced` axes of `a`, one per combination of the kept axes, in
/// row-major order (the caller gives them their shape).
fn products<T: Elem>(
    cx: &Ctx<'_>,
    a: &ArrayRef<T, IxDyn>,
    reduced: &[bool],
    one: T,
    mul: fn(T, T) -> T,
) -> Result<Vec<T>, ImportError> {
    let (kept, gone): (Vec<usize>, Vec<usize>) = (0..a.ndim()).partition(|&d| !reduced[d]);
    // As many rows as output elements, which the caller has counted.
    let rows: usize = kept.iter().map(|&d| a.len_of(Axis(d))).product();
    if a.is_empty() {
        // Every product is empty, so 1.
        return Ok(vec![one; rows]);
    }
    let per_row: usize = gone.iter().map(|&d| a.len_of(Axis(d))).product();
    let order: Vec<usize> = kept.into_iter().chain(gone).collect();
    let moved = a.view().permuted_axes(IxDyn(&order));
    let matrix = moved
        .to_shape((rows, per_row))
        .map_err(|e| cx.err(format!("cannot lay out the reduction: {e}")))?;
    Ok(matrix
        .outer_iter()
        .map(|row| row.iter().fold(one, |p, &x| mul(p, x)))
        .collect())
}
