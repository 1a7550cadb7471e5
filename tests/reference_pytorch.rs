//! The executor against PyTorch: every case under `tests/reference/cases/` (made by
//! `tests/reference/make_goldens.py` with PyTorch, see its README) is turned into a bundle,
//! run on every instruction-set path this CPU has, and compared with PyTorch's output.
//!
//! Tolerance: max |ours − PyTorch| ≤ 1e-4 · max(1, max |PyTorch|) and the same top-1 class. Both
//! sides compute in f32 with different summation orders (and we fold batch norm into the
//! weights); the error of an f32 dot product of length K is bounded by about K·2⁻²⁴ times the
//! sum of absolute products (Higham, *Accuracy and Stability of Numerical Algorithms*, 2002,
//! §3.1), far below 1e-4 of the output scale for these sizes.
//!
//! Batch invariance is checked bitwise: a sample's output must not change with its batch, its
//! position in the batch or the number of threads.

use std::path::{Path, PathBuf};

use convoy::bundle::manifest::{InputSpec, OutputKind, OutputSpec};
use convoy::bundle::{Bundle, BundleWriter};
use convoy::engine::{Engine, EngineConfig, Isa, RunOptions, tolerance_check};
use convoy::graph::Graph;
use convoy::npy::read_npy_file;

struct Case {
    name: String,
    bundle: Bundle,
    input: Vec<f32>,
    batch: usize,
    expected: Vec<f32>,
}

fn cases() -> Vec<Case> {
    let root = Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/reference/cases");
    let mut dirs: Vec<PathBuf> = std::fs::read_dir(&root)
        .expect("reference cases")
        .map(|e| e.unwrap().path())
        .filter(|p| p.join("model.json").exists())
        .collect();
    dirs.sort();
    assert!(
        dirs.len() >= 8,
        "expected the 8 reference cases, found {}",
        dirs.len()
    );
    dirs.iter().map(|d| load_case(d)).collect()
}

fn load_case(dir: &Path) -> Case {
    let name = dir.file_name().unwrap().to_string_lossy().into_owned();
    let model: serde_json::Value =
        serde_json::from_slice(&std::fs::read(dir.join("model.json")).unwrap()).unwrap();
    let graph: Graph = serde_json::from_value(model["graph"].clone()).unwrap();
    let input = read_npy_file(&dir.join("input.npy")).unwrap();
    let output = read_npy_file(&dir.join("output.npy")).unwrap();
    let batch = input.shape[0];
    let mut w = BundleWriter::new(
        name.replace('_', "-"),
        "1",
        graph.clone(),
        InputSpec {
            shape: graph.input.shape.clone(),
            image: None,
        },
        OutputSpec {
            labels: Vec::new(),
            kind: OutputKind::Logits,
        },
    )
    .source(format!("tests/reference/cases/{name}"));
    for (tname, file) in model["tensors"].as_object().unwrap() {
        let t = read_npy_file(&dir.join(file.as_str().unwrap())).unwrap();
        w.add_tensor(tname.clone(), &t.shape, t.data).unwrap();
    }
    // The PyTorch pair doubles as the bundle's check samples.
    w.check_samples(
        batch,
        input.data.clone(),
        output.data.clone(),
        &output.shape[1..],
        format!("pytorch {}", model["torch_version"].as_str().unwrap()),
    )
    .unwrap();
    let bundle =
        Bundle::from_bytes(w.to_bytes().unwrap()).unwrap_or_else(|e| panic!("case {name}: {e}"));
    Case {
        name,
        bundle,
        input: input.data,
        batch,
        expected: output.data,
    }
}

fn engine(case: &Case, isa: Isa, threads: usize) -> Engine {
    Engine::new(
        &case.bundle,
        &EngineConfig {
            threads,
            isa: Some(isa),
            ..EngineConfig::default()
        },
    )
    .unwrap()
}

fn argmax(xs: &[f32]) -> usize {
    let mut best = 0;
    for (i, &v) in xs.iter().enumerate() {
        if v > xs[best] {
            best = i;
        }
    }
    best
}

/// Paths to test: all this CPU has, or only the one `CONVOY_ISA` forces.
fn isas() -> Vec<Isa> {
    match std::env::var("CONVOY_ISA") {
        Ok(_) => vec![Isa::detect().expect("CONVOY_ISA names a supported path")],
        Err(_) => Isa::supported(),
    }
}

#[test]
fn matches_pytorch_on_every_path() {
    for case in cases() {
        for isa in isas() {
            let e = engine(&case, isa, 1);
            let got = e
                .run(&case.input, case.batch, RunOptions::default())
                .unwrap();
            let (err, bound) = tolerance_check(&got, &case.expected);
            assert!(
                err <= bound,
                "case {} on {}: max error {err:e} > bound {bound:e}",
                case.name,
                isa.name()
            );
            let per = got.len() / case.batch;
            if per > 1 {
                for s in 0..case.batch {
                    assert_eq!(
                        argmax(&got[s * per..][..per]),
                        argmax(&case.expected[s * per..][..per]),
                        "case {} on {}: top-1 of sample {s}",
                        case.name,
                        isa.name()
                    );
                }
            }
            println!(
                "{:<20} {:<7} max error {err:.2e} (bound {bound:.2e})",
                case.name,
                isa.name()
            );
        }
    }
}

#[test]
fn xor_is_exact() {
    // Goodfellow, Bengio & Courville, Deep Learning (2016), §6.1: the network computes XOR
    // exactly on the four points, so every path must give exactly 0, 1, 1, 0.
    let case = cases().into_iter().find(|c| c.name == "xor").unwrap();
    assert_eq!(case.input, [0.0, 0.0, 0.0, 1.0, 1.0, 0.0, 1.0, 1.0]);
    for isa in isas() {
        let got = engine(&case, isa, 1)
            .run(&case.input, 4, RunOptions::default())
            .unwrap();
        assert_eq!(got, [0.0, 1.0, 1.0, 0.0], "{}", isa.name());
    }
    assert_eq!(case.bundle.summary().parameters, 9);
}

#[test]
fn check_samples_replay() {
    for case in cases() {
        let e = Engine::new(&case.bundle, &EngineConfig::default()).unwrap();
        let report = e.replay_check_samples(&case.bundle).unwrap();
        assert!(report.passed, "case {}: {report:?}", case.name);
        assert!(report.produced_by.starts_with("pytorch"));
    }
}

#[test]
fn batch_invariance_is_bitwise() {
    for case in cases() {
        for isa in isas() {
            let e1 = engine(&case, isa, 1);
            let e2 = engine(&case, isa, 2);
            let e3 = engine(&case, isa, 3);
            let n_in = case.input.len() / case.batch;
            let whole = e1
                .run(&case.input, case.batch, RunOptions::default())
                .unwrap();
            let per = whole.len() / case.batch;
            // Each sample alone, on 1 thread, and on 2 and 3 (every step spread over them).
            for s in 0..case.batch {
                for e in [&e1, &e2, &e3] {
                    let alone = e
                        .run(&case.input[s * n_in..][..n_in], 1, RunOptions::default())
                        .unwrap();
                    assert_eq!(
                        bits(&alone),
                        bits(&whole[s * per..][..per]),
                        "case {} on {} with {} threads: sample {s} alone vs in batch",
                        case.name,
                        isa.name(),
                        e.threads()
                    );
                }
            }
            // Two samples on three threads: a batch smaller than the team.
            if case.batch >= 2 {
                let two = e3
                    .run(&case.input[..2 * n_in], 2, RunOptions::default())
                    .unwrap();
                assert_eq!(
                    bits(&two),
                    bits(&whole[..2 * per]),
                    "case {} on {}: two samples on three threads",
                    case.name,
                    isa.name()
                );
            }
            // Reversed order, and repeated to a batch of 3·n + 1 (odd, so thread splits are
            // uneven), on 1, 2 and 3 threads.
            let mut big = Vec::new();
            let mut order = Vec::new();
            for rep in 0..3 {
                for s in 0..case.batch {
                    let s = if rep == 1 { case.batch - 1 - s } else { s };
                    big.extend_from_slice(&case.input[s * n_in..][..n_in]);
                    order.push(s);
                }
            }
            big.extend_from_slice(&case.input[..n_in]);
            order.push(0);
            for e in [&e1, &e2, &e3] {
                let out = e.run(&big, order.len(), RunOptions::default()).unwrap();
                for (pos, &s) in order.iter().enumerate() {
                    assert_eq!(
                        bits(&out[pos * per..][..per]),
                        bits(&whole[s * per..][..per]),
                        "case {} on {} with {} threads: position {pos}",
                        case.name,
                        isa.name(),
                        e.threads()
                    );
                }
            }
        }
    }
}

fn bits(xs: &[f32]) -> Vec<u32> {
    xs.iter().map(|x| x.to_bits()).collect()
}

#[test]
fn bad_inputs_are_typed_errors() {
    let case = cases().into_iter().find(|c| c.name == "residual").unwrap();
    let e = Engine::new(&case.bundle, &EngineConfig::default()).unwrap();
    assert_eq!(
        e.run(&[], 0, RunOptions::default()),
        Err(convoy::engine::RunError::EmptyBatch)
    );
    let small = Engine::new(
        &case.bundle,
        &EngineConfig {
            max_batch: 2,
            ..EngineConfig::default()
        },
    )
    .unwrap();
    assert_eq!(
        small.run(&case.input, case.batch, RunOptions::default()),
        Err(convoy::engine::RunError::BatchTooLarge { batch: 5, limit: 2 })
    );
    assert!(
        e.run(&case.input[1..], case.batch, RunOptions::default())
            .is_err()
    );
    let mut x = case.input.clone();
    x[7] = f32::NAN;
    let strict = RunOptions {
        reject_non_finite: true,
    };
    assert_eq!(
        e.run(&x, case.batch, strict),
        Err(convoy::engine::RunError::NonFinite {
            sample: 0,
            index: 7
        })
    );
    // Without the option, NaN is computed with (and shows up in the output) rather than
    // silently replaced.
    let out = e.run(&x, case.batch, RunOptions::default()).unwrap();
    assert!(out[..10].iter().any(|v| v.is_nan()));
}
