//! Inputs the fuzz targets (`fuzz/`, see its README) found or that stand for what they
//! explore, replayed through the same library calls as the target on every `cargo test`:
//! each file of `tests/data/fuzz/<target>/` must end in a typed result, never a panic.
//!
//! A new finding goes in as a file (minimised with `cargo fuzz tmin`); no code change needed.

use std::path::PathBuf;

use convoy::bundle::Bundle;
use convoy::import::{ImportError, ImportOptions, import_onnx_bytes};
use convoy::prepare::{ImageLimits, prepare_image, prepare_tensor};
use convoy::registry::{LoadSettings, Policy, Registry, load_version};
use convoy::service::DEMO_BUNDLE;
use convoy::service::api::PredictRequest;
use convoy::service::predictor::{RequestLimits, check_request};
use prost::Message;

/// Every file of `tests/data/fuzz/<target>/`, with its name.
fn inputs(target: &str) -> Vec<(String, Vec<u8>)> {
    let dir = PathBuf::from(env!("CARGO_MANIFEST_DIR")).join(format!("tests/data/fuzz/{target}"));
    // A target without findings has no folder yet.
    let Ok(entries) = std::fs::read_dir(&dir) else {
        return Vec::new();
    };
    let mut files: Vec<_> = entries
        .map(|e| e.unwrap().path())
        .filter(|p| p.is_file() && p.extension().is_none_or(|x| x != "md"))
        .collect();
    files.sort();
    files
        .into_iter()
        .map(|p| {
            let name = p.file_name().unwrap().to_string_lossy().into_owned();
            (name, std::fs::read(&p).unwrap())
        })
        .collect()
}

#[test]
fn bundle_reader_inputs_are_refused_or_load() {
    // The stored files are what the target handed to `Bundle::from_bytes` (already re-sealed
    // where the target re-seals), without its mode byte.
    for (name, bytes) in inputs("bundle_reader") {
        if Bundle::from_bytes(bytes.clone()).is_ok() {
            let attempt = load_version(bytes, &name, &LoadSettings::default());
            println!("{name}: {:?}", attempt.result.map(|m| m.name.clone()));
        }
    }
}

#[test]
fn onnx_import_inputs_end_in_a_typed_result() {
    for (name, bytes) in inputs("onnx_import") {
        let r = import_onnx_bytes(bytes, &ImportOptions::default(), &mut |_| {});
        println!("{name}: {:?}", r.map(|(_, report)| report.name));
    }
}

/// Run 2 of `onnx_import`: the "awkward" export with its first `/pad/Constant` changed to
/// 167,837,700, which its `ConstantOfShape` turned into that many `i64` zeros (1.3 GB, then
/// cloned: out of memory). Now refused by the folded-value limit, naming the node.
#[test]
fn a_huge_constant_of_shape_is_refused() {
    let bytes = inputs("onnx_import")
        .into_iter()
        .find(|(name, _)| name == "constant-of-shape-168m.onnx")
        .expect("the regression file")
        .1;
    match import_onnx_bytes(bytes, &ImportOptions::default(), &mut |_| {}) {
        Err(ImportError::Unsupported { op, problem, .. }) => {
            assert_eq!(op, "ConstantOfShape");
            assert!(problem.contains("167837700 elements"), "{problem}");
        }
        other => panic!("expected the folded-value limit, got {other:?}"),
    }
}

#[test]
fn image_prepare_inputs_end_in_a_typed_result() {
    // Same decoding of the first byte as the target: bit 0 image (0) or tensor (1).
    let spec = Bundle::from_bytes(DEMO_BUNDLE.to_vec())
        .unwrap()
        .manifest()
        .input
        .clone();
    let prep = spec.image.clone().unwrap();
    for (name, bytes) in inputs("image_prepare") {
        let Some((&mode, rest)) = bytes.split_first() else {
            continue;
        };
        let mut out = vec![0.0f32; spec.shape.iter().product()];
        if mode & 1 == 0 {
            let r = prepare_image(rest, &prep, &ImageLimits::default(), &mut out);
            println!("{name}: {r:?}");
        } else {
            let r = prepare_tensor(&[1, 64, 64], rest, &spec.shape, &mut out);
            println!("{name}: {r:?}");
        }
    }
}

#[test]
fn request_decode_inputs_end_in_a_typed_result() {
    let registry = Registry::new(LoadSettings::default(), Policy::default(), None);
    registry.load_bytes(DEMO_BUNDLE.to_vec(), "built-in demo");
    for (name, bytes) in inputs("request_decode") {
        let Ok(req) = PredictRequest::decode(bytes.as_slice()) else {
            continue;
        };
        let Ok(model) = registry.resolve(&req.model, &req.version) else {
            continue;
        };
        let r = check_request(&model, &req.samples, &RequestLimits::default());
        println!("{name}: {:?}", r.map(|p| p.inputs().len()));
    }
}
