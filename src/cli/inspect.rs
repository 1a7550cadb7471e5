//! `convoy inspect`: what a bundle holds, and proof that it is intact.

use std::io::Write;
use std::path::Path;

use serde::Serialize;

use super::{CliError, with_commas};
use crate::bundle::manifest::{InputSpec, OutputKind, spelling};
use crate::bundle::signature::{SignatureProblem, Trust, check_signature};
use crate::bundle::{Bundle, FORMAT_VERSION};
use crate::drift::Baseline;
use crate::engine::{CheckReport, Engine, EngineConfig};
use crate::graph::summary::LayerRow;

#[derive(Serialize)]
struct Report<'a> {
    name: &'a str,
    version: &'a str,
    description: &'a str,
    created: &'a str,
    format_version: u32,
    file_bytes: usize,
    file_sha256: &'a str,
    data_sha256: &'a str,
    /// Always true in a printed report: a bundle whose checksums fail is not printed.
    checksums_verified: bool,
    input: &'a InputSpec,
    output: OutputReport<'a>,
    layers: &'a [LayerRow],
    parameters: u64,
    multiply_adds: u64,
    check_samples: Option<CheckJson>,
    instruction_set: &'static str,
    plan_steps: usize,
    folded: &'a [String],
    provenance: &'a crate::bundle::manifest::Provenance,
    /// The input-drift reference the bundle carries; null when it carries none.
    drift_baseline: Option<BaselineJson>,
    /// The bundle's signature; null when it is unsigned.
    signature: Option<SignatureJson>,
}

/// A signature as inspect sees it: intact or not. Whether its key is trusted is the server's
/// decision (setting trusted_keys).
#[derive(Serialize)]
struct SignatureJson {
    /// The signer's key fingerprint (`ed25519:` and 16 hex digits).
    key: String,
    /// The signature matches the bundle's bytes.
    valid: bool,
}

/// A bundle's drift baseline, as far as inspect reports it.
#[derive(Serialize)]
struct BaselineJson {
    /// Reference samples it was built from.
    samples: Option<u64>,
    /// Statistic names, in schema order.
    statistics: Vec<String>,
    /// Why the stored baseline cannot be used, when it cannot (then the server does not
    /// monitor this version).
    problem: Option<String>,
}

impl BaselineJson {
    fn of(value: &serde_json::Value) -> Self {
        let parsed = serde_json::from_value::<Baseline>(value.clone())
            .map_err(|e| e.to_string())
            .and_then(|b| b.validate().map(|()| b).map_err(|e| e.to_string()));
        match parsed {
            Ok(b) => BaselineJson {
                samples: Some(b.samples),
                statistics: b.statistics.into_iter().map(|s| s.name).collect(),
                problem: None,
            },
            Err(problem) => BaselineJson {
                samples: None,
                statistics: Vec::new(),
                problem: Some(problem),
            },
        }
    }
}

#[derive(Serialize)]
struct OutputReport<'a> {
    shape: &'a [usize],
    kind: OutputKind,
    labels: &'a [String],
}

#[derive(Serialize)]
struct CheckJson {
    samples: usize,
    max_abs_error: f32,
    bound: f32,
    passed: bool,
    produced_by: String,
}

impl From<&CheckReport> for CheckJson {
    fn from(r: &CheckReport) -> Self {
        CheckJson {
            samples: r.samples,
            max_abs_error: r.max_abs_error,
            bound: r.bound,
            passed: r.passed,
            produced_by: r.produced_by.clone(),
        }
    }
}

pub fn inspect(path: &Path, json: bool) -> Result<(), CliError> {
    let bundle = Bundle::open(path)?;
    let engine = Engine::new(&bundle, &EngineConfig::default())?;
    let check = engine.replay_check_samples(&bundle);
    let summary = bundle.summary();
    let m = bundle.manifest();
    let signature_check = check_signature(&bundle, Trust::Embedded);
    let report = Report {
        name: &m.name,
        version: &m.version,
        description: &m.description,
        created: &m.created,
        format_version: FORMAT_VERSION,
        file_bytes: bundle.file_len(),
        file_sha256: bundle.file_sha256(),
        data_sha256: &m.data_sha256,
        checksums_verified: true,
        input: &m.input,
        output: OutputReport {
            shape: bundle.output_shape(),
            kind: m.output.kind,
            labels: &m.output.labels,
        },
        layers: &summary.layers,
        parameters: summary.parameters,
        multiply_adds: summary.multiply_adds,
        check_samples: check.as_ref().map(CheckJson::from),
        instruction_set: engine.plan().isa().name(),
        plan_steps: engine.plan().step_count(),
        folded: engine.plan().folded(),
        provenance: &m.provenance,
        drift_baseline: m.drift_baseline.as_ref().map(BaselineJson::of),
        signature: bundle.signature().map(|block| SignatureJson {
            key: block.fingerprint(),
            valid: signature_check.is_ok(),
        }),
    };
    let text = if json {
        // Plain data: serialising it cannot fail.
        serde_json::to_string_pretty(&report).expect("report serialises") + "\n"
    } else {
        render_text(&report)
    };
    std::io::stdout()
        .write_all(text.as_bytes())
        .map_err(CliError::Stdout)?;
    match (check, signature_check) {
        (Some(r), _) if !r.passed => Err(CliError::CheckFailed {
            max_abs_error: r.max_abs_error,
            bound: r.bound,
        }),
        (_, Err(e)) if e != SignatureProblem::Unsigned => Err(e.into()),
        _ => Ok(()),
    }
}

fn render_text(r: &Report<'_>) -> String {
    let mut s = String::new();
    render_identity(&mut s, r);
    render_input_output(&mut s, r);
    render_layers(&mut s, r);
    render_plan_and_checks(&mut s, r);
    s
}

// Writing to a String cannot fail: the `let _` in the render functions below discard an
// always-Ok result.

/// Name, provenance, file, checksums and signature.
fn render_identity(s: &mut String, r: &Report<'_>) {
    use std::fmt::Write as _;
    let _ = writeln!(s, "model      {} version {}", r.name, r.version);
    if !r.description.is_empty() {
        let _ = writeln!(s, "about      {}", r.description);
    }
    let _ = writeln!(s, "created    {}  by {}", r.created, r.provenance.writer);
    if !r.provenance.source.is_empty() {
        let _ = writeln!(s, "made from  {}", r.provenance.source);
    }
    let _ = writeln!(
        s,
        "file       {} bytes, format {}, sha256 {}",
        with_commas(r.file_bytes as u64),
        r.format_version,
        r.file_sha256
    );
    let _ = writeln!(s, "checksums  verified (header, manifest, data)");
    match &r.signature {
        None => {
            let _ = writeln!(s, "signature  none");
        }
        Some(sig) => {
            let _ = writeln!(
                s,
                "signature  by {} ({})",
                sig.key,
                if sig.valid {
                    "valid"
                } else {
                    "INVALID: the bundle changed after signing"
                }
            );
        }
    }
}

/// The input's shape and image preparation, the output's shape, kind and labels.
fn render_input_output(s: &mut String, r: &Report<'_>) {
    use std::fmt::Write as _;
    let _ = writeln!(s, "input      {:?}", r.input.shape);
    if let Some(img) = &r.input.image {
        let _ = writeln!(
            s,
            "  image    {} {}x{}, resize {}, fit {}, scale {}, mean {:?}, std {:?}",
            spelling(&img.color),
            img.width,
            img.height,
            spelling(&img.resize_filter),
            spelling(&img.fit),
            img.scale,
            img.mean,
            img.std
        );
    }
    let _ = writeln!(
        s,
        "output     {:?} {}",
        r.output.shape,
        spelling(&r.output.kind)
    );
    if !r.output.labels.is_empty() {
        let shown: Vec<&str> = r
            .output
            .labels
            .iter()
            .take(10)
            .map(String::as_str)
            .collect();
        let more = r.output.labels.len().saturating_sub(10);
        let _ = writeln!(
            s,
            "  labels   {}{}",
            shown.join(", "),
            if more > 0 {
                format!(", … ({more} more)")
            } else {
                String::new()
            }
        );
    }
}

/// One line per layer: op, output shape, parameters and multiply-adds, then the totals.
fn render_layers(s: &mut String, r: &Report<'_>) {
    use std::fmt::Write as _;
    let _ = writeln!(s);
    let name_w = r
        .layers
        .iter()
        .map(|l| l.name.len())
        .max()
        .unwrap_or(4)
        .clamp(4, 40);
    let _ = writeln!(
        s,
        "{:<name_w$}  {:<15}  {:<16}  {:>12}  {:>14}",
        "layer", "op", "output", "parameters", "multiply-adds"
    );
    for l in r.layers {
        let shape = format!("{:?}", l.output_shape);
        let _ = writeln!(
            s,
            "{:<name_w$}  {:<15}  {:<16}  {:>12}  {:>14}",
            l.name,
            l.op,
            shape,
            with_commas(l.parameters),
            with_commas(l.multiply_adds)
        );
    }
    let _ = writeln!(
        s,
        "{:<name_w$}  {:<15}  {:<16}  {:>12}  {:>14}",
        "total",
        "",
        "",
        with_commas(r.parameters),
        with_commas(r.multiply_adds)
    );
    let _ = writeln!(s);
}

/// The plan, the stored check samples and the drift baseline.
fn render_plan_and_checks(s: &mut String, r: &Report<'_>) {
    use std::fmt::Write as _;
    let _ = writeln!(
        s,
        "plan       {} steps on {}; {} folded or fused",
        r.plan_steps,
        r.instruction_set,
        r.folded.len()
    );
    match &r.check_samples {
        Some(c) => {
            let _ = writeln!(
                s,
                "check      {} samples replayed: max error {:.2e} (bound {:.2e}) — {}{}",
                c.samples,
                c.max_abs_error,
                c.bound,
                if c.passed { "passed" } else { "FAILED" },
                if c.produced_by.is_empty() {
                    String::new()
                } else {
                    format!("; expected outputs from {}", c.produced_by)
                }
            );
        }
        None => {
            let _ = writeln!(s, "check      none stored in this bundle");
        }
    }
    let _ = writeln!(s, "{}", drift_line(r.drift_baseline.as_ref()));
}

/// The `drift` line: whether the bundle carries a reference for drift monitoring.
fn drift_line(b: Option<&BaselineJson>) -> String {
    match b {
        None => "drift      no baseline (imported without --reference)".into(),
        Some(BaselineJson {
            problem: Some(p), ..
        }) => format!("drift      baseline present but unusable: {p}"),
        Some(b) => format!(
            "drift      baseline from {} reference samples: {} statistics ({})",
            with_commas(b.samples.unwrap_or(0)),
            b.statistics.len(),
            b.statistics.join(", ")
        ),
    }
}
