//! What can go wrong while computing drift statistics, building a baseline or testing a window.

/// Why a drift computation was refused.
///
/// Every variant is a caller or data fault that can happen in normal operation (a reference set
/// that is too small, a corrupt baseline read from a bundle, a sample from a different model);
/// nothing in the drift module panics on bad input.
#[derive(Debug, Clone, PartialEq, thiserror::Error)]
pub enum DriftError {
    #[error("model input shape {channels}x{height}x{width} has no values")]
    EmptyInput {
        channels: usize,
        height: usize,
        width: usize,
    },

    #[error("model has no output classes")]
    NoClasses,

    #[error("model input holds {got} values, the statistics schema expects {expected}")]
    InputLength { expected: usize, got: usize },

    #[error("model output holds {got} probabilities, the statistics schema expects {expected}")]
    OutputLength { expected: usize, got: usize },

    #[error("sample statistics hold {got} values, this schema or window expects {expected}")]
    StatsLength { expected: usize, got: usize },

    #[error("reference needs at least {min} samples, got {got}")]
    TooFewSamples { got: u64, min: u64 },

    #[error("statistic {statistic} has {got} reference values, at least {min} are needed")]
    TooFewValues {
        statistic: String,
        got: u64,
        min: u64,
    },

    #[error("reference sample {sample} has a non-finite {statistic}")]
    NonFiniteReference { statistic: String, sample: u64 },

    #[error("{bins} bins asked for; between {min} and {max} are supported")]
    BinCount { bins: usize, min: usize, max: usize },

    #[error("baseline format {found} is not supported (this build reads format {supported})")]
    UnsupportedFormat { found: u32, supported: u32 },

    #[error("baseline statistic {statistic} is corrupt: {fault}")]
    CorruptBaseline {
        statistic: String,
        fault: BaselineFault,
    },

    #[error("baseline and model share no statistic")]
    BaselineMismatch,

    #[error("sample {which} is empty")]
    EmptySample { which: Sample },

    #[error("sample {which} holds a NaN or infinite value at index {index}")]
    NonFiniteData { which: Sample, index: usize },

    #[error("{reference} reference fractions but {live} live counts")]
    LengthMismatch { reference: usize, live: usize },

    #[error("reference fractions are not a probability vector (entry {index})")]
    BadFractions { index: usize },

    #[error("expected fraction of category {category} is zero")]
    ZeroExpected { category: usize },

    #[error("significance level {alpha} is not in (0, 1)")]
    InvalidAlpha { alpha: f64 },

    #[error("window capacity {capacity} with a minimum of {min_samples} samples is not usable")]
    InvalidWindow { capacity: usize, min_samples: usize },
}

/// Which sample of a two-sample computation a [`DriftError`] is about.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum Sample {
    /// The first (reference) sample.
    First,
    /// The second (live) sample.
    Second,
}

impl std::fmt::Display for Sample {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.write_str(match self {
            Sample::First => "1",
            Sample::Second => "2",
        })
    }
}

/// What is inconsistent in a stored baseline statistic.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
pub enum BaselineFault {
    /// Fewer than two quantiles, or quantiles not finite and non-decreasing.
    Quantiles,
    /// Bin edges not finite and strictly increasing.
    Edges,
    /// The number of bin counts is not the number of edges plus one.
    BinCounts,
    /// Bin counts do not add up to the statistic's count, or the count is zero.
    Count,
    /// Minimum or maximum differs from the first or last quantile.
    Range,
    /// Two statistics share the name.
    DuplicateName,
    /// Class counts are empty or add up to zero.
    Classes,
}

impl std::fmt::Display for BaselineFault {
    fn fmt(&self, f: &mut std::fmt::Formatter<'_>) -> std::fmt::Result {
        f.write_str(match self {
            BaselineFault::Quantiles => "quantiles are not finite and non-decreasing",
            BaselineFault::Edges => "bin edges are not finite and strictly increasing",
            BaselineFault::BinCounts => "bin counts do not match the edges",
            BaselineFault::Count => "bin counts do not add up to the count",
            BaselineFault::Range => "minimum or maximum disagrees with the quantiles",
            BaselineFault::DuplicateName => "the name appears twice",
            BaselineFault::Classes => "class counts are empty or all zero",
        })
    }
}
