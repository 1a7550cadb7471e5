//! The model versions a server knows: every version of every model name, its state, and which
//! version answers requests that name none.
//!
//! A version is built by [`load::load_version`] (verify, plan, check samples, warm up); one that
//! fails any step is kept as [`VersionState::Refused`] with the step and reason, so operators
//! can see it and it never answers. Which version is active follows [`policy`]: a pinned
//! version, else the highest one available. Becoming active is one pointer swap under the write
//! lock; a version that stops being needed is handed back to the caller (the rollout), which
//! retires its queue, and its memory is freed when the last batch holding it finishes.
//!
//! The registry is shared behind a std `RwLock`: lookups take the read lock for a moment to
//! clone an `Arc`, and nothing holds it across an await or a computation. Loading happens
//! outside the lock.

pub mod load;
pub mod policy;

use std::collections::BTreeMap;
use std::path::{Path, PathBuf};
use std::sync::atomic::{AtomicBool, Ordering};
use std::sync::{Arc, RwLock};

use crate::bundle::manifest::{Manifest, OutputKind};
use crate::bundle::version::compare_versions;
use crate::engine::Engine;
pub use load::{Attempt, LoadSettings, LoadStep, Refusal, load_version};
pub use policy::Policy;

/// Where a version stands.
#[derive(Clone, Debug, PartialEq, Eq)]
pub enum VersionState {
    /// Being read, verified, planned and warmed up.
    Loading,
    /// Verified and able to answer (the model's active version, or one kept beside it).
    Ready,
    /// Failed a load step; never answers.
    Refused(Refusal),
    /// Was ready and has been released; `reason` says why. Can be loaded again from its file.
    Retired { reason: String },
}

impl VersionState {
    /// The word `Catalog` shows (`active` is decided by the model, not the version).
    pub fn word(&self) -> &'static str {
        match self {
            VersionState::Loading => "loading",
            VersionState::Ready => "loaded",
            VersionState::Refused(_) => "refused",
            VersionState::Retired { .. } => "retired",
        }
    }
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
    /// Drift monitoring, when the bundle carries a reference and monitoring is on.
    pub drift: Option<crate::drift::Monitor>,
    /// Why `drift` is `None`.
    pub drift_note: String,
    /// Set once the registry no longer hands this version out; the scheduler then takes no new
    /// work for it (see `Scheduler::retire`).
    pub(crate) retired: AtomicBool,
}

impl std::fmt::Debug for ModelVersion {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        write!(f, "ModelVersion({} {})", self.name, self.version)
    }
}

impl Drop for ModelVersion {
    /// The last holder let go: the registry, every queue and every batch are done with it.
    fn drop(&mut self) {
        tracing::info!(model = %self.name, version = %self.version, "released from memory");
    }
}

impl ModelVersion {
    pub fn input_len(&self) -> usize {
        self.engine.plan().input_len()
    }
    pub fn output_len(&self) -> usize {
        self.engine.plan().output_len()
    }
    /// Whether the registry has stopped handing this version out.
    pub fn is_retired(&self) -> bool {
        self.retired.load(Ordering::Acquire)
    }
}

/// A version slot: what is known about one version, loaded or not.
#[derive(Clone, Debug)]
pub struct VersionSlot {
    pub version: String,
    pub state: VersionState,
    /// Present exactly when the state is `Ready`.
    pub model: Option<Arc<ModelVersion>>,
    /// Where it came from: a file path, or a name for bundles given as bytes.
    pub origin: String,
    /// The bundle file it came from; `None` for bundles given as bytes.
    pub file: Option<PathBuf>,
    /// Whether that file is still in the models folder.
    pub file_present: bool,
    /// SHA-256 of the bundle file (empty when it could not be read).
    pub bundle_sha256: String,
    /// Retired by an operator: not chosen automatically again until it is activated or its
    /// file changes.
    pub held_back: bool,
    /// A later problem that did not change the state (a newer copy of the same version that
    /// was refused, a removed file kept because it is the last version), for `Catalog`.
    pub note: String,
}

/// All versions of one model name.
#[derive(Clone, Debug, Default)]
pub struct ModelSlot {
    /// Ordered lowest to highest by the version rule.
    pub versions: Vec<VersionSlot>,
    /// The version that answers requests naming none.
    pub active: Option<Arc<ModelVersion>>,
    /// A version held active by configuration or an operator, whatever higher ones exist.
    pub pinned: Option<String>,
    /// The version active before the current one: the rollback target when kept loaded.
    pub previous: Option<String>,
}

impl ModelSlot {
    /// The version that answers requests naming none.
    pub fn active(&self) -> Option<&Arc<ModelVersion>> {
        self.active.as_ref()
    }

    pub fn get(&self, version: &str) -> Option<&VersionSlot> {
        self.versions.iter().find(|v| v.version == version)
    }

    fn get_mut(&mut self, version: &str) -> Option<&mut VersionSlot> {
        self.versions.iter_mut().find(|v| v.version == version)
    }

    /// Inserts or replaces the slot of `v.version`, keeping the order.
    fn put(&mut self, v: VersionSlot) {
        self.versions.retain(|s| s.version != v.version);
        self.versions.push(v);
        self.versions
            .sort_by(|a, b| compare_versions(&a.version, &b.version));
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
    #[error("model {name:?} has no loaded version {version:?}; loaded: {available}")]
    UnknownVersion {
        name: String,
        version: String,
        available: String,
    },
    #[error("model {name:?} has no version able to answer")]
    NotServing { name: String },
}

/// A bundle file whose manifest could not even be read, so it belongs to no model.
#[derive(Clone, Debug, PartialEq, Eq)]
pub struct Unreadable {
    pub origin: String,
    pub refusal: Refusal,
}

/// What [`Registry::settle`] changed.
#[derive(Debug, Default)]
pub struct Settled {
    /// `(from, to)` when the active version changed.
    pub switched: Option<(Option<String>, String)>,
    /// Versions no longer held by the registry, each with the reason; the caller retires
    /// their queues.
    pub released: Vec<(Arc<ModelVersion>, String)>,
}

/// The versions a server answers with.
#[derive(Debug)]
pub struct Registry {
    models: RwLock<BTreeMap<String, ModelSlot>>,
    unreadable: RwLock<BTreeMap<String, Refusal>>,
    default_model: Option<String>,
    policy: Policy,
    settings: LoadSettings,
}

/// How one load went, for logs, metrics and the control service.
#[derive(Clone, Debug)]
pub struct LoadOutcome {
    pub origin: String,
    pub name: Option<String>,
    pub version: Option<String>,
    pub result: Result<(), Refusal>,
    pub took: std::time::Duration,
}

/// Retired versions whose file is gone are kept for `Catalog` up to this many per model
/// (oldest dropped first): enough to see what was recently taken away, bounded in memory.
const RETIRED_HISTORY: usize = 8;

impl Registry {
    /// An empty registry, answering empty model names with `default_model` (or the only model
    /// loaded).
    pub fn new(settings: LoadSettings, policy: Policy, default_model: Option<String>) -> Registry {
        Registry {
            models: RwLock::new(BTreeMap::new()),
            unreadable: RwLock::new(BTreeMap::new()),
            default_model,
            policy,
            settings,
        }
    }

    pub fn settings(&self) -> &LoadSettings {
        &self.settings
    }

    pub fn policy(&self) -> &Policy {
        &self.policy
    }

    /// Loads a bundle held in memory (the demo built into the binary, tests) and makes the
    /// model's versions settle. Runs the load on the calling thread.
    pub fn load_bytes(&self, bytes: Vec<u8>, origin: &str) -> (LoadOutcome, Settled) {
        let attempt = load_version(bytes, origin, &self.settings);
        let outcome = self.record(attempt, origin, None);
        let settled = match &outcome.name {
            Some(name) => self.settle(name),
            None => Settled::default(),
        };
        (outcome, settled)
    }

    /// Marks `name` `version` as loading (health reports a model with nothing else ready as
    /// not serving). Leaves a ready copy of the same version alone.
    pub fn mark_loading(&self, name: &str, version: &str, origin: &str) {
        let mut models = self.write();
        let slot = models.entry(name.to_string()).or_insert_with(|| ModelSlot {
            pinned: self.policy.pins.get(name).cloned(),
            ..ModelSlot::default()
        });
        if slot.get(version).is_some_and(|v| v.model.is_some()) {
            return;
        }
        slot.put(VersionSlot {
            version: version.to_string(),
            state: VersionState::Loading,
            model: None,
            origin: origin.to_string(),
            file: None,
            file_present: false,
            bundle_sha256: String::new(),
            held_back: false,
            note: String::new(),
        });
    }

    /// Records a load attempt. `file` is the bundle file it came from, if any.
    ///
    /// A refused attempt for a version that is already ready (a damaged copy of the same
    /// version) leaves the ready one answering and notes the refusal on it.
    pub fn record(&self, attempt: Attempt, origin: &str, file: Option<&Path>) -> LoadOutcome {
        let Attempt {
            identity,
            bundle_sha256,
            result,
            took,
        } = attempt;
        let outcome = |result: Result<(), Refusal>| LoadOutcome {
            origin: origin.to_string(),
            name: identity.as_ref().map(|(n, _)| n.clone()),
            version: identity.as_ref().map(|(_, v)| v.clone()),
            result,
            took,
        };
        let Some((name, version)) = identity.clone() else {
            let refusal = match result {
                Err(r) => r,
                // A version always has an identity; keep the type total anyway.
                Ok(_) => Refusal::new(LoadStep::Verify, "the bundle names no model"),
            };
            self.unreadable
                .write()
                .unwrap_or_else(|p| p.into_inner())
                .insert(origin.to_string(), refusal.clone());
            return outcome(Err(refusal));
        };
        self.forget_unreadable(origin);
        let mut models = self.write();
        let slot = models.entry(name.clone()).or_insert_with(|| ModelSlot {
            pinned: self.policy.pins.get(&name).cloned(),
            ..ModelSlot::default()
        });
        let existing = slot.get(&version).cloned();
        // The same version from another file that is in use: the first one stays.
        if let Some(e) = &existing
            && e.model.is_some()
            && e.file_present
            && e.file.as_deref() != file
        {
            let refusal = Refusal::new(
                LoadStep::Conflict,
                format!(
                    "version {version} of {name} is already loaded from {}",
                    e.origin
                ),
            );
            return outcome(Err(refusal));
        }
        // The slot of this attempt, from this file.
        let fresh = |state, model| VersionSlot {
            version: version.clone(),
            state,
            model,
            origin: origin.to_string(),
            file: file.map(Path::to_path_buf),
            file_present: file.is_some(),
            bundle_sha256: bundle_sha256.clone(),
            held_back: false,
            note: String::new(),
        };
        match result {
            Ok(model) => {
                slot.put(fresh(VersionState::Ready, Some(Arc::new(model))));
                outcome(Ok(()))
            }
            Err(refusal) => {
                if let Some(mut e) = existing.filter(|e| e.model.is_some()) {
                    e.note = format!("a newer copy was refused: {refusal}");
                    if let Some(f) = file {
                        e.file = Some(f.to_path_buf());
                        e.file_present = true;
                    }
                    slot.put(e);
                } else {
                    slot.put(fresh(VersionState::Refused(refusal.clone()), None));
                }
                outcome(Err(refusal))
            }
        }
    }

    fn forget_unreadable(&self, origin: &str) {
        self.unreadable
            .write()
            .unwrap_or_else(|p| p.into_inner())
            .remove(origin);
    }

    /// The bundle file at `path` is gone. Its version stops being a candidate; returns the
    /// model names touched (the caller settles them). Loading or refused versions from that
    /// file are forgotten; retired ones stay for `Catalog` (see `RETIRED_HISTORY`).
    pub fn file_removed(&self, path: &Path) -> Vec<String> {
        self.forget_unreadable(&path.display().to_string());
        let mut touched = Vec::new();
        let mut models = self.write();
        for (name, slot) in models.iter_mut() {
            let before = slot.versions.len();
            slot.versions.retain(|v| {
                v.file.as_deref() != Some(path)
                    || !matches!(v.state, VersionState::Refused(_) | VersionState::Loading)
            });
            let mut hit = slot.versions.len() != before;
            for v in slot.versions.iter_mut() {
                if v.file.as_deref() == Some(path) && v.file_present {
                    v.file_present = false;
                    hit = true;
                }
            }
            if hit {
                touched.push(name.clone());
            }
        }
        touched
    }

    /// Runs `change` on the slot of `name` and, when `version` is given, checks that the
    /// registry knows that version first.
    fn change_slot(
        &self,
        name: &str,
        version: Option<&str>,
        change: impl FnOnce(&mut ModelSlot),
    ) -> Result<(), LookupError> {
        let mut models = self.write();
        let available = Self::available(&models);
        let slot = models
            .get_mut(name)
            .ok_or_else(|| LookupError::UnknownModel {
                name: name.to_string(),
                available,
            })?;
        if let Some(version) = version
            && slot.get(version).is_none()
        {
            return Err(LookupError::UnknownVersion {
                name: name.to_string(),
                version: version.to_string(),
                available: join(slot.versions.iter().map(|v| v.version.clone()).collect()),
            });
        }
        change(slot);
        Ok(())
    }

    /// Holds `version` active (`Some`) or lets the model follow its highest version again
    /// (`None`). The caller then settles the model.
    ///
    /// # Errors
    /// Unknown model, or a version the registry knows nothing of.
    pub fn pin(&self, name: &str, version: Option<&str>) -> Result<(), LookupError> {
        self.change_slot(name, version, |slot| {
            if let Some(v) = version.and_then(|v| slot.get_mut(v)) {
                v.held_back = false;
            }
            slot.pinned = version.map(str::to_string);
        })
    }

    /// An operator takes `version` out of service (`held`): it is not chosen automatically
    /// again until activated or its file changes. The caller then settles the model, which
    /// releases it (unless it is the last version able to answer and the policy keeps that
    /// one). `held = false` undoes it.
    ///
    /// # Errors
    /// Unknown model or version.
    pub fn set_held_back(&self, name: &str, version: &str, held: bool) -> Result<(), LookupError> {
        self.change_slot(name, Some(version), |slot| {
            if let Some(v) = slot.get_mut(version) {
                v.held_back = held;
            }
            if held && slot.pinned.as_deref() == Some(version) {
                slot.pinned = None;
            }
        })
    }

    /// What the policy wants active for `name` now.
    pub fn desired(&self, name: &str) -> policy::Desired {
        let models = self.read();
        match models.get(name) {
            Some(slot) => policy::desired(slot),
            None => policy::Desired::Nothing,
        }
    }

    /// Marks a version that the policy wanted loaded but could not be (its file vanished
    /// before it was read) as no longer a candidate.
    pub fn drop_candidate(&self, name: &str, version: &str) {
        let mut models = self.write();
        if let Some(v) = models.get_mut(name).and_then(|s| s.get_mut(version)) {
            v.file_present = false;
        }
    }

    /// Makes the desired ready version active (one pointer swap) and releases versions no
    /// longer needed. Call after [`Registry::desired`] says nothing needs loading.
    pub fn settle(&self, name: &str) -> Settled {
        let mut models = self.write();
        let Some(slot) = models.get_mut(name) else {
            return Settled::default();
        };
        let settled = policy::settle(slot, &self.policy);
        // Trim the history of versions that can never come back.
        let gone: Vec<String> = slot
            .versions
            .iter()
            .filter(|v| !v.file_present && matches!(v.state, VersionState::Retired { .. }))
            .map(|v| v.version.clone())
            .collect();
        if gone.len() > RETIRED_HISTORY {
            let drop: Vec<&String> = gone.iter().take(gone.len() - RETIRED_HISTORY).collect();
            slot.versions.retain(|v| !drop.contains(&&v.version));
        }
        if slot.versions.is_empty() {
            models.remove(name);
        }
        for (m, _) in &settled.released {
            m.retired.store(true, Ordering::Release);
        }
        settled
    }

    fn read(&self) -> std::sync::RwLockReadGuard<'_, BTreeMap<String, ModelSlot>> {
        // A poisoned lock means a panic while it was held; the map itself is always valid
        // between statements, so keep serving.
        self.models.read().unwrap_or_else(|p| p.into_inner())
    }

    fn write(&self) -> std::sync::RwLockWriteGuard<'_, BTreeMap<String, ModelSlot>> {
        self.models.write().unwrap_or_else(|p| p.into_inner())
    }

    fn available(models: &BTreeMap<String, ModelSlot>) -> String {
        join(models.keys().cloned().collect())
    }

    /// The model name an empty request names.
    pub fn default_model(&self) -> Option<String> {
        let models = self.read();
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
    /// Unknown model or version, no default, or no version able to answer.
    pub fn resolve(&self, name: &str, version: &str) -> Result<Arc<ModelVersion>, LookupError> {
        let models = self.read();
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
            return slot.active.clone().ok_or(LookupError::NotServing { name });
        }
        slot.get(version)
            .and_then(|v| v.model.clone())
            .ok_or_else(|| LookupError::UnknownVersion {
                name: name.clone(),
                version: version.to_string(),
                available: join(
                    slot.versions
                        .iter()
                        .filter(|v| v.model.is_some())
                        .map(|v| v.version.clone())
                        .collect(),
                ),
            })
    }

    /// A copy of every model slot, for the catalog and health.
    pub fn snapshot(&self) -> BTreeMap<String, ModelSlot> {
        self.read().clone()
    }

    /// Bundle files that belong to no model because not even their manifest could be read.
    pub fn unreadable(&self) -> Vec<Unreadable> {
        self.unreadable
            .read()
            .unwrap_or_else(|p| p.into_inner())
            .iter()
            .map(|(origin, refusal)| Unreadable {
                origin: origin.clone(),
                refusal: refusal.clone(),
            })
            .collect()
    }
}

fn join(items: Vec<String>) -> String {
    if items.is_empty() {
        "none".into()
    } else {
        items.join(", ")
    }
}
