//! Checks `convoy::prepare` against outside references.
//!
//! The image files and `expected.json` under `tests/data/prepare/` come from
//! `tests/data/prepare/make_images.py` (Pillow 13.0.0, NumPy 2.4.6): the files are written by
//! Pillow, and the expected model inputs are NumPy's float32 normalisation of the samples Pillow
//! decodes. Geometry checks use two-region pictures whose expected values are worked out by hand
//! in each test from the fit rule's definition.

use std::alloc::{GlobalAlloc, Layout, System};
use std::cell::Cell;
use std::path::{Path, PathBuf};

use convoy::bundle::manifest::{ColorMode, FitRule, ImagePrep, InputSpec, ResizeFilter};
use convoy::prepare::{
    ImageFacts, ImageLimits, PrepareError, image_prep, prepare_image, prepare_tensor,
};
use serde_json::Value;

// ---------------------------------------------------------------------------------------------
// Largest single allocation made by the current thread, to show that bombs are refused before
// their pixel buffer exists.

struct Tracking;

thread_local! {
    static LARGEST: Cell<usize> = const { Cell::new(0) };
}

fn note(size: usize) {
    // `try_with` rather than `with`: allocations during thread teardown must not panic.
    let _ = LARGEST.try_with(|l| l.set(l.get().max(size)));
}

// SAFETY: every method forwards to the system allocator with the caller's arguments unchanged;
// `note` only touches a const-initialised thread-local `Cell`, which does not allocate.
unsafe impl GlobalAlloc for Tracking {
    unsafe fn alloc(&self, layout: Layout) -> *mut u8 {
        note(layout.size());
        // SAFETY: same contract as ours, passed through.
        unsafe { System.alloc(layout) }
    }
    unsafe fn alloc_zeroed(&self, layout: Layout) -> *mut u8 {
        note(layout.size());
        // SAFETY: same contract as ours, passed through.
        unsafe { System.alloc_zeroed(layout) }
    }
    unsafe fn realloc(&self, ptr: *mut u8, layout: Layout, new_size: usize) -> *mut u8 {
        note(new_size);
        // SAFETY: same contract as ours, passed through.
        unsafe { System.realloc(ptr, layout, new_size) }
    }
    unsafe fn dealloc(&self, ptr: *mut u8, layout: Layout) {
        // SAFETY: same contract as ours, passed through.
        unsafe { System.dealloc(ptr, layout) }
    }
}

#[global_allocator]
static GLOBAL: Tracking = Tracking;

// ---------------------------------------------------------------------------------------------

fn data_dir() -> PathBuf {
    Path::new(env!("CARGO_MANIFEST_DIR")).join("tests/data/prepare")
}

fn read(name: &str) -> Vec<u8> {
    std::fs::read(data_dir().join(name)).unwrap_or_else(|e| panic!("{name}: {e}"))
}

fn expected() -> Value {
    let text = std::fs::read_to_string(data_dir().join("expected.json")).unwrap();
    serde_json::from_str(&text).unwrap()
}

fn f32s(v: &Value) -> Vec<f32> {
    v.as_array()
        .unwrap()
        .iter()
        .map(|b| f32::from_bits(b.as_u64().unwrap() as u32))
        .collect()
}

fn prep(
    color: ColorMode,
    width: usize,
    height: usize,
    fit: FitRule,
    filter: ResizeFilter,
) -> ImagePrep {
    let channels = color.channels();
    ImagePrep {
        color,
        width,
        height,
        resize_filter: filter,
        fit,
        // Identity normalisation: the output is the level itself, so geometry tests read levels.
        scale: 1.0,
        mean: vec![0.0; channels],
        std: vec![1.0; channels],
    }
}

fn run(bytes: &[u8], prep: &ImagePrep) -> Result<(Vec<f32>, ImageFacts), PrepareError> {
    run_with(bytes, prep, &ImageLimits::default())
}

fn run_with(
    bytes: &[u8],
    prep: &ImagePrep,
    limits: &ImageLimits,
) -> Result<(Vec<f32>, ImageFacts), PrepareError> {
    let mut out = vec![f32::NAN; prep.color.channels() * prep.width * prep.height];
    let facts = prepare_image(bytes, prep, limits, &mut out)?;
    Ok((out, facts))
}

/// One channel plane of a C×H×W output as rows, for readable comparisons.
fn rows(out: &[f32], width: usize, height: usize, channel: usize) -> Vec<Vec<f32>> {
    let plane = &out[channel * width * height..(channel + 1) * width * height];
    plane.chunks(width).map(<[f32]>::to_vec).collect()
}

const FILTERS: [ResizeFilter; 4] = [
    ResizeFilter::Nearest,
    ResizeFilter::Bilinear,
    ResizeFilter::Bicubic,
    ResizeFilter::Lanczos3,
];
const FITS: [FitRule; 3] = [FitRule::Stretch, FitRule::CenterCrop, FitRule::Letterbox];

// ---------------------------------------------------------------------------------------------
// Decoding and normalisation at the model's own size

#[test]
fn native_size_matches_pillow_decode_and_numpy_normalisation() {
    let exp = expected();
    let scale = f32::from_bits(exp["scale_bits"].as_u64().unwrap() as u32);
    let images = exp["images"].as_array().unwrap();
    assert_eq!(images.len(), 14, "one record per reference file");
    for img in images {
        let file = img["file"].as_str().unwrap();
        let bytes = read(file);
        let (w, h) = (
            img["width"].as_u64().unwrap() as usize,
            img["height"].as_u64().unwrap() as usize,
        );
        let tolerance = img["tolerance_levels"].as_f64().unwrap() as f32;
        for (key, color) in [("gray", ColorMode::Gray), ("rgb", ColorMode::Rgb)] {
            let mean = f32s(&exp[key]["mean_bits"]);
            let std = f32s(&exp[key]["std_bits"]);
            let want = f32s(&img[key]);
            // At the model's size no fit rule or filter may resample: all give the same input.
            for fit in FITS {
                for filter in FILTERS {
                    let mut p = prep(color, w, h, fit, filter);
                    p.scale = scale;
                    p.mean = mean.clone();
                    p.std = std.clone();
                    let (got, facts) =
                        run(&bytes, &p).unwrap_or_else(|e| panic!("{file} as {key}: {e}"));
                    assert_eq!(
                        facts,
                        ImageFacts {
                            width: w as u32,
                            height: h as u32
                        },
                        "{file}"
                    );
                    assert_eq!(got.len(), want.len(), "{file} as {key}");
                    let plane = w * h;
                    for (i, (&g, &x)) in got.iter().zip(&want).enumerate() {
                        if tolerance == 0.0 {
                            assert_eq!(
                                g.to_bits(),
                                x.to_bits(),
                                "{file} as {key} [{i}] ({fit:?}, {filter:?}): got {g}, NumPy says {x}"
                            );
                        } else {
                            // JPEG: decoders may differ by `tolerance` levels (see make_images.py);
                            // one level is scale/std after normalisation. The 1e-5 covers float32
                            // rounding of the two normalisations.
                            let bound = tolerance * scale / std[i / plane] + 1e-5;
                            assert!(
                                (g - x).abs() <= bound,
                                "{file} as {key} [{i}]: got {g}, Pillow-based value {x}, bound {bound}"
                            );
                        }
                    }
                }
            }
        }
    }
}

// ---------------------------------------------------------------------------------------------
// Geometry, on pictures whose left half is one level and right half another

#[test]
fn center_crop_without_resizing_keeps_the_middle_columns() {
    // 40×20, columns 0..20 at 0 and 20..40 at 255. Into 20×20 the shorter side already fits
    // (scale 1), so the centre cut is columns 10..30: ten columns of 0, then ten of 255.
    let bytes = read("halves_0_255_40x20.png");
    for filter in FILTERS {
        let p = prep(ColorMode::Gray, 20, 20, FitRule::CenterCrop, filter);
        let (out, facts) = run(&bytes, &p).unwrap();
        assert_eq!((facts.width, facts.height), (40, 20));
        let mut row = vec![0.0; 10];
        row.extend([255.0; 10]);
        assert_eq!(rows(&out, 20, 20, 0), vec![row; 20], "{filter:?}");
    }
}

#[test]
fn center_crop_with_resizing() {
    // 80×40 halves into 20×20: the centre square is columns 20..60 (20 of 0, 20 of 255), halved
    // to 20×20. Nearest takes source column 2x+1 of the cut (the `image` crate samples at pixel
    // centres: (x + 0.5)·2), so output columns 0..10 are 0 and 10..20 are 255. Every filter's
    // reach at this ratio is at most 3·2 = 6 source columns (Lanczos3), so columns 0..=6 see
    // only 0 and 13..=19 only 255 whatever the filter.
    let bytes = read("halves_0_255_80x40.png");
    for filter in FILTERS {
        let p = prep(ColorMode::Gray, 20, 20, FitRule::CenterCrop, filter);
        let (out, _) = run(&bytes, &p).unwrap();
        for (y, row) in rows(&out, 20, 20, 0).iter().enumerate() {
            assert!(
                row[..=6].iter().all(|&v| v == 0.0),
                "{filter:?} row {y}: {row:?}"
            );
            assert!(
                row[13..].iter().all(|&v| v == 255.0),
                "{filter:?} row {y}: {row:?}"
            );
            if filter == ResizeFilter::Nearest {
                assert!(row[..10].iter().all(|&v| v == 0.0), "row {y}: {row:?}");
                assert!(row[10..].iter().all(|&v| v == 255.0), "row {y}: {row:?}");
            }
        }
    }
}

#[test]
fn stretch_distorts_to_the_exact_size() {
    // 40×20 halves into 20×10: the boundary at source column 20 lands at output column 10.
    // Same reasoning about the filters' reach as for the centre crop.
    let bytes = read("halves_0_255_40x20.png");
    for filter in FILTERS {
        let p = prep(ColorMode::Gray, 20, 10, FitRule::Stretch, filter);
        let (out, _) = run(&bytes, &p).unwrap();
        let r = rows(&out, 20, 10, 0);
        assert_eq!(r.len(), 10);
        for row in &r {
            assert!(row[..=6].iter().all(|&v| v == 0.0), "{filter:?}: {row:?}");
            assert!(row[13..].iter().all(|&v| v == 255.0), "{filter:?}: {row:?}");
            if filter == ResizeFilter::Nearest {
                assert!(row[..10].iter().all(|&v| v == 0.0));
                assert!(row[10..].iter().all(|&v| v == 255.0));
            }
        }
    }
}

fn rgb_normalising_prep(width: usize, height: usize) -> ImagePrep {
    let mut p = prep(
        ColorMode::Rgb,
        width,
        height,
        FitRule::Letterbox,
        ResizeFilter::Nearest,
    );
    p.scale = 1.0 / 255.0;
    p.mean = vec![0.1, 0.2, 0.3];
    p.std = vec![0.5, 0.25, 0.125];
    p
}

#[test]
fn letterbox_centres_the_image_on_zero_pixels() {
    // 40×20 halves (100 | 200) into 20×20: the longer side fits at scale 1/2, giving 20×10,
    // placed at rows 5..15; rows 0..5 and 15..20 are the zero pixel, which after
    // normalisation is (0 - mean)/std per channel. Gray levels fill all three channels.
    let p = rgb_normalising_prep(20, 20);
    let (out, _) = run(&read("halves_100_200_40x20.png"), &p).unwrap();
    for c in 0..3 {
        let level = |v: f32| (v * p.scale - p.mean[c]) / p.std[c];
        let pad = vec![level(0.0); 20];
        let mut inside = vec![level(100.0); 10];
        inside.extend(vec![level(200.0); 10]);
        let mut want = vec![pad.clone(); 5];
        want.extend(vec![inside; 10]);
        want.extend(vec![pad; 5]);
        assert_eq!(rows(&out, 20, 20, c), want, "channel {c}");
    }

    // 10×20 halves (5 columns of 100, 5 of 200) into 20×20: scale 1, placed at columns 5..15.
    let (out, _) = run(&read("halves_100_200_10x20.png"), &p).unwrap();
    for c in 0..3 {
        let level = |v: f32| (v * p.scale - p.mean[c]) / p.std[c];
        let mut row = vec![level(0.0); 5];
        row.extend(vec![level(100.0); 5]);
        row.extend(vec![level(200.0); 5]);
        row.extend(vec![level(0.0); 5]);
        assert_eq!(rows(&out, 20, 20, c), vec![row; 20], "channel {c}");
    }
}

#[test]
fn a_flat_colour_survives_every_fit_and_filter() {
    // Resampling filters are normalised (weights sum to 1, common practice), so a flat image
    // stays flat; the `image` crate rounds back to 8 bits, so the level is exact.
    // 30×17 into 8×8 letterboxed: 8 × round(17·8/30 = 4.53) = 8×5 at rows 1..6.
    let bytes = read("flat_30x17.png");
    let colour = [10.0, 128.0, 250.0];
    for fit in FITS {
        for filter in FILTERS {
            let p = prep(ColorMode::Rgb, 8, 8, fit, filter);
            let (out, _) = run(&bytes, &p).unwrap();
            for (c, &level) in colour.iter().enumerate() {
                for (y, row) in rows(&out, 8, 8, c).iter().enumerate() {
                    let want = if fit == FitRule::Letterbox && !(1..6).contains(&y) {
                        0.0
                    } else {
                        level
                    };
                    assert!(
                        row.iter().all(|&v| v == want),
                        "{fit:?} {filter:?} channel {c} row {y}: {row:?}"
                    );
                }
            }
        }
    }
}

#[test]
fn upscaling_works_too() {
    // 7×5 gray into 21×15 (×3) with nearest: each source pixel becomes a 3×3 block.
    let bytes = read("gray8.png");
    let (small, _) = run(
        &bytes,
        &prep(
            ColorMode::Gray,
            7,
            5,
            FitRule::Stretch,
            ResizeFilter::Nearest,
        ),
    )
    .unwrap();
    let (big, _) = run(
        &bytes,
        &prep(
            ColorMode::Gray,
            21,
            15,
            FitRule::Stretch,
            ResizeFilter::Nearest,
        ),
    )
    .unwrap();
    for y in 0..15 {
        for x in 0..21 {
            assert_eq!(big[y * 21 + x], small[(y / 3) * 7 + x / 3], "({x}, {y})");
        }
    }
}

// ---------------------------------------------------------------------------------------------
// Limits

#[test]
fn bombs_are_refused_from_the_header_without_allocating() {
    // Each file's header claims an image of billions of pixels (Pillow reads the same sizes,
    // see make_images.py) while the file is under 100 bytes.
    let p = prep(
        ColorMode::Rgb,
        32,
        32,
        FitRule::Stretch,
        ResizeFilter::Bilinear,
    );
    for (file, w, h) in [
        ("bomb_100000x100000.png", 100_000u32, 100_000u32),
        ("bomb_65535x65535.gif", 65535, 65535),
        ("bomb_50000x50000.bmp", 50_000, 50_000),
    ] {
        let bytes = read(file);
        LARGEST.with(|l| l.set(0));
        let e = run(&bytes, &p).unwrap_err();
        let largest = LARGEST.with(Cell::get);
        match e {
            PrepareError::TooManyPixels {
                width,
                height,
                limit,
            } => assert_eq!((width, height, limit), (w, h, 40_000_000), "{file}"),
            other => panic!("{file}: {other}"),
        }
        assert_eq!(
            e_string(&read(file), &p),
            format!("image is {w}x{h} pixels, more than the limit of 40000000 pixels")
        );
        // Decoding would need gigabytes; header parsing needs at most a row or two.
        assert!(
            largest < 1 << 20,
            "{file}: largest allocation {largest} bytes"
        );
    }
}

fn e_string(bytes: &[u8], p: &ImagePrep) -> String {
    run(bytes, p).unwrap_err().to_string()
}

#[test]
fn pixel_limit_is_inclusive() {
    let bytes = read("rgb8.png"); // 7×5 = 35 pixels
    let p = prep(
        ColorMode::Rgb,
        7,
        5,
        FitRule::Stretch,
        ResizeFilter::Nearest,
    );
    let at = ImageLimits {
        max_pixels: 35,
        ..ImageLimits::default()
    };
    assert!(run_with(&bytes, &p, &at).is_ok());
    let below = ImageLimits {
        max_pixels: 34,
        ..ImageLimits::default()
    };
    let e = run_with(&bytes, &p, &below).unwrap_err();
    assert_eq!(
        e.to_string(),
        "image is 7x5 pixels, more than the limit of 34 pixels"
    );
}

#[test]
fn encoded_size_is_checked_before_anything_else() {
    let bytes = read("rgb8.png");
    let p = prep(
        ColorMode::Rgb,
        7,
        5,
        FitRule::Stretch,
        ResizeFilter::Nearest,
    );
    let limits = ImageLimits {
        max_encoded_bytes: bytes.len() - 1,
        ..ImageLimits::default()
    };
    let e = run_with(&bytes, &p, &limits).unwrap_err();
    assert_eq!(
        e.to_string(),
        format!(
            "encoded image is {} bytes, more than the limit of {}",
            bytes.len(),
            bytes.len() - 1
        )
    );
    // Garbage over the limit is refused for its size, before anyone looks at it.
    let e = run_with(
        &[0xAB; 100],
        &p,
        &ImageLimits {
            max_encoded_bytes: 99,
            ..ImageLimits::default()
        },
    )
    .unwrap_err();
    assert!(matches!(
        e,
        PrepareError::EncodedTooLarge {
            bytes: 100,
            limit: 99
        }
    ));
    assert!(
        run_with(
            &bytes,
            &p,
            &ImageLimits {
                max_encoded_bytes: bytes.len(),
                ..ImageLimits::default()
            }
        )
        .is_ok()
    );
}

#[test]
fn a_resize_through_a_huge_intermediate_is_refused() {
    // 8000×1 stretched to 20×20: `image`'s resize filters columns first, into 8000×20 pixels.
    let bytes = read("wide_8000x1.png");
    let p = prep(
        ColorMode::Gray,
        20,
        20,
        FitRule::Stretch,
        ResizeFilter::Bilinear,
    );
    let limits = ImageLimits {
        max_pixels: 100_000,
        ..ImageLimits::default()
    };
    let e = run_with(&bytes, &p, &limits).unwrap_err();
    assert_eq!(
        e.to_string(),
        "resizing 8000x1 to 20x20 passes through a 8000x20 intermediate, more than the limit \
         of 100000 pixels"
    );
    // With the default limit it goes through: a flat row of 7 stays 7.
    let (out, _) = run(&bytes, &p).unwrap();
    assert!(out.iter().all(|&v| v == 7.0));
}

// ---------------------------------------------------------------------------------------------
// Bad data

#[test]
fn garbage_is_not_an_image() {
    let p = prep(
        ColorMode::Rgb,
        4,
        4,
        FitRule::Stretch,
        ResizeFilter::Nearest,
    );
    for bytes in [&b""[..], b"hello, world", &[0u8; 64], &[0xFF; 3]] {
        let e = run(bytes, &p).unwrap_err();
        assert_eq!(
            e.to_string(),
            "not a decodable image: the leading bytes match no known image format",
            "{bytes:?}"
        );
    }
    // Right magic bytes, nothing behind them (PNG signature from the PNG specification).
    let e = run(b"\x89PNG\r\n\x1a\n", &p).unwrap_err();
    assert!(matches!(e, PrepareError::NotAnImage { .. }), "{e}");
}

#[test]
fn other_formats_are_refused_by_name() {
    // "qoif" opens every QOI file (the QOI specification); we accept no QOI.
    let p = prep(
        ColorMode::Rgb,
        4,
        4,
        FitRule::Stretch,
        ResizeFilter::Nearest,
    );
    let mut qoi = b"qoif".to_vec();
    qoi.extend([0, 0, 0, 4, 0, 0, 0, 4, 3, 0]);
    assert_eq!(
        e_string(&qoi, &p),
        "Qoi images are not accepted; send PNG, JPEG, BMP, WebP, GIF or TIFF"
    );
}

/// xorshift64 (Marsaglia 2003): deterministic bytes without a dependency.
struct XorShift(u64);
impl XorShift {
    fn next(&mut self) -> u64 {
        self.0 ^= self.0 << 13;
        self.0 ^= self.0 >> 7;
        self.0 ^= self.0 << 17;
        self.0
    }
}

#[test]
fn truncated_and_corrupted_files_never_panic() {
    let exp = expected();
    let files: Vec<String> = exp["images"]
        .as_array()
        .unwrap()
        .iter()
        .map(|r| r["file"].as_str().unwrap().to_owned())
        .collect();
    let p = prep(
        ColorMode::Rgb,
        6,
        6,
        FitRule::Letterbox,
        ResizeFilter::Bicubic,
    );
    let mut rng = XorShift(0x9E37_79B9_7F4A_7C15);
    let (mut truncated_ok, mut flipped_err) = (0, 0);
    for file in &files {
        let bytes = read(file);
        let (full, _) = run(&bytes, &p).unwrap();
        for len in 0..bytes.len() {
            match run(&bytes[..len], &p) {
                // A cut file may decode only if nothing of the picture was lost (a PNG's final
                // IEND chunk, a GIF's later frames); a partly filled picture must be refused.
                Ok((out, _)) => {
                    truncated_ok += 1;
                    assert_eq!(
                        out, full,
                        "{file} cut to {len} bytes decoded to something else"
                    );
                }
                Err(e) => assert_ne!(
                    e.to_string(),
                    "not a decodable image: the decoder failed on malformed data",
                    "{file} cut to {len} bytes: a decoder panicked"
                ),
            }
            if len < 16 {
                // Not even a whole header: always refused.
                assert!(run(&bytes[..len], &p).is_err(), "{file} cut to {len} bytes");
            }
        }
        for _ in 0..300 {
            let mut bad = bytes.clone();
            for _ in 0..1 + rng.next() % 4 {
                let at = (rng.next() % bad.len() as u64) as usize;
                bad[at] ^= 1 + (rng.next() % 255) as u8;
            }
            if let Err(e) = run(&bad, &p) {
                flipped_err += 1;
                assert_ne!(
                    e.to_string(),
                    "not a decodable image: the decoder failed on malformed data",
                    "{file} with flipped bytes: a decoder panicked"
                );
            }
        }
    }
    eprintln!(
        "{} files: {truncated_ok} truncations still decoded, {flipped_err} of {} corrupted \
         copies refused",
        files.len(),
        files.len() * 300
    );
}

// ---------------------------------------------------------------------------------------------
// Spec and buffer mismatches

#[test]
fn spec_mismatches_are_reported() {
    let bytes = read("rgb8.png");
    let mut p = prep(
        ColorMode::Rgb,
        7,
        5,
        FitRule::Stretch,
        ResizeFilter::Nearest,
    );
    let mut out = vec![0.0; 104];
    let e = prepare_image(&bytes, &p, &ImageLimits::default(), &mut out).unwrap_err();
    assert_eq!(
        e.to_string(),
        "output buffer holds 104 values, the model input needs 105"
    );

    p.mean = vec![0.0];
    let e = run(&bytes, &p).unwrap_err();
    assert_eq!(
        e.to_string(),
        "image spec has 1 means and 3 standard deviations for 3 channels"
    );

    let p = prep(
        ColorMode::Gray,
        0,
        5,
        FitRule::Stretch,
        ResizeFilter::Nearest,
    );
    assert_eq!(
        e_string(&bytes, &p),
        "image spec asks for a 0x5 image, which is empty or too large"
    );

    let spec = InputSpec {
        shape: vec![1, 28, 28],
        image: None,
    };
    let e = image_prep(&spec).unwrap_err();
    assert_eq!(
        e.to_string(),
        "this model takes tensors only, not encoded images"
    );
}

#[test]
fn normalisation_that_overflows_is_refused() {
    // 255 / 1e-40 is far past f32::MAX (3.4e38, IEEE 754 binary32), so it becomes infinity.
    let bytes = read("gray8.png");
    let mut p = prep(
        ColorMode::Gray,
        7,
        5,
        FitRule::Stretch,
        ResizeFilter::Nearest,
    );
    p.std = vec![1e-40];
    assert!(matches!(
        run(&bytes, &p),
        Err(PrepareError::NonFinite { .. })
    ));
}

// ---------------------------------------------------------------------------------------------
// Raw tensors

fn le(values: &[f32]) -> Vec<u8> {
    values.iter().flat_map(|v| v.to_le_bytes()).collect()
}

#[test]
fn tensor_shape_must_match_exactly() {
    let mut out = vec![0.0; 784];
    let bytes = le(&[0.5; 784]);
    let e = prepare_tensor(&[28, 28], &bytes, &[1, 28, 28], &mut out).unwrap_err();
    assert_eq!(e.to_string(), "expected shape [1, 28, 28], got [28, 28]");
    let e = prepare_tensor(&[1, 28, 27], &bytes, &[1, 28, 28], &mut out).unwrap_err();
    assert_eq!(e.to_string(), "expected shape [1, 28, 28], got [1, 28, 27]");
    prepare_tensor(&[1, 28, 28], &bytes, &[1, 28, 28], &mut out).unwrap();
    assert!(out.iter().all(|&v| v == 0.5));
}

#[test]
fn tensor_byte_count_must_match() {
    let mut out = vec![0.0; 784];
    let bytes = le(&[0.5; 784]);
    let e = prepare_tensor(&[1, 28, 28], &bytes[..3135], &[1, 28, 28], &mut out).unwrap_err();
    assert_eq!(
        e.to_string(),
        "expected 3136 bytes of little-endian f32, got 3135"
    );
    let mut long = bytes.clone();
    long.extend([0; 4]);
    let e = prepare_tensor(&[1, 28, 28], &long, &[1, 28, 28], &mut out).unwrap_err();
    assert_eq!(
        e.to_string(),
        "expected 3136 bytes of little-endian f32, got 3140"
    );
}

#[test]
fn tensor_values_must_be_finite() {
    // IEEE 754 binary32: exponent all ones is NaN (any payload, either sign) or infinity.
    let mut out = vec![0.0; 8];
    for (index, bits) in [
        (5usize, 0x7FC0_0000u32),
        (0, 0xFF80_0001),
        (7, 0x7F80_0000),
        (2, 0xFF80_0000),
    ] {
        let mut values = [1.0f32; 8];
        values[index] = f32::from_bits(bits);
        let e = prepare_tensor(&[8], &le(&values), &[8], &mut out).unwrap_err();
        assert_eq!(e.to_string(), format!("element {index} is NaN or infinite"));
    }
    // The largest finite values are fine.
    let values = [
        f32::MAX,
        f32::MIN,
        f32::MIN_POSITIVE,
        -0.0,
        0.0,
        1e-45,
        -1e-45,
        3.0,
    ];
    prepare_tensor(&[8], &le(&values), &[8], &mut out).unwrap();
    assert_eq!(out, values);
}
