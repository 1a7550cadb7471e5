//! Arbitrary bytes as a request sample: an encoded image prepared for the demo model's input
//! spec (and variants of its fit rule, filter and colour), or a raw tensor, with the server's
//! default `ImageLimits`.
//!
//! The first byte picks: bit 0 image (0) or tensor (1); for images bits 1–2 the fit rule,
//! bits 3–4 the resize filter, bit 5 gray or RGB. For tensors the next byte is the number of
//! dimensions (0–4), then one little-endian u32 per dimension, then the f32 bytes.
#![no_main]

use std::sync::OnceLock;

use convoy::bundle::Bundle;
use convoy::bundle::manifest::{ColorMode, FitRule, InputSpec, ResizeFilter};
use convoy::prepare::{ImageLimits, prepare_image, prepare_tensor};
use convoy::service::DEMO_BUNDLE;
use libfuzzer_sys::fuzz_target;

fn demo_spec() -> &'static InputSpec {
    static SPEC: OnceLock<InputSpec> = OnceLock::new();
    SPEC.get_or_init(|| {
        Bundle::from_bytes(DEMO_BUNDLE.to_vec())
            .expect("the built-in demo bundle opens")
            .manifest()
            .input
            .clone()
    })
}

fuzz_target!(|data: &[u8]| {
    let Some((&mode, rest)) = data.split_first() else {
        return;
    };
    let spec = demo_spec();
    if mode & 1 == 0 {
        let mut prep = spec.image.clone().expect("the demo model takes images");
        prep.fit = [
            FitRule::Stretch,
            FitRule::CenterCrop,
            FitRule::Letterbox,
            prep.fit,
        ][usize::from(mode >> 1) & 3];
        prep.resize_filter = [
            ResizeFilter::Nearest,
            ResizeFilter::Bilinear,
            ResizeFilter::Bicubic,
            ResizeFilter::Lanczos3,
        ][usize::from(mode >> 3) & 3];
        if mode & 0x20 != 0 {
            prep.color = ColorMode::Rgb;
            prep.mean = vec![prep.mean[0]; 3];
            prep.std = vec![prep.std[0]; 3];
        }
        let mut out = vec![0.0f32; prep.color.channels() * prep.width * prep.height];
        let _ = prepare_image(rest, &prep, &ImageLimits::default(), &mut out);
    } else {
        let Some((&dims, mut rest)) = rest.split_first() else {
            return;
        };
        let mut shape = Vec::new();
        for _ in 0..dims % 5 {
            let Some((d, tail)) = rest.split_first_chunk::<4>() else {
                return;
            };
            shape.push(u32::from_le_bytes(*d));
            rest = tail;
        }
        let mut out = vec![0.0f32; spec.shape.iter().product()];
        let _ = prepare_tensor(&shape, rest, &spec.shape, &mut out);
    }
});
