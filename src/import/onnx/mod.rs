//! ONNX import: decode the protobuf, resolve constants (initializers, `Constant` nodes,
//! external data), fold shape arithmetic, and map the remaining nodes onto convoy's graph.
//!
//! Layout: `proto` (generated message types), `tensor` (constant tensors and external data),
//! `attr` (node attributes), `fold` (evaluating constant subgraphs), `convert` (the node walk
//! that builds our graph).

pub mod attr;
pub mod convert;
pub mod fold;
pub mod proto;
pub mod tensor;
