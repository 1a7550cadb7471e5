//! Encoded bytes → decoded pixels, with every size limit checked before the decoder allocates.
//!
//! Order of checks: the encoded length; the format, guessed from the leading bytes (never from
//! a name the client sends); the header's width × height against [`ImageLimits::max_pixels`];
//! only then the pixel data is decoded, under an allocation limit derived from the same number.

use std::io::Cursor;
use std::panic::{AssertUnwindSafe, catch_unwind};

use image::{DynamicImage, ImageDecoder, ImageFormat, ImageReader};

use super::{ImageLimits, PrepareError};

/// The formats a client may send. Anything else the `image` crate recognises by its magic bytes
/// is refused by name, so the error says what arrived.
const ACCEPTED: [ImageFormat; 6] = [
    ImageFormat::Png,
    ImageFormat::Jpeg,
    ImageFormat::Bmp,
    ImageFormat::WebP,
    ImageFormat::Gif,
    ImageFormat::Tiff,
];

/// Bytes per pixel allowed to the decoder: 8 is an RGBA image of 16-bit samples, the widest
/// pixel the accepted formats produce in practice (a 32-bit float RGBA TIFF, at 16 bytes, meets
/// [`PrepareError::DecoderLimit`] from about half of `max_pixels` on). The budget covers the decoded image and the scratch
/// buffers decoders take from the same limit (a GIF frame, TIFF strips, PNG metadata).
const ALLOC_BYTES_PER_PIXEL: u64 = 8;

/// Decodes `bytes` into pixels. GIF and other multi-frame files give their first frame.
pub(super) fn decode(bytes: &[u8], limits: &ImageLimits) -> Result<DynamicImage, PrepareError> {
    if bytes.len() > limits.max_encoded_bytes {
        return Err(PrepareError::EncodedTooLarge {
            bytes: bytes.len(),
            limit: limits.max_encoded_bytes,
        });
    }
    let mut reader = ImageReader::new(Cursor::new(bytes))
        .with_guessed_format()
        .map_err(|e| PrepareError::NotAnImage {
            reason: e.to_string(),
        })?;
    match reader.format() {
        Some(f) if ACCEPTED.contains(&f) => {}
        Some(f) => {
            return Err(PrepareError::UnsupportedFormat {
                format: format!("{f:?}"),
            });
        }
        None => {
            return Err(PrepareError::NotAnImage {
                reason: "the leading bytes match no known image format".into(),
            });
        }
    }

    if reader.format() == Some(ImageFormat::Jpeg) && !jpeg_reaches_eoi(bytes) {
        // The `image` crate runs its JPEG decoder in lenient mode, which fills a cut-off scan
        // with grey and reports success; a model would then classify half a picture. Pillow
        // refuses such files too ("image file is truncated").
        return Err(PrepareError::NotAnImage {
            reason: "JPEG data ends before its end-of-image marker (truncated)".into(),
        });
    }

    // Width and height stay unlimited here on purpose: a decoder that refused them itself would
    // report no dimensions, and the product check below gives the sender both.
    let mut decode_limits = image::Limits::default();
    decode_limits.max_image_width = None;
    decode_limits.max_image_height = None;
    decode_limits.max_alloc = Some(limits.max_pixels.saturating_mul(ALLOC_BYTES_PER_PIXEL));
    reader.limits(decode_limits.clone());

    // The decoders are third-party parsers of hostile input; a panic in one of them must end
    // this request, not the thread that serves others.
    let decoded = catch_unwind(AssertUnwindSafe(move || {
        // Reads the header only: the pixel buffer is allocated by `from_decoder` below.
        let mut decoder = reader.into_decoder().map_err(PrepareError::from_image)?;
        let (width, height) = decoder.dimensions();
        if u64::from(width) * u64::from(height) > limits.max_pixels {
            return Err(PrepareError::TooManyPixels {
                width,
                height,
                limit: limits.max_pixels,
            });
        }
        if width == 0 || height == 0 {
            return Err(PrepareError::NotAnImage {
                reason: format!("header says {width}x{height}, an image without pixels"),
            });
        }
        // As `ImageReader::decode` does: the output buffer counts against the budget, and the
        // decoder gets what remains for its scratch space.
        decode_limits
            .reserve(decoder.total_bytes())
            .map_err(PrepareError::from_image)?;
        decoder
            .set_limits(decode_limits)
            .map_err(PrepareError::from_image)?;
        DynamicImage::from_decoder(decoder).map_err(PrepareError::from_image)
    }));
    decoded.unwrap_or_else(|_| {
        Err(PrepareError::NotAnImage {
            reason: "the decoder failed on malformed data".into(),
        })
    })
}

/// Whether a JPEG stream, walked segment by segment from its SOI marker, reaches an EOI marker
/// (ITU-T T.81 § B.1: markers are 0xFF then a code; all but SOI, EOI, TEM and RSTn carry a
/// two-byte big-endian length that counts itself; after SOS comes entropy-coded data in which
/// 0xFF is followed by a stuffed 0x00, an RSTn or fill bytes, and anything else is the next
/// marker). Lengths are followed rather than searched for 0xFFD9, because segments such as an
/// EXIF thumbnail hold complete JPEGs of their own.
fn jpeg_reaches_eoi(b: &[u8]) -> bool {
    const EOI: u8 = 0xD9;
    const SOS: u8 = 0xDA;
    let no_length = |m: u8| m == 0x01 || (0xD0..=0xD7).contains(&m);
    if !b.starts_with(&[0xFF, 0xD8]) {
        return false;
    }
    let mut i = 2;
    while i + 1 < b.len() {
        if b[i] != 0xFF {
            // Stray bytes between segments: decoders skip to the next 0xFF, and so do we.
            i += 1;
            continue;
        }
        let m = b[i + 1];
        if m == EOI {
            return true;
        }
        if m == 0xFF || m == 0x00 || no_length(m) {
            i += if m == 0xFF { 1 } else { 2 };
            continue;
        }
        let Some(len) = b
            .get(i + 2..i + 4)
            .map(|l| usize::from(u16::from_be_bytes([l[0], l[1]])))
        else {
            return false;
        };
        if len < 2 {
            return false;
        }
        i += 2 + len;
        if m == SOS {
            while i + 1 < b.len() {
                let next = b[i + 1];
                if b[i] == 0xFF && next != 0x00 && next != 0xFF && !no_length(next) {
                    break;
                }
                i += 1;
            }
        }
    }
    false
}

#[cfg(test)]
mod tests {
    use super::jpeg_reaches_eoi;

    // Marker codes from ITU-T T.81 table B.1: SOI D8, EOI D9, SOS DA, APP0 E0, RST0 D0.

    #[test]
    fn complete_streams_reach_eoi() {
        assert!(jpeg_reaches_eoi(&[0xFF, 0xD8, 0xFF, 0xD9]));
        // An APP0 segment, then SOS with a 3-byte header, data with a stuffed FF00, an RST0
        // and fill bytes before EOI, then trailing bytes after it.
        let stream = [
            0xFF, 0xD8, 0xFF, 0xE0, 0x00, 0x04, 0x12, 0x34, 0xFF, 0xDA, 0x00, 0x03, 0x01, 0xAA,
            0xFF, 0x00, 0xBB, 0xFF, 0xD0, 0xCC, 0xFF, 0xFF, 0xD9, 0x00, 0x00,
        ];
        assert!(jpeg_reaches_eoi(&stream));
    }

    #[test]
    fn cut_streams_do_not() {
        let stream = [
            0xFF, 0xD8, 0xFF, 0xE0, 0x00, 0x04, 0x12, 0x34, 0xFF, 0xDA, 0x00, 0x03, 0x01, 0xAA,
            0xFF, 0x00, 0xBB, 0xFF, 0xD9,
        ];
        for len in 0..stream.len() {
            assert!(!jpeg_reaches_eoi(&stream[..len]), "cut to {len}");
        }
    }

    #[test]
    fn an_eoi_inside_a_segment_does_not_count() {
        // APP1 of length 6 whose payload is FF D9 FF D9 (as an embedded thumbnail's end would
        // be), and nothing after it.
        let stream = [0xFF, 0xD8, 0xFF, 0xE1, 0x00, 0x06, 0xFF, 0xD9, 0xFF, 0xD9];
        assert!(!jpeg_reaches_eoi(&stream));
        // A length below 2 cannot be, the segment length counts its own two bytes.
        assert!(!jpeg_reaches_eoi(&[
            0xFF, 0xD8, 0xFF, 0xE0, 0x00, 0x01, 0xFF, 0xD9
        ]));
    }
}
