//! Arbitrary bytes as a weight bundle, then what a server does with one that opens: plan it,
//! replay its check samples, warm up, set up drift monitoring (`load_version`).
//!
//! The first byte picks the mode. Even: the rest is the file as it is — almost every mutation
//! then fails a checksum. Odd: the rest is re-sealed first (the manifest's `data_sha256` and
//! the header's manifest checksum recomputed, lengths fixed up), so mutations reach the
//! manifest, tensor index, graph and engine behind the checksums.
#![no_main]

use std::sync::OnceLock;

use convoy::bundle::{ALIGN, Bundle, HEADER_LEN};
use convoy::registry::{LoadSettings, load_version};
use libfuzzer_sys::fuzz_target;
use sha2::{Digest, Sha256};

/// Above this many multiply-adds per sample the engine is not run: a mutated shape can ask for
/// minutes of honest compute, which is slow, not a bug.
const MAX_MULTIPLY_ADDS: u64 = 20_000_000;
/// Largest value (in elements) planned; a bigger activation is an honest, large model.
const MAX_VALUE_ELEMENTS: usize = 1 << 24;

fn settings() -> &'static LoadSettings {
    static S: OnceLock<LoadSettings> = OnceLock::new();
    S.get_or_init(LoadSettings::default)
}

fn hex(bytes: &[u8]) -> String {
    bytes.iter().map(|b| format!("{b:02x}")).collect()
}

fn reseal(raw: &[u8]) -> Vec<u8> {
    if raw.len() < HEADER_LEN {
        return raw.to_vec();
    }
    // Eight bytes at offsets 16 and 24 of a slice of at least HEADER_LEN (64): always fits.
    let len_at = |o: usize| u64::from_le_bytes(raw[o..o + 8].try_into().unwrap());
    let manifest_end = (HEADER_LEN as u64)
        .saturating_add(len_at(16))
        .min(raw.len() as u64) as usize;
    let data_start = (manifest_end as u64).div_ceil(ALIGN) * ALIGN;
    let data = raw.get(data_start as usize..).unwrap_or(&[]);
    let mut manifest = raw[HEADER_LEN..manifest_end].to_vec();
    if let Ok(serde_json::Value::Object(mut m)) = serde_json::from_slice(&manifest) {
        m.insert(
            "data_sha256".into(),
            serde_json::Value::String(hex(&Sha256::digest(data))),
        );
        // A map of JSON values that was just parsed always serialises.
        manifest = serde_json::to_vec(&m).unwrap();
    }
    let mut out = raw[..16].to_vec();
    out.extend_from_slice(&(manifest.len() as u64).to_le_bytes());
    out.extend_from_slice(&(data.len() as u64).to_le_bytes());
    out.extend_from_slice(&Sha256::digest(&manifest));
    out.extend_from_slice(&manifest);
    out.resize(out.len().div_ceil(ALIGN as usize) * ALIGN as usize, 0);
    out.extend_from_slice(data);
    out
}

fuzz_target!(|data: &[u8]| {
    let Some((&mode, rest)) = data.split_first() else {
        return;
    };
    let bytes = if mode & 1 == 1 {
        reseal(rest)
    } else {
        rest.to_vec()
    };
    let Ok(bundle) = Bundle::from_bytes(bytes.clone()) else {
        return;
    };
    // What `convoy inspect` shows of an opened bundle.
    let summary = bundle.summary();
    let largest = bundle
        .shapes()
        .node_outputs
        .iter()
        .map(|s| s.iter().fold(1usize, |n, &d| n.saturating_mul(d)))
        .max()
        .unwrap_or(0);
    let checks = bundle
        .manifest()
        .check_samples
        .as_ref()
        .map_or(0, |c| c.count as u64);
    if summary.multiply_adds.saturating_mul(checks + 1) > MAX_MULTIPLY_ADDS
        || largest > MAX_VALUE_ELEMENTS
    {
        return;
    }
    drop(bundle);
    let _ = load_version(bytes, "fuzz", settings());
});
