//! Rewrites of the converted graph that exporters make necessary: a layer norm or a GELU
//! written out as arithmetic (older opsets) becomes one node, and channels-last blocks
//! bracketed by transposes (ConvNeXt's `permute → LayerNorm → Linear → GELU → Linear →
//! permute`) are computed channels-first, so no data is moved at all.
//!
//! All run after the node walk, on convoy's own graph; the bundle's check samples then
//! confirm the rewritten graph against the reference outputs like any other.

use std::collections::{HashMap, HashSet};

use crate::graph::build::NamedTensor;
use crate::graph::{GeluApproximation, Node, Op, ReduceKind, WeightLayout};

/// Who reads each value.
struct Links {
    readers: HashMap<String, Vec<usize>>,
}

impl Links {
    fn new(nodes: &[Node], output: &str) -> Links {
        let mut readers: HashMap<String, Vec<usize>> = HashMap::new();
        for (i, n) in nodes.iter().enumerate() {
            for v in &n.inputs {
                readers.entry(v.clone()).or_default().push(i);
            }
        }
        // The graph output has a reader outside the graph.
        readers
            .entry(output.to_string())
            .or_default()
            .push(usize::MAX);
        Links { readers }
    }

    /// The one node that reads `value`, if exactly one does.
    fn only_reader(&self, value: &str) -> Option<usize> {
        match self.readers.get(value).map(Vec::as_slice) {
            Some(&[r]) if r != usize::MAX => Some(r),
            _ => None,
        }
    }
}

fn tensor_mut<'t>(tensors: &'t mut [NamedTensor], name: &str) -> Option<&'t mut NamedTensor> {
    tensors.iter_mut().rev().find(|t| t.0 == name)
}

fn tensor<'t>(tensors: &'t [NamedTensor], name: &str) -> Option<&'t NamedTensor> {
    tensors.iter().rev().find(|t| t.0 == name)
}

/// A written-out computation found at node `i`: the nodes to delete, the node that becomes
/// the one step, and that step's op (its input is node `i`'s first input).
type Match = (Vec<usize>, usize, Op);

/// Replaces every match of `find` (tried at each node in turn) by its one step, noting each
/// rewrite as `first … last: what`.
fn rewrite_all(
    nodes: &mut Vec<Node>,
    what: &str,
    mut find: impl FnMut(&[Node], usize) -> Option<Match>,
) -> Vec<String> {
    let mut notes = Vec::new();
    let mut i = 0;
    while i < nodes.len() {
        let Some((mut gone, last, op)) = find(nodes, i) else {
            i += 1;
            continue;
        };
        notes.push(format!("{} … {}: {what}", nodes[i].name, nodes[last].name));
        nodes[last].op = op;
        nodes[last].inputs = vec![nodes[i].inputs[0].clone()];
        gone.sort_unstable();
        for g in gone.into_iter().rev() {
            nodes.remove(g);
        }
    }
    notes
}

/// `ReduceMean → Sub → Pow 2 → ReduceMean → Add ε → Sqrt → Div → Mul γ` (then optionally
/// `Add β`) over a contiguous run of axes becomes one layer norm. Returns one note per
/// rewrite.
pub(super) fn fuse_layer_norms(
    nodes: &mut Vec<Node>,
    tensors: &mut [NamedTensor],
    output: &str,
) -> Vec<String> {
    let what = "a layer norm written out as arithmetic, fused into one step";
    rewrite_all(nodes, what, |nodes, i| {
        match_layer_norm(nodes, tensors, output, i)
    })
}

/// GELU written out as before opset 20 (`x / √2 → Erf → + 1 → · x → · ½`, Hendrycks and
/// Gimpel 2016, as PyTorch's exporter spells `gelu`) becomes one GELU step. Returns one note
/// per rewrite.
pub(super) fn fuse_gelus(
    nodes: &mut Vec<Node>,
    tensors: &[NamedTensor],
    output: &str,
) -> Vec<String> {
    let what = "GELU written out as arithmetic, fused into one step";
    rewrite_all(nodes, what, |nodes, i| {
        let steps = match_gelu(nodes, tensors, output, i)?;
        let gelu = Op::Gelu {
            approximation: GeluApproximation::None,
        };
        Some((steps[..4].to_vec(), steps[4], gelu))
    })
}

/// `Div(x, √2)` (or `Mul(x, 1/√2)`) at node `i`, `Erf`, `Add 1`, `Mul(x, ·)`, `Mul ½`, each
/// read only by the next: the five node indices.
fn match_gelu(
    nodes: &[Node],
    tensors: &[NamedTensor],
    output: &str,
    i: usize,
) -> Option<[usize; 5]> {
    let scalar = |c: &Option<String>, want: f32| {
        c.as_deref()
            .and_then(|c| tensor(tensors, c))
            .is_some_and(|t| t.2.len() == 1 && (t.2[0] - want).abs() <= 1e-6 * want.abs())
    };
    let scaled = match &nodes[i].op {
        Op::Div {
            constant,
            constant_first: false,
        } => scalar(constant, std::f32::consts::SQRT_2),
        Op::Mul { constant } => scalar(constant, std::f32::consts::FRAC_1_SQRT_2),
        _ => false,
    };
    if !scaled {
        return None;
    }
    let links = Links::new(nodes, output);
    let x = &nodes[i].inputs[0];
    let erf = links.only_reader(&nodes[i].output)?;
    let add = links.only_reader(&nodes[erf].output)?;
    let times_x = links.only_reader(&nodes[add].output)?;
    let half = links.only_reader(&nodes[times_x].output)?;
    let fits = matches!(nodes[erf].op, Op::Erf)
        && matches!(&nodes[add].op, Op::Add { constant } if scalar(constant, 1.0))
        && matches!(nodes[times_x].op, Op::Mul { constant: None })
        && nodes[times_x].inputs.contains(x)
        && nodes[times_x].inputs.contains(&nodes[add].output)
        && matches!(&nodes[half].op, Op::Mul { constant } if scalar(constant, 0.5));
    fits.then_some([i, erf, add, times_x, half])
}

/// The normalising core of a written-out layer norm, by node index.
struct Core {
    axes: Vec<usize>,
    /// `ReduceMean`, `Sub`, `Pow 2`, `ReduceMean`, `Add ε`, `Sqrt`.
    steps: [usize; 6],
    div: usize,
    epsilon: f32,
}

/// Matches the written-out layer norm whose first mean is node `i`: returns the nodes to
/// delete, the node that becomes the layer norm, and its op.
fn match_layer_norm(
    nodes: &[Node],
    tensors: &mut [NamedTensor],
    output: &str,
    i: usize,
) -> Option<Match> {
    let links = Links::new(nodes, output);
    let core = match_core(nodes, tensors, &links, i)?;
    let mut gone = core.steps.to_vec();
    // γ and β: constants with ones outside the normalised axes.
    let (mut last, mut bias) = (core.div, None);
    let m = links.only_reader(&nodes[last].output)?;
    let Op::Mul { constant: Some(c) } = &nodes[m].op else {
        // Without γ there is nothing to hold the block's shape; such graphs keep their steps.
        return None;
    };
    if !block_only(tensors, c, &core.axes) {
        return None;
    }
    let scale = c.clone();
    gone.push(last);
    last = m;
    if let Some(a) = links.only_reader(&nodes[last].output)
        && let Op::Add { constant: Some(c) } = &nodes[a].op
        && block_only(tensors, c, &core.axes)
    {
        gone.push(last);
        (last, bias) = (a, Some(c.clone()));
    }
    let sample = tensor(tensors, &scale)
        .map(|t| t.1.clone())
        .unwrap_or_default();
    let block: Vec<usize> = core.axes.iter().map(|&a| sample[a]).collect();
    reshape_tensor(tensors, &scale, &block);
    if let Some(b) = &bias {
        reshape_tensor(tensors, b, &block);
    }
    let op = Op::LayerNorm {
        scale,
        bias,
        axis: core.axes[0],
        count: core.axes.len(),
        epsilon: core.epsilon,
    };
    Some((gone, last, op))
}

/// `ReduceMean(x) → Sub(x, mean) → Pow 2 → ReduceMean → Add ε → Sqrt → Div(diff, sqrt)` over a
/// contiguous run of axes, every intermediate read only inside the pattern.
fn match_core(nodes: &[Node], tensors: &[NamedTensor], links: &Links, i: usize) -> Option<Core> {
    let Op::Reduce {
        kind: ReduceKind::Mean,
        axes,
        keep_dims: true,
    } = &nodes[i].op
    else {
        return None;
    };
    if !axes.windows(2).all(|w| w[1] == w[0] + 1) {
        return None;
    }
    let x = &nodes[i].inputs[0];
    let sub = links.only_reader(&nodes[i].output)?;
    if !matches!(nodes[sub].op, Op::Sub { constant: None, .. })
        || nodes[sub].inputs != [x.clone(), nodes[i].output.clone()]
    {
        return None;
    }
    let d = &nodes[sub].output;
    let [r1, r2] = links.readers.get(d)?.as_slice() else {
        return None;
    };
    let is_square = |at: usize| matches!(nodes[at].op, Op::Pow { exponent: 2.0 });
    let (pow, div) = if is_square(*r1) {
        (*r1, *r2)
    } else {
        (*r2, *r1)
    };
    if !is_square(pow) || !matches!(nodes[div].op, Op::Div { constant: None, .. }) {
        return None;
    }
    let var = links.only_reader(&nodes[pow].output)?;
    if nodes[var].op != nodes[i].op {
        return None;
    }
    let add = links.only_reader(&nodes[var].output)?;
    let Op::Add {
        constant: Some(eps),
    } = &nodes[add].op
    else {
        return None;
    };
    let epsilon = tensor(tensors, eps).filter(|t| t.2.len() == 1)?.2[0];
    let sqrt = links.only_reader(&nodes[add].output)?;
    if nodes[sqrt].op != Op::Sqrt
        || links.only_reader(&nodes[sqrt].output) != Some(div)
        || nodes[div].inputs != [d.clone(), nodes[sqrt].output.clone()]
    {
        return None;
    }
    Some(Core {
        axes: axes.clone(),
        steps: [i, sub, pow, var, add, sqrt],
        div,
        epsilon,
    })
}

/// Whether constant `name` has size 1 on every axis outside `axes` (a per-block constant).
fn block_only(tensors: &[NamedTensor], name: &str, axes: &[usize]) -> bool {
    tensor(tensors, name).is_some_and(|t| {
        t.1.iter()
            .enumerate()
            .all(|(d, &n)| axes.contains(&d) || n == 1)
    })
}

fn reshape_tensor(tensors: &mut [NamedTensor], name: &str, shape: &[usize]) {
    if let Some(t) = tensor_mut(tensors, name) {
        t.1 = shape.to_vec();
    }
}

/// Channels-last blocks of `[C, H, W]` values: `Transpose [1, 2, 0]`, then ops that each
/// work on the last axis position by position (a chain, or a small graph of them such as
/// GELU written out as `x · ½(1 + erf(x/√2))`), every value of which is read only inside the
/// block or by a closing `Transpose [2, 0, 1]`. The block is rewritten channels-first (layer
/// norm over axis 0, dense layers as 1×1 convolutions, constants as `[C, 1, 1]`) and the
/// transposes become aliases. Every value of the block has rank 3 and is permuted the same
/// way, so broadcasting between two of them means the same channels-first.
pub(super) fn channels_first_blocks(
    nodes: &mut [Node],
    tensors: &mut [NamedTensor],
    output: &str,
) -> Vec<String> {
    let mut notes = Vec::new();
    for i in 0..nodes.len() {
        if !matches!(&nodes[i].op, Op::Transpose { perm } if perm == &[1, 2, 0]) {
            continue;
        }
        let links = Links::new(nodes, output);
        let Some((steps, exits)) = channels_last_block(nodes, tensors, &links, i) else {
            continue;
        };
        for &j in &steps {
            let op = std::mem::replace(&mut nodes[j].op, Op::Identity);
            nodes[j].op = channels_first(op, tensors);
        }
        nodes[i].op = Op::Identity;
        for &j in &exits {
            nodes[j].op = Op::Identity;
        }
        notes.push(format!(
            "{} … {}: a channels-last block computed channels-first ({} steps, no transposes)",
            nodes[i].name,
            nodes[exits[exits.len() - 1]].name,
            steps.len()
        ));
    }
    notes
}

/// The block opened by the transpose at `start`: its position-wise steps and its closing
/// transposes, by node index; `None` when some value of the block escapes it.
fn channels_last_block(
    nodes: &[Node],
    tensors: &[NamedTensor],
    links: &Links,
    start: usize,
) -> Option<(Vec<usize>, Vec<usize>)> {
    let mut inside: HashSet<&str> = HashSet::from([nodes[start].output.as_str()]);
    let (mut steps, mut exits) = (Vec::new(), Vec::new());
    // Nodes are in graph order, so a step's inputs are settled before it is met.
    for (j, node) in nodes.iter().enumerate().skip(start + 1) {
        if !node.inputs.iter().any(|v| inside.contains(v.as_str())) {
            continue;
        }
        let all_inside = node.inputs.iter().all(|v| inside.contains(v.as_str()));
        match &node.op {
            Op::Transpose { perm } if perm == &[2, 0, 1] => exits.push(j),
            op if all_inside && position_wise(op, tensors) => {
                steps.push(j);
                inside.insert(node.output.as_str());
            }
            _ => return None,
        }
    }
    // Every value of the block, the opening one included, is read only inside it.
    let escapes = |value: &String| {
        links.readers.get(value).is_none_or(|readers| {
            readers
                .iter()
                .any(|r| !(steps.contains(r) || exits.contains(r)))
        })
    };
    let sealed = !exits.is_empty()
        && !escapes(&nodes[start].output)
        && !steps.iter().any(|&j| escapes(&nodes[j].output));
    sealed.then_some((steps, exits))
}

/// Ops that treat every position of `[H, W, C]` values alike over their last axis.
fn position_wise(op: &Op, tensors: &[NamedTensor]) -> bool {
    match op {
        Op::LayerNorm {
            axis: 2, count: 1, ..
        }
        | Op::Dense { .. } => true,
        Op::Transpose { .. }
        | Op::Slice { .. }
        | Op::Gather { .. }
        | Op::Expand { .. }
        | Op::Tile { .. }
        | Op::Reduce { .. }
        | Op::LayerNorm { .. }
        | Op::Reshape { .. }
        | Op::Flatten
        | Op::Concat { .. }
        | Op::Softmax
        | Op::Conv2d { .. }
        | Op::BatchNorm { .. }
        | Op::MaxPool { .. }
        | Op::AvgPool { .. }
        | Op::GlobalAvgPool
        | Op::Pad { .. } => false,
        op => match op.binary() {
            // A constant of one value per channel (or one value) on the last axis.
            Some((_, Some(c), _)) => tensor(tensors, c)
                .is_some_and(|t| t.1.len() == 3 && t.1[0] == 1 && t.1[1] == 1 || t.2.len() == 1),
            // Two values of the block, permuted alike.
            Some((_, None, _)) => true,
            None => true,
        },
    }
}

/// The channels-first twin of a position-wise op of the channels-last block.
fn channels_first(op: Op, tensors: &mut [NamedTensor]) -> Op {
    match op {
        Op::LayerNorm {
            scale,
            bias,
            epsilon,
            ..
        } => Op::LayerNorm {
            scale,
            bias,
            axis: 0,
            count: 1,
            epsilon,
        },
        Op::Dense {
            weight,
            bias,
            weight_layout,
        } => {
            if let Some(t) = tensor_mut(tensors, &weight) {
                let (rows, cols) = (t.1[0], t.1[1]);
                if weight_layout == WeightLayout::InOut {
                    let mut data = vec![0.0; t.2.len()];
                    for r in 0..rows {
                        for c in 0..cols {
                            data[c * rows + r] = t.2[r * cols + c];
                        }
                    }
                    t.2 = data;
                    t.1 = vec![cols, rows, 1, 1];
                } else {
                    t.1 = vec![rows, cols, 1, 1];
                }
            }
            Op::Conv2d {
                weight,
                bias,
                stride: [1, 1],
                dilation: [1, 1],
                padding: [0; 4],
                groups: 1,
            }
        }
        op => {
            if let Some((_, Some(c), _)) = op.binary()
                && let Some(t) = tensor_mut(tensors, c)
                && t.1.len() == 3
                && t.1[..2] == [1, 1]
            {
                t.1 = vec![t.1[2], 1, 1];
            }
            op
        }
    }
}
