//! Standard classifier families, as torchvision defines them, imported and run against
//! PyTorch's own outputs.
//!
//! `tests/onnx/families/` holds reduced members of each family (the families' own
//! constructors with narrower widths and 64–128 px inputs: the operator patterns stay, the
//! weights shrink), exported by both of PyTorch's ONNX exporters, with inputs and PyTorch's
//! outputs (`make_families.py` beside them; versions in its README and manifest). Tolerance:
//! `1e-4 · max(1, max |reference|)` and the same top-1 wherever the reference's two largest
//! logits differ by more than that (the rule of `tests/onnx/README.md`).

use std::path::{Path, PathBuf};

use convoy::bundle::Bundle;
use convoy::engine::{Engine, EngineConfig, RunOptions, tolerance_check};
use convoy::graph::build::SplitMix64;
use convoy::import::{ImportOptions, import_onnx};
use convoy::npy::read_npy_file;
use serde_json::Value;

fn dir() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/onnx/families")
}

fn manifest() -> Vec<Value> {
    let text = std::fs::read(dir().join("manifest.json")).expect("families manifest");
    let m: Value = serde_json::from_slice(&text).expect("manifest is JSON");
    let files = m["files"].as_array().expect("manifest lists files").clone();
    assert!(files.len() >= 20, "the zoo has {} exports", files.len());
    files
}

/// Index of the largest value, or `None` when the two largest are within `tol`.
fn clear_top1(xs: &[f32], tol: f32) -> Option<usize> {
    let mut idx: Vec<usize> = (0..xs.len()).collect();
    idx.sort_by(|&a, &b| xs[b].total_cmp(&xs[a]));
    (xs.len() < 2 || xs[idx[0]] - xs[idx[1]] > tol).then_some(idx[0])
}

fn import(file: &str, check: Option<(&Path, &Path)>, out: &Path) -> Result<Engine, String> {
    let mut options = ImportOptions::default();
    if let Some((x, y)) = check {
        options.check = Some((read_npy_file(x).unwrap(), read_npy_file(y).unwrap()));
        options.check_source = "pytorch".into();
    }
    import_onnx(&dir().join(file), out, &options, &mut |_| {})
        .map_err(|e| format!("{file}: {e}"))?;
    let bundle = Bundle::open(out).unwrap();
    Ok(Engine::new(&bundle, &EngineConfig::default()).unwrap())
}

/// Exports refused for now, each with an error naming the node; supporting one means taking
/// it off this list (the test fails when it imports).
const KNOWN_GAPS: &[(&str, &str)] = &[];

#[test]
fn every_family_imports_and_matches_pytorch() {
    let tmp = tempfile::tempdir().unwrap();
    let mut table = Vec::new();
    let mut failed = Vec::new();
    for e in manifest() {
        let Some(file) = e["file"].as_str() else {
            continue;
        };
        let (xp, yp) = (
            dir().join(e["input"].as_str().unwrap()),
            dir().join(e["output"].as_str().unwrap()),
        );
        let out = tmp.path().join(format!("{file}.cvb"));
        let result = import(file, Some((&xp, &yp)), &out);
        if let Some(why) = KNOWN_GAPS.iter().find(|g| g.0 == file).map(|g| g.1) {
            let err = result
                .err()
                .unwrap_or_else(|| panic!("{file} imports now ({why})"));
            assert!(
                err.contains("node \""),
                "{file}: the refusal names the node: {err}"
            );
            continue;
        }
        let engine = match result {
            Ok(engine) => engine,
            Err(e) => {
                failed.push(e);
                continue;
            }
        };
        // Parameters as `convoy inspect` counts them against PyTorch's
        // `sum(p.numel() for p in model.parameters())`, the manifest's first note. Both
        // exporters fold a batch norm into the convolution before it (γ and β, two per
        // channel, become one bias), so only nets without batch norm must agree exactly
        // (AlexNet and SqueezeNet have none; ConvNeXt and the layer-norm patterns use layer
        // norm); the others may only count fewer.
        let torch_params: u64 = e["notes"]
            .as_str()
            .and_then(|n| n.split(' ').next())
            .and_then(|n| n.parse().ok())
            .expect("the manifest's notes start with the parameter count");
        let counted = Bundle::open(&out).unwrap().summary().parameters;
        let no_batch_norm = [
            "alexnet",
            "squeezenet",
            "convnext",
            "layernorm_cl",
            "layernorm_cf",
        ]
        .contains(&e["net"].as_str().unwrap_or(""));
        if counted > torch_params || (no_batch_norm && counted != torch_params) {
            failed.push(format!(
                "{file}: {counted} parameters counted, PyTorch has {torch_params}"
            ));
        }
        let (x, y) = (read_npy_file(&xp).unwrap(), read_npy_file(&yp).unwrap());
        let batch = x.shape[0];
        let got = engine.run(&x.data, batch, RunOptions::default()).unwrap();
        let (err, bound) = tolerance_check(&got, &y.data);
        assert!(err <= bound, "{file}: error {err:e} > {bound:e}");
        let per = got.len() / batch;
        for s in 0..batch {
            let want = &y.data[s * per..][..per];
            if let Some(top) = clear_top1(want, bound) {
                assert_eq!(
                    clear_top1(&got[s * per..][..per], 0.0),
                    Some(top),
                    "{file}: top-1 of sample {s}"
                );
            }
        }
        table.push(format!("{file:<48} {err:.1e} (bound {bound:.1e})"));
    }
    println!("{}", table.join("\n"));
    assert!(
        failed.is_empty(),
        "{} exports failed:\n{}",
        failed.len(),
        failed.join("\n")
    );
}

/// Dynamo exports made with an example batch of 8 and no dynamic shapes (the exporter's
/// default) import as batch-dynamic and give the dynamic export's outputs at every batch size
/// from 1 to 64.
#[test]
fn fixed_batch_exports_serve_any_batch() {
    let files = manifest();
    let tmp = tempfile::tempdir().unwrap();
    let mut checked = 0;
    for fixed in files
        .iter()
        .filter(|e| e["fixed_batch"].as_u64() == Some(8) && e["file"].is_string())
    {
        let net = fixed["net"].as_str().unwrap();
        let dynamic = files
            .iter()
            .find(|e| {
                e["net"].as_str() == Some(net)
                    && e["exporter"] == fixed["exporter"]
                    && e["dynamic_batch"].as_bool() == Some(true)
                    && e["file"].is_string()
            })
            .expect("the same net exported with a dynamic batch");
        let a = import(
            fixed["file"].as_str().unwrap(),
            None,
            &tmp.path().join("fixed.cvb"),
        )
        .unwrap();
        let b = import(
            dynamic["file"].as_str().unwrap(),
            None,
            &tmp.path().join("dynamic.cvb"),
        )
        .unwrap();
        let per = a.plan().input_len();
        let mut rng = SplitMix64::new(64);
        let x = rng.vec(64 * per, -2.0, 2.0);
        for batch in [1, 2, 3, 8, 13, 64] {
            let ya = a
                .run(&x[..batch * per], batch, RunOptions::default())
                .unwrap();
            let yb = b
                .run(&x[..batch * per], batch, RunOptions::default())
                .unwrap();
            let (err, bound) = tolerance_check(&ya, &yb);
            assert!(
                err <= bound,
                "{net}, batch {batch}: fixed and dynamic exports differ by {err:e}"
            );
        }
        checked += 1;
    }
    assert!(checked >= 2, "only {checked} fixed-batch exports checked");
}

/// ConvNeXt's blocks bracket per-channel work (layer norm, the two Linear layers, GELU —
/// written out as `x · ½(1 + erf(x/√2))` before opset 20) between `permute(0, 2, 3, 1)` and
/// `permute(0, 3, 1, 2)` (Liu et al. 2022, torchvision's `CNBlock`); imported, they run
/// channels-first with no transpose left to move data.
#[test]
fn convnext_runs_no_transposes() {
    let tmp = tempfile::tempdir().unwrap();
    let mut checked = 0;
    for entry in manifest() {
        let Some(file) = entry["file"].as_str() else {
            continue;
        };
        if entry["net"].as_str() != Some("convnext") || KNOWN_GAPS.iter().any(|g| g.0 == file) {
            continue;
        }
        let out = tmp.path().join("convnext.cvb");
        import(file, None, &out).unwrap();
        let bundle = Bundle::open(&out).unwrap();
        let transposes: Vec<&str> = bundle
            .manifest()
            .graph
            .nodes
            .iter()
            .filter(|n| matches!(n.op, convoy::graph::Op::Transpose { .. }))
            .map(|n| n.name.as_str())
            .collect();
        assert!(
            transposes.is_empty(),
            "{file}: transposes left: {transposes:?}"
        );
        checked += 1;
    }
    assert!(checked >= 2, "only {checked} ConvNeXt exports checked");
}
