//! Writes a bundle: lays tensors out 64-byte aligned, hashes, and proves the result reads back.

use std::io::Write;
use std::path::Path;

use sha2::{Digest, Sha256};

use super::error::{BundleError, TensorProblem};
use super::manifest::{
    CheckSamples, DType, InputSpec, Manifest, OutputSpec, Provenance, TensorEntry,
};
use super::reader::Bundle;
use super::{ALIGN, FORMAT_VERSION, HEADER_LEN, MAGIC, align_up, hex};
use crate::graph::Graph;

/// Tensor names the writer reserves for check samples.
pub const CHECK_INPUT_TENSOR: &str = "check_samples.input";
pub const CHECK_OUTPUT_TENSOR: &str = "check_samples.output";

/// Collects a model's parts and writes them as one bundle.
#[derive(Clone, Debug)]
pub struct BundleWriter {
    name: String,
    version: String,
    description: String,
    created: Option<String>,
    input: InputSpec,
    output: OutputSpec,
    graph: Graph,
    tensors: Vec<(String, Vec<usize>, Vec<f32>)>,
    check: Option<CheckSamples>,
    drift_baseline: Option<serde_json::Value>,
    source: String,
}

impl BundleWriter {
    /// Starts a bundle for `graph` with the given name, version and specs.
    pub fn new(
        name: impl Into<String>,
        version: impl Into<String>,
        graph: Graph,
        input: InputSpec,
        output: OutputSpec,
    ) -> BundleWriter {
        BundleWriter {
            name: name.into(),
            version: version.into(),
            description: String::new(),
            created: None,
            input,
            output,
            graph,
            tensors: Vec::new(),
            check: None,
            drift_baseline: None,
            source: String::new(),
        }
    }

    pub fn description(mut self, text: impl Into<String>) -> Self {
        self.description = text.into();
        self
    }

    /// Fixes the creation time (RFC 3339); by default the time of writing.
    pub fn created(mut self, rfc3339: impl Into<String>) -> Self {
        self.created = Some(rfc3339.into());
        self
    }

    /// Records what the bundle was made from.
    pub fn source(mut self, source: impl Into<String>) -> Self {
        self.source = source.into();
        self
    }

    /// Changes the model name.
    pub fn name(mut self, name: impl Into<String>) -> Self {
        self.name = name.into();
        self
    }

    /// Changes the version.
    pub fn version(mut self, version: impl Into<String>) -> Self {
        self.version = version.into();
        self
    }

    /// Declares how encoded images become the input (or that none are accepted).
    pub fn image_input(mut self, prep: Option<crate::bundle::manifest::ImagePrep>) -> Self {
        self.input.image = prep;
        self
    }

    /// Sets the class labels.
    pub fn labels(mut self, labels: Vec<String>) -> Self {
        self.output.labels = labels;
        self
    }

    pub fn drift_baseline(mut self, baseline: serde_json::Value) -> Self {
        self.drift_baseline = Some(baseline);
        self
    }

    /// Adds a tensor, `data` in row-major order.
    ///
    /// # Errors
    /// `data` does not have the shape's element count, or a tensor of that name exists.
    pub fn add_tensor(
        &mut self,
        name: impl Into<String>,
        shape: &[usize],
        data: Vec<f32>,
    ) -> Result<&mut Self, BundleError> {
        let name = name.into();
        let expected: usize = shape.iter().product();
        if data.len() != expected {
            return Err(BundleError::Tensor {
                tensor: name,
                problem: TensorProblem::LengthMismatch {
                    length: data.len() as u64 * 4,
                    expected: expected as u64 * 4,
                },
            });
        }
        if self.tensors.iter().any(|(n, _, _)| *n == name) {
            return Err(BundleError::Tensor {
                tensor: name,
                problem: TensorProblem::Duplicate,
            });
        }
        self.tensors.push((name, shape.to_vec(), data));
        Ok(self)
    }

    /// Stores `count` check samples: `inputs` is `[count, ...input shape]` and `outputs`
    /// `[count, ...output shape]`, both row-major. `produced_by` says where the outputs came
    /// from.
    ///
    /// # Errors
    /// Sizes that do not match the specs (found when the bundle is written).
    pub fn check_samples(
        &mut self,
        count: usize,
        inputs: Vec<f32>,
        outputs: Vec<f32>,
        output_shape: &[usize],
        produced_by: impl Into<String>,
    ) -> Result<&mut Self, BundleError> {
        self.tensors
            .retain(|(n, _, _)| n != CHECK_INPUT_TENSOR && n != CHECK_OUTPUT_TENSOR);
        let mut in_shape = vec![count];
        in_shape.extend_from_slice(&self.input.shape);
        let mut out_shape = vec![count];
        out_shape.extend_from_slice(output_shape);
        self.add_tensor(CHECK_INPUT_TENSOR, &in_shape, inputs)?;
        self.add_tensor(CHECK_OUTPUT_TENSOR, &out_shape, outputs)?;
        self.check = Some(CheckSamples {
            input: CHECK_INPUT_TENSOR.into(),
            output: CHECK_OUTPUT_TENSOR.into(),
            count,
            produced_by: produced_by.into(),
        });
        Ok(self)
    }

    /// Serialises the bundle and verifies it by reading it back.
    ///
    /// # Errors
    /// Anything the reader would refuse: a bad name or version, a graph that does not check
    /// against the tensors, specs that disagree with the graph.
    pub fn to_bytes(&self) -> Result<Vec<u8>, BundleError> {
        let mut entries = Vec::with_capacity(self.tensors.len());
        let mut offset = 0u64;
        for (name, shape, data) in &self.tensors {
            let length = data.len() as u64 * 4;
            entries.push(TensorEntry {
                name: name.clone(),
                dtype: DType::F32,
                shape: shape.clone(),
                offset,
                length,
            });
            offset = align_up(offset + length);
        }
        let data_len = offset;
        let mut data = vec![0u8; data_len as usize];
        for (entry, (_, _, values)) in entries.iter().zip(&self.tensors) {
            let dst = &mut data[entry.offset as usize..(entry.offset + entry.length) as usize];
            for (chunk, v) in dst.chunks_exact_mut(4).zip(values) {
                chunk.copy_from_slice(&v.to_le_bytes());
            }
        }
        let manifest = Manifest {
            name: self.name.clone(),
            version: self.version.clone(),
            description: self.description.clone(),
            created: self.created.clone().unwrap_or_else(now_rfc3339),
            input: self.input.clone(),
            output: self.output.clone(),
            graph: self.graph.clone(),
            tensors: entries,
            data_sha256: hex(&Sha256::digest(&data)),
            check_samples: self.check.clone(),
            drift_baseline: self.drift_baseline.clone(),
            provenance: Provenance {
                source: self.source.clone(),
                writer: format!("convoy {}", env!("CARGO_PKG_VERSION")),
            },
        };
        // Serialising plain data (strings, numbers, vectors) cannot fail.
        let json = serde_json::to_vec_pretty(&manifest).expect("manifest serialises");
        let manifest_len = json.len() as u64;
        let data_start = align_up(HEADER_LEN as u64 + manifest_len);
        let mut out = Vec::with_capacity((data_start + data_len) as usize);
        out.extend_from_slice(&MAGIC);
        out.extend_from_slice(&FORMAT_VERSION.to_le_bytes());
        out.extend_from_slice(&0u32.to_le_bytes());
        out.extend_from_slice(&manifest_len.to_le_bytes());
        out.extend_from_slice(&data_len.to_le_bytes());
        out.extend_from_slice(&Sha256::digest(&json));
        debug_assert_eq!(out.len(), HEADER_LEN);
        out.extend_from_slice(&json);
        out.resize(data_start as usize, 0);
        out.extend_from_slice(&data);
        debug_assert_eq!(out.len() as u64 % ALIGN, 0);
        Bundle::from_bytes(out.clone())?;
        Ok(out)
    }

    /// Writes the bundle to `path` atomically: to a temporary file beside it, synced, then
    /// renamed over `path`, so a watcher never sees half a bundle.
    ///
    /// # Errors
    /// As [`BundleWriter::to_bytes`], and I/O failures.
    pub fn write(&self, path: &Path) -> Result<(), BundleError> {
        let bytes = self.to_bytes()?;
        write_atomically(path, &bytes)
    }
}

/// Writes `bytes` to a hidden temporary file in `path`'s folder and renames it into place.
///
/// # Errors
/// I/O failures, naming the path.
pub fn write_atomically(path: &Path, bytes: &[u8]) -> Result<(), BundleError> {
    let io = |source| BundleError::Io {
        path: path.to_path_buf(),
        source,
    };
    let file_name = path
        .file_name()
        .map(|n| n.to_string_lossy().into_owned())
        .unwrap_or_else(|| "bundle".into());
    let tmp = path.with_file_name(format!(".{file_name}.partial-{}", std::process::id()));
    let result = (|| {
        let mut f = std::fs::File::create(&tmp)?;
        f.write_all(bytes)?;
        f.sync_all()?;
        std::fs::rename(&tmp, path)
    })();
    if result.is_err() {
        let _ = std::fs::remove_file(&tmp);
    }
    result.map_err(io)
}

/// The current time as RFC 3339 UTC, to the second.
pub fn now_rfc3339() -> String {
    let secs = std::time::SystemTime::now()
        .duration_since(std::time::UNIX_EPOCH)
        .map(|d| d.as_secs())
        .unwrap_or(0);
    rfc3339_from_unix(secs)
}

/// Formats seconds since 1970 as `YYYY-MM-DDTHH:MM:SSZ`, using the days-to-civil algorithm of
/// Howard Hinnant, "chrono-Compatible Low-Level Date Algorithms" (2013).
pub fn rfc3339_from_unix(secs: u64) -> String {
    let days = (secs / 86_400) as i64;
    let rem = secs % 86_400;
    let z = days + 719_468;
    let era = z.div_euclid(146_097);
    let doe = z - era * 146_097;
    let yoe = (doe - doe / 1460 + doe / 36_524 - doe / 146_096) / 365;
    let doy = doe - (365 * yoe + yoe / 4 - yoe / 100);
    let mp = (5 * doy + 2) / 153;
    let d = doy - (153 * mp + 2) / 5 + 1;
    let m = if mp < 10 { mp + 3 } else { mp - 9 };
    let y = yoe + era * 400 + i64::from(m <= 2);
    format!(
        "{y:04}-{m:02}-{d:02}T{:02}:{:02}:{:02}Z",
        rem / 3600,
        rem % 3600 / 60,
        rem % 60
    )
}

#[cfg(test)]
mod tests {
    use super::rfc3339_from_unix;

    #[test]
    fn unix_time_formatting() {
        // Reference instants: the Unix epoch, and 1e9 seconds, which is
        // 2001-09-09T01:46:40Z (a widely reported date; from memory), and a leap day.
        assert_eq!(rfc3339_from_unix(0), "1970-01-01T00:00:00Z");
        assert_eq!(rfc3339_from_unix(1_000_000_000), "2001-09-09T01:46:40Z");
        assert_eq!(rfc3339_from_unix(951_782_400), "2000-02-29T00:00:00Z");
    }
}
