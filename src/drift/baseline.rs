//! The reference baseline: what each statistic looked like on data the model was validated on,
//! stored as JSON in the bundle manifest, and the builder that makes it from per-sample
//! statistics.
//!
//! Per scalar statistic the baseline keeps its count, range, equal-mass bins (for PSI and the
//! per-bin counters) and 101 quantiles (for a Kolmogorov–Smirnov test against a reconstructed
//! reference CDF); per predicted class, its reference count.
//!
//! Size: 101 `f32` quantiles print as about 1.3 KB of JSON per statistic, so a 20-statistic
//! baseline is about 27 KB, not a few KB. Fewer quantiles would shrink it but loosen the KS
//! bound below (see [`ScalarReference::cdf`]); 101 keeps the reconstruction error (≤ 0.01 + 1/n)
//! well under the sampling noise of a 500-sample window (critical D ≈ 0.06 at α = 0.05).

use serde::{Deserialize, Serialize};

use super::sample::{SampleStats, StatSchema, StatValue};
use super::{BaselineFault, DriftError};

/// Format number written into every baseline; readers refuse others.
pub const BASELINE_FORMAT: u32 = 1;

/// Quantiles stored per statistic, at probabilities 0, 0.01, …, 1.
pub const QUANTILES: usize = 101;

/// Equal-mass bins per statistic by default: ten (deciles) is the usual PSI binning (common
/// practice).
pub const DEFAULT_BINS: usize = 10;

/// Fewest and most bins a builder accepts.
pub const BIN_RANGE: (usize, usize) = (2, 100);

/// Fewest reference values a statistic (and the fewest samples a baseline) may have. With ten
/// equal-mass bins, 50 values put 5 in each bin, the smallest expected count usually accepted
/// for binned comparisons (Cochran's rule of thumb for chi-square tests, common practice); below
/// it the bin fractions and quantiles are too coarse to compare windows against.
pub const MIN_REFERENCE: u64 = 50;

/// Reference distribution of every monitored statistic of one model.
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct Baseline {
    /// [`BASELINE_FORMAT`] when written.
    pub format: u32,
    /// Reference samples the baseline was built from.
    pub samples: u64,
    /// One entry per scalar statistic that had values, in schema order.
    pub statistics: Vec<ScalarReference>,
    /// Reference count of each predicted class, indexed by class.
    pub class_counts: Vec<u64>,
}

impl Baseline {
    /// The reference of a statistic, by name.
    pub fn statistic(&self, name: &str) -> Option<&ScalarReference> {
        self.statistics.iter().find(|s| s.name == name)
    }

    /// Reference fraction of each predicted class.
    pub fn class_fractions(&self) -> Vec<f64> {
        fractions(&self.class_counts)
    }

    /// Checks a baseline read from outside (a bundle manifest) before it is used.
    ///
    /// # Errors
    /// [`DriftError::UnsupportedFormat`] for another format number;
    /// [`DriftError::CorruptBaseline`] naming the statistic and what is inconsistent.
    pub fn validate(&self) -> Result<(), DriftError> {
        if self.format != BASELINE_FORMAT {
            return Err(DriftError::UnsupportedFormat {
                found: self.format,
                supported: BASELINE_FORMAT,
            });
        }
        for (i, s) in self.statistics.iter().enumerate() {
            s.validate()?;
            if self.statistics[..i].iter().any(|o| o.name == s.name) {
                return Err(corrupt(&s.name, BaselineFault::DuplicateName));
            }
        }
        if self.class_counts.iter().sum::<u64>() == 0 {
            return Err(corrupt("predicted_class", BaselineFault::Classes));
        }
        Ok(())
    }
}

fn corrupt(statistic: &str, fault: BaselineFault) -> DriftError {
    DriftError::CorruptBaseline {
        statistic: statistic.to_owned(),
        fault,
    }
}

fn fractions(counts: &[u64]) -> Vec<f64> {
    let total = counts.iter().sum::<u64>() as f64;
    counts
        .iter()
        .map(|&c| if total > 0.0 { c as f64 / total } else { 0.0 })
        .collect()
}

/// Reference distribution of one scalar statistic.
///
/// Values are `f32` (see [`StatValue`]), so they print compactly and compare exactly with live
/// values. Bins: `edges` are the strictly increasing inner edges; bin 0 is `(-∞, edges[0])`,
/// bin i is `[edges[i-1], edges[i])`, the last is `[edges[last], ∞)`. Bin counts rather than
/// fractions are stored: exact, shorter, and the fractions follow from them
/// ([`bin_fractions`](Self::bin_fractions)).
#[derive(Clone, Debug, PartialEq, Serialize, Deserialize)]
pub struct ScalarReference {
    pub name: String,
    /// Reference values.
    pub count: u64,
    pub min: f32,
    pub max: f32,
    pub edges: Vec<f32>,
    pub bin_counts: Vec<u64>,
    /// Quantiles at probabilities k/(len−1), k = 0..len (NumPy's default "linear" method,
    /// Hyndman & Fan 1996 type 7); first and last are `min` and `max`.
    pub quantiles: Vec<f32>,
}

impl ScalarReference {
    /// Builds the reference of one statistic from its reference values (reordered in place).
    ///
    /// Inner edges are the quantiles at 1/bins, …, (bins−1)/bins. Equal edges (a value holding
    /// a tenth of the mass or more, such as a constant statistic or a fixed image size) are
    /// merged, and such a value gets a bin of its own, `[v, next f32 after v)`: a statistic
    /// that is constant in the reference then shows any live change, up or down, as mass
    /// outside that bin.
    ///
    /// # Errors
    /// [`DriftError::NonFiniteReference`] for a NaN or infinite value,
    /// [`DriftError::TooFewValues`] below [`MIN_REFERENCE`] values,
    /// [`DriftError::BinCount`] outside [`BIN_RANGE`].
    pub fn from_values(name: &str, values: &mut [f32], bins: usize) -> Result<Self, DriftError> {
        if !(BIN_RANGE.0..=BIN_RANGE.1).contains(&bins) {
            return Err(DriftError::BinCount {
                bins,
                min: BIN_RANGE.0,
                max: BIN_RANGE.1,
            });
        }
        if let Some(i) = values.iter().position(|v| !v.is_finite()) {
            return Err(DriftError::NonFiniteReference {
                statistic: name.to_owned(),
                sample: i as u64,
            });
        }
        let count = values.len() as u64;
        if count < MIN_REFERENCE {
            return Err(DriftError::TooFewValues {
                statistic: name.to_owned(),
                got: count,
                min: MIN_REFERENCE,
            });
        }
        values.sort_unstable_by(f32::total_cmp);
        let sorted = &*values;
        let quantiles: Vec<f32> = (0..QUANTILES)
            .map(|k| quantile(sorted, k as f64 / (QUANTILES - 1) as f64))
            .collect();
        let candidates: Vec<f32> = (1..bins)
            .map(|j| quantile(sorted, j as f64 / bins as f64))
            .collect();
        let mut edges = candidates.clone();
        for (i, &v) in candidates.iter().enumerate() {
            if candidates[..i].contains(&v) {
                edges.push(v.next_up());
            }
        }
        edges.sort_unstable_by(f32::total_cmp);
        edges.dedup();
        let mut bin_counts = Vec::with_capacity(edges.len() + 1);
        let mut below_prev = 0usize;
        for &e in &edges {
            let below = sorted.partition_point(|&x| x < e);
            bin_counts.push((below - below_prev) as u64);
            below_prev = below;
        }
        bin_counts.push((sorted.len() - below_prev) as u64);
        Ok(ScalarReference {
            name: name.to_owned(),
            count,
            min: sorted[0],
            max: sorted[sorted.len() - 1],
            edges,
            bin_counts,
            quantiles,
        })
    }

    /// Number of bins.
    pub fn bins(&self) -> usize {
        self.bin_counts.len()
    }

    /// Reference fraction of each bin.
    pub fn bin_fractions(&self) -> Vec<f64> {
        fractions(&self.bin_counts)
    }

    /// The bin a value falls in (the number of edges at or below it).
    pub fn bin_of(&self, v: f32) -> usize {
        self.edges.partition_point(|&e| e <= v)
    }

    /// Whether a value lies outside the reference range [min, max].
    pub fn out_of_range(&self, v: f32) -> bool {
        v < self.min || v > self.max
    }

    /// The reference CDF F̂(x) reconstructed from the quantiles: 0 below the first, 1 from the
    /// last on, linear between neighbouring quantiles, and right-continuous where quantiles tie
    /// (a jump, as in an empirical CDF).
    ///
    /// Error bound: with K+1 quantiles at probabilities k/K taken by the type-7 rule from n
    /// reference values, the reference ECDF at qₖ lies within 1/n of k/K, and both it and F̂
    /// are non-decreasing, so on [qₖ, qₖ₊₁) both lie in [k/K − 1/n, (k+1)/K + 1/n] and
    /// |F̂ − F_ref| ≤ 1/K + 1/n everywhere (exact outside [min, max]). A KS distance computed
    /// against F̂ is therefore within 1/K + 1/n = 0.01 + 1/n of the two-sample D against the
    /// reference values themselves.
    pub fn cdf(&self, x: f64) -> f64 {
        let q = &self.quantiles;
        let k = (q.len() - 1) as f64;
        let j = q.partition_point(|&v| f64::from(v) <= x);
        if j == 0 {
            return 0.0;
        }
        if j == q.len() {
            return 1.0;
        }
        let (lo, hi) = (f64::from(q[j - 1]), f64::from(q[j]));
        ((j - 1) as f64 + (x - lo) / (hi - lo)) / k
    }

    /// The left limit F̂(x−) of [`cdf`](Self::cdf).
    pub fn cdf_left(&self, x: f64) -> f64 {
        let q = &self.quantiles;
        let k = (q.len() - 1) as f64;
        let i = q.partition_point(|&v| f64::from(v) < x);
        if i == 0 {
            return 0.0;
        }
        if i == q.len() {
            return 1.0;
        }
        let (lo, hi) = (f64::from(q[i - 1]), f64::from(q[i]));
        ((i - 1) as f64 + (x - lo) / (hi - lo)) / k
    }

    /// Checks internal consistency.
    ///
    /// # Errors
    /// [`DriftError::CorruptBaseline`] naming what is inconsistent.
    pub fn validate(&self) -> Result<(), DriftError> {
        let q = &self.quantiles;
        if q.len() < 2 || q.iter().any(|v| !v.is_finite()) || q.windows(2).any(|w| w[0] > w[1]) {
            return Err(corrupt(&self.name, BaselineFault::Quantiles));
        }
        if self.edges.iter().any(|v| !v.is_finite()) || self.edges.windows(2).any(|w| w[0] >= w[1])
        {
            return Err(corrupt(&self.name, BaselineFault::Edges));
        }
        if self.bin_counts.len() != self.edges.len() + 1 {
            return Err(corrupt(&self.name, BaselineFault::BinCounts));
        }
        let sum = self
            .bin_counts
            .iter()
            .try_fold(0u64, |acc, &c| acc.checked_add(c));
        if self.count == 0 || sum != Some(self.count) {
            return Err(corrupt(&self.name, BaselineFault::Count));
        }
        if self.min != q[0] || self.max != q[q.len() - 1] {
            return Err(corrupt(&self.name, BaselineFault::Range));
        }
        Ok(())
    }
}

/// Quantile of sorted values at probability p by linear interpolation between order
/// statistics at (n−1)·p (Hyndman & Fan, "Sample quantiles in statistical packages", 1996,
/// type 7; NumPy's default), rounded to f32. Interpolates from the nearer end, as NumPy does,
/// so a quantile between two equal values is exactly that value.
fn quantile(sorted: &[f32], p: f64) -> f32 {
    let h = (sorted.len() - 1) as f64 * p;
    let lo = h.floor() as usize;
    let t = h - lo as f64;
    let a = f64::from(sorted[lo]);
    let Some(&b) = sorted.get(lo + 1) else {
        return sorted[lo];
    };
    let b = f64::from(b);
    let v = if t < 0.5 {
        a + (b - a) * t
    } else {
        b - (b - a) * (1.0 - t)
    };
    v as f32
}

/// Collects per-sample statistics of reference data and turns them into a [`Baseline`].
#[derive(Clone, Debug)]
pub struct BaselineBuilder {
    names: Vec<String>,
    values: Vec<Vec<f32>>,
    class_counts: Vec<u64>,
    samples: u64,
    bins: usize,
}

impl BaselineBuilder {
    /// A builder for the statistics of `schema`, with [`DEFAULT_BINS`] bins.
    pub fn new(schema: &StatSchema) -> Self {
        BaselineBuilder {
            names: schema.names().to_vec(),
            values: vec![Vec::new(); schema.len()],
            class_counts: vec![0; schema.classes()],
            samples: 0,
            bins: DEFAULT_BINS,
        }
    }

    /// A builder with `bins` equal-mass bins per statistic.
    ///
    /// # Errors
    /// [`DriftError::BinCount`] outside [`BIN_RANGE`].
    pub fn with_bins(schema: &StatSchema, bins: usize) -> Result<Self, DriftError> {
        if !(BIN_RANGE.0..=BIN_RANGE.1).contains(&bins) {
            return Err(DriftError::BinCount {
                bins,
                min: BIN_RANGE.0,
                max: BIN_RANGE.1,
            });
        }
        Ok(BaselineBuilder {
            bins,
            ..BaselineBuilder::new(schema)
        })
    }

    /// Reference samples accepted so far.
    pub fn samples(&self) -> u64 {
        self.samples
    }

    /// Adds one reference sample. A refused sample leaves the builder unchanged.
    ///
    /// # Errors
    /// [`DriftError::StatsLength`] when `stats` belongs to another schema;
    /// [`DriftError::NonFiniteReference`] when a statistic or the prediction is non-finite:
    /// reference data must be clean, or the baseline would hide the very faults it should show.
    pub fn push(&mut self, stats: &SampleStats) -> Result<(), DriftError> {
        let values = stats.values();
        if values.len() != self.names.len() {
            return Err(DriftError::StatsLength {
                expected: self.names.len(),
                got: values.len(),
            });
        }
        if let Some(i) = values.iter().position(|v| *v == StatValue::NonFinite) {
            return Err(DriftError::NonFiniteReference {
                statistic: self.names[i].clone(),
                sample: self.samples,
            });
        }
        let class = stats
            .predicted_class()
            .map(|c| c as usize)
            .filter(|&c| c < self.class_counts.len());
        let Some(class) = class else {
            return Err(DriftError::NonFiniteReference {
                statistic: "predicted_class".to_owned(),
                sample: self.samples,
            });
        };
        for (column, v) in self.values.iter_mut().zip(values) {
            if let StatValue::Value(v) = v {
                column.push(*v);
            }
        }
        self.class_counts[class] += 1;
        self.samples += 1;
        Ok(())
    }

    /// The baseline. Statistics that never had a value (image statistics of a reference fed as
    /// tensors) are left out; every other one needs [`MIN_REFERENCE`] values.
    ///
    /// # Errors
    /// [`DriftError::TooFewSamples`] below [`MIN_REFERENCE`] samples,
    /// [`DriftError::TooFewValues`] for a statistic with some but too few values.
    pub fn finish(self) -> Result<Baseline, DriftError> {
        if self.samples < MIN_REFERENCE {
            return Err(DriftError::TooFewSamples {
                got: self.samples,
                min: MIN_REFERENCE,
            });
        }
        let mut statistics = Vec::with_capacity(self.names.len());
        for (name, mut values) in self.names.iter().zip(self.values) {
            if values.is_empty() {
                continue;
            }
            statistics.push(ScalarReference::from_values(name, &mut values, self.bins)?);
        }
        Ok(Baseline {
            format: BASELINE_FORMAT,
            samples: self.samples,
            statistics,
            class_counts: self.class_counts,
        })
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    /// On 0..999 the deciles by the type-7 rule are 99.9, 199.8, …, 899.1 ((n−1)·j/10 with
    /// n = 1000, Hyndman & Fan 1996), so each of the ten bins holds exactly 100 values.
    #[test]
    fn equal_mass_edges_on_0_to_999() {
        let mut values: Vec<f32> = (0..1000).rev().map(|v| v as f32).collect();
        let r = ScalarReference::from_values("x", &mut values, 10).unwrap();
        assert_eq!(r.bin_counts, vec![100; 10]);
        assert_eq!(r.bin_fractions(), vec![0.1; 10]);
        let want: Vec<f32> = (1..10)
            .map(|j| (999.0 * f64::from(j) / 10.0) as f32)
            .collect();
        assert_eq!(r.edges, want);
        assert_eq!((r.min, r.max), (0.0, 999.0));
        assert_eq!(r.quantiles[50], 499.5);
        assert_eq!(r.bin_of(99.0), 0);
        assert_eq!(r.bin_of(100.0), 1);
        assert_eq!(r.bin_of(5000.0), 9);
        r.validate().unwrap();
    }

    #[test]
    fn constant_statistic_gets_a_bin_of_its_own() {
        let mut values = vec![224.0f32; 80];
        let r = ScalarReference::from_values("image_width", &mut values, 10).unwrap();
        assert_eq!(r.edges, vec![224.0, 224.0f32.next_up()]);
        assert_eq!(r.bin_counts, vec![0, 80, 0]);
        assert_eq!(r.bin_of(224.0), 1);
        assert_eq!(r.bin_of(223.0), 0);
        assert_eq!(r.bin_of(225.0), 2);
        // The reconstructed CDF jumps from 0 to 1 at the constant.
        assert_eq!(r.cdf_left(224.0), 0.0);
        assert_eq!(r.cdf(224.0), 1.0);
    }

    #[test]
    fn heavy_value_among_others_is_isolated() {
        // 40 % zeros (say, entropy of confident predictions), then 1..=60.
        let mut values: Vec<f32> = [0.0f32; 40]
            .into_iter()
            .chain((1..=60).map(|v| v as f32))
            .collect();
        let r = ScalarReference::from_values("entropy", &mut values, 10).unwrap();
        assert_eq!(r.edges[0], 0.0);
        assert_eq!(r.edges[1], 0.0f32.next_up());
        assert_eq!(r.bin_counts[0], 0);
        assert_eq!(r.bin_counts[1], 40);
        assert_eq!(r.bin_counts.iter().sum::<u64>(), 100);
        r.validate().unwrap();
    }

    #[test]
    fn reconstructed_cdf_is_exact_at_quantiles() {
        let mut values: Vec<f32> = (0..1000).map(|v| v as f32).collect();
        let r = ScalarReference::from_values("x", &mut values, 10).unwrap();
        assert_eq!(r.cdf(-1.0), 0.0);
        assert_eq!(r.cdf(999.0), 1.0);
        assert!((r.cdf(f64::from(r.quantiles[30])) - 0.30).abs() < 1e-12);
        // Halfway between two quantiles, halfway between their probabilities.
        let mid = (f64::from(r.quantiles[30]) + f64::from(r.quantiles[31])) / 2.0;
        assert!((r.cdf(mid) - 0.305).abs() < 1e-9);
        assert!((r.cdf_left(mid) - 0.305).abs() < 1e-9);
    }

    #[test]
    fn refusals() {
        let mut few = vec![1.0f32; 49];
        assert!(matches!(
            ScalarReference::from_values("x", &mut few, 10),
            Err(DriftError::TooFewValues { got: 49, .. })
        ));
        let mut nan = vec![1.0f32; 60];
        nan[7] = f32::NAN;
        assert!(matches!(
            ScalarReference::from_values("x", &mut nan, 10),
            Err(DriftError::NonFiniteReference { sample: 7, .. })
        ));
        let mut ok = vec![1.0f32; 60];
        assert!(ScalarReference::from_values("x", &mut ok, 1).is_err());
    }

    fn small_baseline() -> Baseline {
        let schema = StatSchema::new(1, 3, 3, false, 3).unwrap();
        let mut builder = BaselineBuilder::new(&schema);
        let mut stats = schema.new_stats();
        for i in 0..60u32 {
            let input: Vec<f32> = (0..9)
                .map(|k| ((i * 7 + k * 3) % 11) as f32 / 10.0)
                .collect();
            let p = [0.2, 0.3 + (i % 3) as f32 * 0.1, 0.1];
            schema.compute(&input, None, &p, &mut stats).unwrap();
            builder.push(&stats).unwrap();
        }
        builder.finish().unwrap()
    }

    #[test]
    fn baseline_round_trips_through_json() {
        let b = small_baseline();
        b.validate().unwrap();
        assert_eq!(b.samples, 60);
        assert_eq!(b.class_counts, vec![0, 60, 0]);
        let json = serde_json::to_string(&b).unwrap();
        let back: Baseline = serde_json::from_str(&json).unwrap();
        assert_eq!(back, b);
        back.validate().unwrap();
    }

    #[test]
    fn corrupt_or_foreign_baselines_are_refused() {
        let mut b = small_baseline();
        b.format = 2;
        assert!(matches!(
            b.validate(),
            Err(DriftError::UnsupportedFormat { found: 2, .. })
        ));
        let mut b = small_baseline();
        b.statistics[0].bin_counts[0] += 1;
        assert!(matches!(
            b.validate(),
            Err(DriftError::CorruptBaseline {
                fault: BaselineFault::Count,
                ..
            })
        ));
        let mut b = small_baseline();
        b.statistics[1].quantiles.swap(0, 100);
        assert!(b.validate().is_err());
    }

    #[test]
    fn builder_refuses_small_or_dirty_references() {
        let schema = StatSchema::new(1, 1, 1, false, 2).unwrap();
        let mut builder = BaselineBuilder::new(&schema);
        let mut stats = schema.new_stats();
        schema
            .compute(&[f32::NAN], None, &[0.5, 0.5], &mut stats)
            .unwrap();
        assert!(matches!(
            builder.push(&stats),
            Err(DriftError::NonFiniteReference { .. })
        ));
        assert_eq!(builder.samples(), 0);
        schema
            .compute(&[1.0], None, &[0.5, 0.5], &mut stats)
            .unwrap();
        builder.push(&stats).unwrap();
        assert!(matches!(
            builder.finish(),
            Err(DriftError::TooFewSamples { got: 1, min: 50 })
        ));
    }

    /// The size the module doc states: 20 statistics of 1,000 distinct values each.
    #[test]
    fn twenty_statistics_stay_near_27_kb() {
        let statistics = (0..20)
            .map(|s| {
                let mut v: Vec<f32> = (0..1000)
                    .map(|i| ((i * 7919 + s * 104_729) % 1000) as f32 / 997.0 - 0.3)
                    .collect();
                ScalarReference::from_values(&format!("stat_{s}"), &mut v, 10).unwrap()
            })
            .collect();
        let b = Baseline {
            format: BASELINE_FORMAT,
            samples: 1000,
            statistics,
            class_counts: vec![100; 10],
        };
        let len = serde_json::to_string(&b).unwrap().len();
        assert!(len < 30_000, "{len} bytes");
    }
}
