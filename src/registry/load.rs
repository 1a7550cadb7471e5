//! Loading one version: the steps a bundle passes before it may answer, and why one was refused.
//!
//! read (the caller's file I/O) → verify (structure and checksums, [`Bundle::from_bytes`]) →
//! signature (only when trusted keys are set: signed by one of them,
//! [`crate::bundle::signature::check_signature`]) → plan ([`Engine::new`]) → check samples (replayed; the stored outputs must come back) →
//! warm up (one batch at each size the scheduler will use, so the first real request does not
//! pay for workspace allocation). A version that passes every step is a [`ModelVersion`];
//! one that fails is a [`Refusal`] naming the step.

use std::sync::atomic::AtomicBool;
use std::time::Instant;

use super::ModelVersion;
use crate::bundle::signature::{PublicKey, Trust, check_signature};
use crate::bundle::{Bundle, BundleError, peek_identity};
use crate::drift::{Monitor, WindowConfig};
use crate::engine::{Engine, EngineConfig, RunOptions};

/// The step at which a bundle was refused. Also the `step` label of the refusal metric, so the
/// list is short and fixed.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Hash)]
pub enum LoadStep {
    /// The file could not be read (or changed while it was read).
    Read,
    /// The bytes are not a valid bundle: truncated, a checksum mismatch, an unknown op.
    Verify,
    /// Trusted keys are set and the bundle is unsigned, signed by another key, or its
    /// signature does not verify.
    Signature,
    /// The engine could not plan it for this CPU.
    Plan,
    /// Replaying its check samples did not give the stored outputs.
    CheckSamples,
    /// The warm-up batch failed.
    WarmUp,
    /// Another file already holds this model version.
    Conflict,
}

impl LoadStep {
    pub const ALL: [LoadStep; 7] = [
        LoadStep::Read,
        LoadStep::Verify,
        LoadStep::Signature,
        LoadStep::Plan,
        LoadStep::CheckSamples,
        LoadStep::WarmUp,
        LoadStep::Conflict,
    ];

    pub fn as_str(self) -> &'static str {
        match self {
            LoadStep::Read => "read",
            LoadStep::Verify => "verify",
            LoadStep::Signature => "signature",
            LoadStep::Plan => "plan",
            LoadStep::CheckSamples => "check_samples",
            LoadStep::WarmUp => "warm_up",
            LoadStep::Conflict => "conflict",
        }
    }
}

impl std::fmt::Display for LoadStep {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.write_str(self.as_str())
    }
}

/// Why a bundle may not answer.
#[derive(Clone, Debug, PartialEq, Eq, thiserror::Error)]
#[error("{step}: {reason}")]
pub struct Refusal {
    pub step: LoadStep,
    pub reason: String,
}

impl Refusal {
    pub fn new(step: LoadStep, reason: impl Into<String>) -> Refusal {
        Refusal {
            step,
            reason: reason.into(),
        }
    }
}

/// How versions are built: the engine settings and the batch sizes of the warm-up.
#[derive(Clone, Debug)]
pub struct LoadSettings {
    pub engine: EngineConfig,
    /// One warm-up batch of each size (each at most `engine.max_batch`).
    pub warm_up_batches: Vec<usize>,
    /// The drift window of versions whose bundle carries a reference; `None`: drift
    /// monitoring off.
    pub drift: Option<WindowConfig>,
    /// When not empty, only bundles signed by one of these keys are loaded.
    pub trusted_keys: Vec<PublicKey>,
}

impl Default for LoadSettings {
    fn default() -> Self {
        LoadSettings {
            engine: EngineConfig::default(),
            warm_up_batches: vec![1],
            drift: Some(WindowConfig::default()),
            trusted_keys: Vec::new(),
        }
    }
}

/// The result of loading one bundle.
#[derive(Debug)]
pub struct Attempt {
    /// The model name and version the bundle claims; `None` when not even its manifest reads.
    pub identity: Option<(String, String)>,
    /// SHA-256 of the whole file, lower-case hex.
    pub bundle_sha256: String,
    pub result: Result<ModelVersion, Refusal>,
    /// Time the steps took.
    pub took: std::time::Duration,
}

/// Runs every step after reading on `bytes`. CPU work (hashing, planning, running the check
/// samples and the warm-up): call it from a blocking thread, never from an async task.
pub fn load_version(bytes: Vec<u8>, origin: &str, settings: &LoadSettings) -> Attempt {
    let started = Instant::now();
    let identity = peek_identity(&bytes);
    let (bundle, sha) = match Bundle::from_bytes(bytes) {
        Ok(b) => {
            let sha = b.file_sha256().to_string();
            (b, sha)
        }
        Err(e) => {
            return Attempt {
                identity,
                bundle_sha256: String::new(),
                result: Err(verify_refusal(&e)),
                took: started.elapsed(),
            };
        }
    };
    let identity = Some((
        bundle.manifest().name.clone(),
        bundle.manifest().version.clone(),
    ));
    let result = build(&bundle, origin, settings);
    Attempt {
        identity,
        bundle_sha256: sha,
        result,
        took: started.elapsed(),
    }
}

fn verify_refusal(e: &BundleError) -> Refusal {
    match e {
        BundleError::Io { .. } => Refusal::new(LoadStep::Read, e.to_string()),
        _ => Refusal::new(LoadStep::Verify, e.to_string()),
    }
}

fn build(bundle: &Bundle, origin: &str, settings: &LoadSettings) -> Result<ModelVersion, Refusal> {
    if !settings.trusted_keys.is_empty() {
        let signer = check_signature(bundle, Trust::Keys(&settings.trusted_keys))
            .map_err(|e| Refusal::new(LoadStep::Signature, e.to_string()))?;
        tracing::debug!(model = %bundle.manifest().name, version = %bundle.manifest().version, %signer, "signature verified");
    }
    let engine = Engine::new(bundle, &settings.engine)
        .map_err(|e| Refusal::new(LoadStep::Plan, e.to_string()))?;
    if let Some(r) = engine.replay_check_samples(bundle)
        && !r.passed
    {
        return Err(Refusal::new(
            LoadStep::CheckSamples,
            format!(
                "check samples do not replay: max error {:e} exceeds {:e}",
                r.max_abs_error, r.bound
            ),
        ));
    }
    let in_len = engine.plan().input_len();
    for &n in &settings.warm_up_batches {
        let n = n.clamp(1, settings.engine.max_batch.max(1));
        engine
            .run(&vec![0.0; n * in_len], n, RunOptions::default())
            .map_err(|e| Refusal::new(LoadStep::WarmUp, e.to_string()))?;
    }
    let m = bundle.manifest().clone();
    let out_len = engine.plan().output_len();
    let labels = if m.output.labels.is_empty() {
        (0..out_len).map(|i| i.to_string()).collect()
    } else {
        m.output.labels.clone()
    };
    let summary = bundle.summary();
    // A reference that cannot be used turns monitoring off for this version, with a note; it
    // is no reason to refuse a model that passed every other step.
    let (drift, drift_note) = match (&m.drift_baseline, &settings.drift) {
        (None, _) => (
            None,
            "the bundle carries no drift reference (import it with --reference)".to_string(),
        ),
        (Some(_), None) => (
            None,
            "drift monitoring is off (setting drift_monitoring)".to_string(),
        ),
        (Some(b), Some(window)) => match Monitor::new(&m, out_len, b, *window) {
            Ok(monitor) => (Some(monitor), String::new()),
            Err(e) => {
                tracing::warn!(model = %m.name, version = %m.version, error = %e, "drift monitoring off");
                (None, format!("drift monitoring is off: {e}"))
            }
        },
    };
    Ok(ModelVersion {
        drift,
        drift_note,
        name: m.name.clone(),
        version: m.version.clone(),
        output_kind: m.output.kind,
        manifest: m,
        engine,
        labels,
        bundle_sha256: bundle.file_sha256().to_string(),
        parameters: summary.parameters,
        multiply_adds: summary.multiply_adds,
        origin: origin.to_string(),
        retired: AtomicBool::new(false),
    })
}
