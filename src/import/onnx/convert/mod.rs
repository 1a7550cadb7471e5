//! The node walk: ONNX nodes in graph order become constants (folded now) or convoy graph
//! nodes (computed per request).
//!
//! Every ONNX value is either a [`ConstTensor`] known at import time or a dynamic value with
//! a batch dimension in front of its per-sample shape. Shape arithmetic on dynamic values
//! (`Shape(x)` → `Gather` → `Concat` → `Reshape`, as exporters write `x.view(x.size(0), -1)`)
//! is folded with the batch size replaced by [`BATCH`], a sentinel that must reach a
//! `Reshape` target's first entry untouched; anything else that depends on the batch size is
//! refused, because a bundle must compute the same for every batch.
//!
//! An op the executor cannot compute exactly as ONNX defines it is refused with the node's
//! name; nothing is ever approximated.

use std::collections::{BTreeMap, HashMap, HashSet};

mod elementwise;
mod flat;
mod layers;
mod layout;
mod moved;
mod norm;
mod patterns;

use super::attr::attr_int_checked;
use super::fold::{can_fold, fold_node};
use super::proto::onnx::{ModelProto, NodeProto, ValueInfoProto};
use super::tensor::{ConstTensor, ExternalData};
use crate::graph::build::NamedTensor;
use crate::graph::{Graph, GraphInput, Node, Op};
use crate::import::ImportError;

/// Opsets of the default domain that the importer understands.
pub const MIN_OPSET: i64 = 11;
pub const MAX_OPSET: i64 = 21;

/// Stands for the batch size in folded shape arithmetic. Odd and large so that it cannot be
/// confused with a real dimension, and so that arithmetic on it (which would make the model
/// batch-dependent) produces values that no check accepts.
pub const BATCH: i64 = 0x3FFF_FFF1;

/// The ONNX operators mapped to convoy ops (constant-foldable ones are listed by `fold`).
pub const SUPPORTED: &[&str] = &[
    "Conv",
    "BatchNormalization",
    "Gemm",
    "MatMul",
    "Add",
    "Mul",
    "Relu",
    "Clip",
    "LeakyRelu",
    "Sigmoid",
    "Tanh",
    "HardSigmoid",
    "HardSwish",
    "Gelu",
    "MaxPool",
    "AveragePool",
    "GlobalAveragePool",
    "ReduceMean",
    "ReduceMax",
    "ReduceSum",
    "ReduceL2",
    "LayerNormalization",
    "Flatten",
    "Reshape",
    "Squeeze",
    "Unsqueeze",
    "Transpose",
    "Split",
    "Slice",
    "Gather",
    "GatherND",
    "Concat",
    "Expand",
    "Tile",
    "Pad",
    "Softmax",
    "Dropout",
    "Identity",
    "Shape",
    "Constant",
    "Sub",
    "Div",
    "Pow",
    "Max",
    "Min",
    "Sum",
    "Sqrt",
    "Reciprocal",
    "Abs",
    "Neg",
    "Exp",
    "Log",
    "Erf",
];

/// The converted model and what happened on the way.
#[derive(Debug)]
pub struct Converted {
    pub graph: Graph,
    pub tensors: Vec<NamedTensor>,
    /// The graph ends in a softmax, so its output is probabilities.
    pub ends_in_softmax: bool,
    /// ONNX operator types in the source file, with counts.
    pub source_ops: BTreeMap<String, usize>,
    /// Nodes evaluated at import time (shape arithmetic, constants).
    pub folded_nodes: usize,
    /// One line per rewrite worth telling (MatMul + Add into a dense layer, ...).
    pub notes: Vec<String>,
    pub opset: i64,
    pub producer: String,
}

/// A value during conversion.
#[derive(Clone, Debug)]
enum Val {
    Const(ConstTensor),
    /// A value computed per request: its name in our graph and its per-sample shape.
    Dyn {
        name: String,
        shape: Vec<usize>,
    },
    /// A computed value whose batch axis an ONNX `Transpose` moved from the front: the ONNX
    /// value is held value `name` (batch first, per-sample `shape`) permuted by `perm`
    /// (`moved.rs`).
    Moved {
        name: String,
        shape: Vec<usize>,
        perm: Vec<usize>,
    },
    /// A computed value seen with the whole batch flattened into its one axis (`flat.rs`):
    /// held value `name` with per-sample `shape`.
    Flat {
        name: String,
        shape: Vec<usize>,
    },
    /// Integers computed from the batch size: entry `[n, rest…]` is `n · step +
    /// offset[rest…]` (`flat.rs`).
    Ramp {
        step: i64,
        offset: ConstTensor,
    },
}

/// Converts a decoded model.
///
/// # Errors
/// Unsupported opsets, domains and operators; non-constant weights; shapes the executor
/// cannot take; bad tensors or external data — each naming the node.
pub fn convert(model: &ModelProto, external: &ExternalData) -> Result<Converted, ImportError> {
    let opset = default_opset(model)?;
    let graph = model.graph.as_ref().ok_or_else(|| ImportError::NotOnnx {
        reason: "the model has no graph".into(),
    })?;
    let mut c = Converter {
        opset,
        vals: HashMap::new(),
        nodes: Vec::new(),
        tensors: Vec::new(),
        tensor_names: HashSet::new(),
        node_names: HashSet::new(),
        uses: HashMap::new(),
        dense_without_bias: HashMap::new(),
        folded: 0,
        notes: Vec::new(),
        source_ops: BTreeMap::new(),
        fixed_batch: None,
    };
    for t in &graph.initializer {
        let ct = ConstTensor::from_proto(t, external)?;
        c.vals.insert(t.name.clone(), Val::Const(ct));
    }
    let input = c.graph_input(&graph.input)?;
    for n in &graph.node {
        *c.source_ops.entry(n.op_type.clone()).or_default() += 1;
        for i in &n.input {
            *c.uses.entry(i.clone()).or_default() += 1;
        }
    }
    for o in &graph.output {
        *c.uses.entry(o.name.clone()).or_default() += 1;
    }
    for (index, n) in graph.node.iter().enumerate() {
        c.node(n, index)?;
    }
    if graph.output.len() != 1 {
        return Err(ImportError::Output {
            problem: format!(
                "the model has {} outputs; a classifier has exactly one",
                graph.output.len()
            ),
        });
    }
    let output = c.output_value(&graph.output[0].name)?;
    if output == input {
        return Err(ImportError::Output {
            problem: "the output is the input itself".into(),
        });
    }
    let rewrites = patterns::fuse_layer_norms(&mut c.nodes, &mut c.tensors, &output);
    c.notes.extend(rewrites);
    let rewrites = patterns::fuse_gelus(&mut c.nodes, &c.tensors, &output);
    c.notes.extend(rewrites);
    let rewrites = patterns::channels_first_blocks(&mut c.nodes, &mut c.tensors, &output);
    c.notes.extend(rewrites);
    let ends_in_softmax = c
        .nodes
        .iter()
        .rev()
        .find(|n| n.output == output)
        .is_some_and(|n| matches!(n.op, Op::Softmax));
    let input_shape = match c.vals.get(&graph_input_name(&graph.input, &c)) {
        Some(Val::Dyn { shape, .. }) => shape.clone(),
        _ => Vec::new(),
    };
    Ok(Converted {
        graph: Graph {
            input: GraphInput {
                name: input,
                shape: input_shape,
            },
            output,
            nodes: c.nodes,
        },
        tensors: c.tensors,
        ends_in_softmax,
        source_ops: c.source_ops,
        folded_nodes: c.folded,
        notes: c.notes,
        opset,
        producer: format!("{} {}", model.producer_name, model.producer_version)
            .trim()
            .to_string(),
    })
}

impl Converter {
    /// Our name for the graph's output: a computed value with the batch in front.
    fn output_value(&self, out_name: &str) -> Result<String, ImportError> {
        let problem = match self.vals.get(out_name) {
            Some(Val::Dyn { name, .. }) => return Ok(name.clone()),
            Some(Val::Const(_)) => "does not depend on the input",
            Some(Val::Moved { .. } | Val::Flat { .. } | Val::Ramp { .. }) => {
                "does not have the batch as its first axis"
            }
            None => "is not produced by any node",
        };
        Err(ImportError::Output {
            problem: format!("{out_name:?} {problem}"),
        })
    }
}

fn default_opset(model: &ModelProto) -> Result<i64, ImportError> {
    let version = model
        .opset_import
        .iter()
        .find(|o| o.domain.is_empty() || o.domain == "ai.onnx")
        .map(|o| o.version)
        .ok_or_else(|| ImportError::NotOnnx {
            reason: "no opset for the default domain".into(),
        })?;
    if !(MIN_OPSET..=MAX_OPSET).contains(&version) {
        return Err(ImportError::Opset {
            found: version,
            min: MIN_OPSET,
            max: MAX_OPSET,
        });
    }
    Ok(version)
}

/// The name of the graph's one real (non-initializer) input.
fn graph_input_name(inputs: &[ValueInfoProto], c: &Converter) -> String {
    inputs
        .iter()
        .find(|i| matches!(c.vals.get(&i.name), Some(Val::Dyn { .. })))
        .map(|i| i.name.clone())
        .unwrap_or_default()
}

struct Converter {
    opset: i64,
    vals: HashMap<String, Val>,
    nodes: Vec<Node>,
    tensors: Vec<NamedTensor>,
    tensor_names: HashSet<String>,
    node_names: HashSet<String>,
    /// How many nodes (and graph outputs) read each ONNX value.
    uses: HashMap<String, usize>,
    /// Dense nodes we made from MatMul, by output value, index into `nodes`: an `Add` of a
    /// bias right after becomes the dense layer's bias.
    dense_without_bias: HashMap<String, usize>,
    folded: usize,
    notes: Vec<String>,
    source_ops: BTreeMap<String, usize>,
    /// The input's fixed leading dimension, when the file has one: imported as the batch, so
    /// reshape and expand targets that carry it mean "the batch".
    fixed_batch: Option<i64>,
}

/// Shorthand for the context of a node's errors.
struct Ctx<'a> {
    node: &'a str,
    op: &'a str,
}

impl<'a> Ctx<'a> {
    /// The context of node `n` (named `name` in our graph), and its first output's name.
    fn of(n: &'a NodeProto, name: &'a str) -> (Ctx<'a>, String) {
        let ctx = Ctx {
            node: name,
            op: &n.op_type,
        };
        (ctx, n.output.first().cloned().unwrap_or_default())
    }

    fn unsupported(&self, problem: impl Into<String>) -> ImportError {
        ImportError::Unsupported {
            node: self.node.to_string(),
            op: self.op.to_string(),
            problem: problem.into(),
        }
    }
    /// The node's first input, which every op but the binary ones and Concat computes on: a
    /// dynamic value, never a constant.
    fn first_dynamic<'v>(
        &self,
        inputs: &'v [Option<Val>],
    ) -> Result<(&'v String, &'v Vec<usize>), ImportError> {
        match inputs.first() {
            Some(Some(Val::Dyn { name, shape })) => Ok((name, shape)),
            _ => {
                Err(self.unsupported("its first input must be the computed value, not a constant"))
            }
        }
    }

    /// An ONNX axis of a value whose per-sample rank is `rank`, as a per-sample axis. The
    /// batch axis is refused: a bundle computes every sample alone.
    fn sample_axis(&self, axis: i64, rank: usize) -> Result<usize, ImportError> {
        let full = rank as i64 + 1;
        let a = if axis < 0 { axis + full } else { axis };
        if a == 0 {
            return Err(self.unsupported(format!(
                "axis {axis} is the batch axis; only axes after the batch are supported"
            )));
        }
        if !(1..full).contains(&a) {
            return Err(self.unsupported(format!(
                "axis {axis} is out of range for a rank-{full} value"
            )));
        }
        Ok((a - 1) as usize)
    }

    /// Input `i`, which must be a constant (or omitted: `None`).
    fn constant<'v>(
        &self,
        inputs: &'v [Option<Val>],
        i: usize,
    ) -> Result<Option<&'v ConstTensor>, ImportError> {
        match inputs.get(i) {
            None | Some(None) => Ok(None),
            Some(Some(Val::Const(t))) => Ok(Some(t)),
            Some(Some(_)) => Err(self.not_constant(i)),
        }
    }

    fn not_constant(&self, index: usize) -> ImportError {
        ImportError::NotConstant {
            node: self.node.to_string(),
            op: self.op.to_string(),
            index,
        }
    }
}

impl Converter {
    fn graph_input(&mut self, inputs: &[ValueInfoProto]) -> Result<String, ImportError> {
        let real: Vec<&ValueInfoProto> = inputs
            .iter()
            .filter(|i| !self.vals.contains_key(&i.name))
            .collect();
        let [input] = real[..] else {
            return Err(ImportError::Input {
                problem: format!(
                    "the model has {} inputs besides its weights; a classifier takes exactly one",
                    real.len()
                ),
            });
        };
        let dims =
            super::proto::tensor_input_dims(input).map_err(|problem| ImportError::Input {
                problem: format!("{:?}: {problem}", input.name),
            })?;
        if !(2..=4).contains(&dims.len()) {
            // Classifiers take [batch, features], [batch, C, H, W], or [batch, rows, features].
            return Err(ImportError::Input {
                problem: format!(
                    "{:?} has rank {}; supported are [batch, features], [batch, rows, features] and [batch, C, H, W]",
                    input.name,
                    dims.len()
                ),
            });
        }
        // The first dimension is the batch: symbolic, or fixed by an exporter that was not
        // told about dynamic batches. A fixed size is imported as a dynamic batch as long as
        // it only ever travels along the batch axis (the reshape and expand checks refuse
        // targets that mix it into other axes).
        if let Some(n) = dims[0] {
            if n < 1 {
                return Err(ImportError::Input {
                    problem: format!("{:?} has a batch dimension of {n}", input.name),
                });
            }
            self.fixed_batch = Some(n);
            if n > 1 {
                self.notes.push(format!(
                    "input {:?} has a fixed batch of {n}; imported with a dynamic batch (the size travels only along the batch axis)",
                    input.name
                ));
            }
        }
        let mut shape = Vec::new();
        for (axis, d) in dims.iter().enumerate().skip(1) {
            match d {
                Some(n) if *n > 0 => shape.push(*n as usize),
                _ => {
                    return Err(ImportError::Input {
                        problem: format!(
                            "{:?}: dimension {axis} must be a fixed positive size, got {d:?}",
                            input.name
                        ),
                    });
                }
            }
        }
        self.vals.insert(
            input.name.clone(),
            Val::Dyn {
                name: input.name.clone(),
                shape,
            },
        );
        Ok(input.name.clone())
    }

    fn unique_node_name(&mut self, n: &NodeProto, index: usize) -> String {
        let base = if n.name.is_empty() {
            format!("{}_{index}", n.op_type)
        } else {
            n.name.clone()
        };
        let mut name = base.clone();
        let mut k = 1;
        while !self.node_names.insert(name.clone()) {
            name = format!("{base}_{k}");
            k += 1;
        }
        name
    }

    fn add_tensor(&mut self, wanted: &str, t: ConstTensor) -> String {
        let mut name = wanted.to_string();
        let mut k = 1;
        while !self.tensor_names.insert(name.clone()) {
            name = format!("{wanted}_{k}");
            k += 1;
        }
        let shape = t.shape.clone();
        self.tensors.push((name.clone(), shape, t.to_f32()));
        name
    }

    fn node(&mut self, n: &NodeProto, index: usize) -> Result<(), ImportError> {
        let name = self.unique_node_name(n, index);
        let (ctx, _) = Ctx::of(n, &name);
        if !(n.domain.is_empty() || n.domain == "ai.onnx") {
            return Err(ImportError::Domain {
                node: name.clone(),
                op: n.op_type.clone(),
                domain: n.domain.clone(),
            });
        }
        let mut inputs: Vec<Option<Val>> = Vec::with_capacity(n.input.len());
        for v in &n.input {
            if v.is_empty() {
                inputs.push(None);
                continue;
            }
            let val = self.vals.get(v).ok_or_else(|| ImportError::MissingValue {
                node: name.clone(),
                op: n.op_type.clone(),
                value: v.clone(),
            })?;
            inputs.push(Some(val.clone()));
        }
        if self.is_batch_indexing(n, &inputs) {
            return self.batch_indexing(n, &name, &inputs);
        }
        if let Some(i) = inputs
            .iter()
            .position(|i| matches!(i, Some(Val::Moved { .. })))
        {
            return self.moved_input(n, &name, &inputs, i);
        }
        let all_const = inputs
            .iter()
            .all(|i| matches!(i, None | Some(Val::Const(_))));
        if n.op_type == "Shape"
            && let Some(Some(Val::Dyn { shape, .. })) = inputs.first()
        {
            let full = self.shape_of_dynamic(n, shape)?;
            self.folded += 1;
            self.set(&n.output[0], Val::Const(full));
            return Ok(());
        }
        if all_const {
            if !can_fold(&n.op_type) {
                return Err(ctx.unsupported(
                    "all inputs are constant, but this operator cannot be evaluated at import time",
                ));
            }
            let consts: Vec<Option<&ConstTensor>> = inputs
                .iter()
                .map(|i| match i {
                    Some(Val::Const(t)) => Some(t),
                    _ => None,
                })
                .collect();
            let outs = fold_node(n, self.opset, &consts)?;
            for (o, t) in n.output.iter().zip(outs) {
                if !o.is_empty() {
                    self.set(o, Val::Const(t));
                }
            }
            self.folded += 1;
            return Ok(());
        }
        self.dynamic(n, &name, &inputs)
    }

    fn set(&mut self, onnx_name: &str, v: Val) {
        self.vals.insert(onnx_name.to_string(), v);
    }

    /// `Shape` of a dynamic value: its full shape with the batch as [`BATCH`], sliced by the
    /// `start`/`end` attributes (opset 15).
    fn shape_of_dynamic(&self, n: &NodeProto, shape: &[usize]) -> Result<ConstTensor, ImportError> {
        let mut full: Vec<i64> = vec![BATCH];
        full.extend(shape.iter().map(|&d| d as i64));
        let rank = full.len() as i64;
        let clamp = |v: i64| -> usize {
            let v = if v < 0 { v + rank } else { v };
            v.clamp(0, rank) as usize
        };
        let start = attr_int_checked(n, "start")?.map_or(0, clamp);
        let end = attr_int_checked(n, "end")?.map_or(full.len(), clamp);
        let part: Vec<i64> = if start < end {
            full[start..end].to_vec()
        } else {
            Vec::new()
        };
        Ok(ConstTensor::i64(vec![part.len()], part))
    }

    fn push(&mut self, name: &str, op: Op, inputs: &[&str], output: &str, shape: Vec<usize>) {
        self.nodes.push(Node {
            name: name.to_string(),
            inputs: inputs.iter().map(|s| s.to_string()).collect(),
            output: output.to_string(),
            op,
        });
        self.set(
            output,
            Val::Dyn {
                name: output.to_string(),
                shape,
            },
        );
    }

    /// A node with at least one computed input: one handler per op group (element-wise
    /// here and in `elementwise.rs`; layers in `layers.rs`; data movement in `layout.rs`;
    /// reductions and normalisation in `norm.rs`).
    fn dynamic(
        &mut self,
        n: &NodeProto,
        name: &str,
        inputs: &[Option<Val>],
    ) -> Result<(), ImportError> {
        let (ctx, out) = Ctx::of(n, name);
        if out.is_empty() {
            return Err(ctx.unsupported("the node has no output"));
        }
        // Extra outputs (BatchNormalization's running stats, Dropout's mask, MaxPool's
        // indices, LayerNormalization's mean) must not be read by anyone; Split is the one op
        // whose every output is data.
        if n.op_type != "Split" {
            for extra in n.output.iter().skip(1) {
                if !extra.is_empty() && self.uses.get(extra).copied().unwrap_or(0) > 0 {
                    return Err(ctx.unsupported(format!(
                        "its output {extra:?} is used; only the first output is supported"
                    )));
                }
            }
        }
        let simple = match n.op_type.as_str() {
            "Conv" => self.conv(n, name, &ctx, inputs)?,
            "BatchNormalization" => self.batch_norm(n, name, &ctx, inputs)?,
            "Gemm" => self.gemm(n, name, &ctx, inputs)?,
            "MatMul" => self.matmul(name, &ctx, inputs, &out)?,
            "MaxPool" | "AveragePool" => self.pool(n, &ctx, inputs)?,
            "Add" | "Mul" | "Sub" | "Div" | "Max" | "Min" | "Sum" => {
                return self.binary(n, name, &ctx, inputs, &out);
            }
            "Reshape" => self.reshape(n, &ctx, inputs)?,
            "Flatten" => self.flatten(n, &ctx, inputs)?,
            "Squeeze" | "Unsqueeze" => self.squeeze(n, &ctx, inputs)?,
            "Transpose" => return self.transpose(n, name, &ctx, inputs, &out),
            "GatherND" => return self.gather_nd(n, name, &ctx, inputs, &out),
            "Slice" => self.slice(&ctx, inputs)?,
            "Gather" => return self.gather(n, name, &ctx, inputs, &out),
            "Split" => return self.split(n, name, &ctx, inputs),
            "Concat" => return self.concat(n, name, &ctx, inputs, &out),
            "Expand" => self.expand(&ctx, inputs)?,
            "Tile" => self.tile(&ctx, inputs)?,
            "Pad" => self.pad(n, &ctx, inputs)?,
            "GlobalAveragePool" => self.global_pool(&ctx, inputs)?,
            "ReduceMean" | "ReduceMax" | "ReduceSum" | "ReduceL2" => {
                return self.reduce(n, name, &ctx, inputs, &out);
            }
            "LayerNormalization" => self.layer_norm(n, name, &ctx, inputs)?,
            "Softmax" => self.softmax(n, &ctx, inputs)?,
            _ => match self.unary(n, &ctx, inputs)? {
                Some(done) => done,
                None => {
                    return Err(ImportError::UnsupportedOp {
                        node: name.to_string(),
                        op: n.op_type.clone(),
                        supported: SUPPORTED.join(", "),
                    });
                }
            },
        };
        let (op, shape, input) = simple;
        self.push(name, op, &[&input], &out, shape);
        Ok(())
    }
}
