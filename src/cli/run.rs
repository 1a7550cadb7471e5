//! `convoy run`: a `.npy` batch through a bundle, raw output back to `.npy`.

use std::path::Path;

use super::CliError;
use crate::bundle::Bundle;
use crate::engine::{Engine, EngineConfig, RunOptions};
use crate::npy::{read_npy_file, write_npy_file};

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
    let result = engine.run(&array.data, batch, RunOptions { reject_non_finite })?;
    let mut shape = vec![batch];
    shape.extend_from_slice(engine.plan().output_shape());
    write_npy_file(output, &shape, &result)?;
    tracing::info!(batch, output = %output.display(), "wrote output");
    Ok(())
}
