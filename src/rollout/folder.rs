//! The models folder as the rollout sees it: which bundle files are there, and a way to read
//! one that notices it changing underneath.
//!
//! Publishing convention (README, "Rolling out a version"): write the bundle under a name that
//! does not end in `.cvb` (or starts with a dot), then rename it to `NAME.cvb` in the same
//! folder; a rename is atomic, so the server sees either no file or the whole file. Files are
//! still read into memory rather than mapped (a file rewritten in place while mapped could end
//! the process with SIGBUS), and every load verifies the bundle's checksums, so a file caught
//! half-written is refused and loaded again once it changes.

use std::collections::BTreeMap;
use std::io::Read;
use std::path::{Path, PathBuf};
use std::time::SystemTime;

/// What identifies one state of a file: a change to any of these is a new file to load.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub struct Stamp {
    pub len: u64,
    pub modified: Option<SystemTime>,
    /// The inode on Unix (a rename puts a new one in place); 0 elsewhere.
    pub inode: u64,
}

impl Stamp {
    fn of(meta: &std::fs::Metadata) -> Stamp {
        #[cfg(unix)]
        let inode = std::os::unix::fs::MetadataExt::ino(meta);
        #[cfg(not(unix))]
        let inode = 0;
        Stamp {
            len: meta.len(),
            modified: meta.modified().ok(),
            inode,
        }
    }
}

/// Whether `path` names a bundle the server should consider: `*.cvb`, not hidden.
pub fn is_bundle_name(path: &Path) -> bool {
    let hidden = path
        .file_name()
        .and_then(|n| n.to_str())
        .is_none_or(|n| n.starts_with('.'));
    !hidden && path.extension().is_some_and(|x| x == "cvb")
}

/// Every bundle file directly inside `dir`, with its stamp.
///
/// # Errors
/// The folder cannot be listed (missing, unreadable).
pub fn list(dir: &Path) -> std::io::Result<BTreeMap<PathBuf, Stamp>> {
    let mut files = BTreeMap::new();
    for entry in std::fs::read_dir(dir)? {
        let Ok(entry) = entry else { continue };
        let path = entry.path();
        if !is_bundle_name(&path) {
            continue;
        }
        // Follows symbolic links, so a link to a bundle elsewhere counts; a dangling one not.
        match std::fs::metadata(&path) {
            Ok(meta) if meta.is_file() => {
                files.insert(path, Stamp::of(&meta));
            }
            _ => {}
        }
    }
    Ok(files)
}

/// Why a file could not be read whole.
#[derive(Debug, thiserror::Error)]
pub enum ReadProblem {
    #[error("{0}")]
    Io(#[from] std::io::Error),
    /// Its size or time changed while it was read: still being written.
    #[error("the file changed while it was read (still being written?)")]
    Changing,
}

/// Reads the whole file, and its stamp from before the read; [`ReadProblem::Changing`] if the
/// file changed during the read.
///
/// # Errors
/// I/O failures, or a file that changed during the read.
pub fn read_whole(path: &Path) -> Result<(Vec<u8>, Stamp), ReadProblem> {
    let mut file = std::fs::File::open(path)?;
    let before = Stamp::of(&file.metadata()?);
    let mut bytes = Vec::with_capacity(before.len as usize);
    file.read_to_end(&mut bytes)?;
    let after = Stamp::of(&std::fs::metadata(path)?);
    if after != before || bytes.len() as u64 != before.len {
        return Err(ReadProblem::Changing);
    }
    Ok((bytes, before))
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn only_visible_cvb_files_count() {
        let dir = tempfile::tempdir().unwrap();
        for name in ["a.cvb", ".b.cvb", "c.cvb.part", "d.txt"] {
            std::fs::write(dir.path().join(name), b"x").unwrap();
        }
        std::fs::create_dir(dir.path().join("e.cvb")).unwrap();
        let names: Vec<String> = list(dir.path())
            .unwrap()
            .keys()
            .map(|p| p.file_name().unwrap().to_string_lossy().into_owned())
            .collect();
        assert_eq!(names, ["a.cvb"]);
    }

    #[test]
    fn a_rename_changes_the_stamp() {
        let dir = tempfile::tempdir().unwrap();
        let path = dir.path().join("m.cvb");
        std::fs::write(&path, b"one").unwrap();
        let (_, first) = read_whole(&path).unwrap();
        let tmp = dir.path().join("m.cvb.part");
        std::fs::write(&tmp, b"two").unwrap();
        std::fs::rename(&tmp, &path).unwrap();
        let (bytes, second) = read_whole(&path).unwrap();
        assert_eq!(bytes, b"two");
        assert_ne!(first, second, "same length, but a new inode");
    }
}
