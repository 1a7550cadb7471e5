//! Drift monitoring of one served model version: its statistics schema, the reference from its
//! bundle, the sliding window, and how many samples it has seen.
//!
//! Built when a version loads (`registry::load`); fed by the predictor, one sample at a time,
//! in two halves: [`StatSchema::compute_input`] where the input is prepared (a blocking
//! thread), [`StatSchema::compute_output`] and [`Monitor::record`] once the batch is computed.

use std::sync::Arc;
use std::sync::atomic::{AtomicU64, Ordering};

use super::{Baseline, DriftError, DriftWindow, SampleStats, StatSchema, WindowConfig};
use crate::bundle::Manifest;

/// The schema every part of convoy uses for a model: channels, height and width from the
/// per-sample input shape (C×H×W; a rank-2 shape is one channel, rank 1 or above 3 is read
/// as one channel of one row), whether it takes encoded images, and its class count.
///
/// # Errors
/// As [`StatSchema::new`].
pub fn schema_for(manifest: &Manifest, classes: usize) -> Result<StatSchema, DriftError> {
    let shape = &manifest.input.shape;
    let (c, h, w) = match shape.as_slice() {
        [c, h, w] => (*c, *h, *w),
        [h, w] => (1, *h, *w),
        other => (1, 1, other.iter().product()),
    };
    StatSchema::new(c, h, w, manifest.input.image.is_some(), classes)
}

/// Monitoring state of one model version.
pub struct Monitor {
    pub schema: StatSchema,
    pub baseline: Arc<Baseline>,
    pub window: DriftWindow,
    seen: AtomicU64,
}

impl std::fmt::Debug for Monitor {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        write!(f, "Monitor({} statistics)", self.schema.len())
    }
}

impl Monitor {
    /// Monitoring for a version whose bundle carries `baseline` (the manifest's
    /// `drift_baseline` JSON).
    ///
    /// # Errors
    /// A baseline that does not parse or validate, or that shares no statistic with the
    /// model's schema.
    pub fn new(
        manifest: &Manifest,
        classes: usize,
        baseline: &serde_json::Value,
        config: WindowConfig,
    ) -> Result<Monitor, MonitorError> {
        let baseline: Baseline =
            serde_json::from_value(baseline.clone()).map_err(|e| MonitorError::Parse {
                reason: e.to_string(),
            })?;
        let schema = schema_for(manifest, classes)?;
        let baseline = Arc::new(baseline);
        let window = DriftWindow::new(&schema, Arc::clone(&baseline), config)?;
        Ok(Monitor {
            schema,
            baseline,
            window,
            seen: AtomicU64::new(0),
        })
    }

    /// Adds one sample's statistics (computed with this monitor's schema).
    pub fn record(&self, stats: &SampleStats) {
        self.seen.fetch_add(1, Ordering::Relaxed);
        // Only a schema mismatch fails, and the stats come from `self.schema`.
        if let Err(e) = self.window.record(stats) {
            tracing::debug!(error = %e, "drift sample not recorded");
        }
    }

    /// Samples recorded since the version loaded.
    pub fn seen(&self) -> u64 {
        self.seen.load(Ordering::Relaxed)
    }
}

/// Why a version's bundle reference cannot be monitored (the version still serves).
#[derive(Debug, thiserror::Error)]
pub enum MonitorError {
    #[error("the drift reference does not parse: {reason}")]
    Parse { reason: String },
    #[error(transparent)]
    Drift(#[from] DriftError),
}
