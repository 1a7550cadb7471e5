//! Per-sample statistics: one prepared model input (plus the original image's size and the
//! model's output probabilities) → a fixed, named list of scalar statistics and the predicted
//! class.
//!
//! A [`StatSchema`] is built once per model from its input shape, whether it takes images and
//! its number of classes; it fixes the statistic names and their order, so every sample of a
//! model yields the same names and metric labels stay bounded. [`StatSchema::compute`] fills a
//! caller-owned [`SampleStats`] without allocating, because it runs for every served sample.
//!
//! The input statistics are computed on the model's own, already normalised input
//! `(pixel·scale − mean[c]) / std[c]`. That map is increasing and affine per channel, so it
//! maps a channel's mean and contrast by increasing affine maps too; the drift tests applied
//! later (PSI over quantile bins, Kolmogorov–Smirnov) depend only on the order of a
//! statistic's values, which such maps preserve, so their verdicts are the same as on raw
//! pixels. Sharpness mixes channels, so for it the normalisation is a fixed change of
//! definition rather than a monotone relabelling; it applies alike to reference and live
//! samples, so comparing them stays meaningful.

use super::DriftError;
use super::kernels::{Moments, OutputSummary, finite_value, laplacian_variance};
use crate::prepare::ImageFacts;

/// Models with more channels than this get one pooled mean and contrast instead of one pair per
/// channel: tensor models may have dozens of channels, and a pair per channel would multiply
/// statistics and metric label values without telling an operator much more.
pub const MAX_CHANNEL_STATS: usize = 16;

/// One statistic's value for one sample.
///
/// Values are stored as `f32`, the precision of the model input they come from. Keeping every
/// value `f32`-representable means a baseline stores them exactly, so ties (a fixed image size,
/// a constant channel) compare equal between reference and live samples.
#[derive(Clone, Copy, Debug, PartialEq)]
pub enum StatValue {
    Value(f32),
    /// Not defined for this sample (no image facts: the sample arrived as a tensor).
    Absent,
    /// The values it is computed from held NaN or infinity, or the model output was not a
    /// probability vector (a negative entry or a zero sum).
    NonFinite,
}

impl StatValue {
    /// The value, when there is one.
    pub fn value(self) -> Option<f32> {
        match self {
            StatValue::Value(v) => Some(v),
            _ => None,
        }
    }
}

/// What one statistic of a schema measures.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub enum StatKind {
    /// Mean of one input channel.
    ChannelMean(usize),
    /// Population standard deviation of one input channel.
    ChannelContrast(usize),
    /// Mean of the whole input (more than [`MAX_CHANNEL_STATS`] channels).
    PooledMean,
    /// Population standard deviation of the whole input.
    PooledContrast,
    /// Variance of the 4-neighbour Laplacian of the channel mean.
    Sharpness,
    ImageWidth,
    ImageHeight,
    /// Width / height of the original image.
    Aspect,
    /// Largest output probability.
    Top1Probability,
    /// Shannon entropy (natural log) of the output probabilities.
    Entropy,
}

impl StatKind {
    /// The statistic's name: the metric label value and the key in a baseline.
    pub fn name(self) -> String {
        match self {
            StatKind::ChannelMean(k) => format!("mean_c{k}"),
            StatKind::ChannelContrast(k) => format!("contrast_c{k}"),
            StatKind::PooledMean => "mean_all".to_owned(),
            StatKind::PooledContrast => "contrast_all".to_owned(),
            StatKind::Sharpness => "sharpness".to_owned(),
            StatKind::ImageWidth => "image_width".to_owned(),
            StatKind::ImageHeight => "image_height".to_owned(),
            StatKind::Aspect => "aspect".to_owned(),
            StatKind::Top1Probability => "top1_probability".to_owned(),
            StatKind::Entropy => "entropy".to_owned(),
        }
    }
}

/// The statistics of one model: names, order and the input they expect.
#[derive(Clone, Debug, PartialEq)]
pub struct StatSchema {
    channels: usize,
    height: usize,
    width: usize,
    classes: usize,
    kinds: Vec<StatKind>,
    names: Vec<String>,
    /// Index of `sharpness`, when the input is at least 3×3.
    sharpness: Option<usize>,
    /// Index of `image_width` (then `image_height`, `aspect`), when the model takes images.
    facts: Option<usize>,
    /// Index of `top1_probability` (then `entropy`).
    outputs: usize,
}

impl StatSchema {
    /// The schema of a model whose input is `channels × height × width` (C×H×W order), that
    /// takes encoded images when `takes_images`, and that outputs `classes` probabilities.
    ///
    /// Statistics, in order: `mean_c{k}` for every channel, `contrast_c{k}` for every channel
    /// (`mean_all`, `contrast_all` above [`MAX_CHANNEL_STATS`] channels), `sharpness` when
    /// height and width are at least 3, `image_width`, `image_height`, `aspect` when the model
    /// takes images, `top1_probability`, `entropy`.
    ///
    /// # Errors
    /// [`DriftError::EmptyInput`] when a dimension is zero or the product overflows,
    /// [`DriftError::NoClasses`] when `classes` is zero.
    pub fn new(
        channels: usize,
        height: usize,
        width: usize,
        takes_images: bool,
        classes: usize,
    ) -> Result<Self, DriftError> {
        let len = channels
            .checked_mul(height)
            .and_then(|v| v.checked_mul(width));
        if !matches!(len, Some(n) if n > 0) {
            return Err(DriftError::EmptyInput {
                channels,
                height,
                width,
            });
        }
        if classes == 0 {
            return Err(DriftError::NoClasses);
        }
        let mut kinds = Vec::new();
        if channels <= MAX_CHANNEL_STATS {
            kinds.extend((0..channels).map(StatKind::ChannelMean));
            kinds.extend((0..channels).map(StatKind::ChannelContrast));
        } else {
            kinds.extend([StatKind::PooledMean, StatKind::PooledContrast]);
        }
        let sharpness = (height >= 3 && width >= 3).then(|| {
            kinds.push(StatKind::Sharpness);
            kinds.len() - 1
        });
        let facts = takes_images.then(|| {
            kinds.extend([
                StatKind::ImageWidth,
                StatKind::ImageHeight,
                StatKind::Aspect,
            ]);
            kinds.len() - 3
        });
        kinds.extend([StatKind::Top1Probability, StatKind::Entropy]);
        let outputs = kinds.len() - 2;
        let names = kinds.iter().map(|k| k.name()).collect();
        Ok(StatSchema {
            channels,
            height,
            width,
            classes,
            kinds,
            names,
            sharpness,
            facts,
            outputs,
        })
    }

    /// Statistic names, in the order of [`SampleStats::values`].
    pub fn names(&self) -> &[String] {
        &self.names
    }

    /// What each statistic measures, in the same order.
    pub fn kinds(&self) -> &[StatKind] {
        &self.kinds
    }

    /// Number of scalar statistics.
    pub fn len(&self) -> usize {
        self.kinds.len()
    }

    /// Always false: every schema has at least the two output statistics.
    pub fn is_empty(&self) -> bool {
        self.kinds.is_empty()
    }

    /// Number of output classes (the range of the predicted class).
    pub fn classes(&self) -> usize {
        self.classes
    }

    /// Position of a statistic by name.
    pub fn index_of(&self, name: &str) -> Option<usize> {
        self.names.iter().position(|n| n == name)
    }

    /// A buffer for [`compute`](Self::compute), to be reused sample after sample.
    pub fn new_stats(&self) -> SampleStats {
        SampleStats {
            values: vec![StatValue::Absent; self.kinds.len()],
            predicted_class: None,
            non_finite_inputs: 0,
        }
    }

    /// Computes every statistic of one sample into `out`, without allocating.
    ///
    /// `input` is the model input of this sample (C×H×W f32), `facts` the original image's size
    /// when the sample arrived as an encoded image, `probabilities` the model's output for it.
    /// Non-finite input values make the statistics of their channel (and sharpness)
    /// [`StatValue::NonFinite`] and are counted in [`SampleStats::non_finite_inputs`]; a
    /// non-finite, negative or all-zero probability vector makes the output statistics
    /// non-finite and the predicted class `None`. Probabilities are divided by their sum, as
    /// `scipy.stats.entropy` does, so a vector rounded to slightly more or less than 1 is fine.
    ///
    /// # Errors
    /// [`DriftError::InputLength`], [`DriftError::OutputLength`] or
    /// [`DriftError::StatsLength`] when a slice or `out` does not belong to this schema.
    pub fn compute(
        &self,
        input: &[f32],
        facts: Option<ImageFacts>,
        probabilities: &[f32],
        out: &mut SampleStats,
    ) -> Result<(), DriftError> {
        if probabilities.len() != self.classes {
            return Err(DriftError::OutputLength {
                expected: self.classes,
                got: probabilities.len(),
            });
        }
        self.compute_input(input, facts, out)?;
        self.compute_output(probabilities, out)
    }

    /// `out` must be this schema's: one slot per statistic.
    fn check_stats(&self, out: &SampleStats) -> Result<(), DriftError> {
        if out.values.len() == self.kinds.len() {
            Ok(())
        } else {
            Err(DriftError::StatsLength {
                expected: self.kinds.len(),
                got: out.values.len(),
            })
        }
    }

    /// The input half of [`StatSchema::compute`]: every statistic but `top1_probability`,
    /// `entropy` and the predicted class. The server runs it where the input is prepared (a
    /// blocking thread), and the cheap output half once the batch is computed.
    ///
    /// # Errors
    /// [`DriftError::InputLength`] or [`DriftError::StatsLength`].
    pub fn compute_input(
        &self,
        input: &[f32],
        facts: Option<ImageFacts>,
        out: &mut SampleStats,
    ) -> Result<(), DriftError> {
        let plane = self.height * self.width;
        let expected = self.channels * plane;
        if input.len() != expected {
            return Err(DriftError::InputLength {
                expected,
                got: input.len(),
            });
        }
        self.check_stats(out)?;
        let mut non_finite = 0u32;
        if self.channels <= MAX_CHANNEL_STATS {
            for (k, channel) in input.chunks_exact(plane).enumerate() {
                let m = Moments::of(channel);
                non_finite = non_finite.saturating_add(m.non_finite);
                out.values[k] = m.mean();
                out.values[self.channels + k] = m.std();
            }
        } else {
            let m = Moments::of(input);
            non_finite = m.non_finite;
            out.values[0] = m.mean();
            out.values[1] = m.std();
        }
        out.non_finite_inputs = non_finite;
        if let Some(slot) = self.sharpness {
            out.values[slot] = if non_finite > 0 {
                StatValue::NonFinite
            } else {
                finite_value(laplacian_variance(
                    input,
                    self.channels,
                    self.height,
                    self.width,
                ))
            };
        }
        if let Some(slot) = self.facts {
            let [w, h, a] = match facts {
                Some(f) if f.width > 0 && f.height > 0 => {
                    let (w, h) = (f64::from(f.width), f64::from(f.height));
                    [w, h, w / h].map(finite_value)
                }
                _ => [StatValue::Absent; 3],
            };
            out.values[slot] = w;
            out.values[slot + 1] = h;
            out.values[slot + 2] = a;
        }
        Ok(())
    }

    /// The output half of [`StatSchema::compute`]: `top1_probability`, `entropy` and the
    /// predicted class.
    ///
    /// # Errors
    /// [`DriftError::OutputLength`] or [`DriftError::StatsLength`].
    pub fn compute_output(
        &self,
        probabilities: &[f32],
        out: &mut SampleStats,
    ) -> Result<(), DriftError> {
        if probabilities.len() != self.classes {
            return Err(DriftError::OutputLength {
                expected: self.classes,
                got: probabilities.len(),
            });
        }
        self.check_stats(out)?;
        let summary = OutputSummary::of(probabilities);
        out.values[self.outputs] = summary.top1;
        out.values[self.outputs + 1] = summary.entropy;
        out.predicted_class = summary.class;
        Ok(())
    }
}

/// The statistics of one sample, filled by [`StatSchema::compute`].
#[derive(Clone, Debug, PartialEq)]
pub struct SampleStats {
    values: Vec<StatValue>,
    predicted_class: Option<u32>,
    non_finite_inputs: u32,
}

impl SampleStats {
    /// One value per statistic of the schema, in its order.
    pub fn values(&self) -> &[StatValue] {
        &self.values
    }

    /// Argmax of the probabilities (ties → lowest index); `None` when they were not a
    /// probability vector.
    pub fn predicted_class(&self) -> Option<u32> {
        self.predicted_class
    }

    /// How many input values were NaN or infinite.
    pub fn non_finite_inputs(&self) -> u32 {
        self.non_finite_inputs
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn value(stats: &SampleStats, schema: &StatSchema, name: &str) -> StatValue {
        stats.values()[schema.index_of(name).expect("name in schema")]
    }

    #[test]
    fn names_depend_on_channels_and_images_only() {
        let s = StatSchema::new(3, 8, 8, true, 10).unwrap();
        assert_eq!(
            s.names(),
            [
                "mean_c0",
                "mean_c1",
                "mean_c2",
                "contrast_c0",
                "contrast_c1",
                "contrast_c2",
                "sharpness",
                "image_width",
                "image_height",
                "aspect",
                "top1_probability",
                "entropy"
            ]
        );
        let t = StatSchema::new(1, 2, 8, false, 4).unwrap();
        assert_eq!(
            t.names(),
            ["mean_c0", "contrast_c0", "top1_probability", "entropy"]
        );
        let wide = StatSchema::new(64, 4, 4, false, 2).unwrap();
        assert_eq!(wide.names()[..2], ["mean_all", "contrast_all"]);
        assert!(StatSchema::new(0, 4, 4, false, 2).is_err());
        assert!(StatSchema::new(1, 4, 4, false, 0).is_err());
    }

    /// Shannon entropy of the uniform distribution over k outcomes is ln k (a fact of
    /// information theory, Shannon 1948).
    #[test]
    fn entropy_of_uniform_classes_is_ln_k() {
        for k in [1usize, 2, 7, 10, 1000] {
            let s = StatSchema::new(1, 1, 1, false, k).unwrap();
            let mut stats = s.new_stats();
            let p = vec![1.0 / k as f32; k];
            s.compute(&[0.0], None, &p, &mut stats).unwrap();
            let h = value(&stats, &s, "entropy").value().unwrap();
            assert!((f64::from(h) - (k as f64).ln()).abs() < 1e-5, "k={k} h={h}");
            assert_eq!(
                stats.predicted_class(),
                Some(0),
                "ties go to the lowest index"
            );
        }
    }

    #[test]
    fn moments_facts_and_outputs() {
        let s = StatSchema::new(2, 3, 3, true, 3).unwrap();
        let mut stats = s.new_stats();
        // Channel 0: values 0..9, mean 4, population variance (9²−1)/12 = 20/3.
        // Channel 1: constant 5.
        let mut input: Vec<f32> = (0..9).map(|v| v as f32).collect();
        input.extend([5.0f32; 9]);
        let facts = ImageFacts {
            width: 640,
            height: 480,
        };
        s.compute(&input, Some(facts), &[0.2, 0.5, 0.3], &mut stats)
            .unwrap();
        let get = |n: &str| value(&stats, &s, n).value().unwrap();
        assert_eq!(get("mean_c0"), 4.0);
        assert!((get("contrast_c0") - (20.0f32 / 3.0).sqrt()).abs() < 1e-6);
        assert_eq!(get("mean_c1"), 5.0);
        assert_eq!(get("contrast_c1"), 0.0);
        assert_eq!(get("image_width"), 640.0);
        assert_eq!(get("aspect"), (640.0f64 / 480.0) as f32);
        assert_eq!(get("top1_probability"), 0.5);
        assert_eq!(stats.predicted_class(), Some(1));
        // The 3×3 input has a single valid pixel: one Laplacian value, variance 0.
        assert_eq!(get("sharpness"), 0.0);

        // Without facts the image statistics are absent, not zero.
        s.compute(&input, None, &[0.2, 0.5, 0.3], &mut stats)
            .unwrap();
        assert_eq!(value(&stats, &s, "aspect"), StatValue::Absent);
    }

    #[test]
    fn non_finite_values_are_flagged_not_averaged() {
        let s = StatSchema::new(2, 3, 3, false, 2).unwrap();
        let mut stats = s.new_stats();
        let mut input = vec![1.0f32; 18];
        input[3] = f32::NAN;
        input[4] = f32::INFINITY;
        s.compute(&input, None, &[f32::NAN, 1.0], &mut stats)
            .unwrap();
        assert_eq!(stats.non_finite_inputs(), 2);
        assert_eq!(value(&stats, &s, "mean_c0"), StatValue::NonFinite);
        assert_eq!(value(&stats, &s, "contrast_c0"), StatValue::NonFinite);
        assert_eq!(value(&stats, &s, "mean_c1"), StatValue::Value(1.0));
        assert_eq!(value(&stats, &s, "sharpness"), StatValue::NonFinite);
        assert_eq!(value(&stats, &s, "entropy"), StatValue::NonFinite);
        assert_eq!(stats.predicted_class(), None);
        // A negative "probability" (logits passed by mistake) is refused the same way.
        s.compute(&[0.0; 18], None, &[-1.0, 2.0], &mut stats)
            .unwrap();
        assert_eq!(value(&stats, &s, "top1_probability"), StatValue::NonFinite);
    }

    #[test]
    fn wrong_lengths_are_errors() {
        let s = StatSchema::new(1, 3, 3, false, 2).unwrap();
        let mut stats = s.new_stats();
        assert!(matches!(
            s.compute(&[0.0; 8], None, &[0.5, 0.5], &mut stats),
            Err(DriftError::InputLength {
                expected: 9,
                got: 8
            })
        ));
        assert!(matches!(
            s.compute(&[0.0; 9], None, &[1.0], &mut stats),
            Err(DriftError::OutputLength { .. })
        ));
        let other = StatSchema::new(3, 3, 3, false, 2).unwrap();
        let mut wrong = other.new_stats();
        assert!(matches!(
            s.compute(&[0.0; 9], None, &[0.5, 0.5], &mut wrong),
            Err(DriftError::StatsLength { .. })
        ));
    }
}
