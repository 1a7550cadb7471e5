//! Builds an execution plan from a verified bundle: folds, fuses, packs and lays out buffers.
//!
//! Steps, in order:
//! 1. translate graph nodes into an internal list where reshape, flatten and identity are mere
//!    aliases of their input (they move no data);
//! 2. fold batch normalisation into the convolution or dense layer that feeds it;
//! 3. fuse a residual `add` into the convolution that produces one of its operands (the conv
//!    moves to the add's position and adds the other operand in its epilogue);
//! 4. fuse an activation into the convolution or dense layer that produces its input;
//! 5. pack weights for the chosen instruction set and assign every value a buffer, reusing
//!    buffers whose values are dead, so a run allocates nothing per layer.
//!
//! Folding and fusing change rounding only (a product of two f32 factors is formed once,
//! rather than in two steps), well inside the executor's tolerance.

use std::collections::HashMap;

mod fuse;
mod lower;
mod translate;

use super::kernels::activation::Activation;
use super::kernels::depthwise::PackedDepthwise;
use super::kernels::elementwise::Broadcast;
use super::kernels::gemm::{ConvGeom, PackedWeights};
use super::kernels::isa::Isa;
use super::kernels::layout::StridedCopy;
use super::kernels::norm::ReducePlan;
use super::kernels::pool::PoolGeom;
use super::kernels::winograd::WinogradWeights;
use crate::bundle::Bundle;
use crate::graph::BinaryKind;
use fuse::{IrNode, fuse};
use lower::lower;
use translate::{Translated, translate};

/// Index of a value in the plan.
pub(crate) type ValueId = usize;

/// A convolution, ready to run.
pub(crate) struct ConvStep {
    pub geom: ConvGeom,
    pub groups: usize,
    pub out_c: usize,
    pub kind: ConvKind,
    pub bias: Option<Vec<f32>>,
    pub residual: Option<ValueId>,
    pub act: Activation,
}

impl ConvStep {
    /// Multiply-adds of one sample.
    pub fn multiply_adds(&self) -> usize {
        let g = &self.geom;
        self.out_c * g.out_h * g.out_w * (g.in_c / self.groups) * g.kh * g.kw
    }
}

pub(crate) enum ConvKind {
    /// One packed matrix per group; `pointwise` means 1×1, stride 1, no padding, so the input
    /// is the B matrix itself.
    Gemm {
        groups: Vec<PackedWeights>,
        pointwise: bool,
    },
    Depthwise(PackedDepthwise),
    /// A 3×3, stride-1 convolution by Winograd's F(4×4, 3×3) (see `kernels::winograd`).
    Winograd(WinogradWeights),
}

/// What one step does.
pub(crate) enum StepKind {
    Conv(Box<ConvStep>),
    /// A dense layer over the last axis: every position of the value's other axes (every
    /// sample, for a flat value) is one GEMM column.
    Dense {
        weights: PackedWeights,
        bias: Option<Vec<f32>>,
        act: Activation,
        /// Length of the last axis.
        features: usize,
    },
    Affine {
        scale: Vec<f32>,
        shift: Vec<f32>,
        inner: usize,
    },
    Act(Activation),
    MaxPool(PoolGeom),
    AvgPool {
        geom: PoolGeom,
        count_include_pad: bool,
    },
    GlobalAvgPool {
        c: usize,
        plane: usize,
    },
    /// `a ∘ b` (`b ∘ a` when `swapped`): `a` is `inputs[0]`, `b` the constant or
    /// `inputs[1]`, lined up as `how` says.
    Binary {
        kind: BinaryKind,
        how: Broadcast,
        swapped: bool,
        constant: Option<Vec<f32>>,
    },
    /// Each input seen as `[outer, blocks[i]]`, joined block by block.
    Concat {
        outer: usize,
        blocks: Vec<usize>,
    },
    /// Transpose, slice, expand or tile.
    Copy(StridedCopy),
    /// `[outer, len, inner]` → `[outer, indices.len(), inner]`.
    Gather {
        outer: usize,
        len: usize,
        inner: usize,
        indices: Vec<usize>,
    },
    /// Normalisation of `[outer, block, inner]` over `block`.
    LayerNorm {
        dims: [usize; 3],
        scale: Vec<f32>,
        bias: Option<Vec<f32>>,
        epsilon: f32,
    },
    Reduce(ReducePlan),
    Softmax {
        c: usize,
        inner: usize,
    },
    Pad {
        c: usize,
        h: usize,
        w: usize,
        padding: [usize; 4],
        channels: [usize; 2],
        value: f32,
    },
}

/// One step of the plan: reads `inputs`, writes `output`.
pub(crate) struct Step {
    /// The graph node this step came from (after fusion, the producing node), for logs.
    pub name: String,
    pub kind: StepKind,
    pub inputs: Vec<ValueId>,
    pub output: ValueId,
}

impl Step {
    /// What the step does, in a few words, for people reading a profile: the kind, and for a
    /// convolution its window, channels, output plane, route and fused epilogue.
    pub fn describe(&self) -> String {
        match &self.kind {
            StepKind::Conv(conv) => {
                let g = &conv.geom;
                let route = match &conv.kind {
                    ConvKind::Gemm {
                        pointwise: true, ..
                    } => "GEMM, input as B",
                    ConvKind::Gemm { .. } => "GEMM",
                    ConvKind::Depthwise(_) => "depthwise",
                    ConvKind::Winograd(_) => "Winograd",
                };
                let mut text = format!(
                    "conv {}x{}/{} {}->{} at {}x{}, {route}",
                    g.kh, g.kw, g.stride_h, g.in_c, conv.out_c, g.out_h, g.out_w
                );
                if conv.groups > 1 && !matches!(conv.kind, ConvKind::Depthwise(_)) {
                    text += &format!(", {} groups", conv.groups);
                }
                if conv.residual.is_some() {
                    text += ", + residual";
                }
                if conv.act != Activation::Identity {
                    text += &format!(", {:?}", conv.act);
                }
                text
            }
            StepKind::Dense {
                weights, features, ..
            } => format!("dense {features}->{}", weights.m()),
            StepKind::Affine { .. } => "per-channel scale and shift".into(),
            StepKind::Act(act) => format!("activation {act:?}"),
            StepKind::MaxPool(p) => format!(
                "max pool {}x{}/{} at {}x{}",
                p.kernel[0], p.kernel[1], p.stride[0], p.out_h, p.out_w
            ),
            StepKind::AvgPool { geom: p, .. } => format!(
                "average pool {}x{}/{} at {}x{}",
                p.kernel[0], p.kernel[1], p.stride[0], p.out_h, p.out_w
            ),
            StepKind::GlobalAvgPool { c, plane } => format!("global average pool {c}x{plane}"),
            StepKind::Binary { kind, .. } => format!("{kind:?}"),
            StepKind::Concat { blocks, .. } => format!("concat of {}", blocks.len()),
            StepKind::Copy(_) => "copy (transpose, slice, expand or tile)".into(),
            StepKind::Gather { .. } => "gather".into(),
            StepKind::LayerNorm { .. } => "layer norm".into(),
            StepKind::Reduce(_) => "reduce".into(),
            StepKind::Softmax { .. } => "softmax".into(),
            StepKind::Pad { .. } => "pad".into(),
        }
    }
}

/// A pass runs the plan in two segments. The head (steps before `cut`) goes a few samples at a
/// time, so that its large activations stay in cache; the tail (steps from `cut`, where every
/// layer's weights outweigh one sample's activations) takes all the pass's samples at once, so
/// that each layer's weights are read once per pass rather than once per sample. Values that
/// cross the cut are kept for all the pass's samples, each in a buffer of its own.
#[derive(Clone, Debug, Default)]
pub(crate) struct Segments {
    /// First step of the tail (`steps.len()`: no tail).
    pub cut: usize,
    /// Per value: held for all the pass's samples (produced in the head, read in the tail).
    pub whole: Vec<bool>,
    /// Per buffer (their number is the length of both lists): per-sample floats of the head
    /// values it holds.
    pub head_len: Vec<usize>,
    /// Per buffer: per-sample floats of the tail and crossing values it holds.
    pub tail_len: Vec<usize>,
}

/// A ready-to-run model: immutable, shared between threads.
pub struct Plan {
    pub(crate) isa: Isa,
    pub(crate) steps: Vec<Step>,
    /// Per-sample elements of each value.
    pub(crate) value_len: Vec<usize>,
    /// Buffer holding each value (aliases share one).
    pub(crate) value_buffer: Vec<usize>,
    /// Where a pass switches from a few samples at a time to many (see [`Segments`]).
    pub(crate) segments: Segments,
    pub(crate) input: ValueId,
    pub(crate) output: ValueId,
    pub(crate) input_shape: Vec<usize>,
    pub(crate) output_shape: Vec<usize>,
    /// What folding and fusion did, one line each, for `convoy inspect`.
    pub(crate) folded: Vec<String>,
}

impl std::fmt::Debug for Plan {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("Plan")
            .field("isa", &self.isa)
            .field(
                "steps",
                &self
                    .steps
                    .iter()
                    .map(|s| s.name.as_str())
                    .collect::<Vec<_>>(),
            )
            .field("buffers", &self.segments.head_len.len())
            .finish()
    }
}
impl Plan {
    /// Plans `bundle` for instruction set `isa`. The bundle was verified when it was read, so
    /// every name resolves and every shape fits; planning cannot fail.
    pub fn new(bundle: &Bundle, isa: Isa) -> Plan {
        let graph = &bundle.manifest().graph;
        let shapes = bundle.shapes();

        // Values: graph input first, then one per node output; aliases point at their source.
        let mut ids: HashMap<&str, ValueId> = HashMap::new();
        let mut value_shape: Vec<Vec<usize>> = Vec::new();
        let mut alias_of: Vec<ValueId> = Vec::new();
        ids.insert(graph.input.name.as_str(), 0);
        value_shape.push(graph.input.shape.clone());
        alias_of.push(0);
        let mut nodes: Vec<IrNode> = Vec::new();
        for (node, out_shape) in graph.nodes.iter().zip(&shapes.node_outputs) {
            // Inputs keep their own value ids (an alias has its own shape); `alias_of` says
            // which node output actually holds the data.
            let inputs: Vec<ValueId> = node.inputs.iter().map(|v| ids[v.as_str()]).collect();
            let out = value_shape.len();
            value_shape.push(out_shape.clone());
            ids.insert(node.output.as_str(), out);
            let in_shape = &value_shape[inputs[0]];
            match translate(bundle, &node.op, in_shape, out_shape) {
                Translated::Alias => alias_of.push(alias_of[inputs[0]]),
                Translated::Node(kind) => {
                    alias_of.push(out);
                    nodes.push(IrNode {
                        name: node.name.clone(),
                        kind,
                        inputs,
                        output: out,
                    });
                }
            }
        }
        let graph_output = ids[graph.output.as_str()];
        let mut folded = Vec::new();
        fuse(
            &mut nodes,
            graph_output,
            &value_shape,
            &alias_of,
            &mut folded,
        );
        lower(nodes, isa, value_shape, alias_of, graph_output, folded)
    }

    pub fn isa(&self) -> Isa {
        self.isa
    }

    /// Per-sample input shape.
    pub fn input_shape(&self) -> &[usize] {
        &self.input_shape
    }

    /// Per-sample output shape.
    pub fn output_shape(&self) -> &[usize] {
        &self.output_shape
    }

    /// Per-sample input elements.
    pub fn input_len(&self) -> usize {
        self.value_len[self.input]
    }

    /// Per-sample output elements.
    pub fn output_len(&self) -> usize {
        self.value_len[self.output]
    }

    /// Names of the steps after fusion, with what was folded into them.
    pub fn folded(&self) -> &[String] {
        &self.folded
    }

    /// Number of steps a batch passes through.
    pub fn step_count(&self) -> usize {
        self.steps.len()
    }

    /// The steps a batch passes through, in order.
    pub(crate) fn steps(&self) -> &[Step] {
        &self.steps
    }

    /// Multiply-adds of one sample in `step` (convolutions and dense layers; 0 elsewhere),
    /// counted as a direct convolution does.
    pub(crate) fn step_multiply_adds(&self, step: &Step) -> usize {
        match &step.kind {
            StepKind::Conv(conv) => conv.multiply_adds(),
            StepKind::Dense { weights, .. } => weights.m() * self.value_len[step.inputs[0]],
            _ => 0,
        }
    }
}
