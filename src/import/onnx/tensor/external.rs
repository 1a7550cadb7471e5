//! External tensor data: the bytes of large initializers, kept by the exporter in files
//! beside the `.onnx` file. [`ExternalData`] resolves each `location` inside the model's
//! folder, checks the byte range against the file and the tensor, and reads it.

use std::cell::RefCell;
use std::collections::HashMap;
use std::collections::hash_map::Entry;
use std::fs::File;
use std::io::{ErrorKind, Read, Seek, SeekFrom};
use std::path::{Component, Path, PathBuf};

use crate::import::ImportError;
use crate::import::onnx::proto::StringStringEntryProto;

/// Default cap on the bytes [`ExternalData`] reads over a whole import: 16 GiB. A model may
/// point many tensors at the same file region; the cap bounds what that can cost.
pub const DEFAULT_MAX_EXTERNAL_BYTES: u64 = 16 << 30;

/// Open external files kept for reuse. Exporters write either one file for all tensors (reused
/// hundreds of times) or one file per tensor (each read once); a small bound serves the first
/// without running out of file descriptors on the second.
const MAX_OPEN_FILES: usize = 16;

/// Where external tensor data may be read from: the model's folder, with limits.
///
/// A `location` must be a relative path with no `..` component; once joined to the model's
/// folder and resolved (symlinks included) it must still lie inside that folder. The byte
/// range `offset .. offset + length` is checked against the file's size before any read, and
/// its length against the tensor's element count and type. Reads across one import share
/// a byte budget ([`DEFAULT_MAX_EXTERNAL_BYTES`]). Not `Sync`: one import reads at a time.
#[derive(Debug)]
pub struct ExternalData {
    model_dir: Option<PathBuf>,
    max_total_bytes: u64,
    state: RefCell<ExternalState>,
}

#[derive(Debug, Default)]
struct ExternalState {
    /// The model folder, canonicalised on first use.
    root: Option<PathBuf>,
    /// Open files by `location`, with their size when first opened.
    files: HashMap<String, (File, u64)>,
    bytes_read: u64,
}

impl ExternalData {
    /// `model_dir`: the folder holding the `.onnx` file; an empty path (the `parent()` of a
    /// bare file name) means the current folder. `None` (a model read from bytes) refuses
    /// every external tensor with a clear error.
    pub fn new(model_dir: Option<&Path>) -> Self {
        let model_dir = model_dir.map(|d| {
            if d.as_os_str().is_empty() {
                PathBuf::from(".")
            } else {
                d.to_path_buf()
            }
        });
        ExternalData {
            model_dir,
            max_total_bytes: DEFAULT_MAX_EXTERNAL_BYTES,
            state: RefCell::default(),
        }
    }

    /// Sets the cap on bytes read over the whole import.
    #[must_use]
    pub fn with_max_total_bytes(mut self, limit: u64) -> Self {
        self.max_total_bytes = limit;
        self
    }

    /// Reads exactly `expected_len` bytes for tensor `tensor` described by its
    /// `external_data` entries.
    pub(super) fn read(
        &self,
        tensor: &str,
        entries: &[StringStringEntryProto],
        expected_len: u64,
    ) -> Result<Vec<u8>, ImportError> {
        let (location, offset, length) = where_stored(tensor, entries)?;
        let err = |problem: String| ImportError::ExternalData {
            tensor: tensor.to_string(),
            location: location.to_string(),
            problem,
        };
        check_location(location).map_err(err)?;

        let mut state = self.state.borrow_mut();
        let ExternalState {
            root,
            files,
            bytes_read,
        } = &mut *state;
        let root: &Path = match root {
            Some(root) => root,
            None => {
                let Some(dir) = &self.model_dir else {
                    return Err(err(
                        "cannot be read: the model was not loaded from a file, so there is no folder to resolve it in"
                            .into(),
                    ));
                };
                let canonical = dir.canonicalize().map_err(|e| {
                    err(format!(
                        "cannot be resolved: model folder {}: {e}",
                        dir.display()
                    ))
                })?;
                root.insert(canonical)
            }
        };
        if files.len() >= MAX_OPEN_FILES && !files.contains_key(location) {
            files.clear();
        }
        let (file, file_len) = match files.entry(location.to_string()) {
            Entry::Occupied(o) => o.into_mut(),
            Entry::Vacant(v) => v.insert(open_inside(root, location).map_err(err)?),
        };
        let file_len = *file_len;

        if offset > file_len {
            return Err(err(format!(
                "has offset {offset}, beyond the end of the {file_len}-byte file"
            )));
        }
        let length = length.unwrap_or(file_len - offset);
        match offset.checked_add(length) {
            Some(end) if end <= file_len => {}
            _ => {
                return Err(err(format!(
                    "has offset {offset} and length {length}, past the end of the {file_len}-byte file"
                )));
            }
        }
        if length != expected_len {
            return Err(err(format!(
                "holds {length} bytes, but the tensor's dims and type take {expected_len}"
            )));
        }
        let total = bytes_read.saturating_add(length);
        if total > self.max_total_bytes {
            return Err(err(format!(
                "would bring the external data read by this import to {total} bytes, over the limit of {}",
                self.max_total_bytes
            )));
        }
        // `length == expected_len`, at most 8 · MAX_ELEMENTS bytes.
        let size = usize::try_from(length).map_err(|_| {
            err(format!(
                "holds {length} bytes, more than this machine can address"
            ))
        })?;
        let mut buf = vec![0u8; size];
        let mut reader: &File = file;
        reader
            .seek(SeekFrom::Start(offset))
            .and_then(|_| reader.read_exact(&mut buf))
            .map_err(|e| match e.kind() {
                ErrorKind::UnexpectedEof => err(
                    "ended before the bytes its size promised (did the file change while being read?)"
                        .into(),
                ),
                _ => err(format!("could not be read: {e}")),
            })?;
        *bytes_read = total;
        Ok(buf)
    }
}

/// The `location`, `offset` (0 when absent) and `length` entries of an external tensor.
fn where_stored<'e>(
    tensor: &str,
    entries: &'e [StringStringEntryProto],
) -> Result<(&'e str, u64, Option<u64>), ImportError> {
    let mut location = None;
    let mut offset = None;
    let mut length = None;
    // Later entries win, as in the `onnx` package's `ExternalDataInfo`; unknown keys
    // (such as `checksum`, a SHA-1 of the whole file) are ignored.
    for e in entries {
        match e.key.as_str() {
            "location" => location = Some(e.value.as_str()),
            "offset" => offset = Some(e.value.as_str()),
            "length" => length = Some(e.value.as_str()),
            _ => {}
        }
    }
    let Some(location) = location else {
        return Err(ImportError::Tensor {
            tensor: tensor.to_string(),
            problem: "is marked as external data but has no \"location\" entry".into(),
        });
    };
    let err = |problem: String| ImportError::ExternalData {
        tensor: tensor.to_string(),
        location: location.to_string(),
        problem,
    };
    let number = |key: &str, v: &str| {
        v.parse::<u64>().map_err(|_| {
            err(format!(
                "has {key} {v:?}, which is not a whole number of bytes"
            ))
        })
    };
    let offset = offset
        .map(|v| number("offset", v))
        .transpose()?
        .unwrap_or(0);
    let length = length.map(|v| number("length", v)).transpose()?;
    Ok((location, offset, length))
}

/// Refuses a `location` that could leave the model folder by its spelling.
fn check_location(location: &str) -> Result<(), String> {
    if location.is_empty() {
        return Err("is empty".into());
    }
    if location.contains('\0') {
        return Err("contains a NUL byte".into());
    }
    for c in Path::new(location).components() {
        match c {
            Component::Normal(_) | Component::CurDir => {}
            Component::ParentDir => {
                return Err(
                    "contains a \"..\" component; locations must stay inside the model's folder"
                        .into(),
                );
            }
            Component::RootDir | Component::Prefix(_) => {
                return Err("is an absolute path; the standard makes locations relative to the model's folder".into());
            }
        }
    }
    Ok(())
}

/// Opens `location` under the canonical folder `root`, refusing anything that resolves
/// outside it (a symlink out, for instance) or is not a regular file. Returns the file and
/// its size.
fn open_inside(root: &Path, location: &str) -> Result<(File, u64), String> {
    let joined = root.join(location);
    let resolved = joined.canonicalize().map_err(|e| match e.kind() {
        ErrorKind::NotFound => format!("does not exist in the model's folder {}", root.display()),
        _ => format!("cannot be resolved: {e}"),
    })?;
    if !resolved.starts_with(root) {
        return Err(format!(
            "resolves to {}, outside the model's folder {}",
            resolved.display(),
            root.display()
        ));
    }
    let file = File::open(&resolved).map_err(|e| format!("cannot be opened: {e}"))?;
    let meta = file
        .metadata()
        .map_err(|e| format!("cannot be inspected: {e}"))?;
    if !meta.is_file() {
        return Err("is not a regular file".into());
    }
    Ok((file, meta.len()))
}

#[cfg(test)]
mod tests {
    use std::fs;

    use super::*;
    use crate::import::onnx::proto::{DataLocation, DataType, TensorProto};
    use crate::import::onnx::tensor::ConstTensor;

    fn no_files() -> ExternalData {
        ExternalData::new(None)
    }

    fn problem(err: ImportError) -> String {
        match err {
            ImportError::Tensor { problem, .. } | ImportError::ExternalData { problem, .. } => {
                problem
            }
            other => panic!("unexpected error kind: {other}"),
        }
    }

    fn external(
        location: &str,
        offset: Option<u64>,
        length: Option<u64>,
        dims: &[i64],
    ) -> TensorProto {
        let entry = |k: &str, v: String| StringStringEntryProto {
            key: k.into(),
            value: v,
        };
        let mut entries = vec![entry("location", location.into())];
        entries.extend(offset.map(|o| entry("offset", o.to_string())));
        entries.extend(length.map(|l| entry("length", l.to_string())));
        TensorProto {
            name: "ext".into(),
            data_type: DataType::Float as i32,
            dims: dims.to_vec(),
            external_data: entries,
            data_location: DataLocation::External as i32,
            ..Default::default()
        }
    }

    /// A model folder holding `weights.bin` = 16 floats 0..16, and a sibling folder with a
    /// `secret.bin` outside it.
    fn model_dir() -> (tempfile::TempDir, PathBuf) {
        let top = tempfile::tempdir().unwrap();
        let dir = top.path().join("model");
        fs::create_dir_all(dir.join("sub")).unwrap();
        let bytes: Vec<u8> = (0..16).flat_map(|i| (i as f32).to_le_bytes()).collect();
        fs::write(dir.join("weights.bin"), &bytes).unwrap();
        fs::write(dir.join("sub/more.bin"), &bytes[..8]).unwrap();
        fs::write(top.path().join("secret.bin"), &bytes).unwrap();
        (top, dir)
    }

    #[test]
    fn external_data_reads_ranges_inside_the_model_folder() {
        let (_top, dir) = model_dir();
        let ext = ExternalData::new(Some(&dir));
        let t = external("weights.bin", Some(8), Some(12), &[3]);
        assert_eq!(
            ConstTensor::from_proto(&t, &ext).unwrap().to_f32(),
            [2.0, 3.0, 4.0]
        );
        // No length: to the end of the file. No offset: from its start.
        let t = external("weights.bin", Some(48), None, &[4]);
        assert_eq!(
            ConstTensor::from_proto(&t, &ext).unwrap().to_f32(),
            [12.0, 13.0, 14.0, 15.0]
        );
        let t = external("./sub/more.bin", None, None, &[2]);
        assert_eq!(
            ConstTensor::from_proto(&t, &ext).unwrap().to_f32(),
            [0.0, 1.0]
        );
    }

    fn external_problem(ext: &ExternalData, t: &TensorProto) -> String {
        let err = ConstTensor::from_proto(t, ext).unwrap_err();
        assert!(matches!(err, ImportError::ExternalData { .. }), "{err}");
        problem(err)
    }

    #[test]
    fn external_data_cannot_leave_the_model_folder() {
        let (_top, dir) = model_dir();
        let ext = ExternalData::new(Some(&dir));
        let p = external_problem(&ext, &external("../secret.bin", None, None, &[16]));
        assert!(p.contains(".."), "{p}");
        let p = external_problem(&ext, &external("sub/../../secret.bin", None, None, &[16]));
        assert!(p.contains(".."), "{p}");
        let p = external_problem(&ext, &external("/etc/passwd", None, None, &[1]));
        assert!(p.contains("absolute"), "{p}");
        let p = external_problem(&ext, &external("", None, None, &[1]));
        assert!(p.contains("empty"), "{p}");
        let p = external_problem(&ext, &external("sub", None, None, &[1]));
        assert!(p.contains("regular file"), "{p}");
        let p = external_problem(&ext, &external("missing.bin", None, None, &[1]));
        assert!(p.contains("does not exist"), "{p}");
    }

    #[cfg(unix)]
    #[test]
    fn external_data_refuses_symlinks_out_of_the_folder() {
        let (top, dir) = model_dir();
        std::os::unix::fs::symlink(top.path().join("secret.bin"), dir.join("link.bin")).unwrap();
        std::os::unix::fs::symlink(top.path(), dir.join("up")).unwrap();
        // A symlink that stays inside is fine.
        std::os::unix::fs::symlink(dir.join("weights.bin"), dir.join("alias.bin")).unwrap();
        let ext = ExternalData::new(Some(&dir));
        let p = external_problem(&ext, &external("link.bin", None, None, &[16]));
        assert!(p.contains("outside"), "{p}");
        let p = external_problem(&ext, &external("up/secret.bin", None, None, &[16]));
        assert!(p.contains("outside"), "{p}");
        let t = external("alias.bin", Some(60), None, &[1]);
        assert_eq!(ConstTensor::from_proto(&t, &ext).unwrap().to_f32(), [15.0]);
    }

    #[test]
    fn external_ranges_are_checked_before_reading() {
        let (_top, dir) = model_dir();
        let ext = ExternalData::new(Some(&dir));
        let p = external_problem(&ext, &external("weights.bin", Some(65), None, &[0]));
        assert!(p.contains("beyond the end"), "{p}");
        // Truncated file: the range asks for more than is there.
        let p = external_problem(&ext, &external("weights.bin", Some(60), Some(8), &[2]));
        assert!(p.contains("past the end"), "{p}");
        let p = external_problem(
            &ext,
            &external("weights.bin", Some(u64::MAX), Some(1), &[0]),
        );
        assert!(p.contains("beyond the end"), "{p}");
        let p = external_problem(
            &ext,
            &external("weights.bin", Some(8), Some(u64::MAX), &[0]),
        );
        assert!(p.contains("past the end"), "{p}");
        // Length that disagrees with dims × element size.
        let p = external_problem(&ext, &external("weights.bin", Some(0), Some(8), &[3]));
        assert!(p.contains("holds 8 bytes") && p.contains("12"), "{p}");
        let p = external_problem(&ext, &external("weights.bin", None, None, &[15]));
        assert!(p.contains("holds 64 bytes"), "{p}");
        // Numbers must be numbers.
        let mut t = external("weights.bin", None, None, &[16]);
        t.external_data.push(StringStringEntryProto {
            key: "offset".into(),
            value: "-4".into(),
        });
        let p = external_problem(&ext, &t);
        assert!(p.contains("whole number"), "{p}");
    }

    #[test]
    fn external_data_needs_a_folder_a_location_and_budget() {
        let (_top, dir) = model_dir();
        let t = external("weights.bin", None, None, &[16]);
        let p = external_problem(&no_files(), &t);
        assert!(p.contains("not loaded from a file"), "{p}");

        let mut no_location = t.clone();
        no_location.external_data.retain(|e| e.key != "location");
        let err =
            ConstTensor::from_proto(&no_location, &ExternalData::new(Some(&dir))).unwrap_err();
        assert!(problem(err).contains("location"));

        let mut both = t.clone();
        both.raw_data = vec![0; 64];
        let err = ConstTensor::from_proto(&both, &ExternalData::new(Some(&dir))).unwrap_err();
        assert!(problem(err).contains("raw_data"));

        // `Path::new("model.onnx").parent()` is the empty path: the current folder.
        let here = ExternalData::new(Some(Path::new("")));
        assert_eq!(here.model_dir.as_deref(), Some(Path::new(".")));

        let ext = ExternalData::new(Some(&dir)).with_max_total_bytes(100);
        assert!(ConstTensor::from_proto(&t, &ext).is_ok());
        let p = external_problem(&ext, &t);
        assert!(p.contains("limit of 100"), "{p}");
    }
}
