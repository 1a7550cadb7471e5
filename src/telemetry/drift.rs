//! Drift metrics: each monitored model version's cumulative counters and its latest test
//! results, exported when `/metrics` is read.
//!
//! Nothing here runs on a request's path: the predictor only feeds each version's
//! `drift::DriftWindow`, and [`refresh`] copies the window's cumulative counters into
//! Prometheus counters (`absolute`, so they only ever grow) and runs the drift tests into
//! gauges, once per scrape, on the metrics endpoint's own thread. Labels stay bounded:
//! `statistic` comes from the model's schema, `bin` from its reference (at most a few dozen
//! bins), `class` from its output (exported only up to [`MAX_CLASS_SERIES`] classes).

use std::collections::BTreeMap;
use std::sync::{Arc, Mutex, PoisonError, Weak};

use metrics::{counter, gauge};

use super::names::*;
use crate::drift::Verdict;
use crate::registry::{ModelVersion, Registry};

/// Models with more classes than this export no per-class prediction counters (the chi-square
/// verdict in `convoy_drift_verdict{statistic="predicted_class"}` still covers them).
pub const MAX_CLASS_SERIES: usize = 100;

/// The registries of running servers, each with its drift test level. Weak: a stopped server
/// is dropped from the list at the next scrape.
static SOURCES: Mutex<Vec<(Weak<Registry>, f64)>> = Mutex::new(Vec::new());

/// Versions whose gauges were exported, with the statistic names: a version that is no
/// longer loaded gets its verdicts set to "no data" (-1) once.
static EXPORTED: Mutex<BTreeMap<(String, String), Vec<String>>> = Mutex::new(BTreeMap::new());

/// Exports the drift metrics of `registry`'s versions at every scrape, testing at `alpha`.
pub fn watch_drift(registry: &Arc<Registry>, alpha: f64) {
    SOURCES
        .lock()
        .unwrap_or_else(PoisonError::into_inner)
        .push((Arc::downgrade(registry), alpha));
}

/// The verdict as a gauge value: -1 too few samples, 0 stable, 1 moderate, 2 drift.
pub fn verdict_value(v: Verdict) -> f64 {
    match v {
        Verdict::TooFewSamples => -1.0,
        Verdict::Stable => 0.0,
        Verdict::Moderate => 1.0,
        Verdict::Drift => 2.0,
    }
}

/// Brings every drift series up to date. Called before each render of `/metrics`.
pub(crate) fn refresh() {
    let sources: Vec<(Arc<Registry>, f64)> = {
        let mut list = SOURCES.lock().unwrap_or_else(PoisonError::into_inner);
        list.retain(|(w, _)| w.strong_count() > 0);
        list.iter()
            .filter_map(|(w, a)| w.upgrade().map(|r| (r, *a)))
            .collect()
    };
    let mut live = BTreeMap::new();
    for (registry, alpha) in sources {
        for slot in registry.snapshot().into_values() {
            for v in &slot.versions {
                if let Some(m) = &v.model
                    && let Some(names) = export(m, alpha)
                {
                    live.insert((m.name.clone(), m.version.clone()), names);
                }
            }
        }
    }
    let mut exported = EXPORTED.lock().unwrap_or_else(PoisonError::into_inner);
    for ((model, version), names) in exported.iter() {
        if live.contains_key(&(model.clone(), version.clone())) {
            continue;
        }
        for statistic in names {
            gauge!(DRIFT_VERDICT, "model" => model.clone(), "version" => version.clone(), "statistic" => statistic.clone())
                .set(-1.0);
        }
        gauge!(DRIFT_WINDOW_SAMPLES, "model" => model.clone(), "version" => version.clone())
            .set(0.0);
    }
    *exported = live;
}

/// Exports one version; returns the statistic names it has gauges for.
fn export(m: &ModelVersion, alpha: f64) -> Option<Vec<String>> {
    let monitor = m.drift.as_ref()?;
    let (model, version) = (m.name.clone(), m.version.clone());
    let c = monitor.window.counters();
    counter!(DRIFT_SAMPLES_TOTAL, "model" => model.clone(), "version" => version.clone())
        .absolute(c.samples);
    for s in &c.statistics {
        for (bin, n) in s.bin_counts.iter().enumerate() {
            counter!(DRIFT_VALUES_TOTAL, "model" => model.clone(), "version" => version.clone(),
                "statistic" => s.name.clone(), "bin" => bin.to_string())
            .absolute(*n);
        }
        counter!(DRIFT_OUT_OF_RANGE_TOTAL, "model" => model.clone(), "version" => version.clone(),
            "statistic" => s.name.clone())
        .absolute(s.out_of_range);
        counter!(DRIFT_NON_FINITE_TOTAL, "model" => model.clone(), "version" => version.clone(),
            "statistic" => s.name.clone())
        .absolute(s.non_finite);
    }
    if c.class_counts.len() <= MAX_CLASS_SERIES {
        for (class, n) in c.class_counts.iter().enumerate() {
            counter!(DRIFT_PREDICTIONS_TOTAL, "model" => model.clone(), "version" => version.clone(),
                "class" => class.to_string())
            .absolute(*n);
        }
    }
    let report = monitor.window.report(alpha).ok()?;
    gauge!(DRIFT_WINDOW_SAMPLES, "model" => model.clone(), "version" => version.clone())
        .set(report.samples as f64);
    let mut names = Vec::new();
    for s in &report.statistics {
        let labels = [
            ("model", model.clone()),
            ("version", version.clone()),
            ("statistic", s.name.clone()),
        ];
        // Without values in the window there is no PSI or p-value: the gauges keep their last
        // value (none before the first sample), and the verdict says -1.
        if let Some(psi) = s.psi {
            gauge!(DRIFT_PSI, &labels).set(psi);
        }
        if let Some(ks) = s.ks {
            gauge!(DRIFT_KS_P_VALUE, &labels).set(ks.p_value);
        }
        gauge!(DRIFT_VERDICT, &labels).set(verdict_value(s.verdict));
        names.push(s.name.clone());
    }
    let class = "predicted_class".to_string();
    let labels = [
        ("model", model.clone()),
        ("version", version.clone()),
        ("statistic", class.clone()),
    ];
    match &report.predicted_class {
        Some(c) => {
            if let Some(psi) = c.psi {
                gauge!(DRIFT_PSI, &labels).set(psi);
            }
            if let Some(x) = c.chi_square {
                gauge!(DRIFT_KS_P_VALUE, &labels).set(x.p_value);
            }
            gauge!(DRIFT_VERDICT, &labels).set(verdict_value(c.verdict));
        }
        None => gauge!(DRIFT_VERDICT, &labels).set(-1.0),
    }
    names.push(class);
    Some(names)
}
