#!/usr/bin/env python3
"""Synthetic photos for the stamped-parts demo (an invented scenario).

A camera over a conveyor belt photographs stamped metal brackets: a flat plate with rounded
corners and one punched hole. Each photo is rendered procedurally with NumPy, 4x supersampled
and box-averaged down to the sensor's 64x64 grayscale pixels, then written as a PNG with
Pillow. The network's input size is 64x64 too, so the server never has to resize these
images and the only preparation is scale/mean/std.

Classes, in output order:
  sound            clean plate, hole centred (within 0.7 px)
  cracked          thin dark jagged line running in from the plate edge or the hole's edge
  burred           ragged bright/dark material along part of the outline or around the hole
  off-centre-hole  hole displaced 3.5..7.5 px (at 64 px) from the plate's centre

Nuisance variation in every class: plate position, rotation and size, belt texture, brushed
metal streaks and highlight, lamp level and gradient, dust specks, slight optical blur and
sensor noise. Two shifted conditions re-render the held-out scenes: `dim` (the lamp at 55 %)
and `defocus` (an extra Gaussian blur of sigma 2 px before the noise).

Every image has its own seed derived from (set seed, class, index), so any image can be
regenerated on its own and the result does not depend on the number of worker processes.

Usage:
  python make_images.py samples                   # 8 PNGs into samples/ (committed)
  python make_images.py sets --out target/demo-data [--train 2000 --heldout 300]
"""

from __future__ import annotations

import argparse
import json
import os
import sys
from concurrent.futures import ProcessPoolExecutor
from pathlib import Path

import numpy as np
from PIL import Image

CLASSES = ["sound", "cracked", "burred", "off-centre-hole"]
SIZE = 64  # output pixels per side
SS = 4  # supersampling factor
N = SIZE * SS

# Seeds of the sets. `dim` and `defocus` reuse the held-out seed on purpose: they are the very
# same scenes photographed under the shifted condition, so any change in accuracy comes from
# the shift alone.
SEEDS = {"train": 20260101, "heldout": 20260202, "samples": 20260303}
SHIFTS = {"heldout": None, "dim": "dim", "defocus": "defocus"}
DIM_LAMP = 0.55
DEFOCUS_SIGMA = 2.0

# Hi-res pixel centres in output-pixel units.
_c = (np.arange(N) + 0.5) / SS
GX, GY = np.meshgrid(_c, _c)


def smooth_noise(rng, cells, amp):
    """Low-frequency noise: a coarse random grid bilinearly upsampled to N x N."""
    g = rng.normal(0.0, 1.0, (cells + 1, cells + 1))
    t = np.linspace(0, cells, N)
    i = np.minimum(t.astype(int), cells - 1)
    f = t - i
    rows = g[i] * (1 - f)[:, None] + g[i + 1] * f[:, None]
    out = rows[:, i] * (1 - f)[None, :] + rows[:, i + 1] * f[None, :]
    return amp * out


def gaussian_blur(img, sigma):
    """Separable Gaussian blur with reflected edges (img in any units, 2-D)."""
    if sigma <= 0:
        return img
    r = max(1, int(np.ceil(3 * sigma)))
    k = np.exp(-0.5 * (np.arange(-r, r + 1) / sigma) ** 2)
    k /= k.sum()
    p = np.pad(img, r, mode="reflect")
    tmp = sum(k[j] * p[:, j : j + img.shape[1]] for j in range(2 * r + 1))
    return sum(k[j] * tmp[j : j + img.shape[0], :] for j in range(2 * r + 1))


def rounded_rect_sdf(u, v, a, b, r):
    """Signed distance (negative inside) to a rounded rectangle of half-sizes a x b."""
    qx = np.abs(u) - a + r
    qy = np.abs(v) - b + r
    outside = np.hypot(np.maximum(qx, 0), np.maximum(qy, 0))
    inside = np.minimum(np.maximum(qx, qy), 0)
    return outside + inside - r


def polyline_distance(px, py, pts):
    """Distance from every pixel to a polyline and the arc-length fraction of the nearest point."""
    best = np.full(px.shape, np.inf)
    frac = np.zeros(px.shape)
    seg = np.diff(pts, axis=0)
    lens = np.hypot(seg[:, 0], seg[:, 1])
    cum = np.concatenate([[0.0], np.cumsum(lens)])
    total = cum[-1]
    for k in range(len(seg)):
        ax, ay = pts[k]
        dx, dy = seg[k]
        l2 = max(dx * dx + dy * dy, 1e-9)
        t = np.clip(((px - ax) * dx + (py - ay) * dy) / l2, 0, 1)
        d = np.hypot(px - ax - t * dx, py - ay - t * dy)
        m = d < best
        best[m] = d[m]
        frac[m] = (cum[k] + t[m] * lens[k]) / total
    return best, frac


def jagged_walk(rng, start, heading, length, step=0.45, jitter=0.6):
    """A crack path (plate coordinates): short jagged steps around a slowly wandering heading
    that stays within about 35 degrees of `heading`, so the crack keeps running inward."""
    pts = [np.array(start, float)]
    drift = 0.0
    for _ in range(max(3, int(length / step))):
        drift = float(np.clip(0.9 * drift + rng.normal(0, 0.15), -0.6, 0.6))
        h = heading + drift + rng.normal(0, jitter)
        pts.append(pts[-1] + step * np.array([np.cos(h), np.sin(h)]))
    return np.array(pts)


def render(rng: np.random.Generator, cls: str, shift: str | None = None) -> np.ndarray:
    """One 64x64 uint8 photo of class `cls` under condition `shift` (None, 'dim', 'defocus')."""
    # --- belt: dark rubber with transverse ridges and mottling --------------------------------
    belt = rng.uniform(38, 62)
    period = rng.uniform(2.6, 4.5)
    belt_angle = rng.normal(0, 0.04)
    bx = GX * np.cos(belt_angle) + GY * np.sin(belt_angle)
    img = (
        belt
        + rng.uniform(2, 5) * np.sin(2 * np.pi * bx / period + rng.uniform(0, 2 * np.pi))
        + smooth_noise(rng, 6, rng.uniform(3, 7))
        + smooth_noise(rng, 24, 2.5)
    )

    # --- plate pose ----------------------------------------------------------------------------
    s = rng.uniform(0.85, 1.1)
    a, b, rc = 19.0 * s * rng.uniform(0.96, 1.04), 13.0 * s * rng.uniform(0.96, 1.04), 4.0 * s
    cx, cy = SIZE / 2 + rng.uniform(-5, 5), SIZE / 2 + rng.uniform(-5, 5)
    th = rng.uniform(-0.6, 0.6) + (np.pi if rng.random() < 0.5 else 0.0)
    ct, st = np.cos(th), np.sin(th)
    U = ct * (GX - cx) + st * (GY - cy)
    V = -st * (GX - cx) + ct * (GY - cy)
    d = rounded_rect_sdf(U, V, a, b, rc)

    # Soft shadow of the plate on the belt (lamp up and to the left).
    sh = rounded_rect_sdf(U - (ct * 1.2 + st * 1.6), V - (-st * 1.2 + ct * 1.6), a, b, rc)
    img *= 1 - 0.35 / (1 + np.exp(sh / 0.9))

    # --- hole placement -----------------------------------------------------------------------
    rh = 4.2 * s * rng.uniform(0.92, 1.08)
    if cls == "off-centre-hole":
        lim_u, lim_v = a - rh - 2.2, b - rh - 2.2
        while True:
            ang = rng.uniform(0, 2 * np.pi)
            mag = rng.uniform(3.5, 7.5) * s
            hu, hv = mag * np.cos(ang), mag * np.sin(ang)
            hu, hv = np.clip(hu, -lim_u, lim_u), np.clip(hv, -lim_v, lim_v)
            if np.hypot(hu, hv) >= 3.5 * s:
                break
    else:
        ang, mag = rng.uniform(0, 2 * np.pi), 0.7 * np.sqrt(rng.random())
        hu, hv = mag * np.cos(ang), mag * np.sin(ang)
    dh = np.hypot(U - hu, V - hv) - rh

    # --- brushed metal ------------------------------------------------------------------------
    metal = rng.uniform(150, 195)
    vgrid = np.arange(-40, 40, 0.3)
    streaks = gaussian_blur(rng.normal(0, 1, (1, vgrid.size)), 0.8)[0]
    streaks = np.interp(V + 0.02 * U, vgrid, streaks) * rng.uniform(5, 10)
    band_pos, band_w = rng.uniform(-a, a), rng.uniform(6, 14)
    highlight = rng.uniform(8, 25) * np.exp(-0.5 * ((U - band_pos + 0.3 * V) / band_w) ** 2)
    plate = metal + streaks + highlight + smooth_noise(rng, 5, 3)

    # Bevel: the outline's rim lit on the lamp side, dark on the far side.
    gy_, gx_ = np.gradient(d)
    norm = np.hypot(gx_, gy_) + 1e-9
    lit = -(gx_ * -0.6 + gy_ * -0.8) / norm
    rim = np.clip(1 + d / 1.1, 0, 1)
    plate += rim * (28 * lit - 12)

    # --- defects on the metal -----------------------------------------------------------------
    burr_alpha = np.zeros_like(d)
    burr_tex = None
    if cls == "cracked":
        plate = add_crack(rng, plate, U, V, a, b, rc, hu, hv, rh, d, dh)
    elif cls == "burred":
        burr_alpha, burr_tex, d, dh = add_burr(rng, U, V, a, b, hu, hv, rh, d, dh)

    # Dust specks: benign, every class, on belt and plate alike.
    for _ in range(rng.poisson(1.5)):
        px, py = rng.uniform(0, SIZE, 2)
        rad = rng.uniform(0.3, 0.7)
        speck = np.exp(-0.5 * ((GX - px) ** 2 + (GY - py) ** 2) / rad**2)
        tone = rng.choice([-1.0, 1.0]) * rng.uniform(15, 40)
        plate += tone * speck
        img += tone * speck * 0.6

    # --- composite: belt, plate (minus hole), hole wall, burr -----------------------------------
    hole_wall = np.clip(1 - np.abs(dh + 0.4) / 0.6, 0, 1)
    wall_lit = ((GX - cx - (ct * hu - st * hv)) * 0.6 + (GY - cy - (st * hu + ct * hv)) * 0.8) / (
        rh + 1e-9
    )
    inside_plate = (d < 0) & (dh > 0)
    out = np.where(inside_plate, plate, img)
    # Through the hole the belt is in the plate's shadow.
    out = np.where((d < 0) & (dh <= 0), img * 0.6, out)
    out = out + hole_wall * (d < 0) * (30 * wall_lit - 10)
    if burr_tex is not None:
        out = out * (1 - burr_alpha) + burr_tex * burr_alpha

    # --- camera: downsample, lamp, optics, noise ----------------------------------------------
    out = out.reshape(SIZE, SS, SIZE, SS).mean(axis=(1, 3))
    lamp = rng.uniform(0.88, 1.1)
    ga, gang = rng.uniform(0, 0.22), rng.uniform(0, 2 * np.pi)
    xs = (np.arange(SIZE) + 0.5 - SIZE / 2) / (SIZE / 2)
    X, Y = np.meshgrid(xs, xs)
    illum = lamp * (1 + ga * (X * np.cos(gang) + Y * np.sin(gang))) * (1 - 0.08 * (X**2 + Y**2))
    if shift == "dim":
        illum = illum * DIM_LAMP
    out = out * illum
    out = gaussian_blur(out, rng.uniform(0.25, 0.6))
    if shift == "defocus":
        out = gaussian_blur(out, DEFOCUS_SIGMA)
    read, shot = rng.uniform(1.2, 3.0), rng.uniform(0.02, 0.05)
    out = out + rng.normal(0, 1, out.shape) * np.sqrt(read**2 + shot * np.maximum(out, 0))
    return np.clip(np.rint(out), 0, 255).astype(np.uint8)


def add_crack(rng, plate, U, V, a, b, rc, hu, hv, rh, d, dh):
    """Darken a thin jagged path from the outline (or the hole's edge) into the metal."""
    if rng.random() < 0.3:
        # From the hole's edge outward.
        phi = rng.uniform(0, 2 * np.pi)
        start = (hu + rh * np.cos(phi), hv + rh * np.sin(phi))
        heading = phi + rng.normal(0, 0.3)
        length = rng.uniform(6.5, 10.0)
    else:
        # From a straight part of the outline inward.
        side = rng.integers(4)
        if side < 2:  # long sides v = +-b
            sgn = 1 if side == 0 else -1
            start = (rng.uniform(-a + rc + 2, a - rc - 2), sgn * b)
            heading = -sgn * np.pi / 2 + rng.normal(0, 0.45)
            length = rng.uniform(7.0, 1.3 * b)
        else:  # short sides u = +-a
            sgn = 1 if side == 2 else -1
            start = (sgn * a, rng.uniform(-b + rc + 2, b - rc - 2))
            heading = (np.pi if sgn == 1 else 0.0) + rng.normal(0, 0.45)
            length = rng.uniform(7.0, 0.9 * a)
    pts = jagged_walk(rng, start, heading, length)
    # Start the path just outside the edge so it notches the outline.
    pts = np.vstack([pts[0] - 0.6 * (pts[1] - pts[0]) / 0.45, pts])
    if rng.random() < 0.35:
        k = rng.integers(len(pts) // 3, max(len(pts) // 3 + 1, 2 * len(pts) // 3))
        seg = pts[min(k + 1, len(pts) - 1)] - pts[k]
        h0 = np.arctan2(seg[1], seg[0]) + rng.choice([-1, 1]) * rng.uniform(0.5, 1.0)
        branch = jagged_walk(rng, pts[k], h0, rng.uniform(2.5, 5.0))
    else:
        branch = None
    w0 = rng.uniform(0.55, 0.9)
    depth = rng.uniform(0.55, 0.8)

    def stroke(path, w_start, w_end):
        dist, frac = polyline_distance(U, V, path)
        w = w_start + (w_end - w_start) * frac
        return np.clip(1 - dist / w, 0, 1)

    prof = stroke(pts, w0, 0.2)
    if branch is not None:
        prof = np.maximum(prof, stroke(branch, 0.7 * w0, 0.15))
    # A faint bright lip beside the crack where the edge of the fracture catches the light.
    lip = np.clip(stroke(pts + np.array([0.35, 0.35]), w0 * 1.2, 0.3) - prof, 0, 1)
    return plate * (1 - depth * prof) + 18 * lip


def add_burr(rng, U, V, a, b, hu, hv, rh, d, dh):
    """Ragged material along a stretch of the outline or around the hole.

    Returns the burr's opacity, its texture and the plate and hole distance fields with the
    ragged material cut into them (so the outline really is torn, not only painted)."""
    speck = rng.normal(0, 1, U.shape)
    speck = gaussian_blur(speck, 0.9 * SS / 2)
    speck = speck / (speck.std() + 1e-9)
    tex = np.where(speck > 0, 215 + 35 * np.tanh(speck), 70 + 40 * np.tanh(speck))

    def ragged(param, centre, half, cycles_per_rad, max_out):
        """Protrusion height along an angular parameter, tapered to zero at the stretch's ends."""
        off = np.angle(np.exp(1j * (param - centre)))
        win = np.clip(1 - (off / half) ** 2, 0, 1) ** 0.5
        h = np.zeros_like(param)
        for _ in range(4):
            f = cycles_per_rad * rng.uniform(0.6, 1.8)
            h += rng.uniform(0.3, 1.0) * np.sin(f * param + rng.uniform(0, 2 * np.pi))
        h = 0.5 + 0.5 * np.tanh(h)
        return max_out * win * (0.35 + 0.65 * h), win

    if rng.random() < 0.65:
        # Along the outline: angle around the plate centre, normalised to the plate's shape.
        phi = np.arctan2(V / b, U / a)
        half = rng.uniform(0.28, 0.5)
        h, win = ragged(phi, rng.uniform(-np.pi, np.pi), half, 9.0, rng.uniform(1.4, 2.4))
        zone = (d < h) & (d > -1.4 * win) & (win > 0)
        d = np.minimum(d, np.where(win > 0, d - h, d))
    else:
        # Around the hole: material left hanging into it.
        psi = np.arctan2(V - hv, U - hu)
        half = rng.uniform(0.9, np.pi)
        h, win = ragged(psi, rng.uniform(-np.pi, np.pi), half, 7.0, rng.uniform(1.3, 2.0))
        zone = (dh > -h) & (dh < 1.3 * win) & (win > 0)
        dh = np.maximum(dh, np.where(win > 0, dh + h, dh))
    alpha = zone * rng.uniform(0.75, 0.95)
    return alpha.astype(float), tex, d, dh


# ---------------------------------------------------------------------------------------------


def image_seed(set_seed: int, cls_index: int, index: int) -> np.random.SeedSequence:
    return np.random.SeedSequence([set_seed, cls_index, index])


def _write_one(job):
    out_dir, set_seed, shift, ci, i = job
    rng = np.random.default_rng(image_seed(set_seed, ci, i))
    img = render(rng, CLASSES[ci], shift)
    path = Path(out_dir) / CLASSES[ci] / f"{i:05d}.png"
    Image.fromarray(img).save(path, optimize=False)
    return float(img.mean())


def write_set(root: Path, name: str, per_class: int, set_seed: int, shift, workers: int):
    out_dir = root / name
    for c in CLASSES:
        (out_dir / c).mkdir(parents=True, exist_ok=True)
    jobs = [(str(out_dir), set_seed, shift, ci, i) for ci in range(len(CLASSES)) for i in range(per_class)]
    with ProcessPoolExecutor(max_workers=workers) as ex:
        means = list(ex.map(_write_one, jobs, chunksize=32))
    info = {
        "set": name,
        "per_class": per_class,
        "seed": set_seed,
        "shift": shift,
        "mean_pixel": round(float(np.mean(means)), 2),
    }
    (out_dir / "set.json").write_text(json.dumps(info, indent=2) + "\n")
    print(f"{name}: {per_class * len(CLASSES)} images, mean pixel {info['mean_pixel']}", flush=True)
    return info


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    sub = ap.add_subparsers(dest="cmd", required=True)
    sp = sub.add_parser("samples", help="two PNGs per class into samples/")
    sp.add_argument("--out", type=Path, default=Path(__file__).resolve().parent / "samples")
    ss = sub.add_parser("sets", help="training, held-out and shifted held-out sets")
    ss.add_argument("--out", type=Path, default=Path("target/demo-data"))
    ss.add_argument("--train", type=int, default=2000, help="training images per class")
    ss.add_argument("--heldout", type=int, default=300, help="held-out images per class")
    ss.add_argument("--workers", type=int, default=min(2, os.cpu_count() or 1))
    ss.add_argument("--only", choices=["train", "heldout", "dim", "defocus"], action="append")
    args = ap.parse_args(argv)

    if args.cmd == "samples":
        args.out.mkdir(parents=True, exist_ok=True)
        for ci, c in enumerate(CLASSES):
            for k in (1, 2):
                rng = np.random.default_rng(image_seed(SEEDS["samples"], ci, k))
                Image.fromarray(render(rng, c)).save(args.out / f"{c}-{k}.png")
        print(f"wrote {2 * len(CLASSES)} samples to {args.out}")
        return 0

    wanted = args.only or ["train", "heldout", "dim", "defocus"]
    infos = []
    if "train" in wanted:
        infos.append(write_set(args.out, "train", args.train, SEEDS["train"], None, args.workers))
    for name, shift in SHIFTS.items():
        if name in wanted:
            infos.append(write_set(args.out, name, args.heldout, SEEDS["heldout"], shift, args.workers))
    return 0


if __name__ == "__main__":
    sys.exit(main())
