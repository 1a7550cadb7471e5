//! The model graph: a DAG of named nodes joined by named values.
//!
//! A graph is what a bundle's manifest stores and what the executor plans from. It is plain data
//! (serde), so the bundle writer, the reader and the ONNX importer all speak it. All shapes and
//! axes here are *per sample*: the batch dimension is never written, because a plan runs any
//! batch size and a sample's result must not depend on it.
//!
//! Data passes through this module in three steps:
//! 1. [`Graph`] and [`Op`] are deserialised from (or built for) a manifest;
//! 2. [`shapes::infer`] checks every name, every tensor shape and every op parameter and returns
//!    the shape of every value — the reader refuses a bundle whose graph does not check;
//! 3. [`summary::Summary`] counts parameters and multiply-adds for `convoy inspect`.

pub mod arith;
pub mod build;
pub mod shapes;
pub mod summary;

use serde::{Deserialize, Serialize};

/// A whole model: one input value, one output value and the nodes between them.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct Graph {
    pub input: GraphInput,
    /// Name of the value the model answers with.
    pub output: String,
    /// Nodes in a topological order (every input is produced before it is read).
    pub nodes: Vec<Node>,
}

/// The graph's input value and its per-sample shape.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct GraphInput {
    pub name: String,
    pub shape: Vec<usize>,
}

/// One operation: reads `inputs`, writes the single value `output`.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct Node {
    pub name: String,
    pub inputs: Vec<String>,
    pub output: String,
    #[serde(flatten)]
    pub op: Op,
}

/// Padding in the order top, left, bottom, right.
pub type Padding4 = [usize; 4];

/// Which axis of a dense layer's weight matrix holds the outputs.
#[derive(Clone, Copy, Debug, Default, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum WeightLayout {
    /// `[out, in]`, as PyTorch's `Linear` stores it.
    #[default]
    OutIn,
    /// `[in, out]`.
    InOut,
}

/// Which formula a GELU node uses.
#[derive(Clone, Copy, Debug, Default, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum GeluApproximation {
    /// The exact form, `0.5·x·(1 + erf(x/√2))`.
    #[default]
    None,
    /// The tanh approximation.
    Tanh,
}

fn one_one() -> [usize; 2] {
    [1, 1]
}
fn eps_default() -> f32 {
    1e-5
}
fn leaky_default() -> f32 {
    0.01
}
fn hard_sigmoid_alpha() -> f32 {
    0.2
}
fn hard_sigmoid_beta() -> f32 {
    0.5
}
fn yes() -> bool {
    true
}

/// The element-wise operation of a two-operand op.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum BinaryKind {
    Add,
    Sub,
    Mul,
    Div,
    Max,
    Min,
}

impl BinaryKind {
    /// Whether `a ∘ b = b ∘ a` (so the planner may swap operands).
    pub fn commutes(self) -> bool {
        !matches!(self, BinaryKind::Sub | BinaryKind::Div)
    }

    /// The op for a value and an optional constant operand.
    pub fn op(self, constant: Option<String>, constant_first: bool) -> Op {
        match self {
            BinaryKind::Add => Op::Add { constant },
            BinaryKind::Mul => Op::Mul { constant },
            BinaryKind::Sub => Op::Sub {
                constant,
                constant_first,
            },
            BinaryKind::Div => Op::Div {
                constant,
                constant_first,
            },
            BinaryKind::Max => Op::Max { constant },
            BinaryKind::Min => Op::Min { constant },
        }
    }
}

/// The operators a bundle may use, with their parameters. Tensor fields name entries of the
/// bundle's tensor index.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
#[serde(tag = "op", rename_all = "snake_case")]
pub enum Op {
    /// 2-D convolution; the weight is `[out_c, in_c / groups, kh, kw]`.
    Conv2d {
        weight: String,
        #[serde(default)]
        bias: Option<String>,
        #[serde(default = "one_one")]
        stride: [usize; 2],
        #[serde(default = "one_one")]
        dilation: [usize; 2],
        #[serde(default)]
        padding: Padding4,
        #[serde(default = "one")]
        groups: usize,
    },
    /// Batch normalisation with stored statistics, each tensor `[C]`.
    BatchNorm {
        gamma: String,
        beta: String,
        mean: String,
        variance: String,
        #[serde(default = "eps_default")]
        epsilon: f32,
    },
    /// Fully connected layer over a flat `[in]` value.
    Dense {
        weight: String,
        #[serde(default)]
        bias: Option<String>,
        #[serde(default)]
        weight_layout: WeightLayout,
    },
    Relu,
    Clip {
        min: f32,
        max: f32,
    },
    LeakyRelu {
        #[serde(default = "leaky_default")]
        slope: f32,
    },
    Sigmoid,
    Tanh,
    HardSigmoid {
        #[serde(default = "hard_sigmoid_alpha")]
        alpha: f32,
        #[serde(default = "hard_sigmoid_beta")]
        beta: f32,
    },
    HardSwish,
    Silu,
    Gelu {
        #[serde(default)]
        approximation: GeluApproximation,
    },
    MaxPool {
        kernel: [usize; 2],
        #[serde(default)]
        stride: Option<[usize; 2]>,
        #[serde(default)]
        padding: Padding4,
        #[serde(default = "one_one")]
        dilation: [usize; 2],
        #[serde(default)]
        ceil_mode: bool,
    },
    AvgPool {
        kernel: [usize; 2],
        #[serde(default)]
        stride: Option<[usize; 2]>,
        #[serde(default)]
        padding: Padding4,
        #[serde(default)]
        ceil_mode: bool,
        #[serde(default = "yes")]
        count_include_pad: bool,
    },
    GlobalAvgPool,
    Flatten,
    Reshape {
        shape: Vec<i64>,
    },
    Add {
        #[serde(default)]
        constant: Option<String>,
    },
    Mul {
        #[serde(default)]
        constant: Option<String>,
    },
    /// Joins its inputs (one or more) along a per-sample axis (0 = channels).
    Concat {
        #[serde(default)]
        axis: usize,
    },
    Softmax,
    /// Constant padding of `[C, H, W]`: `padding` on the spatial axes, `channels` (before,
    /// after) on the channel axis.
    Pad {
        padding: Padding4,
        #[serde(default)]
        value: f32,
        #[serde(default)]
        channels: [usize; 2],
    },
    Identity,
    /// `a - b`; with a constant, `value - constant`, or `constant - value` when
    /// `constant_first`.
    Sub {
        #[serde(default)]
        constant: Option<String>,
        #[serde(default)]
        constant_first: bool,
    },
    /// `a / b`, operands as for [`Op::Sub`].
    Div {
        #[serde(default)]
        constant: Option<String>,
        #[serde(default)]
        constant_first: bool,
    },
    /// Element-wise maximum (NaN in either operand gives NaN, as ONNX's `Max`).
    Max {
        #[serde(default)]
        constant: Option<String>,
    },
    /// Element-wise minimum (NaN propagates).
    Min {
        #[serde(default)]
        constant: Option<String>,
    },
    /// `x^exponent` for a constant exponent.
    Pow {
        exponent: f32,
    },
    Sqrt,
    Reciprocal,
    Abs,
    Neg,
    Exp,
    Log,
    Erf,
    /// Reorders the per-sample axes: output axis `i` is input axis `perm[i]`.
    Transpose {
        perm: Vec<usize>,
    },
    /// Takes a strided range along some per-sample axes.
    Slice {
        ranges: Vec<AxisRange>,
    },
    /// Picks `indices` along one per-sample axis (constant indices, already non-negative).
    Gather {
        axis: usize,
        indices: Vec<usize>,
    },
    /// Broadcasts the input to `shape` (same rank; each input dimension equal or 1).
    Expand {
        shape: Vec<usize>,
    },
    /// Repeats the input `repeats[i]` times along each per-sample axis.
    Tile {
        repeats: Vec<usize>,
    },
    /// Normalises over `count` axes starting at `axis` (mean 0, variance 1, then
    /// `· scale + bias`); `scale` and `bias` have those axes' shape. ONNX's
    /// LayerNormalization is `count = rank - axis`; a channels-first layer norm is `axis 0,
    /// count 1` of `[C, H, W]`.
    LayerNorm {
        scale: String,
        #[serde(default)]
        bias: Option<String>,
        axis: usize,
        count: usize,
        #[serde(default = "eps_default")]
        epsilon: f32,
    },
    /// Mean, maximum, sum or Euclidean norm over some per-sample axes.
    Reduce {
        kind: ReduceKind,
        axes: Vec<usize>,
        #[serde(default)]
        keep_dims: bool,
    },
}

/// One axis of a [`Op::Slice`]: `count` elements from `start`, `step` apart (negative steps
/// walk backwards).
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize, Deserialize)]
pub struct AxisRange {
    pub axis: usize,
    pub start: usize,
    pub step: i64,
    pub count: usize,
}

/// What a [`Op::Reduce`] computes.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum ReduceKind {
    Mean,
    Max,
    Sum,
    /// `sqrt(Σ x²)`.
    L2,
}

fn one() -> usize {
    1
}

impl Op {
    /// Every op name a manifest may use.
    pub const KINDS: &'static [&'static str] = &[
        "conv2d",
        "batch_norm",
        "dense",
        "relu",
        "clip",
        "leaky_relu",
        "sigmoid",
        "tanh",
        "hard_sigmoid",
        "hard_swish",
        "silu",
        "gelu",
        "max_pool",
        "avg_pool",
        "global_avg_pool",
        "flatten",
        "reshape",
        "add",
        "mul",
        "concat",
        "softmax",
        "pad",
        "identity",
        "sub",
        "div",
        "max",
        "min",
        "pow",
        "sqrt",
        "reciprocal",
        "abs",
        "neg",
        "exp",
        "log",
        "erf",
        "transpose",
        "slice",
        "gather",
        "expand",
        "tile",
        "layer_norm",
        "reduce",
    ];

    /// The op's name as written in a manifest.
    pub fn kind(&self) -> &'static str {
        match self {
            Op::Conv2d { .. } => "conv2d",
            Op::BatchNorm { .. } => "batch_norm",
            Op::Dense { .. } => "dense",
            Op::Relu => "relu",
            Op::Clip { .. } => "clip",
            Op::LeakyRelu { .. } => "leaky_relu",
            Op::Sigmoid => "sigmoid",
            Op::Tanh => "tanh",
            Op::HardSigmoid { .. } => "hard_sigmoid",
            Op::HardSwish => "hard_swish",
            Op::Silu => "silu",
            Op::Gelu { .. } => "gelu",
            Op::MaxPool { .. } => "max_pool",
            Op::AvgPool { .. } => "avg_pool",
            Op::GlobalAvgPool => "global_avg_pool",
            Op::Flatten => "flatten",
            Op::Reshape { .. } => "reshape",
            Op::Add { .. } => "add",
            Op::Mul { .. } => "mul",
            Op::Concat { .. } => "concat",
            Op::Softmax => "softmax",
            Op::Pad { .. } => "pad",
            Op::Identity => "identity",
            Op::Sub { .. } => "sub",
            Op::Div { .. } => "div",
            Op::Max { .. } => "max",
            Op::Min { .. } => "min",
            Op::Pow { .. } => "pow",
            Op::Sqrt => "sqrt",
            Op::Reciprocal => "reciprocal",
            Op::Abs => "abs",
            Op::Neg => "neg",
            Op::Exp => "exp",
            Op::Log => "log",
            Op::Erf => "erf",
            Op::Transpose { .. } => "transpose",
            Op::Slice { .. } => "slice",
            Op::Gather { .. } => "gather",
            Op::Expand { .. } => "expand",
            Op::Tile { .. } => "tile",
            Op::LayerNorm { .. } => "layer_norm",
            Op::Reduce { .. } => "reduce",
        }
    }

    /// The tensor names this op reads, with the role of each (for error messages).
    /// The binary element-wise kind, with its constant operand, for ops that have one.
    pub fn binary(&self) -> Option<(BinaryKind, Option<&str>, bool)> {
        Some(match self {
            Op::Add { constant } => (BinaryKind::Add, constant.as_deref(), false),
            Op::Mul { constant } => (BinaryKind::Mul, constant.as_deref(), false),
            Op::Sub {
                constant,
                constant_first,
            } => (BinaryKind::Sub, constant.as_deref(), *constant_first),
            Op::Div {
                constant,
                constant_first,
            } => (BinaryKind::Div, constant.as_deref(), *constant_first),
            Op::Max { constant } => (BinaryKind::Max, constant.as_deref(), false),
            Op::Min { constant } => (BinaryKind::Min, constant.as_deref(), false),
            _ => return None,
        })
    }

    pub fn tensors(&self) -> Vec<(&'static str, &str)> {
        let mut out = Vec::new();
        match self {
            Op::Conv2d { weight, bias, .. } | Op::Dense { weight, bias, .. } => {
                out.push(("weight", weight.as_str()));
                if let Some(b) = bias {
                    out.push(("bias", b.as_str()));
                }
            }
            Op::BatchNorm {
                gamma,
                beta,
                mean,
                variance,
                ..
            } => {
                out.push(("gamma", gamma.as_str()));
                out.push(("beta", beta.as_str()));
                out.push(("mean", mean.as_str()));
                out.push(("variance", variance.as_str()));
            }
            Op::Add { constant: Some(c) }
            | Op::Mul { constant: Some(c) }
            | Op::Sub {
                constant: Some(c), ..
            }
            | Op::Div {
                constant: Some(c), ..
            }
            | Op::Max { constant: Some(c) }
            | Op::Min { constant: Some(c) } => {
                out.push(("constant", c.as_str()));
            }
            Op::LayerNorm { scale, bias, .. } => {
                out.push(("scale", scale.as_str()));
                if let Some(b) = bias {
                    out.push(("bias", b.as_str()));
                }
            }
            _ => {}
        }
        out
    }
}
