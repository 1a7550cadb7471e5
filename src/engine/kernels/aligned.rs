//! A float buffer that starts on a cache line.

use std::ops::{Deref, DerefMut};

/// A growable `f32` buffer whose contents start on a 64-byte boundary, so that packed panels
/// and rows whose length is a multiple of 16 floats line up with cache lines: full-width
/// vector loads and stores never straddle two lines, and threads given whole lines of a row
/// never write the same one.
#[derive(Default)]
pub struct AlignedBuf {
    raw: Vec<f32>,
    /// Where the aligned contents start in `raw`.
    offset: usize,
    len: usize,
}

impl AlignedBuf {
    const ALIGN_FLOATS: usize = 16;

    /// Makes the contents `len` floats long, allocating only when `len` exceeds every earlier
    /// length. The values are left from earlier use (or zero): callers overwrite them.
    pub fn set_len(&mut self, len: usize) {
        let need = len + Self::ALIGN_FLOATS;
        if self.raw.len() < need {
            self.raw.resize(need, 0.0);
            // `align_offset` may give up (usize::MAX) in theory; then run unaligned, which is
            // correct, only slower.
            let misalign = self.raw.as_ptr().align_offset(64);
            self.offset = if misalign < Self::ALIGN_FLOATS {
                misalign
            } else {
                0
            };
        }
        self.len = len;
    }

    /// [`AlignedBuf::set_len`], then the contents.
    pub fn get(&mut self, len: usize) -> &mut [f32] {
        self.set_len(len);
        self
    }
}

impl Deref for AlignedBuf {
    type Target = [f32];

    fn deref(&self) -> &[f32] {
        &self.raw[self.offset..self.offset + self.len]
    }
}

impl DerefMut for AlignedBuf {
    fn deref_mut(&mut self) -> &mut [f32] {
        &mut self.raw[self.offset..self.offset + self.len]
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn aligned_buffer_is_aligned_and_reused() {
        let mut b = AlignedBuf::default();
        let p = b.get(100).as_ptr();
        assert_eq!(p as usize % 64, 0);
        let q = b.get(50).as_ptr();
        assert_eq!(p, q, "a shorter length reuses the allocation");
        assert_eq!(b.len(), 50);
        let r = b.get(100_000).as_ptr();
        assert_eq!(r as usize % 64, 0, "still aligned after growing");
    }
}
