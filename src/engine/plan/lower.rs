//! Lowering: internal nodes to kernel steps with packed weights, and the buffer layout.

use super::fuse::{IrKind, IrNode};
use super::{ConvKind, ConvStep, Plan, Step, StepKind, ValueId};
use crate::engine::kernels::depthwise::PackedDepthwise;
use crate::engine::kernels::gemm::{ConvGeom, PackedWeights};
use crate::engine::kernels::isa::Isa;
use crate::engine::kernels::pool::{Broadcast, PoolGeom};

pub(super) fn lower(
    nodes: Vec<IrNode<'_>>,
    isa: Isa,
    value_shape: Vec<Vec<usize>>,
    alias_of: Vec<ValueId>,
    graph_output: ValueId,
    folded: Vec<String>,
) -> Plan {
    let value_len: Vec<usize> = value_shape.iter().map(|s| s.iter().product()).collect();
    let mut steps = Vec::with_capacity(nodes.len());
    for n in nodes {
        let in_shape = &value_shape[n.inputs[0]];
        let out_shape = &value_shape[n.output];
        let mut inputs = n.inputs;
        let kind = match n.kind {
            IrKind::Conv {
                weight,
                bias,
                wshape,
                stride,
                dilation,
                padding,
                groups,
                residual,
                act,
            } => {
                let [oc, icg, kh, kw] = wshape;
                let geom = ConvGeom {
                    in_c: in_shape[0],
                    in_h: in_shape[1],
                    in_w: in_shape[2],
                    kh,
                    kw,
                    stride_h: stride[0],
                    stride_w: stride[1],
                    dil_h: dilation[0],
                    dil_w: dilation[1],
                    pad_top: padding[0],
                    pad_left: padding[1],
                    out_h: out_shape[1],
                    out_w: out_shape[2],
                };
                let kind = if groups > 1 && icg == 1 && groups == in_shape[0] {
                    ConvKind::Depthwise(PackedDepthwise::pack(isa, &weight, oc, kh, kw))
                } else {
                    let ocg = oc / groups;
                    let k = icg * kh * kw;
                    let packed = (0..groups)
                        .map(|g| {
                            PackedWeights::pack(
                                isa,
                                &weight[g * ocg * k..(g + 1) * ocg * k],
                                ocg,
                                k,
                            )
                        })
                        .collect();
                    let pointwise =
                        kh == 1 && kw == 1 && stride == [1, 1] && padding == [0, 0, 0, 0];
                    ConvKind::Gemm {
                        groups: packed,
                        pointwise,
                    }
                };
                StepKind::Conv(Box::new(ConvStep {
                    geom,
                    groups,
                    out_c: oc,
                    kind,
                    bias,
                    residual,
                    act,
                }))
            }
            IrKind::Dense {
                weight,
                bias,
                out,
                act,
            } => StepKind::Dense {
                weights: PackedWeights::pack(isa, &weight, out, weight.len() / out),
                bias,
                act,
            },
            IrKind::BatchNorm {
                gamma,
                beta,
                mean,
                variance,
                epsilon,
            } => {
                let mut scale = Vec::with_capacity(gamma.len());
                let mut shift = Vec::with_capacity(gamma.len());
                for c in 0..gamma.len() {
                    let s =
                        f64::from(gamma[c]) / (f64::from(variance[c]) + f64::from(epsilon)).sqrt();
                    scale.push(s as f32);
                    shift.push((f64::from(beta[c]) - f64::from(mean[c]) * s) as f32);
                }
                StepKind::Affine {
                    scale,
                    shift,
                    inner: in_shape[1..].iter().product(),
                }
            }
            IrKind::Act(a) => StepKind::Act(a),
            IrKind::MaxPool {
                kernel,
                stride,
                padding,
                dilation,
            } => StepKind::MaxPool(pool_geom(
                in_shape, out_shape, kernel, stride, padding, dilation,
            )),
            IrKind::AvgPool {
                kernel,
                stride,
                padding,
                count_include_pad,
            } => StepKind::AvgPool {
                geom: pool_geom(in_shape, out_shape, kernel, stride, padding, [1, 1]),
                count_include_pad,
            },
            IrKind::GlobalAvgPool => StepKind::GlobalAvgPool {
                c: in_shape[0],
                plane: in_shape[1..].iter().product(),
            },
            IrKind::Binary { mul, constant } => {
                let other_shape = match &constant {
                    Some((_, s)) => s.clone(),
                    None => value_shape[inputs[1]].clone(),
                };
                let mut first = in_shape.clone();
                if constant.is_none() && value_len[inputs[1]] > value_len[inputs[0]] {
                    // Put the full-size operand first; add and mul commute.
                    inputs.swap(0, 1);
                    first = value_shape[inputs[0]].clone();
                }
                let small = if constant.is_none() {
                    value_shape[inputs[1]].clone()
                } else {
                    other_shape
                };
                let how = if small == first {
                    Broadcast::Full
                } else if small == [1] {
                    Broadcast::Scalar
                } else {
                    Broadcast::PerChannel {
                        inner: first[1..].iter().product(),
                    }
                };
                let constant = constant.map(|(v, _)| v);
                StepKind::Binary { mul, how, constant }
            }
            IrKind::Concat => StepKind::Concat {
                sizes: inputs.iter().map(|&v| value_len[v]).collect(),
            },
            IrKind::Softmax => StepKind::Softmax {
                c: in_shape[0],
                inner: in_shape[1..].iter().product(),
            },
            IrKind::Pad { padding, value } => StepKind::Pad {
                c: in_shape[0],
                h: in_shape[1],
                w: in_shape[2],
                padding,
                value,
            },
            IrKind::Gone => continue,
        };
        steps.push(Step {
            name: n.name,
            kind,
            inputs,
            output: n.output,
        });
    }

    // Buffers: each step's output gets a free buffer; a buffer is freed after the last step
    // that reads any value stored in it. A step's output never shares a buffer with its inputs.
    let n_values = value_len.len();
    let mut last_use = vec![0usize; n_values];
    for (i, s) in steps.iter().enumerate() {
        for &v in s.inputs.iter().chain(match &s.kind {
            StepKind::Conv(c) => c.residual.as_slice(),
            _ => &[],
        }) {
            last_use[alias_of[v]] = last_use[alias_of[v]].max(i);
        }
    }
    last_use[alias_of[graph_output]] = usize::MAX;
    let mut value_buffer = vec![usize::MAX; n_values];
    let mut buffer_len: Vec<usize> = vec![value_len[0]];
    value_buffer[0] = 0;
    let mut free: Vec<usize> = Vec::new();
    let mut live: Vec<ValueId> = vec![0];
    for (i, s) in steps.iter().enumerate() {
        let need = value_len[s.output];
        // Best fit: the smallest free buffer that is large enough, else grow the largest.
        let pick = free
            .iter()
            .enumerate()
            .filter(|(_, b)| buffer_len[**b] >= need)
            .min_by_key(|(_, b)| buffer_len[**b])
            .or_else(|| free.iter().enumerate().max_by_key(|(_, b)| buffer_len[**b]))
            .map(|(pos, _)| pos);
        let buf = match pick {
            Some(pos) => free.swap_remove(pos),
            None => {
                buffer_len.push(0);
                buffer_len.len() - 1
            }
        };
        buffer_len[buf] = buffer_len[buf].max(need);
        value_buffer[s.output] = buf;
        live.push(s.output);
        live.retain(|&v| {
            if last_use[v] <= i {
                free.push(value_buffer[v]);
                false
            } else {
                true
            }
        });
    }
    for v in 0..n_values {
        value_buffer[v] = value_buffer[alias_of[v]];
    }
    Plan {
        isa,
        steps,
        input_shape: value_shape[0].clone(),
        output_shape: value_shape[graph_output].clone(),
        value_len,
        value_buffer,
        buffer_len,
        input: 0,
        output: graph_output,
        folded,
    }
}

fn pool_geom(
    in_shape: &[usize],
    out_shape: &[usize],
    kernel: [usize; 2],
    stride: [usize; 2],
    padding: [usize; 4],
    dilation: [usize; 2],
) -> PoolGeom {
    PoolGeom {
        c: in_shape[0],
        in_h: in_shape[1],
        in_w: in_shape[2],
        out_h: out_shape[1],
        out_w: out_shape[2],
        kernel,
        stride,
        dilation,
        padding,
    }
}
