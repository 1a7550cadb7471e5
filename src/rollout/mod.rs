//! Rolling model versions in and out of a running server.
//!
//! A change starts from a trigger — the models folder changed ([`watch`]: file-system
//! notifications, a polling interval, SIGHUP), or an operator called the control service
//! ([`control`]) — and runs here, one change at a time:
//!
//! 1. find what changed in the folder ([`folder`]): new or rewritten bundle files, removed ones;
//! 2. load each new file on a blocking thread ([`crate::registry::load_version`]: verify, plan,
//!    replay check samples, warm up) and record it, ready or refused;
//! 3. settle each model touched ([`crate::registry::Registry::settle`]): make the version the
//!    policy wants active (one pointer swap; loading it again first if it had been released),
//!    and release the versions no longer needed;
//! 4. close the queues of released versions ([`Scheduler::retire`]): their queued requests
//!    still finish on them, new ones go to the new version, and each is freed after its last
//!    batch;
//! 5. report: log lines, metrics, health statuses, and a [`ChangeReport`] for the caller.
//!
//! Nothing here runs on a request's path; requests only ever read the registry.

pub mod control;
pub mod folder;
pub mod watch;

use std::collections::{BTreeMap, BTreeSet};
use std::path::{Path, PathBuf};
use std::sync::Arc;
use std::time::{Duration, Instant};

use tonic_health::ServingStatus;
use tonic_health::server::HealthReporter;

use crate::bundle::peek_identity;
use crate::registry::policy::Desired;
use crate::registry::{LoadOutcome, LoadStep, LookupError, Refusal, Registry, load_version};
use crate::scheduler::Scheduler;
use crate::telemetry;
use folder::{ReadProblem, Stamp};

/// The gRPC service name whose health follows "any model can answer".
pub const PREDICTOR_SERVICE: &str = "convoy.v1.Predictor";

/// A model whose active version changed.
#[derive(Clone, Debug, PartialEq, Eq)]
pub struct Switch {
    pub model: String,
    pub from: Option<String>,
    pub to: String,
    /// From the start of the change (trigger or call) to the swap.
    pub took: Duration,
}

/// A version released from service.
#[derive(Clone, Debug, PartialEq, Eq)]
pub struct Released {
    pub model: String,
    pub version: String,
    pub reason: String,
}

/// What one change did.
#[derive(Clone, Debug, Default)]
pub struct ChangeReport {
    pub loads: Vec<LoadOutcome>,
    pub switches: Vec<Switch>,
    pub released: Vec<Released>,
}

impl ChangeReport {
    pub fn is_empty(&self) -> bool {
        self.loads.is_empty() && self.switches.is_empty() && self.released.is_empty()
    }
}

/// Why a change could not be made. Nothing changed when one of these is returned, except
/// where the variant says so.
#[derive(Debug, thiserror::Error)]
pub enum RolloutError {
    #[error("the server has no models folder (setting models); it serves the built-in demo")]
    NoFolder,
    #[error("cannot read the models folder {path}: {source}; the loaded versions keep serving")]
    Folder {
        path: PathBuf,
        source: std::io::Error,
    },
    #[error("{name:?} is not a bundle file name: give a NAME.cvb inside the models folder")]
    BadFileName { name: String },
    #[error("no bundle file {name:?} in the models folder")]
    NoSuchFile { name: String },
    #[error(transparent)]
    Lookup(#[from] LookupError),
    #[error("version {version} of {model} could not be made active: {reason}")]
    NotActivated {
        model: String,
        version: String,
        reason: String,
    },
    #[error(
        "version {version} is the last version of {model} able to answer; activate or add another first (or set retire_last)"
    )]
    LastVersion { model: String, version: String },
    #[error("loading stopped: {0}")]
    Task(String),
}

/// The part of the rollout that one change at a time may touch.
#[derive(Default)]
struct Known {
    /// Bundle files seen in the folder and the stamp they were loaded (or refused) at.
    files: BTreeMap<PathBuf, Stamp>,
}

/// Runs changes against a registry, a scheduler and a health reporter.
pub struct Rollout {
    registry: Arc<Registry>,
    scheduler: Arc<Scheduler>,
    health: HealthReporter,
    dir: Option<PathBuf>,
    /// An async mutex: a change awaits blocking loads while holding it, and changes must not
    /// interleave (two rescans loading the same file, a retire racing an activate).
    known: tokio::sync::Mutex<Known>,
    /// Model names whose health status has been set, so that a model that disappears can be
    /// cleared.
    reported: std::sync::Mutex<BTreeSet<String>>,
    /// Set when the server drains: health reports NOT_SERVING whatever is loaded.
    stopping: std::sync::atomic::AtomicBool,
}

impl Rollout {
    pub fn new(
        registry: Arc<Registry>,
        scheduler: Arc<Scheduler>,
        health: HealthReporter,
        dir: Option<PathBuf>,
    ) -> Rollout {
        Rollout {
            registry,
            scheduler,
            health,
            dir,
            known: tokio::sync::Mutex::new(Known::default()),
            reported: std::sync::Mutex::new(BTreeSet::new()),
            stopping: std::sync::atomic::AtomicBool::new(false),
        }
    }

    pub fn registry(&self) -> &Arc<Registry> {
        &self.registry
    }

    pub fn models_dir(&self) -> Option<&Path> {
        self.dir.as_deref()
    }

    /// Loads a bundle held in memory (the built-in demo) and settles its model.
    pub async fn load_bytes(&self, bytes: Vec<u8>, origin: &str) -> ChangeReport {
        let started = Instant::now();
        let _known = self.known.lock().await;
        let mut report = ChangeReport::default();
        if let Some(outcome) = self.load_and_record(bytes, origin.to_string(), None).await {
            let name = outcome.name.clone();
            report.loads.push(outcome);
            if let Some(name) = name {
                self.settle(&name, started, &mut report).await;
            }
        }
        self.publish(&report).await;
        report
    }

    /// Looks at the models folder: loads new and changed bundle files, retires the versions
    /// of removed ones, and settles every model touched.
    ///
    /// # Errors
    /// No models folder, or one that cannot be listed (then nothing changes: a folder that
    /// vanished does not take down the versions loaded from it).
    pub async fn rescan(&self) -> Result<ChangeReport, RolloutError> {
        let started = Instant::now();
        let dir = self.dir.clone().ok_or(RolloutError::NoFolder)?;
        let mut known = self.known.lock().await;
        let listing = {
            let dir_for_task = dir.clone();
            tokio::task::spawn_blocking(move || folder::list(&dir_for_task))
                .await
                .map_err(|e| RolloutError::Task(e.to_string()))?
                .map_err(|source| RolloutError::Folder { path: dir, source })?
        };
        let mut report = ChangeReport::default();
        let mut touched = BTreeSet::new();
        let removed: Vec<PathBuf> = known
            .files
            .keys()
            .filter(|p| !listing.contains_key(*p))
            .cloned()
            .collect();
        for path in removed {
            known.files.remove(&path);
            tracing::info!(file = %path.display(), "bundle file removed");
            touched.extend(self.registry.file_removed(&path));
        }
        for (path, stamp) in &listing {
            if known.files.get(path) == Some(stamp) {
                continue;
            }
            if let Some((outcome, stamp)) = self.load_file_at(path).await {
                known.files.insert(path.clone(), stamp);
                touched.extend(outcome.name.clone());
                report.loads.push(outcome);
            }
        }
        for name in touched {
            self.settle(&name, started, &mut report).await;
        }
        drop(known);
        self.publish(&report).await;
        Ok(report)
    }

    /// Loads (or loads again) one bundle file of the models folder, by file name.
    ///
    /// # Errors
    /// No models folder, a name that is not a plain `NAME.cvb`, or no such file.
    pub async fn load_file(&self, file_name: &str) -> Result<ChangeReport, RolloutError> {
        let started = Instant::now();
        let dir = self.dir.clone().ok_or(RolloutError::NoFolder)?;
        let plain = Path::new(file_name)
            .file_name()
            .is_some_and(|n| n == std::ffi::OsStr::new(file_name));
        if !plain || !folder::is_bundle_name(Path::new(file_name)) {
            return Err(RolloutError::BadFileName {
                name: file_name.to_string(),
            });
        }
        let path = dir.join(file_name);
        if !path.is_file() {
            return Err(RolloutError::NoSuchFile {
                name: file_name.to_string(),
            });
        }
        let mut known = self.known.lock().await;
        let mut report = ChangeReport::default();
        if let Some((outcome, stamp)) = self.load_file_at(&path).await {
            known.files.insert(path.clone(), stamp);
            let name = outcome.name.clone();
            report.loads.push(outcome);
            if let Some(name) = name {
                self.settle(&name, started, &mut report).await;
            }
        }
        drop(known);
        self.publish(&report).await;
        Ok(report)
    }

    /// Makes `version` of `model` active and holds it there (a pin) until
    /// [`Rollout::follow_highest`]; a released version is loaded again from its file first.
    ///
    /// # Errors
    /// Unknown model or version; a version that cannot be loaded (the pin is then undone and
    /// the model keeps its active version).
    pub async fn activate(&self, model: &str, version: &str) -> Result<ChangeReport, RolloutError> {
        let started = Instant::now();
        let known = self.known.lock().await;
        let before = self
            .registry
            .snapshot()
            .get(model)
            .and_then(|s| s.pinned.clone());
        self.registry.pin(model, Some(version))?;
        let mut report = ChangeReport::default();
        self.settle(model, started, &mut report).await;
        let active = self.registry.resolve(model, "").ok();
        let result = if active.as_ref().is_some_and(|m| m.version == version) {
            Ok(())
        } else {
            // Undo the pin; the model settles back to what it had.
            let _ = self.registry.pin(model, before.as_deref());
            self.settle(model, started, &mut report).await;
            let reason = report
                .loads
                .iter()
                .rev()
                .find(|l| l.version.as_deref() == Some(version))
                .and_then(|l| l.result.as_ref().err())
                .map_or_else(
                    || "it is not loaded and has no bundle file to load it from".to_string(),
                    ToString::to_string,
                );
            Err(RolloutError::NotActivated {
                model: model.to_string(),
                version: version.to_string(),
                reason,
            })
        };
        drop(known);
        self.publish(&report).await;
        result.map(|()| report)
    }

    /// Lets `model` follow its highest version again.
    ///
    /// # Errors
    /// Unknown model.
    pub async fn follow_highest(&self, model: &str) -> Result<ChangeReport, RolloutError> {
        let started = Instant::now();
        let known = self.known.lock().await;
        self.registry.pin(model, None)?;
        let mut report = ChangeReport::default();
        self.settle(model, started, &mut report).await;
        drop(known);
        self.publish(&report).await;
        Ok(report)
    }

    /// Takes `version` of `model` out of service; it is not chosen again automatically until
    /// activated or its file changes.
    ///
    /// # Errors
    /// Unknown model or version; the last version able to answer (unless the policy says
    /// `retire_last`).
    pub async fn retire(&self, model: &str, version: &str) -> Result<ChangeReport, RolloutError> {
        let started = Instant::now();
        let known = self.known.lock().await;
        self.registry.set_held_back(model, version, true)?;
        let mut report = ChangeReport::default();
        self.settle(model, started, &mut report).await;
        let still_active = self
            .registry
            .resolve(model, "")
            .is_ok_and(|m| m.version == version);
        let result = if still_active {
            let _ = self.registry.set_held_back(model, version, false);
            Err(RolloutError::LastVersion {
                model: model.to_string(),
                version: version.to_string(),
            })
        } else {
            Ok(())
        };
        drop(known);
        self.publish(&report).await;
        result.map(|()| report)
    }

    /// Reads and loads one file; `None` when the file is still being written (or vanished):
    /// it is then left for the next scan.
    async fn load_file_at(&self, path: &Path) -> Option<(LoadOutcome, Stamp)> {
        let origin = path.display().to_string();
        let read = {
            let path = path.to_path_buf();
            tokio::task::spawn_blocking(move || folder::read_whole(&path)).await
        };
        let (bytes, stamp) = match read {
            Ok(Ok(r)) => r,
            Ok(Err(ReadProblem::Changing)) => {
                tracing::debug!(file = %origin, "still being written; next scan");
                return None;
            }
            Ok(Err(ReadProblem::Io(e))) if e.kind() == std::io::ErrorKind::NotFound => {
                return None;
            }
            Ok(Err(ReadProblem::Io(e))) => {
                let attempt = crate::registry::Attempt {
                    identity: None,
                    bundle_sha256: String::new(),
                    result: Err(Refusal::new(LoadStep::Read, e.to_string())),
                    took: Duration::ZERO,
                };
                let outcome = self.registry.record(attempt, &origin, Some(path));
                // Stamp unknown: an unreadable file is tried again at every scan until it reads.
                return Some((
                    outcome,
                    Stamp {
                        len: u64::MAX,
                        modified: None,
                        inode: 0,
                    },
                ));
            }
            Err(e) => {
                tracing::error!(file = %origin, error = %e, "read task failed");
                return None;
            }
        };
        let outcome = self
            .load_and_record(bytes, origin, Some(path.to_path_buf()))
            .await?;
        Some((outcome, stamp))
    }

    /// Marks the bundle's version as loading (health says NOT_SERVING for a model with nothing
    /// else ready), runs the load steps on a blocking thread and records the result. `None`
    /// only if the blocking task itself failed (logged).
    async fn load_and_record(
        &self,
        bytes: Vec<u8>,
        origin: String,
        file: Option<PathBuf>,
    ) -> Option<LoadOutcome> {
        if let Some((name, version)) = peek_identity(&bytes) {
            self.registry.mark_loading(&name, &version, &origin);
            self.sync_health().await;
        }
        let registry = Arc::clone(&self.registry);
        let task_origin = origin.clone();
        tokio::task::spawn_blocking(move || {
            let attempt = load_version(bytes, &task_origin, registry.settings());
            registry.record(attempt, &task_origin, file.as_deref())
        })
        .await
        .inspect_err(|e| tracing::error!(%origin, error = %e, "load task failed"))
        .ok()
    }

    /// Loads what the policy wants active (when it was released before), then swaps and
    /// releases; closes the queues of released versions.
    async fn settle(&self, name: &str, started: Instant, report: &mut ChangeReport) {
        // Each round either makes a version ready or takes it out of the candidates, so this
        // ends; the bound only guards against a bug turning it into a loop.
        for _ in 0..64 {
            let Desired::Load { version, file } = self.registry.desired(name) else {
                break;
            };
            match self.load_file_at(&file).await {
                // The stamp is already known: the file was loaded from before.
                Some((outcome, _stamp)) => {
                    report.loads.push(outcome);
                    if self.registry.desired(name)
                        == (Desired::Load {
                            version: version.clone(),
                            file: file.clone(),
                        })
                    {
                        // Loaded as some other version (the file now holds another one).
                        self.registry.drop_candidate(name, &version);
                    }
                }
                None => self.registry.drop_candidate(name, &version),
            }
        }
        let settled = self.registry.settle(name);
        if settled.switched.is_some()
            && let Ok(active) = self.registry.resolve(name, "")
            && let Some(monitor) = &active.drift
        {
            // The drift window restarts with each version that becomes active (a version kept
            // loaded may have served before).
            monitor.window.restart();
        }
        if let Some((from, to)) = settled.switched {
            report.switches.push(Switch {
                model: name.to_string(),
                from,
                to,
                took: started.elapsed(),
            });
        }
        for (m, reason) in settled.released {
            self.scheduler.retire(&m);
            report.released.push(Released {
                model: m.name.clone(),
                version: m.version.clone(),
                reason,
            });
        }
    }

    /// Logs, metrics and health for one change.
    async fn publish(&self, report: &ChangeReport) {
        for l in &report.loads {
            let model = l.name.as_deref().unwrap_or("");
            let version = l.version.as_deref().unwrap_or("");
            match &l.result {
                Ok(()) => tracing::info!(
                    origin = %l.origin, model, version,
                    took_ms = l.took.as_millis() as u64,
                    "loaded"
                ),
                Err(r) => tracing::warn!(
                    origin = %l.origin, model, version, step = %r.step, reason = %r.reason,
                    "refused"
                ),
            }
            telemetry::version_loaded(
                l.name.as_deref().unwrap_or(telemetry::UNKNOWN),
                l.version.as_deref().unwrap_or(telemetry::UNKNOWN),
                l.result.as_ref().map(|_| ()).map_err(|r| r.step),
            );
        }
        for s in &report.switches {
            tracing::info!(
                model = %s.model,
                from = s.from.as_deref().unwrap_or("-"),
                to = %s.to,
                took_ms = s.took.as_millis() as u64,
                "active version changed"
            );
            telemetry::active_version(&s.model, &s.to, s.took);
        }
        for r in &report.released {
            tracing::info!(model = %r.model, version = %r.version, reason = %r.reason, "retired");
        }
        self.sync_health().await;
    }

    /// Turns every health status NOT_SERVING for good (the server is draining), so that
    /// balancers and readiness probes send no more work here.
    pub async fn stop_serving(&self) {
        self.stopping
            .store(true, std::sync::atomic::Ordering::SeqCst);
        self.sync_health().await;
    }

    /// Sets every model's health status from the registry: SERVING when it has an active
    /// version; NOT_SERVING while its first version loads, when none can answer, or once the
    /// server drains. The overall status (`""`) and the predictor service's follow "any model
    /// can answer".
    pub async fn sync_health(&self) {
        let snapshot = self.registry.snapshot();
        let stopping = self.stopping.load(std::sync::atomic::Ordering::SeqCst);
        let status = |ok: bool| {
            if ok && !stopping {
                ServingStatus::Serving
            } else {
                ServingStatus::NotServing
            }
        };
        let any = snapshot.values().any(|s| s.active().is_some());
        self.health.set_service_status("", status(any)).await;
        self.health
            .set_service_status(PREDICTOR_SERVICE, status(any))
            .await;
        let gone: Vec<String> = {
            let mut reported = self.reported.lock().unwrap_or_else(|p| p.into_inner());
            let gone = reported
                .iter()
                .filter(|n| !snapshot.contains_key(*n))
                .cloned()
                .collect::<Vec<_>>();
            for n in &gone {
                reported.remove(n);
            }
            reported.extend(snapshot.keys().cloned());
            gone
        };
        for (name, slot) in &snapshot {
            self.health
                .set_service_status(name, status(slot.active().is_some()))
                .await;
        }
        for name in gone {
            self.health.clone().clear_service_status(&name).await;
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::registry::{LoadSettings, Policy};
    use crate::scheduler::SchedulerConfig;
    use tonic_health::pb::health_server::Health;
    use tonic_health::pb::{HealthCheckRequest, health_check_response::ServingStatus as Wire};

    async fn status(health: &tonic_health::server::HealthService, service: &str) -> Option<i32> {
        health
            .check(tonic::Request::new(HealthCheckRequest {
                service: service.into(),
            }))
            .await
            .ok()
            .map(|r| r.into_inner().status)
    }

    #[tokio::test]
    async fn a_model_loading_for_the_first_time_is_not_serving_until_ready() {
        let registry = Arc::new(Registry::new(
            LoadSettings::default(),
            Policy::default(),
            None,
        ));
        let scheduler = Arc::new(Scheduler::start(&SchedulerConfig {
            compute_threads: 1,
            ..SchedulerConfig::default()
        }));
        let (reporter, _) = tonic_health::server::health_reporter();
        let health = tonic_health::server::HealthService::from_health_reporter(reporter.clone());
        let rollout = Rollout::new(Arc::clone(&registry), scheduler, reporter, None);
        let bundle = crate::service::DEMO_BUNDLE.to_vec();
        let (name, version) = peek_identity(&bundle).unwrap();

        // What `load_file_at` does before the blocking load starts.
        registry.mark_loading(&name, &version, "test");
        rollout.sync_health().await;
        let not_serving = Some(Wire::NotServing as i32);
        assert_eq!(status(&health, &name).await, not_serving);
        assert_eq!(status(&health, "").await, not_serving);
        assert_eq!(status(&health, PREDICTOR_SERVICE).await, not_serving);

        let report = rollout.load_bytes(bundle, "test").await;
        assert_eq!(report.switches.len(), 1);
        let serving = Some(Wire::Serving as i32);
        assert_eq!(status(&health, &name).await, serving);
        assert_eq!(status(&health, "").await, serving);
    }
}
