//! `convoy run`: a `.npy` batch through a bundle, raw output back to `.npy`.

use std::path::Path;

use super::CliError;
use crate::bundle::Bundle;
use crate::engine::{Engine, EngineConfig, RunOptions};
use crate::npy::{read_npy_file, write_npy_file};

/// Samples computed at a time by `convoy run`.
const RUN_SLICE: usize = 256;

pub fn run(
    bundle: &Path,
    input: &Path,
    output: &Path,
    threads: usize,
    reject_non_finite: bool,
) -> Result<(), CliError> {
    let bundle = Bundle::open(bundle)?;
    let engine = Engine::new(
        &bundle,
        &EngineConfig {
            threads,
            ..EngineConfig::default()
        },
    )?;
    let array = read_npy_file(input)?;
    let expected = engine.plan().input_shape().to_vec();
    if array.shape.len() != expected.len() + 1 || array.shape[1..] != expected[..] {
        return Err(CliError::InputShape {
            found: array.shape,
            expected,
        });
    }
    let batch = array.shape[0];
    let in_len = engine.plan().input_len();
    // Large files run in slices, so memory stays bounded by the engine's batch limit; results
    // do not depend on the slicing (batch invariance).
    let mut result = Vec::with_capacity(batch * engine.plan().output_len());
    for chunk in array.data.chunks(in_len.max(1) * RUN_SLICE) {
        let n = chunk.len() / in_len.max(1);
        result.extend(engine.run(chunk, n, RunOptions { reject_non_finite })?);
    }
    let mut shape = vec![batch];
    shape.extend_from_slice(engine.plan().output_shape());
    write_npy_file(output, &shape, &result)?;
    tracing::info!(batch, output = %output.display(), "wrote output");
    Ok(())
}
