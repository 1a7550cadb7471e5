//! The per-sample numeric kernels behind [`sample`](super::sample): channel moments, the
//! Laplacian variance and the output summary, written to vectorise and not to allocate.

use super::sample::StatValue;

pub(super) fn finite_value(v: f64) -> StatValue {
    let v = v as f32;
    if v.is_finite() {
        StatValue::Value(v)
    } else {
        StatValue::NonFinite
    }
}

/// Lane count of the partial sums: eight independent f64 accumulators let the compiler keep
/// them in vector registers (a single accumulator serialises every addition on its latency).
const LANES: usize = 8;

/// Sums of `x − shift` and `(x − shift)²` in f64 lanes.
///
/// Shifting by a value of the data (the first one) is the "shifted data" single-pass variance
/// of Chan, Golub & LeVeque, "Algorithms for computing the sample variance", 1983 (cited from
/// memory): it avoids the cancellation of the textbook Σx² − (Σx)²/n when the mean is large
/// against the spread.
#[derive(Clone, Copy)]
struct ShiftedSums {
    shift: f32,
    s1: [f64; LANES],
    s2: [f64; LANES],
    n: usize,
}

impl ShiftedSums {
    fn new(shift: f32) -> Self {
        ShiftedSums {
            shift,
            s1: [0.0; LANES],
            s2: [0.0; LANES],
            n: 0,
        }
    }

    fn add(&mut self, xs: &[f32]) {
        let chunks = xs.chunks_exact(LANES);
        let rest = chunks.remainder();
        for chunk in chunks {
            for (k, &x) in chunk.iter().enumerate() {
                let d = f64::from(x - self.shift);
                self.s1[k] += d;
                self.s2[k] += d * d;
            }
        }
        for (k, &x) in rest.iter().enumerate() {
            let d = f64::from(x - self.shift);
            self.s1[k] += d;
            self.s2[k] += d * d;
        }
        self.n += xs.len();
    }

    /// Mean and population variance; NaN or infinite when a value was.
    fn mean_var(&self) -> (f64, f64) {
        let n = self.n as f64;
        let s1: f64 = self.s1.iter().sum();
        let s2: f64 = self.s2.iter().sum();
        let m = s1 / n;
        ((m + f64::from(self.shift)), (s2 / n - m * m).max(0.0))
    }
}

/// Mean and population standard deviation of a slice, and its count of non-finite values.
pub(super) struct Moments {
    mean: f64,
    var: f64,
    pub(super) non_finite: u32,
}

impl Moments {
    pub(super) fn of(xs: &[f32]) -> Self {
        let shift = xs.first().copied().filter(|v| v.is_finite()).unwrap_or(0.0);
        let mut sums = ShiftedSums::new(shift);
        sums.add(xs);
        let (mean, var) = sums.mean_var();
        // f32 values cannot overflow an f64 sum, so a non-finite sum means a non-finite value;
        // counting them only then keeps the branch out of the loop.
        let non_finite = if mean.is_finite() && var.is_finite() {
            0
        } else {
            let count = xs.iter().filter(|v| !v.is_finite()).count();
            u32::try_from(count).unwrap_or(u32::MAX)
        };
        Moments {
            mean,
            var,
            non_finite,
        }
    }

    pub(super) fn mean(&self) -> StatValue {
        if self.non_finite > 0 {
            StatValue::NonFinite
        } else {
            finite_value(self.mean)
        }
    }

    pub(super) fn std(&self) -> StatValue {
        if self.non_finite > 0 {
            StatValue::NonFinite
        } else {
            finite_value(self.var.sqrt())
        }
    }
}

/// Pixels per block when the Laplacians of several channels are summed: the block lives on the
/// stack, so a multi-channel input needs no allocation.
const BLOCK: usize = 64;

/// Variance of the 4-neighbour discrete Laplacian (kernel `[[0,1,0],[1,-4,1],[0,1,0]]`) of the
/// channel mean, over the valid region (pixels whose four neighbours exist), population
/// variance. The variance of the Laplacian as a focus measure: Pech-Pacheco, Cristóbal,
/// Chamorro-Martínez & Fernández-Valdivia, "Diatom autofocusing in brightfield microscopy: a
/// comparative study", ICPR 2000. The Laplacian is linear, so the Laplacian of the channel mean
/// is the mean of the channels' Laplacians, which is what is computed.
///
/// Callers guarantee `input.len() == channels·height·width`, `height, width ≥ 3`.
pub(super) fn laplacian_variance(
    input: &[f32],
    channels: usize,
    height: usize,
    width: usize,
) -> f64 {
    let plane = height * width;
    let inner = width - 2;
    let scale = 1.0 / channels as f32;
    let mut sums: Option<ShiftedSums> = None;
    let mut block = [0f32; BLOCK];
    for row in 1..height - 1 {
        let mut start = 1;
        while start < width - 1 {
            let len = BLOCK.min(width - 1 - start);
            let out = &mut block[..len];
            out.fill(0.0);
            for channel in input.chunks_exact(plane) {
                let at = row * width + start;
                let up = &channel[at - width..at - width + len];
                let down = &channel[at + width..at + width + len];
                let left = &channel[at - 1..at - 1 + len];
                let right = &channel[at + 1..at + 1 + len];
                let centre = &channel[at..at + len];
                let neighbours = up.iter().zip(down).zip(left).zip(right);
                for ((o, (((u, d), l), r)), c) in out.iter_mut().zip(neighbours).zip(centre) {
                    *o += u + d + l + r - 4.0 * c;
                }
            }
            if channels > 1 {
                out.iter_mut().for_each(|v| *v *= scale);
            }
            sums.get_or_insert_with(|| ShiftedSums::new(out[0]))
                .add(out);
            start += len;
        }
    }
    debug_assert_eq!(sums.map_or(0, |s| s.n), (height - 2) * inner);
    sums.map_or(f64::NAN, |s| s.mean_var().1)
}

/// The output statistics of one sample.
pub(super) struct OutputSummary {
    pub(super) top1: StatValue,
    pub(super) entropy: StatValue,
    pub(super) class: Option<u32>,
}

impl OutputSummary {
    pub(super) fn of(probabilities: &[f32]) -> Self {
        let invalid = OutputSummary {
            top1: StatValue::NonFinite,
            entropy: StatValue::NonFinite,
            class: None,
        };
        let mut sum = 0f64;
        let mut best = 0usize;
        for (i, &p) in probabilities.iter().enumerate() {
            if !p.is_finite() || p < 0.0 {
                return invalid;
            }
            sum += f64::from(p);
            if p > probabilities[best] {
                best = i;
            }
        }
        if sum <= 0.0 {
            return invalid;
        }
        // H = −Σ (p/s)·ln(p/s) = ln s − (Σ p·ln p)/s, with 0·ln 0 = 0.
        let plogp: f64 = probabilities
            .iter()
            .filter(|&&p| p > 0.0)
            .map(|&p| {
                let p = f64::from(p);
                p * p.ln()
            })
            .sum();
        let entropy = (sum.ln() - plogp / sum).max(0.0);
        OutputSummary {
            top1: finite_value(f64::from(probabilities[best]) / sum),
            entropy: finite_value(entropy),
            class: u32::try_from(best).ok(),
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn laplacian_of_constant_image_is_zero() {
        let img = vec![0.7f32; 3 * 6 * 5];
        assert_eq!(laplacian_variance(&img, 3, 6, 5), 0.0);
    }

    /// Checkerboard 0/1 with (0,0) = 0: an interior pixel of value v has four neighbours of
    /// value 1−v, so its Laplacian is 4(1−v) − 4v = +4 where v = 0 and −4 where v = 1.
    /// 4×4: the 2×2 valid region holds two +4 and two −4: mean 0, variance 16.
    /// 5×5: the 3×3 valid region holds five +4 (where i+j is even) and four −4:
    /// mean (20 − 16)/9 = 4/9, E[L²] = 16, variance 16 − 16/81 = 1280/81 ≈ 15.802.
    /// A sample variance (÷(n−1)) would give 1280/72 instead, so the population form is checked.
    #[test]
    fn laplacian_of_checkerboard_matches_hand_derivation() {
        let board = |n: usize| -> Vec<f32> {
            (0..n * n)
                .map(|i| ((i / n + i % n) % 2) as f32)
                .collect::<Vec<_>>()
        };
        assert_eq!(laplacian_variance(&board(4), 1, 4, 4), 16.0);
        let v5 = laplacian_variance(&board(5), 1, 5, 5);
        assert!((v5 - 1280.0 / 81.0).abs() < 1e-12, "{v5}");
        // Three identical channels: the channel mean is the same board.
        let three: Vec<f32> = board(5).repeat(3);
        let v3 = laplacian_variance(&three, 3, 5, 5);
        assert!((v3 - 1280.0 / 81.0).abs() < 1e-6, "{v3}");
        // A board wider than one block exercises the blocked loop: 70×70 has 68×68 valid
        // pixels, an even count per row, so mean 0 and variance exactly 16.
        assert_eq!(laplacian_variance(&board(70), 1, 70, 70), 16.0);
    }
}
