//! Operator semantics against the `onnx` package's reference evaluator.
//!
//! `tests/data/onnx_ops/` holds one-operator models (a dynamic-batch input, the operator
//! under test, constants as initializers) and the outputs `onnx.reference.ReferenceEvaluator`
//! computed for them, following the ONNX operator specification for opsets 11–21
//! (`make_op_cases.py` beside them). Each model is imported as a user would and run on the
//! stored input. Data movement must be exact; arithmetic within the tolerance the case
//! names (`cases.json`'s `tolerance`). Cases a per-sample executor cannot compute (the batch
//! axis moved or mixed) must be refused with an error naming the node.

use std::path::{Path, PathBuf};

use convoy::bundle::Bundle;
use convoy::engine::{Engine, EngineConfig, RunOptions};
use convoy::import::{ImportOptions, import_onnx};
use convoy::npy::NpyArray;
use serde_json::Value;

fn dir() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/data/onnx_ops")
}

fn floats(v: &Value) -> Vec<f32> {
    v.as_array()
        .expect("data is a list")
        .iter()
        .map(|x| match x.as_str() {
            Some("nan") => f32::NAN,
            Some("inf") => f32::INFINITY,
            Some("-inf") => f32::NEG_INFINITY,
            _ => x.as_f64().expect("number") as f32,
        })
        .collect()
}

fn shape(v: &Value) -> Vec<usize> {
    v["shape"]
        .as_array()
        .expect("shape")
        .iter()
        .map(|d| d.as_u64().expect("dimension") as usize)
        .collect()
}

/// Cases not supported yet, each refused with an error naming the node (and checked to be,
/// so that supporting one means taking it off this list).
const KNOWN_GAPS: &[(&str, &str)] = &[
    ("pow_per_channel", "a Pow exponent that is not one value"),
    (
        "matmul_r4_batched_weight",
        "MatMul with a weight of more than two axes",
    ),
    ("matmul_r3_weight_vector", "MatMul with a one-axis weight"),
];

#[test]
fn every_operator_case_matches_the_reference_evaluator() {
    let text = std::fs::read(dir().join("cases.json")).expect("cases.json");
    let all: Value = serde_json::from_slice(&text).expect("JSON");
    let cases = all["cases"].as_array().expect("cases");
    assert!(cases.len() >= 100, "only {} cases", cases.len());
    let tmp = tempfile::tempdir().unwrap();
    let (mut ok, mut refused) = (0, 0);
    let mut failed = Vec::new();
    for c in cases {
        let name = c["name"].as_str().unwrap();
        let file = dir().join(c["file"].as_str().unwrap());
        let out = tmp.path().join(format!("{name}.cvb"));
        // The case's own input and expected output are the import's check arrays (generated
        // inputs could leave the domain of Sqrt or Log).
        let mut options = ImportOptions::default();
        if c["expect"] != "refused" {
            let array = |v: &Value| NpyArray {
                shape: shape(v),
                data: floats(&v["data"]),
            };
            options.check = Some((array(&c["input"]), array(&c["expected"])));
        }
        let result = import_onnx(&file, &out, &options, &mut |_| {});
        if let Some(why) = KNOWN_GAPS.iter().find(|g| g.0 == name).map(|g| g.1) {
            assert!(
                result.is_err(),
                "{name} imports now ({why}): remove it from KNOWN_GAPS"
            );
            continue;
        }
        if c["expect"] == "refused" {
            match result {
                Err(_) => refused += 1,
                Ok(_) => failed.push(format!("{name}: imported, but must be refused")),
            }
            continue;
        }
        if let Err(e) = result {
            failed.push(format!("{name}: {e}"));
            continue;
        }
        let bundle = Bundle::open(&out).unwrap();
        let engine = Engine::new(&bundle, &EngineConfig::default()).unwrap();
        // `convoy inspect`'s table: every layer has a row, the last one the result's shape.
        let summary = bundle.summary();
        let last_shape = summary.layers.last().map(|l| l.output_shape.clone());
        if summary.layers.len() != bundle.manifest().graph.nodes.len()
            || last_shape.as_deref() != Some(engine.plan().output_shape())
        {
            failed.push(format!("{name}: inspect's table ends in {last_shape:?}"));
            continue;
        }
        let x = floats(&c["input"]["data"]);
        let batch = shape(&c["input"])[0];
        let want = floats(&c["expected"]["data"]);
        let want_shape = shape(&c["expected"]);
        let mut got_shape = [&[batch][..], engine.plan().output_shape()].concat();
        if want_shape.len() == 1 && got_shape == [batch, 1] {
            // A scalar per sample is held as [1]; the elements are the same.
            got_shape.pop();
        }
        if got_shape != want_shape {
            failed.push(format!("{name}: shape {got_shape:?}, want {want_shape:?}"));
            continue;
        }
        let got = engine.run(&x, batch, RunOptions::default()).unwrap();
        let exact = c["compare"] == "exact";
        for (i, (&g, &w)) in got.iter().zip(&want).enumerate() {
            let same = if exact {
                g.to_bits() == w.to_bits() || (g.is_nan() && w.is_nan()) || g == w
            } else {
                // Transcendental and reduction results: float32 evaluated in a different
                // order; 1e-5 relative (with an absolute floor of 1e-6), the README's rule.
                (g - w).abs() <= 1e-5 * w.abs().max(1.0) || (g.is_nan() && w.is_nan())
            };
            if !same {
                failed.push(format!("{name}: element {i}: got {g}, want {w}"));
                break;
            }
        }
        ok += 1;
    }
    println!("{ok} cases run, {refused} refused");
    assert!(
        failed.is_empty(),
        "{} cases failed:\n{}",
        failed.len(),
        failed.join("\n")
    );
}
