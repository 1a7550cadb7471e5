//! A small builder for graphs and their tensors, used by the importer, tests and benchmarks.

use super::{Graph, GraphInput, Node, Op};

/// A tensor waiting to be written into a bundle: name, shape, row-major values.
pub type NamedTensor = (String, Vec<usize>, Vec<f32>);

/// Appends nodes in order; each node's output value is named after the node.
#[derive(Clone, Debug)]
pub struct GraphBuilder {
    input: GraphInput,
    nodes: Vec<Node>,
    tensors: Vec<NamedTensor>,
}

impl GraphBuilder {
    /// Starts a graph whose input value is `name` with per-sample `shape`.
    pub fn new(name: &str, shape: &[usize]) -> GraphBuilder {
        GraphBuilder {
            input: GraphInput {
                name: name.to_string(),
                shape: shape.to_vec(),
            },
            nodes: Vec::new(),
            tensors: Vec::new(),
        }
    }

    /// Name of the graph input value.
    pub fn input(&self) -> String {
        self.input.name.clone()
    }

    /// Adds a tensor and returns its name.
    pub fn tensor(&mut self, name: &str, shape: &[usize], data: Vec<f32>) -> String {
        self.tensors.push((name.to_string(), shape.to_vec(), data));
        name.to_string()
    }

    /// Adds node `name` reading `inputs`; returns its output value (also called `name`).
    pub fn node(&mut self, name: &str, op: Op, inputs: &[&str]) -> String {
        self.nodes.push(Node {
            name: name.to_string(),
            inputs: inputs.iter().map(|s| s.to_string()).collect(),
            output: name.to_string(),
            op,
        });
        name.to_string()
    }

    /// Adds dense layer `name` (weight tensor `[out, in]`, as PyTorch's `Linear` stores it)
    /// reading `input`; returns its output value.
    pub fn dense(
        &mut self,
        name: &str,
        weight: String,
        bias: Option<String>,
        input: &str,
    ) -> String {
        let op = Op::Dense {
            weight,
            bias,
            weight_layout: Default::default(),
        };
        self.node(name, op, &[input])
    }

    /// Finishes with `output` as the graph's answer.
    pub fn finish(self, output: &str) -> (Graph, Vec<NamedTensor>) {
        (
            Graph {
                input: self.input,
                output: output.to_string(),
                nodes: self.nodes,
            },
            self.tensors,
        )
    }
}

/// splitmix64 (Steele, Lea & Flood, "Fast splittable pseudorandom number generators", 2014):
/// a tiny deterministic generator for generated check inputs and test weights, identical on
/// every machine.
#[derive(Clone, Debug)]
pub struct SplitMix64(u64);

impl SplitMix64 {
    pub fn new(seed: u64) -> SplitMix64 {
        SplitMix64(seed)
    }

    pub fn next_u64(&mut self) -> u64 {
        self.0 = self.0.wrapping_add(0x9E37_79B9_7F4A_7C15);
        let mut z = self.0;
        z = (z ^ (z >> 30)).wrapping_mul(0xBF58_476D_1CE4_E5B9);
        z = (z ^ (z >> 27)).wrapping_mul(0x94D0_49BB_1331_11EB);
        z ^ (z >> 31)
    }

    /// Uniform in `[lo, hi)`, from the top 24 bits.
    pub fn uniform(&mut self, lo: f32, hi: f32) -> f32 {
        let u = (self.next_u64() >> 40) as f32 / (1u64 << 24) as f32;
        lo + (hi - lo) * u
    }

    pub fn vec(&mut self, n: usize, lo: f32, hi: f32) -> Vec<f32> {
        (0..n).map(|_| self.uniform(lo, hi)).collect()
    }
}
