//! Step 1 of planning: one graph node → an internal node, or an alias of its input when the
//! op moves no data (reshape, flatten, identity, a one-input concat, a transpose of size-1
//! axes, a slice of everything).

use std::borrow::Cow;

use super::fuse::IrKind;
use crate::bundle::Bundle;
use crate::engine::kernels::activation::Activation;
use crate::engine::kernels::layout::StridedCopy;
use crate::engine::kernels::norm::ReducePlan;
use crate::graph::{GeluApproximation, Op, WeightLayout};

pub(super) enum Translated<'w> {
    /// The output is the input's data under another shape.
    Alias,
    Node(IrKind<'w>),
}

/// The activation an element-wise op of one operand computes, if it is one.
pub(super) fn activation_of(op: &Op) -> Option<Activation> {
    Some(match *op {
        Op::Relu => Activation::Relu,
        Op::Clip { min, max } => Activation::Clip { min, max },
        Op::LeakyRelu { slope } => Activation::LeakyRelu { slope },
        Op::Sigmoid => Activation::Sigmoid,
        Op::Tanh => Activation::Tanh,
        Op::HardSigmoid { alpha, beta } => Activation::HardSigmoid { alpha, beta },
        Op::HardSwish => Activation::HardSwish,
        Op::Silu => Activation::Silu,
        Op::Gelu {
            approximation: GeluApproximation::None,
        } => Activation::Gelu,
        Op::Gelu {
            approximation: GeluApproximation::Tanh,
        } => Activation::GeluTanh,
        Op::Sqrt => Activation::Sqrt,
        Op::Reciprocal => Activation::Reciprocal,
        Op::Abs => Activation::Abs,
        Op::Neg => Activation::Neg,
        Op::Exp => Activation::Exp,
        Op::Log => Activation::Log,
        Op::Erf => Activation::Erf,
        Op::Pow { exponent } => Activation::Pow { exponent },
        _ => return None,
    })
}

/// Translates one node of a verified bundle (every tensor it names exists, every shape was
/// checked by `graph::shapes::infer`).
pub(super) fn translate<'w>(
    bundle: &'w Bundle,
    op: &Op,
    in_shape: &[usize],
    out_shape: &[usize],
) -> Translated<'w> {
    // Verified bundle: every tensor a node names exists (shapes::infer checked it).
    let weights = |name: &str| -> Cow<'w, [f32]> { bundle.tensor(name).expect("verified tensor") };
    let tensor = |name: &str| -> Vec<f32> { weights(name).into_owned() };
    let copy = |c: StridedCopy| {
        if c.is_identity(in_shape.iter().product()) {
            Translated::Alias
        } else {
            Translated::Node(IrKind::Copy(c))
        }
    };
    let kind = match op {
        Op::Flatten | Op::Reshape { .. } | Op::Identity => return Translated::Alias,
        Op::Conv2d { .. } | Op::Dense { .. } | Op::BatchNorm { .. } => {
            return Translated::Node(layer(bundle, op));
        }
        Op::MaxPool {
            kernel,
            stride,
            padding,
            dilation,
            ..
        } => IrKind::MaxPool {
            kernel: *kernel,
            stride: stride.unwrap_or(*kernel),
            padding: *padding,
            dilation: *dilation,
        },
        Op::AvgPool {
            kernel,
            stride,
            padding,
            count_include_pad,
            ..
        } => IrKind::AvgPool {
            kernel: *kernel,
            stride: stride.unwrap_or(*kernel),
            padding: *padding,
            count_include_pad: *count_include_pad,
        },
        Op::GlobalAvgPool => IrKind::GlobalAvgPool,
        Op::Concat { .. } if in_shape == out_shape => return Translated::Alias,
        Op::Concat { axis } => IrKind::Concat { axis: *axis },
        Op::Softmax => IrKind::Softmax,
        Op::Pad {
            padding,
            value,
            channels,
        } => IrKind::Pad {
            padding: *padding,
            channels: *channels,
            value: *value,
        },
        Op::Transpose { perm } => return copy(StridedCopy::transpose(in_shape, perm)),
        Op::Slice { ranges } => {
            let r: Vec<_> = ranges
                .iter()
                .map(|r| (r.axis, r.start, r.step, r.count))
                .collect();
            return copy(StridedCopy::slice(in_shape, &r));
        }
        Op::Expand { shape } => return copy(StridedCopy::expand(in_shape, shape)),
        Op::Tile { repeats } => return copy(StridedCopy::tile(in_shape, repeats)),
        Op::Gather { axis, indices } => IrKind::Gather {
            axis: *axis,
            indices: indices.clone(),
        },
        Op::LayerNorm {
            scale,
            bias,
            axis,
            count,
            epsilon,
        } => IrKind::LayerNorm {
            scale: tensor(scale),
            bias: bias.as_deref().map(tensor),
            axis: *axis,
            count: *count,
            epsilon: *epsilon,
        },
        Op::Reduce { kind, axes, .. } => IrKind::Reduce(ReducePlan::new(*kind, in_shape, axes)),
        op => match (op.binary(), activation_of(op)) {
            (Some((kind, constant, constant_first)), _) => IrKind::Binary {
                kind,
                constant: constant.map(|c| (tensor(c), bundle.tensor_shape(c).unwrap_or_default())),
                constant_first,
            },
            (None, Some(a)) => IrKind::Act(a),
            (None, None) => unreachable!("every op kind is handled above"),
        },
    };
    Translated::Node(kind)
}

/// The ops with weights: convolution, dense, batch normalisation.
fn layer<'w>(bundle: &'w Bundle, op: &Op) -> IrKind<'w> {
    let weights = |name: &str| -> Cow<'w, [f32]> { bundle.tensor(name).expect("verified tensor") };
    let tensor = |name: &str| -> Vec<f32> { weights(name).into_owned() };
    match op {
        Op::Conv2d {
            weight,
            bias,
            stride,
            dilation,
            padding,
            groups,
        } => {
            let ws = bundle.tensor_shape(weight).unwrap_or_default();
            IrKind::Conv {
                weight: weights(weight),
                bias: bias.as_deref().map(tensor),
                wshape: [ws[0], ws[1], ws[2], ws[3]],
                stride: *stride,
                dilation: *dilation,
                padding: *padding,
                groups: *groups,
                residual: None,
                act: Activation::Identity,
            }
        }
        Op::Dense {
            weight,
            bias,
            weight_layout,
        } => {
            let ws = bundle.tensor_shape(weight).unwrap_or_default();
            let w = weights(weight);
            let (out, weight) = match weight_layout {
                WeightLayout::OutIn => (ws[0], w),
                WeightLayout::InOut => {
                    let (inp, out) = (ws[0], ws[1]);
                    let mut t = vec![0.0; w.len()];
                    for i in 0..inp {
                        for o in 0..out {
                            t[o * inp + i] = w[i * out + o];
                        }
                    }
                    (out, Cow::Owned(t))
                }
            };
            IrKind::Dense {
                weight,
                bias: bias.as_deref().map(tensor),
                out,
                act: Activation::Identity,
            }
        }
        Op::BatchNorm {
            gamma,
            beta,
            mean,
            variance,
            epsilon,
        } => IrKind::BatchNorm {
            gamma: tensor(gamma),
            beta: tensor(beta),
            mean: tensor(mean),
            variance: tensor(variance),
            epsilon: *epsilon,
        },
        _ => unreachable!("called for layers with weights only"),
    }
}
