//! The weight bundle (`.cvb`): one self-describing, checksummed file per model version.
//!
//! Layout (all integers little-endian):
//!
//! | bytes | content |
//! |---|---|
//! | 0..8 | magic `\x89CVB\r\n\x1a\n` |
//! | 8..12 | format version (u32, currently 1) |
//! | 12..16 | flags (u32): bit 1 ([`FLAG_SIGNED`]) = a signature block follows the data; every other bit must be 0 |
//! | 16..24 | manifest length in bytes (u64) |
//! | 24..32 | data section length in bytes (u64) |
//! | 32..64 | SHA-256 of the manifest bytes |
//! | 64.. | the manifest, UTF-8 JSON ([`Manifest`]) |
//! | next multiple of 64 | the data section: every tensor little-endian f32, each 64-byte aligned |
//! | end of data, if signed | the signature block, 128 bytes: magic, algorithm, signer's Ed25519 public key, signature of everything before it ([`signature`]) |
//!
//! The magic's first byte is not ASCII and it holds CR LF and ^Z, so a file damaged by a text-mode
//! transfer or mistaken for text is refused at once (the same reasoning as the PNG signature,
//! PNG specification §5.2). The data section is 64-byte aligned and tensors are stored
//! little-endian so the file can be memory-mapped and its weights used in place. The file ends
//! exactly where the data section ends (or, when signed, where the signature block ends);
//! trailing bytes are refused.
//!
//! [`BundleWriter`] lays out and writes a bundle; [`Bundle`] opens and verifies one: header,
//! manifest checksum, manifest, tensor index, data checksum, finite weights, graph, specs — in
//! that order, each size checked against the file before it is used.

mod error;
pub mod manifest;
mod reader;
pub mod signature;
pub mod version;
mod writer;

pub use error::{BundleError, TensorProblem};
pub use manifest::Manifest;
pub use reader::{Bundle, check_name, peek_identity};
pub use signature::FLAG_SIGNED;
pub use writer::{
    BundleWriter, CHECK_INPUT_TENSOR, CHECK_OUTPUT_TENSOR, now_rfc3339, write_atomically,
};

/// First eight bytes of every bundle.
pub const MAGIC: [u8; 8] = *b"\x89CVB\r\n\x1a\n";
/// The format version this build reads and writes.
pub const FORMAT_VERSION: u32 = 1;
/// Length of the fixed header.
pub const HEADER_LEN: usize = 64;
/// Alignment of the data section and of every tensor in it.
pub const ALIGN: u64 = 64;
/// Largest manifest accepted (check samples and weights live in the data section, so real
/// manifests are a few hundred kilobytes at most).
pub const MAX_MANIFEST_LEN: u64 = 16 << 20;
/// Largest tensor accepted, in elements (4 GiB of f32).
pub const MAX_TENSOR_ELEMENTS: u64 = 1 << 30;
/// Most check samples one bundle may carry.
pub const MAX_CHECK_SAMPLES: usize = 64;
/// Check samples must replay within `max |ours - stored| <= CHECK_TOLERANCE · max(1, max |stored|)`.
/// The same rule the executor's reference tests use: f32 GEMMs with different summation order
/// (another framework's kernels, another instruction set) differ by a few ulps per
/// accumulation, far below 1e-4 of the output's scale for small classifiers.
pub const CHECK_TOLERANCE: f32 = 1e-4;

fn align_up(n: u64) -> u64 {
    n.div_ceil(ALIGN) * ALIGN
}

fn hex(bytes: &[u8]) -> String {
    use std::fmt::Write;
    let mut s = String::with_capacity(bytes.len() * 2);
    for b in bytes {
        // Writing to a String cannot fail.
        let _ = write!(s, "{b:02x}");
    }
    s
}
