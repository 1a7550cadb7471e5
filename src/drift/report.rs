//! What a drift report says: per statistic and for the predicted class, the test results over
//! the current window and the verdict drawn from them ([`DriftWindow::report`]).
//!
//! [`DriftWindow::report`]: super::window::DriftWindow::report

use serde::Serialize;

use super::tests_stat::{ChiSquareResult, KsResult, PsiBand};

/// Overall judgement of one statistic.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum Verdict {
    /// Fewer values than the window's minimum: numbers are shown but not judged.
    TooFewSamples,
    /// PSI < 0.1 and the test not significant.
    Stable,
    /// PSI between 0.1 and 0.25, test not significant.
    Moderate,
    /// PSI > 0.25 or the test significant.
    Drift,
}

impl Verdict {
    pub(super) fn judge(
        values: usize,
        min: usize,
        psi: Option<PsiBand>,
        significant: bool,
    ) -> Verdict {
        if values < min.max(1) {
            Verdict::TooFewSamples
        } else if significant || psi == Some(PsiBand::Significant) {
            Verdict::Drift
        } else if psi == Some(PsiBand::Moderate) {
            Verdict::Moderate
        } else {
            Verdict::Stable
        }
    }
}

/// The drift tests of one statistic over the current window.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct StatReport {
    pub name: String,
    /// Values in the window.
    pub window: usize,
    /// Values in the reference.
    pub reference: u64,
    pub psi: Option<f64>,
    pub psi_band: Option<PsiBand>,
    pub ks: Option<KsResult>,
    /// KS p-value below α/m.
    pub ks_significant: bool,
    /// Window values outside the reference [min, max].
    pub out_of_range: u64,
    /// Window samples whose value was non-finite.
    pub non_finite: u64,
    pub verdict: Verdict,
    /// Window values per reference bin (for plotting against the reference's counts).
    pub window_bins: Vec<u64>,
}

/// The drift tests of the predicted class over the current window.
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct ClassReport {
    /// Predictions in the window.
    pub window: usize,
    pub psi: Option<f64>,
    pub psi_band: Option<PsiBand>,
    pub chi_square: Option<ChiSquareResult>,
    /// Chi-square p-value below α.
    pub significant: bool,
    /// Window samples without a valid prediction.
    pub non_finite: u64,
    pub verdict: Verdict,
    /// Window predictions per class.
    pub window_counts: Vec<u64>,
}

/// Result of [`DriftWindow::report`](super::window::DriftWindow::report).
#[derive(Clone, Debug, PartialEq, Serialize)]
pub struct DriftReport {
    pub alpha: f64,
    /// m: statistics tested with KS (those with values in the window).
    pub ks_tests: usize,
    /// α / m.
    pub ks_level: f64,
    /// Samples in the window.
    pub samples: usize,
    pub statistics: Vec<StatReport>,
    pub predicted_class: Option<ClassReport>,
    /// Any verdict is [`Verdict::Drift`].
    pub drift: bool,
}
