#!/usr/bin/env python3
"""Check that the convoy bundle classifies like PyTorch, then write summary.json.

For each sample PNG, and for every image of the held-out and shifted sets, prepare the input
exactly as the convoy server does for this bundle (decode, gray, 64x64 so no resize,
(p/255 - MEAN) / STD in float32), run it through `convoy run`, and compare with the trained
PyTorch model: same top-1 class, and logits within convoy's import tolerance
1e-4 * max(1, max |reference|) (the bound `convoy import` itself checks, see the README).

Usage (from the repository root, after train.py and `convoy import`):
  python models/stamped-parts/verify.py
"""

from __future__ import annotations

import argparse
import json
import subprocess
import sys
import tempfile
from pathlib import Path

import numpy as np
import torch

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))
import make_images  # noqa: E402
import train  # noqa: E402


def convoy_run(binary: Path, bundle: Path, x: np.ndarray, batch: int = 400) -> np.ndarray:
    """Logits from `convoy run`, in batches (the engine refuses batches above 1024)."""
    outs = []
    with tempfile.TemporaryDirectory() as d:
        xi, yo = Path(d) / "x.npy", Path(d) / "y.npy"
        for i in range(0, len(x), batch):
            np.save(xi, np.ascontiguousarray(x[i : i + batch], dtype=np.float32))
            subprocess.run([str(binary), "run", str(bundle), "--input", str(xi), "--output", str(yo)], check=True)
            outs.append(np.load(yo))
    return np.concatenate(outs)


def compare(name, ref: np.ndarray, ours: np.ndarray) -> dict:
    bound = 1e-4 * max(1.0, float(np.abs(ref).max()))
    err = float(np.abs(ref - ours).max())
    same = int((ref.argmax(1) == ours.argmax(1)).sum())
    ok = same == len(ref) and err <= bound
    print(f"{name}: {same}/{len(ref)} same top-1, max |logit difference| {err:.2e} (bound {bound:.2e}) -> {'ok' if ok else 'MISMATCH'}")
    return {"images": len(ref), "same_top1": same, "max_abs_logit_difference": float(f"{err:.3g}"), "bound": float(f"{bound:.3g}"), "ok": ok}


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--bundle", type=Path, default=Path("models/stamped-parts.cvb"))
    ap.add_argument("--convoy", type=Path, default=Path("target/release/convoy"))
    ap.add_argument("--data", type=Path, default=Path("target/demo-data"))
    ap.add_argument("--export", type=Path, default=Path("target/demo-data/export"))
    ap.add_argument("--summary", type=Path, default=HERE / "summary.json")
    args = ap.parse_args(argv)

    model = train.PartNet()
    model.load_state_dict(torch.load(args.export / "model.pt", weights_only=True))
    model.eval()

    checks = {}
    # The committed sample photos, one by one as a client would send them.
    files = sorted((HERE / "samples").glob("*.png"))
    pix = np.stack([train.load_png(f) for f in files])
    x = train.prepare(pix)
    with torch.inference_mode():
        ref = model(torch.from_numpy(x)).numpy()
    ours = convoy_run(args.convoy, args.bundle, x)
    checks["samples"] = compare("samples", ref, ours)
    samples = {}
    for f, r, o in zip(files, ref, ours):
        p = np.exp(o - o.max())
        p /= p.sum()
        k = int(o.argmax())
        samples[f.name] = {"convoy": train.CLASSES[k], "pytorch": train.CLASSES[int(r.argmax())], "probability": round(float(p[k]), 4)}
        print(f"  {f.name:24s} convoy {train.CLASSES[k]:16s} p={p[k]:.4f}  pytorch {train.CLASSES[int(r.argmax())]}")

    # Whole held-out and shifted sets.
    cache = args.data / "cache"
    for name in ["heldout", "dim", "defocus"]:
        xs, _ = train.load_set(args.data, name, cache)
        ref = train.predict(model, xs)
        ours = convoy_run(args.convoy, args.bundle, train.prepare(xs))
        checks[name] = compare(name, ref, ours)

    m = json.loads((args.export / "metrics.json").read_text())
    sets = {n: json.loads((args.data / n / "set.json").read_text()) for n in ["train", "heldout", "dim", "defocus"]}
    held = sets["heldout"]
    summary = {
        "model": {
            "name": "stamped-parts",
            "version": "1.0.0",
            "classes": train.CLASSES,
            "parameters_pytorch": m["parameters"],
            # The exporter folds each BatchNorm into its convolution: the BN's scale and shift
            # (2 per channel) become one bias per channel.
            "parameters_in_bundle": m["parameters"] - sum(b.num_features for b in model.modules() if isinstance(b, torch.nn.BatchNorm2d)),
            "bundle_bytes": args.bundle.stat().st_size,
        },
        "scenario": "invented demo; synthetic images from make_images.py",
        "preparation": m["preparation"],
        "data": {
            "image": "64x64 8-bit gray PNG, rendered 4x supersampled",
            "train": {
                "per_class": sets["train"]["per_class"],
                "seed": sets["train"]["seed"],
                "used_for_training": m["training"]["train_images"],
                "kept_aside_for_monitoring": m["training"]["monitor_images"],
                "mean_pixel": sets["train"]["mean_pixel"],
            },
            "heldout": {"per_class": held["per_class"], "seed": held["seed"], "mean_pixel": held["mean_pixel"]},
            "dim": {
                "per_class": sets["dim"]["per_class"],
                "seed": sets["dim"]["seed"],
                "shift": f"lamp at {make_images.DIM_LAMP:.0%}; same scenes as heldout",
                "mean_pixel": sets["dim"]["mean_pixel"],
            },
            "defocus": {
                "per_class": sets["defocus"]["per_class"],
                "seed": sets["defocus"]["seed"],
                "shift": f"extra Gaussian blur sigma {make_images.DEFOCUS_SIGMA} px; same scenes as heldout",
                "mean_pixel": sets["defocus"]["mean_pixel"],
            },
            "samples_seed": make_images.SEEDS["samples"],
        },
        "training": {k: v for k, v in m["training"].items() if k != "history"},
        "final_epoch": m["training"]["history"][-1],
        "results": m["results"],
        "convoy_vs_pytorch": checks,
        "sample_predictions": samples,
        "versions": {**m["versions"], "convoy": subprocess.run([str(args.convoy), "--version"], capture_output=True, text=True).stdout.strip()},
    }
    args.summary.write_text(json.dumps(summary, indent=2) + "\n")
    print(f"wrote {args.summary}")
    return 0 if all(c["ok"] for c in checks.values()) else 1


if __name__ == "__main__":
    sys.exit(main())
