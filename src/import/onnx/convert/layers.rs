//! Layers with weights and windows: convolution, batch normalisation, dense (Gemm, MatMul
//! over the last axis), pooling.

use super::elementwise::Simple;
use super::{Converter, Ctx, Val};
use crate::graph::build::NamedTensor;
use crate::graph::{Graph, GraphInput, Node, Op, WeightLayout};
use crate::import::ImportError;
use crate::import::onnx::attr::{
    attr_float_checked, attr_int_checked, attr_ints_checked, attr_string_checked,
};
use crate::import::onnx::proto::onnx::NodeProto;
use crate::import::onnx::tensor::ConstTensor;

impl Converter {
    pub(super) fn conv(
        &mut self,
        n: &NodeProto,
        name: &str,
        ctx: &Ctx<'_>,
        inputs: &[Option<Val>],
    ) -> Result<Simple, ImportError> {
        let (xn, s) = ctx.first_dynamic(inputs)?;
        if s.len() != 3 {
            return Err(ctx.unsupported(format!(
                "only 2-D convolution on [N, C, H, W] is supported, input is [N, {s:?}]"
            )));
        }
        let w = match inputs.get(1) {
            Some(Some(Val::Const(t))) => t.clone(),
            _ => return Err(ctx.not_constant(1)),
        };
        if w.shape.len() != 4 {
            return Err(ctx.unsupported(format!("weight shape {:?} is not 4-D", w.shape)));
        }
        let bias = match inputs.get(2) {
            None | Some(None) => None,
            Some(Some(Val::Const(t))) => Some(t.clone()),
            Some(Some(_)) => return Err(ctx.not_constant(2)),
        };
        let (kh, kw) = (w.shape[2], w.shape[3]);
        if let Some(ks) = attr_ints_checked(n, "kernel_shape")?
            && ks != [kh as i64, kw as i64]
        {
            return Err(ctx.unsupported(format!(
                "kernel_shape {ks:?} disagrees with the weight's {kh}x{kw}"
            )));
        }
        let stride = pair(attr_ints_checked(n, "strides")?, ctx, "strides")?.unwrap_or([1, 1]);
        let dilation =
            pair(attr_ints_checked(n, "dilations")?, ctx, "dilations")?.unwrap_or([1, 1]);
        let group = attr_int_checked(n, "group")?.unwrap_or(1);
        if group < 1 {
            return Err(ctx.unsupported(format!("group {group}")));
        }
        let padding = resolve_padding(n, ctx, [s[1], s[2]], [kh, kw], stride, dilation)?;
        let wname = self.add_tensor(&format!("{name}.weight"), w);
        let bname = bias.map(|b| self.add_tensor(&format!("{name}.bias"), b));
        let op = Op::Conv2d {
            weight: wname,
            bias: bname,
            stride,
            dilation,
            padding,
            groups: group as usize,
        };
        // The graph check computes the output shape; do the same arithmetic here through it.
        let shape = conv_like_shape(ctx, s, &op, &self.tensors)?;
        Ok((op, shape, xn.clone()))
    }

    pub(super) fn batch_norm(
        &mut self,
        n: &NodeProto,
        name: &str,
        ctx: &Ctx<'_>,
        inputs: &[Option<Val>],
    ) -> Result<Simple, ImportError> {
        let (xn, s) = ctx.first_dynamic(inputs)?;
        if attr_int_checked(n, "training_mode")?.unwrap_or(0) != 0 {
            return Err(ctx.unsupported("training_mode is set; export the model in eval mode"));
        }
        let mut names = Vec::new();
        for (i, role) in ["gamma", "beta", "mean", "variance"].iter().enumerate() {
            let t = match inputs.get(i + 1) {
                Some(Some(Val::Const(t))) => t.clone(),
                _ => return Err(ctx.not_constant(i + 1)),
            };
            if t.shape != [s[0]] {
                return Err(ctx.unsupported(format!(
                    "{role} has shape {:?}, expected [{}]",
                    t.shape, s[0]
                )));
            }
            names.push(self.add_tensor(&format!("{name}.{role}"), t));
        }
        let epsilon = attr_float_checked(n, "epsilon")?.unwrap_or(1e-5);
        let [gamma, beta, mean, variance] = <[String; 4]>::try_from(names)
            .map_err(|_| ctx.unsupported("batch normalisation needs four tensors"))?;
        Ok((
            Op::BatchNorm {
                gamma,
                beta,
                mean,
                variance,
                epsilon,
            },
            s.clone(),
            xn.clone(),
        ))
    }

    pub(super) fn gemm(
        &mut self,
        n: &NodeProto,
        name: &str,
        ctx: &Ctx<'_>,
        inputs: &[Option<Val>],
    ) -> Result<Simple, ImportError> {
        let (xn, s) = ctx.first_dynamic(inputs)?;
        if s.len() != 1 {
            return Err(ctx.unsupported(format!("input A is [N, {s:?}], expected [N, K]")));
        }
        if attr_int_checked(n, "transA")?.unwrap_or(0) != 0 {
            return Err(ctx.unsupported("transA = 1 (A must be [N, K])"));
        }
        let b = match inputs.get(1) {
            Some(Some(Val::Const(t))) => t.clone(),
            _ => return Err(ctx.not_constant(1)),
        };
        let trans_b = attr_int_checked(n, "transB")?.unwrap_or(0) != 0;
        let alpha = attr_float_checked(n, "alpha")?.unwrap_or(1.0);
        let beta = attr_float_checked(n, "beta")?.unwrap_or(1.0);
        if b.shape.len() != 2 {
            return Err(ctx.unsupported(format!("B has shape {:?}", b.shape)));
        }
        let (k, out) = if trans_b {
            (b.shape[1], b.shape[0])
        } else {
            (b.shape[0], b.shape[1])
        };
        if k != s[0] {
            return Err(ctx.unsupported(format!(
                "B {:?} does not fit A's {} features",
                b.shape, s[0]
            )));
        }
        let mut w = b.to_f32();
        if alpha != 1.0 {
            w.iter_mut().for_each(|v| *v *= alpha);
        }
        let bias = match inputs.get(2) {
            None | Some(None) => None,
            Some(Some(Val::Const(c))) => {
                let v = c.to_f32();
                let per_out: Vec<f32> = match (c.shape.as_slice(), v.len()) {
                    (_, 1) => vec![v[0] * beta; out],
                    ([o] | [1, o], len) if *o == out && len == out => {
                        v.iter().map(|x| x * beta).collect()
                    }
                    _ => {
                        return Err(ctx.unsupported(format!(
                            "C has shape {:?}; only a bias per output ([{out}] or [1, {out}]) is supported",
                            c.shape
                        )));
                    }
                };
                Some(per_out)
            }
            Some(Some(_)) => return Err(ctx.not_constant(2)),
        };
        let wname = self.add_tensor(
            &format!("{name}.weight"),
            ConstTensor::f32(b.shape.clone(), w),
        );
        let bname =
            bias.map(|b| self.add_tensor(&format!("{name}.bias"), ConstTensor::f32(vec![out], b)));
        Ok((
            Op::Dense {
                weight: wname,
                bias: bname,
                weight_layout: if trans_b {
                    WeightLayout::OutIn
                } else {
                    WeightLayout::InOut
                },
            },
            vec![out],
            xn.clone(),
        ))
    }

    pub(super) fn matmul(
        &mut self,
        name: &str,
        ctx: &Ctx<'_>,
        inputs: &[Option<Val>],
        out: &str,
    ) -> Result<Simple, ImportError> {
        let (Some(Some(Val::Dyn { name: xn, shape: s })), Some(Some(Val::Const(b)))) =
            (inputs.first(), inputs.get(1))
        else {
            return Err(ctx.unsupported(
                "only a computed [N, ..., K] value times a constant [K, M] matrix is supported",
            ));
        };
        let k = s[s.len() - 1];
        if b.shape.len() != 2 || b.shape[0] != k {
            return Err(ctx.unsupported(format!(
                "shapes [N, {s:?}] × {:?}: only [N, ..., K] × [K, M] is supported",
                b.shape
            )));
        }
        let mut shape = s.clone();
        *shape.last_mut().expect("rank ≥ 1") = b.shape[1];
        let wname = self.add_tensor(&format!("{name}.weight"), b.clone());
        self.dense_without_bias
            .insert(out.to_string(), self.nodes.len());
        Ok((
            Op::Dense {
                weight: wname,
                bias: None,
                weight_layout: WeightLayout::InOut,
            },
            shape,
            xn.clone(),
        ))
    }

    pub(super) fn pool(
        &mut self,
        n: &NodeProto,
        ctx: &Ctx<'_>,
        inputs: &[Option<Val>],
    ) -> Result<Simple, ImportError> {
        let (xn, s) = ctx.first_dynamic(inputs)?;
        if s.len() != 3 {
            return Err(ctx.unsupported(format!("input [N, {s:?}] is not [N, C, H, W]")));
        }
        let kernel = pair(attr_ints_checked(n, "kernel_shape")?, ctx, "kernel_shape")?
            .ok_or_else(|| ctx.unsupported("kernel_shape is missing"))?;
        let stride = pair(attr_ints_checked(n, "strides")?, ctx, "strides")?.unwrap_or([1, 1]);
        let dilation =
            pair(attr_ints_checked(n, "dilations")?, ctx, "dilations")?.unwrap_or([1, 1]);
        let ceil_mode = attr_int_checked(n, "ceil_mode")?.unwrap_or(0) != 0;
        let padding = resolve_padding(n, ctx, [s[1], s[2]], kernel, stride, dilation)?;
        let op = if n.op_type == "MaxPool" {
            Op::MaxPool {
                kernel,
                stride: Some(stride),
                padding,
                dilation,
                ceil_mode,
            }
        } else {
            if dilation != [1, 1] {
                return Err(ctx.unsupported("dilated average pooling"));
            }
            Op::AvgPool {
                kernel,
                stride: Some(stride),
                padding,
                ceil_mode,
                // ONNX's default excludes padding from the divisor.
                count_include_pad: attr_int_checked(n, "count_include_pad")?.unwrap_or(0) != 0,
            }
        };
        let shape = conv_like_shape(ctx, s, &op, &self.tensors)?;
        Ok((op, shape, xn.clone()))
    }
}

fn pair(v: Option<Vec<i64>>, ctx: &Ctx<'_>, what: &str) -> Result<Option<[usize; 2]>, ImportError> {
    match v {
        None => Ok(None),
        Some(v) if v.len() == 2 && v.iter().all(|&x| (1..=1 << 16).contains(&x)) => {
            Ok(Some([v[0] as usize, v[1] as usize]))
        }
        Some(v) => Err(ctx.unsupported(format!("{what} {v:?}: need two positive values"))),
    }
}

/// ONNX padding (explicit `pads` [top, left, bottom, right] or `auto_pad`) in our order.
fn resolve_padding(
    n: &NodeProto,
    ctx: &Ctx<'_>,
    input: [usize; 2],
    kernel: [usize; 2],
    stride: [usize; 2],
    dilation: [usize; 2],
) -> Result<[usize; 4], ImportError> {
    let auto = attr_string_checked(n, "auto_pad")?.unwrap_or_else(|| "NOTSET".into());
    match auto.as_str() {
        "NOTSET" | "" => match attr_ints_checked(n, "pads")? {
            None => Ok([0; 4]),
            Some(p) if p.len() == 4 && p.iter().all(|&x| (0..=1 << 16).contains(&x)) => {
                Ok([p[0] as usize, p[1] as usize, p[2] as usize, p[3] as usize])
            }
            Some(p) => Err(ctx.unsupported(format!("pads {p:?}: need four amounts ≥ 0"))),
        },
        "VALID" => Ok([0; 4]),
        "SAME_UPPER" | "SAME_LOWER" => {
            // Output = ceil(input / stride); the total padding makes that fit, and the odd
            // unit goes to the end (UPPER) or the beginning (LOWER), as the ONNX spec says.
            let mut begin = [0usize; 2];
            let mut end = [0usize; 2];
            for a in 0..2 {
                let out = input[a].div_ceil(stride[a]);
                let eff = dilation[a] * (kernel[a] - 1) + 1;
                let total = ((out - 1) * stride[a] + eff).saturating_sub(input[a]);
                let small = total / 2;
                let large = total - small;
                if auto == "SAME_UPPER" {
                    (begin[a], end[a]) = (small, large);
                } else {
                    (begin[a], end[a]) = (large, small);
                }
            }
            Ok([begin[0], begin[1], end[0], end[1]])
        }
        other => Err(ctx.unsupported(format!("auto_pad {other:?}"))),
    }
}

/// Runs our own shape check on a single conv or pool node to get its output shape, so the
/// importer and the bundle reader can never disagree.
fn conv_like_shape(
    ctx: &Ctx<'_>,
    input: &[usize],
    op: &Op,
    tensors: &[NamedTensor],
) -> Result<Vec<usize>, ImportError> {
    let g = Graph {
        input: GraphInput {
            name: "x".into(),
            shape: input.to_vec(),
        },
        output: "y".into(),
        nodes: vec![Node {
            name: ctx.node.to_string(),
            inputs: vec!["x".into()],
            output: "y".into(),
            op: op.clone(),
        }],
    };
    let lookup = |name: &str| -> Option<Vec<usize>> {
        tensors
            .iter()
            .rev()
            .find(|t| t.0 == name)
            .map(|t| t.1.clone())
    };
    let shapes =
        crate::graph::shapes::infer(&g, &lookup).map_err(|e| ctx.unsupported(e.to_string()))?;
    Ok(shapes.node_outputs[0].clone())
}
