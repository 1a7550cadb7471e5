//! Reference data → a model's [`Baseline`]: the set of samples a model was validated on, run
//! through the model once, at import.
//!
//! A [`ReferenceSet`] is a folder of images (files directly in it and one level of subfolders,
//! such as `train/<class>/*.png`, in sorted path order) or a `.npy` array of already prepared
//! inputs (first axis = samples). [`build_baseline`] prepares each sample exactly as the server
//! does ([`prepare_image`] with default [`ImageLimits`], or the row as it is), runs batches
//! through the bundle's [`Engine`], turns outputs into probabilities ([`probabilities`]),
//! computes the per-sample statistics of the model's schema and feeds the [`BaselineBuilder`].
//!
//! The schema comes from [`schema_for`], the one definition the server uses for live samples
//! too, so baseline and window always name the same statistics.

use std::io::Read;
use std::path::{Path, PathBuf};

use super::DriftError;
use super::baseline::{Baseline, BaselineBuilder};
use super::monitor::schema_for;
use super::sample::SampleStats;
use crate::bundle::Bundle;
use crate::bundle::manifest::{ImagePrep, OutputKind};
use crate::engine::{Engine, RunError, RunOptions};
use crate::npy::{NpyError, read_npy_file};
use crate::prepare::{ImageFacts, ImageLimits, PrepareError, prepare_image};

/// File extensions (compared without case) taken as images in a reference folder: the formats
/// the server decodes.
pub const IMAGE_EXTENSIONS: [&str; 8] = ["png", "jpg", "jpeg", "bmp", "webp", "gif", "tif", "tiff"];

/// Samples per engine call. 32 amortises the per-call cost of the engine over enough samples
/// while the batch buffer stays small (32 inputs), so memory does not grow with the set.
const BATCH: usize = 32;

/// One sample of a reference set, for error messages.
#[derive(Clone, Debug, PartialEq, Eq)]
pub enum ReferenceItem {
    /// An image file.
    Image(PathBuf),
    /// A row (index along the first axis) of a `.npy` file.
    Row(usize),
}

impl std::fmt::Display for ReferenceItem {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        match self {
            ReferenceItem::Image(p) => write!(f, "{}", p.display()),
            ReferenceItem::Row(i) => write!(f, "row {i}"),
        }
    }
}

/// Why a baseline could not be built from a reference set.
#[derive(Debug, thiserror::Error)]
pub enum ReferenceError {
    #[error("reference {path} does not exist")]
    Missing { path: PathBuf },

    #[error("reference {path}: {source}")]
    Io {
        path: PathBuf,
        #[source]
        source: std::io::Error,
    },

    #[error("reference {path} is neither a folder of images nor a .npy file")]
    UnknownKind { path: PathBuf },

    #[error(
        "reference folder {path} holds no images (png, jpg, jpeg, bmp, webp, gif, tif, tiff), \
         neither directly nor one folder down"
    )]
    NoImages { path: PathBuf },

    #[error("reference {path}: {source}")]
    Npy {
        path: PathBuf,
        #[source]
        source: NpyError,
    },

    #[error("reference {path} holds no samples (shape {shape:?})")]
    NoRows { path: PathBuf, shape: Vec<usize> },

    #[error(
        "reference {path} has shape {found:?}; the model takes [samples, {}]",
        dims(expected)
    )]
    NpyShape {
        path: PathBuf,
        found: Vec<usize>,
        expected: Vec<usize>,
    },

    #[error("a reference limit must be at least 1")]
    ZeroLimit,

    #[error(
        "the reference is a folder of images, but the model takes tensors only; give a .npy of \
         prepared inputs instead"
    )]
    ImagesNotAccepted,

    #[error("reference image {path}: {source}")]
    Image {
        path: PathBuf,
        #[source]
        source: PrepareError,
    },

    #[error("running the reference through the model: {0}")]
    Run(#[source] RunError),

    #[error("reference sample {item}: {source}")]
    Sample {
        item: ReferenceItem,
        #[source]
        source: DriftError,
    },

    #[error("the model's drift statistics: {0}")]
    Schema(#[source] DriftError),

    #[error("building the baseline: {0}")]
    Baseline(#[source] DriftError),
}

fn dims(d: &[usize]) -> String {
    d.iter()
        .map(|x| x.to_string())
        .collect::<Vec<_>>()
        .join(", ")
}

/// The probabilities a model's raw output stands for: softmax of logits, or the output itself
/// when the graph already ends in probabilities.
///
/// Softmax subtracts the largest logit before exponentiating, so large logits cannot overflow
/// (the usual stable form, common practice), and sums in f64. Non-finite logits give NaN
/// probabilities, which the statistics then flag as non-finite.
pub fn probabilities(kind: OutputKind, raw: &[f32]) -> Vec<f32> {
    match kind {
        OutputKind::Probabilities => raw.to_vec(),
        OutputKind::Logits => {
            let top = raw.iter().copied().fold(f32::NEG_INFINITY, f32::max);
            let exps: Vec<f64> = raw.iter().map(|&v| f64::from(v - top).exp()).collect();
            let sum: f64 = exps.iter().sum();
            exps.iter().map(|&e| (e / sum) as f32).collect()
        }
    }
}

/// Indices of `n` samples spread evenly over `total`: ⌊i·total/n⌋ for i = 0..n, which is every
/// k-th sample from the first when k = total/n is whole (systematic sampling, common practice).
/// A set sorted by class folder then keeps its classes balanced. All indices when
/// `n ≥ total`.
pub fn evenly_spaced(total: usize, n: usize) -> Vec<usize> {
    if n >= total {
        return (0..total).collect();
    }
    (0..n)
        // i < n ≤ usize::MAX and the quotient is below `total`, so it fits back into usize.
        .map(|i| (i as u128 * total as u128 / n as u128) as usize)
        .collect()
}

/// The samples a baseline is built from.
#[derive(Clone, Debug)]
pub struct ReferenceSet {
    path: PathBuf,
    available: usize,
    items: Items,
}

#[derive(Clone, Debug)]
enum Items {
    /// Chosen image files, in sorted path order.
    Images(Vec<PathBuf>),
    /// A `.npy` array and the chosen rows.
    Rows {
        shape: Vec<usize>,
        data: Vec<f32>,
        rows: Vec<usize>,
    },
}

impl ReferenceSet {
    /// Opens a reference: a folder of images or a `.npy` file (by its extension).
    ///
    /// # Errors
    /// [`ReferenceError::Missing`]; [`ReferenceError::Io`] for an unreadable folder;
    /// [`ReferenceError::UnknownKind`] for a file that is not `.npy`;
    /// [`ReferenceError::NoImages`] for a folder without images;
    /// [`ReferenceError::Npy`] / [`ReferenceError::NoRows`] for an unreadable or empty array.
    pub fn open(path: &Path) -> Result<ReferenceSet, ReferenceError> {
        let meta = std::fs::metadata(path).map_err(|e| io_error(path, e))?;
        if meta.is_dir() {
            let images = list_images(path)?;
            if images.is_empty() {
                return Err(ReferenceError::NoImages {
                    path: path.to_path_buf(),
                });
            }
            return Ok(ReferenceSet {
                path: path.to_path_buf(),
                available: images.len(),
                items: Items::Images(images),
            });
        }
        if !has_extension(path, &["npy"]) {
            return Err(ReferenceError::UnknownKind {
                path: path.to_path_buf(),
            });
        }
        let array = read_npy_file(path).map_err(|source| ReferenceError::Npy {
            path: path.to_path_buf(),
            source,
        })?;
        let count = array.shape.first().copied().unwrap_or(0);
        if count == 0 || array.data.is_empty() {
            return Err(ReferenceError::NoRows {
                path: path.to_path_buf(),
                shape: array.shape,
            });
        }
        Ok(ReferenceSet {
            path: path.to_path_buf(),
            available: count,
            items: Items::Rows {
                shape: array.shape,
                data: array.data,
                rows: (0..count).collect(),
            },
        })
    }

    /// Keeps at most `n` samples, evenly spaced over all of them ([`evenly_spaced`]).
    ///
    /// # Errors
    /// [`ReferenceError::ZeroLimit`] when `n` is 0.
    pub fn limit(mut self, n: usize) -> Result<ReferenceSet, ReferenceError> {
        if n == 0 {
            return Err(ReferenceError::ZeroLimit);
        }
        let keep = evenly_spaced(self.available, n);
        match &mut self.items {
            Items::Images(paths) => {
                let all = std::mem::take(paths);
                *paths = keep.iter().map(|&i| all[i].clone()).collect();
            }
            Items::Rows { rows, .. } => *rows = keep,
        }
        Ok(self)
    }

    /// The folder or file the set was opened from.
    pub fn path(&self) -> &Path {
        &self.path
    }

    /// Samples chosen.
    pub fn len(&self) -> usize {
        match &self.items {
            Items::Images(p) => p.len(),
            Items::Rows { rows, .. } => rows.len(),
        }
    }

    /// Never true for an opened set: opening refuses empty ones.
    pub fn is_empty(&self) -> bool {
        self.len() == 0
    }

    /// Samples the folder or file holds, before any limit.
    pub fn available(&self) -> usize {
        self.available
    }

    /// Whether the samples are image files (rather than rows of prepared inputs).
    pub fn is_images(&self) -> bool {
        matches!(self.items, Items::Images(_))
    }

    /// The chosen image files, in order; empty for a `.npy` set.
    pub fn images(&self) -> &[PathBuf] {
        match &self.items {
            Items::Images(p) => p,
            Items::Rows { .. } => &[],
        }
    }

    /// The chosen rows of a `.npy` set, in order; empty for images.
    pub fn rows(&self) -> &[usize] {
        match &self.items {
            Items::Images(_) => &[],
            Items::Rows { rows, .. } => rows,
        }
    }

    fn item(&self, k: usize) -> ReferenceItem {
        match &self.items {
            Items::Images(p) => ReferenceItem::Image(p[k].clone()),
            Items::Rows { rows, .. } => ReferenceItem::Row(rows[k]),
        }
    }

    /// Writes chosen sample `k` as model input into `out`; the original image's size for
    /// images.
    fn prepare(
        &self,
        k: usize,
        prep: Option<&ImagePrep>,
        limits: &ImageLimits,
        out: &mut [f32],
    ) -> Result<Option<ImageFacts>, ReferenceError> {
        match &self.items {
            Items::Images(paths) => {
                let path = &paths[k];
                let prep = prep.ok_or(ReferenceError::ImagesNotAccepted)?;
                let bytes = read_bounded(path, limits.max_encoded_bytes)?;
                prepare_image(&bytes, prep, limits, out)
                    .map(Some)
                    .map_err(|source| ReferenceError::Image {
                        path: path.clone(),
                        source,
                    })
            }
            Items::Rows { data, rows, .. } => {
                let len = out.len();
                out.copy_from_slice(&data[rows[k] * len..][..len]);
                Ok(None)
            }
        }
    }
}

fn io_error(path: &Path, source: std::io::Error) -> ReferenceError {
    if source.kind() == std::io::ErrorKind::NotFound {
        ReferenceError::Missing {
            path: path.to_path_buf(),
        }
    } else {
        ReferenceError::Io {
            path: path.to_path_buf(),
            source,
        }
    }
}

fn has_extension(path: &Path, extensions: &[&str]) -> bool {
    path.extension()
        .and_then(|e| e.to_str())
        .is_some_and(|e| extensions.iter().any(|x| e.eq_ignore_ascii_case(x)))
}

/// Image files directly in `dir` and in its immediate subfolders, sorted by path.
fn list_images(dir: &Path) -> Result<Vec<PathBuf>, ReferenceError> {
    let mut found = Vec::new();
    for (entry, meta) in entries(dir)? {
        if meta.is_dir() {
            for (file, meta) in entries(&entry)? {
                if meta.is_file() && has_extension(&file, &IMAGE_EXTENSIONS) {
                    found.push(file);
                }
            }
        } else if meta.is_file() && has_extension(&entry, &IMAGE_EXTENSIONS) {
            found.push(entry);
        }
    }
    found.sort();
    Ok(found)
}

/// The entries of a folder with their metadata (links followed).
fn entries(dir: &Path) -> Result<Vec<(PathBuf, std::fs::Metadata)>, ReferenceError> {
    let io = |e| io_error(dir, e);
    let mut out = Vec::new();
    for entry in std::fs::read_dir(dir).map_err(io)? {
        let path = entry.map_err(io)?.path();
        let meta = std::fs::metadata(&path).map_err(|e| io_error(&path, e))?;
        out.push((path, meta));
    }
    Ok(out)
}

/// Reads an image file, refusing one above `limit` bytes before reading it, as the server
/// refuses an oversized request.
fn read_bounded(path: &Path, limit: usize) -> Result<Vec<u8>, ReferenceError> {
    let io = |e| io_error(path, e);
    let file = std::fs::File::open(path).map_err(io)?;
    let len = file.metadata().map_err(io)?.len();
    if len > limit as u64 {
        return Err(ReferenceError::Image {
            path: path.to_path_buf(),
            source: PrepareError::EncodedTooLarge {
                bytes: usize::try_from(len).unwrap_or(usize::MAX),
                limit,
            },
        });
    }
    let mut bytes = Vec::with_capacity(len as usize);
    // A file that grew since its length was read still stops one byte past the limit, which
    // `prepare_image` then refuses.
    file.take(limit as u64 + 1)
        .read_to_end(&mut bytes)
        .map_err(io)?;
    Ok(bytes)
}

/// Runs every sample of `set` through `engine` (built from `bundle`) and builds the baseline of
/// the model's statistics (the schema of [`schema_for`]). `progress` is called after each
/// batch with the samples done and the total.
///
/// # Errors
/// [`ReferenceError::ImagesNotAccepted`] or [`ReferenceError::NpyShape`] when the set does not
/// fit the model; [`ReferenceError::Image`] naming an image the server would refuse;
/// [`ReferenceError::Run`]; [`ReferenceError::Sample`] naming a sample with non-finite
/// statistics or outputs; [`ReferenceError::Baseline`] for too few samples
/// ([`MIN_REFERENCE`](super::baseline::MIN_REFERENCE)).
pub fn build_baseline(
    set: &ReferenceSet,
    bundle: &Bundle,
    engine: &Engine,
    progress: &mut dyn FnMut(usize, usize),
) -> Result<Baseline, ReferenceError> {
    let manifest = bundle.manifest();
    let input = &manifest.input;
    let classes = bundle
        .output_shape()
        .iter()
        .try_fold(1usize, |acc, &d| acc.checked_mul(d))
        // An overflowing output has no usable class count; the schema refuses zero classes.
        .unwrap_or(0);
    let schema = schema_for(manifest, classes).map_err(ReferenceError::Schema)?;
    match &set.items {
        Items::Images(_) if input.image.is_none() => {
            return Err(ReferenceError::ImagesNotAccepted);
        }
        Items::Rows { shape, .. } if shape[1..] != input.shape[..] => {
            return Err(ReferenceError::NpyShape {
                path: set.path.clone(),
                found: shape.clone(),
                expected: input.shape.clone(),
            });
        }
        _ => {}
    }
    let in_len: usize = input.shape.iter().product();
    let kind = manifest.output.kind;
    let limits = ImageLimits::default();
    let mut builder = BaselineBuilder::new(&schema);
    let mut inputs = vec![0f32; BATCH * in_len];
    let mut stats: Vec<SampleStats> = (0..BATCH).map(|_| schema.new_stats()).collect();
    let total = set.len();
    let sample_error = |k: usize| {
        move |source| ReferenceError::Sample {
            item: set.item(k),
            source,
        }
    };
    for start in (0..total).step_by(BATCH) {
        let n = BATCH.min(total - start);
        for (k, (slot, st)) in inputs
            .chunks_exact_mut(in_len)
            .zip(&mut stats)
            .take(n)
            .enumerate()
        {
            let facts = set.prepare(start + k, input.image.as_ref(), &limits, slot)?;
            schema
                .compute_input(slot, facts, st)
                .map_err(sample_error(start + k))?;
        }
        let raw = engine
            .run(&inputs[..n * in_len], n, RunOptions::default())
            .map_err(ReferenceError::Run)?;
        for (k, (out, st)) in raw.chunks_exact(classes).zip(&mut stats).enumerate() {
            let p = probabilities(kind, out);
            schema
                .compute_output(&p, st)
                .map_err(sample_error(start + k))?;
            builder.push(st).map_err(sample_error(start + k))?;
        }
        progress(start + n, total);
    }
    builder.finish().map_err(ReferenceError::Baseline)
}

/// The baseline as the JSON value a manifest stores.
///
/// Goes through JSON text rather than `serde_json::to_value`: the value type keeps numbers as
/// f64, so an `f32` such as 0.1 would print as 0.10000000149011612. Printed as f32 first, it
/// stays the shortest decimal that reads back as the same f32, about half the bytes.
pub fn baseline_json(baseline: &Baseline) -> serde_json::Value {
    // Plain data (numbers, strings, vectors) always serialises, and serde_json reads back what
    // it wrote.
    let text = serde_json::to_string(baseline).expect("baseline serialises");
    serde_json::from_str(&text).expect("serde_json reads its own output")
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::drift::StatSchema;

    /// Softmax by its definition e^xᵢ / Σ e^xⱼ (common practice): logits 0 and ln 3 give 1/4
    /// and 3/4; equal logits give equal shares, however large.
    #[test]
    fn softmax_closed_forms() {
        let p = probabilities(OutputKind::Logits, &[0.0, 3f32.ln()]);
        assert!(
            (p[0] - 0.25).abs() < 1e-7 && (p[1] - 0.75).abs() < 1e-7,
            "{p:?}"
        );
        assert_eq!(
            probabilities(OutputKind::Logits, &[1000.0, 1000.0]),
            [0.5, 0.5]
        );
        assert!(probabilities(OutputKind::Logits, &[f32::NAN, 1.0])[1].is_nan());
        assert_eq!(
            probabilities(OutputKind::Probabilities, &[0.2, 0.8]),
            [0.2, 0.8]
        );
    }

    #[test]
    fn evenly_spaced_is_every_kth() {
        assert_eq!(evenly_spaced(12, 4), [0, 3, 6, 9]);
        // ⌊i·10/4⌋ for i = 0..4.
        assert_eq!(evenly_spaced(10, 4), [0, 2, 5, 7]);
        assert_eq!(evenly_spaced(3, 5), [0, 1, 2]);
        // 8,000 images in four class folders of 2,000, limit 2,000: 500 from each.
        let picked = evenly_spaced(8000, 2000);
        for class in 0..4 {
            let n = picked.iter().filter(|&&i| i / 2000 == class).count();
            assert_eq!(n, 500);
        }
    }

    #[test]
    fn baseline_json_keeps_f32_short_and_exact() {
        let schema = StatSchema::new(1, 1, 1, false, 2).unwrap();
        let mut builder = BaselineBuilder::new(&schema);
        let mut stats = schema.new_stats();
        for i in 0..60 {
            let v = 0.1 * i as f32;
            schema.compute(&[v], None, &[0.3, 0.7], &mut stats).unwrap();
            builder.push(&stats).unwrap();
        }
        let b = builder.finish().unwrap();
        let value = baseline_json(&b);
        let naive = serde_json::to_value(&b).unwrap().to_string();
        assert!(value.to_string().len() < naive.len());
        let back: Baseline = serde_json::from_value(value).unwrap();
        assert_eq!(back, b);
    }
}
