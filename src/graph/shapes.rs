//! Checks a graph and infers the per-sample shape of every value.
//!
//! This is the gate between an untrusted manifest and the executor: every name must resolve,
//! every tensor must have the shape its op needs, every window must fit, and no value may be
//! absurdly large. Anything else is a typed [`GraphError`] naming the node.

// Graph errors carry the node, op, tensor and shapes so a user can find the problem; they
// happen once per bundle load, never on a request path, so their size costs nothing.
#![allow(clippy::result_large_err)]

use std::collections::{HashMap, HashSet};

use thiserror::Error;

mod layers;
mod layout;

use super::arith::{Window, WindowError};
use super::{Graph, Op};

/// Largest number of elements one per-sample value may have (2^28 f32 = 1 GiB). Far above any
/// small classifier; it exists so that a hostile manifest cannot make a plan allocate terabytes.
pub const MAX_VALUE_ELEMENTS: usize = 1 << 28;

/// Most per-sample axes a value may have (six with the batch): enough for the channel
/// shuffles and channels-last blocks of standard classifiers, and small enough that index
/// bookkeeping in the kernels stays on the stack.
pub const MAX_RANK: usize = 5;

/// Why a graph does not check.
#[derive(Clone, Debug, PartialEq, Error)]
pub enum GraphError {
    #[error("graph has no nodes")]
    Empty,
    #[error("graph input shape {shape:?} is invalid: {reason}")]
    BadInputShape {
        shape: Vec<usize>,
        reason: &'static str,
    },
    #[error("two nodes are named {node:?}")]
    DuplicateNode { node: String },
    #[error("node {node:?} writes value {value:?}, which already exists")]
    DuplicateValue { node: String, value: String },
    #[error("node {node:?} reads value {value:?}, which no earlier node writes")]
    UnknownValue { node: String, value: String },
    #[error("graph output {value:?} is not written by any node")]
    UnknownOutput { value: String },
    #[error(
        "node {node:?} ({op}) names tensor {tensor:?} as its {role}, but the bundle has no such tensor"
    )]
    UnknownTensor {
        node: String,
        op: &'static str,
        role: &'static str,
        tensor: String,
    },
    #[error(
        "node {node:?} ({op}): {role} tensor {tensor:?} has shape {found:?}, expected {expected}"
    )]
    TensorShape {
        node: String,
        op: &'static str,
        role: &'static str,
        tensor: String,
        found: Vec<usize>,
        expected: String,
    },
    #[error("node {node:?} ({op}) takes {expected} input(s), got {found}")]
    Arity {
        node: String,
        op: &'static str,
        expected: &'static str,
        found: usize,
    },
    #[error("node {node:?} ({op}): input shape {found:?} is not usable: expected {expected}")]
    InputShape {
        node: String,
        op: &'static str,
        found: Vec<usize>,
        expected: String,
    },
    #[error("node {node:?} ({op}): parameter {param} is invalid: {reason}")]
    BadParameter {
        node: String,
        op: &'static str,
        param: &'static str,
        reason: String,
    },
    #[error("node {node:?} ({op}), {axis} axis: {source}")]
    Window {
        node: String,
        op: &'static str,
        axis: &'static str,
        source: WindowError,
    },
    #[error("node {node:?} ({op}) would produce {elements} elements per sample (limit {limit})")]
    TooLarge {
        node: String,
        op: &'static str,
        elements: u128,
        limit: usize,
    },
}

/// The shape of every value, by name, and of each node's output in node order.
#[derive(Clone, Debug)]
pub struct Shapes {
    pub values: HashMap<String, Vec<usize>>,
    pub node_outputs: Vec<Vec<usize>>,
}

/// Element count of a shape, or `None` if it overflows.
pub fn element_count(shape: &[usize]) -> Option<usize> {
    shape.iter().try_fold(1usize, |acc, &d| acc.checked_mul(d))
}

fn checked_size(node: &str, op: &'static str, shape: &[usize]) -> Result<(), GraphError> {
    let elements: u128 = shape.iter().map(|&d| d as u128).product();
    if elements > MAX_VALUE_ELEMENTS as u128 {
        return Err(GraphError::TooLarge {
            node: node.to_string(),
            op,
            elements,
            limit: MAX_VALUE_ELEMENTS,
        });
    }
    Ok(())
}

/// Checks `graph` against the tensor shapes that `tensor_shape` reports and returns every
/// value's per-sample shape.
///
/// # Errors
/// The first problem found, as a [`GraphError`] naming the node.
pub fn infer(
    graph: &Graph,
    tensor_shape: &dyn Fn(&str) -> Option<Vec<usize>>,
) -> Result<Shapes, GraphError> {
    if graph.nodes.is_empty() {
        return Err(GraphError::Empty);
    }
    let input = &graph.input.shape;
    if input.is_empty() || input.len() > 3 {
        return Err(GraphError::BadInputShape {
            shape: input.clone(),
            reason: "rank must be 1 ([F]), 2 or 3 ([C, H, W])",
        });
    }
    if input.contains(&0) {
        return Err(GraphError::BadInputShape {
            shape: input.clone(),
            reason: "no dimension may be 0",
        });
    }
    checked_size("<input>", "input", input)?;

    let mut values: HashMap<String, Vec<usize>> = HashMap::new();
    values.insert(graph.input.name.clone(), input.clone());
    let mut names = HashSet::new();
    let mut node_outputs = Vec::with_capacity(graph.nodes.len());
    for node in &graph.nodes {
        if !names.insert(node.name.as_str()) {
            return Err(GraphError::DuplicateNode {
                node: node.name.clone(),
            });
        }
        let op = node.op.kind();
        let mut ins = Vec::with_capacity(node.inputs.len());
        for v in &node.inputs {
            let shape = values.get(v).ok_or_else(|| GraphError::UnknownValue {
                node: node.name.clone(),
                value: v.clone(),
            })?;
            ins.push(shape.clone());
        }
        let mut tensors = HashMap::new();
        for (role, t) in node.op.tensors() {
            let shape = tensor_shape(t).ok_or_else(|| GraphError::UnknownTensor {
                node: node.name.clone(),
                op,
                role,
                tensor: t.to_string(),
            })?;
            tensors.insert(role, (t.to_string(), shape));
        }
        let ctx = Ctx {
            node: &node.name,
            op,
            tensors: &tensors,
        };
        let out = ctx.infer_node(&node.op, &ins)?;
        checked_size(&node.name, op, &out)?;
        if out.is_empty() || out.len() > MAX_RANK {
            return Err(GraphError::BadParameter {
                node: node.name.clone(),
                op,
                param: "output rank",
                reason: format!("{out:?} must have 1 to {MAX_RANK} axes after the batch"),
            });
        }
        if values.contains_key(&node.output) {
            return Err(GraphError::DuplicateValue {
                node: node.name.clone(),
                value: node.output.clone(),
            });
        }
        values.insert(node.output.clone(), out.clone());
        node_outputs.push(out);
    }
    if !values.contains_key(&graph.output) || graph.output == graph.input.name {
        return Err(GraphError::UnknownOutput {
            value: graph.output.clone(),
        });
    }
    Ok(Shapes {
        values,
        node_outputs,
    })
}

struct Ctx<'a> {
    node: &'a str,
    op: &'static str,
    tensors: &'a HashMap<&'static str, (String, Vec<usize>)>,
}

impl Ctx<'_> {
    fn arity(
        &self,
        ins: &[Vec<usize>],
        expected: &'static str,
        ok: bool,
    ) -> Result<(), GraphError> {
        if ok {
            Ok(())
        } else {
            Err(GraphError::Arity {
                node: self.node.to_string(),
                op: self.op,
                expected,
                found: ins.len(),
            })
        }
    }

    fn one_input<'i>(&self, ins: &'i [Vec<usize>]) -> Result<&'i [usize], GraphError> {
        self.arity(ins, "1", ins.len() == 1)?;
        Ok(&ins[0])
    }

    fn input_shape(&self, found: &[usize], expected: impl Into<String>) -> GraphError {
        GraphError::InputShape {
            node: self.node.to_string(),
            op: self.op,
            found: found.to_vec(),
            expected: expected.into(),
        }
    }

    fn tensor(&self, role: &'static str) -> &(String, Vec<usize>) {
        // The caller resolved every tensor that `Op::tensors` lists before building the context.
        self.tensors.get(role).expect("tensor roles resolved above")
    }

    fn expect_tensor(&self, role: &'static str, expected: &[usize]) -> Result<(), GraphError> {
        let (name, found) = self.tensor(role);
        if found != expected {
            return Err(GraphError::TensorShape {
                node: self.node.to_string(),
                op: self.op,
                role,
                tensor: name.clone(),
                found: found.clone(),
                expected: format!("{expected:?}"),
            });
        }
        Ok(())
    }

    fn bad_param(&self, param: &'static str, reason: impl Into<String>) -> GraphError {
        GraphError::BadParameter {
            node: self.node.to_string(),
            op: self.op,
            param,
            reason: reason.into(),
        }
    }

    fn chw(&self, x: &[usize]) -> Result<[usize; 3], GraphError> {
        match *x {
            [c, h, w] => Ok([c, h, w]),
            _ => Err(self.input_shape(x, "[C, H, W]")),
        }
    }

    fn window(
        &self,
        axis: &'static str,
        w: Window,
        pool_ceil: Option<bool>,
    ) -> Result<usize, GraphError> {
        let r = match pool_ceil {
            None => w.output_len(),
            Some(ceil) => w.pool_output_len(ceil),
        };
        r.map_err(|source| GraphError::Window {
            node: self.node.to_string(),
            op: self.op,
            axis,
            source,
        })
    }

    /// One function per op group: layers with weights and windows (`layers.rs`), ops that
    /// move or combine data (`layout.rs`), and the element-wise ones here.
    fn infer_node(&self, op: &Op, ins: &[Vec<usize>]) -> Result<Vec<usize>, GraphError> {
        match op {
            Op::Conv2d { .. } => self.conv(op, ins),
            Op::BatchNorm { epsilon, .. } => self.batch_norm(*epsilon, ins),
            Op::Dense { .. } => self.dense(op, ins),
            Op::MaxPool { .. } | Op::AvgPool { .. } | Op::GlobalAvgPool => self.pooling(op, ins),
            Op::Pad {
                padding,
                value,
                channels,
            } => self.pad(*padding, *channels, *value, ins),
            Op::Flatten => Ok(vec![self.one_input(ins)?.iter().product()]),
            Op::Reshape { shape } => self.reshape(self.one_input(ins)?, shape),
            Op::Concat { axis } => self.concat(*axis, ins),
            Op::Transpose { perm } => self.transpose(self.one_input(ins)?, perm),
            Op::Slice { ranges } => self.slice(self.one_input(ins)?, ranges),
            Op::Gather { axis, indices } => self.gather(self.one_input(ins)?, *axis, indices),
            Op::Expand { shape } => self.expand(self.one_input(ins)?, shape),
            Op::Tile { repeats } => self.tile(self.one_input(ins)?, repeats),
            Op::Reduce {
                axes, keep_dims, ..
            } => self.reduce(self.one_input(ins)?, axes, *keep_dims),
            Op::LayerNorm {
                bias,
                axis,
                count,
                epsilon,
                ..
            } => self.layer_norm(
                self.one_input(ins)?,
                bias.is_some(),
                *axis,
                *count,
                *epsilon,
            ),
            Op::Softmax => Ok(self.one_input(ins)?.to_vec()),
            op if op.binary().is_some() => self.binary(op, ins),
            op => self.unary(op, ins),
        }
    }

    /// Element-wise ops of one operand: the output has the input's shape.
    fn unary(&self, op: &Op, ins: &[Vec<usize>]) -> Result<Vec<usize>, GraphError> {
        let x = self.one_input(ins)?;
        match *op {
            Op::Clip { min, max } if min.is_nan() || max.is_nan() || min > max => {
                Err(self.bad_param("min/max", format!("need min ≤ max, got {min}..{max}")))
            }
            Op::LeakyRelu { slope } if !slope.is_finite() => {
                Err(self.bad_param("slope", format!("{slope} is not finite")))
            }
            Op::HardSigmoid { alpha, beta } if !alpha.is_finite() || !beta.is_finite() => {
                Err(self.bad_param("alpha/beta", "must be finite"))
            }
            Op::Pow { exponent } if !exponent.is_finite() => {
                Err(self.bad_param("exponent", format!("{exponent} is not finite")))
            }
            _ => Ok(x.to_vec()),
        }
    }

    /// Two operands (or one and a constant) broadcast by the ONNX (numpy) rule on per-sample
    /// shapes of equal rank; also the older forms `[C]` against `[C, H, W]` and `[1]`.
    fn binary(&self, op: &Op, ins: &[Vec<usize>]) -> Result<Vec<usize>, GraphError> {
        let Some((_, constant, _)) = op.binary() else {
            unreachable!("dispatched on binary()")
        };
        match constant {
            Some(_) => {
                self.arity(ins, "1 (with a constant)", ins.len() == 1)?;
                let (_, cshape) = self.tensor("constant");
                self.broadcast(&ins[0], cshape)
            }
            None => {
                self.arity(ins, "2", ins.len() == 2)?;
                self.broadcast(&ins[0], &ins[1])
            }
        }
    }

    /// The broadcast shape of `a` and `b`, or an error naming both.
    fn broadcast(&self, a: &[usize], b: &[usize]) -> Result<Vec<usize>, GraphError> {
        broadcast_shapes(a, b).ok_or_else(|| {
            self.input_shape(
                b,
                format!("a shape that broadcasts against {a:?} (same rank, each axis equal or 1)"),
            )
        })
    }
}

/// Broadcasting of two per-sample shapes: equal rank with every axis equal or 1 on one side
/// (ONNX's multidirectional rule once the batch is set aside), or one of the forms bundles
/// have always used — `[1]` for a scalar, `[C]` per channel of `[C, H, W]`.
pub fn broadcast_shapes(a: &[usize], b: &[usize]) -> Option<Vec<usize>> {
    let legacy = |small: &[usize], big: &[usize]| {
        small != big && (small == [1] || (big.len() == 3 && small == [big[0]]))
    };
    if legacy(b, a) {
        return Some(a.to_vec());
    }
    if legacy(a, b) {
        return Some(b.to_vec());
    }
    if a.len() != b.len() {
        return None;
    }
    a.iter()
        .zip(b)
        .map(|(&x, &y)| match (x, y) {
            _ if x == y => Some(x),
            (1, y) => Some(y),
            (x, 1) => Some(x),
            _ => None,
        })
        .collect()
}
