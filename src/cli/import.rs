//! `convoy import`: an ONNX file from a training framework → a verified bundle.

use std::io::Write;
use std::path::{Path, PathBuf};

use super::{CliError, with_commas};
use crate::bundle::manifest::{ColorMode, FitRule, ResizeFilter};
use crate::import::{
    BaselineReport, ImageOptions, ImportError, ImportOptions, ImportReport, import_onnx,
};
use crate::npy::read_npy_file;

/// Image options as given on the command line; any one of them makes the input an image.
#[derive(Clone, Debug, Default, clap::Args)]
pub struct ImageArgs {
    /// The input is an image: decode, resize and normalise it as the other image options say.
    #[arg(long)]
    pub image: bool,
    /// Colour handling (default: from the model's channel count).
    #[arg(long, value_enum)]
    pub color: Option<ColorArg>,
    /// Target size as WIDTHxHEIGHT (default: the model's input size).
    #[arg(long, value_name = "WxH")]
    pub size: Option<String>,
    /// Resize filter.
    #[arg(long, value_enum)]
    pub resize_filter: Option<FilterArg>,
    /// How an image of another aspect ratio is fitted.
    #[arg(long, value_enum)]
    pub fit: Option<FitArg>,
    /// Multiplier applied to 0..255 pixel values first (default 1/255).
    #[arg(long)]
    pub scale: Option<f32>,
    /// Per-channel mean subtracted after scaling, comma-separated (default 0).
    #[arg(long, value_delimiter = ',')]
    pub mean: Option<Vec<f32>>,
    /// Per-channel standard deviation divided by, comma-separated (default 1).
    #[arg(long, value_delimiter = ',')]
    pub std: Option<Vec<f32>>,
}

#[derive(Clone, Copy, Debug, clap::ValueEnum)]
pub enum ColorArg {
    Gray,
    Rgb,
}

#[derive(Clone, Copy, Debug, clap::ValueEnum)]
pub enum FilterArg {
    Nearest,
    Bilinear,
    Bicubic,
    Lanczos3,
}

#[derive(Clone, Copy, Debug, clap::ValueEnum)]
pub enum FitArg {
    Stretch,
    CenterCrop,
    Letterbox,
}

impl ImageArgs {
    fn wanted(&self) -> bool {
        self.image
            || self.color.is_some()
            || self.size.is_some()
            || self.resize_filter.is_some()
            || self.fit.is_some()
            || self.scale.is_some()
            || self.mean.is_some()
            || self.std.is_some()
    }
}

/// Everything `convoy import` takes.
#[derive(Clone, Debug, clap::Args)]
pub struct ImportArgs {
    /// The ONNX file (external data files are read from its folder).
    pub model: PathBuf,
    /// Where to write the bundle.
    #[arg(long, short = 'o')]
    pub output: PathBuf,
    /// Model name (default: the file name).
    #[arg(long)]
    pub name: Option<String>,
    /// Model version (default 1).
    #[arg(long)]
    pub version: Option<String>,
    /// A sentence about the model.
    #[arg(long, default_value = "")]
    pub description: String,
    /// Text file with one class label per line, in output order.
    #[arg(long)]
    pub labels: Option<PathBuf>,
    #[command(flatten)]
    pub image: ImageArgs,
    /// Reference inputs (.npy, first axis = batch) from the training framework.
    #[arg(long, requires = "check_output")]
    pub check_input: Option<PathBuf>,
    /// The training framework's outputs for --check-input (.npy).
    #[arg(long, requires = "check_input")]
    pub check_output: Option<PathBuf>,
    /// Reference data for input-drift monitoring, run through the model into a baseline the
    /// bundle carries: a folder of images (files in it and one subfolder level down, such as
    /// train/<class>/*.png) or a .npy of prepared inputs (first axis = samples).
    #[arg(long, value_name = "PATH")]
    pub reference: Option<PathBuf>,
    /// Use at most N reference samples, evenly spaced over the sorted set.
    #[arg(long, value_name = "N", requires = "reference")]
    pub reference_limit: Option<usize>,
}

fn options_error(what: &'static str, problem: impl Into<String>) -> CliError {
    CliError::Import(ImportError::Options {
        what,
        problem: problem.into(),
    })
}

fn read_labels(path: &Path) -> Result<Vec<String>, CliError> {
    let text = std::fs::read_to_string(path).map_err(|source| {
        CliError::Import(ImportError::Io {
            path: path.to_path_buf(),
            source,
        })
    })?;
    let mut labels: Vec<String> = text.lines().map(|l| l.trim().to_string()).collect();
    while labels.last().is_some_and(String::is_empty) {
        labels.pop();
    }
    if labels.is_empty() {
        return Err(options_error(
            "--labels",
            format!("{} holds no labels", path.display()),
        ));
    }
    if let Some(i) = labels.iter().position(String::is_empty) {
        return Err(options_error(
            "--labels",
            format!("line {} is empty; give one label per class", i + 1),
        ));
    }
    Ok(labels)
}

/// The image options from the flags; what is left out follows the model (see
/// `ImageOptions::resolve`).
fn image_options(args: &ImageArgs) -> Result<Option<ImageOptions>, CliError> {
    if !args.wanted() {
        return Ok(None);
    }
    let size = match &args.size {
        None => None,
        Some(s) => {
            let parsed = s
                .split_once(['x', 'X'])
                .and_then(|(w, h)| Some((w.parse().ok()?, h.parse().ok()?)));
            Some(parsed.ok_or_else(|| {
                options_error("--size", format!("{s:?} is not WIDTHxHEIGHT, e.g. 224x224"))
            })?)
        }
    };
    Ok(Some(ImageOptions {
        color: args.color.map(|c| match c {
            ColorArg::Gray => ColorMode::Gray,
            ColorArg::Rgb => ColorMode::Rgb,
        }),
        size,
        resize_filter: args.resize_filter.map(|f| match f {
            FilterArg::Nearest => ResizeFilter::Nearest,
            FilterArg::Bilinear => ResizeFilter::Bilinear,
            FilterArg::Bicubic => ResizeFilter::Bicubic,
            FilterArg::Lanczos3 => ResizeFilter::Lanczos3,
        }),
        fit: args.fit.map(|f| match f {
            FitArg::Stretch => FitRule::Stretch,
            FitArg::CenterCrop => FitRule::CenterCrop,
            FitArg::Letterbox => FitRule::Letterbox,
        }),
        scale: args.scale,
        mean: args.mean.clone(),
        std: args.std.clone(),
    }))
}

pub fn import(args: &ImportArgs) -> Result<(), CliError> {
    let labels = args.labels.as_deref().map(read_labels).transpose()?;
    let image = image_options(&args.image)?;
    let check = match (&args.check_input, &args.check_output) {
        (Some(x), Some(y)) => Some((read_npy_file(x)?, read_npy_file(y)?)),
        _ => None,
    };
    let check_source = match (&args.check_input, &args.check_output) {
        (Some(x), Some(y)) => format!("reference arrays {} / {}", file_name(x), file_name(y)),
        _ => String::new(),
    };
    let options = ImportOptions {
        name: args.name.clone(),
        version: args.version.clone(),
        description: args.description.clone(),
        labels,
        image,
        check,
        check_source,
        reference: args.reference.clone(),
        reference_limit: args.reference_limit,
    };
    let mut stderr = std::io::stderr();
    let mut progress = |line: &str| {
        let _ = writeln!(stderr, "convoy import: {line}");
    };
    let report = import_onnx(&args.model, &args.output, &options, &mut progress)?;
    std::io::stdout()
        .write_all(render(&report).as_bytes())
        .map_err(CliError::Stdout)
}

fn file_name(p: &Path) -> String {
    p.file_name()
        .map(|f| f.to_string_lossy().into_owned())
        .unwrap_or_default()
}

/// The import printout.
fn render(r: &ImportReport) -> String {
    use std::fmt::Write as _;
    let mut s = String::new();
    // Writing to a String cannot fail.
    let _ = writeln!(
        s,
        "wrote {} ({} bytes): model {} version {}",
        r.output.display(),
        r.file_bytes,
        r.name,
        r.version
    );
    let _ = writeln!(
        s,
        "  from       ONNX opset {}{}",
        r.opset,
        if r.producer.is_empty() {
            String::new()
        } else {
            format!(", exported by {}", r.producer)
        }
    );
    let _ = writeln!(
        s,
        "  input      {:?}   output {:?} ({})",
        r.input_shape,
        r.output_shape,
        crate::bundle::manifest::spelling(&r.output_kind)
    );
    let ops: Vec<String> = r
        .source_ops
        .iter()
        .map(|(op, n)| format!("{op} ×{n}"))
        .collect();
    let _ = writeln!(s, "  ops        {}", ops.join(", "));
    let _ = writeln!(
        s,
        "  totals     {} parameters, {} multiply-adds",
        with_commas(r.parameters),
        with_commas(r.multiply_adds)
    );
    let _ = writeln!(
        s,
        "  folded     {} nodes evaluated at import; {} rewrites and fusions",
        r.folded_nodes,
        r.notes.len()
    );
    if r.check_from_reference {
        let _ = writeln!(
            s,
            "  check      {} reference samples reproduced: max error {:.2e} (bound {:.2e})",
            r.check_samples, r.max_abs_error, r.bound
        );
    } else {
        let _ = writeln!(
            s,
            "  check      no reference arrays given; stored {} generated samples with convoy's outputs",
            r.check_samples
        );
    }
    let _ = writeln!(s, "{}", drift_line(r.drift.as_ref()));
    s
}

/// The `drift` line of the printout.
fn drift_line(d: Option<&BaselineReport>) -> String {
    let Some(d) = d else {
        return "  drift      no baseline (no --reference given): the server will not monitor input drift"
            .into();
    };
    let what = if d.images {
        "reference images"
    } else {
        "reference samples"
    };
    let of = if (d.samples as usize) < d.available {
        format!(
            "{} of {} {what} (evenly spaced)",
            with_commas(d.samples),
            with_commas(d.available as u64)
        )
    } else {
        format!("{} {what}", with_commas(d.samples))
    };
    format!(
        "  drift      baseline from {of}: {} statistics, {} bytes of JSON",
        d.statistics,
        with_commas(d.json_bytes as u64)
    )
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn drift_line_says_what_the_baseline_is() {
        let mut d = BaselineReport {
            reference: PathBuf::from("train"),
            images: true,
            samples: 2000,
            available: 8000,
            statistics: 8,
            json_bytes: 12345,
        };
        assert_eq!(
            drift_line(Some(&d)),
            "  drift      baseline from 2,000 of 8,000 reference images (evenly spaced): 8 \
             statistics, 12,345 bytes of JSON"
        );
        d.available = 2000;
        d.images = false;
        assert!(drift_line(Some(&d)).contains("from 2,000 reference samples: 8 statistics"));
        assert!(drift_line(None).contains("no baseline"));
    }
}
