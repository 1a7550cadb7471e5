//! The loaded models: every version of every model name, its state, and which version answers.
//!
//! A version is loaded by reading and verifying its bundle, planning it, and replaying its
//! check samples; one that fails any step is kept as `Refused` with the reason, so operators
//! can see it (`Catalog`), and never answers. The active version of a model is its highest
//! loaded version (see `bundle::version` for the order).
//!
//! The registry is shared behind a std `RwLock`: lookups take the read lock for a moment to
//! clone an `Arc`, and nothing holds it across an await or a computation.

use std::collections::BTreeMap;
use std::path::{Path, PathBuf};
use std::sync::{Arc, RwLock};

use crate::bundle::manifest::{Manifest, OutputKind};
use crate::bundle::version::compare_versions;
use crate::bundle::{Bundle, BundleError};
use crate::engine::{Engine, EngineConfig};

/// Where a version stands.
#[derive(Clone, Debug, PartialEq, Eq)]
pub enum VersionState {
    /// Verified and able to answer.
    Loaded,
    /// Failed to load; the reason says which step.
    Refused { reason: String },
}

/// One loaded model version: the engine and what clients need to know about it.
pub struct ModelVersion {
    pub name: String,
    pub version: String,
    pub manifest: Manifest,
    pub engine: Engine,
    /// One per output class; class indices as text when the bundle has none.
    pub labels: Vec<String>,
    pub output_kind: OutputKind,
    pub bundle_sha256: String,
    pub parameters: u64,
    pub multiply_adds: u64,
    /// Where it came from: a file, or the binary itself.
    pub origin: String,
}

impl std::fmt::Debug for ModelVersion {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        write!(f, "ModelVersion({} {})", self.name, self.version)
    }
}

impl ModelVersion {
    pub fn input_len(&self) -> usize {
        self.engine.plan().input_len()
    }
    pub fn output_len(&self) -> usize {
        self.engine.plan().output_len()
    }
}

/// A version slot: loaded, or refused (with what is known about it).
#[derive(Clone, Debug)]
pub struct VersionSlot {
    pub version: String,
    pub state: VersionState,
    pub model: Option<Arc<ModelVersion>>,
    pub origin: String,
}

/// All versions of one model name.
#[derive(Clone, Debug, Default)]
pub struct ModelSlot {
    /// Ordered lowest to highest by the version rule.
    pub versions: Vec<VersionSlot>,
}

impl ModelSlot {
    /// The highest loaded version.
    pub fn active(&self) -> Option<&Arc<ModelVersion>> {
        self.versions.iter().rev().find_map(|v| v.model.as_ref())
    }
}

/// Why a lookup failed.
#[derive(Clone, Debug, PartialEq, Eq, thiserror::Error)]
pub enum LookupError {
    #[error("no model is loaded")]
    NoModels,
    #[error("several models are loaded ({available}) and none is the default; name one")]
    NoDefault { available: String },
    #[error("unknown model {name:?}; loaded: {available}")]
    UnknownModel { name: String, available: String },
    #[error("model {name:?} has no version {version:?}; loaded: {available}")]
    UnknownVersion {
        name: String,
        version: String,
        available: String,
    },
    #[error("model {name:?} has no version able to answer")]
    NotServing { name: String },
}

/// The set of models a server answers with.
#[derive(Debug, Default)]
pub struct Registry {
    models: RwLock<BTreeMap<String, ModelSlot>>,
    default_model: Option<String>,
    engine: EngineConfig,
}

/// How one load went, for logs.
#[derive(Clone, Debug)]
pub struct LoadOutcome {
    pub origin: String,
    pub name: Option<String>,
    pub version: Option<String>,
    pub result: Result<(), String>,
}

impl Registry {
    /// An empty registry whose engines use `engine`, answering empty model names with
    /// `default_model` (or the only model loaded).
    pub fn new(engine: EngineConfig, default_model: Option<String>) -> Registry {
        Registry {
            models: RwLock::new(BTreeMap::new()),
            default_model,
            engine,
        }
    }

    /// Loads every `*.cvb` directly inside `dir`, in name order.
    ///
    /// # Errors
    /// The folder cannot be listed. Bad bundles are not errors here: they are recorded as
    /// refused and reported in the outcomes.
    pub fn load_dir(&self, dir: &Path) -> std::io::Result<Vec<LoadOutcome>> {
        let mut files: Vec<PathBuf> = std::fs::read_dir(dir)?
            .filter_map(|e| e.ok().map(|e| e.path()))
            .filter(|p| p.extension().is_some_and(|x| x == "cvb") && p.is_file())
            .collect();
        files.sort();
        Ok(files
            .iter()
            .map(|p| {
                let origin = p.display().to_string();
                self.load(Bundle::open(p), origin)
            })
            .collect())
    }

    /// Loads a bundle held in memory (the demo embedded in the binary, tests).
    pub fn load_bytes(&self, bytes: Vec<u8>, origin: &str) -> LoadOutcome {
        self.load(Bundle::from_bytes(bytes), origin.to_string())
    }

    fn load(&self, bundle: Result<Bundle, BundleError>, origin: String) -> LoadOutcome {
        let bundle = match bundle {
            Ok(b) => b,
            Err(e) => {
                return LoadOutcome {
                    origin,
                    name: None,
                    version: None,
                    result: Err(e.to_string()),
                };
            }
        };
        let name = bundle.manifest().name.clone();
        let version = bundle.manifest().version.clone();
        let result = self.prepare(&bundle, &origin);
        let (state, model, outcome) = match result {
            Ok(m) => (VersionState::Loaded, Some(Arc::new(m)), Ok(())),
            Err(reason) => (
                VersionState::Refused {
                    reason: reason.clone(),
                },
                None,
                Err(reason),
            ),
        };
        let mut models = self.models.write().unwrap_or_else(|p| p.into_inner());
        let slot = models.entry(name.clone()).or_default();
        slot.versions.retain(|v| v.version != version);
        slot.versions.push(VersionSlot {
            version: version.clone(),
            state,
            model,
            origin: origin.clone(),
        });
        slot.versions
            .sort_by(|a, b| compare_versions(&a.version, &b.version));
        LoadOutcome {
            origin,
            name: Some(name),
            version: Some(version),
            result: outcome,
        }
    }

    /// Plans a verified bundle and proves it with its check samples.
    fn prepare(&self, bundle: &Bundle, origin: &str) -> Result<ModelVersion, String> {
        let engine = Engine::new(bundle, &self.engine).map_err(|e| e.to_string())?;
        match engine.replay_check_samples(bundle) {
            Some(r) if !r.passed => {
                return Err(format!(
                    "check samples do not replay: max error {:e} exceeds {:e}",
                    r.max_abs_error, r.bound
                ));
            }
            _ => {}
        }
        let m = bundle.manifest().clone();
        let out_len = engine.plan().output_len();
        let labels = if m.output.labels.is_empty() {
            (0..out_len).map(|i| i.to_string()).collect()
        } else {
            m.output.labels.clone()
        };
        let summary = bundle.summary();
        Ok(ModelVersion {
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
        })
    }

    fn available(models: &BTreeMap<String, ModelSlot>) -> String {
        if models.is_empty() {
            "none".into()
        } else {
            models.keys().cloned().collect::<Vec<_>>().join(", ")
        }
    }

    /// The model name an empty request names.
    pub fn default_model(&self) -> Option<String> {
        let models = self.models.read().unwrap_or_else(|p| p.into_inner());
        match &self.default_model {
            Some(d) => Some(d.clone()),
            None if models.len() == 1 => models.keys().next().cloned(),
            None => None,
        }
    }

    /// Finds the version that answers a request for `name` (empty: the default model) and
    /// `version` (empty: the active one).
    ///
    /// # Errors
    /// Unknown model or version, no default, or no loaded version.
    pub fn resolve(&self, name: &str, version: &str) -> Result<Arc<ModelVersion>, LookupError> {
        let models = self.models.read().unwrap_or_else(|p| p.into_inner());
        if models.is_empty() {
            return Err(LookupError::NoModels);
        }
        let name = if name.is_empty() {
            match &self.default_model {
                Some(d) => d.clone(),
                None if models.len() == 1 => models.keys().next().cloned().unwrap_or_default(),
                None => {
                    return Err(LookupError::NoDefault {
                        available: Self::available(&models),
                    });
                }
            }
        } else {
            name.to_string()
        };
        let slot = models.get(&name).ok_or_else(|| LookupError::UnknownModel {
            name: name.clone(),
            available: Self::available(&models),
        })?;
        if version.is_empty() {
            return slot
                .active()
                .cloned()
                .ok_or(LookupError::NotServing { name });
        }
        slot.versions
            .iter()
            .find(|v| v.version == version)
            .and_then(|v| v.model.clone())
            .ok_or_else(|| LookupError::UnknownVersion {
                name: name.clone(),
                version: version.to_string(),
                available: slot
                    .versions
                    .iter()
                    .filter(|v| v.model.is_some())
                    .map(|v| v.version.clone())
                    .collect::<Vec<_>>()
                    .join(", "),
            })
    }

    /// A copy of every model slot, for the catalog and health.
    pub fn snapshot(&self) -> BTreeMap<String, ModelSlot> {
        self.models
            .read()
            .unwrap_or_else(|p| p.into_inner())
            .clone()
    }
}
