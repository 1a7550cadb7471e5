//! Operators that take parts of tensors or join them: `Gather` (ndarray's `select` along an
//! axis), `Slice` (`slice_each_axis`, with the standard's clamping), `Split` (consecutive
//! slices along an axis, one output each) and `Concat` (`concatenate`). Indices, bounds and
//! shapes are checked before ndarray sees them, since its methods panic on bad ones.

use ndarray::{ArrayViewD, Axis, Slice, concatenate};

use super::Ctx;
use super::array::{self, Elem, View, each_type};
use crate::import::ImportError;
use crate::import::onnx::tensor::{ConstData, ConstTensor};

/// `Gather`: `data[:axis] ++ indices ++ data[axis+1:]`; negative indices count from the end.
pub(super) fn gather(cx: &Ctx<'_>) -> Result<ConstTensor, ImportError> {
    cx.arity(2, 2)?;
    let data = cx.input(0)?;
    let indices = cx.input(1)?;
    let ConstData::I64(idx) = &indices.data else {
        return Err(cx.err("indices must be integers"));
    };
    if data.shape.is_empty() {
        return Err(cx.err("data must have rank 1 or more"));
    }
    let rank = data.shape.len();
    let ax = cx.axis("axis", cx.attr_int("axis")?.unwrap_or(0), rank)?;
    let dim = data.shape[ax];
    let idx = idx
        .iter()
        .map(|&i| {
            let j = if i < 0 { i + dim as i64 } else { i };
            if j < 0 || j >= dim as i64 {
                return Err(cx.err(format!("index {i} is out of range for an axis of {dim}")));
            }
            Ok(j as usize)
        })
        .collect::<Result<Vec<_>, _>>()?;
    let mut shape = data.shape[..ax].to_vec();
    shape.extend_from_slice(&indices.shape);
    shape.extend_from_slice(&data.shape[ax + 1..]);
    cx.count(&shape)?;
    // `select` puts the flat list of indices in place of the axis: the output in row-major
    // order, with the indices' shape still to restore.
    each_type!(cx.view(0)?, |a| Ok(array::output_as(
        &a.select(Axis(ax), &idx),
        shape
    )))
}

/// `Concat` along `axis`; all inputs share a rank, an element type and every other dim.
pub(super) fn concat(cx: &Ctx<'_>) -> Result<ConstTensor, ImportError> {
    cx.arity(1, usize::MAX)?;
    let parts = (0..cx.inputs.len())
        .map(|i| cx.input(i))
        .collect::<Result<Vec<_>, _>>()?;
    let first = parts[0];
    let rank = first.shape.len();
    let Some(a) = cx.attr_int("axis")? else {
        return Err(cx.err("attribute \"axis\" is required"));
    };
    let ax = cx.axis("axis", a, rank)?;
    let mut shape = first.shape.clone();
    shape[ax] = 0;
    for p in &parts {
        let same_rest =
            p.shape.len() == rank && (0..rank).all(|d| d == ax || p.shape[d] == first.shape[d]);
        if !same_rest {
            return Err(cx.err(format!(
                "input shapes {:?} and {:?} differ outside axis {ax}",
                first.shape, p.shape
            )));
        }
        shape[ax] = shape[ax]
            .checked_add(p.shape[ax])
            .ok_or_else(|| cx.err("output is too large"))?;
    }
    cx.count(&shape)?;
    let (mut floats, mut ints) = (Vec::new(), Vec::new());
    for p in &parts {
        match array::view(cx, p)? {
            View::F32(v) => floats.push(v),
            View::I64(v) => ints.push(v),
        }
    }
    match (floats.is_empty(), ints.is_empty()) {
        (false, true) => join(cx, ax, &floats),
        (true, false) => join(cx, ax, &ints),
        _ => Err(cx.err("inputs mix float and integer element types")),
    }
}

fn join<T: Elem>(
    cx: &Ctx<'_>,
    ax: usize,
    parts: &[ArrayViewD<'_, T>],
) -> Result<ConstTensor, ImportError> {
    let joined = concatenate(Axis(ax), parts).map_err(|e| cx.err(format!("cannot join: {e}")))?;
    array::output(cx, &joined)
}

/// `Slice`'s starts, ends, axes and steps: attributes before opset 10 (no steps), inputs from
/// 10. Omitted axes are `0..n`, omitted steps 1; the four lists have one length.
type SliceArgs = (Vec<i64>, Vec<i64>, Vec<i64>, Vec<i64>);

fn slice_args(cx: &Ctx<'_>) -> Result<SliceArgs, ImportError> {
    let (starts, ends, axes, steps) = if cx.opset < 10 {
        cx.arity(1, 1)?;
        let (Some(s), Some(e)) = (cx.attr_ints("starts")?, cx.attr_ints("ends")?) else {
            return Err(cx.err("attributes \"starts\" and \"ends\" are required"));
        };
        (s, e, cx.attr_ints("axes")?, None)
    } else {
        cx.arity(3, 5)?;
        let axes = cx.opt(3).map(|_| cx.ints(3, "axes")).transpose()?;
        let steps = cx.opt(4).map(|_| cx.ints(4, "steps")).transpose()?;
        (cx.ints(1, "starts")?, cx.ints(2, "ends")?, axes, steps)
    };
    let n = starts.len();
    let axes = axes.unwrap_or_else(|| (0..n as i64).collect());
    let steps = steps.unwrap_or_else(|| vec![1; n]);
    if ends.len() != n || axes.len() != n || steps.len() != n {
        return Err(cx.err(format!(
            "starts, ends, axes and steps have different lengths ({n}, {}, {}, {})",
            ends.len(),
            axes.len(),
            steps.len()
        )));
    }
    if steps.contains(&0) {
        return Err(cx.err("steps must not be 0"));
    }
    Ok((starts, ends, axes, steps))
}

/// `Slice`, with the standard's clamping: negative starts/ends count from the end; starts
/// clamp to `[0, dim]` (`[0, dim-1]` for negative steps), ends to `[0, dim]` (`[-1, dim-1]`).
pub(super) fn slice(cx: &Ctx<'_>) -> Result<ConstTensor, ImportError> {
    let data = cx.input(0)?;
    let (starts, ends, axes, steps) = slice_args(cx)?;
    let rank = data.shape.len();
    let mut per_axis = vec![Slice::from(..); rank];
    for (i, a) in cx.axes("axis", &axes, rank)?.into_iter().enumerate() {
        per_axis[a] = axis_slice(data.shape[a], starts[i], ends[i], steps[i]);
    }
    each_type!(cx.view(0)?, |a| array::output(
        cx,
        &a.slice_each_axis(|d| per_axis[d.axis.index()])
    ))
}

/// The elements `Slice` takes along an axis of `dim` (`step` is not 0), as ndarray's `Slice`.
/// ONNX (like numpy) walks from the clamped start by `step`; ndarray takes a range and, for a
/// negative step, walks it from its end. So: find the first index and the count, then give
/// ndarray the range from the lowest index taken to one past the highest.
fn axis_slice(dim: usize, start: i64, end: i64, step: i64) -> Slice {
    // An axis of an array in memory: dim fits in i64 and isize.
    let dim = dim as i64;
    let from_end = |v: i64| if v < 0 { v.saturating_add(dim) } else { v };
    let (first, len) = if step > 0 {
        let s = from_end(start).clamp(0, dim);
        let e = from_end(end).clamp(0, dim);
        (s, if e > s { (e - s - 1) / step + 1 } else { 0 })
    } else if dim == 0 {
        (0, 0)
    } else {
        let s = from_end(start).clamp(0, dim - 1);
        let e = from_end(end).clamp(-1, dim - 1);
        let len = if s > e {
            ((s - e - 1) as u64 / step.unsigned_abs()) as i64 + 1
        } else {
            0
        };
        (s, len)
    };
    if len <= 1 {
        return Slice::new(first as isize, Some((first + len) as isize), 1);
    }
    // Two or more elements: |step| < dim, so neither the last index nor the step overflows.
    let last = first + (len - 1) * step;
    Slice::new(
        first.min(last) as isize,
        Some(first.max(last) as isize + 1),
        step as isize,
    )
}

/// `Split` into one output per node output along `axis` (default 0). The lengths come from
/// `split` (an attribute before opset 13, an input from 13) or, from opset 18, from
/// `num_outputs`: parts of `ceil(dim / n)`, the last one smaller. With neither, the axis is
/// split into equal parts, one per output (the only way before opset 18; from 18 the
/// standard asks for one of the two, and the reference evaluator falls back to this).
pub(super) fn split(cx: &Ctx<'_>) -> Result<Vec<ConstTensor>, ImportError> {
    let data = cx.input(0)?;
    let outputs = cx.node.output.len();
    let given = if cx.opset < 13 {
        cx.arity(1, 1)?;
        cx.attr_ints("split")?
    } else {
        cx.arity(1, 2)?;
        cx.opt(1).map(|_| cx.ints(1, "split")).transpose()?
    };
    let num_outputs = if cx.opset >= 18 {
        cx.attr_int("num_outputs")?
    } else {
        None
    };
    let ax = cx.axis("axis", cx.attr_int("axis")?.unwrap_or(0), data.shape.len())?;
    let dim = data.shape[ax];
    let lengths = match (given, num_outputs) {
        (Some(_), Some(_)) => {
            return Err(cx.err("has both split and num_outputs; the standard allows one"));
        }
        (Some(list), None) => {
            let lengths = list
                .iter()
                .map(|&l| usize::try_from(l).map_err(|_| cx.err(format!("split holds {l}"))))
                .collect::<Result<Vec<_>, _>>()?;
            let total = lengths.iter().try_fold(0usize, |t, &l| t.checked_add(l));
            if lengths.len() != outputs || total != Some(dim) {
                return Err(cx.err(format!(
                    "split {list:?} must have one length per output ({outputs}) summing to \
                     the axis's size ({dim})"
                )));
            }
            lengths
        }
        (None, Some(n)) => {
            if usize::try_from(n) != Ok(outputs) {
                return Err(cx.err(format!("num_outputs is {n}, but the node has {outputs}")));
            }
            let part = dim.div_ceil(outputs);
            let Some(last) = dim.checked_sub(part * (outputs - 1)) else {
                return Err(cx.err(format!(
                    "an axis of {dim} cannot be split into {outputs} parts of {part} and a \
                     smaller last one"
                )));
            };
            let mut lengths = vec![part; outputs];
            lengths[outputs - 1] = last;
            lengths
        }
        (None, None) => {
            if dim % outputs != 0 {
                return Err(cx.err(format!(
                    "an axis of {dim} cannot be split into {outputs} equal parts"
                )));
            }
            vec![dim / outputs; outputs]
        }
    };
    each_type!(cx.view(0)?, |a| {
        let mut start = 0;
        lengths
            .iter()
            .map(|&len| {
                let part = a.slice_axis(Axis(ax), Slice::from(start..start + len));
                start += len;
                array::output(cx, &part)
            })
            .collect()
    })
}

#[cfg(test)]
mod tests {
    use super::axis_slice;
    use ndarray::{Array1, s};

    /// Every start, end and step in a small window, against numpy's slicing rule written out
    /// by hand (the ONNX Slice clamping rules are numpy's for steps of either sign): walk from
    /// the clamped start by the step while inside the clamped end.
    #[test]
    fn axis_slice_matches_numpy_rule() {
        for dim in 0..5usize {
            let a = Array1::from_iter(0..dim as i64);
            for start in -7..7 {
                for end in -7..7 {
                    for step in [-3i64, -2, -1, 1, 2, 3] {
                        let d = dim as i64;
                        let fix = |v: i64| if v < 0 { v + d } else { v };
                        let mut want = Vec::new();
                        if step > 0 {
                            let (mut i, e) = (fix(start).clamp(0, d), fix(end).clamp(0, d));
                            while i < e {
                                want.push(i);
                                i += step;
                            }
                        } else if d > 0 {
                            let (mut i, e) =
                                (fix(start).clamp(0, d - 1), fix(end).clamp(-1, d - 1));
                            while i > e {
                                want.push(i);
                                i += step;
                            }
                        }
                        let got = a.slice(s![axis_slice(dim, start, end, step)]).to_vec();
                        assert_eq!(got, want, "dim {dim} [{start}:{end}:{step}]");
                    }
                }
            }
        }
    }
}
