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
