//! Folding of the operators that only move elements: `Gather`, `Unsqueeze`, `Squeeze`,
//! `Concat`, `Slice`, `Reshape`, `Transpose`, `Expand`, `Tile` — and the strided walk and
//! multidirectional broadcasting that the element-wise operators share with them.
//!
//! Every output is produced by a [`Walk`]: an odometer over the output shape that yields,
//! for each output element in row-major order, the flat offset of the input element it
//! copies. Shapes are checked (and output sizes capped) before a walk starts, so the offsets
//! it yields are in bounds by construction.

use super::{Ctx, MAX_RANK};
use crate::import::ImportError;
use crate::import::onnx::tensor::{ConstData, ConstTensor};

/// Row-major strides of `shape`, in elements.
pub(super) fn strides(shape: &[usize]) -> Vec<usize> {
    let mut s = vec![1; shape.len()];
    for d in (0..shape.len().saturating_sub(1)).rev() {
        s[d] = s[d + 1] * shape[d + 1];
    }
    s
}

/// Odometer over `shape` that yields `base + Σ index[d] · strides[d]` for every index in
/// row-major order.
pub(super) struct Walk {
    shape: Vec<usize>,
    strides: Vec<isize>,
    index: Vec<usize>,
    offset: isize,
    remaining: usize,
}

impl Walk {
    /// `shape`'s element count must already be checked (it bounds the walk's length).
    pub(super) fn new(shape: Vec<usize>, strides: Vec<isize>, base: isize) -> Walk {
        debug_assert_eq!(shape.len(), strides.len());
        // With a zero dim the walk is empty, and the other dims were never bounded (Tile's
        // split shape can pair a huge repeat count with an empty axis): do not multiply them.
        let remaining = if shape.contains(&0) {
            0
        } else {
            shape.iter().product()
        };
        Walk {
            index: vec![0; shape.len()],
            shape,
            strides,
            offset: base,
            remaining,
        }
    }

    /// Reads an input of shape `input` broadcast to `output` (right-aligned; `input`'s dims
    /// are each 1 or equal to `output`'s, as [`broadcast_shapes`] ensures).
    pub(super) fn broadcast(input: &[usize], output: &[usize]) -> Walk {
        let in_strides = strides(input);
        let lead = output.len() - input.len();
        let strides = (0..output.len())
            .map(|d| match d.checked_sub(lead) {
                Some(i) if input[i] != 1 => in_strides[i] as isize,
                _ => 0,
            })
            .collect();
        Walk::new(output.to_vec(), strides, 0)
    }
}

impl Iterator for Walk {
    type Item = usize;

    fn next(&mut self) -> Option<usize> {
        if self.remaining == 0 {
            return None;
        }
        self.remaining -= 1;
        let current = self.offset;
        for d in (0..self.shape.len()).rev() {
            self.index[d] += 1;
            self.offset += self.strides[d];
            if self.index[d] < self.shape[d] {
                break;
            }
            self.offset -= self.strides[d] * self.shape[d] as isize;
            self.index[d] = 0;
        }
        // Offsets stay within the input by the callers' shape checks, so never negative.
        Some(current as usize)
    }
}

/// The multidirectional (numpy) broadcast of `shapes`: right-aligned, each pair of dims
/// equal or one of them 1 (ONNX "Broadcasting in ONNX", docs/Broadcasting.md).
pub(super) fn broadcast_shapes(shapes: &[&[usize]]) -> Result<Vec<usize>, String> {
    let rank = shapes.iter().map(|s| s.len()).max().unwrap_or(0);
    let mut out = vec![1usize; rank];
    for s in shapes {
        let lead = rank - s.len();
        for (i, &d) in s.iter().enumerate() {
            let o = &mut out[lead + i];
            if *o == 1 {
                *o = d;
            } else if d != 1 && d != *o {
                return Err(format!(
                    "shapes {:?} cannot be broadcast together",
                    shapes.iter().collect::<Vec<_>>()
                ));
            }
        }
    }
    Ok(out)
}

/// Copies `data`'s elements at `offsets`, in order.
pub(super) fn select(data: &ConstData, offsets: impl Iterator<Item = usize>) -> ConstData {
    match data {
        ConstData::F32(v) => ConstData::F32(offsets.map(|i| v[i]).collect()),
        ConstData::I64(v) => ConstData::I64(offsets.map(|i| v[i]).collect()),
    }
}

/// Resolves a possibly negative axis against `rank` (valid: `-rank ..= rank - 1`).
pub(super) fn axis(cx: &Ctx<'_>, what: &str, a: i64, rank: usize) -> Result<usize, ImportError> {
    let r = rank as i64;
    if a < -r || a >= r {
        return Err(cx.err(format!("{what} {a} is out of range for rank {rank}")));
    }
    Ok(if a < 0 { (a + r) as usize } else { a as usize })
}

/// Resolves a list of axes, refusing repeats.
fn axes(cx: &Ctx<'_>, what: &str, list: &[i64], rank: usize) -> Result<Vec<usize>, ImportError> {
    let mut seen = vec![false; rank];
    list.iter()
        .map(|&a| {
            let a = axis(cx, what, a, rank)?;
            if std::mem::replace(&mut seen[a], true) {
                return Err(cx.err(format!("{what} {a} is given twice")));
            }
            Ok(a)
        })
        .collect()
}

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
    let ax = axis(
        cx,
        "axis",
        cx.attr_int("axis")?.unwrap_or(0),
        data.shape.len(),
    )?;
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
    let outer: usize = data.shape[..ax].iter().product();
    let inner: usize = data.shape[ax + 1..].iter().product();
    let offsets = (0..outer).flat_map(|o| {
        idx.iter()
            .flat_map(move |&j| (0..inner).map(move |k| (o * dim + j) * inner + k))
    });
    Ok(ConstTensor {
        data: select(&data.data, offsets),
        shape,
    })
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
    for a in axes(cx, "axis", &list, rank)? {
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
    Ok(ConstTensor {
        shape,
        data: data.data.clone(),
    })
}

/// `Squeeze`: removes the dims at `axes` (each must be 1), or every dim of 1 without axes.
pub(super) fn squeeze(cx: &Ctx<'_>) -> Result<ConstTensor, ImportError> {
    let data = cx.input(0)?;
    let rank = data.shape.len();
    let remove = match squeeze_axes(cx)? {
        Some(list) => {
            let mut remove = vec![false; rank];
            for a in axes(cx, "axis", &list, rank)? {
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
    Ok(ConstTensor {
        shape,
        data: data.data.clone(),
    })
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
    let ax = axis(cx, "axis", a, rank)?;
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
        if p.is_float() != first.is_float() {
            return Err(cx.err("inputs mix float and integer element types"));
        }
        shape[ax] = shape[ax]
            .checked_add(p.shape[ax])
            .ok_or_else(|| cx.err("output is too large"))?;
    }
    cx.count(&shape)?;
    let outer: usize = first.shape[..ax].iter().product();
    let inner: usize = first.shape[ax + 1..].iter().product();
    // Input k contributes a block of shape[ax]·inner elements per outer index; its data is
    // addressed from an offset that `select` sees as one flat concatenation.
    let mut starts = Vec::with_capacity(parts.len());
    let mut total = 0usize;
    for p in &parts {
        starts.push(total);
        total += p.len();
    }
    let flat = match first.data {
        ConstData::F32(_) => ConstData::F32(parts.iter().flat_map(|p| p.to_f32()).collect()),
        ConstData::I64(_) => ConstData::I64(parts.iter().flat_map(|p| p.to_i64()).collect()),
    };
    let offsets = (0..outer).flat_map(|o| {
        parts.iter().zip(&starts).flat_map(move |(p, &s)| {
            let block = p.shape[ax] * inner;
            (0..block).map(move |k| s + o * block + k)
        })
    });
    Ok(ConstTensor {
        data: select(&flat, offsets),
        shape,
    })
}

/// `Slice`, with the standard's clamping: negative starts/ends count from the end; starts
/// clamp to `[0, dim]` (`[0, dim-1]` for negative steps), ends to `[0, dim]` (`[-1, dim-1]`).
pub(super) fn slice(cx: &Ctx<'_>) -> Result<ConstTensor, ImportError> {
    let data = cx.input(0)?;
    let (starts, ends, axes_list, steps) = if cx.opset < 10 {
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
    let axes_list = axes_list.unwrap_or_else(|| (0..n as i64).collect());
    let steps = steps.unwrap_or_else(|| vec![1; n]);
    if ends.len() != n || axes_list.len() != n || steps.len() != n {
        return Err(cx.err(format!(
            "starts, ends, axes and steps have different lengths ({n}, {}, {}, {})",
            ends.len(),
            axes_list.len(),
            steps.len()
        )));
    }
    let rank = data.shape.len();
    let in_strides = strides(&data.shape);
    // Per axis: first index, step and output length; untouched axes copy whole.
    let mut first = vec![0i64; rank];
    let mut step = vec![1i64; rank];
    let mut shape = data.shape.clone();
    for (i, a) in axes(cx, "axis", &axes_list, rank)?.into_iter().enumerate() {
        let dim = data.shape[a] as i64;
        let st = steps[i];
        let from_end = |v: i64| if v < 0 { v.saturating_add(dim) } else { v };
        let len = if st == 0 {
            return Err(cx.err("steps must not be 0"));
        } else if st > 0 {
            let s = from_end(starts[i]).clamp(0, dim);
            let e = from_end(ends[i]).clamp(0, dim);
            first[a] = s;
            if e > s {
                (e - s - 1) as u64 / st as u64 + 1
            } else {
                0
            }
        } else if dim == 0 {
            0
        } else {
            let s = from_end(starts[i]).clamp(0, dim - 1);
            let e = from_end(ends[i]).clamp(-1, dim - 1);
            first[a] = s;
            if s > e {
                (s - e - 1) as u64 / st.unsigned_abs() + 1
            } else {
                0
            }
        };
        step[a] = st;
        // len ≤ dim, so it fits.
        shape[a] = len as usize;
    }
    cx.count(&shape)?;
    let base: isize = (0..rank)
        .map(|d| first[d] as isize * in_strides[d] as isize)
        .sum();
    // A step only moves the walk when the axis yields two or more elements, and then
    // |step| < dim, so the product cannot overflow; otherwise use 0.
    let walk_strides = (0..rank)
        .map(|d| {
            if shape[d] > 1 {
                step[d] as isize * in_strides[d] as isize
            } else {
                0
            }
        })
        .collect();
    Ok(ConstTensor {
        data: select(&data.data, Walk::new(shape.clone(), walk_strides, base)),
        shape,
    })
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
            s if s < 0 => return Err(cx.err(format!("shape holds {s}"))),
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
    Ok(ConstTensor {
        shape,
        data: data.data.clone(),
    })
}

/// `Transpose` by `perm` (default: reversed axes).
pub(super) fn transpose(cx: &Ctx<'_>) -> Result<ConstTensor, ImportError> {
    cx.arity(1, 1)?;
    let data = cx.input(0)?;
    let rank = data.shape.len();
    let perm = match cx.attr_ints("perm")? {
        Some(p) => {
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
        None => (0..rank).rev().collect::<Vec<_>>(),
    };
    let in_strides = strides(&data.shape);
    let shape: Vec<usize> = perm.iter().map(|&a| data.shape[a]).collect();
    let walk_strides = perm.iter().map(|&a| in_strides[a] as isize).collect();
    Ok(ConstTensor {
        data: select(&data.data, Walk::new(shape.clone(), walk_strides, 0)),
        shape,
    })
}

/// `Expand`: broadcasts the input and `shape` together (either may hold the 1s).
pub(super) fn expand(cx: &Ctx<'_>) -> Result<ConstTensor, ImportError> {
    cx.arity(2, 2)?;
    let data = cx.input(0)?;
    let target = cx
        .ints(1, "shape")?
        .iter()
        .map(|&d| usize::try_from(d).map_err(|_| cx.err(format!("shape holds {d}"))))
        .collect::<Result<Vec<_>, _>>()?;
    let shape = broadcast_shapes(&[&data.shape, &target]).map_err(|p| cx.err(p))?;
    cx.count(&shape)?;
    Ok(ConstTensor {
        data: select(&data.data, Walk::broadcast(&data.shape, &shape)),
        shape,
    })
}

/// `Tile`: repeats the input `repeats[d]` times along each axis d.
pub(super) fn tile(cx: &Ctx<'_>) -> Result<ConstTensor, ImportError> {
    cx.arity(2, 2)?;
    let data = cx.input(0)?;
    let repeats = cx.ints(1, "repeats")?;
    let rank = data.shape.len();
    if repeats.len() != rank {
        return Err(cx.err(format!(
            "repeats has {} values for an input of rank {rank}",
            repeats.len()
        )));
    }
    let repeats = repeats
        .iter()
        .map(|&r| usize::try_from(r).map_err(|_| cx.err(format!("repeats holds {r}"))))
        .collect::<Result<Vec<_>, _>>()?;
    let shape = (0..rank)
        .map(|d| data.shape[d].checked_mul(repeats[d]))
        .collect::<Option<Vec<_>>>()
        .ok_or_else(|| cx.err("output is too large"))?;
    cx.count(&shape)?;
    // Output index r·dim + i along axis d reads input index i: walk the split shape
    // [r0, dim0, r1, dim1, ...] with stride 0 on every repeat axis.
    let in_strides = strides(&data.shape);
    let split = (0..rank)
        .flat_map(|d| [repeats[d], data.shape[d]])
        .collect();
    let split_strides = (0..rank)
        .flat_map(|d| [0, in_strides[d] as isize])
        .collect();
    Ok(ConstTensor {
        data: select(&data.data, Walk::new(split, split_strides, 0)),
        shape,
    })
}
