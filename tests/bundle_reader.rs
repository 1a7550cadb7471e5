//! The bundle reader against damaged and hostile files: each gives its own typed error, none
//! panics, and nothing is allocated from an unchecked size field.
//!
//! Files are assembled here byte by byte from the layout documented in `src/bundle/mod.rs`, so
//! these tests also pin that layout independently of the writer.

use convoy::bundle::manifest::{InputSpec, OutputKind, OutputSpec};
use convoy::bundle::{Bundle, BundleError, BundleWriter, TensorProblem};
use convoy::graph::Op;
use convoy::graph::build::GraphBuilder;
use convoy::graph::shapes::GraphError;
use serde_json::Value;
use sha2::{Digest, Sha256};

/// A small valid bundle: conv 1→2 channels, relu, global pool, flatten, dense 2→3.
fn small_writer() -> BundleWriter {
    let mut b = GraphBuilder::new("x", &[1, 4, 4]);
    let w = b.tensor(
        "conv.w",
        &[2, 1, 3, 3],
        (0..18).map(|i| i as f32 * 0.1 - 0.9).collect(),
    );
    let c = b.node(
        "conv",
        Op::Conv2d {
            weight: w,
            bias: None,
            stride: [1, 1],
            dilation: [1, 1],
            padding: [1, 1, 1, 1],
            groups: 1,
        },
        &["x"],
    );
    let r = b.node("relu", Op::Relu, &[&c]);
    let g = b.node("gap", Op::GlobalAvgPool, &[&r]);
    let f = b.node("flat", Op::Flatten, &[&g]);
    let dw = b.tensor("fc.w", &[3, 2], vec![1.0, -1.0, 0.5, 0.5, -2.0, 1.0]);
    let d = b.node(
        "fc",
        Op::Dense {
            weight: dw,
            bias: None,
            weight_layout: Default::default(),
        },
        &[&f],
    );
    let (graph, tensors) = b.finish(&d);
    let mut w = BundleWriter::new(
        "part-inspector",
        "1.2.0",
        graph,
        InputSpec {
            shape: vec![1, 4, 4],
            image: None,
        },
        OutputSpec {
            labels: vec!["ok".into(), "scratched".into(), "dented".into()],
            kind: OutputKind::Logits,
        },
    );
    for (n, s, d) in tensors {
        w.add_tensor(n, &s, d).unwrap();
    }
    w
}

fn valid_bytes() -> Vec<u8> {
    small_writer().to_bytes().unwrap()
}

/// Splits a bundle into (manifest JSON, data section).
fn split(bytes: &[u8]) -> (Value, Vec<u8>) {
    let mlen = u64::from_le_bytes(bytes[16..24].try_into().unwrap()) as usize;
    let manifest: Value = serde_json::from_slice(&bytes[64..64 + mlen]).unwrap();
    let start = (64 + mlen).div_ceil(64) * 64;
    (manifest, bytes[start..].to_vec())
}

/// Reassembles a bundle with correct header checksums around an edited manifest.
fn assemble(manifest: &Value, data: &[u8]) -> Vec<u8> {
    let json = serde_json::to_vec(manifest).unwrap();
    let mut out = Vec::new();
    out.extend_from_slice(b"\x89CVB\r\n\x1a\n");
    out.extend_from_slice(&1u32.to_le_bytes());
    out.extend_from_slice(&0u32.to_le_bytes());
    out.extend_from_slice(&(json.len() as u64).to_le_bytes());
    out.extend_from_slice(&(data.len() as u64).to_le_bytes());
    out.extend_from_slice(&Sha256::digest(&json));
    out.extend_from_slice(&json);
    out.resize(out.len().div_ceil(64) * 64, 0);
    out.extend_from_slice(data);
    out
}

fn hex(b: &[u8]) -> String {
    b.iter().map(|x| format!("{x:02x}")).collect()
}

fn edited(f: impl FnOnce(&mut Value, &mut Vec<u8>)) -> Result<Bundle, BundleError> {
    let (mut m, mut data) = split(&valid_bytes());
    f(&mut m, &mut data);
    Bundle::from_bytes(assemble(&m, &data))
}

#[test]
fn round_trip_and_hand_assembly_agree() {
    let bytes = valid_bytes();
    let bundle = Bundle::from_bytes(bytes.clone()).unwrap();
    assert_eq!(bundle.manifest().name, "part-inspector");
    assert_eq!(bundle.output_shape(), &[3]);
    assert_eq!(bundle.tensor("fc.w").unwrap()[4], -2.0);
    // Re-assembling the same manifest and data by hand gives the identical file.
    let (m, data) = split(&bytes);
    assert_eq!(
        Bundle::from_bytes(assemble(&m, &data)).unwrap().manifest(),
        bundle.manifest()
    );
    // Tensors are 64-byte aligned within the data section.
    for t in &bundle.manifest().tensors {
        assert_eq!(t.offset % 64, 0, "{}", t.name);
    }
}

#[test]
fn every_truncation_is_refused_without_panic() {
    let bytes = valid_bytes();
    for len in 0..bytes.len() {
        let err = Bundle::from_bytes(bytes[..len].to_vec()).unwrap_err();
        assert!(
            matches!(
                err,
                BundleError::Truncated { .. } | BundleError::BadMagic { .. }
            ),
            "length {len}: {err}"
        );
    }
    let mut longer = bytes.clone();
    longer.push(0);
    assert!(matches!(
        Bundle::from_bytes(longer),
        Err(BundleError::SizeMismatch { .. })
    ));
}

#[test]
fn header_fields() {
    let mut b = valid_bytes();
    b[1] = b'X';
    assert!(matches!(
        Bundle::from_bytes(b),
        Err(BundleError::BadMagic { .. })
    ));
    let mut b = valid_bytes();
    b[8] = 2;
    assert!(matches!(
        Bundle::from_bytes(b),
        Err(BundleError::UnsupportedFormat {
            found: 2,
            supported: 1
        })
    ));
    let mut b = valid_bytes();
    b[12] = 1;
    assert!(matches!(
        Bundle::from_bytes(b),
        Err(BundleError::UnknownFlags { flags: 1 })
    ));
    // A manifest length of 2^62 is refused before anything is read or allocated.
    let mut b = valid_bytes();
    b[16..24].copy_from_slice(&(1u64 << 62).to_le_bytes());
    assert!(matches!(
        Bundle::from_bytes(b),
        Err(BundleError::ManifestTooLarge { .. })
    ));
    // A data length that overflows when added to the data start.
    let mut b = valid_bytes();
    b[24..32].copy_from_slice(&u64::MAX.to_le_bytes());
    assert!(matches!(
        Bundle::from_bytes(b),
        Err(BundleError::SizeMismatch { .. } | BundleError::Truncated { .. })
    ));
}

#[test]
fn checksums() {
    // One flipped bit in the manifest.
    let mut b = valid_bytes();
    b[80] ^= 1;
    assert!(matches!(
        Bundle::from_bytes(b),
        Err(BundleError::ManifestChecksum { .. })
    ));
    // One flipped bit in the last weight.
    let mut b = valid_bytes();
    let n = b.len();
    b[n - 60] ^= 0x10;
    assert!(matches!(
        Bundle::from_bytes(b),
        Err(BundleError::DataChecksum { .. })
    ));
}

#[test]
fn tensor_index_problems() {
    // The "100 GB tensor": a shape and length far beyond the file.
    let err = edited(|m, _| {
        m["tensors"][0]["shape"] = serde_json::json!([25_000_000_000u64]);
        m["tensors"][0]["length"] = serde_json::json!(100_000_000_000u64);
    })
    .unwrap_err();
    assert!(
        matches!(
            err,
            BundleError::Tensor {
                problem: TensorProblem::TooLarge { .. } | TensorProblem::OutOfBounds { .. },
                ..
            }
        ),
        "{err}"
    );
    let err = edited(|m, _| m["tensors"][0]["offset"] = serde_json::json!(1u64 << 40)).unwrap_err();
    assert!(
        matches!(
            err,
            BundleError::Tensor {
                problem: TensorProblem::OutOfBounds { .. },
                ..
            }
        ),
        "{err}"
    );
    let err = edited(|m, _| m["tensors"][0]["offset"] = serde_json::json!(4)).unwrap_err();
    assert!(
        matches!(
            err,
            BundleError::Tensor {
                problem: TensorProblem::Misaligned { .. },
                ..
            }
        ),
        "{err}"
    );
    let err = edited(|m, _| m["tensors"][0]["length"] = serde_json::json!(8)).unwrap_err();
    assert!(
        matches!(
            err,
            BundleError::Tensor {
                problem: TensorProblem::LengthMismatch { .. },
                ..
            }
        ),
        "{err}"
    );
    let err = edited(|m, _| {
        let t0 = m["tensors"][0].clone();
        m["tensors"].as_array_mut().unwrap().push(t0);
    })
    .unwrap_err();
    assert!(
        matches!(
            err,
            BundleError::Tensor {
                problem: TensorProblem::Duplicate,
                ..
            }
        ),
        "{err}"
    );
    let err = edited(|m, _| {
        let off = m["tensors"][0]["offset"].clone();
        m["tensors"][1]["offset"] = off;
        m["tensors"][1]["shape"] = serde_json::json!([2, 1]);
        m["tensors"][1]["length"] = serde_json::json!(8);
    })
    .unwrap_err();
    assert!(
        matches!(
            err,
            BundleError::Tensor {
                problem: TensorProblem::Overlap { .. } | TensorProblem::Duplicate,
                ..
            } | BundleError::Graph(_)
        ),
        "{err}"
    );
}

#[test]
fn non_finite_weights_are_refused() {
    let err = edited(|m, data| {
        let off = m["tensors"][0]["offset"].as_u64().unwrap() as usize;
        data[off..off + 4].copy_from_slice(&f32::NAN.to_le_bytes());
        m["data_sha256"] = Value::String(hex(&Sha256::digest(&data[..])));
    })
    .unwrap_err();
    assert!(
        matches!(
            err,
            BundleError::Tensor {
                problem: TensorProblem::NonFinite { index: 0 },
                ..
            }
        ),
        "{err}"
    );
}

#[test]
fn graph_problems_name_the_node() {
    let err =
        edited(|m, _| m["graph"]["nodes"][1]["op"] = Value::String("teleport".into())).unwrap_err();
    match err {
        BundleError::UnknownOp { node, op } => {
            assert_eq!((node.as_str(), op.as_str()), ("relu", "teleport"));
        }
        e => panic!("{e}"),
    }
    // Weight shape disagreeing with the graph: conv weight declared [2, 2, 3, 3] for 1 channel.
    let err = edited(|m, _| {
        m["tensors"][0]["shape"] = serde_json::json!([1, 2, 3, 3]);
    })
    .unwrap_err();
    assert!(
        matches!(err, BundleError::Graph(ref g) if matches!(**g, GraphError::TensorShape { .. })),
        "{err}"
    );
    let err = edited(|m, _| m["graph"]["nodes"][2]["inputs"][0] = Value::String("nowhere".into()))
        .unwrap_err();
    assert!(
        matches!(err, BundleError::Graph(ref g) if matches!(**g, GraphError::UnknownValue { .. })),
        "{err}"
    );
    let err =
        edited(|m, _| m["graph"]["nodes"][0]["stride"] = serde_json::json!([0, 1])).unwrap_err();
    assert!(
        matches!(err, BundleError::Graph(ref g) if matches!(**g, GraphError::Window { .. })),
        "{err}"
    );
    let err = edited(|m, _| m["graph"]["output"] = Value::String("ghost".into())).unwrap_err();
    assert!(
        matches!(err, BundleError::Graph(ref g) if matches!(**g, GraphError::UnknownOutput { .. })),
        "{err}"
    );
    // An absurd input shape is refused by arithmetic, not by allocating.
    let err = edited(|m, _| {
        m["graph"]["input"]["shape"] = serde_json::json!([1, 1u64 << 40, 1u64 << 40]);
        m["input"]["shape"] = serde_json::json!([1, 1u64 << 40, 1u64 << 40]);
    })
    .unwrap_err();
    assert!(
        matches!(err, BundleError::Graph(ref g) if matches!(**g, GraphError::TooLarge { .. })),
        "{err}"
    );
}

#[test]
fn specs_and_names() {
    let err = edited(|m, _| m["output"]["labels"] = serde_json::json!(["a", "b"])).unwrap_err();
    assert!(
        matches!(
            err,
            BundleError::Spec {
                field: "output.labels",
                ..
            }
        ),
        "{err}"
    );
    let err = edited(|m, _| m["input"]["shape"] = serde_json::json!([1, 5, 4])).unwrap_err();
    assert!(matches!(err, BundleError::Spec { .. }), "{err}");
    let err = edited(|m, _| m["version"] = Value::String("1..2".into())).unwrap_err();
    assert!(matches!(err, BundleError::Version(_)), "{err}");
    let err = edited(|m, _| m["name"] = Value::String("../etc".into())).unwrap_err();
    assert!(matches!(err, BundleError::BadName { .. }), "{err}");
    let err = edited(|m, _| m["created"] = Value::Null).unwrap_err();
    assert!(matches!(err, BundleError::ManifestJson { .. }), "{err}");
}

/// A crude fuzz pass: thousands of single-byte corruptions of a valid file, each read must
/// return (Ok or Err) without panicking. Deterministic (splitmix64).
#[test]
fn random_corruption_never_panics() {
    let bytes = valid_bytes();
    let mut state = 0x5eed_u64;
    let mut next = || {
        state = state.wrapping_add(0x9E37_79B9_7F4A_7C15);
        let mut z = state;
        z = (z ^ (z >> 30)).wrapping_mul(0xBF58_476D_1CE4_E5B9);
        z = (z ^ (z >> 27)).wrapping_mul(0x94D0_49BB_1331_11EB);
        z ^ (z >> 31)
    };
    for _ in 0..3000 {
        let mut b = bytes.clone();
        let at = (next() % b.len() as u64) as usize;
        b[at] = next() as u8;
        let _ = Bundle::from_bytes(b);
    }
    // Also with the manifest checksum fixed up, so corruption reaches the JSON parser.
    let (m, data) = split(&bytes);
    let json = serde_json::to_vec(&m).unwrap();
    for _ in 0..3000 {
        let mut j = json.clone();
        let at = (next() % j.len() as u64) as usize;
        let alphabet = b"{}[]\",:0123456789-e.ax ";
        j[at] = alphabet[(next() % alphabet.len() as u64) as usize];
        if let Ok(v) = serde_json::from_slice::<Value>(&j) {
            let _ = Bundle::from_bytes(assemble(&v, &data));
        }
    }
}

#[test]
fn writer_refuses_what_the_reader_would() {
    let mut w = small_writer();
    assert!(matches!(
        w.add_tensor("conv.w", &[1], vec![0.0]),
        Err(BundleError::Tensor {
            problem: TensorProblem::Duplicate,
            ..
        })
    ));
    assert!(matches!(
        w.add_tensor("extra", &[2, 2], vec![0.0; 3]),
        Err(BundleError::Tensor {
            problem: TensorProblem::LengthMismatch { .. },
            ..
        })
    ));
}
