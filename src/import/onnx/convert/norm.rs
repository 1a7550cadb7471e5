//! Reductions and normalisation: GlobalAveragePool, ReduceMean / ReduceMax / ReduceSum /
//! ReduceL2 over axes after the batch, LayerNormalization (opset 17), Softmax.

use super::elementwise::Simple;
use super::{Converter, Ctx, Val};
use crate::graph::{Op, ReduceKind};
use crate::import::ImportError;
use crate::import::onnx::attr::{attr_float_checked, attr_int_checked, attr_ints_checked};
use crate::import::onnx::proto::onnx::NodeProto;
use crate::import::onnx::tensor::ConstTensor;

impl Converter {
    pub(super) fn global_pool(
        &mut self,
        ctx: &Ctx<'_>,
        inputs: &[Option<Val>],
    ) -> Result<Simple, ImportError> {
        let (xn, s) = ctx.first_dynamic(inputs)?;
        if s.len() != 3 {
            return Err(ctx.unsupported(format!("input {s:?} is not [N, C, H, W]")));
        }
        Ok((Op::GlobalAvgPool, vec![s[0], 1, 1], xn.clone()))
    }

    /// The four reductions. Axes come as an attribute, or as an input from opset 18
    /// (ReduceSum: from 13). The spatial mean of `[N, C, H, W]` becomes the global average
    /// pool, whose kernel is the fastest for it.
    pub(super) fn reduce(
        &mut self,
        n: &NodeProto,
        name: &str,
        ctx: &Ctx<'_>,
        inputs: &[Option<Val>],
        out: &str,
    ) -> Result<(), ImportError> {
        let (xn, s) = ctx.first_dynamic(inputs)?;
        let (xn, s) = (xn.clone(), s.clone());
        let kind = match n.op_type.as_str() {
            "ReduceMean" => ReduceKind::Mean,
            "ReduceMax" => ReduceKind::Max,
            "ReduceSum" => ReduceKind::Sum,
            _ => ReduceKind::L2,
        };
        let axes_as_input = self.opset >= 18 || (kind == ReduceKind::Sum && self.opset >= 13);
        let listed = if axes_as_input {
            ctx.constant(inputs, 1)?.map(|t| t.to_i64())
        } else {
            attr_ints_checked(n, "axes")?
        };
        let keep = attr_int_checked(n, "keepdims")?.unwrap_or(1) != 0;
        let noop = attr_int_checked(n, "noop_with_empty_axes")?.unwrap_or(0) != 0;
        let listed = listed.unwrap_or_default();
        if listed.is_empty() {
            if noop {
                self.push(name, Op::Identity, &[&xn], out, s);
                return Ok(());
            }
            return Err(ctx.unsupported("a reduction over every axis, the batch included"));
        }
        let mut axes = listed
            .iter()
            .map(|&a| ctx.sample_axis(a, s.len()))
            .collect::<Result<Vec<_>, _>>()?;
        axes.sort_unstable();
        axes.dedup();
        if axes.len() != listed.len() {
            return Err(ctx.unsupported(format!("axes {listed:?} repeat an axis")));
        }
        let kept: Vec<usize> = (0..s.len())
            .filter(|d| !axes.contains(d))
            .map(|d| s[d])
            .collect();
        if kind == ReduceKind::Mean && s.len() == 3 && axes == [1, 2] {
            let pooled = vec![s[0], 1, 1];
            if keep {
                self.push(name, Op::GlobalAvgPool, &[&xn], out, pooled);
            } else {
                let mid = format!("{out}.pooled");
                self.push(name, Op::GlobalAvgPool, &[&xn], &mid, pooled);
                self.push(&format!("{name}.flatten"), Op::Flatten, &[&mid], out, kept);
            }
            return Ok(());
        }
        let shape = if keep {
            (0..s.len())
                .map(|d| if axes.contains(&d) { 1 } else { s[d] })
                .collect()
        } else if kept.is_empty() {
            vec![1]
        } else {
            kept
        };
        let op = Op::Reduce {
            kind,
            axes,
            keep_dims: keep,
        };
        self.push(name, op, &[&xn], out, shape);
        Ok(())
    }

    /// LayerNormalization: normalises over the axes from `axis` (default -1) to the last;
    /// `Scale` and `B` are constants of those axes' shape (or broadcast to it).
    pub(super) fn layer_norm(
        &mut self,
        n: &NodeProto,
        name: &str,
        ctx: &Ctx<'_>,
        inputs: &[Option<Val>],
    ) -> Result<Simple, ImportError> {
        let (xn, s) = ctx.first_dynamic(inputs)?;
        let (xn, s) = (xn.clone(), s.clone());
        let axis = ctx.sample_axis(attr_int_checked(n, "axis")?.unwrap_or(-1), s.len())?;
        let block_shape = s[axis..].to_vec();
        let block: usize = block_shape.iter().product();
        let epsilon = attr_float_checked(n, "epsilon")?.unwrap_or(1e-5);
        let mut fitted = |i: usize, role: &str| -> Result<Option<String>, ImportError> {
            let Some(t) = ctx.constant(inputs, i)? else {
                return Ok(None);
            };
            let v = t.to_f32();
            let data = match v.len() {
                len if len == block => v,
                1 => vec![v[0]; block],
                _ => {
                    return Err(ctx.unsupported(format!(
                        "{role} of shape {:?} does not fit the normalised axes {block_shape:?}",
                        t.shape
                    )));
                }
            };
            let t = ConstTensor::f32(block_shape.clone(), data);
            Ok(Some(self.add_tensor(&format!("{name}.{role}"), t)))
        };
        let scale = fitted(1, "scale")?.ok_or_else(|| ctx.not_constant(1))?;
        let bias = fitted(2, "bias")?;
        let op = Op::LayerNorm {
            scale,
            bias,
            axis,
            count: s.len() - axis,
            epsilon,
        };
        Ok((op, s, xn))
    }

    pub(super) fn softmax(
        &mut self,
        n: &NodeProto,
        ctx: &Ctx<'_>,
        inputs: &[Option<Val>],
    ) -> Result<Simple, ImportError> {
        let (xn, s) = ctx.first_dynamic(inputs)?;
        let rank = s.len() as i64 + 1;
        let default = if self.opset >= 13 { -1 } else { 1 };
        let axis = attr_int_checked(n, "axis")?.unwrap_or(default);
        let axis = if axis < 0 { axis + rank } else { axis };
        // Before opset 13, Softmax flattens from `axis` on: the same as ours only when axis 1
        // is the last axis or the rest is 1×1.
        let ok = axis == 1 && (rank == 2 || self.opset >= 13 || s[1..].iter().all(|&d| d == 1));
        if !ok {
            return Err(ctx.unsupported(format!(
                "softmax over axis {axis} of a rank-{rank} value; supported: over classes [N, K] or channels [N, C, H, W]"
            )));
        }
        Ok((Op::Softmax, s.clone(), xn.clone()))
    }
}
