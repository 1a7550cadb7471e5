//! Bundle signatures: Ed25519 itself against RFC 8032's published vector, signing and checking
//! round trips, every kind of tampering (also with the bundle's own checksums repaired, so only
//! the signature can catch it), unknown keys, the `signature` load step, a server with
//! `trusted_keys`, and the `convoy key` / `convoy sign` / `convoy inspect` commands.

#[path = "../benches/nets/mod.rs"]
mod nets;

use std::path::Path;
use std::process::Command;

use convoy::bundle::signature::{
    FLAG_SIGNED, PublicKey, SIGNATURE_BLOCK_LEN, SecretKey, SignatureProblem, Trust,
    check_signature, sign_bundle, write_new_key_pair,
};
use convoy::bundle::{Bundle, BundleError, HEADER_LEN};
use convoy::registry::{LoadSettings, LoadStep, load_version};
use convoy::service::{DEMO_BUNDLE, ServeConfig, start};
use sha2::{Digest, Sha256};

fn unhex(s: &str) -> Vec<u8> {
    (0..s.len())
        .step_by(2)
        .map(|i| u8::from_str_radix(&s[i..i + 2], 16).unwrap())
        .collect()
}

fn hex(b: &[u8]) -> String {
    b.iter().map(|x| format!("{x:02x}")).collect()
}

/// A fixed key (not a secret of anyone: made up for the tests).
fn key(seed: u8) -> SecretKey {
    SecretKey::from_bytes(&[seed; 32])
}

fn signed_demo(k: &SecretKey) -> Vec<u8> {
    sign_bundle(DEMO_BUNDLE.to_vec(), k).unwrap()
}

fn check(bytes: Vec<u8>, trusted: &[PublicKey]) -> Result<String, SignatureProblem> {
    let bundle = Bundle::from_bytes(bytes).unwrap();
    check_signature(&bundle, Trust::Keys(trusted))
}

/// RFC 8032 §7.1, TEST 1 (empty message). The values were copied from a published copy of the
/// Ed25519 authors' test list whose first entry is this vector (found with the search tool;
/// the RFC's own page was not reachable), and agree with the RFC as remembered.
#[test]
fn ed25519_matches_rfc8032_test_1() {
    let secret: [u8; 32] =
        unhex("9d61b19deffd5a60ba844af492ec2cc44449c5697b326919703bac031cae7f60")
            .try_into()
            .unwrap();
    let public = "d75a980182b10ab7d54bfed3c964073a0ee172f3daa62325af021a68f707511a";
    let signature = "e5564300c360ac729086e2cc806e828a84877f1eb8e5d974d873e065224901555fb8821590a33bacc61e39701cf9b46bd25bf5f0595bbe24655141438e7a100b";
    let k = SecretKey::from_bytes(&secret);
    assert_eq!(hex(&k.public().to_bytes()), public);
    assert_eq!(hex(&k.sign(b"")), signature);
}

#[test]
fn a_signed_bundle_verifies_and_an_unsigned_one_is_unchanged() {
    let k = key(1);
    let signed = signed_demo(&k);
    // One block appended; everything before it is the original but for the flag.
    assert_eq!(signed.len(), DEMO_BUNDLE.len() + SIGNATURE_BLOCK_LEN);
    assert_eq!(signed[..12], DEMO_BUNDLE[..12]);
    assert_eq!(
        u32::from_le_bytes(signed[12..16].try_into().unwrap()),
        FLAG_SIGNED
    );
    assert_eq!(signed[16..DEMO_BUNDLE.len()], DEMO_BUNDLE[16..]);
    assert_eq!(
        check(signed.clone(), &[k.public()]),
        Ok(k.public().fingerprint())
    );
    // Among several trusted keys.
    assert!(check(signed.clone(), &[key(2).public(), k.public()]).is_ok());
    // Signing again (another key) replaces the signature rather than stacking one.
    let again = sign_bundle(signed, &key(2)).unwrap();
    assert_eq!(again.len(), DEMO_BUNDLE.len() + SIGNATURE_BLOCK_LEN);
    assert!(check(again.clone(), &[key(2).public()]).is_ok());
    assert!(matches!(
        check(again, &[k.public()]),
        Err(SignatureProblem::UnknownKey { .. })
    ));
    // The unsigned demo reads as unsigned (its flags are 0, as before signatures existed).
    assert_eq!(DEMO_BUNDLE[12..16], [0, 0, 0, 0]);
    assert_eq!(
        check(DEMO_BUNDLE.to_vec(), &[k.public()]),
        Err(SignatureProblem::Unsigned)
    );
}

fn u64_at(b: &[u8], at: usize) -> usize {
    u64::from_le_bytes(b[at..at + 8].try_into().unwrap()) as usize
}

/// Writes the manifest's SHA-256 into the header again after the manifest was edited.
fn repair_manifest_digest(b: &mut [u8]) {
    let len = u64_at(b, 16);
    let digest = Sha256::digest(&b[HEADER_LEN..HEADER_LEN + len]);
    b[32..64].copy_from_slice(&digest);
}

fn find(hay: &[u8], needle: &[u8]) -> usize {
    hay.windows(needle.len()).position(|w| w == needle).unwrap()
}

#[test]
fn tampering_is_refused_even_with_checksums_repaired() {
    let k = key(3);
    let trusted = [k.public()];
    let signed = signed_demo(&k);
    let manifest_len = u64_at(&signed, 16);
    let data_start = (HEADER_LEN + manifest_len).div_ceil(64) * 64;
    let data_end = signed.len() - SIGNATURE_BLOCK_LEN;

    // Manifest: one byte of the creation time, header digest repaired so the bundle itself
    // verifies; only the signature notices.
    let mut b = signed.clone();
    let at = HEADER_LEN + find(&b[HEADER_LEN..], b"\"created\": \"") + 12;
    b[at] = if b[at] == b'2' { b'3' } else { b'2' };
    let unrepaired = b.clone();
    assert!(matches!(
        Bundle::from_bytes(unrepaired),
        Err(BundleError::ManifestChecksum { .. })
    ));
    repair_manifest_digest(&mut b);
    assert!(matches!(
        check(b, &trusted),
        Err(SignatureProblem::BadSignature { .. })
    ));

    // Data: the lowest mantissa bit of the first weight (stays finite), with the data digest
    // in the manifest and the manifest digest in the header both repaired.
    let mut b = signed.clone();
    b[data_start] ^= 1;
    let old = hex(&Sha256::digest(&signed[data_start..data_end]));
    let new = hex(&Sha256::digest(&b[data_start..data_end]));
    let at = HEADER_LEN + find(&b[HEADER_LEN..HEADER_LEN + manifest_len], old.as_bytes());
    b[at..at + 64].copy_from_slice(new.as_bytes());
    repair_manifest_digest(&mut b);
    assert!(matches!(
        check(b, &trusted),
        Err(SignatureProblem::BadSignature { .. })
    ));

    // Header: the reserved part of the flags is refused by the reader itself.
    let mut b = signed.clone();
    b[12] |= 1;
    assert!(matches!(
        Bundle::from_bytes(b),
        Err(BundleError::UnknownFlags { flags: 3 })
    ));

    // Signature: every byte of it matters.
    for i in [0, 31, 32, 63] {
        let mut b = signed.clone();
        b[data_end + 48 + i] ^= 0x10;
        assert!(
            matches!(
                check(b, &trusted),
                Err(SignatureProblem::BadSignature { .. })
            ),
            "signature byte {i}"
        );
    }
    // The key in the block: no longer the trusted key.
    let mut b = signed.clone();
    b[data_end + 16] ^= 1;
    assert!(matches!(
        check(b, &trusted),
        Err(SignatureProblem::UnknownKey { .. })
    ));
    // Block framing, truncation, and a stripped block whose flag stayed set.
    let mut b = signed.clone();
    b[data_end] ^= 1;
    assert!(matches!(
        Bundle::from_bytes(b),
        Err(BundleError::SignatureBlock { .. })
    ));
    let mut b = signed.clone();
    b.truncate(data_end + 100);
    assert!(matches!(
        Bundle::from_bytes(b),
        Err(BundleError::Truncated {
            what: "signature block",
            ..
        })
    ));
    let mut b = signed;
    b.truncate(data_end);
    assert!(matches!(
        Bundle::from_bytes(b),
        Err(BundleError::Truncated { .. })
    ));
}

#[test]
fn an_unknown_key_is_refused_and_named() {
    let signed = signed_demo(&key(4));
    match check(signed, &[key(5).public()]) {
        Err(SignatureProblem::UnknownKey { fingerprint }) => {
            assert_eq!(fingerprint, key(4).public().fingerprint());
            // `ed25519:` and 8 bytes of hex.
            assert_eq!(fingerprint.len(), 8 + 16);
        }
        other => panic!("{other:?}"),
    }
}

#[test]
fn the_signature_load_step() {
    let k = key(6);
    let trusting = LoadSettings {
        trusted_keys: vec![k.public()],
        ..LoadSettings::default()
    };
    let refused = |bytes: Vec<u8>, settings: &LoadSettings| {
        let r = load_version(bytes, "test", settings).result.unwrap_err();
        (r.step, r.reason)
    };
    // Unsigned, with trusted keys set: refused at `signature`, saying why.
    let (step, reason) = refused(DEMO_BUNDLE.to_vec(), &trusting);
    assert_eq!(step, LoadStep::Signature);
    assert!(reason.contains("not signed"), "{reason}");
    assert_eq!(LoadStep::Signature.as_str(), "signature");
    // Another key.
    let (step, reason) = refused(signed_demo(&key(7)), &trusting);
    assert_eq!(step, LoadStep::Signature);
    assert!(reason.contains(&key(7).public().fingerprint()), "{reason}");
    assert!(reason.contains("not a trusted key"), "{reason}");
    // The trusted key: loads.
    assert!(
        load_version(signed_demo(&k), "test", &trusting)
            .result
            .is_ok()
    );
    // No trusted keys: unsigned and signed bundles both load.
    let open = LoadSettings::default();
    assert!(
        load_version(DEMO_BUNDLE.to_vec(), "test", &open)
            .result
            .is_ok()
    );
    assert!(
        load_version(signed_demo(&key(7)), "test", &open)
            .result
            .is_ok()
    );
}

fn write(path: &Path, bytes: &[u8]) {
    std::fs::write(path, bytes).unwrap();
}

#[tokio::test(flavor = "multi_thread", worker_threads = 2)]
async fn a_server_with_trusted_keys_loads_only_signed_bundles() {
    let dir = tempfile::tempdir().unwrap();
    let models = dir.path().join("models");
    std::fs::create_dir(&models).unwrap();
    let public = dir.path().join("team.pub");
    let secret = dir.path().join("team.key");
    let pk = write_new_key_pair(&secret, &public).unwrap();
    let sk = SecretKey::read(&secret).unwrap();
    assert_eq!(sk.public(), pk);
    assert_eq!(PublicKey::read(&public).unwrap(), pk);
    write(
        &models.join("signed.cvb"),
        &sign_bundle(DEMO_BUNDLE.to_vec(), &sk).unwrap(),
    );
    // Another model, unsigned.
    nets::lenet28().write(&models.join("unsigned.cvb")).unwrap();
    let server = start(&ServeConfig {
        listen: "127.0.0.1:0".parse().unwrap(),
        models: Some(models),
        compute_threads: 1,
        trusted_keys: vec![public.clone()],
        ..ServeConfig::default()
    })
    .await
    .unwrap();
    let mut loaded = 0;
    for l in &server.loads {
        if l.origin.contains("unsigned") {
            let r = l.result.as_ref().unwrap_err();
            assert_eq!(r.step, LoadStep::Signature, "{r}");
        } else {
            assert!(l.result.is_ok(), "{:?}", l.result);
            loaded += 1;
        }
    }
    assert_eq!(loaded, 1);
    server.shutdown().await.unwrap();

    // A trusted key file that is not one: the server does not start, naming the file.
    let bad = dir.path().join("bad.pub");
    write(&bad, b"convoy-ed25519-public 1234\n");
    let e = start(&ServeConfig {
        listen: "127.0.0.1:0".parse().unwrap(),
        trusted_keys: vec![bad.clone()],
        ..ServeConfig::default()
    })
    .await
    .err()
    .unwrap()
    .to_string();
    assert!(e.contains("bad.pub") && e.contains("64 hex digits"), "{e}");
    // A secret key given where a public one belongs is named as such.
    let e = PublicKey::read(&secret).unwrap_err().to_string();
    assert!(e.contains("secret"), "{e}");
}

#[test]
fn key_files_are_private_and_never_overwritten() {
    let dir = tempfile::tempdir().unwrap();
    let secret = dir.path().join("k.key");
    let public = dir.path().join("k.pub");
    write_new_key_pair(&secret, &public).unwrap();
    #[cfg(unix)]
    {
        use std::os::unix::fs::PermissionsExt;
        let mode = std::fs::metadata(&secret).unwrap().permissions().mode();
        assert_eq!(mode & 0o777, 0o600);
    }
    let before = std::fs::read(&secret).unwrap();
    assert!(write_new_key_pair(&secret, &dir.path().join("other.pub")).is_err());
    assert_eq!(std::fs::read(&secret).unwrap(), before);
    // Two new keys differ (they come from the system's random source).
    write_new_key_pair(&dir.path().join("b.key"), &dir.path().join("b.pub")).unwrap();
    assert_ne!(
        PublicKey::read(&public).unwrap(),
        PublicKey::read(&dir.path().join("b.pub")).unwrap()
    );
}

fn convoy(args: &[&str], dir: &Path) -> std::process::Output {
    Command::new(env!("CARGO_BIN_EXE_convoy"))
        .args(args)
        .current_dir(dir)
        .output()
        .unwrap()
}

#[test]
fn key_sign_and_inspect_commands() {
    let dir = tempfile::tempdir().unwrap();
    write(&dir.path().join("m.cvb"), DEMO_BUNDLE);
    let out = convoy(
        &["key", "new", "--secret", "a.key", "--public", "a.pub"],
        dir.path(),
    );
    assert!(out.status.success(), "{out:?}");
    let fingerprint = PublicKey::read(&dir.path().join("a.pub"))
        .unwrap()
        .fingerprint();
    let out = convoy(&["inspect", "m.cvb"], dir.path());
    assert!(String::from_utf8_lossy(&out.stdout).contains("signature  none"));
    let out = convoy(&["sign", "m.cvb", "--secret-key", "a.key"], dir.path());
    assert!(out.status.success(), "{out:?}");
    let out = convoy(&["inspect", "m.cvb"], dir.path());
    let text = String::from_utf8_lossy(&out.stdout);
    assert!(out.status.success(), "{out:?}");
    assert!(
        text.contains(&format!("signature  by {fingerprint} (valid)")),
        "{text}"
    );
    let out = convoy(&["inspect", "--json", "m.cvb"], dir.path());
    let v: serde_json::Value = serde_json::from_slice(&out.stdout).unwrap();
    assert_eq!(v["signature"]["key"], fingerprint.as_str());
    assert_eq!(v["signature"]["valid"], true);
    // A damaged signature: inspect says so and fails.
    let mut b = std::fs::read(dir.path().join("m.cvb")).unwrap();
    let n = b.len();
    b[n - 30] ^= 1;
    write(&dir.path().join("m.cvb"), &b);
    let out = convoy(&["inspect", "m.cvb"], dir.path());
    assert!(!out.status.success());
    assert!(String::from_utf8_lossy(&out.stdout).contains("INVALID"));
}
