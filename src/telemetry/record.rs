//! The recording functions: cheap, callable from any thread (async or compute), never failing.
//!
//! Each call bounds its labels, then updates the process-wide recorder through the `metrics`
//! facade. Before [`super::install`] has run, calls are no-ops (the facade's default).
//!
//! Bounding: a `model`/`version` label is only ever the name of a version that loaded
//! ([`version_loaded`] with `ok`); anything else becomes `unknown`, so a client naming
//! made-up models cannot create series. The set of loaded versions is process-wide, like the
//! recorder it guards: the `metrics` facade has exactly one recorder per process, so a second
//! server in the same process (tests start several) shares it and adds its versions.

use std::collections::{BTreeMap, BTreeSet};
use std::sync::{Mutex, PoisonError, RwLock};
use std::time::Duration;

use metrics::{counter, gauge, histogram};

use super::names::*;
use crate::registry::LoadStep;

/// The label value of anything not loaded.
pub const UNKNOWN: &str = "unknown";

/// Loaded versions, model → versions. A std `RwLock`: it is held for one lookup, never across
/// an await, and written only when a version loads.
static LOADED: RwLock<BTreeMap<String, BTreeSet<String>>> = RwLock::new(BTreeMap::new());

/// The active version of each model, so that [`active_version`] can zero the one it replaces.
static ACTIVE: Mutex<BTreeMap<String, String>> = Mutex::new(BTreeMap::new());

/// `(model, version)` labels: the names when that version loaded, `(model, "unknown")` for an
/// unloaded version of a loaded model, `("unknown", "unknown")` otherwise.
fn labels(model: &str, version: &str) -> (String, String) {
    let loaded = LOADED.read().unwrap_or_else(PoisonError::into_inner);
    match loaded.get(model) {
        Some(versions) if versions.contains(version) => (model.to_owned(), version.to_owned()),
        Some(_) => (model.to_owned(), UNKNOWN.to_owned()),
        None => (UNKNOWN.to_owned(), UNKNOWN.to_owned()),
    }
}

/// The `model` label alone: the name when some version of it loaded, else `unknown`.
fn model_label(model: &str) -> String {
    let loaded = LOADED.read().unwrap_or_else(PoisonError::into_inner);
    if loaded.contains_key(model) {
        model.to_owned()
    } else {
        UNKNOWN.to_owned()
    }
}

/// The canonical name of a gRPC status code, as the gRPC specification spells it
/// (grpc/grpc, doc/statuscodes.md).
pub fn code_name(code: tonic::Code) -> &'static str {
    use tonic::Code;
    match code {
        Code::Ok => "OK",
        Code::Cancelled => "CANCELLED",
        Code::Unknown => "UNKNOWN",
        Code::InvalidArgument => "INVALID_ARGUMENT",
        Code::DeadlineExceeded => "DEADLINE_EXCEEDED",
        Code::NotFound => "NOT_FOUND",
        Code::AlreadyExists => "ALREADY_EXISTS",
        Code::PermissionDenied => "PERMISSION_DENIED",
        Code::ResourceExhausted => "RESOURCE_EXHAUSTED",
        Code::FailedPrecondition => "FAILED_PRECONDITION",
        Code::Aborted => "ABORTED",
        Code::OutOfRange => "OUT_OF_RANGE",
        Code::Unimplemented => "UNIMPLEMENTED",
        Code::Internal => "INTERNAL",
        Code::Unavailable => "UNAVAILABLE",
        Code::DataLoss => "DATA_LOSS",
        Code::Unauthenticated => "UNAUTHENTICATED",
    }
}

/// A predict request finished with `code` (OK or the error sent back), carrying `samples`
/// samples, `total` after it arrived.
pub fn request_finished(
    model: &str,
    version: &str,
    code: tonic::Code,
    samples: usize,
    total: Duration,
) {
    let (model, version) = labels(model, version);
    let code = code_name(code);
    counter!(REQUESTS_TOTAL, "model" => model.clone(), "version" => version.clone(), "code" => code)
        .increment(1);
    counter!(SAMPLES_TOTAL, "model" => model.clone(), "version" => version, "code" => code)
        .increment(samples as u64);
    histogram!(REQUEST_DURATION_SECONDS, "model" => model).record(total.as_secs_f64());
}

/// A request's samples waited `wait` between submission and the start of their batch.
pub fn queue_wait(model: &str, version: &str, wait: Duration) {
    let (model, version) = labels(model, version);
    histogram!(QUEUE_WAIT_SECONDS, "model" => model, "version" => version)
        .record(wait.as_secs_f64());
}

/// A batch of `batch_size` samples computed in `compute`, or failed (`failed`: an engine error
/// or a contained panic).
pub fn batch_computed(
    model: &str,
    version: &str,
    batch_size: usize,
    compute: Duration,
    outcome: BatchOutcome,
) {
    let (model, version) = labels(model, version);
    histogram!(BATCH_COMPUTE_SECONDS, "model" => model.clone(), "version" => version.clone())
        .record(compute.as_secs_f64());
    histogram!(BATCH_SIZE, "model" => model.clone(), "version" => version.clone())
        .record(batch_size as f64);
    counter!(BATCHES_TOTAL, "model" => model, "version" => version, "outcome" => outcome.label())
        .increment(1);
}

/// How a batch ended: the `outcome` label of `convoy_batches_total`.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum BatchOutcome {
    Ok,
    /// The executor returned an error.
    Failed,
    /// The executor panicked; the panic was caught and the thread carried on.
    Panicked,
}

impl BatchOutcome {
    pub const ALL: [BatchOutcome; 3] = [
        BatchOutcome::Ok,
        BatchOutcome::Failed,
        BatchOutcome::Panicked,
    ];

    pub fn label(self) -> &'static str {
        match self {
            BatchOutcome::Ok => "ok",
            BatchOutcome::Failed => "failed",
            BatchOutcome::Panicked => "panicked",
        }
    }
}

/// `samples_waiting` samples of this model version wait for compute now.
pub fn queue_depth(model: &str, version: &str, samples_waiting: usize) {
    let (model, version) = labels(model, version);
    gauge!(QUEUED_SAMPLES, "model" => model, "version" => version).set(samples_waiting as f64);
}

/// One more (`+1`) or one fewer (`-1`) predict request is being handled.
pub fn in_flight(delta: i64) {
    gauge!(REQUESTS_IN_FLIGHT).increment(delta as f64);
}

/// A request being handled: counted in `convoy_requests_in_flight` from [`InFlight::start`]
/// until dropped. Prefer it to a pair of [`in_flight`] calls around an `.await`: when a client
/// goes away, the transport drops the handler's future at its current `.await`, and code
/// after that point never runs; a drop guard still does.
#[must_use = "the request counts as in flight only while the guard lives"]
#[derive(Debug)]
pub struct InFlight(());

impl InFlight {
    pub fn start() -> InFlight {
        in_flight(1);
        InFlight(())
    }
}

impl Drop for InFlight {
    fn drop(&mut self) {
        in_flight(-1);
    }
}

/// One image was decoded and prepared as `model`'s input in `decode_and_prepare`.
pub fn image_prepared(model: &str, decode_and_prepare: Duration) {
    histogram!(IMAGE_PREPARE_SECONDS, "model" => model_label(model))
        .record(decode_and_prepare.as_secs_f64());
}

/// A model version was loaded (`ok`) or refused.
///
/// A loaded version becomes a label value the other functions accept, and its series are
/// exported at zero at once, so that dashboards and alerts see every family before the first
/// request (Prometheus "Instrumentation" practices, "Avoid missing metrics").
///
/// The `model` label of a refused load keeps the name the caller gives (`unknown` when the
/// bundle was unreadable): those names come from the operator's bundle files, not from
/// clients, so they stay bounded, and they say which model failed.
pub fn version_loaded(model: &str, version: &str, outcome: Result<(), LoadStep>) {
    if outcome.is_ok() {
        LOADED
            .write()
            .unwrap_or_else(PoisonError::into_inner)
            .entry(model.to_owned())
            .or_default()
            .insert(version.to_owned());
        export_at_zero(model, version);
    }
    let outcome = match outcome {
        Ok(()) => "ok",
        Err(step) => step.as_str(),
    };
    counter!(MODEL_LOADS_TOTAL, "model" => model.to_owned(), "outcome" => outcome).increment(1);
}

/// Registers every series of a loaded version without changing a value (counters +0, gauges
/// +0, histograms only registered), so a version loaded again keeps its counts.
fn export_at_zero(model: &str, version: &str) {
    let (m, v) = (model.to_owned(), version.to_owned());
    for name in [REQUESTS_TOTAL, SAMPLES_TOTAL] {
        counter!(name, "model" => m.clone(), "version" => v.clone(), "code" => code_name(tonic::Code::Ok))
            .increment(0);
    }
    for outcome in BatchOutcome::ALL {
        counter!(BATCHES_TOTAL, "model" => m.clone(), "version" => v.clone(), "outcome" => outcome.label())
            .increment(0);
    }
    for reason in SHED_REASONS {
        counter!(REQUESTS_SHED_TOTAL, "model" => m.clone(), "version" => v.clone(), "reason" => reason)
            .increment(0);
    }
    gauge!(QUEUED_SAMPLES, "model" => m.clone(), "version" => v.clone()).increment(0.0);
    // A histogram the exporter knows of but never saw a value renders with zero counts.
    for name in [QUEUE_WAIT_SECONDS, BATCH_COMPUTE_SECONDS, BATCH_SIZE] {
        let _ = histogram!(name, "model" => m.clone(), "version" => v.clone());
    }
    for name in [
        REQUEST_DURATION_SECONDS,
        IMAGE_PREPARE_SECONDS,
        MODEL_SWAP_SECONDS,
    ] {
        let _ = histogram!(name, "model" => m.clone());
    }
}

/// `version` of `model` now answers requests that name no version; the version that did
/// before drops to 0. `took` is the time from the start of the change (a file appearing, an
/// operator's call) to the swap.
pub fn active_version(model: &str, version: &str, took: Duration) {
    histogram!(MODEL_SWAP_SECONDS, "model" => model_label(model)).record(took.as_secs_f64());
    let (model, version) = labels(model, version);
    let mut active = ACTIVE.lock().unwrap_or_else(PoisonError::into_inner);
    if let Some(previous) = active.insert(model.clone(), version.clone())
        && previous != version
    {
        gauge!(MODEL_ACTIVE_VERSION, "model" => model.clone(), "version" => previous).set(0.0);
    }
    gauge!(MODEL_ACTIVE_VERSION, "model" => model, "version" => version).set(1.0);
}

/// A request was refused before compute; `reason` is one of [`SHED_REASONS`].
pub fn shed(model: &str, version: &str, reason: &'static str) {
    let (model, version) = labels(model, version);
    counter!(REQUESTS_SHED_TOTAL, "model" => model, "version" => version, "reason" => reason)
        .increment(1);
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn code_names_are_the_canonical_ones() {
        // grpc/grpc doc/statuscodes.md: the numeric value and name of every code.
        let table = [
            (0, "OK"),
            (1, "CANCELLED"),
            (2, "UNKNOWN"),
            (3, "INVALID_ARGUMENT"),
            (4, "DEADLINE_EXCEEDED"),
            (5, "NOT_FOUND"),
            (6, "ALREADY_EXISTS"),
            (7, "PERMISSION_DENIED"),
            (8, "RESOURCE_EXHAUSTED"),
            (9, "FAILED_PRECONDITION"),
            (10, "ABORTED"),
            (11, "OUT_OF_RANGE"),
            (12, "UNIMPLEMENTED"),
            (13, "INTERNAL"),
            (14, "UNAVAILABLE"),
            (15, "DATA_LOSS"),
            (16, "UNAUTHENTICATED"),
        ];
        for (n, name) in table {
            assert_eq!(code_name(tonic::Code::from_i32(n)), name);
        }
    }

    #[test]
    fn in_flight_guard_counts_until_dropped() {
        // A recorder of its own, active only inside the closure.
        let recorder = super::super::names::builder().build_recorder();
        let handle = recorder.handle();
        metrics::with_local_recorder(&recorder, || {
            let a = InFlight::start();
            let b = InFlight::start();
            assert!(handle.render().contains("\nconvoy_requests_in_flight 2\n"));
            drop(a);
            drop(b);
            assert!(handle.render().contains("\nconvoy_requests_in_flight 0\n"));
        });
    }

    #[test]
    fn labels_are_bounded_to_loaded_versions() {
        // Names unique to this test: the loaded set is process-wide.
        version_loaded("labels-test-model", "7", Ok(()));
        assert_eq!(
            labels("labels-test-model", "7"),
            ("labels-test-model".into(), "7".into())
        );
        assert_eq!(
            labels("labels-test-model", "8"),
            ("labels-test-model".into(), UNKNOWN.into())
        );
        assert_eq!(
            labels("made-up-by-a-client", "7"),
            (UNKNOWN.into(), UNKNOWN.into())
        );
        assert_eq!(model_label("labels-test-model"), "labels-test-model");
        assert_eq!(model_label("made-up-by-a-client"), UNKNOWN);
        // A refused load does not make its name a label value.
        version_loaded("labels-test-refused", "1", Err(LoadStep::Verify));
        assert_eq!(model_label("labels-test-refused"), UNKNOWN);
    }
}
