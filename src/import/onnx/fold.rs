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
//! A node passes through here as follows: [`fold_node_with`] checks the output count and
//! picks the operator's function; that function reads its inputs through `Ctx` (arity,
//! presence, attributes, axes), views them as ndarray arrays (`array`), computes, and hands
//! the result back through `array::output`, which enforces [`MAX_RANK`] and
//! [`MAX_FOLDED_ELEMENTS`]. Operators that allocate their result inside ndarray check the
//! limits with `Ctx::count` first, so an oversized output is refused before any memory is
//! taken for it.
//!
//! Layout: this file holds the dispatch, the limits and `Ctx`; `array` the bridge between
//! constants and ndarray (views, broadcasting, output); `source` the operators that make
//! values from attributes or shapes; `unary` the one-input element-wise operators and
//! `Cast`; `elementwise` the broadcasting ones of several inputs; `layout` the operators
//! that reshape, reorder or repeat elements; `parts` those that take parts of tensors or
//! join them; `reduce` the reductions.

mod array;
mod elementwise;
mod layout;
mod parts;
mod reduce;
mod source;
mod unary;

use self::elementwise::Binary;
use self::unary::Unary;
use super::attr::{self, unsupported};
use super::proto::NodeProto;
use super::tensor::{ConstData, ConstTensor, ExternalData, element_count};
use crate::import::ImportError;

/// Operators [`fold_node`] evaluates (default ONNX domain), sorted.
pub const FOLDABLE_OPS: &[&str] = &[
    "Abs",
    "Add",
    "And",
    "Cast",
    "Ceil",
    "Clip",
    "Concat",
    "Constant",
    "ConstantOfShape",
    "Div",
    "Equal",
    "Erf",
    "Exp",
    "Expand",
    "Floor",
    "Gather",
    "Greater",
    "GreaterOrEqual",
    "Identity",
    "Less",
    "LessOrEqual",
    "Log",
    "Max",
    "Min",
    "Mul",
    "Neg",
    "Not",
    "Or",
    "Pow",
    "Range",
    "Reciprocal",
    "ReduceProd",
    "Reshape",
    "Shape",
    "Size",
    "Slice",
    "Split",
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
/// optional input (empty name). Returns one tensor per node output: one for every operator
/// but `Split`, which returns one per part.
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
    let op = node.op_type.as_str();
    if !can_fold(op) {
        return Err(ImportError::UnsupportedOp {
            node: node.name.clone(),
            op: op.to_string(),
            supported: FOLDABLE_OPS.join(", "),
        });
    }
    // Split is the one operator here with a variable number of outputs (one per part).
    let n = node.output.len();
    if op == "Split" {
        if n == 0 {
            return Err(cx.err("has no outputs; the operator has one or more"));
        }
        return parts::split(&cx);
    }
    if n != 1 {
        return Err(cx.err(format!("has {n} outputs; the operator has one")));
    }
    let out = match op {
        "Constant" => source::constant(&cx, external)?,
        "ConstantOfShape" => source::constant_of_shape(&cx, external)?,
        "Shape" => source::shape(&cx)?,
        "Size" => source::size(&cx)?,
        "Range" => source::range(&cx)?,
        "Identity" => {
            cx.arity(1, 1)?;
            cx.input(0)?.clone()
        }
        "Cast" => unary::cast(&cx)?,
        "Gather" => parts::gather(&cx)?,
        "Concat" => parts::concat(&cx)?,
        "Slice" => parts::slice(&cx)?,
        "Unsqueeze" => layout::unsqueeze(&cx)?,
        "Squeeze" => layout::squeeze(&cx)?,
        "Reshape" => layout::reshape(&cx)?,
        "Transpose" => layout::transpose(&cx)?,
        "Expand" => layout::expand(&cx)?,
        "Tile" => layout::tile(&cx)?,
        "ReduceProd" => reduce::reduce_prod(&cx)?,
        "Where" => elementwise::select_where(&cx)?,
        "Max" | "Min" => elementwise::variadic(&cx)?,
        "Clip" => elementwise::clip(&cx)?,
        op => match (Binary::of(op), Unary::of(op)) {
            (Some(b), _) => elementwise::binary(&cx, b)?,
            (None, Some(u)) => unary::unary(&cx, u)?,
            // FOLDABLE_OPS and the dispatch disagree: a bug here, not in the model.
            (None, None) => return Err(cx.err("is listed as foldable but has no evaluator")),
        },
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

    /// Input `i` as an n-dimensional view of the element type it holds.
    fn view(&self, i: usize) -> Result<array::View<'a>, ImportError> {
        array::view(self, self.input(i)?)
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

    /// Input `i` as a list of sizes (no negative values: shapes, repeats, split lengths).
    fn sizes(&self, i: usize, what: &str) -> Result<Vec<usize>, ImportError> {
        self.ints(i, what)?
            .iter()
            .map(|&d| usize::try_from(d).map_err(|_| self.err(format!("{what} holds {d}"))))
            .collect()
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

    /// Resolves a possibly negative axis against `rank` (valid: `-rank ..= rank - 1`).
    fn axis(&self, what: &str, a: i64, rank: usize) -> Result<usize, ImportError> {
        let r = rank as i64;
        if a < -r || a >= r {
            return Err(self.err(format!("{what} {a} is out of range for rank {rank}")));
        }
        Ok(if a < 0 { (a + r) as usize } else { a as usize })
    }

    /// Resolves a list of axes, refusing repeats.
    fn axes(&self, what: &str, list: &[i64], rank: usize) -> Result<Vec<usize>, ImportError> {
        let mut seen = vec![false; rank];
        list.iter()
            .map(|&a| {
                let a = self.axis(what, a, rank)?;
                if std::mem::replace(&mut seen[a], true) {
                    return Err(self.err(format!("{what} {a} is given twice")));
                }
                Ok(a)
            })
            .collect()
    }

    fn attr_int(&self, name: &str) -> Result<Option<i64>, ImportError> {
        attr::attr_int_checked(self.node, name)
    }

    fn attr_ints(&self, name: &str) -> Result<Option<Vec<i64>>, ImportError> {
        attr::attr_ints_checked(self.node, name)
    }

    fn attr_float(&self, name: &str) -> Result<Option<f32>, ImportError> {
        attr::attr_float_checked(self.node, name)
    }
}
