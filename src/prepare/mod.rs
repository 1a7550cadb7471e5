//! Request samples → model input.
//!
//! A sample arrives as an encoded image or as a raw tensor. Images pass through
//! `decode` (limits checked before the decoder allocates, then pixels), then `fit`
//! (colour conversion, fit rule, resize, normalisation into C×H×W f32). Tensors only need
//! their shape, length and values checked ([`prepare_tensor`]). Both write into a slice the
//! caller owns, so a batch can be filled in place.

mod decode;
mod error;
mod fit;
mod tensor;

pub use error::PrepareError;
pub use tensor::prepare_tensor;

use crate::bundle::manifest::{ImagePrep, InputSpec};

/// Limits applied before any decoding allocates.
#[derive(Clone, Copy, Debug)]
pub struct ImageLimits {
    /// Longest encoded image accepted, in bytes.
    pub max_encoded_bytes: usize,
    /// Most pixels (width × height) an image may declare in its header. Also bounds the
    /// decoder's allocations (8 bytes per pixel) and the intermediate buffer of a resize.
    pub max_pixels: u64,
}

impl Default for ImageLimits {
    /// 16 MiB and 40 megapixels: room for a photograph straight from a phone camera
    /// (12–24 megapixels, a few MiB as JPEG), far below what would hurt a server.
    fn default() -> Self {
        ImageLimits {
            max_encoded_bytes: 16 * 1024 * 1024,
            max_pixels: 40_000_000,
        }
    }
}

/// Statistics of the original image, for input-drift monitoring later.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub struct ImageFacts {
    pub width: u32,
    pub height: u32,
}

/// The model's image preparation, or [`PrepareError::ImageNotAccepted`] when its bundle
/// declares no image input.
///
/// # Errors
/// [`PrepareError::ImageNotAccepted`] when `spec.image` is absent.
pub fn image_prep(spec: &InputSpec) -> Result<&ImagePrep, PrepareError> {
    spec.image.as_ref().ok_or(PrepareError::ImageNotAccepted)
}

/// Decodes `bytes` (PNG, JPEG, BMP, WebP, GIF first frame, TIFF), converts colour, resizes and
/// fits to the spec, and writes C×H×W values `(pixel·scale − mean[c]) / std[c]` into `out`
/// (len = channels·height·width).
///
/// - The format is recognised from the bytes themselves. EXIF orientation is not applied
///   (Pillow's `Image.open` does not apply it either): pixels are used in stored order.
/// - `pixel` is a level on the 0..255 scale whatever the file's depth: 16-bit samples are
///   divided by 257 and float samples (0..1) multiplied by 255, so `scale` keeps its meaning.
///   Alpha is dropped without compositing.
/// - Gray from colour uses the `image` crate's per-pixel BT.709 luma,
///   Y = (2126·R + 7152·G + 722·B) / 10000, truncated for integer samples; Pillow's
///   `convert("L")` uses BT.601 instead.
/// - JPEG files must reach their end-of-image marker: the decoder would otherwise fill a cut-off
///   file with grey and succeed.
/// - Fit: [`Stretch`](crate::bundle::manifest::FitRule::Stretch) resizes to exactly
///   width × height; `CenterCrop` cuts the largest centred region of the target's aspect ratio
///   and resizes it (the same as scaling the shorter side to fit and cutting the centre, except
///   in the outermost pixels); `Letterbox` scales the longer side to fit and centres the result
///   on a canvas of zero pixels (zero before normalisation, so the border holds −mean/std).
///   Odd borders put the extra row or column below or right.
/// - Resizing uses `image::imageops::resize` (Nearest, Triangle for bilinear, CatmullRom for
///   bicubic, Lanczos3). Its filters differ from other libraries' resizers (Pillow, OpenCV,
///   torchvision) near edges and in how they treat downscaling, so a training pipeline should
///   resize the same way, or clients should send images already at the model's size: an image
///   of exactly width × height (or whose centre cut is) is not resampled at all, and its input
///   is bit-exact.
///
/// On error `out` may be partly written.
///
/// # Errors
/// Spec mismatches ([`PrepareError::OutputLength`], [`PrepareError::PrepChannels`],
/// [`PrepareError::TargetSize`]); then [`PrepareError::EncodedTooLarge`],
/// [`PrepareError::NotAnImage`] for unknown, truncated or corrupt data,
/// [`PrepareError::UnsupportedFormat`] / [`PrepareError::UnsupportedImage`],
/// [`PrepareError::TooManyPixels`] (checked from the header, before decoding),
/// [`PrepareError::DecoderLimit`], [`PrepareError::ResizeTooLarge`] for aspect ratios whose
/// resize would need a huge intermediate, and [`PrepareError::NonFinite`] if a float image or
/// the normalisation produced NaN or infinity.
pub fn prepare_image(
    bytes: &[u8],
    prep: &ImagePrep,
    limits: &ImageLimits,
    out: &mut [f32],
) -> Result<ImageFacts, PrepareError> {
    let channels = prep.color.channels();
    if prep.mean.len() != channels || prep.std.len() != channels {
        return Err(PrepareError::PrepChannels {
            channels,
            mean: prep.mean.len(),
            std: prep.std.len(),
        });
    }
    let target_size = |w: usize, h: usize| -> Option<(u32, u32, usize)> {
        let (tw, th) = (u32::try_from(w).ok()?, u32::try_from(h).ok()?);
        let len = channels.checked_mul(w)?.checked_mul(h)?;
        (len > 0).then_some((tw, th, len))
    };
    let Some((to_width, to_height, len)) = target_size(prep.width, prep.height) else {
        return Err(PrepareError::TargetSize {
            width: prep.width,
            height: prep.height,
        });
    };
    if out.len() != len {
        return Err(PrepareError::OutputLength {
            expected: len,
            got: out.len(),
        });
    }

    let img = decode::decode(bytes, limits)?;
    let facts = ImageFacts {
        width: img.width(),
        height: img.height(),
    };
    fit::write_input(img, prep, to_width, to_height, limits.max_pixels, out)?;
    // A float image may hold NaN or infinity, and a subnormal std can overflow a finite level;
    // the model must never see either.
    if let Some(index) = out.iter().position(|v| !v.is_finite()) {
        return Err(PrepareError::NonFinite { index });
    }
    Ok(facts)
}
