//! `convoy import` against models exported by PyTorch (tests/onnx/, made by the committed
//! scripts there; their README names versions) and against hostile files.
//!
//! Tolerance, as for the executor: max |ours − PyTorch| ≤ 1e-4 · max(1, max |PyTorch|), and
//! identical top-1 class.

use std::path::{Path, PathBuf};
use std::process::Command;

use convoy::bundle::Bundle;
use convoy::engine::{Engine, EngineConfig, RunOptions, tolerance_check};
use convoy::import::onnx::proto::onnx as pb;
use convoy::import::{ImportError, ImportOptions, import_onnx};
use convoy::npy::read_npy_file;
use prost::Message;

fn root() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/onnx")
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

struct ZooEntry {
    file: String,
    input: PathBuf,
    output: PathBuf,
}

fn zoo() -> Vec<ZooEntry> {
    let dir = root().join("zoo");
    let manifest: serde_json::Value =
        serde_json::from_slice(&std::fs::read(dir.join("manifest.json")).unwrap()).unwrap();
    let entries: Vec<ZooEntry> = manifest
        .as_array()
        .or_else(|| manifest["files"].as_array())
        .expect("manifest lists models")
        .iter()
        .filter(|e| e["file"].is_string())
        .map(|e| ZooEntry {
            file: e["file"].as_str().unwrap().to_string(),
            input: dir.join(e["input"].as_str().unwrap()),
            output: dir.join(e["output"].as_str().unwrap()),
        })
        .collect();
    assert!(entries.len() >= 8, "zoo has {} models", entries.len());
    entries
}

fn no_progress() -> impl FnMut(&str) {
    |_| {}
}

#[test]
fn every_zoo_model_imports_and_matches_pytorch() {
    let tmp = tempfile::tempdir().unwrap();
    for e in zoo() {
        let x = read_npy_file(&e.input).unwrap();
        let y = read_npy_file(&e.output).unwrap();
        let out = tmp.path().join(format!("{}.cvb", e.file));
        let options = ImportOptions {
            check: Some((x.clone(), y.clone())),
            check_source: "pytorch".into(),
            ..ImportOptions::default()
        };
        let report = import_onnx(
            &root().join("zoo").join(&e.file),
            &out,
            &options,
            &mut no_progress(),
        )
        .unwrap_or_else(|err| panic!("{}: {err}", e.file));
        assert!(report.check_from_reference);
        // Independently of the import's own check: open the written bundle and compare.
        let bundle = Bundle::open(&out).unwrap();
        let engine = Engine::new(&bundle, &EngineConfig::default()).unwrap();
        let batch = x.shape[0];
        let got = engine.run(&x.data, batch, RunOptions::default()).unwrap();
        let (err, bound) = tolerance_check(&got, &y.data);
        assert!(err <= bound, "{}: error {err:e} > {bound:e}", e.file);
        let per = got.len() / batch;
        for s in 0..batch {
            assert_eq!(
                argmax(&got[s * per..][..per]),
                argmax(&y.data[s * per..][..per]),
                "{}: top-1 of sample {s}",
                e.file
            );
        }
        println!("{:<45} max error {err:.2e} (bound {bound:.2e})", e.file);
    }
}

#[test]
fn import_then_run_on_the_command_line() {
    let tmp = tempfile::tempdir().unwrap();
    for e in zoo() {
        let bundle = tmp.path().join("m.cvb");
        let result = tmp.path().join("y.npy");
        let st = Command::new(env!("CARGO_BIN_EXE_convoy"))
            .arg("import")
            .arg(root().join("zoo").join(&e.file))
            .arg("-o")
            .arg(&bundle)
            .output()
            .unwrap();
        assert!(
            st.status.success(),
            "{}: {}",
            e.file,
            String::from_utf8_lossy(&st.stderr)
        );
        let st = Command::new(env!("CARGO_BIN_EXE_convoy"))
            .arg("run")
            .arg(&bundle)
            .arg("--input")
            .arg(&e.input)
            .arg("--output")
            .arg(&result)
            .output()
            .unwrap();
        assert!(
            st.status.success(),
            "{}: {}",
            e.file,
            String::from_utf8_lossy(&st.stderr)
        );
        let got = read_npy_file(&result).unwrap();
        let want = read_npy_file(&e.output).unwrap();
        let (err, bound) = tolerance_check(&got.data, &want.data);
        assert!(err <= bound, "{}: error {err:e} > {bound:e}", e.file);
    }
}

/// UCI optical recognition of handwritten digits (Alpaydin & Kaynak, 1998; scikit-learn's
/// copy; CC BY 4.0 — see tests/onnx/digits/DATA_SOURCE.md): a small CNN trained and exported
/// by tests/onnx/make_digits.py. The imported bundle must classify the held-out split exactly
/// as PyTorch does, with accuracy at least 0.97.
#[test]
fn digits_accuracy_matches_pytorch() {
    let dir = root().join("digits");
    let x = read_npy_file(&dir.join("test_x.npy")).unwrap();
    let y = read_npy_file(&dir.join("test_y.npy")).unwrap();
    let summary: serde_json::Value =
        serde_json::from_slice(&std::fs::read(dir.join("summary.json")).unwrap()).unwrap();
    let torch_predictions: Vec<usize> = summary["torch_predictions"]
        .as_array()
        .unwrap()
        .iter()
        .map(|v| v.as_u64().unwrap() as usize)
        .collect();
    let tmp = tempfile::tempdir().unwrap();
    let out = tmp.path().join("digits.cvb");
    import_onnx(
        &dir.join("digits_cnn.onnx"),
        &out,
        &ImportOptions::default(),
        &mut no_progress(),
    )
    .unwrap();
    let engine = Engine::new(&Bundle::open(&out).unwrap(), &EngineConfig::default()).unwrap();
    let n = x.shape[0];
    let logits = engine.run(&x.data, n, RunOptions::default()).unwrap();
    let predictions: Vec<usize> = logits.chunks(10).map(argmax).collect();
    assert_eq!(
        predictions, torch_predictions,
        "predictions differ from PyTorch's"
    );
    let correct = predictions
        .iter()
        .zip(&y.data)
        .filter(|(p, l)| **p == **l as usize)
        .count();
    let accuracy = correct as f64 / n as f64;
    let torch_accuracy = summary["torch_accuracy"].as_f64().unwrap();
    assert!(
        (accuracy - torch_accuracy).abs() < 1e-9,
        "{accuracy} vs PyTorch {torch_accuracy}"
    );
    assert!(accuracy >= 0.97, "accuracy {accuracy}");
}

// ---- hostile and unsupported files -------------------------------------------------------

fn float_input(name: &str, dims: &[i64]) -> pb::ValueInfoProto {
    use pb::tensor_shape_proto::{Dimension, dimension::Value as Dim};
    use pb::type_proto::{Tensor, Value};
    pb::ValueInfoProto {
        name: name.into(),
        r#type: Some(pb::TypeProto {
            value: Some(Value::TensorType(Tensor {
                elem_type: pb::tensor_proto::DataType::Float as i32,
                shape: Some(pb::TensorShapeProto {
                    dim: dims
                        .iter()
                        .map(|&d| Dimension {
                            value: Some(if d < 0 {
                                Dim::DimParam("batch".into())
                            } else {
                                Dim::DimValue(d)
                            }),
                            ..Default::default()
                        })
                        .collect(),
                }),
            })),
            ..Default::default()
        }),
        ..Default::default()
    }
}

fn node(op: &str, name: &str, inputs: &[&str], outputs: &[&str]) -> pb::NodeProto {
    pb::NodeProto {
        op_type: op.into(),
        name: name.into(),
        input: inputs.iter().map(|s| s.to_string()).collect(),
        output: outputs.iter().map(|s| s.to_string()).collect(),
        ..Default::default()
    }
}

fn f32_tensor(name: &str, dims: &[i64], values: &[f32]) -> pb::TensorProto {
    pb::TensorProto {
        name: name.into(),
        dims: dims.to_vec(),
        data_type: pb::tensor_proto::DataType::Float as i32,
        float_data: values.to_vec(),
        ..Default::default()
    }
}

fn model(
    nodes: Vec<pb::NodeProto>,
    inits: Vec<pb::TensorProto>,
    input_dims: &[i64],
    opset: i64,
) -> Vec<u8> {
    pb::ModelProto {
        ir_version: 8,
        opset_import: vec![pb::OperatorSetIdProto {
            domain: String::new(),
            version: opset,
        }],
        graph: Some(pb::GraphProto {
            name: "g".into(),
            node: nodes,
            initializer: inits,
            input: vec![float_input("x", input_dims)],
            output: vec![pb::ValueInfoProto {
                name: "y".into(),
                ..Default::default()
            }],
            ..Default::default()
        }),
        ..Default::default()
    }
    .encode_to_vec()
}

fn try_import(dir: &Path, bytes: &[u8]) -> (Result<(), ImportError>, bool) {
    let src = dir.join("m.onnx");
    std::fs::write(&src, bytes).unwrap();
    let out = dir.join("out.cvb");
    let r = import_onnx(&src, &out, &ImportOptions::default(), &mut no_progress()).map(|_| ());
    let leftovers = std::fs::read_dir(dir)
        .unwrap()
        .any(|e| e.unwrap().file_name().to_string_lossy().contains(".cvb"));
    (r, leftovers)
}

#[test]
fn a_minimal_model_imports() {
    let tmp = tempfile::tempdir().unwrap();
    let bytes = model(
        vec![node("Relu", "r", &["x"], &["y"])],
        vec![],
        &[-1, 3],
        17,
    );
    let (r, wrote) = try_import(tmp.path(), &bytes);
    r.unwrap();
    assert!(wrote);
}

#[test]
fn bad_files_are_refused_cleanly() {
    let tmp = tempfile::tempdir().unwrap();
    let good = model(
        vec![node("Relu", "r", &["x"], &["y"])],
        vec![],
        &[-1, 3],
        17,
    );
    type Expect = fn(&ImportError) -> bool;
    let cases: Vec<(&str, Vec<u8>, Expect)> = vec![
        ("truncated", good[..good.len() - 3].to_vec(), |e| {
            matches!(e, ImportError::NotOnnx { .. })
        }),
        (
            "not onnx",
            b"\x89PNG\r\n\x1a\nnot a model at all".to_vec(),
            |e| matches!(e, ImportError::NotOnnx { .. }),
        ),
        (
            "unsupported op",
            model(
                vec![node("LSTM", "rnn", &["x"], &["y"])],
                vec![],
                &[-1, 3],
                17,
            ),
            |e| matches!(e, ImportError::UnsupportedOp { node, op, .. } if node == "rnn" && op == "LSTM"),
        ),
        (
            "old opset",
            model(vec![node("Relu", "r", &["x"], &["y"])], vec![], &[-1, 3], 9),
            |e| matches!(e, ImportError::Opset { found: 9, .. }),
        ),
        (
            "foreign domain",
            {
                let mut n = node("Relu", "r", &["x"], &["y"]);
                n.domain = "com.example".into();
                model(vec![n], vec![], &[-1, 3], 17)
            },
            |e| matches!(e, ImportError::Domain { .. }),
        ),
        (
            "inconsistent shapes",
            model(
                vec![node("Conv", "c", &["x", "w"], &["y"])],
                vec![f32_tensor("w", &[2, 5, 1, 1], &[0.5; 10])],
                &[-1, 3, 4, 4],
                17,
            ),
            |e| matches!(e, ImportError::Unsupported { node, .. } if node == "c"),
        ),
        (
            "absurd tensor",
            {
                let mut t = f32_tensor("w", &[1 << 20, 1 << 20, 1, 1], &[]);
                t.float_data.clear();
                model(
                    vec![node("Conv", "c", &["x", "w"], &["y"])],
                    vec![t],
                    &[-1, 3, 4, 4],
                    17,
                )
            },
            |e| matches!(e, ImportError::Tensor { .. }),
        ),
        (
            // A fixed batch of 8 mixed into another axis: [8, 6] → [16, 3].
            "fixed batch mixed into an axis",
            model(
                vec![node("Reshape", "r", &["x", "to"], &["y"])],
                vec![pb::TensorProto {
                    name: "to".into(),
                    dims: vec![2],
                    data_type: 7,
                    int64_data: vec![16, 3],
                    ..Default::default()
                }],
                &[8, 6],
                17,
            ),
            |e| matches!(e, ImportError::Unsupported { .. }),
        ),
    ];
    for (what, bytes, expected) in cases {
        let (r, wrote) = try_import(tmp.path(), &bytes);
        let err = r.expect_err(what);
        assert!(expected(&err), "{what}: {err}");
        assert!(!wrote, "{what}: an output file was left behind");
    }
}

#[test]
fn external_data_stays_in_the_model_folder() {
    let tmp = tempfile::tempdir().unwrap();
    let inner = tmp.path().join("models");
    std::fs::create_dir(&inner).unwrap();
    std::fs::write(tmp.path().join("secret.bin"), [0u8; 64]).unwrap();
    for (location, wanted) in [
        ("../secret.bin", "outside"),
        ("missing.bin", "missing"),
        ("/etc/hostname", "absolute"),
    ] {
        let mut w = f32_tensor("w", &[2, 3, 1, 1], &[]);
        w.data_location = pb::tensor_proto::DataLocation::External as i32;
        w.external_data = vec![pb::StringStringEntryProto {
            key: "location".into(),
            value: location.into(),
        }];
        let bytes = model(
            vec![node("Conv", "c", &["x", "w"], &["y"])],
            vec![w],
            &[-1, 3, 4, 4],
            17,
        );
        let (r, wrote) = try_import(&inner, &bytes);
        let err = r.expect_err(location);
        assert!(
            matches!(err, ImportError::ExternalData { .. }),
            "{wanted}: {err}"
        );
        assert!(!wrote);
    }
}

#[test]
fn cli_errors_are_one_clear_line() {
    let tmp = tempfile::tempdir().unwrap();
    let src = tmp.path().join("bad.onnx");
    std::fs::write(
        &src,
        model(
            vec![node("LSTM", "rnn", &["x"], &["y"])],
            vec![],
            &[-1, 3],
            17,
        ),
    )
    .unwrap();
    let out = Command::new(env!("CARGO_BIN_EXE_convoy"))
        .arg("import")
        .arg(&src)
        .arg("-o")
        .arg(tmp.path().join("bad.cvb"))
        .output()
        .unwrap();
    assert!(!out.status.success());
    let err = String::from_utf8_lossy(&out.stderr);
    assert!(
        err.contains("convoy: node \"rnn\": operator \"LSTM\" is not supported"),
        "{err}"
    );
    assert!(!err.contains("panicked"));
    assert!(!tmp.path().join("bad.cvb").exists());
}
