//! NumPy `.npy` files: the batch files `convoy run` reads and writes.
//!
//! Owns the whole round trip between a `.npy` byte stream and an
//! [`NpyArray`] (shape plus `f32` data in C order, first axis = batch).
//! Reading goes preamble → header dict → data: [`read_npy`] checks the
//! magic string and format version, parses the header's Python literal dict
//! with a small parser of its own (nothing is evaluated), checks the declared
//! size against [`MAX_DATA_BYTES`] and against the bytes actually present,
//! and only then allocates and converts the elements to `f32`, reordering
//! Fortran-order data into C order. Writing ([`write_npy`]) always produces
//! format version 1.0 with dtype `<f4`.
//!
//! The layout follows NumPy Enhancement Proposal 1 ("A simple file format for
//! NumPy arrays") as updated by the `numpy.lib.format` module documentation
//! (NumPy 2.4): a 6-byte magic `\x93NUMPY`, a major and a minor version byte,
//! a little-endian header length (2 bytes in version 1.0, 4 bytes in 2.0 and
//! 3.0), then the header, an ASCII (3.0: UTF-8) dict literal with the keys
//! `descr`, `fortran_order` and `shape`, newline-terminated and space-padded
//! so the data starts on a multiple of 64 bytes. The NEP itself asked for
//! 16-byte alignment; the `numpy.lib.format` documentation is the newer text
//! and says 64, which is what NumPy writes (checked by `tests/npy_numpy.rs`
//! against files NumPy 2.4 wrote).

use std::fs::File;
use std::io::{self, Read, Seek, SeekFrom};
use std::path::{Path, PathBuf};

mod header;

use header::{Header, parse_header};

/// The first six bytes of every `.npy` file (`numpy.lib.format` docs).
pub const MAGIC: &[u8; 6] = b"\x93NUMPY";

/// Largest header we accept, checked before the header is copied anywhere.
/// NumPy itself only writes headers this long for structured dtypes with
/// many fields, which we reject anyway; plain dtypes need about 128 bytes.
pub const MAX_HEADER_LEN: usize = 64 * 1024;

/// Largest array we accept, in bytes: the larger of the stored data and the
/// `f32` array it becomes (a `|u1` file grows fourfold). Checked against the
/// header, and the header against the file size, before any allocation.
pub const MAX_DATA_BYTES: u64 = 4 << 30;

/// Most dimensions an array may have. NumPy 2.x refuses more than 64
/// (its error reads "maximum supported dimension for an ndarray is currently
/// 64", checked with NumPy 2.4.6).
pub const MAX_NDIM: usize = 64;

/// Data alignment the writer produces (`numpy.lib.format` docs, version 1.0).
const ALIGN: usize = 64;

/// Deepest nesting of tuples, lists and dicts the header parser follows, so
/// a hostile header cannot exhaust the stack. A structured dtype, the
/// deepest thing NumPy writes, needs three or four levels.
const MAX_NESTING: usize = 16;

/// An array read from or written to a `.npy` file.
#[derive(Debug, Clone, PartialEq)]
pub struct NpyArray {
    /// Dimensions, outermost first; empty for a 0-d array (one element).
    pub shape: Vec<usize>,
    /// Elements in C (row-major) order.
    pub data: Vec<f32>,
}

/// Why a `.npy` file could not be read or written.
#[derive(Debug, thiserror::Error)]
pub enum NpyError {
    #[error("not a .npy file: it starts with {found:02x?} instead of the magic string \\x93NUMPY")]
    BadMagic { found: Vec<u8> },
    #[error("file is {len} bytes long, shorter than the {needed}-byte .npy preamble")]
    TruncatedPreamble { len: usize, needed: usize },
    #[error("unsupported .npy format version {major}.{minor} (1.0, 2.0 and 3.0 are read)")]
    UnsupportedVersion { major: u8, minor: u8 },
    #[error("header declares {len} bytes, more than the {max}-byte limit")]
    HeaderTooLong { len: u64, max: usize },
    #[error("header declares {declared} bytes but only {available} follow the preamble")]
    TruncatedHeader { declared: usize, available: usize },
    #[error("malformed header at byte {offset}: expected {expected}")]
    MalformedHeader {
        offset: usize,
        expected: &'static str,
    },
    #[error("header dict has no '{key}' key")]
    MissingKey { key: &'static str },
    #[error("header dict has the unexpected key '{key}'")]
    UnexpectedKey { key: String },
    #[error("header dict has the key '{key}' twice")]
    DuplicateKey { key: &'static str },
    #[error("header value for '{key}' must be {expected}")]
    BadValue {
        key: &'static str,
        expected: &'static str,
    },
    #[error(
        "unsupported dtype {descr} (readable: bool, u1/u2/u4/u8, i1/i2/i4/i8, f2/f4/f8 in either byte order)"
    )]
    UnsupportedDtype { descr: String },
    #[error("array has {ndim} dimensions, more than the {max} allowed")]
    TooManyDims { ndim: usize, max: usize },
    #[error("dimension {axis} of the shape does not fit in a machine word")]
    DimensionTooLarge { axis: usize },
    #[error("the element count of shape {shape:?} overflows")]
    ElementCountOverflow { shape: Vec<usize> },
    #[error("array needs {bytes} bytes, more than the {max}-byte limit")]
    DataTooLarge { bytes: u64, max: u64 },
    #[error("shape and dtype call for {expected} data bytes but the file holds {actual}")]
    DataLengthMismatch { expected: u64, actual: u64 },
    #[error("shape {shape:?} does not hold the {elements} elements given")]
    ShapeMismatch { shape: Vec<usize>, elements: usize },
    #[error("{path}: {source}")]
    Io {
        path: PathBuf,
        #[source]
        source: io::Error,
    },
}

/// Parses a whole `.npy` file held in memory.
///
/// # Errors
/// Any [`NpyError`] but `Io` and `ShapeMismatch`: a bad preamble or header,
/// an unsupported dtype, a size over the limits, or data of the wrong length.
pub fn read_npy(bytes: &[u8]) -> Result<NpyArray, NpyError> {
    let layout = parse_layout(bytes)?;
    let data = &bytes[layout.data_start.min(bytes.len())..];
    check_data_len(&layout, data.len() as u64)?;
    Ok(layout.decode(data))
}

/// Reads a `.npy` file, looking at the header before reading the data so an
/// oversized or inconsistent file is refused without allocating for it.
///
/// # Errors
/// As [`read_npy`], plus [`NpyError::Io`] when the file cannot be read.
pub fn read_npy_file(path: &Path) -> Result<NpyArray, NpyError> {
    let io_err = |source| NpyError::Io {
        path: path.to_path_buf(),
        source,
    };
    let mut file = File::open(path).map_err(io_err)?;
    let meta = file.metadata().map_err(io_err)?;
    if !meta.is_file() {
        // A pipe or device has no length to check up front; read at most one
        // byte more than any acceptable file so the limit still holds.
        let limit = (12 + MAX_HEADER_LEN) as u64 + MAX_DATA_BYTES;
        let mut bytes = Vec::new();
        file.take(limit + 1)
            .read_to_end(&mut bytes)
            .map_err(io_err)?;
        if bytes.len() as u64 > limit {
            return Err(NpyError::DataTooLarge {
                bytes: bytes.len() as u64,
                max: MAX_DATA_BYTES,
            });
        }
        return read_npy(&bytes);
    }
    let file_len = meta.len();
    // The preamble is at most 12 bytes, so this prefix holds any header we
    // are willing to parse.
    let head_len = file_len.min((12 + MAX_HEADER_LEN) as u64) as usize;
    let mut head = vec![0u8; head_len];
    file.read_exact(&mut head).map_err(io_err)?;
    let layout = parse_layout(&head)?;
    check_data_len(&layout, file_len.saturating_sub(layout.data_start as u64))?;
    let mut data = vec![0u8; layout.data_bytes];
    file.seek(SeekFrom::Start(layout.data_start as u64))
        .map_err(io_err)?;
    file.read_exact(&mut data).map_err(io_err)?;
    Ok(layout.decode(&data))
}

/// Serialises `data` with the given shape as a version 1.0 `.npy` file of
/// little-endian `f32` (`<f4`) in C order.
///
/// The header is padded so the data starts at a multiple of 64 bytes, as the
/// `numpy.lib.format` documentation prescribes. A shape so long that the
/// header passes 65535 bytes switches to version 2.0, as NumPy does.
///
/// # Panics
/// If the product of `shape` differs from `data.len()`: that is a bug in the
/// caller, not bad input. [`write_npy_file`] checks first and returns
/// [`NpyError::ShapeMismatch`] instead.
pub fn write_npy(shape: &[usize], data: &[f32]) -> Vec<u8> {
    assert!(
        element_count(shape) == Some(data.len()),
        "write_npy: shape {shape:?} does not hold {} elements",
        data.len()
    );
    let dims: Vec<String> = shape.iter().map(usize::to_string).collect();
    // Python's repr of a tuple: `()`, `(5,)`, `(2, 3)`.
    let shape_repr = match dims.len() {
        1 => format!("({},)", dims[0]),
        _ => format!("({})", dims.join(", ")),
    };
    // Same text and key order as NumPy's own writer, which sorts the keys
    // as the format documentation says a writer SHOULD.
    let dict = format!("{{'descr': '<f4', 'fortran_order': False, 'shape': {shape_repr}, }}");
    let v1_unpadded = MAGIC.len() + 2 + 2 + dict.len() + 1;
    let (major, len_bytes) = if v1_unpadded + ALIGN <= usize::from(u16::MAX) {
        (1u8, 2)
    } else {
        (2u8, 4)
    };
    let unpadded = MAGIC.len() + 2 + len_bytes + dict.len() + 1;
    let header_len = dict.len() + unpadded.next_multiple_of(ALIGN) - unpadded + 1;

    let mut out = Vec::with_capacity(unpadded.next_multiple_of(ALIGN) + 4 * data.len());
    out.extend_from_slice(MAGIC);
    out.extend_from_slice(&[major, 0]);
    if major == 1 {
        // Fits: version 1.0 was chosen only when the padded header is below
        // u16::MAX.
        out.extend_from_slice(&(header_len as u16).to_le_bytes());
    } else {
        // Fits: a header of 4 GiB would need a shape of that many digits.
        out.extend_from_slice(&(header_len as u32).to_le_bytes());
    }
    out.extend_from_slice(dict.as_bytes());
    out.resize(out.len() + header_len - dict.len() - 1, b' ');
    out.push(b'\n');
    for x in data {
        out.extend_from_slice(&x.to_le_bytes());
    }
    out
}

/// Writes `data` with the given shape to `path` in the format of
/// [`write_npy`].
///
/// # Errors
/// [`NpyError::ShapeMismatch`] if the shape does not hold `data.len()`
/// elements, [`NpyError::Io`] if the file cannot be written.
pub fn write_npy_file(path: &Path, shape: &[usize], data: &[f32]) -> Result<(), NpyError> {
    if element_count(shape) != Some(data.len()) {
        return Err(NpyError::ShapeMismatch {
            shape: shape.to_vec(),
            elements: data.len(),
        });
    }
    std::fs::write(path, write_npy(shape, data)).map_err(|source| NpyError::Io {
        path: path.to_path_buf(),
        source,
    })
}

fn element_count(shape: &[usize]) -> Option<usize> {
    shape.iter().try_fold(1usize, |n, &d| n.checked_mul(d))
}

/// Everything the preamble and header say, with sizes already checked
/// against the limits.
#[derive(Debug)]
struct Layout {
    dtype: Dtype,
    fortran_order: bool,
    shape: Vec<usize>,
    data_start: usize,
    data_bytes: usize,
}

impl Layout {
    /// Converts data whose length [`check_data_len`] has accepted.
    fn decode(self, raw: &[u8]) -> NpyArray {
        let flat = self.dtype.decode(raw);
        let data = if self.fortran_order {
            fortran_to_c(&self.shape, flat)
        } else {
            flat
        };
        NpyArray {
            shape: self.shape,
            data,
        }
    }
}

fn check_data_len(layout: &Layout, actual: u64) -> Result<(), NpyError> {
    if actual == layout.data_bytes as u64 {
        Ok(())
    } else {
        Err(NpyError::DataLengthMismatch {
            expected: layout.data_bytes as u64,
            actual,
        })
    }
}

/// Reads the preamble and header from the start of a file; `bytes` may stop
/// anywhere after the header.
fn parse_layout(bytes: &[u8]) -> Result<Layout, NpyError> {
    let magic = &bytes[..bytes.len().min(MAGIC.len())];
    if magic != MAGIC.as_slice() {
        return if MAGIC.starts_with(magic) {
            Err(NpyError::TruncatedPreamble {
                len: bytes.len(),
                needed: 10,
            })
        } else {
            Err(NpyError::BadMagic {
                found: magic.to_vec(),
            })
        };
    }
    let (major, minor) = match bytes.get(6..8) {
        Some(&[major, minor]) => (major, minor),
        _ => {
            return Err(NpyError::TruncatedPreamble {
                len: bytes.len(),
                needed: 10,
            });
        }
    };
    let len_bytes = match (major, minor) {
        (1, 0) => 2,
        (2, 0) | (3, 0) => 4,
        _ => return Err(NpyError::UnsupportedVersion { major, minor }),
    };
    let header_start = 8 + len_bytes;
    let Some(len_field) = bytes.get(8..header_start) else {
        return Err(NpyError::TruncatedPreamble {
            len: bytes.len(),
            needed: header_start,
        });
    };
    let header_len = len_field
        .iter()
        .rev()
        .fold(0u64, |acc, &b| (acc << 8) | u64::from(b));
    if header_len > MAX_HEADER_LEN as u64 {
        return Err(NpyError::HeaderTooLong {
            len: header_len,
            max: MAX_HEADER_LEN,
        });
    }
    let header_len = header_len as usize; // at most MAX_HEADER_LEN
    let data_start = header_start + header_len;
    let Some(header) = bytes.get(header_start..data_start) else {
        return Err(NpyError::TruncatedHeader {
            declared: header_len,
            available: bytes.len() - header_start,
        });
    };
    let Header {
        dtype,
        fortran_order,
        shape,
    } = parse_header(header)?;

    // The product of the non-zero dims must fit even when a zero makes the
    // array empty, so later stride arithmetic on the shape cannot overflow.
    let nonzero = shape.iter().filter(|&&d| d != 0);
    let Some(nonzero_count) = nonzero.copied().try_fold(1usize, usize::checked_mul) else {
        return Err(NpyError::ElementCountOverflow { shape });
    };
    let count = if shape.contains(&0) { 0 } else { nonzero_count };
    let stored = (count as u64).checked_mul(dtype.size as u64);
    let Some(stored) = stored else {
        return Err(NpyError::ElementCountOverflow { shape });
    };
    // An f32 is 4 bytes; the result and the stored bytes both stay in memory.
    let needed = stored.max((count as u64).saturating_mul(4));
    if needed > MAX_DATA_BYTES || usize::try_from(needed).is_err() {
        return Err(NpyError::DataTooLarge {
            bytes: needed,
            max: MAX_DATA_BYTES,
        });
    }
    Ok(Layout {
        dtype,
        fortran_order,
        shape,
        data_start,
        // Fits: `needed` >= `stored` passed the usize check above.
        data_bytes: stored as usize,
    })
}

/// Element types we convert to `f32`.
#[derive(Debug, Clone, Copy, PartialEq, Eq)]
enum Kind {
    Bool,
    Unsigned,
    Signed,
    Float,
}

#[derive(Debug, Clone, Copy, PartialEq, Eq)]
struct Dtype {
    kind: Kind,
    size: usize,
    big_endian: bool,
}

impl Dtype {
    /// Parses a simple array-protocol type string such as `<f4` or `|u1`:
    /// byte order, kind, size in bytes. NumPy writes `|` ("not applicable")
    /// for one-byte types and `<` or `>` for the rest; `=` (native) never
    /// appears in files NumPy writes, so it is refused rather than guessed.
    fn parse(descr: &[u8]) -> Option<Dtype> {
        let (&order, rest) = descr.split_first()?;
        let (&kind, size) = rest.split_first()?;
        let kind = match kind {
            b'b' => Kind::Bool,
            b'u' => Kind::Unsigned,
            b'i' => Kind::Signed,
            b'f' => Kind::Float,
            _ => return None,
        };
        let size = match size {
            b"1" => 1,
            b"2" => 2,
            b"4" => 4,
            b"8" => 8,
            _ => return None,
        };
        let big_endian = match order {
            b'<' => false,
            b'>' => true,
            b'|' if size == 1 => false,
            _ => return None,
        };
        let known = match kind {
            Kind::Bool => size == 1,
            Kind::Unsigned | Kind::Signed => true,
            Kind::Float => size >= 2,
        };
        known.then_some(Dtype {
            kind,
            size,
            big_endian,
        })
    }

    /// Converts stored elements to `f32`. Integers and `f8` round to the
    /// nearest `f32` (ties to even, what Rust's `as` does and what NumPy's
    /// `astype(np.float32)` gives); `f2` and `f4` are exact.
    fn decode(self, raw: &[u8]) -> Vec<f32> {
        macro_rules! each {
            ($t:ty, $n:literal, $f:expr) => {
                if self.big_endian {
                    convert::<$n>(raw, |b| $f(<$t>::from_be_bytes(b)))
                } else {
                    convert::<$n>(raw, |b| $f(<$t>::from_le_bytes(b)))
                }
            };
        }
        match (self.kind, self.size) {
            (Kind::Bool, _) => convert::<1>(raw, |[b]| if b == 0 { 0.0 } else { 1.0 }),
            (Kind::Unsigned, 1) => convert::<1>(raw, |[b]| f32::from(b)),
            (Kind::Signed, 1) => convert::<1>(raw, |b| f32::from(i8::from_le_bytes(b))),
            (Kind::Unsigned, 2) => each!(u16, 2, f32::from),
            (Kind::Signed, 2) => each!(i16, 2, f32::from),
            (Kind::Unsigned, 4) => each!(u32, 4, |v| v as f32),
            (Kind::Signed, 4) => each!(i32, 4, |v| v as f32),
            (Kind::Unsigned, _) => each!(u64, 8, |v| v as f32),
            (Kind::Signed, _) => each!(i64, 8, |v| v as f32),
            (Kind::Float, 2) => each!(u16, 2, f16_to_f32),
            (Kind::Float, 4) => each!(f32, 4, |v| v),
            (Kind::Float, _) => each!(f64, 8, |v| v as f32),
        }
    }
}

fn convert<const N: usize>(raw: &[u8], f: impl Fn([u8; N]) -> f32) -> Vec<f32> {
    raw.chunks_exact(N)
        .map(|chunk| {
            let mut bytes = [0u8; N];
            // Cannot panic: `chunks_exact` yields chunks of exactly N bytes.
            bytes.copy_from_slice(chunk);
            f(bytes)
        })
        .collect()
}

/// Converts an IEEE 754 binary16 value to binary32. Exact: every half is an
/// f32 (IEEE 754-2008, section 3.6, formats table). NaN payloads are kept in
/// the top mantissa bits.
fn f16_to_f32(h: u16) -> f32 {
    let sign = u32::from(h >> 15) << 31;
    let exp = u32::from((h >> 10) & 0x1f);
    let man = u32::from(h & 0x3ff);
    let bits = match exp {
        0 => {
            // Zero or subnormal: man × 2^-24, exact since man < 2^10.
            let magnitude = man as f32 * f32::from_bits(0x3380_0000); // 2^-24
            magnitude.to_bits() | sign
        }
        0x1f => sign | 0x7f80_0000 | (man << 13),
        // Rebias the exponent from 15 to 127.
        _ => sign | ((exp + 127 - 15) << 23) | (man << 13),
    };
    f32::from_bits(bits)
}

/// Reorders column-major elements (axis 0 varies fastest) into row-major.
fn fortran_to_c(shape: &[usize], src: Vec<f32>) -> Vec<f32> {
    if shape.len() < 2 || src.is_empty() {
        return src; // one axis or no elements: both orders coincide
    }
    let mut strides = Vec::with_capacity(shape.len());
    let mut stride = 1usize;
    for &d in shape {
        strides.push(stride);
        // No overflow: the product of all dims is src.len().
        stride *= d;
    }
    let mut out = Vec::with_capacity(src.len());
    let mut index = vec![0usize; shape.len()];
    let mut offset = 0usize;
    for _ in 0..src.len() {
        // In bounds: offset = Σ index[k]·strides[k] with index[k] < shape[k].
        out.push(src[offset]);
        for axis in (0..shape.len()).rev() {
            index[axis] += 1;
            offset += strides[axis];
            if index[axis] < shape[axis] {
                break;
            }
            offset -= strides[axis] * shape[axis];
            index[axis] = 0;
        }
    }
    out
}

#[cfg(test)]
mod tests {
    use super::*;

    fn file_with_header(version: u8, dict: &str, data: &[u8]) -> Vec<u8> {
        let mut out = MAGIC.to_vec();
        out.extend_from_slice(&[version, 0]);
        if version == 1 {
            out.extend_from_slice(&(dict.len() as u16).to_le_bytes());
        } else {
            out.extend_from_slice(&(dict.len() as u32).to_le_bytes());
        }
        out.extend_from_slice(dict.as_bytes());
        out.extend_from_slice(data);
        out
    }

    #[test]
    fn writer_output_matches_numpy_header_text_and_alignment() {
        // Header text as NumPy 2.4.6's np.save writes it for a (2, 3) float32
        // array (see tests/data/npy/make_npy.py).
        let bytes = write_npy(&[2, 3], &[0.0, 1.0, 2.0, 3.0, 4.0, 5.0]);
        assert_eq!(&bytes[..8], b"\x93NUMPY\x01\x00");
        let header_len = usize::from(u16::from_le_bytes([bytes[8], bytes[9]]));
        assert_eq!((10 + header_len) % 64, 0);
        assert!(
            bytes[10..].starts_with(b"{'descr': '<f4', 'fortran_order': False, 'shape': (2, 3), }")
        );
        assert_eq!(bytes[10 + header_len - 1], b'\n');
        assert_eq!(bytes.len(), 10 + header_len + 24);
        let back = read_npy(&bytes).unwrap();
        assert_eq!(back.shape, [2, 3]);
        assert_eq!(back.data, [0.0, 1.0, 2.0, 3.0, 4.0, 5.0]);
    }

    #[test]
    fn shape_reprs_follow_python_tuples() {
        for (shape, repr) in [(&[][..], "()"), (&[5][..], "(5,)"), (&[0, 4][..], "(0, 4)")] {
            let n = shape.iter().product();
            let bytes = write_npy(shape, &vec![1.5; n]);
            let text = String::from_utf8_lossy(&bytes[10..]);
            assert!(text.contains(&format!("'shape': {repr}, }}")), "{text}");
            assert_eq!(read_npy(&bytes).unwrap().shape, shape);
        }
    }

    #[test]
    fn header_tolerates_spacing_key_order_and_trailing_commas() {
        let dict = "{ \"shape\" : ( 2 , ) ,'fortran_order':False,\n 'descr':'<f4',}   \n";
        let bytes = file_with_header(1, dict, &[0, 0, 128, 63, 0, 0, 0, 64]);
        let a = read_npy(&bytes).unwrap();
        assert_eq!(a.shape, [2]);
        assert_eq!(a.data, [1.0, 2.0]);
    }

    #[test]
    fn header_errors_are_specific() {
        type Check = fn(&NpyError) -> bool;
        let cases: [(&str, Check); 9] = [
            (
                "{'descr': '|O', 'fortran_order': False, 'shape': (2,)}",
                |e| matches!(e, NpyError::UnsupportedDtype { descr } if descr == "|O"),
            ),
            (
                "{'descr': [('a', '<f4')], 'fortran_order': False, 'shape': (2,)}",
                |e| matches!(e, NpyError::UnsupportedDtype { descr } if descr == "[('a', '<f4')]"),
            ),
            (
                "{'descr': '<f4', 'fortran_order': False, 'shape': (2)}",
                |e| matches!(e, NpyError::BadValue { key: "shape", .. }),
            ),
            (
                "{'descr': '<f4', 'fortran_order': False, 'shape': (-1,)}",
                |e| matches!(e, NpyError::BadValue { key: "shape", .. }),
            ),
            ("{'descr': '<f4', 'fortran_order': 0, 'shape': (2,)}", |e| {
                matches!(
                    e,
                    NpyError::BadValue {
                        key: "fortran_order",
                        ..
                    }
                )
            }),
            ("{'descr': '<f4', 'shape': (2,)}", |e| {
                matches!(
                    e,
                    NpyError::MissingKey {
                        key: "fortran_order"
                    }
                )
            }),
            (
                "{'descr': '<f4', 'descr': '<f4', 'fortran_order': False, 'shape': (2,)}",
                |e| matches!(e, NpyError::DuplicateKey { key: "descr" }),
            ),
            (
                "{'descr': '<f4', 'fortran_order': False, 'shape': (2,), 'x': 1}",
                |e| matches!(e, NpyError::UnexpectedKey { key } if key == "x"),
            ),
            (
                "{'descr': '<f4', 'fortran_order': False, 'shape': (2,)} junk",
                |e| matches!(e, NpyError::MalformedHeader { offset: 56, .. }),
            ),
        ];
        for (dict, check) in cases {
            let err = read_npy(&file_with_header(1, dict, &[0; 8])).unwrap_err();
            assert!(check(&err), "{dict}: {err:?}");
        }
    }

    #[test]
    fn preamble_and_size_errors() {
        let good = write_npy(&[2], &[1.0, 2.0]);
        assert!(matches!(
            read_npy(b"PK\x03\x04xxxxxxxx"),
            Err(NpyError::BadMagic { .. })
        ));
        assert!(matches!(
            read_npy(&good[..7]),
            Err(NpyError::TruncatedPreamble { .. })
        ));
        let mut v4 = good.clone();
        v4[6] = 4;
        assert!(matches!(
            read_npy(&v4),
            Err(NpyError::UnsupportedVersion { major: 4, minor: 0 })
        ));
        assert!(matches!(
            read_npy(&good[..40]),
            Err(NpyError::TruncatedHeader { .. })
        ));
        assert!(matches!(
            read_npy(&good[..good.len() - 1]),
            Err(NpyError::DataLengthMismatch {
                expected: 8,
                actual: 7
            })
        ));
        let mut long = MAGIC.to_vec();
        long.extend_from_slice(&[2, 0, 0, 0, 0, 1]); // 16 MiB header
        assert!(matches!(
            read_npy(&long),
            Err(NpyError::HeaderTooLong {
                len: 0x0100_0000,
                ..
            })
        ));
        let huge = "{'descr': '<f4', 'fortran_order': False, 'shape': (1073741824, 2)}";
        assert!(matches!(
            read_npy(&file_with_header(1, huge, &[])),
            Err(NpyError::DataTooLarge {
                bytes: 0x2_0000_0000,
                ..
            })
        ));
        let overflow =
            "{'descr': '<f8', 'fortran_order': False, 'shape': (4294967296, 4294967296)}";
        assert!(matches!(
            read_npy(&file_with_header(1, overflow, &[])),
            Err(NpyError::ElementCountOverflow { .. } | NpyError::DataTooLarge { .. })
        ));
        let too_big =
            "{'descr': '<f8', 'fortran_order': False, 'shape': (99999999999999999999999,)}";
        assert!(matches!(
            read_npy(&file_with_header(1, too_big, &[])),
            Err(NpyError::DimensionTooLarge { axis: 0 })
        ));
        let deep = format!(
            "{{'descr': {}'<f4'{}, 'fortran_order': False, 'shape': ()}}",
            "[".repeat(100),
            "]".repeat(100)
        );
        assert!(matches!(
            read_npy(&file_with_header(1, &deep, &[])),
            Err(NpyError::MalformedHeader { .. })
        ));
    }

    #[test]
    fn zero_dims_do_not_hide_overflow() {
        // A zero-size array with an absurd shape would still overflow any
        // later stride arithmetic, so it is refused too.
        let dict = format!(
            "{{'descr': '<f4', 'fortran_order': False, 'shape': (0, {m}, {m})}}",
            m = usize::MAX
        );
        assert!(matches!(
            read_npy(&file_with_header(1, &dict, &[])),
            Err(NpyError::ElementCountOverflow { .. })
        ));
    }

    #[test]
    fn half_conversion_is_exact() {
        // Bit patterns and values from IEEE 754-2008 binary16 (exponent bias
        // 15, 10 mantissa bits).
        assert_eq!(f16_to_f32(0x3c00), 1.0);
        assert_eq!(f16_to_f32(0xc000), -2.0);
        assert_eq!(f16_to_f32(0x7bff), 65504.0); // largest finite half
        assert_eq!(f16_to_f32(0x0001), 2f32.powi(-24)); // smallest subnormal
        assert_eq!(f16_to_f32(0x03ff), 1023.0 * 2f32.powi(-24)); // largest subnormal
        assert_eq!(f16_to_f32(0x0400), 2f32.powi(-14)); // smallest normal
        assert_eq!(f16_to_f32(0x8000).to_bits(), 0x8000_0000); // -0.0
        assert_eq!(f16_to_f32(0x7c00), f32::INFINITY);
        assert_eq!(f16_to_f32(0xfc00), f32::NEG_INFINITY);
        assert!(f16_to_f32(0x7e00).is_nan());
        assert_eq!(f16_to_f32(0x3555), 0.333_251_95); // 1365/4096
    }

    #[test]
    fn fortran_order_becomes_c_order() {
        // Column-major storage of [[0, 1, 2], [3, 4, 5]] is 0 3 1 4 2 5.
        let data: Vec<u8> = [0i32, 3, 1, 4, 2, 5]
            .iter()
            .flat_map(|v| v.to_be_bytes())
            .collect();
        let dict = "{'descr': '>i4', 'fortran_order': True, 'shape': (2, 3), }";
        let a = read_npy(&file_with_header(2, dict, &data)).unwrap();
        assert_eq!(a.shape, [2, 3]);
        assert_eq!(a.data, [0.0, 1.0, 2.0, 3.0, 4.0, 5.0]);
    }

    #[test]
    fn file_round_trip_and_shape_check() {
        let dir = std::env::temp_dir().join(format!("convoy-npy-unit-{}", std::process::id()));
        std::fs::create_dir_all(&dir).unwrap();
        let path = dir.join("a.npy");
        write_npy_file(&path, &[3, 1], &[1.0, -2.0, 0.5]).unwrap();
        let a = read_npy_file(&path).unwrap();
        assert_eq!((a.shape, a.data), (vec![3, 1], vec![1.0, -2.0, 0.5]));
        assert!(matches!(
            write_npy_file(&path, &[2, 2], &[1.0]),
            Err(NpyError::ShapeMismatch { elements: 1, .. })
        ));
        assert!(matches!(
            read_npy_file(&dir.join("missing.npy")),
            Err(NpyError::Io { .. })
        ));
        std::fs::remove_dir_all(&dir).unwrap();
    }

    /// xorshift64* (Vigna, "An experimental exploration of Marsaglia's
    /// xorshift generators, scrambled", 2016): enough randomness for fuzzing
    /// without a dependency.
    struct Rng(u64);
    impl Rng {
        fn next(&mut self) -> u64 {
            self.0 ^= self.0 >> 12;
            self.0 ^= self.0 << 25;
            self.0 ^= self.0 >> 27;
            self.0.wrapping_mul(0x2545_f491_4f6c_dd1d)
        }
    }

    #[test]
    fn truncated_or_corrupted_files_never_panic() {
        let seeds = [
            write_npy(&[2, 3], &[1.0, 2.0, 3.0, 4.0, 5.0, 6.0]),
            write_npy(&[], &[7.0]),
            file_with_header(
                3,
                "{'descr': '>f2', 'fortran_order': True, 'shape': (2, 2), }\n",
                &[0x3c, 0, 0x40, 0, 0x7c, 0, 0x80, 1],
            ),
        ];
        let mut rng = Rng(0x9e37_79b9_7f4a_7c15);
        for file in &seeds {
            assert!(read_npy(file).is_ok());
            for len in 0..file.len() {
                assert!(read_npy(&file[..len]).is_err(), "prefix of {len} bytes");
            }
            for _ in 0..2000 {
                let mut bad = file.clone();
                for _ in 0..1 + rng.next() % 3 {
                    let at = (rng.next() % bad.len() as u64) as usize;
                    bad[at] ^= 1 << (rng.next() % 8);
                }
                let _ = read_npy(&bad);
            }
        }
    }
}
