//! A latency histogram with bounded relative error, and percentiles read from it.
//!
//! Buckets are log-linear: values below 128 each have a bucket of their own; above that, each
//! power-of-two range `[2^e, 2^(e+1))` is cut into 64 equal buckets. A bucket is therefore at
//! most 1/64 of its lower edge wide, and a percentile read as the bucket's midpoint is within
//! half that, **1/128 (0.79 %) of the true value**, whatever the spread of the data: 1 µs and
//! 1 h are measured with the same relative precision. All of `u64` fits in 3,776 buckets
//! (30 KiB), so memory does not grow with the number of requests or the run's length.
//!
//! Percentiles follow the nearest-rank definition (the inverse of the empirical distribution
//! function): the p-th percentile of n values is the value of rank ⌈p·n/100⌉ in ascending
//! order, the rank clamped to 1..=n. Ranks are computed in integers (parts per million), so
//! floating-point rounding never moves one: in f64, `0.57 * 100.0` is 56.99999999999999.

/// Bits of the linear part: 2^6 = 64 buckets per power of two.
const SUB_BITS: u32 = 6;
/// Buckets per power of two.
const SUB: u64 = 1 << SUB_BITS;
/// Values below this have exact buckets (one per value).
const EXACT_BELOW: u64 = 2 * SUB;
/// Bucket count covering all of `u64`: 128 exact buckets, then 64 per power of two for the
/// exponents 7..=63.
const BUCKETS: usize = (EXACT_BELOW + (64 - SUB_BITS as u64 - 1) * SUB) as usize;

/// Largest relative error of a percentile read from the histogram: half a bucket width over
/// the bucket's lower edge, `(2^s / 2) / (64 · 2^s)`.
pub const RELATIVE_ERROR: f64 = 1.0 / 128.0;

/// Counts of values (nanoseconds, in convoy's use) in log-linear buckets.
#[derive(Clone, Debug)]
pub struct Histogram {
    counts: Vec<u64>,
    total: u64,
    min: u64,
    max: u64,
    /// Sum of every value, for the mean; u128 so a long run of long latencies cannot wrap.
    sum: u128,
}

impl Default for Histogram {
    fn default() -> Self {
        Histogram::new()
    }
}

/// The bucket holding `v`.
fn index_of(v: u64) -> usize {
    if v < EXACT_BELOW {
        return v as usize;
    }
    // v ≥ 128, so its highest set bit is at 7 or above and `shift` ≥ 1.
    let shift = 63 - v.leading_zeros() - SUB_BITS;
    let mantissa = v >> shift; // in [64, 128)
    (EXACT_BELOW + u64::from(shift - 1) * SUB + (mantissa - SUB)) as usize
}

/// `[low, high)` of bucket `i`; `high` saturates at `u64::MAX` for the last bucket.
fn bounds_of(i: usize) -> (u64, u64) {
    let i = i as u64;
    if i < EXACT_BELOW {
        return (i, i + 1);
    }
    let rest = i - EXACT_BELOW;
    let shift = rest / SUB + 1;
    let mantissa = SUB + rest % SUB;
    let low = mantissa << shift;
    (low, low.saturating_add(1 << shift))
}

impl Histogram {
    pub fn new() -> Histogram {
        Histogram {
            counts: vec![0; BUCKETS],
            total: 0,
            min: u64::MAX,
            max: 0,
            sum: 0,
        }
    }

    pub fn record(&mut self, v: u64) {
        self.counts[index_of(v)] += 1;
        self.total += 1;
        self.min = self.min.min(v);
        self.max = self.max.max(v);
        self.sum += u128::from(v);
    }

    /// Adds every value of `other`.
    pub fn merge(&mut self, other: &Histogram) {
        for (a, b) in self.counts.iter_mut().zip(&other.counts) {
            *a += b;
        }
        self.total += other.total;
        self.min = self.min.min(other.min);
        self.max = self.max.max(other.max);
        self.sum += other.sum;
    }

    /// Values recorded.
    pub fn len(&self) -> u64 {
        self.total
    }

    pub fn is_empty(&self) -> bool {
        self.total == 0
    }

    /// The smallest value, exactly.
    pub fn min(&self) -> Option<u64> {
        (self.total > 0).then_some(self.min)
    }

    /// The largest value, exactly.
    pub fn max(&self) -> Option<u64> {
        (self.total > 0).then_some(self.max)
    }

    /// The mean, exactly (up to f64 rounding).
    pub fn mean(&self) -> Option<f64> {
        (self.total > 0).then(|| self.sum as f64 / self.total as f64)
    }

    /// The value at `per_million` (500,000 = p50, 999,000 = p99.9) by nearest rank, within
    /// [`RELATIVE_ERROR`] of the true one; `None` when empty.
    pub fn quantile_ppm(&self, per_million: u32) -> Option<u64> {
        if self.total == 0 {
            return None;
        }
        let p = u128::from(per_million.min(1_000_000));
        // ⌈p·n / 10^6⌉ in integers, then clamped to a real rank.
        let rank = (p * u128::from(self.total)).div_ceil(1_000_000);
        let rank = (rank as u64).clamp(1, self.total);
        let mut seen = 0u64;
        for (i, &c) in self.counts.iter().enumerate() {
            seen += c;
            if seen >= rank {
                let (low, high) = bounds_of(i);
                let mid = low + (high - low) / 2;
                // The true value lies in [low, high) and in [min, max]: clamping can only
                // bring the estimate closer.
                return Some(mid.clamp(self.min, self.max));
            }
        }
        // The counts sum to `total` ≥ rank, so the loop returned.
        Some(self.max)
    }

    /// Non-empty buckets as `(low, high, count)`, values in `[low, high)`, ascending.
    pub fn buckets(&self) -> impl Iterator<Item = (u64, u64, u64)> + '_ {
        self.counts
            .iter()
            .enumerate()
            .filter(|&(_, &c)| c > 0)
            .map(|(i, &c)| {
                let (low, high) = bounds_of(i);
                (low, high, c)
            })
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    const MS: u64 = 1_000_000;

    /// Worked example: latencies 1, 2, …, 100,000 ms, once each. By the nearest-rank
    /// definition (rank ⌈p·n/100⌉: the inverse of the empirical distribution function,
    /// Definition 1 in Hyndman & Fan, "Sample quantiles in statistical packages", The American
    /// Statistician 50(4), 1996 — cited from memory) the exact answers are p50 = 50,000 ms,
    /// p90 = 90,000 ms, p99 = 99,000 ms, p99.9 = 99,900 ms, max = 100,000 ms, and the mean is
    /// 50,000.5 ms. The histogram must give each percentile within its stated bound of 1/128,
    /// and min, max and mean exactly.
    #[test]
    fn uniform_1_to_100000_ms_worked_example() {
        let mut h = Histogram::new();
        for k in 1..=100_000u64 {
            h.record(k * MS);
        }
        for (ppm, exact_ms) in [
            (500_000, 50_000u64),
            (900_000, 90_000),
            (990_000, 99_000),
            (999_000, 99_900),
            (1_000_000, 100_000),
        ] {
            let got = h.quantile_ppm(ppm).unwrap() as f64;
            let exact = (exact_ms * MS) as f64;
            let rel = (got - exact).abs() / exact;
            assert!(
                rel <= RELATIVE_ERROR,
                "p{} = {got} ns, exact {exact} ns, relative error {rel}",
                ppm as f64 / 1e4
            );
        }
        assert_eq!(h.max(), Some(100_000 * MS));
        assert_eq!(h.min(), Some(MS));
        assert_eq!(h.mean(), Some(50_000.5 * MS as f64));
        assert_eq!(h.len(), 100_000);
    }

    /// Below 128 every value has its own bucket, so small values come back exactly
    /// (1..=100: p50 is rank 50, the value 50; p99 is rank 99).
    #[test]
    fn small_values_are_exact() {
        let mut h = Histogram::new();
        for v in 1..=100u64 {
            h.record(v);
        }
        assert_eq!(h.quantile_ppm(500_000), Some(50));
        assert_eq!(h.quantile_ppm(990_000), Some(99));
        // Rank 57 exactly, although `0.57 * 100.0` is 56.99999999999999 in f64.
        assert_eq!(h.quantile_ppm(570_000), Some(57));
        assert_eq!(h.quantile_ppm(0), Some(1));
    }

    /// Every bucket is at most 1/64 of its lower edge wide, buckets tile the line without
    /// gaps, and every value lands in the bucket whose bounds hold it.
    #[test]
    fn buckets_tile_and_stay_narrow() {
        for i in 0..BUCKETS - 1 {
            let (low, high) = bounds_of(i);
            assert_eq!(bounds_of(i + 1).0, high, "gap after bucket {i}");
            if low >= EXACT_BELOW {
                assert!((high - low) * SUB <= low, "bucket {i} too wide");
            }
        }
        let mut v = 1u64;
        while v < u64::MAX / 3 {
            for x in [v - 1, v, v + 1, v * 3 / 2] {
                let (low, high) = bounds_of(index_of(x));
                assert!(low <= x && x < high, "{x} not in [{low}, {high})");
            }
            v = v * 2 + 1;
        }
        assert_eq!(index_of(u64::MAX), BUCKETS - 1);
    }

    /// A single value is reported exactly at every percentile (the midpoint is clamped to
    /// [min, max]).
    #[test]
    fn one_value_is_exact() {
        let mut h = Histogram::new();
        h.record(123_456_789);
        for ppm in [0, 500_000, 999_000, 1_000_000] {
            assert_eq!(h.quantile_ppm(ppm), Some(123_456_789));
        }
        assert_eq!(Histogram::new().quantile_ppm(500_000), None);
    }

    #[test]
    fn merge_equals_recording_everything_in_one() {
        let (mut a, mut b, mut all) = (Histogram::new(), Histogram::new(), Histogram::new());
        for v in (1..5_000u64).map(|k| k * 7_919 % 100_003 * 1_000) {
            if v % 3 == 0 { &mut a } else { &mut b }.record(v);
            all.record(v);
        }
        a.merge(&b);
        for ppm in [500_000, 900_000, 990_000, 999_000] {
            assert_eq!(a.quantile_ppm(ppm), all.quantile_ppm(ppm));
        }
        assert_eq!(
            (a.len(), a.min(), a.max()),
            (all.len(), all.min(), all.max())
        );
    }
}
