//! Statistical tests of live values against reference data: the two-sample
//! Kolmogorov–Smirnov test (against raw values, or against a baseline's quantiles), the
//! population stability index over the baseline's bins, the chi-square goodness-of-fit test of
//! predicted classes, and the verdict rules applied to their results.

use serde::Serialize;

use super::DriftError;
use super::baseline::ScalarReference;
use super::error::Sample;
use super::ks_dist::{MAX_EXACT_N, exact_two_sample_p, gcd, kstwo_sf};
use super::special::chi2_sf;

/// How a KS p-value was computed.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum KsMethod {
    /// Exact null distribution of the two-sample statistic (both sizes ≤ 10,000).
    Exact,
    /// One-sample distribution of Dₙ at n = round(m·n/(m+n)), as SciPy does for large samples.
    Asymptotic,
}

/// Result of a two-sample Kolmogorov–Smirnov test.
#[derive(Clone, Copy, Debug, PartialEq, Serialize)]
pub struct KsResult {
    /// D = sup |F₁ − F₂|.
    pub statistic: f64,
    /// Two-sided p-value.
    pub p_value: f64,
    pub method: KsMethod,
}

/// Two-sided p-value of a two-sample KS distance `d` between samples of sizes `n1`, `n2`, by
/// SciPy's `ks_2samp(method='auto')` rule: exact when both sizes are at most 10,000 (with D
/// taken to the nearest multiple of 1/lcm(n1, n2), where a two-sample D always lies), otherwise
/// the one-sample distribution of Dₙ at n = round(n1·n2/(n1+n2)) (ties to even, as NumPy's
/// `round`).
pub fn ks_p_value(n1: u64, n2: u64, d: f64) -> (f64, KsMethod) {
    if n1.max(n2) <= MAX_EXACT_N {
        let lcm = n1 / gcd(n1, n2) * n2;
        let h = (d * lcm as f64).round().max(0.0) as u64;
        (exact_two_sample_p(n1, n2, h), KsMethod::Exact)
    } else {
        let (a, b) = (n1 as f64, n2 as f64);
        let en = (a * b / (a + b)).round_ties_even().max(1.0) as u64;
        (kstwo_sf(en, d), KsMethod::Asymptotic)
    }
}

fn check_sample(xs: &[f64], which: Sample) -> Result<(), DriftError> {
    if xs.is_empty() {
        return Err(DriftError::EmptySample { which });
    }
    if let Some(index) = xs.iter().position(|v| !v.is_finite()) {
        return Err(DriftError::NonFiniteData { which, index });
    }
    Ok(())
}

/// Two-sample Kolmogorov–Smirnov test, two-sided: `scipy.stats.ks_2samp(a, b)` with its
/// default `method='auto'` (see [`ks_p_value`]). Ties are allowed; D is computed exactly as
/// max |i·(n2/g) − j·(n1/g)| / lcm over the merged sorted values.
///
/// # Errors
/// [`DriftError::EmptySample`] or [`DriftError::NonFiniteData`] (SciPy would propagate NaN).
pub fn ks_2samp(a: &[f64], b: &[f64]) -> Result<KsResult, DriftError> {
    check_sample(a, Sample::First)?;
    check_sample(b, Sample::Second)?;
    let mut a = a.to_vec();
    let mut b = b.to_vec();
    a.sort_unstable_by(f64::total_cmp);
    b.sort_unstable_by(f64::total_cmp);
    let (n1, n2) = (a.len() as u64, b.len() as u64);
    let g = gcd(n1, n2);
    let (w1, w2) = (n2 / g, n1 / g);
    let lcm = n1 / g * n2;
    let (mut i, mut j, mut h) = (0usize, 0usize, 0u64);
    while i < a.len() || j < b.len() {
        // The next distinct value; every copy of it in either sample steps together.
        let v = match (a.get(i), b.get(j)) {
            (Some(&x), Some(&y)) => x.min(y),
            (Some(&x), None) => x,
            (None, Some(&y)) => y,
            (None, None) => break,
        };
        while i < a.len() && a[i] == v {
            i += 1;
        }
        while j < b.len() && b[j] == v {
            j += 1;
        }
        h = h.max((i as u64 * w1).abs_diff(j as u64 * w2));
    }
    let statistic = h as f64 / lcm as f64;
    let (p_value, method) = ks_p_value(n1, n2, statistic);
    Ok(KsResult {
        statistic,
        p_value,
        method,
    })
}

/// KS distance between live values and a baseline's reconstructed reference CDF
/// ([`ScalarReference::cdf`]), with the p-value of a two-sample test of sizes
/// (`live.len()`, reference count) by [`ks_p_value`].
///
/// The distance is within 1/(K) + 1/n_ref (K + 1 stored quantiles, 0.01 + 1/n_ref for 101) of
/// the two-sample D against the reference values themselves, see [`ScalarReference::cdf`]; at
/// the window sizes used (hundreds) that is well under the test's own critical distance.
///
/// # Errors
/// [`DriftError::EmptySample`] or [`DriftError::NonFiniteData`] for the live values.
pub fn ks_against_reference(
    live: &[f32],
    reference: &ScalarReference,
) -> Result<KsResult, DriftError> {
    if live.is_empty() {
        return Err(DriftError::EmptySample {
            which: Sample::Second,
        });
    }
    if let Some(index) = live.iter().position(|v| !v.is_finite()) {
        return Err(DriftError::NonFiniteData {
            which: Sample::Second,
            index,
        });
    }
    let mut sorted = live.to_vec();
    sorted.sort_unstable_by(f32::total_cmp);
    let m = sorted.len() as f64;
    let mut d = 0.0f64;
    let mut start = 0usize;
    while start < sorted.len() {
        let v = sorted[start];
        let end = start + sorted[start..].partition_point(|&x| x == v);
        let x = f64::from(v);
        // Below v the live ECDF is start/m, at v it is end/m; F̂ is monotone, so the sup over
        // each flat stretch of the live ECDF is reached at its ends.
        d = d
            .max((start as f64 / m - reference.cdf_left(x)).abs())
            .max((end as f64 / m - reference.cdf(x)).abs());
        start = end;
    }
    let (p_value, method) = ks_p_value(sorted.len() as u64, reference.count, d);
    Ok(KsResult {
        statistic: d,
        p_value,
        method,
    })
}

/// Floor applied to empty bins' fractions in [`psi`]. A common practice choice: 10⁻⁴ is below
/// one sample in windows of up to 10,000, so it only ever stands in for an empty bin, and it
/// bounds an empty-bin term at Δ·ln(Δ/10⁻⁴) ≈ 9.2·Δ for a shift of mass Δ. A live window of 500
/// with one value in a bin the reference never filled then adds 0.002·ln 20 ≈ 0.006: a single
/// outlier cannot raise the index past the 0.1 band on its own.
pub const PSI_FLOOR: f64 = 1e-4;

/// Population stability index Σ (p_live − p_ref)·ln(p_live / p_ref) over bins, both fractions
/// floored at [`PSI_FLOOR`] (not renormalised, common practice). `live_counts` are counts of live
/// values per bin of the same binning; [`ScalarReference::bin_of`] assigns them.
///
/// # Errors
/// [`DriftError::LengthMismatch`] for different bin counts, [`DriftError::EmptySample`] when
/// no live value was counted, [`DriftError::BadFractions`] when the reference fractions are
/// negative or non-finite.
pub fn psi(reference_fractions: &[f64], live_counts: &[u64]) -> Result<f64, DriftError> {
    if reference_fractions.len() != live_counts.len() {
        return Err(DriftError::LengthMismatch {
            reference: reference_fractions.len(),
            live: live_counts.len(),
        });
    }
    if let Some(index) = reference_fractions
        .iter()
        .position(|f| !f.is_finite() || *f < 0.0)
    {
        return Err(DriftError::BadFractions { index });
    }
    let total: u64 = live_counts.iter().sum();
    if total == 0 {
        return Err(DriftError::EmptySample {
            which: Sample::Second,
        });
    }
    let total = total as f64;
    Ok(reference_fractions
        .iter()
        .zip(live_counts)
        .map(|(&r, &c)| {
            let r = r.max(PSI_FLOOR);
            let l = (c as f64 / total).max(PSI_FLOOR);
            (l - r) * (l / r).ln()
        })
        .sum())
}

/// PSI bands. The 0.1 and 0.25 cut-offs are common practice in credit-risk model monitoring
/// (no single primary source); they are conventions, not significance levels.
#[derive(Clone, Copy, Debug, PartialEq, Eq, Serialize)]
#[serde(rename_all = "snake_case")]
pub enum PsiBand {
    /// PSI < 0.1.
    Stable,
    /// 0.1 ≤ PSI ≤ 0.25.
    Moderate,
    /// PSI > 0.25.
    Significant,
}

impl PsiBand {
    /// The band of a PSI value (NaN counts as stable: there was nothing to compare).
    pub fn of(psi: f64) -> PsiBand {
        if psi > 0.25 {
            PsiBand::Significant
        } else if psi >= 0.1 {
            PsiBand::Moderate
        } else {
            PsiBand::Stable
        }
    }
}

/// Per-test significance level when `tests` univariate KS tests are judged together:
/// α / m (Bonferroni), the aggregation Rabanser, Günnemann & Lipton use for univariate tests
/// ("Failing Loudly: An Empirical Study of Methods for Detecting Dataset Shift", NeurIPS 2019).
pub fn bonferroni_level(alpha: f64, tests: usize) -> f64 {
    alpha / tests.max(1) as f64
}

/// Result of a chi-square goodness-of-fit test.
#[derive(Clone, Copy, Debug, PartialEq, Serialize)]
pub struct ChiSquareResult {
    /// Σ (observed − expected)² / expected.
    pub statistic: f64,
    /// Categories compared minus one.
    pub dof: usize,
    pub p_value: f64,
    /// Smallest expected count. The chi-square approximation is usually trusted when every
    /// expected count is at least 5 (Cochran 1954, common practice); callers may report it.
    pub min_expected: f64,
}

/// Chi-square goodness of fit of observed counts against expected fractions:
/// `scipy.stats.chisquare(observed, f_exp=fractions·Σobserved)`. Fractions are normalised to sum
/// to 1 first; the p-value is [`chi2_sf`] with k − 1 degrees of freedom.
///
/// # Errors
/// [`DriftError::LengthMismatch`]; [`DriftError::BadFractions`] for a negative, non-finite or
/// all-zero fraction vector; [`DriftError::ZeroExpected`] for a zero fraction (the statistic
/// would be infinite or undefined, see [`class_chisquare`]); [`DriftError::EmptySample`] when
/// nothing was observed or fewer than two categories are given.
pub fn chisquare(
    observed: &[u64],
    expected_fractions: &[f64],
) -> Result<ChiSquareResult, DriftError> {
    if observed.len() != expected_fractions.len() {
        return Err(DriftError::LengthMismatch {
            reference: expected_fractions.len(),
            live: observed.len(),
        });
    }
    if let Some(index) = expected_fractions
        .iter()
        .position(|f| !f.is_finite() || *f < 0.0)
    {
        return Err(DriftError::BadFractions { index });
    }
    let fsum: f64 = expected_fractions.iter().sum();
    if fsum <= 0.0 {
        return Err(DriftError::BadFractions { index: 0 });
    }
    if let Some(category) = expected_fractions.iter().position(|&f| f == 0.0) {
        return Err(DriftError::ZeroExpected { category });
    }
    let total: u64 = observed.iter().sum();
    if total == 0 || observed.len() < 2 {
        return Err(DriftError::EmptySample {
            which: Sample::Second,
        });
    }
    let total = total as f64;
    let mut statistic = 0.0;
    let mut min_expected = f64::INFINITY;
    for (&o, &f) in observed.iter().zip(expected_fractions) {
        let e = f / fsum * total;
        min_expected = min_expected.min(e);
        let diff = o as f64 - e;
        statistic += diff * diff / e;
    }
    let dof = observed.len() - 1;
    Ok(ChiSquareResult {
        statistic,
        dof,
        p_value: chi2_sf(statistic, dof as f64),
        min_expected,
    })
}

/// Chi-square test of live predicted-class counts against reference class counts, padding the
/// shorter vector with zeros.
///
/// Classes the reference never predicted: when the window has none either they are dropped
/// (they carry no information and would only add degrees of freedom); when the window has some,
/// their reference fraction is floored at half a count, 0.5 / n_ref (the usual add-one-half
/// smoothing of an unseen category, common practice), and all fractions renormalised. A new
/// class then weighs heavily in the statistic, as it should. With a single class left the
/// result is statistic 0, dof 0, p = 1: there is nothing to compare.
///
/// # Errors
/// [`DriftError::EmptySample`] when either side has no counts.
pub fn class_chisquare(
    reference_counts: &[u64],
    live_counts: &[u64],
) -> Result<ChiSquareResult, DriftError> {
    let n_ref: u64 = reference_counts.iter().sum();
    if n_ref == 0 {
        return Err(DriftError::EmptySample {
            which: Sample::First,
        });
    }
    let len = reference_counts.len().max(live_counts.len());
    let at = |v: &[u64], i: usize| v.get(i).copied().unwrap_or(0);
    let mut observed = Vec::with_capacity(len);
    let mut fractions = Vec::with_capacity(len);
    for i in 0..len {
        let (r, l) = (at(reference_counts, i), at(live_counts, i));
        if r == 0 && l == 0 {
            continue;
        }
        observed.push(l);
        fractions.push(if r == 0 { 0.5 } else { r as f64 } / n_ref as f64);
    }
    if observed.iter().sum::<u64>() == 0 {
        return Err(DriftError::EmptySample {
            which: Sample::Second,
        });
    }
    if observed.len() < 2 {
        return Ok(ChiSquareResult {
            statistic: 0.0,
            dof: 0,
            p_value: 1.0,
            min_expected: observed.iter().sum::<u64>() as f64,
        });
    }
    chisquare(&observed, &fractions)
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Hand-worked PSI over three bins.
    /// reference fractions 0.5, 0.3, 0.2; live counts 40, 40, 20 of 100 → 0.4, 0.4, 0.2.
    /// bin 1: (0.4 − 0.5)·ln(0.4/0.5) = (−0.1)·(−0.22314355) = 0.022314355
    /// bin 2: (0.4 − 0.3)·ln(0.4/0.3) = (0.1)·(0.28768207)  = 0.028768207
    /// bin 3: (0.2 − 0.2)·ln(1)       = 0
    /// PSI = 0.051082562 → stable (< 0.1).
    #[test]
    fn psi_hand_worked() {
        let v = psi(&[0.5, 0.3, 0.2], &[40, 40, 20]).unwrap();
        assert!((v - 0.051_082_562).abs() < 1e-8, "{v}");
        assert_eq!(PsiBand::of(v), PsiBand::Stable);
    }

    /// An empty reference bin takes the floor: reference 0.5, 0.5, 0; live 45, 45, 10 →
    /// 0.45, 0.45, 0.1.
    /// bins 1, 2: (0.45 − 0.5)·ln(0.9) = (−0.05)·(−0.10536052) = 0.005268026 each
    /// bin 3: (0.1 − 0.0001)·ln(0.1/0.0001) = 0.0999·6.90775528 = 0.690084752
    /// PSI = 0.700620804 → significant.
    #[test]
    fn psi_floors_empty_bins() {
        let v = psi(&[0.5, 0.5, 0.0], &[45, 45, 10]).unwrap();
        assert!((v - 0.700_620_804).abs() < 1e-8, "{v}");
        assert_eq!(PsiBand::of(v), PsiBand::Significant);
        assert!(psi(&[0.5, 0.5], &[0, 0]).is_err());
        assert!(psi(&[0.5, 0.5], &[1, 2, 3]).is_err());
    }

    #[test]
    fn bands_and_bonferroni() {
        assert_eq!(PsiBand::of(0.099), PsiBand::Stable);
        assert_eq!(PsiBand::of(0.1), PsiBand::Moderate);
        assert_eq!(PsiBand::of(0.25), PsiBand::Moderate);
        assert_eq!(PsiBand::of(0.2501), PsiBand::Significant);
        assert_eq!(bonferroni_level(0.05, 10), 0.005);
    }

    #[test]
    fn ks_identical_and_disjoint() {
        let a: Vec<f64> = (0..20).map(f64::from).collect();
        let r = ks_2samp(&a, &a).unwrap();
        assert_eq!((r.statistic, r.p_value), (0.0, 1.0));
        // Disjoint samples of 5 and 5: D = 1, and only 2 of the C(10,5) = 252 orderings reach
        // it, so p = 2/252.
        let lo: Vec<f64> = (0..5).map(f64::from).collect();
        let hi: Vec<f64> = (10..15).map(f64::from).collect();
        let r = ks_2samp(&lo, &hi).unwrap();
        assert_eq!(r.statistic, 1.0);
        assert!((r.p_value - 2.0 / 252.0).abs() < 1e-15);
        assert!(ks_2samp(&[], &a).is_err());
        assert!(ks_2samp(&[f64::NAN], &a).is_err());
    }

    #[test]
    fn class_test_handles_unseen_classes() {
        // Reference never predicted class 2 and the window did not either: dropped, dof 1.
        let r = class_chisquare(&[50, 50, 0], &[30, 70, 0]).unwrap();
        assert_eq!(r.dof, 1);
        // expected 50, 50: (20² + 20²)/50 = 16.
        assert!((r.statistic - 16.0).abs() < 1e-12);
        // The window predicts the unseen class: it counts, with half a reference count.
        let r = class_chisquare(&[50, 50, 0], &[45, 45, 10]).unwrap();
        assert_eq!(r.dof, 2);
        assert!(r.p_value < 1e-10);
        let r = class_chisquare(&[100], &[7]).unwrap();
        assert_eq!((r.dof, r.p_value), (0, 1.0));
    }
}
