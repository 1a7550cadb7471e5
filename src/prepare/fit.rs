//! Decoded pixels → the model's C×H×W input: colour conversion, fit rule, resize, normalisation.
//!
//! The fit rule is first turned into a [`Plan`] — which source rectangle to take, what size to
//! resize it to, where to put it on the target — using integer arithmetic only, so the
//! geometry is exact and testable apart from any pixels. The pixels then take one pass through
//! `image::imageops::resize` (skipped when the sizes already agree) and one pass that
//! normalises them into the output.

use image::imageops::{self, FilterType};
use image::{DynamicImage, ImageBuffer, Luma, Pixel, Primitive, Rgb};

use crate::bundle::manifest::{ColorMode, FitRule, ImagePrep, ResizeFilter};

use super::PrepareError;

/// A rectangle `width × height` at `(x, y)`.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub(super) struct Rect {
    pub x: u32,
    pub y: u32,
    pub width: u32,
    pub height: u32,
}

/// The geometry of one fit: cut `source` from the decoded image, resize it to
/// `placed.width × placed.height`, write it at `(placed.x, placed.y)` of the target.
/// Target pixels outside `placed` (letterbox only) are the zero pixel.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
pub(super) struct Plan {
    pub source: Rect,
    pub placed: Rect,
}

/// `round(a · num / den)` (halves away from zero) in integers, at least 1 and at most `max`.
fn scale_side(a: u32, num: u32, den: u32, max: u32) -> u32 {
    // u128: 2·a·num can pass u64::MAX when both sides are near u32::MAX.
    // Callers pass sizes of at least 1; `max(1)` keeps a slip from dividing by zero.
    let (a, num, den) = (u128::from(a), u128::from(num), u128::from(den.max(1)));
    let rounded = (2 * a * num + den) / (2 * den);
    // `max` is a u32, so the clamped value fits.
    rounded.clamp(1, u128::from(max)) as u32
}

impl Plan {
    /// Geometry for an image of `width × height` brought to `to_width × to_height` by `fit`.
    /// All four sizes are at least 1.
    pub(super) fn new(
        fit: FitRule,
        width: u32,
        height: u32,
        to_width: u32,
        to_height: u32,
    ) -> Plan {
        let whole = Rect {
            x: 0,
            y: 0,
            width,
            height,
        };
        let target = Rect {
            x: 0,
            y: 0,
            width: to_width,
            height: to_height,
        };
        // Compare aspect ratios without division: the image is at least as wide as the target
        // when width/height >= to_width/to_height.
        let wider =
            u64::from(width) * u64::from(to_height) >= u64::from(height) * u64::from(to_width);
        match fit {
            FitRule::Stretch => Plan {
                source: whole,
                placed: target,
            },
            // Cutting the centre region of the target's aspect ratio first and resizing it
            // equals "scale so the shorter side fits, then cut the centre" except in the
            // outermost target pixels, where a filter would have reached past the cut. Cutting
            // first bounds the work by the target size: scaling a 40000×1 image so its shorter
            // side becomes 224 pixels would mean a row of almost nine billion.
            FitRule::CenterCrop => {
                let source = if wider {
                    let w = scale_side(height, to_width, to_height, width);
                    Rect {
                        x: (width - w) / 2,
                        y: 0,
                        width: w,
                        height,
                    }
                } else {
                    let h = scale_side(width, to_height, to_width, height);
                    Rect {
                        x: 0,
                        y: (height - h) / 2,
                        width,
                        height: h,
                    }
                };
                Plan {
                    source,
                    placed: target,
                }
            }
            FitRule::Letterbox => {
                let (w, h) = if wider {
                    (to_width, scale_side(height, to_width, width, to_height))
                } else {
                    (scale_side(width, to_height, height, to_width), to_height)
                };
                Plan {
                    source: whole,
                    placed: Rect {
                        x: (to_width - w) / 2,
                        y: (to_height - h) / 2,
                        width: w,
                        height: h,
                    },
                }
            }
        }
    }

    fn needs_resize(&self) -> bool {
        (self.source.width, self.source.height) != (self.placed.width, self.placed.height)
    }
}

fn filter_type(filter: ResizeFilter) -> FilterType {
    match filter {
        ResizeFilter::Nearest => FilterType::Nearest,
        ResizeFilter::Bilinear => FilterType::Triangle,
        ResizeFilter::Bicubic => FilterType::CatmullRom,
        ResizeFilter::Lanczos3 => FilterType::Lanczos3,
    }
}

/// Converts the colour, then fits and normalises into `out` (already checked to hold
/// channels × height × width values, with `prep`'s sizes fitting in u32 and its mean/std
/// lengths matching the channel count).
///
/// Samples keep their precision until normalisation. 8-bit samples are used as they are;
/// 16-bit samples are divided by 257 (65535 → 255) and float samples (0..1 by the `image`
/// crate's convention, clamped there) multiplied by 255, so that `scale` means the same for
/// every file: it multiplies a level on the 0..255 scale.
pub(super) fn write_input(
    img: DynamicImage,
    prep: &ImagePrep,
    to_width: u32,
    to_height: u32,
    max_pixels: u64,
    out: &mut [f32],
) -> Result<(), PrepareError> {
    use ColorMode::{Gray, Rgb};
    use DynamicImage as D;
    let eight = |v: u8| f32::from(v);
    let sixteen = |v: u16| f32::from(v) / 257.0;
    let float = |v: f32| v.clamp(0.0, 1.0) * 255.0;
    let job = Job {
        prep,
        to_width,
        to_height,
        max_pixels,
    };
    match (img, prep.color) {
        // Already in the wanted layout: no copy.
        (D::ImageLuma8(b), Gray) => job.run(&b, eight, out),
        (D::ImageRgb8(b), Rgb) => job.run(&b, eight, out),
        (D::ImageLuma16(b), Gray) => job.run(&b, sixteen, out),
        (D::ImageRgb16(b), Rgb) => job.run(&b, sixteen, out),
        (D::ImageRgb32F(b), Rgb) => job.run(&b, float, out),
        (D::ImageLuma8(b), _) => job.convert(&b, eight, out),
        (D::ImageLumaA8(b), _) => job.convert(&b, eight, out),
        (D::ImageRgb8(b), _) => job.convert(&b, eight, out),
        (D::ImageRgba8(b), _) => job.convert(&b, eight, out),
        (D::ImageLuma16(b), _) => job.convert(&b, sixteen, out),
        (D::ImageLumaA16(b), _) => job.convert(&b, sixteen, out),
        (D::ImageRgb16(b), _) => job.convert(&b, sixteen, out),
        (D::ImageRgba16(b), _) => job.convert(&b, sixteen, out),
        (D::ImageRgb32F(b), _) => job.convert(&b, float, out),
        (D::ImageRgba32F(b), _) => job.convert(&b, float, out),
        // `DynamicImage` is non-exhaustive; a layout added later goes through float RGBA.
        (other, _) => job.convert(&other.into_rgba32f(), float, out),
    }
}

struct Job<'a> {
    prep: &'a ImagePrep,
    to_width: u32,
    to_height: u32,
    max_pixels: u64,
}

impl Job<'_> {
    /// Brings pixels of any layout to the spec's, pixel by pixel with the `image` crate's
    /// `Pixel::to_luma` / `Pixel::to_rgb`. Gray from colour is therefore
    /// Y = (2126·R + 7152·G + 722·B) / 10000, the ITU-R BT.709 coefficients, with truncating
    /// division for integer samples (image 0.25, `rgb_to_luma` in its color.rs); gray to colour
    /// repeats the level; alpha is dropped, not composited, so a transparent pixel keeps its
    /// stored colour. `DynamicImage::to_luma8` and friends are avoided on purpose: in
    /// image 0.25.10 they convert through float with coefficients derived from colour-space
    /// metadata in the file, which a training pipeline could not reproduce from pixels alone.
    /// (Pillow's `convert("L")` uses BT.601, 299/587/114, so gray models trained on
    /// Pillow-converted colour images see slightly different levels.)
    fn convert<P, S>(
        &self,
        img: &ImageBuffer<P, Vec<S>>,
        level: impl Fn(S) -> f32,
        out: &mut [f32],
    ) -> Result<(), PrepareError>
    where
        P: Pixel<Subpixel = S> + 'static,
        S: Primitive + 'static,
        Luma<S>: Pixel<Subpixel = S>,
        Rgb<S>: Pixel<Subpixel = S>,
    {
        let (w, h) = img.dimensions();
        match self.prep.color {
            ColorMode::Gray => self.run(
                &ImageBuffer::from_fn(w, h, |x, y| img.get_pixel(x, y).to_luma()),
                level,
                out,
            ),
            ColorMode::Rgb => self.run(
                &ImageBuffer::from_fn(w, h, |x, y| img.get_pixel(x, y).to_rgb()),
                level,
                out,
            ),
        }
    }

    fn run<P, S>(
        &self,
        img: &ImageBuffer<P, Vec<S>>,
        level: impl Fn(S) -> f32,
        out: &mut [f32],
    ) -> Result<(), PrepareError>
    where
        P: Pixel<Subpixel = S> + 'static,
        S: Primitive + 'static,
    {
        let plan = Plan::new(
            self.prep.fit,
            img.width(),
            img.height(),
            self.to_width,
            self.to_height,
        );
        let resized;
        // (samples, their row width in pixels, top-left corner of what to copy)
        let (samples, row_pixels, x0, y0) = if plan.needs_resize() {
            // `imageops::resize` filters columns first into a float buffer of
            // source width × new height pixels; that buffer is what can get large.
            let intermediate = u64::from(plan.source.width) * u64::from(plan.placed.height);
            if intermediate > self.max_pixels {
                return Err(PrepareError::ResizeTooLarge {
                    width: plan.source.width,
                    height: plan.source.height,
                    to_width: plan.placed.width,
                    to_height: plan.placed.height,
                    limit: self.max_pixels,
                });
            }
            let cut = imageops::crop_imm(
                img,
                plan.source.x,
                plan.source.y,
                plan.source.width,
                plan.source.height,
            );
            resized = imageops::resize(
                &*cut,
                plan.placed.width,
                plan.placed.height,
                filter_type(self.prep.resize_filter),
            );
            (resized.as_raw().as_slice(), resized.width(), 0, 0)
        } else {
            // Same size: the samples are copied untouched, so a file already at the model's
            // size gives bit-exact input whatever the filter.
            (
                img.as_raw().as_slice(),
                img.width(),
                plan.source.x,
                plan.source.y,
            )
        };

        let channels = usize::from(P::CHANNEL_COUNT);
        let (tw, th) = (self.to_width as usize, self.to_height as usize);
        let plane = tw * th;
        let norm = |v: f32, c: usize| (v * self.prep.scale - self.prep.mean[c]) / self.prep.std[c];
        let placed = plan.placed;
        let letterboxed = (placed.width as usize, placed.height as usize) != (tw, th);
        for c in 0..channels {
            let dst = &mut out[c * plane..(c + 1) * plane];
            if letterboxed {
                dst.fill(norm(0.0, c));
            }
            for y in 0..placed.height as usize {
                let src_row = ((y0 as usize + y) * row_pixels as usize + x0 as usize) * channels;
                let dst_row = (placed.y as usize + y) * tw + placed.x as usize;
                let dst_row = &mut dst[dst_row..dst_row + placed.width as usize];
                for (x, d) in dst_row.iter_mut().enumerate() {
                    *d = norm(level(samples[src_row + x * channels + c]), c);
                }
            }
        }
        Ok(())
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn rect(x: u32, y: u32, width: u32, height: u32) -> Rect {
        Rect {
            x,
            y,
            width,
            height,
        }
    }

    // The expected rectangles below are worked out by hand from the fit rules' definitions.

    #[test]
    fn stretch_takes_everything() {
        let p = Plan::new(FitRule::Stretch, 640, 480, 224, 224);
        assert_eq!(p.source, rect(0, 0, 640, 480));
        assert_eq!(p.placed, rect(0, 0, 224, 224));
    }

    #[test]
    fn center_crop_cuts_the_longer_side() {
        // 40×20 into 20×20: the shorter side (20) already fits, so the centre 20 columns.
        let p = Plan::new(FitRule::CenterCrop, 40, 20, 20, 20);
        assert_eq!(p.source, rect(10, 0, 20, 20));
        assert!(!p.needs_resize());
        // 640×480 into 224×224: centre 480×480 square, columns 80..560.
        let p = Plan::new(FitRule::CenterCrop, 640, 480, 224, 224);
        assert_eq!(p.source, rect(80, 0, 480, 480));
        // Tall 30×90 into 20×10 (aspect 2:1): height 30·10/20 = 15, rows 37..52.
        let p = Plan::new(FitRule::CenterCrop, 30, 90, 20, 10);
        assert_eq!(p.source, rect(0, 37, 30, 15));
        assert_eq!(p.placed, rect(0, 0, 20, 10));
    }

    #[test]
    fn letterbox_fits_the_longer_side() {
        // 40×20 into 20×20: scale 1/2 gives 20×10, centred with 5 rows above and below.
        let p = Plan::new(FitRule::Letterbox, 40, 20, 20, 20);
        assert_eq!(p.source, rect(0, 0, 40, 20));
        assert_eq!(p.placed, rect(0, 5, 20, 10));
        // 10×20 into 20×20: scale 1 gives 10×20, 5 columns left and right.
        let p = Plan::new(FitRule::Letterbox, 10, 20, 20, 20);
        assert_eq!(p.placed, rect(5, 0, 10, 20));
        assert!(!p.needs_resize());
        // 3×2 into 2×2: 2×(2·2/3 = 1.33 → 1), the odd row of border goes below.
        let p = Plan::new(FitRule::Letterbox, 3, 2, 2, 2);
        assert_eq!(p.placed, rect(0, 0, 2, 1));
    }

    #[test]
    fn extreme_aspect_ratios_keep_at_least_one_pixel() {
        let p = Plan::new(FitRule::Letterbox, 40_000, 1, 224, 224);
        assert_eq!(p.placed, rect(0, 111, 224, 1));
        let p = Plan::new(FitRule::CenterCrop, 40_000, 1, 224, 224);
        assert_eq!(p.source, rect(19_999, 0, 1, 1));
        let p = Plan::new(FitRule::CenterCrop, 1, 40_000, 224, 224);
        assert_eq!(p.source, rect(0, 19_999, 1, 1));
    }

    #[test]
    fn rounding_is_half_up() {
        // 5·3/2 = 7.5 → 8; 5·1/3 = 1.67 → 2; 7·1/3 = 2.33 → 2.
        assert_eq!(scale_side(5, 3, 2, 100), 8);
        assert_eq!(scale_side(5, 1, 3, 100), 2);
        assert_eq!(scale_side(7, 1, 3, 100), 2);
        assert_eq!(scale_side(u32::MAX, u32::MAX, 1, 7), 7);
    }
}
