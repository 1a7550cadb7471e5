//! The bridge between constants and ndarray. Operators read their inputs as [`View`]s (an
//! `ArrayViewD` of the element type the constant holds, no copy), stretch them to a common
//! shape with [`broadcast_shape`] and [`stretch`] when they broadcast, compute with ndarray,
//! and hand the result back through [`output`], which checks it against the folding limits
//! before copying it out. Views (broadcast, sliced, permuted) allocate nothing, so for an
//! operator that returns one the check in [`output`] comes before any memory is taken.

use ndarray::{ArrayRef, ArrayViewD, IxDyn, ShapeError};

use super::Ctx;
use crate::import::ImportError;
use crate::import::onnx::tensor::{ConstData, ConstTensor};

/// The two element types folding computes in.
pub(super) trait Elem: Copy {
    /// A constant of this element type; `values.len()` is the product of `shape`.
    fn tensor(shape: Vec<usize>, values: Vec<Self>) -> ConstTensor;
}

impl Elem for f32 {
    fn tensor(shape: Vec<usize>, values: Vec<f32>) -> ConstTensor {
        ConstTensor::f32(shape, values)
    }
}

impl Elem for i64 {
    fn tensor(shape: Vec<usize>, values: Vec<i64>) -> ConstTensor {
        ConstTensor::i64(shape, values)
    }
}

/// A constant's values as an n-dimensional view, in the element type they hold.
pub(super) enum View<'a> {
    F32(ArrayViewD<'a, f32>),
    I64(ArrayViewD<'a, i64>),
}

/// Evaluates `$body` with `$a` bound to the array inside a [`View`], whichever its element
/// type: the body is written once and compiled for `f32` and for `i64`.
macro_rules! each_type {
    ($view:expr, |$a:ident| $body:expr) => {
        match $view {
            $crate::import::onnx::fold::array::View::F32($a) => $body,
            $crate::import::onnx::fold::array::View::I64($a) => $body,
        }
    };
}
pub(super) use each_type;

/// `t` as a [`View`].
///
/// # Errors
/// `t`'s value count differs from its shape's (its fields are public, so a caller could
/// build one that way).
pub(super) fn view<'a>(cx: &Ctx<'_>, t: &'a ConstTensor) -> Result<View<'a>, ImportError> {
    let shape = IxDyn(&t.shape);
    let bad = |e: ShapeError| {
        cx.err(format!(
            "an input holds {} values for shape {:?} ({e})",
            t.len(),
            t.shape
        ))
    };
    Ok(match &t.data {
        ConstData::F32(v) => View::F32(ArrayViewD::from_shape(shape, v).map_err(bad)?),
        ConstData::I64(v) => View::I64(ArrayViewD::from_shape(shape, v).map_err(bad)?),
    })
}

/// `a` as a constant: its elements in row-major order, whatever its memory layout.
///
/// # Errors
/// The shape is over [`super::MAX_RANK`] or [`super::MAX_FOLDED_ELEMENTS`]; checked before
/// the values are copied.
pub(super) fn output<T: Elem>(
    cx: &Ctx<'_>,
    a: &ArrayRef<T, IxDyn>,
) -> Result<ConstTensor, ImportError> {
    cx.count(a.shape())?;
    Ok(T::tensor(a.shape().to_vec(), a.iter().copied().collect()))
}

/// `a`'s elements in row-major order under `shape`, an arrangement of the same count that the
/// caller has already checked against the folding limits (`Gather`'s indices shape in place
/// of one axis, `Tile`'s spaced-out axes merged back).
pub(super) fn output_as<T: Elem>(a: &ArrayRef<T, IxDyn>, shape: Vec<usize>) -> ConstTensor {
    debug_assert_eq!(a.len(), shape.iter().product::<usize>());
    T::tensor(shape, a.iter().copied().collect())
}

/// The shape arrays of `shapes` broadcast to together: numpy's rule, which ONNX adopts
/// ("Broadcasting in ONNX", docs/Broadcasting.md). Shapes are right-aligned; on each axis
/// every size is 1 or the one size other than 1, which the output takes.
///
/// # Errors
/// Two sizes on one axis are different and neither is 1, or the output is over the folding
/// limits.
pub(super) fn broadcast_shape(
    cx: &Ctx<'_>,
    shapes: &[&[usize]],
) -> Result<Vec<usize>, ImportError> {
    let rank = shapes.iter().map(|s| s.len()).max().unwrap_or(0);
    // Size of `s` on output axis `d` (1 where `s` has fewer axes).
    let size = |s: &[usize], d: usize| (d + s.len()).checked_sub(rank).map_or(1, |i| s[i]);
    let shape: Vec<usize> = (0..rank)
        .map(|d| {
            shapes
                .iter()
                .map(|s| size(s, d))
                .find(|&n| n != 1)
                .unwrap_or(1)
        })
        .collect();
    let fits = |s: &[usize]| (0..rank).all(|d| size(s, d) == 1 || size(s, d) == shape[d]);
    if !shapes.iter().all(|s| fits(s)) {
        return Err(cx.err(format!("shapes {shapes:?} cannot be broadcast together")));
    }
    cx.count(&shape)?;
    Ok(shape)
}

/// `a` read as if of `shape` (a view with zero strides on the repeated axes); `shape` comes
/// from [`broadcast_shape`] over `a`'s shape among others.
///
/// # Errors
/// `a` does not broadcast to `shape`.
pub(super) fn stretch<'b, T>(
    cx: &Ctx<'_>,
    a: &'b ArrayRef<T, IxDyn>,
    shape: &[usize],
) -> Result<ArrayViewD<'b, T>, ImportError> {
    a.broadcast(IxDyn(shape)).ok_or_else(|| {
        cx.err(format!(
            "shape {:?} cannot be broadcast to {shape:?}",
            a.shape()
        ))
    })
}
