//! Importing models that training frameworks export: ONNX file → verified bundle.
//!
//! [`import_onnx`] reads the file (and external data beside it; [`import_onnx_bytes`] takes the
//! bytes from memory and returns the bundle instead of writing it), converts it
//! ([`onnx::convert`]), builds a bundle, runs the converted model on check inputs — the
//! caller's reference arrays, or generated ones — then, when a drift reference is given, runs
//! it through the same engine into a baseline ([`crate::drift::reference`]) stored in the
//! manifest, and only then writes the bundle, atomically. A failure at any step leaves no output
//! file.

pub mod error;
pub mod onnx;

use std::collections::BTreeMap;
use std::path::{Path, PathBuf};

pub use error::ImportError;

use crate::bundle::manifest::{
    ColorMode, FitRule, ImagePrep, InputSpec, OutputKind, OutputSpec, ResizeFilter,
};
use crate::bundle::{Bundle, BundleWriter, MAX_CHECK_SAMPLES};
use crate::drift::{ReferenceSet, baseline_json, build_baseline};
use crate::engine::{Engine, EngineConfig, RunOptions, tolerance_check};
use crate::graph::build::SplitMix64;
use crate::npy::NpyArray;

/// Largest ONNX file accepted (protobuf messages cannot exceed 2 GiB).
pub const MAX_ONNX_BYTES: u64 = 2 << 30;

/// Check samples generated when the caller gives none.
const GENERATED_CHECKS: usize = 4;

/// What the caller decides about the bundle.
#[derive(Clone, Debug, Default)]
pub struct ImportOptions {
    /// Model name; default: the file name without extension.
    pub name: Option<String>,
    /// Version; default `1`.
    pub version: Option<String>,
    pub description: String,
    /// One label per output class; default: none (clients see class indices).
    pub labels: Option<Vec<String>>,
    /// How encoded images become the input; `None` for plain tensors.
    pub image: Option<ImageOptions>,
    /// Reference input and output arrays from the training framework.
    pub check: Option<(NpyArray, NpyArray)>,
    /// Where `check` came from, for the bundle's record.
    pub check_source: String,
    /// Reference data for input-drift monitoring: a folder of images or a `.npy` of prepared
    /// inputs ([`ReferenceSet::open`]); none means the bundle carries no baseline.
    pub reference: Option<PathBuf>,
    /// Use at most this many reference samples, evenly spaced.
    pub reference_limit: Option<usize>,
}

/// Image preparation as the caller states it; what is left out follows the model.
#[derive(Clone, Debug, Default)]
pub struct ImageOptions {
    /// Default: gray for one channel, RGB for three.
    pub color: Option<ColorMode>,
    /// Width and height; default: the model's input size.
    pub size: Option<(usize, usize)>,
    /// Default: bilinear.
    pub resize_filter: Option<ResizeFilter>,
    /// Default: stretch.
    pub fit: Option<FitRule>,
    /// Default: 1/255 (pixels to 0..1).
    pub scale: Option<f32>,
    /// Default: 0 per channel.
    pub mean: Option<Vec<f32>>,
    /// Default: 1 per channel.
    pub std: Option<Vec<f32>>,
}

impl ImageOptions {
    /// The full preparation for a model whose input is `shape`.
    ///
    /// # Errors
    /// A model input that is not `[C, H, W]` with 1 or 3 channels.
    pub fn resolve(&self, shape: &[usize]) -> Result<ImagePrep, ImportError> {
        let &[c, h, w] = shape else {
            return Err(ImportError::Options {
                what: "image input",
                problem: format!("the model's input {shape:?} is not an image [C, H, W]"),
            });
        };
        let color = match (self.color, c) {
            (Some(color), _) => color,
            (None, 1) => ColorMode::Gray,
            (None, 3) => ColorMode::Rgb,
            (None, _) => {
                return Err(ImportError::Options {
                    what: "image input",
                    problem: format!("{c} channels: images have 1 (gray) or 3 (RGB)"),
                });
            }
        };
        let (width, height) = self.size.unwrap_or((w, h));
        Ok(ImagePrep {
            color,
            width,
            height,
            resize_filter: self.resize_filter.unwrap_or(ResizeFilter::Bilinear),
            fit: self.fit.unwrap_or(FitRule::Stretch),
            scale: self.scale.unwrap_or(1.0 / 255.0),
            mean: self.mean.clone().unwrap_or_else(|| vec![0.0; c]),
            std: self.std.clone().unwrap_or_else(|| vec![1.0; c]),
        })
    }
}

/// What an import did.
#[derive(Clone, Debug)]
pub struct ImportReport {
    pub output: PathBuf,
    pub name: String,
    pub version: String,
    pub opset: i64,
    pub producer: String,
    pub input_shape: Vec<usize>,
    pub output_shape: Vec<usize>,
    pub output_kind: OutputKind,
    pub source_ops: BTreeMap<String, usize>,
    pub folded_nodes: usize,
    /// Import rewrites and plan fusions, one line each.
    pub notes: Vec<String>,
    pub parameters: u64,
    pub multiply_adds: u64,
    pub check_samples: usize,
    pub check_from_reference: bool,
    pub max_abs_error: f32,
    pub bound: f32,
    pub file_bytes: usize,
    /// The drift baseline stored, when a reference was given.
    pub drift: Option<BaselineReport>,
}

/// What the drift baseline of an import was made from.
#[derive(Clone, Debug)]
pub struct BaselineReport {
    /// The reference folder or `.npy` file.
    pub reference: PathBuf,
    /// Whether the reference samples were image files (else rows of prepared inputs).
    pub images: bool,
    /// Samples the baseline was built from.
    pub samples: u64,
    /// Samples the reference holds (more than `samples` under a limit).
    pub available: usize,
    /// Statistics in the baseline.
    pub statistics: usize,
    /// Length of the baseline as compact JSON (the manifest stores it indented, longer).
    pub json_bytes: usize,
}

/// Reference samples between two progress lines.
const PROGRESS_EVERY: usize = 1000;

/// Imports `model` and writes the bundle to `output`.
///
/// # Errors
/// Unreadable or invalid files, unsupported content (naming node and op), options that
/// disagree with the model, and reference outputs that the converted model does not
/// reproduce. Nothing is written on error.
pub fn import_onnx(
    model: &Path,
    output: &Path,
    options: &ImportOptions,
    progress: &mut dyn FnMut(&str),
) -> Result<ImportReport, ImportError> {
    let io = |source| ImportError::Io {
        path: model.to_path_buf(),
        source,
    };
    // Opened first: a mistyped reference path fails before the conversion work.
    let reference = open_reference(options)?;
    let bytes_len = std::fs::metadata(model).map_err(io)?.len();
    if bytes_len > MAX_ONNX_BYTES {
        return Err(ImportError::FileTooLarge {
            path: model.to_path_buf(),
            bytes: bytes_len,
            limit: MAX_ONNX_BYTES,
        });
    }
    progress(&format!(
        "reading {} ({:.1} MB)",
        model.display(),
        bytes_len as f64 / 1e6
    ));
    let bytes = std::fs::read(model).map_err(io)?;
    let dir = model.parent().map(|p| {
        if p.as_os_str().is_empty() {
            Path::new(".")
        } else {
            p
        }
    });
    let source = Source {
        default_name: default_name(model),
        file_name: model
            .file_name()
            .map(|f| f.to_string_lossy().into_owned())
            .unwrap_or_default(),
        dir,
    };
    let (bundle, mut report) = build_bundle(bytes, &source, options, reference, progress)?;
    progress(&format!("writing {}", output.display()));
    crate::bundle::write_atomically(output, &bundle)?;
    report.output = output.to_path_buf();
    Ok(report)
}

/// Imports an ONNX model held in memory and returns the bundle's bytes with the report (whose
/// `output` is empty). The name defaults to `model`; a model whose tensors live in external
/// data files is refused, as there is no folder to read them from.
///
/// # Errors
/// As [`import_onnx`], except the file errors: [`ImportError::FileTooLarge`] when `bytes` is
/// over [`MAX_ONNX_BYTES`]; [`ImportError::ExternalData`] for any external tensor.
pub fn import_onnx_bytes(
    bytes: Vec<u8>,
    options: &ImportOptions,
    progress: &mut dyn FnMut(&str),
) -> Result<(Vec<u8>, ImportReport), ImportError> {
    let reference = open_reference(options)?;
    if bytes.len() as u64 > MAX_ONNX_BYTES {
        return Err(ImportError::FileTooLarge {
            path: PathBuf::new(),
            bytes: bytes.len() as u64,
            limit: MAX_ONNX_BYTES,
        });
    }
    let source = Source {
        default_name: "model".into(),
        file_name: String::new(),
        dir: None,
    };
    build_bundle(bytes, &source, options, reference, progress)
}

/// Where the ONNX bytes came from: the defaults and the record that depend on it.
struct Source<'a> {
    default_name: String,
    /// For the bundle's `source` record; empty for bytes from memory.
    file_name: String,
    /// The folder external data is read from; `None` refuses external data.
    dir: Option<&'a Path>,
}

fn open_reference(options: &ImportOptions) -> Result<Option<ReferenceSet>, ImportError> {
    match &options.reference {
        Some(path) => {
            let set = ReferenceSet::open(path)?;
            Ok(Some(match options.reference_limit {
                Some(n) => set.limit(n)?,
                None => set,
            }))
        }
        None => Ok(None),
    }
}

/// Converts, verifies and builds the bundle: everything of an import but the file I/O.
fn build_bundle(
    bytes: Vec<u8>,
    source: &Source<'_>,
    options: &ImportOptions,
    reference: Option<ReferenceSet>,
    progress: &mut dyn FnMut(&str),
) -> Result<(Vec<u8>, ImportReport), ImportError> {
    let proto = onnx::proto::decode_model(&bytes)?;
    drop(bytes);
    let external = onnx::tensor::ExternalData::new(source.dir);
    progress("converting");
    let converted = onnx::convert::convert(&proto, &external)?;

    let name = match &options.name {
        Some(n) => n.clone(),
        None => source.default_name.clone(),
    };
    let version = options.version.clone().unwrap_or_else(|| "1".into());
    let input_shape = converted.graph.input.shape.clone();
    let mut writer = new_writer(&converted, source, options, &name, &version)?;

    progress("verifying");
    // A first build without check samples: the engine that computes them.
    let plain = Bundle::from_bytes(writer.to_bytes()?)?;
    let engine =
        Engine::new(&plain, &EngineConfig::default()).map_err(|e| ImportError::Options {
            what: "engine",
            problem: e.to_string(),
        })?;
    let out_shape = plain.output_shape().to_vec();
    let checks = store_check_samples(&mut writer, &engine, options, &input_shape, &out_shape)?;
    let (writer, drift) =
        add_drift_baseline(writer, reference.as_ref(), &plain, &engine, progress)?;
    let bytes = writer.to_bytes()?;
    let file_bytes = bytes.len();
    let final_bundle = Bundle::from_bytes(bytes.clone())?;

    let summary = final_bundle.summary();
    let mut notes = converted.notes.clone();
    notes.extend(engine.plan().folded().iter().cloned());
    let report = ImportReport {
        output: PathBuf::new(),
        name,
        version,
        opset: converted.opset,
        producer: converted.producer,
        input_shape,
        output_shape: out_shape,
        output_kind: final_bundle.manifest().output.kind,
        source_ops: converted.source_ops,
        folded_nodes: converted.folded_nodes,
        notes,
        parameters: summary.parameters,
        multiply_adds: summary.multiply_adds,
        check_samples: checks.count,
        check_from_reference: checks.from_reference,
        max_abs_error: checks.max_abs_error,
        bound: checks.bound,
        file_bytes,
        drift,
    };
    Ok((bytes, report))
}

/// A writer holding the converted graph, its tensors and the input and output specs.
fn new_writer(
    converted: &onnx::convert::Converted,
    source: &Source<'_>,
    options: &ImportOptions,
    name: &str,
    version: &str,
) -> Result<BundleWriter, ImportError> {
    let input_shape = converted.graph.input.shape.clone();
    let image = options
        .image
        .as_ref()
        .map(|i| i.resolve(&input_shape))
        .transpose()?;
    let mut writer = BundleWriter::new(
        name.to_string(),
        version.to_string(),
        converted.graph.clone(),
        InputSpec {
            shape: input_shape.clone(),
            image,
        },
        OutputSpec {
            labels: options.labels.clone().unwrap_or_default(),
            kind: if converted.ends_in_softmax {
                OutputKind::Probabilities
            } else {
                OutputKind::Logits
            },
        },
    )
    .description(options.description.clone())
    .source(format!(
        "{} (ONNX opset {}{})",
        source.file_name,
        converted.opset,
        if converted.producer.is_empty() {
            String::new()
        } else {
            format!(", exported by {}", converted.producer)
        }
    ));
    for (n, shape, data) in converted.tensors.iter().cloned() {
        writer.add_tensor(n, &shape, data)?;
    }
    Ok(writer)
}

/// What the check samples showed.
struct CheckOutcome {
    count: usize,
    from_reference: bool,
    max_abs_error: f32,
    bound: f32,
}

/// Runs the caller's reference inputs (or generated ones) through `engine`, refuses a result
/// off the reference by more than the tolerance, and stores the first samples in the bundle.
fn store_check_samples(
    writer: &mut BundleWriter,
    engine: &Engine,
    options: &ImportOptions,
    input_shape: &[usize],
    out_shape: &[usize],
) -> Result<CheckOutcome, ImportError> {
    let in_len: usize = input_shape.iter().product();
    let out_len: usize = out_shape.iter().product();
    let (inputs, expected, count, from_reference) = match &options.check {
        Some((x, y)) => {
            let n = check_shapes(x, y, input_shape, out_shape)?;
            (x.data.clone(), Some(y.data.clone()), n, true)
        }
        None => {
            let mut rng = SplitMix64::new(0xC0_4E_0F);
            // Values of the size normalised inputs have; only the replay matters, not realism.
            (
                rng.vec(GENERATED_CHECKS * in_len, -2.0, 2.0),
                None,
                GENERATED_CHECKS,
                false,
            )
        }
    };
    let mut got = Vec::with_capacity(count * out_len);
    for chunk in inputs.chunks(in_len * 64) {
        let n = chunk.len() / in_len;
        got.extend(engine.run(chunk, n, RunOptions::default()).map_err(|e| {
            ImportError::Options {
                what: "check input",
                problem: e.to_string(),
            }
        })?);
    }
    let (max_abs_error, bound) = match &expected {
        Some(want) => {
            let (err, bound) = tolerance_check(&got, want);
            if err > bound {
                return Err(ImportError::CheckMismatch {
                    max_abs_error: err,
                    bound,
                });
            }
            (err, bound)
        }
        None => (0.0, 0.0),
    };
    let stored = count.min(MAX_CHECK_SAMPLES).min(16);
    let produced_by = if from_reference {
        options.check_source.clone()
    } else {
        format!("convoy {} on generated inputs", env!("CARGO_PKG_VERSION"))
    };
    writer.check_samples(
        stored,
        inputs[..stored * in_len].to_vec(),
        match &expected {
            Some(want) => want[..stored * out_len].to_vec(),
            None => got[..stored * out_len].to_vec(),
        },
        out_shape,
        produced_by,
    )?;
    Ok(CheckOutcome {
        count,
        from_reference,
        max_abs_error,
        bound,
    })
}

/// With a reference set: its baseline, run through `engine`, added to the bundle.
fn add_drift_baseline(
    mut writer: BundleWriter,
    reference: Option<&ReferenceSet>,
    plain: &Bundle,
    engine: &Engine,
    progress: &mut dyn FnMut(&str),
) -> Result<(BundleWriter, Option<BaselineReport>), ImportError> {
    let drift = match reference {
        Some(set) => {
            progress(&format!(
                "drift reference: running {} samples of {}",
                set.len(),
                set.path().display()
            ));
            let mut shown = 0;
            let baseline = build_baseline(set, plain, engine, &mut |done, total| {
                if done - shown >= PROGRESS_EVERY || done == total {
                    shown = done;
                    progress(&format!("drift reference: {done} of {total} samples"));
                }
            })?;
            let value = baseline_json(&baseline);
            let report = BaselineReport {
                reference: set.path().to_path_buf(),
                images: set.is_images(),
                samples: baseline.samples,
                available: set.available(),
                statistics: baseline.statistics.len(),
                json_bytes: value.to_string().len(),
            };
            writer = writer.drift_baseline(value);
            Some(report)
        }
        None => None,
    };
    Ok((writer, drift))
}

/// The model name from a file name: its stem with characters outside the name rule replaced.
fn default_name(model: &Path) -> String {
    let stem = model
        .file_stem()
        .map(|s| s.to_string_lossy().into_owned())
        .unwrap_or_default();
    let cleaned: String = stem
        .chars()
        .map(|c| {
            if c.is_ascii_alphanumeric() || matches!(c, '-' | '_' | '.') {
                c
            } else {
                '-'
            }
        })
        .collect();
    let trimmed = cleaned.trim_start_matches('.');
    if trimmed.is_empty() {
        "model".into()
    } else {
        trimmed.chars().take(128).collect()
    }
}

fn check_shapes(
    x: &NpyArray,
    y: &NpyArray,
    input_shape: &[usize],
    output_shape: &[usize],
) -> Result<usize, ImportError> {
    let bad = |problem: String| ImportError::Options {
        what: "check arrays",
        problem,
    };
    if x.shape.len() != input_shape.len() + 1 || x.shape[1..] != *input_shape {
        return Err(bad(format!(
            "input array has shape {:?}; the model takes [batch, {}]",
            x.shape,
            join(input_shape)
        )));
    }
    let n = x.shape[0];
    let out_elems: usize = output_shape.iter().product();
    // Accept [n, ...output] or [n, flat] for the reference outputs.
    let y_elems: usize = y.shape.iter().skip(1).product();
    if y.shape.first() != Some(&n) || y_elems != out_elems {
        return Err(bad(format!(
            "output array has shape {:?}; expected [{n}, {}]",
            y.shape,
            join(output_shape)
        )));
    }
    if n == 0 {
        return Err(bad("the arrays hold no samples".into()));
    }
    Ok(n)
}

fn join(d: &[usize]) -> String {
    d.iter()
        .map(|x| x.to_string())
        .collect::<Vec<_>>()
        .join(", ")
}
