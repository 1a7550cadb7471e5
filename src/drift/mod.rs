//! Input-drift monitoring: is what a model sees in service still like what it was validated on?
//!
//! Layout, following one served sample:
//! - [`sample`]: model input (+ original image size, + output probabilities) → a fixed, named
//!   list of per-sample statistics ([`StatSchema`], [`SampleStats`]); `kernels` holds its
//!   numeric loops;
//! - [`window`]: the last N samples' statistics of one model version, cumulative counters for
//!   export, and the [`DriftReport`] ([`report`]) computed from them;
//! - [`monitor`]: one served version's schema, reference and window, as the server holds them;
//! - [`baseline`]: the reference those statistics are compared with — equal-mass bins and
//!   quantiles per statistic, class fractions — built once from reference data and stored as
//!   JSON in the bundle manifest;
//! - [`reference`]: reference data (a folder of images or a `.npy` array) run through the model
//!   once, at import, into that baseline;
//! - [`tests_stat`]: the comparisons themselves — PSI, two-sample Kolmogorov–Smirnov, chi-square
//!   — and the verdict rules; [`ks_dist`] and [`special`] hold the distributions behind their
//!   p-values.
//!
//! Everything here is synchronous, allocation-free on the per-sample path, and free of I/O
//! except [`reference`], which reads the reference files at import; wiring into the server, the
//! import command and the CLI lives elsewhere.

pub mod baseline;
mod error;
mod kernels;
pub mod ks_dist;
pub mod monitor;
pub mod reference;
pub mod report;
pub mod sample;
pub mod special;
pub mod tests_stat;
pub mod window;

pub use baseline::{Baseline, BaselineBuilder, ScalarReference};
pub use error::{BaselineFault, DriftError, Sample};
pub use monitor::{Monitor, MonitorError, schema_for};
pub use reference::{
    ReferenceError, ReferenceItem, ReferenceSet, baseline_json, build_baseline, probabilities,
};
pub use report::{ClassReport, DriftReport, StatReport, Verdict};
pub use sample::{SampleStats, StatKind, StatSchema, StatValue};
pub use tests_stat::{
    ChiSquareResult, KsMethod, KsResult, PsiBand, chisquare, class_chisquare, ks_2samp,
    ks_against_reference, psi,
};
pub use window::{DriftCounters, DriftWindow, StatCounters, WindowConfig};
