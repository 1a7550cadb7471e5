//! The live side: a bounded ring of the last N samples' statistics for one model version,
//! cumulative counters for export, and the drift report computed from the ring against the
//! version's baseline.
//!
//! Compute threads call [`DriftWindow::record`] once per served sample; it holds a std
//! [`Mutex`] for a copy of a few dozen values and as many binary searches over at most a
//! hundred edges — no allocation, no I/O, nothing that can block — so contention stays
//! negligible next to a model evaluation, and an async mutex would buy nothing: the callers are
//! plain threads, not tasks. [`DriftWindow::report`] copies the ring under the lock and runs
//! the tests after releasing it, so an exact KS p-value never stalls recording.

use std::sync::{Arc, Mutex, MutexGuard, PoisonError};

use serde::Serialize;

use super::DriftError;
use super::baseline::Baseline;
use super::report::{ClassReport, DriftReport, StatReport, Verdict};
use super::sample::{SampleStats, StatSchema, StatValue};
use super::tests_stat::{PsiBand, bonferroni_level, class_chisquare, ks_against_reference, psi};

/// Sizes of a window.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub struct WindowConfig {
    /// Samples kept: the last `capacity` served samples are tested.
    pub capacity: usize,
    /// Below this many values a statistic's verdict is [`Verdict::TooFewSamples`].
    pub min_samples: usize,
}

impl Default for WindowConfig {
    /// 500 samples: a window's KS critical distance at α = 0.05 (about 1.36·√(1/500 + 1/n_ref),
    /// 0.06–0.07) is small enough to see a shift of a few percent of mass, and at a few hundred
    /// requests per second the window spans seconds to minutes. 50 as minimum, for the
    /// reason [`MIN_REFERENCE`](super::baseline::MIN_REFERENCE) gives: PSI over ten bins is
    /// noise below about five values per bin.
    fn default() -> Self {
        WindowConfig {
            capacity: 500,
            min_samples: 50,
        }
    }
}

impl WindowConfig {
    /// # Errors
    /// [`DriftError::InvalidWindow`] when `capacity` is zero or `min_samples` exceeds it.
    pub fn validate(&self) -> Result<(), DriftError> {
        if self.capacity == 0 || self.min_samples > self.capacity {
            return Err(DriftError::InvalidWindow {
                capacity: self.capacity,
                min_samples: self.min_samples,
            });
        }
        Ok(())
    }
}

/// One statistic monitored by a window: its slot in [`SampleStats`] and its reference.
#[derive(Clone, Debug)]
struct Monitored {
    slot: usize,
    reference: usize,
}

/// Cumulative counts since the window was created or last reset.
#[derive(Clone, Debug, Default, PartialEq, Eq, Serialize)]
pub struct StatCounters {
    pub name: String,
    /// Values per baseline bin (label: bin index).
    pub bin_counts: Vec<u64>,
    /// Values outside the reference [min, max].
    pub out_of_range: u64,
    /// Samples whose value was non-finite.
    pub non_finite: u64,
}

/// Snapshot of a window's cumulative counters, for export as Prometheus counters. Label values
/// are bounded: statistic names come from the model's schema, bin indices from its baseline,
/// classes from its output length.
#[derive(Clone, Debug, Default, PartialEq, Eq, Serialize)]
pub struct DriftCounters {
    pub samples: u64,
    pub statistics: Vec<StatCounters>,
    /// Predictions per class.
    pub class_counts: Vec<u64>,
    /// Samples whose output was not a probability vector.
    pub class_non_finite: u64,
}

struct State {
    schema_len: usize,
    classes: usize,
    baseline: Arc<Baseline>,
    monitored: Vec<Monitored>,
    capacity: usize,
    /// Next ring position to write.
    head: usize,
    len: usize,
    /// `capacity × monitored.len()`, row per sample.
    values: Vec<StatValue>,
    /// Predicted class per ring position.
    predicted: Vec<Option<u32>>,
    counters: DriftCounters,
}

impl State {
    fn new(
        schema: &StatSchema,
        baseline: Arc<Baseline>,
        config: WindowConfig,
    ) -> Result<Self, DriftError> {
        config.validate()?;
        baseline.validate()?;
        let monitored: Vec<Monitored> = schema
            .names()
            .iter()
            .enumerate()
            .filter_map(|(slot, name)| {
                let reference = baseline.statistics.iter().position(|s| &s.name == name)?;
                Some(Monitored { slot, reference })
            })
            .collect();
        if monitored.is_empty() {
            return Err(DriftError::BaselineMismatch);
        }
        let statistics = monitored
            .iter()
            .map(|m| {
                let r = &baseline.statistics[m.reference];
                StatCounters {
                    name: r.name.clone(),
                    bin_counts: vec![0; r.bins()],
                    out_of_range: 0,
                    non_finite: 0,
                }
            })
            .collect();
        Ok(State {
            schema_len: schema.len(),
            classes: schema.classes(),
            values: vec![StatValue::Absent; config.capacity * monitored.len()],
            predicted: vec![None; config.capacity],
            monitored,
            baseline,
            capacity: config.capacity,
            head: 0,
            len: 0,
            counters: DriftCounters {
                samples: 0,
                statistics,
                class_counts: vec![0; schema.classes()],
                class_non_finite: 0,
            },
        })
    }
}

/// Drift monitoring state of one model version.
pub struct DriftWindow {
    config: WindowConfig,
    state: Mutex<State>,
}

impl DriftWindow {
    /// A window for samples of `schema`, judged against `baseline`. Statistics of the schema
    /// that the baseline lacks are not monitored; the baseline's others are ignored.
    ///
    /// # Errors
    /// [`DriftError::InvalidWindow`]; any error of [`Baseline::validate`];
    /// [`DriftError::BaselineMismatch`] when schema and baseline share no statistic.
    pub fn new(
        schema: &StatSchema,
        baseline: Arc<Baseline>,
        config: WindowConfig,
    ) -> Result<Self, DriftError> {
        Ok(DriftWindow {
            config,
            state: Mutex::new(State::new(schema, baseline, config)?),
        })
    }

    fn lock(&self) -> MutexGuard<'_, State> {
        // No code path panics while holding the lock, and the state is plain counts that stay
        // consistent sample by sample; so a poisoned lock is still safe to use.
        self.state.lock().unwrap_or_else(PoisonError::into_inner)
    }

    /// Adds one served sample's statistics, evicting the oldest beyond capacity.
    ///
    /// # Errors
    /// [`DriftError::StatsLength`] when `stats` comes from another schema.
    pub fn record(&self, stats: &SampleStats) -> Result<(), DriftError> {
        let mut guard = self.lock();
        let st = &mut *guard;
        let values = stats.values();
        if values.len() != st.schema_len {
            return Err(DriftError::StatsLength {
                expected: st.schema_len,
                got: values.len(),
            });
        }
        let width = st.monitored.len();
        let row = &mut st.values[st.head * width..(st.head + 1) * width];
        for ((cell, m), counters) in row
            .iter_mut()
            .zip(&st.monitored)
            .zip(&mut st.counters.statistics)
        {
            let v = values[m.slot];
            *cell = v;
            match v {
                StatValue::Value(x) => {
                    let r = &st.baseline.statistics[m.reference];
                    counters.bin_counts[r.bin_of(x)] += 1;
                    if r.out_of_range(x) {
                        counters.out_of_range += 1;
                    }
                }
                StatValue::NonFinite => counters.non_finite += 1,
                StatValue::Absent => {}
            }
        }
        let class = stats
            .predicted_class()
            .filter(|&c| (c as usize) < st.classes);
        st.predicted[st.head] = class;
        match class {
            Some(c) => st.counters.class_counts[c as usize] += 1,
            None => st.counters.class_non_finite += 1,
        }
        st.counters.samples += 1;
        st.head = (st.head + 1) % st.capacity;
        st.len = (st.len + 1).min(st.capacity);
        Ok(())
    }

    /// Samples the window holds when full.
    pub fn capacity(&self) -> usize {
        self.config.capacity
    }

    /// Empties the window but keeps the cumulative counters, so that counters exported to
    /// Prometheus never go down: what the server does when a version becomes active again.
    pub fn restart(&self) {
        let mut st = self.lock();
        st.len = 0;
        st.head = 0;
    }

    /// Empties the window and zeroes the counters, keeping schema and baseline.
    pub fn clear(&self) {
        let mut st = self.lock();
        st.len = 0;
        st.head = 0;
        st.counters.samples = 0;
        st.counters.class_non_finite = 0;
        st.counters.class_counts.iter_mut().for_each(|c| *c = 0);
        for s in &mut st.counters.statistics {
            s.bin_counts.iter_mut().for_each(|c| *c = 0);
            s.out_of_range = 0;
            s.non_finite = 0;
        }
    }

    /// Starts over for a new active version: new schema and baseline, empty window, zeroed
    /// counters (the bins change with the baseline, so old counts would mean nothing; an
    /// exporter should label series by version). On error the window is left as it was.
    ///
    /// # Errors
    /// As [`new`](Self::new).
    pub fn reset(&self, schema: &StatSchema, baseline: Arc<Baseline>) -> Result<(), DriftError> {
        let fresh = State::new(schema, baseline, self.config)?;
        *self.lock() = fresh;
        Ok(())
    }

    /// The cumulative counters.
    pub fn counters(&self) -> DriftCounters {
        self.lock().counters.clone()
    }

    /// Tests the window against the baseline at significance level `alpha`.
    ///
    /// KS tests are judged at α/m, m the number of statistics with values in the window
    /// (Bonferroni, see [`bonferroni_level`]); the predicted-class chi-square test is a single
    /// test at α, as Rabanser et al. (2019) use it on predicted labels.
    ///
    /// # Errors
    /// [`DriftError::InvalidAlpha`] unless 0 < α < 1.
    pub fn report(&self, alpha: f64) -> Result<DriftReport, DriftError> {
        if !(alpha > 0.0 && alpha < 1.0) {
            return Err(DriftError::InvalidAlpha { alpha });
        }
        let (baseline, monitored, columns, non_finite, class_counts, class_non_finite, samples) = {
            let st = self.lock();
            let width = st.monitored.len();
            let mut columns = vec![Vec::with_capacity(st.len); width];
            let mut non_finite = vec![0u64; width];
            let mut class_counts = vec![0u64; st.classes];
            let mut class_non_finite = 0u64;
            for row in 0..st.len {
                let cells = &st.values[row * width..(row + 1) * width];
                for (k, cell) in cells.iter().enumerate() {
                    match *cell {
                        StatValue::Value(x) => columns[k].push(x),
                        StatValue::NonFinite => non_finite[k] += 1,
                        StatValue::Absent => {}
                    }
                }
                match st.predicted[row] {
                    Some(c) => class_counts[c as usize] += 1,
                    None => class_non_finite += 1,
                }
            }
            (
                Arc::clone(&st.baseline),
                st.monitored.clone(),
                columns,
                non_finite,
                class_counts,
                class_non_finite,
                st.len,
            )
        };

        let tests = columns.iter().filter(|c| !c.is_empty()).count();
        let ks_level = bonferroni_level(alpha, tests);
        let min = self.config.min_samples;
        let mut statistics = Vec::with_capacity(monitored.len());
        for ((m, values), non_finite) in monitored.iter().zip(&columns).zip(non_finite) {
            let r = &baseline.statistics[m.reference];
            let mut bins = vec![0u64; r.bins()];
            let mut out_of_range = 0u64;
            for &x in values {
                bins[r.bin_of(x)] += 1;
                out_of_range += u64::from(r.out_of_range(x));
            }
            // Both tests fail only on an empty or non-finite live sample, which the column
            // never is when it has values.
            let psi = psi(&r.bin_fractions(), &bins).ok();
            let ks = ks_against_reference(values, r).ok();
            let psi_band = psi.map(PsiBand::of);
            let ks_significant = ks.is_some_and(|k| k.p_value < ks_level);
            statistics.push(StatReport {
                window_bins: bins,
                name: r.name.clone(),
                window: values.len(),
                reference: r.count,
                psi,
                psi_band,
                ks,
                ks_significant,
                out_of_range,
                non_finite,
                verdict: Verdict::judge(values.len(), min, psi_band, ks_significant),
            });
        }

        let predicted_class = class_report(
            &baseline.class_counts,
            &class_counts,
            class_non_finite,
            alpha,
            min,
        );
        let drift = statistics.iter().any(|s| s.verdict == Verdict::Drift)
            || predicted_class
                .as_ref()
                .is_some_and(|c| c.verdict == Verdict::Drift);
        Ok(DriftReport {
            alpha,
            ks_tests: tests,
            ks_level,
            samples,
            statistics,
            predicted_class,
            drift,
        })
    }
}

/// The predicted-class test of a window: `None` while the window holds no predictions.
fn class_report(
    baseline_counts: &[u64],
    class_counts: &[u64],
    class_non_finite: u64,
    alpha: f64,
    min: usize,
) -> Option<ClassReport> {
    let live_total: u64 = class_counts.iter().sum();
    if live_total == 0 {
        None
    } else {
        let classes = baseline_counts.len().max(class_counts.len());
        let pad = |v: &[u64]| {
            let mut v = v.to_vec();
            v.resize(classes, 0);
            v
        };
        let (reference, live) = (pad(baseline_counts), pad(class_counts));
        let fractions: Vec<f64> = {
            let n: u64 = reference.iter().sum();
            reference.iter().map(|&c| c as f64 / n as f64).collect()
        };
        let psi = psi(&fractions, &live).ok();
        let chi_square = class_chisquare(&reference, &live).ok();
        let significant = chi_square.is_some_and(|c| c.p_value < alpha);
        let psi_band = psi.map(PsiBand::of);
        Some(ClassReport {
            window: live_total as usize,
            psi,
            psi_band,
            chi_square,
            significant,
            non_finite: class_non_finite,
            verdict: Verdict::judge(live_total as usize, min, psi_band, significant),
            window_counts: live,
        })
    }
}

#[cfg(test)]
mod tests {
    use super::*;
    use crate::drift::baseline::BaselineBuilder;

    /// SplitMix64 (Steele, Lea & Flood, "Fast splittable pseudorandom number generators",
    /// OOPSLA 2014): a tiny deterministic generator, so the test needs no crate.
    struct SplitMix(u64);
    impl SplitMix {
        fn next_u64(&mut self) -> u64 {
            self.0 = self.0.wrapping_add(0x9E37_79B9_7F4A_7C15);
            let mut z = self.0;
            z = (z ^ (z >> 30)).wrapping_mul(0xBF58_476D_1CE4_E5B9);
            z = (z ^ (z >> 27)).wrapping_mul(0x94D0_49BB_1331_11EB);
            z ^ (z >> 31)
        }
        fn uniform(&mut self) -> f64 {
            ((self.next_u64() >> 11) as f64 + 0.5) / (1u64 << 53) as f64
        }
        /// Standard normal by Box & Muller (1958).
        fn normal(&mut self) -> f64 {
            let (u, v) = (self.uniform(), self.uniform());
            (-2.0 * u.ln()).sqrt() * (2.0 * std::f64::consts::PI * v).cos()
        }
    }

    /// 1-channel 4×4 inputs: pixel = level + noise; two classes whose probabilities follow
    /// the level.
    fn feed(
        schema: &StatSchema,
        rng: &mut SplitMix,
        shift: f64,
        n: usize,
        mut sink: impl FnMut(&SampleStats),
    ) {
        let mut stats = schema.new_stats();
        for _ in 0..n {
            let level = rng.normal() + shift;
            let input: Vec<f32> = (0..16)
                .map(|_| (level + 0.3 * rng.normal()) as f32)
                .collect();
            let p1 = (1.0 / (1.0 + (-level).exp())) as f32;
            schema
                .compute(&input, None, &[1.0 - p1, p1], &mut stats)
                .unwrap();
            sink(&stats);
        }
    }

    fn setup() -> (StatSchema, Arc<Baseline>, SplitMix) {
        let schema = StatSchema::new(1, 4, 4, false, 2).unwrap();
        let mut rng = SplitMix(42);
        let mut builder = BaselineBuilder::new(&schema);
        feed(&schema, &mut rng, 0.0, 2000, |s| builder.push(s).unwrap());
        (schema, Arc::new(builder.finish().unwrap()), rng)
    }

    #[test]
    fn window_like_the_baseline_is_stable_and_a_shifted_one_drifts() {
        let (schema, baseline, mut rng) = setup();
        let window = DriftWindow::new(&schema, baseline, WindowConfig::default()).unwrap();
        feed(&schema, &mut rng, 0.0, 500, |s| window.record(s).unwrap());
        let same = window.report(0.05).unwrap();
        let mean = &same.statistics[0];
        assert_eq!(mean.name, "mean_c0");
        assert_eq!(mean.window, 500);
        // Expected PSI of two samples from one distribution is about (bins−1)·(1/n + 1/N)
        // ≈ 9·(1/500 + 1/2000) ≈ 0.02 (chi-square approximation of PSI, from memory).
        assert!(mean.psi.unwrap() < 0.1, "{:?}", mean.psi);
        assert!(!mean.ks_significant, "{:?}", mean.ks);

        // A one-standard-deviation shift of the level: the mean of every image moves by 1σ.
        window.clear();
        feed(&schema, &mut rng, 1.0, 500, |s| window.record(s).unwrap());
        let shifted = window.report(0.05).unwrap();
        let mean = &shifted.statistics[0];
        assert!(mean.psi.unwrap() > 0.25, "{:?}", mean.psi);
        assert!(mean.ks_significant);
        assert_eq!(mean.verdict, Verdict::Drift);
        assert!(shifted.drift);
        let classes = shifted.predicted_class.unwrap();
        assert!(classes.significant, "{classes:?}");
    }

    #[test]
    fn ring_keeps_the_last_samples_and_counters_keep_everything() {
        let (schema, baseline, mut rng) = setup();
        let config = WindowConfig {
            capacity: 100,
            min_samples: 50,
        };
        let window = DriftWindow::new(&schema, baseline, config).unwrap();
        feed(&schema, &mut rng, 0.0, 30, |s| window.record(s).unwrap());
        let early = window.report(0.05).unwrap();
        assert_eq!(early.samples, 30);
        assert_eq!(early.statistics[0].verdict, Verdict::TooFewSamples);
        feed(&schema, &mut rng, 0.0, 220, |s| window.record(s).unwrap());
        let report = window.report(0.05).unwrap();
        assert_eq!(report.samples, 100);
        assert_eq!(report.statistics[0].window, 100);
        let counters = window.counters();
        assert_eq!(counters.samples, 250);
        assert_eq!(counters.statistics[0].bin_counts.iter().sum::<u64>(), 250);
        assert_eq!(counters.class_counts.iter().sum::<u64>(), 250);

        // Non-finite inputs are counted, not averaged.
        let mut stats = schema.new_stats();
        schema
            .compute(&[f32::NAN; 16], None, &[0.5, 0.5], &mut stats)
            .unwrap();
        window.record(&stats).unwrap();
        assert_eq!(window.counters().statistics[0].non_finite, 1);
        assert_eq!(window.report(0.05).unwrap().statistics[0].non_finite, 1);

        window.clear();
        assert_eq!(window.counters().samples, 0);
        assert_eq!(window.report(0.05).unwrap().samples, 0);
    }

    #[test]
    fn refusals() {
        let (schema, baseline, _) = setup();
        let bad = WindowConfig {
            capacity: 10,
            min_samples: 20,
        };
        assert!(DriftWindow::new(&schema, Arc::clone(&baseline), bad).is_err());
        let window =
            DriftWindow::new(&schema, Arc::clone(&baseline), WindowConfig::default()).unwrap();
        assert!(window.report(0.0).is_err());
        assert!(window.report(f64::NAN).is_err());
        let other = StatSchema::new(3, 4, 4, false, 2).unwrap();
        assert!(matches!(
            window.record(&other.new_stats()),
            Err(DriftError::StatsLength { .. })
        ));
        // A model whose statistics the baseline does not know at all.
        let unrelated = Baseline {
            statistics: vec![],
            ..(*baseline).clone()
        };
        assert!(matches!(
            DriftWindow::new(&schema, Arc::new(unrelated), WindowConfig::default()),
            Err(DriftError::BaselineMismatch)
        ));
        // Reset to a new version's schema and baseline.
        window.reset(&schema, baseline).unwrap();
    }
}
