//! CPU kernels: the inner loops of the executor, each taking checked parameters and slices.
//!
//! The instruction set is chosen once, when a model is loaded ([`isa::Isa::detect`]), and passed
//! down explicitly; kernels never probe the CPU themselves.

pub mod activation;
pub mod aligned;
mod copy;
pub mod depthwise;
pub mod elementwise;
pub mod gemm;
pub mod isa;
pub mod layout;
pub mod norm;
pub mod peak;
pub mod pool;
pub(crate) mod simd;
#[cfg(test)]
mod testutil;
pub(crate) mod vmath;
pub mod winograd;
