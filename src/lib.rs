//! convoy: serve small convolutional image classifiers from plain CPU servers.
//!
//! Layout, following a model's path from file to answer:
//! - [`bundle`]: the `.cvb` weight bundle — writer, and a reader that verifies everything;
//! - [`graph`]: the model graph stored in a bundle, its shape checks and cost counts;
//! - [`engine`]: plans a bundle for this CPU and runs batches through it;
//! - [`import`]: ONNX files from training frameworks → bundles;
//! - [`registry`]: the model versions a server answers with, and which one is active;
//! - [`rollout`]: new versions in and old ones out of a running server (folder watch, control
//!   service);
//! - [`prepare`]: request samples (encoded images, tensors) → model input;
//! - [`scheduler`]: batching and the compute threads;
//! - [`service`]: the gRPC server; [`telemetry`] beside it: Prometheus metrics;
//! - [`drift`]: per-sample statistics, the reference baseline and the drift tests;
//! - [`loadgen`]: `convoy bench`, load against a server or the engine alone;
//! - [`npy`]: NumPy `.npy` files, the exchange format of the command line;
//! - [`cli`]: the `convoy` commands, which the thin binary in `main.rs` dispatches to.

pub mod bundle;
pub mod cli;
pub mod drift;
pub mod engine;
pub mod graph;
pub mod import;
pub mod loadgen;
pub mod npy;
pub mod prepare;
pub mod registry;
pub mod rollout;
pub mod scheduler;
pub mod service;
pub mod telemetry;
