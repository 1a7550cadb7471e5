//! The `convoy` binary as a user runs it: `inspect` and `run` on bundles made here, and clear
//! failures on damaged ones.

#[path = "../benches/nets/mod.rs"]
mod nets;

use std::path::Path;
use std::process::{Command, Output};

use convoy::bundle::Bundle;
use convoy::engine::{Engine, EngineConfig, RunOptions};
use convoy::npy::{read_npy_file, write_npy_file};

fn convoy(args: &[&str], cwd: &Path) -> Output {
    Command::new(env!("CARGO_BIN_EXE_convoy"))
        .args(args)
        .current_dir(cwd)
        .output()
        .unwrap()
}

fn lenet_with_checks(dir: &Path) -> std::path::PathBuf {
    let mut w = nets::lenet28();
    // Check samples from our own executor, as an import without reference data would store.
    let plain = Bundle::from_bytes(w.to_bytes().unwrap()).unwrap();
    let e = Engine::new(&plain, &EngineConfig::default()).unwrap();
    let mut rng = nets::Rng::new(9);
    let x = rng.vec(3 * 28 * 28, -1.0, 1.0);
    let y = e.run(&x, 3, RunOptions::default()).unwrap();
    w.check_samples(3, x, y, &[10], "convoy").unwrap();
    let path = dir.join("lenet.cvb");
    w.write(&path).unwrap();
    path
}

#[test]
fn inspect_text_and_json() {
    let dir = tempfile::tempdir().unwrap();
    lenet_with_checks(dir.path());
    let out = convoy(&["inspect", "lenet.cvb"], dir.path());
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    let text = String::from_utf8(out.stdout).unwrap();
    assert!(text.contains("lenet-28"), "{text}");
    assert!(text.contains("checksums  verified"), "{text}");
    assert!(text.contains("3 samples replayed"), "{text}");
    assert!(text.contains("passed"), "{text}");
    let out = convoy(&["inspect", "--json", "lenet.cvb"], dir.path());
    let j: serde_json::Value = serde_json::from_slice(&out.stdout).unwrap();
    // conv1 160 + conv2 4,640 + fc1 100,416 + fc2 650 (hand count).
    assert_eq!(j["parameters"], 160 + 4640 + 100_416 + 650);
    assert_eq!(j["layers"].as_array().unwrap().len(), 10);
    assert_eq!(
        j["layers"][0]["output_shape"],
        serde_json::json!([16, 28, 28])
    );
}

#[test]
fn run_writes_the_output_batch() {
    let dir = tempfile::tempdir().unwrap();
    let path = lenet_with_checks(dir.path());
    let mut rng = nets::Rng::new(4);
    let x = rng.vec(5 * 28 * 28, 0.0, 1.0);
    write_npy_file(&dir.path().join("in.npy"), &[5, 1, 28, 28], &x).unwrap();
    let out = convoy(
        &[
            "run",
            "lenet.cvb",
            "--input",
            "in.npy",
            "--output",
            "out.npy",
            "--threads",
            "2",
        ],
        dir.path(),
    );
    assert!(
        out.status.success(),
        "{}",
        String::from_utf8_lossy(&out.stderr)
    );
    let y = read_npy_file(&dir.path().join("out.npy")).unwrap();
    assert_eq!(y.shape, [5, 10]);
    let e = Engine::new(&Bundle::open(&path).unwrap(), &EngineConfig::default()).unwrap();
    assert_eq!(y.data, e.run(&x, 5, RunOptions::default()).unwrap());

    // Wrong input shape: a clear message naming both shapes.
    write_npy_file(
        &dir.path().join("bad.npy"),
        &[2, 3, 28, 28],
        &vec![0.0; 2 * 3 * 28 * 28],
    )
    .unwrap();
    let out = convoy(
        &["run", "lenet.cvb", "-i", "bad.npy", "-o", "o.npy"],
        dir.path(),
    );
    assert!(!out.status.success());
    let err = String::from_utf8_lossy(&out.stderr);
    assert!(
        err.contains("[2, 3, 28, 28]") && err.contains("[batch, 1, 28, 28]"),
        "{err}"
    );
}

#[test]
fn damaged_bundles_fail_clearly() {
    let dir = tempfile::tempdir().unwrap();
    let path = lenet_with_checks(dir.path());
    let mut bytes = std::fs::read(&path).unwrap();
    let n = bytes.len();
    bytes[n - 100] ^= 0x40;
    std::fs::write(dir.path().join("flipped.cvb"), &bytes).unwrap();
    std::fs::write(dir.path().join("short.cvb"), &bytes[..n / 2]).unwrap();
    std::fs::write(
        dir.path().join("text.cvb"),
        b"hello, I am not a bundle at all........................................",
    )
    .unwrap();
    for (file, words) in [
        ("flipped.cvb", "data checksum mismatch"),
        ("short.cvb", "truncated bundle"),
        ("text.cvb", "not a convoy bundle"),
        ("missing.cvb", "missing.cvb"),
    ] {
        let out = convoy(&["inspect", file], dir.path());
        assert!(!out.status.success(), "{file}");
        let err = String::from_utf8_lossy(&out.stderr);
        assert!(
            err.starts_with("convoy: ") && err.contains(words),
            "{file}: {err}"
        );
        assert!(!err.contains("panicked"), "{file}: {err}");
    }
}
