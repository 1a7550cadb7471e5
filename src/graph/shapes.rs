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

use super::arith::{Window, WindowError};
use super::{Graph, Op, WeightLayout};

/// Largest number of elements one per-sample value may have (2^28 f32 = 1 GiB). Far above any
/// small classifier; it exists so that a hostile manifest cannot make a plan allocate terabytes.
pub const MAX_VALUE_ELEMENTS: usize = 1 << 28;

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
            reason: "rank must be 1 ([F]) or 3 ([C, H, W]) or 2",
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

    fn infer_node(&self, op: &Op, ins: &[Vec<usize>]) -> Result<Vec<usize>, GraphError> {
        match op {
            Op::Conv2d {
                bias,
                stride,
                dilation,
                padding,
                groups,
                ..
            } => {
                self.arity(ins, "1", ins.len() == 1)?;
                let [c, h, w] = self.chw(&ins[0])?;
                let (wname, wshape) = self.tensor("weight");
                let &[oc, icg, kh, kw] = wshape.as_slice() else {
                    return Err(GraphError::TensorShape {
                        node: self.node.to_string(),
                        op: self.op,
                        role: "weight",
                        tensor: wname.clone(),
                        found: wshape.clone(),
                        expected: "[out_c, in_c / groups, kh, kw]".into(),
                    });
                };
                let g = *groups;
                if g == 0 || c % g != 0 || oc % g != 0 || oc == 0 {
                    return Err(self.bad_param(
                        "groups",
                        format!(
                            "{g} groups must divide both the {c} input and {oc} output channels"
                        ),
                    ));
                }
                if icg != c / g {
                    return Err(GraphError::TensorShape {
                        node: self.node.to_string(),
                        op: self.op,
                        role: "weight",
                        tensor: wname.clone(),
                        found: wshape.clone(),
                        expected: format!(
                            "[{oc}, {}, kh, kw] for {c} input channels in {g} groups",
                            c / g
                        ),
                    });
                }
                if bias.is_some() {
                    self.expect_tensor("bias", &[oc])?;
                }
                let oh = self.window(
                    "height",
                    Window {
                        input: h,
                        kernel: kh,
                        stride: stride[0],
                        dilation: dilation[0],
                        pad_begin: padding[0],
                        pad_end: padding[2],
                    },
                    None,
                )?;
                let ow = self.window(
                    "width",
                    Window {
                        input: w,
                        kernel: kw,
                        stride: stride[1],
                        dilation: dilation[1],
                        pad_begin: padding[1],
                        pad_end: padding[3],
                    },
                    None,
                )?;
                Ok(vec![oc, oh, ow])
            }
            Op::BatchNorm { epsilon, .. } => {
                self.arity(ins, "1", ins.len() == 1)?;
                let c = ins[0][0];
                for role in ["gamma", "beta", "mean", "variance"] {
                    self.expect_tensor(role, &[c])?;
                }
                if !(epsilon.is_finite() && *epsilon >= 0.0) {
                    return Err(
                        self.bad_param("epsilon", format!("{epsilon} is not a finite value ≥ 0"))
                    );
                }
                Ok(ins[0].clone())
            }
            Op::Dense {
                bias,
                weight_layout,
                ..
            } => {
                self.arity(ins, "1", ins.len() == 1)?;
                let &[f] = ins[0].as_slice() else {
                    return Err(self.input_shape(&ins[0], "a flat [F] value (add a flatten node)"));
                };
                let (wname, wshape) = self.tensor("weight");
                let out = match (weight_layout, wshape.as_slice()) {
                    (WeightLayout::OutIn, &[o, i]) if i == f => o,
                    (WeightLayout::InOut, &[i, o]) if i == f => o,
                    _ => {
                        return Err(GraphError::TensorShape {
                            node: self.node.to_string(),
                            op: self.op,
                            role: "weight",
                            tensor: wname.clone(),
                            found: wshape.clone(),
                            expected: match weight_layout {
                                WeightLayout::OutIn => format!("[out, {f}]"),
                                WeightLayout::InOut => format!("[{f}, out]"),
                            },
                        });
                    }
                };
                if out == 0 {
                    return Err(self.bad_param("weight", "a dense layer needs at least one output"));
                }
                if bias.is_some() {
                    self.expect_tensor("bias", &[out])?;
                }
                Ok(vec![out])
            }
            Op::Relu
            | Op::Sigmoid
            | Op::Tanh
            | Op::HardSwish
            | Op::Silu
            | Op::Gelu { .. }
            | Op::Identity => {
                self.arity(ins, "1", ins.len() == 1)?;
                Ok(ins[0].clone())
            }
            Op::Clip { min, max } => {
                self.arity(ins, "1", ins.len() == 1)?;
                if min.is_nan() || max.is_nan() || min > max {
                    return Err(
                        self.bad_param("min/max", format!("need min ≤ max, got {min}..{max}"))
                    );
                }
                Ok(ins[0].clone())
            }
            Op::LeakyRelu { slope } => {
                self.arity(ins, "1", ins.len() == 1)?;
                if !slope.is_finite() {
                    return Err(self.bad_param("slope", format!("{slope} is not finite")));
                }
                Ok(ins[0].clone())
            }
            Op::HardSigmoid { alpha, beta } => {
                self.arity(ins, "1", ins.len() == 1)?;
                if !alpha.is_finite() || !beta.is_finite() {
                    return Err(self.bad_param("alpha/beta", "must be finite"));
                }
                Ok(ins[0].clone())
            }
            Op::MaxPool {
                kernel,
                stride,
                padding,
                dilation,
                ceil_mode,
            } => {
                self.arity(ins, "1", ins.len() == 1)?;
                self.pool(
                    &ins[0],
                    *kernel,
                    stride.unwrap_or(*kernel),
                    *padding,
                    *dilation,
                    *ceil_mode,
                )
            }
            Op::AvgPool {
                kernel,
                stride,
                padding,
                ceil_mode,
                ..
            } => {
                self.arity(ins, "1", ins.len() == 1)?;
                self.pool(
                    &ins[0],
                    *kernel,
                    stride.unwrap_or(*kernel),
                    *padding,
                    [1, 1],
                    *ceil_mode,
                )
            }
            Op::GlobalAvgPool => {
                self.arity(ins, "1", ins.len() == 1)?;
                let [c, _, _] = self.chw(&ins[0])?;
                Ok(vec![c, 1, 1])
            }
            Op::Flatten => {
                self.arity(ins, "1", ins.len() == 1)?;
                Ok(vec![ins[0].iter().product()])
            }
            Op::Reshape { shape } => {
                self.arity(ins, "1", ins.len() == 1)?;
                self.reshape(&ins[0], shape)
            }
            Op::Add { constant } | Op::Mul { constant } => match constant {
                Some(_) => {
                    self.arity(ins, "1 (with a constant)", ins.len() == 1)?;
                    let (_, cshape) = self.tensor("constant");
                    let out = self.broadcast(&ins[0], cshape)?;
                    // The value must keep its shape: a constant may broadcast into the value,
                    // not the other way round.
                    if out != ins[0] {
                        return Err(self.input_shape(
                            &ins[0],
                            format!("a value at least as large as the constant {cshape:?}"),
                        ));
                    }
                    Ok(out)
                }
                None => {
                    self.arity(ins, "2", ins.len() == 2)?;
                    self.broadcast(&ins[0], &ins[1])
                }
            },
            Op::Concat => {
                self.arity(ins, "at least 2", ins.len() >= 2)?;
                let first = &ins[0];
                let mut channels = 0usize;
                for x in ins {
                    if x.len() != first.len() || x[1..] != first[1..] {
                        return Err(self.input_shape(
                            x,
                            format!("the same shape as {first:?} apart from the channel axis"),
                        ));
                    }
                    channels += x[0];
                }
                let mut out = first.clone();
                out[0] = channels;
                Ok(out)
            }
            Op::Softmax => {
                self.arity(ins, "1", ins.len() == 1)?;
                Ok(ins[0].clone())
            }
            Op::Pad { padding, value } => {
                self.arity(ins, "1", ins.len() == 1)?;
                let [c, h, w] = self.chw(&ins[0])?;
                if !value.is_finite() {
                    return Err(self.bad_param("value", format!("{value} is not finite")));
                }
                let grow = |a: usize, b: usize, d: usize| (d as u128) + (a as u128) + (b as u128);
                let oh = grow(padding[0], padding[2], h);
                let ow = grow(padding[1], padding[3], w);
                if oh * ow * c as u128 > MAX_VALUE_ELEMENTS as u128 {
                    return Err(GraphError::TooLarge {
                        node: self.node.to_string(),
                        op: self.op,
                        elements: oh * ow * c as u128,
                        limit: MAX_VALUE_ELEMENTS,
                    });
                }
                Ok(vec![c, oh as usize, ow as usize])
            }
        }
    }

    fn pool(
        &self,
        x: &[usize],
        kernel: [usize; 2],
        stride: [usize; 2],
        padding: [usize; 4],
        dilation: [usize; 2],
        ceil_mode: bool,
    ) -> Result<Vec<usize>, GraphError> {
        let [c, h, w] = self.chw(x)?;
        let oh = self.window(
            "height",
            Window {
                input: h,
                kernel: kernel[0],
                stride: stride[0],
                dilation: dilation[0],
                pad_begin: padding[0],
                pad_end: padding[2],
            },
            Some(ceil_mode),
        )?;
        let ow = self.window(
            "width",
            Window {
                input: w,
                kernel: kernel[1],
                stride: stride[1],
                dilation: dilation[1],
                pad_begin: padding[1],
                pad_end: padding[3],
            },
            Some(ceil_mode),
        )?;
        Ok(vec![c, oh, ow])
    }

    fn reshape(&self, x: &[usize], target: &[i64]) -> Result<Vec<usize>, GraphError> {
        let total: usize = x.iter().product();
        if target.is_empty() || target.len() > 3 {
            return Err(self.bad_param("shape", format!("{target:?} must have 1 to 3 entries")));
        }
        let mut known = 1usize;
        let mut free = None;
        for (i, &d) in target.iter().enumerate() {
            match d {
                -1 if free.is_none() => free = Some(i),
                d if d >= 1 => {
                    known = known
                        .checked_mul(d as usize)
                        .ok_or_else(|| self.bad_param("shape", format!("{target:?} overflows")))?;
                }
                _ => {
                    return Err(self.bad_param(
                        "shape",
                        format!("{target:?}: entries must be ≥ 1, with at most one -1"),
                    ));
                }
            }
        }
        let mut out: Vec<usize> = target.iter().map(|&d| d.max(0) as usize).collect();
        if let Some(i) = free {
            if !total.is_multiple_of(known) {
                return Err(
                    self.input_shape(x, format!("a size divisible by {known} for {target:?}"))
                );
            }
            out[i] = total / known;
        } else if known != total {
            return Err(self.input_shape(x, format!("{known} elements for {target:?}")));
        }
        Ok(out)
    }

    /// Equal shapes; a per-channel `[C,1,1]` or `[C]` operand against `[C,H,W]`; or a `[1]`
    /// scalar. The result has the larger operand's shape.
    fn broadcast(&self, a: &[usize], b: &[usize]) -> Result<Vec<usize>, GraphError> {
        if a == b {
            return Ok(a.to_vec());
        }
        let fits = |small: &[usize], big: &[usize]| -> bool {
            small == [1] || (big.len() == 3 && (small == [big[0], 1, 1] || small == [big[0]]))
        };
        if fits(b, a) {
            Ok(a.to_vec())
        } else if fits(a, b) {
            Ok(b.to_vec())
        } else {
            Err(self.input_shape(
                b,
                format!("a shape that broadcasts against {a:?}: equal, [C,1,1], [C] or [1]"),
            ))
        }
    }
}
