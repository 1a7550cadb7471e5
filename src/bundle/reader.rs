//! Reads and verifies a bundle. Every size field is checked against the real file length and
//! against fixed limits before anything it controls is allocated or touched.

use std::borrow::Cow;
use std::collections::HashMap;
use std::fs::File;
use std::path::Path;

use sha2::{Digest, Sha256};

use super::error::{BundleError, TensorProblem};
use super::manifest::{ImagePrep, Manifest, OutputKind};
use super::signature::{FLAG_SIGNED, SIGNATURE_BLOCK_LEN, SignatureBlock};
use super::version::validate_version;
use super::{
    ALIGN, FORMAT_VERSION, HEADER_LEN, MAGIC, MAX_CHECK_SAMPLES, MAX_MANIFEST_LEN,
    MAX_TENSOR_ELEMENTS, align_up, hex,
};
use crate::graph::Op;
use crate::graph::shapes::{self, Shapes};
use crate::graph::summary::Summary;

/// The bytes of a bundle: a read-only memory map of the file, or an owned buffer.
enum Storage {
    Mapped(memmap2::Mmap),
    Owned(Vec<u8>),
}

impl std::ops::Deref for Storage {
    type Target = [u8];
    fn deref(&self) -> &[u8] {
        match self {
            Storage::Mapped(m) => m,
            Storage::Owned(v) => v,
        }
    }
}

/// A verified bundle: its manifest, its tensors (borrowed from the file where possible) and
/// the checked shape of every graph value.
pub struct Bundle {
    manifest: Manifest,
    bytes: Storage,
    data_start: usize,
    index: HashMap<String, usize>,
    shapes: Shapes,
    file_sha256: String,
    /// SHA-256 of every byte before the signature block (the whole file when unsigned): what
    /// a signature covers, taken from the same pass as `file_sha256`.
    signed_sha256: [u8; 32],
    /// Where the data section ends: the end of the file, or where the signature block starts.
    data_end: usize,
    signature: Option<SignatureBlock>,
}

impl std::fmt::Debug for Bundle {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.debug_struct("Bundle")
            .field("name", &self.manifest.name)
            .field("version", &self.manifest.version)
            .field("bytes", &self.bytes.len())
            .finish()
    }
}

impl Bundle {
    /// Opens and verifies the bundle at `path`, memory-mapping it.
    ///
    /// # Errors
    /// I/O failures and every check of [`Bundle::from_bytes`].
    pub fn open(path: &Path) -> Result<Bundle, BundleError> {
        let io = |source| BundleError::Io {
            path: path.to_path_buf(),
            source,
        };
        let file = File::open(path).map_err(io)?;
        let len = file.metadata().map_err(io)?.len();
        if len == 0 {
            return Err(BundleError::Truncated {
                what: "header",
                needed: HEADER_LEN as u64,
                available: 0,
            });
        }
        // SAFETY: the map is read-only and private to this process. Bundles are published by
        // writing a new file and renaming it into place (never by rewriting in place), so the
        // file under the map does not change while we hold it; everything read from it is
        // verified (checksums, bounds) before use.
        let map = unsafe { memmap2::Mmap::map(&file) }.map_err(io)?;
        Self::parse(Storage::Mapped(map))
    }

    /// Verifies a bundle held in memory.
    ///
    /// # Errors
    /// Truncation, bad magic, unknown format version, checksum mismatches, tensor entries out
    /// of bounds or disagreeing with their shapes, unknown ops, graphs that do not check, and
    /// input/output specs that disagree with the graph: each as its own [`BundleError`].
    pub fn from_bytes(bytes: Vec<u8>) -> Result<Bundle, BundleError> {
        Self::parse(Storage::Owned(bytes))
    }

    fn parse(bytes: Storage) -> Result<Bundle, BundleError> {
        let Sections {
            signed,
            manifest_end,
            data_start,
            data_end,
            data_len,
        } = Sections::read(&bytes)?;
        let signature = if signed {
            Some(SignatureBlock::parse(&bytes[data_end..])?)
        } else {
            None
        };
        let manifest_bytes = &bytes[HEADER_LEN..manifest_end];
        let actual = hex(&Sha256::digest(manifest_bytes));
        let stored = hex(&bytes[32..64]);
        if actual != stored {
            return Err(BundleError::ManifestChecksum {
                expected: stored,
                actual,
            });
        }
        let manifest = parse_manifest(manifest_bytes)?;
        check_name(&manifest.name)?;
        validate_version(&manifest.version)?;

        let index = check_tensor_index(&manifest, data_len)?;
        let (FileDigests { file, signed_part }, checked) =
            hash_file_and_data(&bytes, data_start..data_end, |data_sha256| {
                let actual = hex(&data_sha256);
                if actual != manifest.data_sha256.to_ascii_lowercase() {
                    return Err(BundleError::DataChecksum {
                        expected: manifest.data_sha256.clone(),
                        actual,
                    });
                }
                check_values_finite(&manifest, &bytes[data_start..data_end])
            });
        checked?;

        let mut bundle = Bundle {
            manifest,
            bytes,
            data_start,
            index,
            shapes: Shapes {
                values: HashMap::new(),
                node_outputs: Vec::new(),
            },
            file_sha256: hex(&file),
            signed_sha256: signed_part,
            data_end,
            signature,
        };
        let shapes = {
            let lookup = |name: &str| bundle.tensor_shape(name);
            shapes::infer(&bundle.manifest.graph, &lookup)?
        };
        bundle.shapes = shapes;
        bundle.check_specs()?;
        Ok(bundle)
    }

    pub fn manifest(&self) -> &Manifest {
        &self.manifest
    }

    /// SHA-256 of the whole file, lower-case hex: the identity of this exact bundle.
    pub fn file_sha256(&self) -> &str {
        &self.file_sha256
    }

    /// The signature block, when the bundle carries one (parsed, not yet checked against any
    /// key: see [`super::signature::check_signature`]).
    pub fn signature(&self) -> Option<&SignatureBlock> {
        self.signature.as_ref()
    }

    /// Every byte a signature covers: the whole file up to the signature block.
    pub fn signed_part(&self) -> &[u8] {
        &self.bytes[..self.data_end]
    }

    /// SHA-256 of [`signed_part`](Self::signed_part), computed while the bundle was verified.
    pub fn signed_part_sha256(&self) -> &[u8; 32] {
        &self.signed_sha256
    }

    /// The file's bytes.
    pub fn into_bytes(self) -> Vec<u8> {
        match self.bytes {
            Storage::Owned(v) => v,
            Storage::Mapped(m) => m.to_vec(),
        }
    }

    /// Size of the bundle file in bytes.
    pub fn file_len(&self) -> usize {
        self.bytes.len()
    }

    /// The checked per-sample shape of every graph value.
    pub fn shapes(&self) -> &Shapes {
        &self.shapes
    }

    /// Per-sample output shape of the graph.
    pub fn output_shape(&self) -> &[usize] {
        // `check_specs`' caller, `infer`, proved the output value exists.
        self.shapes
            .values
            .get(&self.manifest.graph.output)
            .map(Vec::as_slice)
            .unwrap_or(&[])
    }

    /// The shape of tensor `name`, if the bundle has it.
    pub fn tensor_shape(&self, name: &str) -> Option<Vec<usize>> {
        self.index
            .get(name)
            .map(|&i| self.manifest.tensors[i].shape.clone())
    }

    /// The values of tensor `name`, borrowed from the file when it is suitably aligned (it is
    /// for memory-mapped files on little-endian machines) and decoded otherwise.
    pub fn tensor(&self, name: &str) -> Option<Cow<'_, [f32]>> {
        let entry = &self.manifest.tensors[*self.index.get(name)?];
        let start = self.data_start + entry.offset as usize;
        let raw = &self.bytes[start..start + entry.length as usize];
        if cfg!(target_endian = "little")
            && let Ok(floats) = bytemuck::try_cast_slice::<u8, f32>(raw)
        {
            return Some(Cow::Borrowed(floats));
        }
        Some(Cow::Owned(
            raw.chunks_exact(4)
                .map(|b| f32::from_le_bytes([b[0], b[1], b[2], b[3]]))
                .collect(),
        ))
    }

    /// Parameter and multiply-add counts, layer by layer.
    pub fn summary(&self) -> Summary {
        let lookup = |name: &str| self.tensor_shape(name);
        Summary::new(&self.manifest.graph, &self.shapes, &lookup)
    }

    fn check_specs(&self) -> Result<(), BundleError> {
        let m = &self.manifest;
        let spec = |field: &'static str, problem: String| BundleError::Spec { field, problem };
        if m.input.shape != m.graph.input.shape {
            return Err(spec(
                "input.shape",
                format!(
                    "{:?} differs from the graph input's {:?}",
                    m.input.shape, m.graph.input.shape
                ),
            ));
        }
        if let Some(img) = &m.input.image {
            check_image_spec(img, &m.input.shape)?;
        }
        let out_elems: usize = self.output_shape().iter().product();
        if !m.output.labels.is_empty() && m.output.labels.len() != out_elems {
            return Err(spec(
                "output.labels",
                format!(
                    "{} labels for an output of {} elements ({:?})",
                    m.output.labels.len(),
                    out_elems,
                    self.output_shape()
                ),
            ));
        }
        if m.output.kind == OutputKind::Probabilities && out_elems == 0 {
            return Err(spec("output.kind", "empty output".into()));
        }
        self.check_sample_shapes()
    }

    /// The stored check samples: a sane count, input and output tensors of the right shapes.
    fn check_sample_shapes(&self) -> Result<(), BundleError> {
        let m = &self.manifest;
        if let Some(cs) = &m.check_samples {
            let bad = |problem: String| BundleError::CheckSamples { problem };
            if cs.count == 0 || cs.count > MAX_CHECK_SAMPLES {
                return Err(bad(format!(
                    "count {} is not in 1..={MAX_CHECK_SAMPLES}",
                    cs.count
                )));
            }
            for (role, tensor, per_sample) in [
                ("input", &cs.input, &m.input.shape[..]),
                ("output", &cs.output, self.output_shape()),
            ] {
                let mut expected = vec![cs.count];
                expected.extend_from_slice(per_sample);
                match self.tensor_shape(tensor) {
                    None => return Err(bad(format!("{role} tensor {tensor:?} is missing"))),
                    Some(s) if s != expected => {
                        return Err(bad(format!(
                            "{role} tensor {tensor:?} has shape {s:?}, expected {expected:?}"
                        )));
                    }
                    Some(_) => {}
                }
            }
        }
        Ok(())
    }
}

/// An image input's preprocessing against the model's `[C, H, W]` input.
fn check_image_spec(img: &ImagePrep, shape: &[usize]) -> Result<(), BundleError> {
    let spec = |field: &'static str, problem: String| BundleError::Spec { field, problem };
    let [c, h, w] = shape[..] else {
        return Err(spec(
            "input.image",
            format!("image input needs a [C, H, W] shape, not {:?}", shape),
        ));
    };
    if img.color.channels() != c {
        return Err(spec(
            "input.image.color",
            format!(
                "{:?} gives {} channels, the model takes {c}",
                img.color,
                img.color.channels()
            ),
        ));
    }
    if img.width != w || img.height != h {
        return Err(spec(
            "input.image",
            format!(
                "target {}x{} differs from the model's {w}x{h}",
                img.width, img.height
            ),
        ));
    }
    if img.mean.len() != c || img.std.len() != c {
        return Err(spec(
            "input.image.mean/std",
            format!(
                "need {c} values each, got {} and {}",
                img.mean.len(),
                img.std.len()
            ),
        ));
    }
    if !img.scale.is_finite()
        || img.mean.iter().any(|v| !v.is_finite())
        || img.std.iter().any(|v| !(v.is_finite() && *v > 0.0))
    {
        return Err(spec(
            "input.image",
            "scale and mean must be finite, std finite and positive".into(),
        ));
    }
    Ok(())
}

/// Bundles smaller than this hash both digests on the calling thread: SHA-256 runs at about
/// 1.5 GB/s with the x86 SHA extensions (measured with `cargo bench --bench load`), so a
/// second core would save under a millisecond, not worth taking it from a busy server.
const PARALLEL_HASH_MIN: usize = 1 << 20;

/// The whole file's SHA-256, and that of the part before the signature block (the same bytes
/// when the bundle is unsigned).
struct FileDigests {
    file: [u8; 32],
    signed_part: [u8; 32],
}

/// Computes the file's digests ([`FileDigests`]; the part a signature covers ends where
/// `data` ends) and, with the SHA-256 of the data section (the bytes in `data`), runs
/// `check_data`; returns the digests and `check_data`'s result.
///
/// The two digests cannot share work: the data section's digest starts from SHA-256's initial
/// state, the file's from the state after the header and manifest, so every data block is
/// compressed twice either way. The compression is the cost (it is compute-bound, not
/// memory-bound), so instead of one interleaved pass the file digest runs on a second thread
/// while this one hashes and checks the data, which halves the wall time of verifying a
/// large bundle on a machine with two free cores.
fn hash_file_and_data<T: Send>(
    bytes: &[u8],
    data: std::ops::Range<usize>,
    check_data: impl FnOnce([u8; 32]) -> T,
) -> (FileDigests, T) {
    let file_digest = || -> FileDigests {
        // One pass: the state after the signed part is finished once as it is, and once more
        // after the signature block.
        let mut hasher = Sha256::new();
        hasher.update(&bytes[..data.end]);
        let signed_part: [u8; 32] = hasher.clone().finalize().into();
        hasher.update(&bytes[data.end..]);
        FileDigests {
            file: hasher.finalize().into(),
            signed_part,
        }
    };
    let data_digest = || -> [u8; 32] { Sha256::digest(&bytes[data.clone()]).into() };
    let parallel = bytes.len() >= PARALLEL_HASH_MIN
        && std::thread::available_parallelism().is_ok_and(|n| n.get() > 1);
    if !parallel {
        let checked = check_data(data_digest());
        return (file_digest(), checked);
    }
    std::thread::scope(|scope| {
        // A failed spawn (thread limits) falls back to hashing on this thread.
        let helper = std::thread::Builder::new()
            .name("bundle-hash".into())
            .spawn_scoped(scope, file_digest);
        let checked = check_data(data_digest());
        let file = match helper {
            // The helper only hashes a borrowed slice; it cannot panic short of running out
            // of memory, which would abort the process anyway.
            Ok(handle) => handle.join().unwrap_or_else(|_| file_digest()),
            Err(_) => file_digest(),
        };
        (file, checked)
    })
}

/// Weights with NaN or infinity would make every answer silently wrong; refuse them. `data`
/// is the data section; `check_tensor_index` has bounded every entry inside it.
fn check_values_finite(manifest: &Manifest, data: &[u8]) -> Result<(), BundleError> {
    for entry in &manifest.tensors {
        let start = entry.offset as usize;
        let raw = &data[start..start + entry.length as usize];
        if let Some(index) = first_non_finite(raw) {
            return Err(BundleError::Tensor {
                tensor: entry.name.clone(),
                problem: TensorProblem::NonFinite { index },
            });
        }
    }
    Ok(())
}

/// Index of the first little-endian f32 in `raw` that is NaN or infinite.
///
/// A float is non-finite exactly when its 8 exponent bits are all ones (IEEE 754-2019,
/// §3.4), whatever the byte order of the host. Blocks of 64 values are scanned without an
/// early exit, which the compiler vectorises; only a block holding a bad value is searched
/// for its position.
fn first_non_finite(raw: &[u8]) -> Option<usize> {
    const EXP: u32 = 0x7f80_0000;
    let bad = |b: &[u8]| u32::from_le_bytes([b[0], b[1], b[2], b[3]]) & EXP == EXP;
    const BLOCK: usize = 64 * 4;
    for (i, block) in raw.chunks(BLOCK).enumerate() {
        if block.chunks_exact(4).fold(false, |any, b| any | bad(b)) {
            let at = block.chunks_exact(4).position(bad)?;
            return Some(i * (BLOCK / 4) + at);
        }
    }
    None
}

/// The model name and version a bundle's bytes claim, read from the header and manifest alone
/// (the manifest's checksum must match; the data section is not looked at). Lets a refused
/// bundle — a damaged data section, an op this build does not know — be reported under the
/// model and version it belongs to. `None` when even that much cannot be read.
pub fn peek_identity(bytes: &[u8]) -> Option<(String, String)> {
    if bytes.len() < HEADER_LEN || bytes[0..8] != MAGIC {
        return None;
    }
    let mut len = [0u8; 8];
    len.copy_from_slice(&bytes[16..24]);
    let manifest_len = u64::from_le_bytes(len);
    if manifest_len > MAX_MANIFEST_LEN {
        return None;
    }
    let manifest = bytes.get(HEADER_LEN..HEADER_LEN + manifest_len as usize)?;
    if Sha256::digest(manifest)[..] != bytes[32..64] {
        return None;
    }
    // Loosely typed on purpose: an unknown op must not stop the name from being read.
    let value: serde_json::Value = serde_json::from_slice(manifest).ok()?;
    let name = value.get("name")?.as_str()?;
    let version = value.get("version")?.as_str()?;
    (check_name(name).is_ok() && validate_version(version).is_ok())
        .then(|| (name.to_string(), version.to_string()))
}

/// Where a bundle's parts lie, read from its fixed header and checked against its length.
struct Sections {
    signed: bool,
    /// End of the manifest (it starts right after the header).
    manifest_end: usize,
    data_start: usize,
    data_end: usize,
    /// The data section's length as the header states it.
    data_len: u64,
}

impl Sections {
    /// Checks the magic, format version and flags, and that the manifest, data section and
    /// signature block the header announces are exactly the file's length.
    fn read(bytes: &[u8]) -> Result<Sections, BundleError> {
        let total = bytes.len() as u64;
        if bytes.len() < HEADER_LEN {
            return Err(BundleError::Truncated {
                what: "header",
                needed: HEADER_LEN as u64,
                available: total,
            });
        }
        let mut magic = [0u8; 8];
        magic.copy_from_slice(&bytes[0..8]);
        if magic != MAGIC {
            return Err(BundleError::BadMagic { found: magic });
        }
        let u32_at =
            |o: usize| u32::from_le_bytes([bytes[o], bytes[o + 1], bytes[o + 2], bytes[o + 3]]);
        let u64_at = |o: usize| {
            let mut b = [0u8; 8];
            b.copy_from_slice(&bytes[o..o + 8]);
            u64::from_le_bytes(b)
        };
        let format = u32_at(8);
        if format != FORMAT_VERSION {
            return Err(BundleError::UnsupportedFormat {
                found: format,
                supported: FORMAT_VERSION,
            });
        }
        let flags = u32_at(12);
        if flags & !FLAG_SIGNED != 0 {
            return Err(BundleError::UnknownFlags { flags });
        }
        let signed = flags & FLAG_SIGNED != 0;
        let manifest_len = u64_at(16);
        let data_len = u64_at(24);
        if manifest_len > MAX_MANIFEST_LEN {
            return Err(BundleError::ManifestTooLarge {
                length: manifest_len,
                limit: MAX_MANIFEST_LEN,
            });
        }
        let manifest_end = HEADER_LEN as u64 + manifest_len;
        if total < manifest_end {
            return Err(BundleError::Truncated {
                what: "manifest",
                needed: manifest_end,
                available: total,
            });
        }
        let data_start = align_up(manifest_end);
        let data_end = data_start
            .checked_add(data_len)
            .ok_or(BundleError::SizeMismatch {
                expected: u64::MAX,
                actual: total,
            })?;
        if total < data_end {
            return Err(BundleError::Truncated {
                what: "data section",
                needed: data_end,
                available: total,
            });
        }
        let expected = if signed {
            data_end + SIGNATURE_BLOCK_LEN as u64
        } else {
            data_end
        };
        if total < expected {
            return Err(BundleError::Truncated {
                what: "signature block",
                needed: expected,
                available: total,
            });
        }
        if total > expected {
            return Err(BundleError::SizeMismatch {
                expected,
                actual: total,
            });
        }
        // Every offset up to `total` fits in usize, because `bytes` holds them.
        Ok(Sections {
            signed,
            manifest_end: manifest_end as usize,
            data_start: data_start as usize,
            data_end: data_end as usize,
            data_len,
        })
    }
}

/// Parses the manifest, naming an unknown op precisely rather than as a generic JSON error.
fn parse_manifest(bytes: &[u8]) -> Result<Manifest, BundleError> {
    let value: serde_json::Value =
        serde_json::from_slice(bytes).map_err(|source| BundleError::ManifestJson { source })?;
    if let Some(nodes) = value.pointer("/graph/nodes").and_then(|n| n.as_array()) {
        for node in nodes {
            let op = node.get("op").and_then(|o| o.as_str()).unwrap_or("");
            if !Op::KINDS.contains(&op) {
                return Err(BundleError::UnknownOp {
                    node: node
                        .get("name")
                        .and_then(|n| n.as_str())
                        .unwrap_or("<unnamed>")
                        .to_string(),
                    op: op.to_string(),
                });
            }
        }
    }
    serde_json::from_value(value).map_err(|source| BundleError::ManifestJson { source })
}

/// Model names: 1 to 128 characters of ASCII letters, digits, `-`, `_` and `.`, not starting
/// with `.` (so a name is always safe as a file name and a metric label).
pub fn check_name(name: &str) -> Result<(), BundleError> {
    let bad = |reason| BundleError::BadName {
        name: name.to_string(),
        reason,
    };
    if name.is_empty() || name.len() > 128 {
        return Err(bad("must be 1 to 128 characters"));
    }
    if name.starts_with('.') {
        return Err(bad("must not start with '.'"));
    }
    if !name
        .chars()
        .all(|c| c.is_ascii_alphanumeric() || matches!(c, '-' | '_' | '.'))
    {
        return Err(bad("allowed are ASCII letters, digits, '-', '_' and '.'"));
    }
    Ok(())
}

fn check_tensor_index(
    manifest: &Manifest,
    data_len: u64,
) -> Result<HashMap<String, usize>, BundleError> {
    let mut index = HashMap::with_capacity(manifest.tensors.len());
    let err = |tensor: &str, problem| BundleError::Tensor {
        tensor: tensor.to_string(),
        problem,
    };
    for (i, t) in manifest.tensors.iter().enumerate() {
        if index.insert(t.name.clone(), i).is_some() {
            return Err(err(&t.name, TensorProblem::Duplicate));
        }
        let elements: u128 = t.shape.iter().map(|&d| d as u128).product();
        if elements > MAX_TENSOR_ELEMENTS as u128 {
            return Err(err(
                &t.name,
                TensorProblem::TooLarge {
                    shape: t.shape.clone(),
                    elements,
                    limit: MAX_TENSOR_ELEMENTS,
                },
            ));
        }
        if t.offset % ALIGN != 0 {
            return Err(err(
                &t.name,
                TensorProblem::Misaligned {
                    offset: t.offset,
                    align: ALIGN,
                },
            ));
        }
        let end = t.offset.checked_add(t.length);
        if end.is_none_or(|e| e > data_len) {
            return Err(err(
                &t.name,
                TensorProblem::OutOfBounds {
                    offset: t.offset,
                    length: t.length,
                    data_len,
                },
            ));
        }
        let expected = elements as u64 * t.dtype.size();
        if t.length != expected {
            return Err(err(
                &t.name,
                TensorProblem::LengthMismatch {
                    length: t.length,
                    expected,
                },
            ));
        }
    }
    let mut spans: Vec<&super::manifest::TensorEntry> =
        manifest.tensors.iter().filter(|t| t.length > 0).collect();
    spans.sort_by_key(|t| t.offset);
    for pair in spans.windows(2) {
        if pair[0].offset + pair[0].length > pair[1].offset {
            return Err(err(
                &pair[1].name,
                TensorProblem::Overlap {
                    other: pair[0].name.clone(),
                },
            ));
        }
    }
    Ok(index)
}

#[cfg(test)]
mod tests {
    use super::*;

    fn le_bytes(values: &[f32]) -> Vec<u8> {
        values.iter().flat_map(|v| v.to_le_bytes()).collect()
    }

    /// The blockwise scan finds the first NaN or infinity wherever it sits (inside a block,
    /// on either side of a block boundary, in a short last block) and passes every finite
    /// value, extremes included. Which bit patterns are finite: IEEE 754-2019, §3.4.
    #[test]
    fn first_non_finite_finds_the_first_bad_value() {
        let finite = [
            0.0,
            -0.0,
            f32::MAX,
            f32::MIN,
            f32::MIN_POSITIVE,
            f32::from_bits(1), // the smallest subnormal
            -f32::from_bits(0x007f_ffff),
        ];
        let mut values: Vec<f32> = (0..300).map(|i| finite[i % finite.len()]).collect();
        assert_eq!(first_non_finite(&le_bytes(&values)), None);
        for bad in [f32::NAN, f32::INFINITY, f32::NEG_INFINITY, -f32::NAN] {
            for at in [0, 1, 63, 64, 65, 200, 299] {
                let mut v = values.clone();
                v[at] = bad;
                if at + 7 < v.len() {
                    v[at + 7] = f32::NAN; // a later bad value must not be the one reported
                }
                assert_eq!(first_non_finite(&le_bytes(&v)), Some(at), "{bad} at {at}");
            }
        }
        values.truncate(0);
        assert_eq!(first_non_finite(&le_bytes(&values)), None);
    }
}
