//! The drift statistics against SciPy and NumPy: `tests/drift/cases.json`, written by
//! `tests/drift/make_cases.py` (the SciPy and NumPy versions are recorded in the file).

use std::path::Path;

use convoy::drift::ks_dist::kstwo_sf;
use convoy::drift::special::chi2_sf;
use convoy::drift::{
    KsMethod, ScalarReference, chisquare, class_chisquare, ks_2samp, ks_against_reference,
};
use serde_json::Value;

fn cases() -> Value {
    let path = Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/drift/cases.json");
    let text = std::fs::read_to_string(&path).expect("tests/drift/cases.json is committed");
    serde_json::from_str(&text).expect("cases.json is JSON")
}

fn f64s(v: &Value) -> Vec<f64> {
    v.as_array()
        .expect("array")
        .iter()
        .map(|x| x.as_f64().expect("number"))
        .collect()
}

fn u64s(v: &Value) -> Vec<u64> {
    v.as_array()
        .expect("array")
        .iter()
        .map(|x| x.as_u64().expect("count"))
        .collect()
}

fn num(v: &Value, key: &str) -> f64 {
    v[key]
        .as_f64()
        .unwrap_or_else(|| panic!("{key} is a number"))
}

/// |got − want| ≤ abs + rel·|want|.
fn close(got: f64, want: f64, rel: f64, abs: f64) -> bool {
    (got - want).abs() <= abs + rel * want.abs()
}

/// The generator the script uses for large samples: SplitMix64 (Steele, Lea & Flood, "Fast
/// splittable pseudorandom number generators", OOPSLA 2014), (z >> 11) / 2⁵³ + shift, exact in
/// f64 on both sides.
fn splitmix_uniforms(seed: u64, n: usize, shift: f64) -> Vec<f64> {
    let mut state = seed;
    (0..n)
        .map(|_| {
            state = state.wrapping_add(0x9E37_79B9_7F4A_7C15);
            let mut z = state;
            z = (z ^ (z >> 30)).wrapping_mul(0xBF58_476D_1CE4_E5B9);
            z = (z ^ (z >> 27)).wrapping_mul(0x94D0_49BB_1331_11EB);
            z ^= z >> 31;
            (z >> 11) as f64 / (1u64 << 53) as f64 + shift
        })
        .collect()
}

/// `scipy.stats.ks_2samp(a, b)` (method='auto'): exact p-values for sizes up to 10,000, the
/// `kstwo` distribution beyond, in each of its regimes.
///
/// D must match to 10⁻¹²: both sides compute the same rational (SciPy as a difference of two
/// float ECDF values). p-values to 10⁻⁸ relative (+10⁻¹⁴ absolute): the exact path recursion,
/// Durbin's matrix (where SciPy uses Pomeranz's recursion) and the log-space Smirnov sum are
/// exact algorithms evaluated in different orders, whose rounding differs by far less; a wrong
/// branch, cut-off or formula moves p by 10⁻⁴ or more.
#[test]
fn ks_2samp_matches_scipy() {
    let doc = cases();
    let list = doc["ks_2samp"].as_array().expect("ks cases");
    assert!(list.len() >= 12);
    for case in list {
        let name = case["name"].as_str().expect("name");
        let (a, b) = if let Some(g) = case.get("generated") {
            let n = |k: &str| g[k].as_u64().expect("integer");
            (
                splitmix_uniforms(n("seed_a"), n("n_a") as usize, 0.0),
                splitmix_uniforms(n("seed_b"), n("n_b") as usize, num(g, "shift_b")),
            )
        } else {
            (f64s(&case["a"]), f64s(&case["b"]))
        };
        let r = ks_2samp(&a, &b).expect("valid samples");
        let (d, p) = (num(case, "statistic"), num(case, "p_value"));
        assert!(
            close(r.statistic, d, 0.0, 1e-12),
            "{name}: D {} vs {d}",
            r.statistic
        );
        assert!(
            close(r.p_value, p, 1e-8, 1e-14),
            "{name}: p {} vs {p}",
            r.p_value
        );
        let want_method = if a.len().max(b.len()) <= 10_000 {
            KsMethod::Exact
        } else {
            KsMethod::Asymptotic
        };
        assert_eq!(r.method, want_method, "{name}");
    }
}

/// `scipy.stats.kstwo.sf(x, n)` over a grid that visits every regime of Simard & L'Ecuyer's
/// method choice (closed forms, Durbin's matrix, Pelz–Good, 2·Smirnov). Tolerance as above;
/// Pelz–Good is an approximation to the true distribution, but both sides evaluate the same
/// expansion, so they agree to rounding.
#[test]
fn kstwo_sf_matches_scipy() {
    let doc = cases();
    for case in doc["kstwo_sf"].as_array().expect("kstwo cases") {
        let n = case["n"].as_u64().expect("n");
        let (x, sf) = (num(case, "x"), num(case, "sf"));
        let got = kstwo_sf(n, x);
        assert!(close(got, sf, 1e-8, 1e-14), "n={n} x={x}: {got} vs {sf}");
    }
}

/// `scipy.stats.chisquare` and `scipy.stats.chi2.sf`. Statistic to 10⁻¹² relative (the same
/// sum in another order); p to 10⁻¹⁰ relative: SciPy's incomplete gamma (Cephes) uses other
/// expansions than ours, and the exponent −x + a·ln x − ln Γ(a) of both is rounded at about
/// x·ε, 10⁻¹³ relative for the largest x here.
#[test]
fn chisquare_matches_scipy() {
    let doc = cases();
    for case in doc["chisquare"].as_array().expect("chisquare cases") {
        let name = case["name"].as_str().expect("name");
        let r = chisquare(&u64s(&case["observed"]), &f64s(&case["fractions"])).expect("valid");
        let (s, p) = (num(case, "statistic"), num(case, "p_value"));
        assert_eq!(r.dof as u64, case["dof"].as_u64().expect("dof"), "{name}");
        assert!(
            close(r.statistic, s, 1e-12, 0.0),
            "{name}: {} vs {s}",
            r.statistic
        );
        assert!(
            close(r.p_value, p, 1e-10, 1e-300),
            "{name}: {} vs {p}",
            r.p_value
        );
    }
    for case in doc["class_chisquare"].as_array().expect("class cases") {
        let name = case["name"].as_str().expect("name");
        let r = class_chisquare(&u64s(&case["reference"]), &u64s(&case["live"])).expect("valid");
        let (s, p) = (num(case, "statistic"), num(case, "p_value"));
        assert_eq!(r.dof as u64, case["dof"].as_u64().expect("dof"), "{name}");
        assert!(
            close(r.statistic, s, 1e-12, 0.0),
            "{name}: {} vs {s}",
            r.statistic
        );
        assert!(
            close(r.p_value, p, 1e-10, 1e-300),
            "{name}: {} vs {p}",
            r.p_value
        );
    }
    for case in doc["chi2_sf"].as_array().expect("chi2 cases") {
        let (x, dof, sf) = (num(case, "x"), num(case, "dof"), num(case, "sf"));
        let got = chi2_sf(x, dof);
        assert!(
            close(got, sf, 1e-10, 1e-300),
            "x={x} dof={dof}: {got} vs {sf}"
        );
    }
}

/// A baseline's 101 quantiles against `numpy.quantile(reference, linspace(0, 1, 101))`, and the
/// KS distance against its reconstructed CDF against SciPy's two-sample D on the raw reference.
/// Quantiles are stored as f32, so they must equal NumPy's rounded to f32 within one f32 ulp
/// (the interpolation may round the other way at a midpoint). The distance must be within the
/// bound `ScalarReference::cdf` documents, 1/100 + 1/n_ref.
#[test]
fn baseline_quantiles_and_ks_bound_match_numpy_and_scipy() {
    let doc = cases();
    let case = &doc["quantile_baseline"];
    let mut reference: Vec<f32> = f64s(&case["reference"]).iter().map(|&v| v as f32).collect();
    let n_ref = reference.len() as f64;
    let live: Vec<f32> = f64s(&case["live"]).iter().map(|&v| v as f32).collect();
    let r = ScalarReference::from_values("x", &mut reference, 10).expect("valid reference");
    for (k, (&ours, &numpy)) in r
        .quantiles
        .iter()
        .zip(&f64s(&case["quantiles"]))
        .enumerate()
    {
        let want = numpy as f32;
        assert!(
            (ours - want).abs() <= f32::EPSILON * want.abs().max(1e-30),
            "quantile {k}: {ours} vs {want}"
        );
    }
    let ks = ks_against_reference(&live, &r).expect("valid live sample");
    let d = num(case, "ks_statistic");
    let bound = 0.01 + 1.0 / n_ref;
    assert!((ks.statistic - d).abs() <= bound, "{} vs {d}", ks.statistic);
    // Same sizes (2000, 300), so the p-value follows SciPy's exact branch too.
    assert_eq!(ks.method, KsMethod::Exact);
}
