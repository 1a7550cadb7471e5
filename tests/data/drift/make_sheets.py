"""Sprite sheets of stamped-parts demo photos for the server's drift test.

Writes tests/data/drift/{nominal,dim,defocus}.png from the image sets that
models/stamped-parts/make_images.py puts in target/demo-data/ (see
models/stamped-parts/README.md): each sheet is a grid of 64x64 gray tiles,
20 tiles per row, filled row by row; README.md beside this script gives the
layout, the counts and the seed.

    .venv-ref/bin/python tests/data/drift/make_sheets.py [--data target/demo-data]

Needs NumPy and Pillow only.
"""

import argparse
import json
from pathlib import Path

import numpy as np
from PIL import Image

# Class folders in the model's output order (models/stamped-parts/labels.txt).
CLASSES = ["sound", "cracked", "burred", "off-centre-hole"]
TILE = 64
PER_ROW = 20
SEED = 20260405
# Sheet name -> (source set, images, equal shares of the four classes).
SHEETS = {
    "nominal": ("heldout", 1000),
    "dim": ("dim", 500),
    "defocus": ("defocus", 500),
}


def evenly_spaced(total, n):
    """floor(i * total / n) for i in range(n): every k-th item when k = total / n is whole."""
    return [i * total // n for i in range(n)]


def tiles(data, set_name, count, rng):
    per_class = count // len(CLASSES)
    assert per_class * len(CLASSES) == count, "counts split evenly over the classes"
    chosen = []
    for cls in CLASSES:
        files = sorted((data / set_name / cls).glob("*.png"))
        if len(files) < per_class:
            raise SystemExit(f"{data / set_name / cls}: {len(files)} images, need {per_class}")
        chosen += [files[i] for i in evenly_spaced(len(files), per_class)]
    order = rng.permutation(len(chosen))
    out = []
    for k in order:
        with Image.open(chosen[k]) as im:
            if im.size != (TILE, TILE) or im.mode != "L":
                raise SystemExit(f"{chosen[k]}: {im.mode} {im.size}, expected L (64, 64)")
            out.append(np.asarray(im, dtype=np.uint8))
    return out


def sheet(images):
    rows = len(images) // PER_ROW
    assert rows * PER_ROW == len(images), "whole rows only"
    grid = np.zeros((rows * TILE, PER_ROW * TILE), dtype=np.uint8)
    for i, img in enumerate(images):
        r, c = divmod(i, PER_ROW)
        grid[r * TILE:(r + 1) * TILE, c * TILE:(c + 1) * TILE] = img
    return Image.fromarray(grid, mode="L")


def main():
    here = Path(__file__).resolve().parent
    root = here.parents[2]
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--data", type=Path, default=root / "target" / "demo-data")
    ap.add_argument("--out", type=Path, default=here)
    args = ap.parse_args()
    for set_name, _ in SHEETS.values():
        meta = json.loads((args.data / set_name / "set.json").read_text())
        print(f"{set_name}: seed {meta['seed']}, shift {meta['shift']}, {meta['per_class']} per class")
    # One generator for all three sheets, drawn in the order of SHEETS, so a rerun gives the
    # same tile order.
    rng = np.random.default_rng(SEED)
    for name, (set_name, count) in SHEETS.items():
        img = sheet(tiles(args.data, set_name, count, rng))
        path = args.out / f"{name}.png"
        img.save(path, optimize=True)
        print(f"{path}: {count} tiles, {img.size[0]}x{img.size[1]}, {path.stat().st_size:,} bytes")


if __name__ == "__main__":
    main()
