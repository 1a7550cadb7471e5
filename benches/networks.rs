//! Whole-network throughput for the reference networks of `shared/bench/torch_baseline.py`, at
//! batch 1 and 32, on 1 and 2 threads. Criterion reports images per second (throughput in
//! elements = images); compare with PyTorch's figures measured in the same session.

mod nets;

use std::hint::black_box;
use std::time::Duration;

use convoy::bundle::Bundle;
use convoy::engine::{Engine, EngineConfig, RunOptions};
use criterion::{BenchmarkId, Criterion, Throughput, criterion_group, criterion_main};

fn networks(c: &mut Criterion) {
    let scenarios = [
        ("lenet-28", nets::lenet28()),
        ("resnet20-32", nets::resnet20()),
        ("mbv2-224", nets::mobilenet_v2()),
    ];
    for (name, writer) in scenarios {
        // Built bundles always verify (the writer reads them back).
        let bundle = Bundle::from_bytes(writer.to_bytes().expect("bundle")).expect("verify");
        let mut group = c.benchmark_group(name);
        if name == "mbv2-224" {
            group
                .sample_size(10)
                .measurement_time(Duration::from_secs(8));
        } else {
            group.measurement_time(Duration::from_secs(3));
        }
        for threads in [1, 2] {
            let engine = Engine::new(
                &bundle,
                &EngineConfig {
                    threads,
                    ..EngineConfig::default()
                },
            )
            .expect("engine");
            for batch in [1usize, 32] {
                let mut rng = nets::Rng::new(11);
                let x = rng.vec(batch * engine.plan().input_len(), -1.0, 1.0);
                let mut out = vec![0.0; batch * engine.plan().output_len()];
                group.throughput(Throughput::Elements(batch as u64));
                group.bench_with_input(
                    BenchmarkId::new(format!("threads{threads}"), format!("batch{batch}")),
                    &batch,
                    |b, &batch| {
                        b.iter(|| {
                            engine
                                .run_into(black_box(&x), batch, RunOptions::default(), &mut out)
                                .expect("run");
                            black_box(&out);
                        })
                    },
                );
            }
        }
        group.finish();
    }
}

criterion_group!(benches, networks);
criterion_main!(benches);
