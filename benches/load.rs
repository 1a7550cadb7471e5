//! Load time of a model version: verify a bundle (`Bundle::from_bytes`: checksums, index,
//! finite weights, shapes) and plan it (`Engine::new`: folding, fusion, weight packing,
//! buffer layout), for the reference networks of `shared/bench/torch_baseline.py` built with
//! random weights; and `Bundle::open` of the same bytes from a file (memory-mapped).
//!
//! The built networks keep batch normalisation as separate nodes, so planning folds it; a
//! bundle imported from ONNX arrives folded already. To time imported bundles as well, list
//! them in `CONVOY_LOAD_BUNDLES` (comma-separated paths), e.g. the output of
//! `convoy import target/ref-onnx/mbv2-224.onnx -o target/bench-models/mbv2-224.cvb`.
//!
//! Run: `cargo bench --bench load`.

mod nets;

use std::hint::black_box;
use std::path::PathBuf;
use std::time::Duration;

use convoy::bundle::Bundle;
use convoy::engine::{Engine, EngineConfig};
use criterion::{Criterion, criterion_group, criterion_main};

/// Comma-separated bundle files timed in addition to the built networks.
const EXTRA_BUNDLES: &str = "CONVOY_LOAD_BUNDLES";

fn load(c: &mut Criterion) {
    let scenarios = [
        ("resnet20-32", nets::resnet20()),
        ("mbv2-224", nets::mobilenet_v2()),
    ];
    let dir = tempfile::tempdir().expect("temporary folder");
    let mut files: Vec<(String, PathBuf)> = Vec::new();
    for (name, writer) in scenarios {
        // Built bundles always verify (the writer reads them back).
        let bytes = writer.to_bytes().expect("bundle");
        let mut group = c.benchmark_group(format!("load/{name}"));
        group
            .sample_size(20)
            .measurement_time(Duration::from_secs(4));
        group.bench_function("verify", |b| {
            b.iter_batched(
                || bytes.clone(),
                |bytes| black_box(Bundle::from_bytes(bytes).expect("verify")),
                criterion::BatchSize::LargeInput,
            )
        });
        let bundle = Bundle::from_bytes(bytes.clone()).expect("verify");
        group.bench_function("plan", |b| {
            b.iter(|| black_box(Engine::new(&bundle, &EngineConfig::default()).expect("engine")))
        });
        group.bench_function("verify+plan", |b| {
            b.iter_batched(
                || bytes.clone(),
                |bytes| {
                    let bundle = Bundle::from_bytes(bytes).expect("verify");
                    black_box(Engine::new(&bundle, &EngineConfig::default()).expect("engine"))
                },
                criterion::BatchSize::LargeInput,
            )
        });
        group.finish();
        let path = dir.path().join(format!("{name}.cvb"));
        std::fs::write(&path, &bytes).expect("write bundle");
        files.push((name.to_string(), path));
    }
    if let Ok(list) = std::env::var(EXTRA_BUNDLES) {
        for p in list.split(',').map(str::trim).filter(|p| !p.is_empty()) {
            let path = PathBuf::from(p);
            let name = path
                .file_stem()
                .map_or_else(|| p.to_string(), |s| s.to_string_lossy().into_owned());
            files.push((format!("{name} (file)"), path));
        }
    }
    for (name, path) in files {
        let mut group = c.benchmark_group(format!("open/{name}"));
        group
            .sample_size(20)
            .measurement_time(Duration::from_secs(4));
        group.bench_function("open", |b| {
            b.iter(|| black_box(Bundle::open(&path).expect("open")))
        });
        group.bench_function("open+plan", |b| {
            b.iter(|| {
                let bundle = Bundle::open(&path).expect("open");
                black_box(Engine::new(&bundle, &EngineConfig::default()).expect("engine"))
            })
        });
        group.finish();
    }
}

criterion_group!(benches, load);
criterion_main!(benches);
