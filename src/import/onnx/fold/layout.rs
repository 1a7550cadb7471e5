//! Operators that reshape, reorder or repeat elements: `Reshape`, `Squeeze`, `Unsqueeze`
//! (a new shape over the same row-major values), `Transpose` (`permuted_axes`), `Expand`
//! (`broadcast`) and `Tile` (a broadcast of the input with an axis of 1 before each of its
//! axes). Each checks its axes and output shape first; the reordering ones build a view and
//! copy it out through [`array::output`].

use ndarray::{ArrayRef, IxDyn};

use super::array::{self, Elem, each_type};
use super::{Ctx, MAX_RANK};
use crate::import::ImportError;
use crate::import::onnx::tensor::ConstTensor;

/// `data`'s values, unchanged in row-major order, under a new shape of the same count.
fn with_shape(data: &ConstTensor, shape: Vec<usize>) -> ConstTensor {
    ConstTensor {
        shape,
        data: data.data.clone(),
    }
}

/// The `axes` of `Squeeze`/`Unsqueeze`: an attribute before opset 13, an input from 13.
fn squeeze_axes(cx: &Ctx<'_>) -> Result<Option<Vec<i64>>, ImportError> {
    if cx.opset < 13 {
        cx.arity(1, 1)?;
        cx.attr_ints("axes")
    } else {
        cx.arity(1, 2)?;
        cx.opt(1).map(|_| cx.ints(1, "axes")).transpose()
    }
}

/// `Unsqueeze`: inserts dims of 1 at `axes`, which index the output.
pub(super) fn unsqueeze(cx: &Ctx<'_>) -> Result<ConstTensor, ImportError> {
    let data = cx.input(0)?;
    let Some(list) = squeeze_axes(cx)? else {
        return Err(cx.err("axes are required"));
    };
    let rank = data.shape.len() + list.len();
    if rank > MAX_RANK {
        return Err(cx.err(format!(
            "output rank {rank} is over the limit of {MAX_RANK}"
        )));
    }
    let mut inserted = vec![false; rank];
    for a in cx.axes("axis", &list, rank)? {
        inserted[a] = true;
    }
    let mut dims = data.shape.iter();
    let shape = inserted
        .iter()
        .map(|&one| {
            if one {
                1
            } else {
                dims.next().copied().unwrap_or(1)
            }
        })
        .collect();
    Ok(with_shape(data, shape))
}

/// `Squeeze`: removes the dims at `axes` (each must be 1), or every dim of 1 without axes.
pub(super) fn squeeze(cx: &Ctx<'_>) -> Result<ConstTensor, ImportError> {
    let data = cx.input(0)?;
    let rank = data.shape.len();
    let remove = match squeeze_axes(cx)? {
        Some(list) => {
            let mut remove = vec![false; rank];
            for a in cx.axes("axis", &list, rank)? {
                if data.shape[a] != 1 {
                    return Err(cx.err(format!(
                        "axis {a} has size {}, and only dims of 1 can be squeezed",
                        data.shape[a]
                    )));
                }
                remove[a] = true;
            }
            remove
        }
        None => data.shape.iter().map(|&d| d == 1).collect(),
    };
    let shape = data
        .shape
        .iter()
        .zip(&remove)
        .filter_map(|(&d, &r)| (!r).then_some(d))
        .collect();
    Ok(with_shape(data, shape))
}

/// `Reshape`: 0 copies the input's dim (unless `allowzero`, opset 14), one -1 is inferred.
pub(super) fn reshape(cx: &Ctx<'_>) -> Result<ConstTensor, ImportError> {
    cx.arity(2, 2)?;
    let data = cx.input(0)?;
    let target = cx.ints(1, "shape")?;
    let allow_zero = cx.opset >= 14 && cx.attr_int("allowzero")?.unwrap_or(0) != 0;
    let mut infer = None;
    let mut shape = Vec::with_capacity(target.len());
    for (i, &s) in target.iter().enumerate() {
        shape.push(match s {
            -1 if infer.is_none() => {
                infer = Some(i);
                1
            }
            -1 => return Err(cx.err("shape has more than one -1")),
            0 if allow_zero => 0,
            0 => *data.shape.get(i).ok_or_else(|| {
                cx.err(format!(
                    "shape copies dim {i} (0), but the input has rank {}",
                    data.shape.len()
                ))
            })?,
            s => usize::try_from(s).map_err(|_| cx.err(format!("shape holds {s}")))?,
        });
    }
    if allow_zero && infer.is_some() && shape.contains(&0) {
        return Err(cx.err("with allowzero, a shape cannot hold both 0 and -1"));
    }
    let known = cx.count(&shape)?;
    if let Some(i) = infer {
        if known == 0 || data.len() % known != 0 {
            return Err(cx.err(format!(
                "cannot infer the -1 in {target:?} for {} elements",
                data.len()
            )));
        }
        shape[i] = data.len() / known;
    } else if known != data.len() {
        return Err(cx.err(format!(
            "shape {target:?} holds {known} elements, the input {}",
            data.len()
        )));
    }
    Ok(with_shape(data, shape))
}

/// `Transpose` by `perm` (default: reversed axes).
pub(super) fn transpose(cx: &Ctx<'_>) -> Result<ConstTensor, ImportError> {
    cx.arity(1, 1)?;
    let rank = cx.input(0)?.shape.len();
    let perm: Vec<usize> = match cx.attr_ints("perm")? {
        Some(p) => {
            // permuted_axes panics on anything but a permutation: check first.
            let mut seen = vec![false; rank];
            let valid = p.len() == rank
                && p.iter().all(|&a| {
                    usize::try_from(a)
                        .ok()
                        .filter(|&a| a < rank)
                        .is_some_and(|a| !std::mem::replace(&mut seen[a], true))
                });
            if !valid {
                return Err(cx.err(format!("perm {p:?} is not a permutation of 0..{rank}")));
            }
            p.iter().map(|&a| a as usize).collect()
        }
        None => (0..rank).rev().collect(),
    };
    each_type!(cx.view(0)?, |a| array::output(
        cx,
        &a.permuted_axes(IxDyn(&perm))
    ))
}

/// `Expand`: broadcasts the input and `shape` together (either may hold the 1s).
pub(super) fn expand(cx: &Ctx<'_>) -> Result<ConstTensor, ImportError> {
    cx.arity(2, 2)?;
    let target = cx.sizes(1, "shape")?;
    let shape = array::broadcast_shape(cx, &[&cx.input(0)?.shape, &target])?;
    each_type!(cx.view(0)?, |a| array::output(
        cx,
        &array::stretch(cx, &a, &shape)?
    ))
}

/// `Tile`: repeats the input `repeats[d]` times along each axis d.
pub(super) fn tile(cx: &Ctx<'_>) -> Result<ConstTensor, ImportError> {
    cx.arity(2, 2)?;
    let data = cx.input(0)?;
    let repeats = cx.sizes(1, "repeats")?;
    let rank = data.shape.len();
    if repeats.len() != rank {
        return Err(cx.err(format!(
            "repeats has {} values for an input of rank {rank}",
            repeats.len()
        )));
    }
    let shape = (0..rank)
        .map(|d| data.shape[d].checked_mul(repeats[d]))
        .collect::<Option<Vec<_>>>()
        .ok_or_else(|| cx.err("output is too large"))?;
    cx.count(&shape)?;
    each_type!(cx.view(0)?, |a| tiled(cx, &a, &repeats, shape))
}

/// Output index `r·dim + i` along axis d reads input index i: the input with an axis of 1
/// before each of its own, `[1, d0, 1, d1, …]`, broadcast to `[r0, d0, r1, d1, …]`, is the
/// output in row-major order. `shape`, the output's, is already checked against the limits.
fn tiled<T: Elem>(
    cx: &Ctx<'_>,
    a: &ArrayRef<T, IxDyn>,
    repeats: &[usize],
    shape: Vec<usize>,
) -> Result<ConstTensor, ImportError> {
    if shape.contains(&0) {
        // Nothing to repeat. (The spaced-out shape below could pair a huge repeat count with
        // an empty axis, which ndarray's broadcast would refuse as too large.)
        return Ok(T::tensor(shape, Vec::new()));
    }
    let spaced: Vec<usize> = a.shape().iter().flat_map(|&d| [1, d]).collect();
    let split: Vec<usize> = a
        .shape()
        .iter()
        .zip(repeats)
        .flat_map(|(&d, &r)| [r, d])
        .collect();
    let spaced = a
        .view()
        .into_shape_with_order(IxDyn(&spaced))
        .map_err(|e| cx.err(format!("cannot space out the input's axes: {e}")))?;
    // Not array::output: the spaced-out view has twice the output's rank, which may pass
    // MAX_RANK when the output's does not.
    Ok(array::output_as(
        &array::stretch(cx, &spaced, &split)?,
        shape,
    ))
}
