#!/usr/bin/env python3
"""Write the small image files and reference values of tests/prepare_images.rs.

Generated with Pillow 13.0.0 and NumPy 2.4.6 (the versions are also recorded in
expected.json). Rerun from the repository root:

    .venv-ref/bin/python tests/data/prepare/make_images.py

Every picture is a NumPy array with a fixed seed, saved by Pillow (one file, a
16-bit RGB PNG that Pillow cannot write, is assembled here chunk by chunk per
the PNG specification, W3C REC-PNG, with zlib's deflate and CRC-32). For each
file expected.json records the model input that a spec at the file's own size
must produce, computed here with NumPy float32 arithmetic from the samples
Pillow decodes (the reference for convoy's decoders):

    value = (level * scale - mean[c]) / std[c]          (C x H x W order)

where level is the 8-bit sample, or the 16-bit sample / 257. Gray input from a
colour file uses the luma that convoy takes from the `image` crate,
Y = (2126 R + 7152 G + 722 B) // 10000 (ITU-R BT.709 coefficients, truncated
division, as in image 0.25's color.rs); a colour input from a gray file repeats
the gray level in all three channels; alpha is dropped.

Lossless files must match bit for bit. JPEG decoders may round the inverse DCT
and colour conversion differently (the JPEG standard, ITU-T T.81, allows
implementation-defined IDCT precision within bounds; libjpeg-turbo in Pillow vs
zune-jpeg in convoy), so JPEG levels are compared within 2 levels. The JPEGs are
written without chroma subsampling so that chroma upsampling, where decoders
differ by more, plays no part.

Also written: bomb files whose headers declare huge images, with valid
checksums but almost no pixel data, which convoy must refuse from the header.
"""

import json
import re
import struct
import zlib
from pathlib import Path

import numpy as np
import PIL
from PIL import Image

HERE = Path(__file__).resolve().parent
SEED = 20260801

f32 = np.float32
# The spec constants of every native-size check, written to expected.json as
# float32 bit patterns so both sides use the same values.
SCALE = f32(1.0) / f32(255.0)
RGB_MEAN = np.array([0.485, 0.456, 0.406], dtype=f32)
RGB_STD = np.array([0.229, 0.224, 0.225], dtype=f32)
GRAY_MEAN = np.array([0.5], dtype=f32)
GRAY_STD = np.array([0.25], dtype=f32)


def bits(a):
    return [int(b) for b in np.asarray(a, dtype=f32).ravel().view(np.uint32)]


def luma(rgb):
    """image crate luma on integer samples (BT.709, truncated)."""
    r, g, b = (rgb[..., i].astype(np.uint64) for i in range(3))
    return ((2126 * r + 7152 * g + 722 * b) // 10000).astype(np.uint32)


def levels_of(samples, depth):
    """Samples (H x W x C integers) -> float32 levels on the 0..255 scale."""
    s = samples.astype(f32)
    return s if depth == 8 else s / f32(257.0)


def normalise(levels_hwc, mean, std):
    chw = np.transpose(levels_hwc, (2, 0, 1))
    return (chw * SCALE - mean[:, None, None]) / std[:, None, None]


def decoded(path):
    """What Pillow decodes: (H x W x C uint array, bit depth)."""
    with Image.open(path) as im:
        im.seek(0)
        if im.mode in ("I;16", "I;16B", "I;16L", "I"):
            a = np.asarray(im, dtype=np.uint32)[..., None]
            return a, 16
        if im.mode == "L":
            return np.asarray(im)[..., None], 8
        if im.mode == "P":
            return np.asarray(im.convert("RGB")), 8
        if im.mode in ("RGB", "RGBA"):
            return np.asarray(im)[..., :3], 8
        raise ValueError(f"{path.name}: unexpected Pillow mode {im.mode}")


def record(path, samples, depth, tolerance):
    """Expected model input for gray and RGB specs at the file's own size."""
    h, w, c = samples.shape
    if c == 1:
        gray = samples
        rgb = np.repeat(samples, 3, axis=2)
    else:
        gray = luma(samples)[..., None]
        rgb = samples
    out = {
        "file": path.name,
        "width": w,
        "height": h,
        "tolerance_levels": tolerance,
    }
    for name, s, mean, std in (("gray", gray, GRAY_MEAN, GRAY_STD), ("rgb", rgb, RGB_MEAN, RGB_STD)):
        lv = levels_of(s, depth)
        out[name] = bits(normalise(lv, mean, std))
    return out


def chunk(kind, data):
    body = kind + data
    return struct.pack(">I", len(data)) + body + struct.pack(">I", zlib.crc32(body) & 0xFFFFFFFF)


def png_bytes(width, height, bit_depth, color_type, raw_rows):
    """A PNG from raw scanlines, each prefixed with filter type 0 (None)."""
    ihdr = struct.pack(">IIBBBBB", width, height, bit_depth, color_type, 0, 0, 0)
    return (
        b"\x89PNG\r\n\x1a\n"
        + chunk(b"IHDR", ihdr)
        + chunk(b"IDAT", zlib.compress(raw_rows, 9))
        + chunk(b"IEND", b"")
    )


def main():
    rng = np.random.default_rng(SEED)
    images = []

    def lossless(name, array, save, depth=8):
        path = HERE / name
        save(path)
        samples, got_depth = decoded(path)
        assert got_depth == depth, name
        want = array if array.ndim == 3 else array[..., None]
        want = want[..., :3]
        assert np.array_equal(samples, want), f"{name}: Pillow does not read back what it wrote"
        images.append(record(path, samples, depth, 0))

    h, w = 5, 7  # odd sizes catch row-stride mistakes
    gray8 = rng.integers(0, 256, (h, w), dtype=np.uint8)
    rgb8 = rng.integers(0, 256, (h, w, 3), dtype=np.uint8)
    rgba8 = rng.integers(0, 256, (h, w, 4), dtype=np.uint8)
    gray16 = rng.integers(0, 65536, (h, w), dtype=np.uint16)
    gray16[0, :2] = [0, 65535]  # both ends of the range
    rgb16 = rng.integers(0, 65536, (h, w, 3), dtype=np.uint16)

    lossless("gray8.png", gray8, lambda p: Image.fromarray(gray8).save(p))
    lossless("rgb8.png", rgb8, lambda p: Image.fromarray(rgb8).save(p))
    lossless("rgba8.png", rgba8, lambda p: Image.fromarray(rgba8).save(p))
    lossless("gray16.png", gray16.astype(np.uint32),
             lambda p: Image.fromarray(gray16).save(p), depth=16)
    lossless("rgb8.bmp", rgb8, lambda p: Image.fromarray(rgb8).save(p))
    lossless("gray8.bmp", gray8, lambda p: Image.fromarray(gray8).save(p))
    lossless("rgb8.webp", rgb8,
             lambda p: Image.fromarray(rgb8).save(p, lossless=True, exact=True))
    lossless("rgb8_lzw.tiff", rgb8,
             lambda p: Image.fromarray(rgb8).save(p, compression="tiff_lzw"))
    lossless("gray8_deflate.tiff", gray8,
             lambda p: Image.fromarray(gray8).save(p, compression="tiff_adobe_deflate"))
    lossless("gray16.tiff", gray16.astype(np.uint32),
             lambda p: Image.fromarray(gray16).save(p), depth=16)

    # GIF: an explicit 8-colour palette, two frames; only the first counts.
    palette = rng.integers(0, 256, (8, 3), dtype=np.uint8)
    index0 = rng.integers(0, 8, (h, w), dtype=np.uint8)
    index1 = (index0 + 1) % 8
    def save_gif(p):
        frames = []
        for idx in (index0, index1):
            im = Image.frombytes("P", (w, h), idx.tobytes())
            im.putpalette(palette.ravel().tolist())
            frames.append(im)
        frames[0].save(p, save_all=True, append_images=frames[1:], duration=100, loop=0,
                       optimize=False, disposal=1)
        with Image.open(p) as im:
            assert "transparency" not in im.info, "the GIF must not use transparency"
            # The second frame differs at every pixel, so matching the first proves which one
            # a decoder took.
            im.seek(1)
            second = np.asarray(im.convert("RGB"))
            assert np.all(np.any(second != palette[index0], axis=2)), "frames must differ everywhere"
    lossless("two_frames.gif", palette[index0], save_gif)

    # 16-bit RGB PNG, assembled here: Pillow reads such files only as 8-bit.
    path = HERE / "rgb16.png"
    rows = b"".join(b"\x00" + rgb16[y].astype(">u2").tobytes() for y in range(h))
    path.write_bytes(png_bytes(w, h, 16, 2, rows))
    with Image.open(path) as im:  # Pillow keeps the high byte: a check that the file is valid
        assert np.array_equal(np.asarray(im.convert("RGB")), (rgb16 >> 8).astype(np.uint8))
    images.append(record(path, rgb16.astype(np.uint32), 16, 0))

    # JPEG: smooth content (a gradient plus low noise) at quality 95, 4:4:4.
    jh, jw = 16, 24
    yy, xx = np.mgrid[0:jh, 0:jw]
    base = np.stack([xx * 10, yy * 15, (xx + yy) * 6], axis=2) + 20
    jrgb = np.clip(base + rng.integers(-3, 4, base.shape), 0, 255).astype(np.uint8)
    for name, im in (("rgb8.jpg", Image.fromarray(jrgb)),
                     ("gray8.jpg", Image.fromarray(np.ascontiguousarray(jrgb[..., 1])))):
        path = HERE / name
        im.save(path, quality=95, subsampling=0)
        samples, depth = decoded(path)
        images.append(record(path, samples, depth, 2))

    # Geometry pictures, two flat regions each (the tests work out their expected values by hand).
    def halves(w, h, left, right, name):
        a = np.full((h, w), right, dtype=np.uint8)
        a[:, : w // 2] = left
        Image.fromarray(a).save(HERE / name)
    halves(40, 20, 0, 255, "halves_0_255_40x20.png")
    halves(80, 40, 0, 255, "halves_0_255_80x40.png")
    halves(40, 20, 100, 200, "halves_100_200_40x20.png")
    halves(10, 20, 100, 200, "halves_100_200_10x20.png")
    Image.fromarray(np.full((1, 8000), 7, dtype=np.uint8)).save(HERE / "wide_8000x1.png")
    flat = np.full((17, 30, 3), [10, 128, 250], dtype=np.uint8)
    Image.fromarray(flat).save(HERE / "flat_30x17.png")

    # Bombs: headers claiming huge images, followed by almost nothing.
    # PNG 100000 x 100000 RGB 8-bit (30 GB decoded) with a valid IHDR CRC and a tiny IDAT.
    (HERE / "bomb_100000x100000.png").write_bytes(
        png_bytes(100_000, 100_000, 8, 2, b"\x00" * 16))
    # GIF 65535 x 65535 logical screen (the format's maximum), one 1x1 frame.
    gif = (b"GIF89a" + struct.pack("<HHBBB", 65535, 65535, 0x80, 0, 0) + b"\x00\x00\x00\xff\xff\xff"
           + b"\x2c" + struct.pack("<HHHHB", 0, 0, 1, 1, 0) + b"\x02\x02\x44\x01\x00" + b"\x3b")
    (HERE / "bomb_65535x65535.gif").write_bytes(gif)
    # BMP 50000 x 50000 24-bit (BITMAPINFOHEADER, Microsoft's BMP layout) with no pixel rows.
    dib = struct.pack("<IiiHHIIiiII", 40, 50_000, 50_000, 1, 24, 0, 0, 2835, 2835, 0, 0)
    bmp = b"BM" + struct.pack("<IHHI", 14 + len(dib), 0, 0, 14 + len(dib)) + dib
    (HERE / "bomb_50000x50000.bmp").write_bytes(bmp)
    # Pillow parses each header and reads the claimed size (its own bomb guard, lifted here,
    # would refuse all three).
    Image.MAX_IMAGE_PIXELS = None
    for name, size in (("bomb_100000x100000.png", (100_000, 100_000)),
                       ("bomb_65535x65535.gif", (65535, 65535)),
                       ("bomb_50000x50000.bmp", (50_000, 50_000))):
        with Image.open(HERE / name) as im:
            assert im.size == size, (name, im.size)

    expected = {
        "generator": "tests/data/prepare/make_images.py",
        "pillow": PIL.__version__,
        "numpy": np.__version__,
        "scale_bits": bits([SCALE])[0],
        "gray": {"mean_bits": bits(GRAY_MEAN), "std_bits": bits(GRAY_STD)},
        "rgb": {"mean_bits": bits(RGB_MEAN), "std_bits": bits(RGB_STD)},
        "images": images,
    }
    text = json.dumps(expected, indent=1)
    # One line per list of numbers keeps the file short and its diffs readable.
    text = re.sub(r"\[\s+([\d,\s]+?)\s+\]", lambda m: "[" + " ".join(m.group(1).split()) + "]", text)
    (HERE / "expected.json").write_text(text + "\n")
    print(f"wrote {len(images)} reference images")


if __name__ == "__main__":
    main()
