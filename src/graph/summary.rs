//! Counts a checked graph's parameters and multiply-adds, layer by layer.
//!
//! Conventions (common practice, and the ones the papers' tables use):
//! - parameters are what a training framework learns: weights, biases, and batch
//!   normalisation's gamma and beta; its running mean and variance are statistics, not
//!   parameters (PyTorch keeps them as buffers, outside `parameters()`);
//! - multiply-adds count convolutions and dense layers only: for a convolution,
//!   `out_c · out_h · out_w · (in_c / groups) · kh · kw`; for a dense layer, `in · out`.
//!   Element-wise ops, pooling, normalisation and data movement (transpose, slice, gather,
//!   concat, expand, tile) are left out, as in He et al. (2016) and Sandler et al. (2018); a
//!   dense layer over the last axis of a larger value costs `in · out` per position; layer
//!   norm's scale and bias and constant operands of element-wise ops count as parameters.

use serde::Serialize;

use super::shapes::{Shapes, element_count};
use super::{Graph, Op};

/// One row of the layer table.
#[derive(Clone, Debug, Serialize)]
pub struct LayerRow {
    pub name: String,
    pub op: &'static str,
    pub output_shape: Vec<usize>,
    pub parameters: u64,
    pub multiply_adds: u64,
}

/// The layer table and its totals.
#[derive(Clone, Debug, Serialize)]
pub struct Summary {
    pub layers: Vec<LayerRow>,
    pub parameters: u64,
    pub multiply_adds: u64,
}

impl Summary {
    /// Builds the table for a graph that [`super::shapes::infer`] accepted, with the same
    /// tensor shapes.
    pub fn new(
        graph: &Graph,
        shapes: &Shapes,
        tensor_shape: &dyn Fn(&str) -> Option<Vec<usize>>,
    ) -> Summary {
        let count = |t: &str| -> u64 {
            tensor_shape(t).and_then(|s| element_count(&s)).unwrap_or(0) as u64
        };
        let mut layers = Vec::with_capacity(graph.nodes.len());
        for (node, out) in graph.nodes.iter().zip(&shapes.node_outputs) {
            let out_elems = out.iter().product::<usize>() as u64;
            let (parameters, multiply_adds) = match &node.op {
                Op::Conv2d {
                    weight,
                    bias,
                    groups: _,
                    ..
                } => {
                    let w = tensor_shape(weight).unwrap_or_default();
                    // Weight is [out_c, in_c/groups, kh, kw]: one output element costs
                    // in_c/groups * kh * kw multiply-adds.
                    let per_output: u64 = w.iter().skip(1).map(|&d| d as u64).product();
                    (
                        count(weight) + bias.as_deref().map_or(0, count),
                        out_elems * per_output,
                    )
                }
                Op::Dense { weight, bias, .. } => {
                    // Over the last axis: every position of the other axes is one product.
                    let w = count(weight);
                    let outputs = out.last().copied().unwrap_or(1).max(1) as u64;
                    (
                        w + bias.as_deref().map_or(0, count),
                        w * (out_elems / outputs),
                    )
                }
                Op::BatchNorm { gamma, beta, .. } => (count(gamma) + count(beta), 0),
                Op::LayerNorm { scale, bias, .. } => {
                    (count(scale) + bias.as_deref().map_or(0, count), 0)
                }
                op if op.binary().is_some_and(|(_, c, _)| c.is_some()) => {
                    (op.binary().and_then(|(_, c, _)| c).map_or(0, count), 0)
                }
                _ => (0, 0),
            };
            layers.push(LayerRow {
                name: node.name.clone(),
                op: node.op.kind(),
                output_shape: out.clone(),
                parameters,
                multiply_adds,
            });
        }
        Summary {
            parameters: layers.iter().map(|l| l.parameters).sum(),
            multiply_adds: layers.iter().map(|l| l.multiply_adds).sum(),
            layers,
        }
    }
}
