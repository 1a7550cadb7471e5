//! Null distributions of the Kolmogorov–Smirnov statistic: the exact two-sample p-value
//! (lattice paths) and the one-sample two-sided distribution of Dₙ, which SciPy's `ks_2samp`
//! uses as its asymptotic p-value for large samples.
//!
//! Method and regime choices follow the ones SciPy documents for `ks_2samp(method='auto')` and
//! `scipy.stats.kstwo` (read from SciPy 1.17's own documentation and source), so results agree
//! with it; the code is written anew from the cited papers.

/// Largest sample size for which the exact two-sample p-value is used, as SciPy's `auto` does.
pub const MAX_EXACT_N: u64 = 10_000;

/// Greatest common divisor (Euclid).
pub(crate) fn gcd(mut a: u64, mut b: u64) -> u64 {
    while b != 0 {
        (a, b) = (b, a % b);
    }
    a
}

/// P(D ≥ h / lcm(m, n)) for two independent samples of sizes m and n drawn from one continuous
/// distribution, exactly.
///
/// Each arrangement of the merged sample is a lattice path from (0, 0) to (m, n), all
/// C(m+n, n) equally likely, and D·lcm = max |x·(n/g) − y·(m/g)| along it (g = gcd).
/// Counting paths that touch |x·n/g − y·m/g| ≥ h is Hodges' treatment ("The significance
/// probability of the Smirnov two-sample test", Arkiv för Matematik 3, 1958). Counts overflow,
/// so the recursion runs on probabilities instead, as Viehmann proposes ("Numerically more
/// stable computation of the p-values for the two-sample Kolmogorov-Smirnov test",
/// arXiv:2102.08037): q(x, y), the fraction of paths to (x, y) that touched the boundary, is 1
/// on the boundary and (x·q(x−1, y) + y·q(x, y−1)) / (x + y) inside, a convex combination, so
/// no value leaves [0, 1] and small p-values keep their relative precision.
///
/// Cost O(max(m,n) · band), band ≤ 2·D·min(m,n) + 1, and one column of min(m,n)+1 values:
/// meant for the sizes [`MAX_EXACT_N`] allows.
pub fn exact_two_sample_p(m: u64, n: u64, h: u64) -> f64 {
    if h == 0 || m == 0 || n == 0 {
        return 1.0;
    }
    let (m, n) = if m >= n { (m, n) } else { (n, m) };
    let g = gcd(m, n);
    let (mg, ng) = (m / g, n / g);
    // D never exceeds 1, that is h never exceeds lcm; checking first also keeps x·ng + h below
    // 2·lcm in the loop.
    if h > mg.saturating_mul(n) {
        return 0.0;
    }
    let ny = n as usize;
    // q(x, y) for the current column x; 1.0 wherever the point is outside the band.
    let mut col = vec![1.0f64; ny + 1];
    // Column 0: inside while y·mg < h, and the straight path up never touched the boundary.
    let hi0 = ((h - 1) / mg).min(n) as usize;
    col[..=hi0].fill(0.0);
    let mut prev_lo = 0usize;
    for x in 1..=m {
        let xn = x * ng;
        // Inside iff xn − h < y·mg < xn + h.
        let lo = if xn >= h { (xn - h) / mg + 1 } else { 0 };
        let hi = ((xn + h - 1) / mg).min(n);
        if lo > hi {
            // Every path crosses column x somewhere, and all of that column is outside.
            return 1.0;
        }
        let (lo, hi) = (lo as usize, hi as usize);
        // Points that left the band below are outside now.
        col[prev_lo..lo].fill(1.0);
        let xf = x as f64;
        if lo == 0 {
            // q(x, 0) = q(x−1, 0): the only way in is from the left.
            let mut below = col[0];
            for (y, q) in col.iter_mut().enumerate().take(hi + 1).skip(1) {
                let yf = y as f64;
                *q = (xf * *q + yf * below) / (xf + yf);
                below = *q;
            }
        } else {
            let mut below = col[lo - 1];
            for (y, q) in col.iter_mut().enumerate().take(hi + 1).skip(lo) {
                let yf = y as f64;
                *q = (xf * *q + yf * below) / (xf + yf);
                below = *q;
            }
        }
        prev_lo = lo;
    }
    col[ny].clamp(0.0, 1.0)
}

/// P(Dₙ ≥ x) for the two-sided one-sample statistic Dₙ = sup |Fₙ − F| of n values from a
/// continuous F: `scipy.stats.kstwo.sf(x, n)`.
///
/// The choice among methods is Simard & L'Ecuyer's ("Computing the two-sided
/// Kolmogorov-Smirnov distribution", Journal of Statistical Software 39(11), 2011), with the
/// cut-offs SciPy uses:
/// - n·x ≤ 1 or n·x ≥ n − 1: Ruben & Gambino's closed forms;
/// - x ≥ 0.5: exactly 2·P(Dₙ⁺ ≥ x), since Dₙ⁺ and Dₙ⁻ cannot both reach x;
/// - n ≤ 140: n·x² ≤ 4 exact (Durbin's matrix, below; SciPy uses Pomeranz's recursion between
///   0.754693 and 4, an exact algorithm for the same probability), else 2·P(Dₙ⁺ ≥ x);
/// - n > 140: n·x² ≥ 370 → 0; ≥ 2.2 → 2·P(Dₙ⁺ ≥ x); otherwise 1 − CDF with the CDF from
///   Durbin's matrix when n ≤ 100 000 and n·x^1.5 ≤ 1.4, else Pelz & Good's expansion.
pub fn kstwo_sf(n: u64, x: f64) -> f64 {
    if n == 0 || x.is_nan() {
        return f64::NAN;
    }
    if x >= 1.0 {
        return 0.0;
    }
    if x <= 0.0 {
        return 1.0;
    }
    let nf = n as f64;
    let t = nf * x;
    if t <= 1.0 {
        if t <= 0.5 {
            return 1.0;
        }
        // Ruben & Gambino: P(Dₙ ≤ x) = n!/nⁿ · (2t − 1)ⁿ for 1/(2n) ≤ x ≤ 1/n.
        let mut cdf = 1.0;
        for i in 1..=n {
            cdf *= (i as f64 / nf) * (2.0 * t - 1.0);
            if cdf < 1e-300 {
                cdf = 0.0;
                break;
            }
        }
        return (1.0 - cdf).clamp(0.0, 1.0);
    }
    if t >= nf - 1.0 {
        return (2.0 * (1.0 - x).powf(nf)).clamp(0.0, 1.0);
    }
    if x >= 0.5 {
        return (2.0 * smirnov_sf(n, x)).clamp(0.0, 1.0);
    }
    let nxx = t * x;
    let sf = if n <= 140 {
        if nxx <= 4.0 {
            1.0 - durbin_cdf(n, x)
        } else {
            2.0 * smirnov_sf(n, x)
        }
    } else if nxx >= 370.0 {
        0.0
    } else if nxx >= 2.2 {
        2.0 * smirnov_sf(n, x)
    } else if n <= 100_000 && nf * x.powf(1.5) <= 1.4 {
        1.0 - durbin_cdf(n, x)
    } else {
        1.0 - pelz_good_cdf(n, x)
    };
    sf.clamp(0.0, 1.0)
}

/// P(Dₙ⁺ ≥ x), the one-sided statistic, by the finite sum of Smirnov (1944) and Birnbaum &
/// Tingey ("One-sided confidence contours for probability distribution functions", Ann. Math.
/// Statist. 1951):
/// x · Σ_{v=0}^{⌊n(1−x)⌋} C(n,v) (x + v/n)^(v−1) (1 − x − v/n)^(n−v).
/// All terms are positive; each is formed in logs, so none overflows. Past their peak the
/// terms only fall, so the sum stops once the rest cannot reach a quarter ulp of it.
///
/// As SciPy does: 0 when e^(−2n·x²) (an upper bound, Dvoretzky–Kiefer–Wolfowitz with Massart's
/// constant) underflows; above n = 10⁶, where the sum would take too long, the approximation
/// SciPy documents, exp(−(6n·x + 1)² / (18n)).
fn smirnov_sf(n: u64, x: f64) -> f64 {
    if x <= 0.0 {
        return 1.0;
    }
    if x >= 1.0 {
        return 0.0;
    }
    let nf = n as f64;
    if -2.0 * nf * x * x < MIN_LOG {
        return 0.0;
    }
    if n > 1_000_000 {
        return (-(6.0 * nf * x + 1.0).powi(2) / (18.0 * nf))
            .exp()
            .clamp(0.0, 1.0);
    }
    let last = ((nf * (1.0 - x)).floor() as u64).min(n);
    let ln_x = x.ln();
    let mut ln_binom = 0.0f64;
    let mut sum = 0.0f64;
    let mut previous = 0.0f64;
    for v in 0..=last {
        let vf = v as f64;
        let a = x + vf / nf;
        let b = (n - v) as f64 / nf - x;
        let log_term = if v == n {
            // (1 − x − 1)^0 = 1 whatever the rounding of b.
            ln_x + ln_binom + (vf - 1.0) * a.ln()
        } else if b > 0.0 {
            ln_x + ln_binom + (vf - 1.0) * a.ln() + (nf - vf) * b.ln()
        } else {
            f64::NEG_INFINITY
        };
        let term = log_term.exp();
        sum += term;
        if term < previous && 4.0 * (last - v) as f64 * term < f64::EPSILON * sum {
            break;
        }
        previous = term;
        ln_binom += ((nf - vf) / (vf + 1.0)).ln();
    }
    sum.clamp(0.0, 1.0)
}

/// ln of the smallest normal f64: e^x underflows below it.
const MIN_LOG: f64 = -708.396_418_532_264_1;

/// Powers of two used to keep matrix entries and the final product in range: 2^±464 ≈ 10^±140,
/// the scale Marsaglia, Tsang & Wang use.
const SCALE_EXP: i32 = 464;

/// m·m row-major matrix product.
fn mat_mul(a: &[f64], b: &[f64], m: usize) -> Vec<f64> {
    let mut c = vec![0.0; m * m];
    for i in 0..m {
        for k in 0..m {
            let aik = a[i * m + k];
            if aik == 0.0 {
                continue;
            }
            let (row_c, row_b) = (&mut c[i * m..(i + 1) * m], &b[k * m..(k + 1) * m]);
            for (cij, bkj) in row_c.iter_mut().zip(row_b) {
                *cij += aik * bkj;
            }
        }
    }
    c
}

/// Multiplies by 2^e without overflowing intermediate powers.
fn times_pow2(mut v: f64, mut e: i64) -> f64 {
    let step = 2f64.powi(SCALE_EXP);
    while e >= i64::from(SCALE_EXP) && v != 0.0 {
        v *= step;
        e -= i64::from(SCALE_EXP);
    }
    while e <= -i64::from(SCALE_EXP) && v != 0.0 {
        v /= step;
        e += i64::from(SCALE_EXP);
    }
    // |e| < 464 here, well inside i32.
    v * 2f64.powi(e as i32)
}

/// P(Dₙ < x) exactly, by Durbin's matrix formula ("The probability that the sample distribution
/// function lies between two parallel straight lines", Ann. Math. Statist. 39, 1968) in the
/// form of Marsaglia, Tsang & Wang ("Evaluating Kolmogorov's distribution", Journal of
/// Statistical Software 8(18), 2003): with n·x = k − h, k an integer and 0 < h ≤ 1, the
/// probability is n!/nⁿ times entry (k, k) of Hⁿ for a (2k−1)-square matrix H, raised by
/// repeated squaring with an exponent kept apart.
fn durbin_cdf(n: u64, x: f64) -> f64 {
    if x >= 1.0 {
        return 1.0;
    }
    let nx = n as f64 * x;
    if nx <= 0.5 {
        return 0.0;
    }
    let k = nx.floor() as usize + 1;
    let h = k as f64 - nx;
    let m = 2 * k - 1;
    // inv_fact[i] = 1/i!
    let mut inv_fact = vec![1.0f64; m + 1];
    for i in 1..=m {
        inv_fact[i] = inv_fact[i - 1] / i as f64;
    }
    let mut hm = vec![0.0f64; m * m];
    for i in 0..m {
        for j in 0..m {
            if i + 1 >= j {
                hm[i * m + j] = inv_fact[i + 1 - j];
            }
        }
    }
    for i in 0..m {
        hm[i * m] -= h.powi(i as i32 + 1) * inv_fact[i + 1];
        hm[(m - 1) * m + i] -= h.powi((m - i) as i32) * inv_fact[m - i];
    }
    if 2.0 * h - 1.0 > 0.0 {
        hm[(m - 1) * m] += (2.0 * h - 1.0).powi(m as i32) * inv_fact[m];
    }
    let (q, mut e) = mat_pow(&hm, m, n, k - 1);
    let mut s = q[(k - 1) * m + (k - 1)];
    let tiny = 2f64.powi(-SCALE_EXP);
    for i in 1..=n {
        s = s * i as f64 / n as f64;
        if s < tiny {
            s *= 2f64.powi(SCALE_EXP);
            e -= i64::from(SCALE_EXP);
        }
    }
    times_pow2(s, e).clamp(0.0, 1.0)
}

/// Hⁿ as (matrix, base-2 exponent), rescaling whenever entry (c, c) grows past 2^464.
fn mat_pow(hm: &[f64], m: usize, n: u64, c: usize) -> (Vec<f64>, i64) {
    let big = 2f64.powi(SCALE_EXP);
    let mut result: Option<(Vec<f64>, i64)> = None;
    let mut base = (hm.to_vec(), 0i64);
    let mut e = n;
    while e > 0 {
        if e & 1 == 1 {
            result = Some(match result {
                None => base.clone(),
                Some((r, re)) => (mat_mul(&r, &base.0, m), re + base.1),
            });
            if let Some((r, re)) = result.as_mut()
                && r[c * m + c] > big
            {
                r.iter_mut().for_each(|v| *v /= big);
                *re += i64::from(SCALE_EXP);
            }
        }
        e >>= 1;
        if e > 0 {
            let sq = mat_mul(&base.0, &base.0, m);
            base = (sq, 2 * base.1);
            if base.0[c * m + c] > big {
                base.0.iter_mut().for_each(|v| *v /= big);
                base.1 += i64::from(SCALE_EXP);
            }
        }
    }
    // n ≥ 1 here (durbin_cdf returns early for n·x ≤ 0.5, which covers n = 0).
    result.unwrap_or_else(|| (identity(m), 0))
}

fn identity(m: usize) -> Vec<f64> {
    let mut id = vec![0.0; m * m];
    for i in 0..m {
        id[i * m + i] = 1.0;
    }
    id
}

/// P(Dₙ ≤ x) by the expansion of Pelz & Good ("Approximating the lower tail-areas of the
/// Kolmogorov-Smirnov one-sample statistic", JRSS B 38(2), 1976), as given by Simard & L'Ecuyer
/// (2011, §2): with z = x√n, P ≈ K₀(z) + K₁(z)/√n + K₂(z)/n + K₃(z)/n^(3/2), each Kᵢ a theta-type
/// series in e^(−(k−½)²π²/(2z²)) and e^(−k²π²/(2z²)).
fn pelz_good_cdf(n: u64, x: f64) -> f64 {
    if x <= 0.0 {
        return 0.0;
    }
    if x >= 1.0 {
        return 1.0;
    }
    let nf = n as f64;
    let z = nf.sqrt() * x;
    let z2 = z * z;
    let (z4, z6) = (z2 * z2, z2 * z2 * z2);
    let z8 = z4 * z4;
    let pi2 = std::f64::consts::PI.powi(2);
    if -pi2 / (8.0 * z2) < -708.0 {
        return 0.0;
    }
    let sqrt_2pi = (2.0 * std::f64::consts::PI).sqrt();
    // Terms fall like e^(−k²π²/(2z²)): past k ≈ 16z/π they are e⁻¹²⁸ of the first or less.
    let terms = (16.0 * z / std::f64::consts::PI).ceil().max(1.0) as u64 + 2;
    let (mut s0, mut s1, mut s2, mut s3) = (0.0, 0.0, 0.0, 0.0);
    let (mut t2, mut t3) = (0.0, 0.0);
    for k in 1..=terms {
        let kh = k as f64 - 0.5;
        let a = pi2 * kh * kh; // π²(k−½)²
        let e = (-a / (2.0 * z2)).exp();
        s0 += e;
        s1 += (a - z2) * e;
        s2 += (6.0 * z6 + 2.0 * z4 + a * (2.0 * z4 - 5.0 * z2) + a * a * (1.0 - 2.0 * z2)) * e;
        s3 += (a * a * a * (5.0 - 30.0 * z2)
            + a * a * (-60.0 * z2 + 212.0 * z4)
            + a * (135.0 * z4 - 96.0 * z6)
            - 30.0 * z6
            - 90.0 * z8)
            * e;
        let b = pi2 * (k * k) as f64; // π²k²
        let f = (-b / (2.0 * z2)).exp();
        t2 += b * f;
        t3 += (3.0 * b * z2 - b * b) * f;
    }
    let k0 = sqrt_2pi / z * s0;
    let k1 = sqrt_2pi / (6.0 * z4) * s1;
    let k2 = sqrt_2pi / (72.0 * z.powi(7)) * s2 - sqrt_2pi / (36.0 * z2 * z) * t2;
    let k3 = sqrt_2pi / (6480.0 * z.powi(10)) * s3 + sqrt_2pi / (216.0 * z6) * t3;
    k0 + k1 / nf.sqrt() + k2 / nf + k3 / (nf * nf.sqrt())
}

#[cfg(test)]
mod tests {
    use super::*;

    /// Brute force over all C(m+n, n) orderings: the exact p-value is the fraction of
    /// arrangements whose D reaches the observed one (the definition of the exact test).
    #[test]
    fn exact_p_counts_paths() {
        for (m, n) in [(3u64, 2u64), (4, 4), (5, 3), (6, 4)] {
            let lcm = m * n / gcd(m, n);
            let total = m + n;
            for h in 1..=lcm {
                let mut hit = 0u64;
                let mut all = 0u64;
                for mask in 0u64..(1 << total) {
                    if mask.count_ones() as u64 != n {
                        continue;
                    }
                    all += 1;
                    let (mut x, mut y, mut dmax) = (0i64, 0i64, 0i64);
                    for bit in 0..total {
                        if mask >> bit & 1 == 1 {
                            y += 1;
                        } else {
                            x += 1;
                        }
                        let d = (x * (lcm / m) as i64 - y * (lcm / n) as i64).abs();
                        dmax = dmax.max(d);
                    }
                    if dmax >= h as i64 {
                        hit += 1;
                    }
                }
                let want = hit as f64 / all as f64;
                let got = exact_two_sample_p(m, n, h);
                assert!(
                    (got - want).abs() < 1e-14,
                    "m={m} n={n} h={h}: {got} vs {want}"
                );
            }
        }
    }

    /// For n = 1, D₁ = max(U, 1−U) with U uniform, so P(D₁ ≥ x) = 2(1−x) for x ≥ ½.
    #[test]
    fn kstwo_n1() {
        for x in [0.5, 0.6, 0.9] {
            assert!((kstwo_sf(1, x) - 2.0 * (1.0 - x)).abs() < 1e-15);
        }
    }

    /// Durbin's exact matrix and the Pelz–Good expansion meet where both apply; the expansion
    /// is good to about 10⁻⁵ at n = 1000 (Simard & L'Ecuyer 2011, §3).
    #[test]
    fn durbin_and_pelz_good_agree() {
        for x in [0.02, 0.03, 0.04] {
            let d = durbin_cdf(1000, x);
            let p = pelz_good_cdf(1000, x);
            assert!((d - p).abs() < 1e-4, "x={x}: {d} vs {p}");
        }
    }
}
