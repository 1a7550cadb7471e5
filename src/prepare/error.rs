//! What can go wrong while a request sample becomes model input.

/// Why a sample could not be turned into model input.
///
/// Every variant but [`OutputLength`](Self::OutputLength) and
/// [`PrepChannels`](Self::PrepChannels) is the sender's fault; those two mean the caller passed a
/// buffer or spec that does not belong together.
#[derive(Debug, thiserror::Error)]
pub enum PrepareError {
    #[error("encoded image is {bytes} bytes, more than the limit of {limit}")]
    EncodedTooLarge { bytes: usize, limit: usize },

    #[error("image is {width}x{height} pixels, more than the limit of {limit} pixels")]
    TooManyPixels { width: u32, height: u32, limit: u64 },

    #[error(
        "resizing {width}x{height} to {to_width}x{to_height} passes through a \
         {width}x{to_height} intermediate, more than the limit of {limit} pixels"
    )]
    ResizeTooLarge {
        width: u32,
        height: u32,
        to_width: u32,
        to_height: u32,
        limit: u64,
    },

    #[error("not a decodable image: {reason}")]
    NotAnImage { reason: String },

    #[error("{format} images are not accepted; send PNG, JPEG, BMP, WebP, GIF or TIFF")]
    UnsupportedFormat { format: String },

    #[error("image uses a feature the decoder does not support: {reason}")]
    UnsupportedImage { reason: String },

    #[error("decoding the image would need more memory than allowed: {reason}")]
    DecoderLimit { reason: String },

    #[error("expected shape {expected:?}, got {got:?}")]
    TensorShape { expected: Vec<usize>, got: Vec<u32> },

    #[error("expected {expected} bytes of little-endian f32, got {got}")]
    TensorBytes { expected: usize, got: usize },

    #[error("element {index} is NaN or infinite")]
    NonFinite { index: usize },

    #[error("this model takes tensors only, not encoded images")]
    ImageNotAccepted,

    #[error("output buffer holds {got} values, the model input needs {expected}")]
    OutputLength { expected: usize, got: usize },

    #[error("image spec has {mean} means and {std} standard deviations for {channels} channels")]
    PrepChannels {
        channels: usize,
        mean: usize,
        std: usize,
    },

    #[error("image spec asks for a {width}x{height} image, which is empty or too large")]
    TargetSize { width: usize, height: usize },
}

impl PrepareError {
    /// Sorts an error of the `image` crate into ours. Limit errors only arise past our own
    /// pixel check (a decoder's scratch buffers), so they keep the crate's wording.
    pub(super) fn from_image(e: image::ImageError) -> Self {
        use image::ImageError as E;
        match e {
            E::Limits(l) => PrepareError::DecoderLimit {
                reason: l.to_string(),
            },
            E::Unsupported(u) => PrepareError::UnsupportedImage {
                reason: u.to_string(),
            },
            // Decoding errors, a short read (io::ErrorKind::UnexpectedEof on a truncated file)
            // and parameter errors all mean the bytes are not a well-formed image.
            other => PrepareError::NotAnImage {
                reason: other.to_string(),
            },
        }
    }
}
