//! The manifest: everything a bundle says about its model, as JSON.

use serde::{Deserialize, Serialize};

use crate::graph::Graph;

/// A manifest enum as the manifest spells it (`logits`, `center_crop`), for reports and the
/// catalog, so the words are the manifest's own.
pub fn spelling<T: Serialize>(v: &T) -> String {
    serde_json::to_value(v)
        .ok()
        .and_then(|j| j.as_str().map(str::to_string))
        .unwrap_or_default()
}

/// The JSON manifest of a bundle.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct Manifest {
    /// Model name: what requests and operators call it. 1 to 128 characters of ASCII letters,
    /// digits, `-`, `_` and `.`.
    pub name: String,
    /// Version; see [`super::version`] for the ordering rule.
    pub version: String,
    #[serde(default)]
    pub description: String,
    /// Creation time, RFC 3339 in UTC (`2026-12-01T23:32:04Z`).
    pub created: String,
    pub input: InputSpec,
    pub output: OutputSpec,
    pub graph: Graph,
    /// Where each tensor lives in the data section.
    pub tensors: Vec<TensorEntry>,
    /// SHA-256 of the whole data section, lower-case hex.
    pub data_sha256: String,
    /// Inputs with the outputs expected from them, replayed by a loader.
    #[serde(default)]
    pub check_samples: Option<CheckSamples>,
    /// Reference statistics for input-drift monitoring; absent until an import fills it.
    #[serde(default)]
    pub drift_baseline: Option<serde_json::Value>,
    pub provenance: Provenance,
}

/// How a request becomes the model's input.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct InputSpec {
    /// Per-sample tensor shape, `[C, H, W]` for images (equal to the graph input's shape).
    pub shape: Vec<usize>,
    /// How an encoded image is prepared; absent when the model takes plain tensors only.
    #[serde(default)]
    pub image: Option<ImagePrep>,
}

/// Colour handling of an image input.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum ColorMode {
    Gray,
    Rgb,
}

impl ColorMode {
    pub fn channels(self) -> usize {
        match self {
            ColorMode::Gray => 1,
            ColorMode::Rgb => 3,
        }
    }
}

/// Interpolation used when an image is resized.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum ResizeFilter {
    Nearest,
    Bilinear,
    Bicubic,
    Lanczos3,
}

/// How an image of another aspect ratio is brought to the target size.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum FitRule {
    /// Resize to exactly width × height, distorting the aspect ratio.
    Stretch,
    /// Resize so the shorter side fits, then cut the centre.
    CenterCrop,
    /// Resize so the longer side fits, then fill the border with zeros (before normalisation).
    Letterbox,
}

/// Image preparation: decode, convert colour, resize and fit, then
/// `value = (pixel · scale - mean[c]) / std[c]` per channel.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct ImagePrep {
    pub color: ColorMode,
    pub width: usize,
    pub height: usize,
    pub resize_filter: ResizeFilter,
    pub fit: FitRule,
    /// Multiplies the 0..255 pixel value first (1/255 maps it to 0..1).
    pub scale: f32,
    pub mean: Vec<f32>,
    pub std: Vec<f32>,
}

/// What the graph's output means.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum OutputKind {
    /// Unnormalised scores; a server applies softmax to report probabilities.
    Logits,
    /// Already probabilities (the graph ends in softmax or sigmoid).
    Probabilities,
}

/// The model's answer.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct OutputSpec {
    /// One label per output element; empty means "use the class indices".
    #[serde(default)]
    pub labels: Vec<String>,
    pub kind: OutputKind,
}

/// Element type of a stored tensor. Only f32 for now; the field exists so the format can grow.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize, Deserialize)]
#[serde(rename_all = "snake_case")]
pub enum DType {
    F32,
}

impl DType {
    pub fn size(self) -> u64 {
        match self {
            DType::F32 => 4,
        }
    }
}

/// Where one tensor lives: `length` bytes at `offset` from the start of the data section.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct TensorEntry {
    pub name: String,
    pub dtype: DType,
    pub shape: Vec<usize>,
    pub offset: u64,
    pub length: u64,
}

/// Check samples: tensor `input` is `[count, ...input shape]`, tensor `output` is
/// `[count, ...output shape]`; replaying the inputs must give the outputs within
/// [`CHECK_TOLERANCE`](super::CHECK_TOLERANCE).
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct CheckSamples {
    pub input: String,
    pub output: String,
    pub count: usize,
    /// Where the expected outputs came from (e.g. "pytorch 2.9.1" or "convoy 0.1.0").
    #[serde(default)]
    pub produced_by: String,
}

/// Where a bundle came from.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct Provenance {
    /// What it was made from (a file name, a training run).
    pub source: String,
    /// The program that wrote it, e.g. `convoy 0.1.0`.
    pub writer: String,
}
