//! Element-wise ops: one-operand functions (activations, `Sqrt`, `Exp`, ...), `Clip`, `Pow`
//! with a constant exponent, and the two-operand arithmetic (`Add`, `Sub`, `Mul`, `Div`,
//! `Max`, `Min`, `Sum`) with ONNX broadcasting.

use super::{Converter, Ctx, Val};
use crate::graph::shapes::broadcast_shapes;
use crate::graph::{BinaryKind, GeluApproximation, Op};
use crate::import::ImportError;
use crate::import::onnx::attr::{attr_float_checked, attr_string_checked};
use crate::import::onnx::proto::onnx::NodeProto;
use crate::import::onnx::tensor::ConstTensor;

/// What a one-input handler produces: the op, its output's per-sample shape, its input.
pub(super) type Simple = (Op, Vec<usize>, String);

impl Converter {
    /// One-operand ops; `None` for an op type this importer does not know.
    pub(super) fn unary(
        &mut self,
        n: &NodeProto,
        ctx: &Ctx<'_>,
        inputs: &[Option<Val>],
    ) -> Result<Option<Simple>, ImportError> {
        let op = match n.op_type.as_str() {
            "Relu" => Op::Relu,
            "Sigmoid" => Op::Sigmoid,
            "Tanh" => Op::Tanh,
            "HardSwish" => Op::HardSwish,
            "Identity" => Op::Identity,
            "Sqrt" => Op::Sqrt,
            "Reciprocal" => Op::Reciprocal,
            "Abs" => Op::Abs,
            "Neg" => Op::Neg,
            "Exp" => Op::Exp,
            "Log" => Op::Log,
            "Erf" => Op::Erf,
            "LeakyRelu" => Op::LeakyRelu {
                slope: attr_float_checked(n, "alpha")?.unwrap_or(0.01),
            },
            "HardSigmoid" => Op::HardSigmoid {
                alpha: attr_float_checked(n, "alpha")?.unwrap_or(0.2),
                beta: attr_float_checked(n, "beta")?.unwrap_or(0.5),
            },
            "Gelu" => Op::Gelu {
                approximation: match attr_string_checked(n, "approximate")?.as_deref() {
                    None | Some("none") => GeluApproximation::None,
                    Some("tanh") => GeluApproximation::Tanh,
                    Some(other) => return Err(ctx.unsupported(format!("approximate = {other:?}"))),
                },
            },
            "Dropout" => {
                // Inference: identity. A constant training_mode input must be false.
                if let Some(t) = ctx.constant(inputs, 2)?
                    && t.to_i64().iter().any(|&v| v != 0)
                {
                    return Err(ctx.unsupported("training_mode is true"));
                }
                Op::Identity
            }
            "Clip" => clip(n, ctx, inputs)?,
            "Pow" => {
                let e = ctx
                    .constant(inputs, 1)?
                    .ok_or_else(|| ctx.not_constant(1))?;
                if e.len() != 1 {
                    return Err(ctx.unsupported("the exponent must be one constant value"));
                }
                Op::Pow {
                    exponent: e.to_f32()[0],
                }
            }
            _ => return Ok(None),
        };
        let (xn, shape) = ctx.first_dynamic(inputs)?;
        Ok(Some((op, shape.clone(), xn.clone())))
    }

    /// Add, Sub, Mul, Div, Max, Min and Sum: two operands (a chain of them for three or more),
    /// values or constants. A bias `Add` right after a `MatMul` becomes the dense layer's
    /// bias.
    pub(super) fn binary(
        &mut self,
        n: &NodeProto,
        name: &str,
        ctx: &Ctx<'_>,
        inputs: &[Option<Val>],
        out: &str,
    ) -> Result<(), ImportError> {
        let kind = match n.op_type.as_str() {
            "Add" | "Sum" => BinaryKind::Add,
            "Sub" => BinaryKind::Sub,
            "Mul" => BinaryKind::Mul,
            "Div" => BinaryKind::Div,
            "Max" => BinaryKind::Max,
            _ => BinaryKind::Min,
        };
        let vals: Vec<&Val> = inputs.iter().flatten().collect();
        if vals.len() != inputs.len() || vals.is_empty() {
            return Err(ctx.unsupported("an input is omitted"));
        }
        if vals.len() == 1 {
            let (xn, shape) = ctx.first_dynamic(inputs)?;
            let (xn, shape) = (xn.clone(), shape.clone());
            self.push(name, Op::Identity, &[&xn], out, shape);
            return Ok(());
        }
        // Three or more operands (variadic Max, Min, Sum): a left-to-right chain.
        let mut acc = vals[0].clone();
        for (i, v) in vals.iter().enumerate().skip(1) {
            let last = i == vals.len() - 1;
            let step_out = if last {
                out.to_string()
            } else {
                format!("{out}.{i}")
            };
            let step_name = if last {
                name.to_string()
            } else {
                format!("{name}.{i}")
            };
            acc = self.pair(kind, &step_name, ctx, &acc, v, &step_out)?;
        }
        Ok(())
    }

    /// One two-operand step; returns the value it produced.
    fn pair(
        &mut self,
        kind: BinaryKind,
        name: &str,
        ctx: &Ctx<'_>,
        a: &Val,
        b: &Val,
        out: &str,
    ) -> Result<Val, ImportError> {
        let (shape, op, inputs) = match (a, b) {
            (
                Val::Dyn {
                    name: an,
                    shape: ash,
                },
                Val::Dyn {
                    name: bn,
                    shape: bsh,
                },
            ) => {
                let shape = (ash.len() == bsh.len())
                    .then(|| broadcast_shapes(ash, bsh))
                    .flatten()
                    .ok_or_else(|| ctx.unsupported(format!(
                        "operand shapes [N, {ash:?}] and [N, {bsh:?}] do not broadcast sample by sample"
                    )))?;
                (shape, kind.op(None, false), vec![an.clone(), bn.clone()])
            }
            (Val::Dyn { name: xn, shape }, Val::Const(c))
            | (Val::Const(c), Val::Dyn { name: xn, shape }) => {
                let constant_first = matches!(a, Val::Const(_));
                let per_sample = self.const_per_sample(c, shape).ok_or_else(|| {
                    ctx.unsupported(format!(
                        "constant of shape {:?} does not broadcast against [N, {shape:?}] sample by sample",
                        c.shape
                    ))
                })?;
                let out_shape = broadcast_shapes(shape, &per_sample).ok_or_else(|| {
                    ctx.unsupported(format!(
                        "constant of shape {:?} does not broadcast against [N, {shape:?}]",
                        c.shape
                    ))
                })?;
                if kind == BinaryKind::Add && self.bias_after_matmul(name, xn, c, shape, out) {
                    return Ok(Val::Dyn {
                        name: out.to_string(),
                        shape: shape.clone(),
                    });
                }
                let cname = self.add_tensor(
                    &format!("{name}.constant"),
                    ConstTensor::f32(per_sample, c.to_f32()),
                );
                (
                    out_shape,
                    kind.op(Some(cname), constant_first),
                    vec![xn.clone()],
                )
            }
            (Val::Const(_), Val::Const(_)) => {
                return Err(ctx.unsupported("a chain of constants cannot be folded here"));
            }
            _ => {
                return Err(ctx.unsupported("an operand is not a batch-first computed value"));
            }
        };
        let refs: Vec<&str> = inputs.iter().map(String::as_str).collect();
        self.push(name, op, &refs, out, shape.clone());
        Ok(Val::Dyn {
            name: out.to_string(),
            shape,
        })
    }

    /// `MatMul` + `Add(bias)`: the constant becomes the dense layer's bias when it holds one
    /// value per output on the last axis and the MatMul's output has no other reader.
    fn bias_after_matmul(
        &mut self,
        name: &str,
        xn: &str,
        c: &ConstTensor,
        shape: &[usize],
        out: &str,
    ) -> bool {
        let m = shape[shape.len() - 1];
        let per_output = c.len() == m && c.shape.iter().rev().skip(1).all(|&d| d == 1);
        if !per_output || self.uses.get(xn).copied() != Some(1) {
            return false;
        }
        let Some(&i) = self.dense_without_bias.get(xn) else {
            return false;
        };
        let bname = self.add_tensor(
            &format!("{}.bias", self.nodes[i].name),
            ConstTensor::f32(vec![m], c.to_f32()),
        );
        if let Op::Dense { bias, .. } = &mut self.nodes[i].op {
            *bias = Some(bname);
        }
        self.nodes[i].output = out.to_string();
        self.dense_without_bias.remove(xn);
        self.notes.push(format!(
            "{name} (Add) became the bias of {}",
            self.nodes[i].name
        ));
        self.set(
            out,
            Val::Dyn {
                name: out.to_string(),
                shape: shape.to_vec(),
            },
        );
        true
    }

    /// The per-sample form of an ONNX constant broadcast against a value of per-sample shape
    /// `shape` (numpy rule): left-padded to the value's full rank, its batch axis must be 1,
    /// and the rest must broadcast against the value sample by sample.
    fn const_per_sample(&self, c: &ConstTensor, shape: &[usize]) -> Option<Vec<usize>> {
        let rank = shape.len() + 1;
        if c.shape.len() > rank {
            return None;
        }
        let mut full = vec![1usize; rank - c.shape.len()];
        full.extend_from_slice(&c.shape);
        if full[0] != 1 {
            return None;
        }
        let ps = full[1..].to_vec();
        broadcast_shapes(shape, &ps).map(|_| ps)
    }
}

/// Clip, opset 11+: min and max are optional constant inputs (attributes before). A missing
/// bound is ±f32::MAX rather than infinity, which JSON cannot hold; the two differ only for
/// infinite inputs.
fn clip(n: &NodeProto, ctx: &Ctx<'_>, inputs: &[Option<Val>]) -> Result<Op, ImportError> {
    let bound = |i: usize, default: f32| -> Result<f32, ImportError> {
        Ok(match ctx.constant(inputs, i)? {
            Some(t) if t.len() == 1 => t.to_f32()[0],
            Some(_) => return Err(ctx.unsupported("min/max must be scalars")),
            None => default,
        })
    };
    let min = bound(1, attr_float_checked(n, "min")?.unwrap_or(-f32::MAX))?;
    let max = bound(2, attr_float_checked(n, "max")?.unwrap_or(f32::MAX))?;
    if min.is_nan() || max.is_nan() || min > max {
        return Err(ctx.unsupported(format!("min {min} > max {max}")));
    }
    Ok(Op::Clip { min, max })
}
