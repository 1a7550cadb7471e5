//! Folding and fusion on the plan's internal node list, before kernels are chosen.

use std::borrow::Cow;
use std::collections::HashMap;

use super::ValueId;
use crate::engine::kernels::activation::Activation;
use crate::engine::kernels::layout::StridedCopy;
use crate::engine::kernels::norm::ReducePlan;
use crate::graph::BinaryKind;

/// Internal node before lowering. Weights borrow from the bundle (`'w`) until something
/// changes them (folding), so planning copies only what it rewrites.
pub(super) struct IrNode<'w> {
    pub(super) name: String,
    pub(super) kind: IrKind<'w>,
    pub(super) inputs: Vec<ValueId>,
    pub(super) output: ValueId,
}

pub(super) enum IrKind<'w> {
    Conv {
        weight: Cow<'w, [f32]>,
        bias: Option<Vec<f32>>,
        wshape: [usize; 4],
        stride: [usize; 2],
        dilation: [usize; 2],
        padding: [usize; 4],
        groups: usize,
        residual: Option<ValueId>,
        act: Activation,
    },
    Dense {
        /// `[out, in]` row-major.
        weight: Cow<'w, [f32]>,
        bias: Option<Vec<f32>>,
        out: usize,
        act: Activation,
    },
    BatchNorm {
        gamma: Vec<f32>,
        beta: Vec<f32>,
        mean: Vec<f32>,
        variance: Vec<f32>,
        epsilon: f32,
    },
    Act(Activation),
    MaxPool {
        kernel: [usize; 2],
        stride: [usize; 2],
        padding: [usize; 4],
        dilation: [usize; 2],
    },
    AvgPool {
        kernel: [usize; 2],
        stride: [usize; 2],
        padding: [usize; 4],
        count_include_pad: bool,
    },
    GlobalAvgPool,
    Binary {
        kind: BinaryKind,
        constant: Option<(Vec<f32>, Vec<usize>)>,
        constant_first: bool,
    },
    Concat {
        axis: usize,
    },
    Copy(StridedCopy),
    Gather {
        axis: usize,
        indices: Vec<usize>,
    },
    LayerNorm {
        scale: Vec<f32>,
        bias: Option<Vec<f32>>,
        axis: usize,
        count: usize,
        epsilon: f32,
    },
    Reduce(ReducePlan),
    Softmax,
    Pad {
        padding: [usize; 4],
        channels: [usize; 2],
        value: f32,
    },
    /// Removed by a fusion.
    Gone,
}

/// Counts how many live nodes read each value (the graph output counts as one more reader).
/// Reads through an alias count against the node output that holds the data.
fn readers(nodes: &[IrNode<'_>], alias_of: &[ValueId], graph_output: ValueId) -> Vec<usize> {
    let n_values = alias_of.len();
    let mut count = vec![0usize; n_values];
    for n in nodes {
        if matches!(n.kind, IrKind::Gone) {
            continue;
        }
        for &i in &n.inputs {
            count[alias_of[i]] += 1;
        }
        if let IrKind::Conv {
            residual: Some(r), ..
        } = n.kind
        {
            count[alias_of[r]] += 1;
        }
    }
    count[alias_of[graph_output]] += 1;
    count
}

pub(super) fn fuse(
    nodes: &mut Vec<IrNode<'_>>,
    graph_output: ValueId,
    value_shape: &[Vec<usize>],
    alias_of: &[ValueId],
    folded: &mut Vec<String>,
) {
    // Every fusion below needs a direct connection: through a reshape, "per channel" would
    // no longer mean the same channels.
    let g = Links {
        graph_output,
        value_shape,
        alias_of,
    };
    fold_batch_norms(nodes, &g, folded);
    fuse_residual_adds(nodes, &g, folded);
    fuse_silus(nodes, &g, folded);
    fuse_activations(nodes, &g, folded);
    nodes.retain(|n| !matches!(n.kind, IrKind::Gone));
}

/// What the fusions need to know about values besides the nodes.
struct Links<'a> {
    graph_output: ValueId,
    value_shape: &'a [Vec<usize>],
    alias_of: &'a [ValueId],
}

fn producer_of(nodes: &[IrNode<'_>]) -> HashMap<ValueId, usize> {
    nodes
        .iter()
        .enumerate()
        .filter(|(_, n)| !matches!(n.kind, IrKind::Gone))
        .map(|(i, n)| (n.output, i))
        .collect()
}

/// Batch norm into the conv or dense layer feeding it.
fn fold_batch_norms(nodes: &mut [IrNode<'_>], g: &Links<'_>, folded: &mut Vec<String>) {
    let (graph_output, value_shape, alias_of) = (g.graph_output, g.value_shape, g.alias_of);
    for i in 0..nodes.len() {
        let IrKind::BatchNorm { .. } = nodes[i].kind else {
            continue;
        };
        let src = nodes[i].inputs[0];
        let count = readers(nodes, alias_of, graph_output);
        let producers = producer_of(nodes);
        let Some(&p) = producers.get(&src) else {
            continue;
        };
        if alias_of[src] != src || count[src] != 1 {
            continue;
        }
        // A dense layer's outputs are batch norm's channels only for a flat value; over the
        // last axis of a larger one, its outputs are not the channel axis.
        let foldable = match nodes[p].kind {
            IrKind::Conv {
                act: Activation::Identity,
                residual: None,
                ..
            } => true,
            IrKind::Dense {
                act: Activation::Identity,
                ..
            } => value_shape[src].len() == 1,
            _ => false,
        };
        if !foldable {
            continue;
        }
        let IrKind::BatchNorm {
            gamma,
            beta,
            mean,
            variance,
            epsilon,
        } = std::mem::replace(&mut nodes[i].kind, IrKind::Gone)
        else {
            unreachable!("matched above")
        };
        let out = nodes[i].output;
        let bn_name = nodes[i].name.clone();
        let (weight, bias, per_row) = match &mut nodes[p].kind {
            IrKind::Conv {
                weight,
                bias,
                wshape,
                ..
            } => {
                let per = wshape[1] * wshape[2] * wshape[3];
                (weight, bias, per)
            }
            IrKind::Dense {
                weight, bias, out, ..
            } => {
                let per = weight.len() / *out;
                (weight, bias, per)
            }
            _ => unreachable!("checked foldable"),
        };
        let weight = weight.to_mut();
        let channels = gamma.len();
        let old_bias = bias.take().unwrap_or_else(|| vec![0.0; channels]);
        let mut new_bias = vec![0.0f32; channels];
        for c in 0..channels {
            // f64 so that folding adds no rounding of its own beyond the final cast.
            let s = f64::from(gamma[c]) / (f64::from(variance[c]) + f64::from(epsilon)).sqrt();
            for w in &mut weight[c * per_row..(c + 1) * per_row] {
                *w = (f64::from(*w) * s) as f32;
            }
            new_bias[c] =
                ((f64::from(old_bias[c]) - f64::from(mean[c])) * s + f64::from(beta[c])) as f32;
        }
        *bias = Some(new_bias);
        nodes[p].output = out;
        folded.push(format!("{bn_name} folded into {}", nodes[p].name));
    }
}

/// Residual add into a conv producing one operand; the conv moves to the add's place.
fn fuse_residual_adds(nodes: &mut [IrNode<'_>], g: &Links<'_>, folded: &mut Vec<String>) {
    let (graph_output, value_shape, alias_of) = (g.graph_output, g.value_shape, g.alias_of);
    for i in 0..nodes.len() {
        let IrKind::Binary {
            constant: None,
            kind: BinaryKind::Add,
            ..
        } = nodes[i].kind
        else {
            continue;
        };
        let (a, b) = (nodes[i].inputs[0], nodes[i].inputs[1]);
        if value_shape[a] != value_shape[b] || a == b {
            continue;
        }
        let count = readers(nodes, alias_of, graph_output);
        let producers = producer_of(nodes);
        let pick = [(a, b), (b, a)].into_iter().find(|&(conv_out, _)| {
            alias_of[conv_out] == conv_out
                && count[conv_out] == 1
                && producers.get(&conv_out).is_some_and(|&p| {
                    matches!(
                        nodes[p].kind,
                        IrKind::Conv {
                            act: Activation::Identity,
                            residual: None,
                            ..
                        }
                    )
                })
        });
        let Some((conv_out, other)) = pick else {
            continue;
        };
        let p = producers[&conv_out];
        let add = std::mem::replace(&mut nodes[i].kind, IrKind::Gone);
        drop(add);
        let mut conv = std::mem::replace(
            &mut nodes[p],
            IrNode {
                name: String::new(),
                kind: IrKind::Gone,
                inputs: Vec::new(),
                output: 0,
            },
        );
        if let IrKind::Conv { residual, .. } = &mut conv.kind {
            *residual = Some(other);
        }
        folded.push(format!("{} added into {}", nodes[i].name, conv.name));
        conv.output = nodes[i].output;
        nodes[i] = conv;
    }
}

/// `Mul(x, Sigmoid(x))`, as exporters write SiLU (EfficientNet's swish, Ramachandran et al.
/// 2017), into one SiLU step, which the layer producing `x` can then take into its epilogue.
fn fuse_silus(nodes: &mut [IrNode<'_>], g: &Links<'_>, folded: &mut Vec<String>) {
    let (graph_output, alias_of) = (g.graph_output, g.alias_of);
    for i in 0..nodes.len() {
        let IrKind::Binary {
            kind: BinaryKind::Mul,
            constant: None,
            ..
        } = nodes[i].kind
        else {
            continue;
        };
        let (a, b) = (nodes[i].inputs[0], nodes[i].inputs[1]);
        let count = readers(nodes, alias_of, graph_output);
        let producers = producer_of(nodes);
        let sigmoid_of = |v: ValueId, x: ValueId| {
            producers.get(&v).copied().filter(|&p| {
                matches!(nodes[p].kind, IrKind::Act(Activation::Sigmoid))
                    && alias_of[nodes[p].inputs[0]] == alias_of[x]
                    && alias_of[v] == v
                    && count[v] == 1
            })
        };
        let Some((sig, x)) = [(b, a), (a, b)]
            .into_iter()
            .find_map(|(v, x)| sigmoid_of(v, x).map(|p| (p, x)))
        else {
            continue;
        };
        nodes[sig].kind = IrKind::Gone;
        nodes[i].kind = IrKind::Act(Activation::Silu);
        nodes[i].inputs = vec![x];
        folded.push(format!(
            "{} and {} fused into one SiLU",
            nodes[sig].name, nodes[i].name
        ));
    }
}

/// Activation into the conv or dense layer feeding it.
fn fuse_activations(nodes: &mut [IrNode<'_>], g: &Links<'_>, folded: &mut Vec<String>) {
    let (graph_output, alias_of) = (g.graph_output, g.alias_of);
    for i in 0..nodes.len() {
        let IrKind::Act(a) = nodes[i].kind else {
            continue;
        };
        let src = nodes[i].inputs[0];
        let count = readers(nodes, alias_of, graph_output);
        let producers = producer_of(nodes);
        let Some(&p) = producers.get(&src) else {
            continue;
        };
        if alias_of[src] != src || count[src] != 1 {
            continue;
        }
        let slot = match &mut nodes[p].kind {
            IrKind::Conv { act, .. } | IrKind::Dense { act, .. }
                if *act == Activation::Identity =>
            {
                act
            }
            _ => continue,
        };
        *slot = a;
        let out = nodes[i].output;
        nodes[i].kind = IrKind::Gone;
        folded.push(format!("{} fused into {}", nodes[i].name, nodes[p].name));
        nodes[p].output = out;
    }
}
