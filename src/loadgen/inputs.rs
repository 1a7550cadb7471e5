//! What the requests of a load run carry: the files of a folder sent as encoded images, the
//! rows of a `.npy` array sent as tensors, or seeded random tensors of the model's input
//! shape. The samples are read once into a pool; request `i` takes the next
//! `samples_per_request` of them round-robin, so every request differs from its neighbours
//! and the whole pool is cycled through.

use std::path::Path;

use super::LoadgenError;
use crate::npy::read_npy_file;
use crate::service::api::{self, sample::Data};

/// Most files read from an image folder.
pub const MAX_INPUT_FILES: usize = 10_000;
/// Most bytes of samples held in memory.
pub const MAX_INPUT_BYTES: u64 = 512 << 20;
/// Distinct random samples made when no inputs are given: enough that consecutive requests
/// differ, few enough to cost nothing to make.
pub const RANDOM_POOL: usize = 16;

/// Where the samples come from.
#[derive(Clone, Debug)]
pub enum InputSource {
    /// Random tensors of the model's input shape (asked from the server's catalog), values
    /// uniform in [-1, 1), from this seed.
    Random { seed: u64 },
    /// Every file of this folder (not its subfolders, not hidden files), sent as it is.
    Images(std::path::PathBuf),
    /// Each row of the first axis of this `.npy` array is one tensor sample.
    Tensors(std::path::PathBuf),
}

/// The pool of samples requests draw from.
#[derive(Clone, Debug)]
pub struct Samples {
    pub pool: Vec<api::Sample>,
    /// For the report: what was sent.
    pub description: String,
}

/// Reads every regular, non-hidden file of `dir`, in name order.
///
/// # Errors
/// An unreadable folder or file, an empty folder, or more than [`MAX_INPUT_FILES`] files or
/// [`MAX_INPUT_BYTES`] bytes.
pub fn images(dir: &Path) -> Result<Samples, LoadgenError> {
    let io = |source| LoadgenError::Io {
        path: dir.to_path_buf(),
        source,
    };
    let mut files = Vec::new();
    let mut bytes = 0u64;
    for entry in std::fs::read_dir(dir).map_err(io)? {
        let entry = entry.map_err(io)?;
        if entry.file_name().to_string_lossy().starts_with('.') {
            continue;
        }
        let path = entry.path();
        // `fs::metadata` follows symbolic links, so a link to a file counts as a file.
        let meta = std::fs::metadata(&path).map_err(|source| LoadgenError::Io {
            path: path.clone(),
            source,
        })?;
        if !meta.is_file() {
            continue;
        }
        if files.len() == MAX_INPUT_FILES {
            return Err(LoadgenError::TooManyFiles {
                path: dir.to_path_buf(),
                limit: MAX_INPUT_FILES,
            });
        }
        bytes = bytes.saturating_add(meta.len());
        if bytes > MAX_INPUT_BYTES {
            return Err(LoadgenError::InputsTooLarge {
                path: dir.to_path_buf(),
                limit: MAX_INPUT_BYTES,
            });
        }
        files.push(path);
    }
    if files.is_empty() {
        return Err(LoadgenError::NoInputs {
            path: dir.to_path_buf(),
        });
    }
    files.sort();
    let mut pool = Vec::with_capacity(files.len());
    for path in &files {
        let data = std::fs::read(path).map_err(|source| LoadgenError::Io {
            path: path.clone(),
            source,
        })?;
        pool.push(api::Sample {
            data: Some(Data::EncodedImage(data)),
        });
    }
    Ok(Samples {
        description: format!("{} images from {}", pool.len(), dir.display()),
        pool,
    })
}

/// Reads a `.npy` array whose first axis is the batch; each row becomes a tensor sample.
///
/// # Errors
/// An unreadable or malformed file, one over [`MAX_INPUT_BYTES`], or an array without a
/// batch axis, a sample shape or a row.
pub fn tensors(path: &Path) -> Result<Samples, LoadgenError> {
    let len = std::fs::metadata(path)
        .map_err(|source| LoadgenError::Io {
            path: path.to_path_buf(),
            source,
        })?
        .len();
    if len > MAX_INPUT_BYTES {
        return Err(LoadgenError::InputsTooLarge {
            path: path.to_path_buf(),
            limit: MAX_INPUT_BYTES,
        });
    }
    let a = read_npy_file(path).map_err(|source| LoadgenError::Npy {
        path: path.to_path_buf(),
        source,
    })?;
    let per: usize = a.shape.get(1..).map_or(0, |s| s.iter().product());
    let shape: Option<Vec<u32>> = a
        .shape
        .get(1..)
        .unwrap_or_default()
        .iter()
        .map(|&d| u32::try_from(d).ok())
        .collect();
    let (Some(shape), true) = (shape, a.shape.len() >= 2 && a.shape[0] > 0 && per > 0) else {
        return Err(LoadgenError::NpyShape {
            path: path.to_path_buf(),
            shape: a.shape,
        });
    };
    let pool: Vec<api::Sample> = a
        .data
        .chunks_exact(per)
        .map(|row| tensor(&shape, row))
        .collect();
    Ok(Samples {
        description: format!(
            "{} tensors of shape {:?} from {}",
            pool.len(),
            shape,
            path.display()
        ),
        pool,
    })
}

/// [`RANDOM_POOL`] tensors of `shape`, values uniform in [-1, 1) drawn from `seed`.
///
/// # Errors
/// A shape whose pool would exceed [`MAX_INPUT_BYTES`] (a catalog can claim anything).
pub fn random(shape: &[u32], seed: u64) -> Result<Samples, LoadgenError> {
    let elements = shape
        .iter()
        .try_fold(1u64, |acc, &d| acc.checked_mul(u64::from(d)))
        .filter(|&n| n.saturating_mul(4 * RANDOM_POOL as u64) <= MAX_INPUT_BYTES);
    let Some(elements) = elements else {
        return Err(LoadgenError::InputsTooLarge {
            path: "random inputs".into(),
            limit: MAX_INPUT_BYTES,
        });
    };
    let mut rng = SplitMix64(seed);
    let pool = (0..RANDOM_POOL)
        .map(|_| {
            let values: Vec<f32> = (0..elements).map(|_| rng.unit() * 2.0 - 1.0).collect();
            tensor(shape, &values)
        })
        .collect();
    Ok(Samples {
        description: format!("random tensors of shape {shape:?} (seed {seed})"),
        pool,
    })
}

fn tensor(shape: &[u32], values: &[f32]) -> api::Sample {
    api::Sample {
        data: Some(Data::Tensor(api::Tensor {
            shape: shape.to_vec(),
            f32_le: values.iter().flat_map(|v| v.to_le_bytes()).collect(),
        })),
    }
}

/// splitmix64 (Steele, Lea & Flood, "Fast splittable pseudorandom number generators", 2014):
/// a seeded, portable stream, so the same seed sends the same inputs on every machine.
pub(crate) struct SplitMix64(pub(crate) u64);

impl SplitMix64 {
    pub(crate) fn next_u64(&mut self) -> u64 {
        self.0 = self.0.wrapping_add(0x9e37_79b9_7f4a_7c15);
        let mut z = self.0;
        z = (z ^ (z >> 30)).wrapping_mul(0xbf58_476d_1ce4_e5b9);
        z = (z ^ (z >> 27)).wrapping_mul(0x94d0_49bb_1331_11eb);
        z ^ (z >> 31)
    }

    /// Uniform in [0, 1) with 24 random bits, all exactly representable in f32.
    pub(crate) fn unit(&mut self) -> f32 {
        (self.next_u64() >> 40) as f32 / (1u64 << 24) as f32
    }
}

/// Builds request `i` of a run from the pool.
#[derive(Clone, Debug)]
pub(crate) struct RequestMaker {
    pub(crate) pool: std::sync::Arc<Vec<api::Sample>>,
    pub(crate) per_request: usize,
    pub(crate) model: String,
    pub(crate) version: String,
}

impl RequestMaker {
    /// Request `i` holds pool samples `i·k, i·k + 1, …, i·k + k − 1` (modulo the pool size).
    pub(crate) fn request(&self, i: u64) -> api::PredictRequest {
        let n = self.pool.len() as u64;
        let first = i.wrapping_mul(self.per_request as u64);
        let samples = (0..self.per_request as u64)
            .map(|j| self.pool[(first.wrapping_add(j) % n.max(1)) as usize].clone())
            .collect();
        api::PredictRequest {
            model: self.model.clone(),
            version: self.version.clone(),
            samples,
            // The ranked classes are not looked at; one keeps replies small.
            top_k: 1,
            all_scores: false,
            tag: String::new(),
        }
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn pool_of(n: usize) -> std::sync::Arc<Vec<api::Sample>> {
        std::sync::Arc::new((0..n).map(|i| tensor(&[1], &[i as f32])).collect())
    }

    fn ids(r: &api::PredictRequest) -> Vec<f32> {
        r.samples
            .iter()
            .map(|s| match &s.data {
                Some(Data::Tensor(t)) => f32::from_le_bytes(t.f32_le[..4].try_into().unwrap()),
                _ => unreachable!(),
            })
            .collect()
    }

    /// Round-robin by hand: a pool of 5 and 2 samples per request gives [0,1], [2,3], [4,0],
    /// [1,2], …
    #[test]
    fn requests_cycle_through_the_pool() {
        let m = RequestMaker {
            pool: pool_of(5),
            per_request: 2,
            model: "m".into(),
            version: String::new(),
        };
        assert_eq!(ids(&m.request(0)), [0.0, 1.0]);
        assert_eq!(ids(&m.request(2)), [4.0, 0.0]);
        assert_eq!(ids(&m.request(3)), [1.0, 2.0]);
        assert_eq!(m.request(7).model, "m");
    }

    /// splitmix64 from seed 1234567: first outputs 6457827717110365317 and
    /// 3203168211198807973, the expected values of Rosetta Code's "Pseudo-random
    /// numbers/Splitmix64" task (quoted from memory).
    #[test]
    fn random_tensors_are_seeded_and_in_range() {
        let mut rng = SplitMix64(1234567);
        assert_eq!(rng.next_u64(), 6457827717110365317);
        assert_eq!(rng.next_u64(), 3203168211198807973);
        let a = random(&[1, 4, 4], 9).unwrap();
        let b = random(&[1, 4, 4], 9).unwrap();
        assert_eq!(a.pool, b.pool);
        assert_eq!(a.pool.len(), RANDOM_POOL);
        for s in &a.pool {
            let Some(Data::Tensor(t)) = &s.data else {
                panic!("not a tensor")
            };
            assert_eq!(t.f32_le.len(), 16 * 4);
            for c in t.f32_le.chunks_exact(4) {
                let v = f32::from_le_bytes(c.try_into().unwrap());
                assert!((-1.0..1.0).contains(&v));
            }
        }
        assert!(matches!(
            random(&[u32::MAX, u32::MAX], 1),
            Err(LoadgenError::InputsTooLarge { .. })
        ));
    }
}
