//! Constant folding: evaluating, at import time, nodes whose inputs are all constants.
//!
//! Exporters compute shapes inside the graph (`Shape → Gather → Unsqueeze → Concat →
//! Reshape`) and sometimes transform weights there (`Transpose` of an initializer). Once the
//! converter knows a node's inputs, [`fold_node`] evaluates it with the operator's ONNX
//! semantics (opsets 11 to 21) and hands back constants, so only real layers reach convoy's
//! graph. Values live as [`ConstData::F32`] (every float type) or [`ConstData::I64`] (every
//! integer type and BOOL, as 0/1): integer arithmetic is done in 64 bits, so a computation
//! that would overflow a narrower ONNX integer type is not wrapped to it (shape arithmetic
//! never comes near).
//!
//! Layout: this file dispatches and holds the constant, shape, cast and reduction operators;
//! `elementwise` the arithmetic, comparison and logic operators; `layout` the operators that
//! move elements, and the broadcasting walk they all share.

mod elementwise;
mod layout;

use self::elementwise::{Binary, Unary};
use self::layout::Walk;
use super::attr::{self, unsupported};
use super::proto::{DataType, NodeProto, data_type_name};
use super::tensor::{
    ConstData, ConstTensor, ExternalData, element_count, round_to_bf16, round_to_f16,
};
use crate::import::ImportError;

/// Operators [`fold_node`] evaluates (default ONNX domain), sorted.
pub const FOLDABLE_OPS: &[&str] = &[
    "Abs",
    "Add",
    "And",
    "Cast",
    "Ceil",
    "Concat",
    "Constant",
    "ConstantOfShape",
    "Div",
    "Equal",
    "Expand",
    "Floor",
    "Gather",
    "Greater",
    "GreaterOrEqual",
    "Identity",
    "Less",
    "LessOrEqual",
    "Max",
    "Min",
    "Mul",
    "Neg",
    "Not",
    "Or",
    "Range",
    "ReduceProd",
    "Reshape",
    "Shape",
    "Size",
    "Slice",
    "Sqrt",
    "Squeeze",
    "Sub",
    "Tile",
    "Transpose",
    "Unsqueeze",
    "Where",
];

/// Highest rank a folded output may have. ONNX sets none; shape arithmetic stays far below,
/// and the bound keeps per-axis bookkeeping small whatever a model's constants say.
pub const MAX_RANK: usize = 64;

/// Most elements one folded output may have: 2^24 (128 MiB as `i64`). Unlike a stored tensor,
/// whose size the file itself pays for, a folded output (`ConstantOfShape`, `Expand`, `Tile`,
/// `Range`...) can be asked for by a few bytes; under the stored-tensor limit of 2^30 a 44 KB
/// model made `ConstantOfShape` allocate gigabytes (found by the `onnx_import` fuzz target).
/// Shape arithmetic needs a handful of elements, and folded weights are at most as large as
/// the largest weight of a small classifier (ResNet-50's largest, 512·512·3·3 ≈ 2.4 M, from
/// memory), far below the limit.
pub const MAX_FOLDED_ELEMENTS: usize = 1 << 24;

/// Whether [`fold_node`] knows this op type (of the default ONNX domain).
pub fn can_fold(op_type: &str) -> bool {
    FOLDABLE_OPS.contains(&op_type)
}

/// Evaluates one node whose inputs are all constants. `inputs[i]` is None for an omitted
/// optional input (empty name). Returns one tensor per node output.
///
/// A `Constant` whose tensor is stored as external data is refused here (there is no model
/// folder); use [`fold_node_with`] to allow it.
///
/// # Errors
/// [`ImportError::Unsupported`] naming the node and operator for a wrong number of inputs or
/// outputs, a missing required input or attribute, mismatched element types, invalid
/// shapes, axes or indices, integer division by zero, or an output over
/// [`MAX_FOLDED_ELEMENTS`]; [`ImportError::UnsupportedOp`] for an
/// operator outside [`can_fold`]; [`ImportError::Tensor`] for a bad `Constant` tensor.
pub fn fold_node(
    node: &NodeProto,
    opset: i64,
    inputs: &[Option<&ConstTensor>],
) -> Result<Vec<ConstTensor>, ImportError> {
    fold_node_with(node, opset, inputs, &ExternalData::new(None))
}

/// [`fold_node`], reading a `Constant`'s external data through `external`.
///
/// # Errors
/// As [`fold_node`], plus [`ImportError::ExternalData`].
pub fn fold_node_with(
    node: &NodeProto,
    opset: i64,
    inputs: &[Option<&ConstTensor>],
    external: &ExternalData,
) -> Result<Vec<ConstTensor>, ImportError> {
    let cx = Ctx {
        node,
        opset,
        inputs,
    };
    if node.output.len() != 1 {
        return Err(cx.err(format!(
            "has {} outputs; the operator has one",
            node.output.len()
        )));
    }
    let out = match node.op_type.as_str() {
        "Constant" => constant(&cx, external)?,
        "Identity" => {
            cx.arity(1, 1)?;
            cx.input(0)?.clone()
        }
        "Shape" => shape(&cx)?,
        "Size" => {
            cx.arity(1, 1)?;
            ConstTensor::scalar_i64(cx.input(0)?.len() as i64)
        }
        "Cast" => cast(&cx)?,
        "ConstantOfShape" => constant_of_shape(&cx, external)?,
        "Range" => range(&cx)?,
        "Gather" => layout::gather(&cx)?,
        "Unsqueeze" => layout::unsqueeze(&cx)?,
        "Squeeze" => layout::squeeze(&cx)?,
        "Concat" => layout::concat(&cx)?,
        "Slice" => layout::slice(&cx)?,
        "Reshape" => layout::reshape(&cx)?,
        "Transpose" => layout::transpose(&cx)?,
        "Expand" => layout::expand(&cx)?,
        "Tile" => layout::tile(&cx)?,
        "ReduceProd" => reduce_prod(&cx)?,
        "Where" => elementwise::select_where(&cx)?,
        "Max" | "Min" => elementwise::variadic(&cx)?,
        op => {
            if let Some(b) = Binary::of(op) {
                elementwise::binary(&cx, b)?
            } else if let Some(u) = Unary::of(op) {
                elementwise::unary(&cx, u)?
            } else {
                return Err(ImportError::UnsupportedOp {
                    node: node.name.clone(),
                    op: op.to_string(),
                    supported: FOLDABLE_OPS.join(", "),
                });
            }
        }
    };
    Ok(vec![out])
}

/// The node being folded, its opset and its inputs, with checked accessors.
pub(crate) struct Ctx<'a> {
    node: &'a NodeProto,
    opset: i64,
    inputs: &'a [Option<&'a ConstTensor>],
}

impl<'a> Ctx<'a> {
    fn err(&self, problem: impl Into<String>) -> ImportError {
        unsupported(self.node, problem)
    }

    /// Checks the number of input slots (omitted optional ones included).
    fn arity(&self, min: usize, max: usize) -> Result<(), ImportError> {
        let n = self.inputs.len();
        if n < min || n > max {
            let want = match (min, max) {
                (a, b) if a == b => format!("{a}"),
                (a, usize::MAX) => format!("{a} or more"),
                (a, b) => format!("{a} to {b}"),
            };
            return Err(self.err(format!("has {n} inputs; the operator takes {want}")));
        }
        Ok(())
    }

    /// Input `i`, which must be present.
    fn input(&self, i: usize) -> Result<&'a ConstTensor, ImportError> {
        self.opt(i)
            .ok_or_else(|| self.err(format!("input {i} is required but omitted")))
    }

    /// Optional input `i`.
    fn opt(&self, i: usize) -> Option<&'a ConstTensor> {
        self.inputs.get(i).copied().flatten()
    }

    /// Input `i` as a list of integers (a scalar or 1-D integer tensor: shapes, axes...).
    fn ints(&self, i: usize, what: &str) -> Result<Vec<i64>, ImportError> {
        let t = self.input(i)?;
        match &t.data {
            ConstData::I64(v) if t.shape.len() <= 1 => Ok(v.clone()),
            ConstData::I64(_) => Err(self.err(format!(
                "{what} (input {i}) must be 1-D, not of shape {:?}",
                t.shape
            ))),
            ConstData::F32(_) => Err(self.err(format!("{what} (input {i}) must be integers"))),
        }
    }

    /// Element count of an output shape, within the constant size and rank limits.
    fn count(&self, shape: &[usize]) -> Result<usize, ImportError> {
        if shape.len() > MAX_RANK {
            return Err(self.err(format!(
                "output rank {} is over the limit of {MAX_RANK}",
                shape.len()
            )));
        }
        let count = element_count(shape).map_err(|p| self.err(format!("output {p}")))?;
        if count > MAX_FOLDED_ELEMENTS {
            return Err(self.err(format!(
                "output shape {shape:?} has {count} elements, more than the limit of \
                 {MAX_FOLDED_ELEMENTS} for a value computed at import time"
            )));
        }
        Ok(count)
    }

    fn attr_int(&self, name: &str) -> Result<Option<i64>, ImportError> {
        attr::attr_int_checked(self.node, name)
    }

    fn attr_ints(&self, name: &str) -> Result<Option<Vec<i64>>, ImportError> {
        attr::attr_ints_checked(self.node, name)
    }
}

/// `Constant`: exactly one of `value`, `value_float(s)`, `value_int(s)`.
fn constant(cx: &Ctx<'_>, external: &ExternalData) -> Result<ConstTensor, ImportError> {
    cx.arity(0, 0)?;
    let node = cx.node;
    if let [a] = &node.attribute[..] {
        match a.name.as_str() {
            "value" => {
                if let Some(t) = attr::attr_tensor_checked(node, "value")? {
                    return ConstTensor::from_proto(t, external);
                }
            }
            "value_float" => {
                if let Some(v) = attr::attr_float_checked(node, "value_float")? {
                    return Ok(ConstTensor::scalar_f32(v));
                }
            }
            "value_floats" => {
                if let Some(v) = attr::attr_floats_checked(node, "value_floats")? {
                    return Ok(ConstTensor::f32(vec![v.len()], v));
                }
            }
            "value_int" => {
                if let Some(v) = cx.attr_int("value_int")? {
                    return Ok(ConstTensor::scalar_i64(v));
                }
            }
            "value_ints" => {
                if let Some(v) = cx.attr_ints("value_ints")? {
                    return Ok(ConstTensor::i64(vec![v.len()], v));
                }
            }
            other => {
                return Err(cx.err(format!(
                    "attribute {other:?} is not supported; use value, value_float(s) or value_int(s)"
                )));
            }
        }
    }
    Err(cx.err(format!(
        "must have exactly one value attribute, has {}",
        node.attribute.len()
    )))
}

/// `Shape`, sliced by `start`/`end` (opset 15; clamped to `[0, rank]`).
fn shape(cx: &Ctx<'_>) -> Result<ConstTensor, ImportError> {
    cx.arity(1, 1)?;
    let dims = &cx.input(0)?.shape;
    let rank = dims.len() as i64;
    let clamp = |v: i64| (if v < 0 { v + rank } else { v }).clamp(0, rank) as usize;
    let start = cx.attr_int("start")?.map_or(0, clamp);
    let end = cx.attr_int("end")?.map_or(dims.len(), clamp);
    let part: Vec<i64> = dims
        .get(start..end.max(start))
        .unwrap_or_default()
        .iter()
        .map(|&d| d as i64)
        .collect();
    Ok(ConstTensor::i64(vec![part.len()], part))
}

/// `Cast` to a float, integer or BOOL type. Floats become integers by truncation toward zero;
/// integers narrower than 64 bits wrap to their width (as numpy's `astype`, which the
/// standard's reference evaluator uses); FLOAT16 and BFLOAT16 round to nearest even.
fn cast(cx: &Ctx<'_>) -> Result<ConstTensor, ImportError> {
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

/// `ConstantOfShape`: a tensor of the given shape filled with `value` (default float 0).
fn constant_of_shape(cx: &Ctx<'_>, external: &ExternalData) -> Result<ConstTensor, ImportError> {
    cx.arity(1, 1)?;
    let dims = cx.ints(0, "shape")?;
    let shape = dims
        .iter()
        .map(|&d| usize::try_from(d).map_err(|_| cx.err(format!("shape holds {d}"))))
        .collect::<Result<Vec<_>, _>>()?;
    let n = cx.count(&shape)?;
    let value = match attr::attr_tensor_checked(cx.node, "value")? {
        Some(t) => ConstTensor::from_proto(t, external)?,
        None => ConstTensor::scalar_f32(0.0),
    };
    if value.len() != 1 {
        return Err(cx.err(format!(
            "value must hold one element, holds {}",
            value.len()
        )));
    }
    Ok(match value.data {
        ConstData::F32(v) => ConstTensor::f32(shape, vec![v[0]; n]),
        ConstData::I64(v) => ConstTensor::i64(shape, vec![v[0]; n]),
    })
}

/// `Range`: `start + i·delta` for `i < max(ceil((limit - start) / delta), 0)`. Floats are
/// computed in f64 and rounded once, as the reference evaluator's `numpy.arange` does.
fn range(cx: &Ctx<'_>) -> Result<ConstTensor, ImportError> {
    cx.arity(3, 3)?;
    let [start, limit, delta] = [0, 1, 2].map(|i| cx.input(i));
    let (start, limit, delta) = (start?, limit?, delta?);
    if [start, limit, delta].iter().any(|t| t.len() != 1) {
        return Err(cx.err("start, limit and delta must be scalars"));
    }
    let too_long = |n: u64| -> Result<usize, ImportError> {
        usize::try_from(n)
            .ok()
            .and_then(|n| cx.count(&[n]).ok())
            .ok_or_else(|| cx.err(format!("would produce {n} elements, over the limit")))
    };
    match (&start.data, &limit.data, &delta.data) {
        (ConstData::I64(s), ConstData::I64(l), ConstData::I64(d)) => {
            let (s, l, d) = (s[0], l[0], d[0]);
            if d == 0 {
                return Err(cx.err("delta must not be 0"));
            }
            // i128: the difference of two i64 cannot overflow there.
            let span = i128::from(l) - i128::from(s);
            let d128 = i128::from(d);
            let n = if (span > 0) == (d > 0) && span != 0 {
                (span.unsigned_abs() - 1) / d128.unsigned_abs() + 1
            } else {
                0
            };
            let n = too_long(u64::try_from(n).unwrap_or(u64::MAX))?;
            let v = (0..n as i64)
                .map(|i| s.wrapping_add(i.wrapping_mul(d)))
                .collect();
            Ok(ConstTensor::i64(vec![n], v))
        }
        (ConstData::F32(s), ConstData::F32(l), ConstData::F32(d)) => {
            let (s, l, d) = (f64::from(s[0]), f64::from(l[0]), f64::from(d[0]));
            if d == 0.0 || !(s.is_finite() && l.is_finite() && d.is_finite()) {
                return Err(cx.err("start, limit and delta must be finite, delta not 0"));
            }
            let n = ((l - s) / d).ceil().max(0.0);
            let n = too_long(if n > u64::MAX as f64 {
                u64::MAX
            } else {
                n as u64
            })?;
            let v = (0..n).map(|i| (s + i as f64 * d) as f32).collect();
            Ok(ConstTensor::f32(vec![n], v))
        }
        _ => Err(cx.err("start, limit and delta must share one element type")),
    }
}

/// `ReduceProd` over `axes` (attribute before opset 18, input from 18; none = all axes,
/// unless `noop_with_empty_axes`), keeping reduced dims as 1 when `keepdims` (default 1).
fn reduce_prod(cx: &Ctx<'_>) -> Result<ConstTensor, ImportError> {
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
            for &a in &l {
                let a = layout::axis(cx, "axis", a, rank)?;
                if std::mem::replace(&mut reduced[a], true) {
                    return Err(cx.err(format!("axis {a} is given twice")));
                }
            }
        }
        _ if noop => return Ok(data.clone()),
        _ => reduced.fill(true),
    }
    let kept: Vec<usize> = (0..rank)
        .map(|d| if reduced[d] { 1 } else { data.shape[d] })
        .collect();
    let n: usize = kept.iter().product();
    // Walk the input in order; each element multiplies into the output cell it reduces to
    // (the kept-dims shape broadcast back over the input's).
    let targets = || Walk::broadcast(&kept, &data.shape);
    let out = match &data.data {
        ConstData::F32(v) => {
            let mut acc = vec![1f32; n];
            for (o, &x) in targets().zip(v) {
                acc[o] *= x;
            }
            ConstData::F32(acc)
        }
        ConstData::I64(v) => {
            let mut acc = vec![1i64; n];
            for (o, &x) in targets().zip(v) {
                acc[o] = acc[o].wrapping_mul(x);
            }
            ConstData::I64(acc)
        }
    };
    let shape = if keep {
        kept
    } else {
        (0..rank)
            .filter(|&d| !reduced[d])
            .map(|d| data.shape[d])
            .collect()
    };
    Ok(ConstTensor { shape, data: out })
}
