//! Checks `convoy::npy` against files NumPy itself wrote.
//!
//! The `.npy` files and `expected.json` under `tests/data/npy/` come from
//! `tests/data/npy/make_npy.py` run with NumPy 2.4.6; `expected.json` holds
//! the values of NumPy's own `astype(np.float32)` as bit patterns. The
//! opposite direction (NumPy reading what convoy writes) is checked by the
//! same script from the files `numpy_can_read_our_files` leaves in
//! `target/tmp/npy-from-rust/`.

use std::path::{Path, PathBuf};

use convoy::npy::{NpyError, read_npy, read_npy_file, write_npy, write_npy_file};
use serde_json::Value;

fn data_dir() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/data/npy")
}

fn expected() -> Value {
    let text = std::fs::read_to_string(data_dir().join("expected.json")).unwrap();
    serde_json::from_str(&text).unwrap()
}

fn shape_of(record: &Value) -> Vec<usize> {
    let dims = record["shape"].as_array().unwrap();
    dims.iter().map(|d| d.as_u64().unwrap() as usize).collect()
}

fn bits_of(record: &Value) -> Vec<u32> {
    let bits = record["bits"].as_array().unwrap();
    bits.iter().map(|b| b.as_u64().unwrap() as u32).collect()
}

/// Exact comparison, except that any NaN matches any NaN: Rust does not
/// promise which NaN payload a float cast produces (RFC 3514), and NumPy's
/// choice is its own.
fn assert_same_f32(name: &str, got: &[f32], want_bits: &[u32]) {
    assert_eq!(got.len(), want_bits.len(), "{name}: element count");
    for (i, (&g, &w)) in got.iter().zip(want_bits).enumerate() {
        let w = f32::from_bits(w);
        let same = if w.is_nan() {
            g.is_nan()
        } else {
            g.to_bits() == w.to_bits()
        };
        assert!(
            same,
            "{name}[{i}]: got {g:e} ({:#010x}), NumPy says {w:e} ({:#010x})",
            g.to_bits(),
            w.to_bits()
        );
    }
}

#[test]
fn reads_every_dtype_version_and_layout_numpy_writes() {
    let expected = expected();
    let readable = expected["readable"].as_object().unwrap();
    assert!(
        readable.len() >= 30,
        "expected.json lists {} files",
        readable.len()
    );
    for (name, record) in readable {
        let array = read_npy_file(&data_dir().join(name)).unwrap_or_else(|e| panic!("{name}: {e}"));
        assert_eq!(array.shape, shape_of(record), "{name}: shape");
        assert_same_f32(name, &array.data, &bits_of(record));
        // Reading from memory and from a file go through different paths.
        let bytes = std::fs::read(data_dir().join(name)).unwrap();
        let in_memory = read_npy(&bytes).unwrap();
        assert_eq!(in_memory.shape, array.shape, "{name}: in-memory read");
        assert_same_f32(name, &in_memory.data, &bits_of(record));
    }
}

#[test]
fn refuses_dtypes_we_do_not_convert_and_names_them() {
    let expected = expected();
    for (name, descr) in expected["rejected"].as_object().unwrap() {
        match read_npy_file(&data_dir().join(name)) {
            Err(NpyError::UnsupportedDtype { descr: got }) => {
                assert_eq!(got, descr.as_str().unwrap(), "{name}");
            }
            other => panic!("{name}: expected UnsupportedDtype, got {other:?}"),
        }
    }
}

/// The header dict text (without its padding) and everything after it.
fn split_npy(bytes: &[u8]) -> (String, usize, &[u8]) {
    let (len_bytes, header_len) = match bytes[6] {
        1 => (2, usize::from(u16::from_le_bytes([bytes[8], bytes[9]]))),
        _ => (
            4,
            u32::from_le_bytes(bytes[8..12].try_into().unwrap()) as usize,
        ),
    };
    let start = 8 + len_bytes;
    let header = String::from_utf8(bytes[start..start + header_len].to_vec()).unwrap();
    (
        header.trim_end().to_owned(),
        start + header_len,
        &bytes[start + header_len..],
    )
}

#[test]
fn writer_matches_numpy_save_for_float32() {
    let expected = expected();
    for (name, record) in expected["writer"].as_object().unwrap() {
        let numpy_bytes = std::fs::read(data_dir().join(name)).unwrap();
        let shape = shape_of(record);
        let data: Vec<f32> = bits_of(record).into_iter().map(f32::from_bits).collect();
        let ours = write_npy(&shape, &data);

        assert_eq!(
            &ours[..8],
            b"\x93NUMPY\x01\x00",
            "{name}: magic and version 1.0"
        );
        let (our_dict, our_start, our_data) = split_npy(&ours);
        let (numpy_dict, numpy_start, numpy_data) = split_npy(&numpy_bytes);
        assert_eq!(our_dict, numpy_dict, "{name}: header dict text");
        assert_eq!(our_data, numpy_data, "{name}: data bytes");
        // numpy.lib.format docs: the header is padded so the data starts on
        // a multiple of 64 bytes. NumPy's own writer may pad more (it keeps
        // room to grow the shape), so only the alignment is compared.
        assert_eq!(our_start % 64, 0, "{name}: our alignment");
        assert_eq!(numpy_start % 64, 0, "{name}: NumPy's alignment");
        assert_eq!(ours[our_start - 1], b'\n', "{name}: header ends in newline");
    }
}

#[test]
fn round_trips_through_our_writer() {
    let expected = expected();
    for name in expected["readable"].as_object().unwrap().keys() {
        let array = read_npy_file(&data_dir().join(name)).unwrap();
        let again = read_npy(&write_npy(&array.shape, &array.data)).unwrap();
        assert_eq!(again.shape, array.shape, "{name}");
        // Bit-exact, NaN payloads included: f32 bytes are copied, not cast.
        let bits = |d: &[f32]| d.iter().map(|x| x.to_bits()).collect::<Vec<_>>();
        assert_eq!(bits(&again.data), bits(&array.data), "{name}");
    }
}

/// xorshift64* (Vigna 2016), a dependency-free source of fuzzing noise.
fn next(state: &mut u64) -> u64 {
    *state ^= *state >> 12;
    *state ^= *state << 25;
    *state ^= *state >> 27;
    state.wrapping_mul(0x2545_f491_4f6c_dd1d)
}

#[test]
fn numpy_files_truncated_or_flipped_never_panic() {
    let mut state = 0x243f_6a88_85a3_08d3u64;
    let dir = std::fs::read_dir(data_dir()).unwrap();
    let mut files: Vec<PathBuf> = dir.map(|e| e.unwrap().path()).collect();
    files.retain(|p| p.extension().is_some_and(|e| e == "npy"));
    files.sort();
    for path in files {
        let bytes = std::fs::read(&path).unwrap();
        let valid = read_npy(&bytes).is_ok();
        for len in 0..bytes.len() {
            let result = read_npy(&bytes[..len]);
            // A proper prefix of a readable file is never itself readable.
            assert!(
                !valid || result.is_err(),
                "{}: prefix of {len} bytes read",
                path.display()
            );
        }
        let mut padded = bytes.clone();
        padded.push(0);
        assert!(
            read_npy(&padded).is_err(),
            "{}: trailing byte accepted",
            path.display()
        );
        for _ in 0..300 {
            let mut bad = bytes.clone();
            for _ in 0..1 + next(&mut state) % 4 {
                let at = (next(&mut state) % bad.len() as u64) as usize;
                bad[at] = next(&mut state) as u8;
            }
            let _ = read_npy(&bad);
        }
    }
}

/// Leaves files for `make_npy.py` to load with `np.load`; see the module doc.
#[test]
fn numpy_can_read_our_files() {
    let out = Path::new(env!("CARGO_TARGET_TMPDIR")).join("npy-from-rust");
    std::fs::create_dir_all(&out).unwrap();
    let cases: [(&str, Vec<usize>, Vec<f32>); 5] = [
        (
            "batch_2x3x4x4.npy",
            vec![2, 3, 4, 4],
            (0..96).map(|i| i as f32 / 7.0 - 3.0).collect(),
        ),
        ("scalar.npy", vec![], vec![-0.0]),
        (
            "vector.npy",
            vec![5],
            vec![1.0, f32::MIN_POSITIVE, f32::MAX, f32::INFINITY, f32::NAN],
        ),
        ("empty.npy", vec![0, 10], vec![]),
        (
            "logits.npy",
            vec![3, 1000],
            (0..3000).map(|i| (i as f32).sin()).collect(),
        ),
    ];
    let mut manifest = Vec::new();
    for (file, shape, data) in cases {
        let path = out.join(file);
        write_npy_file(&path, &shape, &data).unwrap();
        let back = read_npy_file(&path).unwrap();
        assert_eq!(back.shape, shape);
        manifest.push(serde_json::json!({
            "file": file,
            "shape": shape,
            "bits": data.iter().map(|x| x.to_bits()).collect::<Vec<_>>(),
        }));
    }
    let text = serde_json::to_string_pretty(&manifest).unwrap();
    std::fs::write(out.join("manifest.json"), text).unwrap();
}
