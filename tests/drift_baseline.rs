//! Drift baselines made at import (`convoy import --reference`): what the bundle stores, from
//! image folders and from `.npy` arrays, under a limit, and the refusals.
//!
//! The model is the handwritten-digits CNN of tests/onnx/digits/ (input [1, 8, 8], 10 logits),
//! exported from PyTorch; its README and DATA_SOURCE.md say how it was made. Expected values are
//! worked by hand from constant images, or taken from PyTorch's own outputs stored beside the
//! model (`summary.json`, `torch_logits.npy`).

use std::path::{Path, PathBuf};
use std::process::Command;

use convoy::bundle::Bundle;
use convoy::drift::baseline::MIN_REFERENCE;
use convoy::drift::{Baseline, DriftError, ReferenceError, ReferenceSet};
use convoy::import::{ImageOptions, ImportError, ImportOptions, ImportReport, import_onnx};
use convoy::npy::{read_npy_file, write_npy_file};

fn digits(file: &str) -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR"))
        .join("tests/onnx/digits")
        .join(file)
}

/// Gray 8×8 preparation whose arithmetic is exact in binary floating point:
/// value = (level · 1/128 − 0.25) / 0.5.
fn exact_gray() -> ImageOptions {
    ImageOptions {
        size: Some((8, 8)),
        scale: Some(1.0 / 128.0),
        mean: Some(vec![0.25]),
        std: Some(vec![0.5]),
        ..ImageOptions::default()
    }
}

/// Writes a constant 8×8 gray PNG.
fn png(path: &Path, level: u8) {
    std::fs::create_dir_all(path.parent().unwrap()).unwrap();
    image::GrayImage::from_pixel(8, 8, image::Luma([level]))
        .save(path)
        .unwrap();
}

fn import(
    out: &Path,
    reference: &Path,
    limit: Option<usize>,
    image: Option<ImageOptions>,
) -> Result<ImportReport, ImportError> {
    let options = ImportOptions {
        image,
        reference: Some(reference.to_path_buf()),
        reference_limit: limit,
        ..ImportOptions::default()
    };
    import_onnx(&digits("digits_cnn.onnx"), out, &options, &mut |_| {})
}

fn stored_baseline(bundle: &Path) -> Baseline {
    let b = Bundle::open(bundle).unwrap();
    let value = b
        .manifest()
        .drift_baseline
        .clone()
        .expect("the bundle carries a baseline");
    let baseline: Baseline = serde_json::from_value(value).unwrap();
    baseline.validate().unwrap();
    baseline
}

fn convoy(args: &[&str]) -> String {
    let out = Command::new(env!("CARGO_BIN_EXE_convoy"))
        .args(args)
        .output()
        .unwrap();
    assert!(
        out.status.success(),
        "convoy {args:?}: {}",
        String::from_utf8_lossy(&out.stderr)
    );
    String::from_utf8(out.stdout).unwrap()
}

/// (a) 60 constant images of level 64, in two class folders and the folder itself, imported on
/// the command line. By hand: every input value is (64/128 − 0.25)/0.5 = 0.5 exactly, so the
/// channel mean is 0.5 for every sample (reference min = max = 0.5), the contrast (population
/// standard deviation) is 0, the Laplacian of a constant image is 0 everywhere so its variance
/// is 0, and every image is 8×8 (aspect 1).
#[test]
fn constant_images_give_the_hand_worked_baseline() {
    let tmp = tempfile::tempdir().unwrap();
    let reference = tmp.path().join("train");
    for i in 0..25 {
        png(&reference.join(format!("a/{i:02}.png")), 64);
        png(&reference.join(format!("b/{i:02}.png")), 64);
    }
    for i in 0..10 {
        png(&reference.join(format!("loose-{i}.png")), 64);
    }
    // Not images: ignored.
    std::fs::write(reference.join("set.json"), "{}").unwrap();
    std::fs::write(reference.join("a/notes.txt"), "x").unwrap();
    let bundle = tmp.path().join("digits.cvb");
    let printout = convoy(&[
        "import",
        digits("digits_cnn.onnx").to_str().unwrap(),
        "-o",
        bundle.to_str().unwrap(),
        "--image",
        "--color",
        "gray",
        "--size",
        "8x8",
        "--scale",
        "0.0078125",
        "--mean",
        "0.25",
        "--std",
        "0.5",
        "--reference",
        reference.to_str().unwrap(),
    ]);
    assert!(
        printout.contains("  drift      baseline from 60 reference images: 8 statistics, "),
        "{printout}"
    );

    let b = stored_baseline(&bundle);
    let names: Vec<&str> = b.statistics.iter().map(|s| s.name.as_str()).collect();
    assert_eq!(
        names,
        [
            "mean_c0",
            "contrast_c0",
            "sharpness",
            "image_width",
            "image_height",
            "aspect",
            "top1_probability",
            "entropy"
        ]
    );
    assert_eq!(b.samples, 60);
    let get = |n: &str| b.statistic(n).unwrap();
    assert_eq!((get("mean_c0").min, get("mean_c0").max), (0.5, 0.5));
    assert!(get("mean_c0").quantiles.iter().all(|&q| q == 0.5));
    assert_eq!((get("contrast_c0").min, get("contrast_c0").max), (0.0, 0.0));
    assert_eq!((get("sharpness").min, get("sharpness").max), (0.0, 0.0));
    assert_eq!((get("image_width").min, get("image_width").max), (8.0, 8.0));
    assert_eq!((get("aspect").min, get("aspect").max), (1.0, 1.0));
    for s in &b.statistics {
        assert_eq!(s.count, 60, "{}", s.name);
    }
    // Identical inputs, identical predictions: all 60 in one class.
    assert_eq!(b.class_counts.len(), 10);
    assert_eq!(b.class_counts.iter().max(), Some(&60));

    let text = convoy(&["inspect", bundle.to_str().unwrap()]);
    assert!(
        text.contains("drift      baseline from 60 reference samples: 8 statistics (mean_c0,"),
        "{text}"
    );
    let json: serde_json::Value =
        serde_json::from_str(&convoy(&["inspect", "--json", bundle.to_str().unwrap()])).unwrap();
    assert_eq!(json["drift_baseline"]["samples"], 60);
    assert_eq!(json["drift_baseline"]["statistics"][0], "mean_c0");
}

/// Without --reference nothing changes: no baseline, and inspect says so.
#[test]
fn no_reference_no_baseline() {
    let tmp = tempfile::tempdir().unwrap();
    let bundle = tmp.path().join("plain.cvb");
    let printout = convoy(&[
        "import",
        digits("digits_cnn.onnx").to_str().unwrap(),
        "-o",
        bundle.to_str().unwrap(),
    ]);
    assert!(printout.contains("  drift      no baseline"), "{printout}");
    assert!(
        Bundle::open(&bundle)
            .unwrap()
            .manifest()
            .drift_baseline
            .is_none()
    );
    let text = convoy(&["inspect", bundle.to_str().unwrap()]);
    assert!(text.contains("drift      no baseline"), "{text}");
}

fn softmax_max(logits: &[f32]) -> f64 {
    let m = logits.iter().copied().fold(f32::NEG_INFINITY, f32::max);
    let sum: f64 = logits.iter().map(|&v| f64::from(v - m).exp()).sum();
    1.0 / sum
}

/// (b) The 450 held-out digits as a `.npy` reference of prepared inputs. Checked against
/// PyTorch: the predicted-class counts must be the histogram of PyTorch's predictions
/// (`summary.json`), and the top-1 probability's range the range of max softmax over PyTorch's
/// logits (`torch_logits.npy`). Tolerance: convoy's logits are within 1e-4 · max(1, max |logit|)
/// of PyTorch's (tests/onnx/README.md), and a softmax probability moves by at most a factor
/// e^(±2ε) under logit errors of ε, so 2.5 · that bound covers it.
#[test]
fn npy_reference_matches_pytorch() {
    let tmp = tempfile::tempdir().unwrap();
    let out = tmp.path().join("digits.cvb");
    let report = import(&out, &digits("test_x.npy"), None, None).unwrap();
    let d = report.drift.expect("baseline reported");
    assert!(!d.images);
    assert_eq!((d.samples, d.available, d.statistics), (450, 450, 5));

    let b = stored_baseline(&out);
    let names: Vec<&str> = b.statistics.iter().map(|s| s.name.as_str()).collect();
    // Tensors carry no image size: no image statistics.
    assert_eq!(
        names,
        [
            "mean_c0",
            "contrast_c0",
            "sharpness",
            "top1_probability",
            "entropy"
        ]
    );
    assert_eq!(b.samples, 450);

    let summary: serde_json::Value =
        serde_json::from_slice(&std::fs::read(digits("summary.json")).unwrap()).unwrap();
    let mut pytorch_counts = vec![0u64; 10];
    for p in summary["torch_predictions"].as_array().unwrap() {
        pytorch_counts[p.as_u64().unwrap() as usize] += 1;
    }
    assert_eq!(b.class_counts, pytorch_counts);

    let logits = read_npy_file(&digits("torch_logits.npy")).unwrap();
    let scale = logits.data.iter().fold(1.0f32, |m, v| m.max(v.abs()));
    let tol = 2.5 * 1e-4 * f64::from(scale);
    let top1: Vec<f64> = logits.data.chunks(10).map(softmax_max).collect();
    let lo = top1.iter().copied().fold(f64::INFINITY, f64::min);
    let hi = top1.iter().copied().fold(0.0, f64::max);
    let r = b.statistic("top1_probability").unwrap();
    assert!((f64::from(r.min) - lo).abs() <= tol, "{} vs {lo}", r.min);
    assert!((f64::from(r.max) - hi).abs() <= tol, "{} vs {hi}", r.max);

    // The channel mean of each row, summed directly: pixels are k/16, so the f64 sums are
    // exact and so is the range.
    let x = read_npy_file(&digits("test_x.npy")).unwrap();
    let means: Vec<f32> = x
        .data
        .chunks(64)
        .map(|row| (row.iter().map(|&v| f64::from(v)).sum::<f64>() / 64.0) as f32)
        .collect();
    let m = b.statistic("mean_c0").unwrap();
    assert_eq!(m.min, means.iter().copied().fold(f32::INFINITY, f32::min));
    assert_eq!(
        m.max,
        means.iter().copied().fold(f32::NEG_INFINITY, f32::max)
    );
}

/// 120 images in four class folders of 30, image j (in sorted order) at level 2j.
fn graded_folder(root: &Path) {
    for class in 0..4 {
        for i in 0..30 {
            let j = class * 30 + i;
            png(
                &root.join(format!("c{class}/img-{i:02}.png")),
                (2 * j) as u8,
            );
        }
    }
}

/// (c) A limit of 60 of 120 keeps every second image (⌊i·120/60⌋ = 2i; systematic sampling,
/// common practice), 15 per class folder. By hand: the chosen levels are 0, 4, …, 236, so the
/// channel mean runs from (0/128 − 0.25)/0.5 = −0.5 to (236/128 − 0.25)/0.5 = 3.1875, both exact
/// in binary.
#[test]
fn a_limit_takes_an_evenly_spaced_subset() {
    let tmp = tempfile::tempdir().unwrap();
    let reference = tmp.path().join("ref");
    graded_folder(&reference);

    let all = ReferenceSet::open(&reference).unwrap();
    assert_eq!(all.len(), 120);
    let sorted = all.images().to_vec();
    let set = all.limit(60).unwrap();
    assert_eq!(set.available(), 120);
    let want: Vec<PathBuf> = sorted.iter().step_by(2).cloned().collect();
    assert_eq!(set.images(), want);
    for class in 0..4 {
        let folder = reference.join(format!("c{class}"));
        let n = set
            .images()
            .iter()
            .filter(|p| p.starts_with(&folder))
            .count();
        assert_eq!(n, 15, "class {class}");
    }

    let out = tmp.path().join("limited.cvb");
    let report = import(&out, &reference, Some(60), Some(exact_gray())).unwrap();
    let d = report.drift.unwrap();
    assert_eq!((d.samples, d.available), (60, 120));
    let b = stored_baseline(&out);
    assert_eq!(b.samples, 60);
    let m = b.statistic("mean_c0").unwrap();
    assert_eq!((m.min, m.max), (-0.5, 3.1875));

    // A limit above the set keeps everything; a limit of zero is refused.
    assert_eq!(
        ReferenceSet::open(&reference)
            .unwrap()
            .limit(500)
            .unwrap()
            .len(),
        120
    );
    assert!(matches!(
        ReferenceSet::open(&reference).unwrap().limit(0),
        Err(ReferenceError::ZeroLimit)
    ));
}

fn reference_error(r: Result<ImportReport, ImportError>) -> ReferenceError {
    match r {
        Err(ImportError::Reference(e)) => e,
        other => panic!("expected a reference error, got {other:?}"),
    }
}

/// (d) Refusals, each naming what to fix, and no bundle left behind.
#[test]
fn bad_references_are_refused() {
    let tmp = tempfile::tempdir().unwrap();
    let out = tmp.path().join("never.cvb");

    let missing = tmp.path().join("no-such-folder");
    let e = reference_error(import(&out, &missing, None, Some(exact_gray())));
    assert!(
        matches!(&e, ReferenceError::Missing { path } if *path == missing),
        "{e}"
    );

    let empty = tmp.path().join("empty");
    std::fs::create_dir_all(empty.join("sub")).unwrap();
    std::fs::write(empty.join("readme.txt"), "no images here").unwrap();
    let e = reference_error(import(&out, &empty, None, Some(exact_gray())));
    assert!(matches!(e, ReferenceError::NoImages { .. }), "{e}");

    let broken = tmp.path().join("broken");
    graded_folder(&broken);
    let bad = broken.join("c2/img-07.png");
    std::fs::write(&bad, b"\x89PNG\r\n\x1a\n but then nothing of the sort").unwrap();
    let e = reference_error(import(&out, &broken, None, Some(exact_gray())));
    assert!(
        matches!(&e, ReferenceError::Image { path, .. } if *path == bad),
        "{e}"
    );
    assert!(e.to_string().contains("img-07.png"), "{e}");

    // Below the builder's minimum (MIN_REFERENCE = 50, from Cochran's rule of thumb as
    // src/drift/baseline.rs explains).
    let few = tmp.path().join("few");
    for i in 0..10 {
        png(&few.join(format!("{i}.png")), 100);
    }
    let e = reference_error(import(&out, &few, None, Some(exact_gray())));
    assert!(
        matches!(
            e,
            ReferenceError::Baseline(DriftError::TooFewSamples { got: 10, min }) if min == MIN_REFERENCE
        ),
        "{e}"
    );

    // Images for a model that takes tensors only; an array of the wrong sample shape.
    let e = reference_error(import(&out, &broken, None, None));
    assert!(matches!(e, ReferenceError::ImagesNotAccepted), "{e}");
    let wrong = tmp.path().join("wrong.npy");
    write_npy_file(&wrong, &[60, 64], &vec![0.5; 60 * 64]).unwrap();
    let e = reference_error(import(&out, &wrong, None, None));
    assert!(
        matches!(&e, ReferenceError::NpyShape { found, .. } if *found == [60, 64]),
        "{e}"
    );

    assert!(!out.exists(), "a failed import leaves no bundle");
}
