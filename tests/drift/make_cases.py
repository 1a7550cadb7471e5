"""Generates cases.json: reference values from SciPy and NumPy for tests/drift_reference.rs.

Run with the reference environment (not run by cargo test):

    .venv-ref/bin/python tests/drift/make_cases.py

Samples of moderate size are drawn with NumPy's seeded generator, rounded to 4 decimals (so the
stored text is exactly the data SciPy saw; rounding also makes some ties) and stored. Samples of
10,000 values and more would make the file large, so they are produced by SplitMix64 (Steele,
Lea & Flood, OOPSLA 2014), which the Rust test re-implements: only the seed is stored.
"""

import json
import math
from pathlib import Path

import numpy as np
import scipy
from scipy import stats

OUT = Path(__file__).with_name("cases.json")
MASK = (1 << 64) - 1


def splitmix_uniforms(seed, n, shift):
    """n values (k >> 11) / 2**53 + shift from SplitMix64 started at seed (exact in f64)."""
    state = seed
    out = []
    for _ in range(n):
        state = (state + 0x9E3779B97F4A7C15) & MASK
        z = state
        z = ((z ^ (z >> 30)) * 0xBF58476D1CE4E5B9) & MASK
        z = ((z ^ (z >> 27)) * 0x94D049BB133111EB) & MASK
        z ^= z >> 31
        out.append((z >> 11) / float(1 << 53) + shift)
    return out


def r4(xs):
    return [float(v) for v in np.round(np.asarray(xs, dtype=np.float64), 4)]


def ks_entry(name, first, second, **extra):
    res = stats.ks_2samp(first, second)  # default method='auto', alternative='two-sided'
    entry = {"name": name, "statistic": float(res.statistic), "p_value": float(res.pvalue)}
    entry.update(extra)
    return entry


def main():
    rng = np.random.default_rng(20_240_611)
    ks = []

    def stored(name, a, b):
        a, b = r4(a), r4(b)
        ks.append(ks_entry(name, a, b, a=a, b=b))

    stored("small_5_vs_5_shifted", rng.normal(0, 1, 5), rng.normal(1, 1, 5))
    stored("small_8_vs_12", rng.normal(0, 1, 8), rng.normal(0.3, 1, 12))
    stored("ties_integers_30_vs_40", rng.integers(0, 6, 30), rng.integers(1, 7, 40))
    same = rng.normal(0, 1, 50)
    stored("identical_50", same, same)
    stored("shifted_normals_100_vs_120", rng.normal(0, 1, 100), rng.normal(0.5, 1, 120))
    stored("same_distribution_500_vs_500", rng.normal(0, 1, 500), rng.normal(0, 1, 500))
    stored("unequal_37_vs_1000", rng.normal(0, 1, 37), rng.normal(0.3, 1, 1000))
    stored("coprime_997_vs_1009", rng.normal(0, 1, 997), rng.normal(0.1, 1, 1009))
    stored("wide_vs_narrow_200_vs_300", rng.normal(0, 1, 200), rng.normal(0, 1.5, 300))

    def generated(name, seed_a, n_a, seed_b, n_b, shift_b):
        a = splitmix_uniforms(seed_a, n_a, 0.0)
        b = splitmix_uniforms(seed_b, n_b, shift_b)
        gen = {"seed_a": seed_a, "n_a": n_a, "seed_b": seed_b, "n_b": n_b, "shift_b": shift_b}
        ks.append(ks_entry(name, a, b, generated=gen))

    # Exact branch at its limit (both sizes <= 10,000), equal and unequal sizes.
    generated("exact_10000_vs_10000_shift", 1, 10_000, 2, 10_000, 0.02)
    generated("exact_10000_vs_8000_shift", 3, 10_000, 4, 8_000, 0.02)
    # Asymptotic branch: kstwo.sf(D, round(n1*n2/(n1+n2))) in each of its regimes.
    generated("asymp_12000_vs_15000_shift", 5, 12_000, 6, 15_000, 0.02)  # 2*smirnov
    generated("asymp_20000_vs_20000_same", 1001, 20_000, 2002, 20_000, 0.0)  # Pelz-Good
    generated("asymp_150_vs_11000_same", 9, 150, 10, 11_000, 0.0)  # n > 140, Durbin
    generated("asymp_60_vs_12000_shift", 11, 60, 12, 12_000, 0.15)  # n <= 140
    generated("asymp_3_vs_20000", 13, 3, 14, 20_000, 0.0)  # tiny n

    kstwo = []
    for n in [1, 2, 5, 20, 60, 140, 141, 500, 5_000, 50_000, 200_000, 2_000_000]:
        xs = [0.75 / n, 1.0 / n, 0.02, 0.05, 0.1, 0.2, 0.3, 0.45, 0.5, 0.6, 0.9, 1 - 1.5 / n]
        if n > 1_000_000:  # Pelz-Good, and the one-sided approximation SciPy uses above 10**6
            xs += [0.0005, 0.0015, 0.003]
        for x in sorted(set(xs)):
            if 0 < x < 1:
                kstwo.append({"n": n, "x": x, "sf": float(stats.kstwo.sf(x, n))})

    chisq = []

    def chi_entry(name, observed, fractions):
        observed = [int(v) for v in observed]
        fractions = [float(f) for f in fractions]
        total = sum(observed)
        f_exp = np.asarray(fractions) / sum(fractions) * total
        res = stats.chisquare(observed, f_exp=f_exp)
        chisq.append({
            "name": name, "observed": observed, "fractions": fractions,
            "statistic": float(res.statistic), "p_value": float(res.pvalue),
            "dof": len(observed) - 1,
        })

    chi_entry("two_classes", [30, 70], [0.5, 0.5])
    fr = rng.dirichlet(np.ones(10))
    chi_entry("ten_classes_same", rng.multinomial(500, fr), fr)
    chi_entry("ten_classes_shifted", rng.multinomial(500, rng.dirichlet(np.ones(10))), fr)
    fr100 = rng.dirichlet(np.full(100, 5.0))
    chi_entry("hundred_classes", rng.multinomial(5000, fr100), fr100)
    chi_entry("far_off", [900, 50, 50], [0.2, 0.4, 0.4])

    # class_chisquare's documented rule for classes the reference never predicted: drop them
    # when the window has none, else floor the reference at half a count and renormalise.
    classes = []
    for name, ref, live in [
        ("unseen_class_appears", [50, 50, 0, 10], [45, 40, 5, 0]),
        ("unseen_class_stays_empty", [120, 0, 80, 40], [60, 0, 30, 10]),
    ]:
        n_ref = sum(ref)
        keep = [i for i in range(len(ref)) if ref[i] > 0 or live[i] > 0]
        obs = [live[i] for i in keep]
        frac = np.array([(ref[i] if ref[i] > 0 else 0.5) / n_ref for i in keep])
        res = stats.chisquare(obs, f_exp=frac / frac.sum() * sum(obs))
        classes.append({
            "name": name, "reference": ref, "live": live,
            "statistic": float(res.statistic), "p_value": float(res.pvalue), "dof": len(keep) - 1,
        })

    chi2_sf = []
    for x, dof in [(1e-3, 1), (0.5, 1), (3.841458820694124, 1), (10, 3), (100, 3), (1000, 10),
                   (20, 50), (50, 50), (80, 50), (500, 999), (1100, 999), (2.5, 7.5),
                   (1e-5, 0.5), (30, 2)]:
        chi2_sf.append({"x": x, "dof": dof, "sf": float(stats.chi2.sf(x, dof))})

    # A baseline's quantiles (NumPy's default linear method) and the KS distance to a live
    # sample, for the reconstruction bound |D(F_hat) - D| <= 1/100 + 1/n_ref.
    reference = r4(rng.normal(0, 1, 2000))
    live = r4(rng.normal(0.2, 1.1, 300))
    quantile_case = {
        "reference": reference,
        "live": live,
        "quantiles": [float(q) for q in np.quantile(reference, np.linspace(0, 1, 101))],
        "ks_statistic": float(stats.ks_2samp(reference, live).statistic),
    }

    doc = {
        "generator": "tests/drift/make_cases.py",
        "scipy_version": scipy.__version__,
        "numpy_version": np.__version__,
        "ks_2samp": ks,
        "kstwo_sf": kstwo,
        "chisquare": chisq,
        "class_chisquare": classes,
        "chi2_sf": chi2_sf,
        "quantile_baseline": quantile_case,
    }
    assert all(math.isfinite(c["p_value"]) for c in ks)
    OUT.write_text(json.dumps(doc, separators=(",", ":")) + "\n")
    print(f"wrote {OUT} ({OUT.stat().st_size} bytes)")


if __name__ == "__main__":
    main()
