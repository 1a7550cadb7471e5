#!/usr/bin/env python3
"""Train, measure and export the stamped-parts classifier (an invented demo scenario).

Reads the PNG sets written by make_images.py, prepares each image exactly as the convoy
server does for this model (decode, gray, 64x64 so no resize, value = (p/255 - MEAN) / STD),
trains a small CNN with fixed seeds, measures it once on the held-out set and on the two
shifted copies of it (`dim`, `defocus`), and exports ONNX plus reference arrays for
`convoy import --check-input/--check-output`.

Usage (from the repository root):
  python models/stamped-parts/train.py --data target/demo-data --out target/demo-data/export

Writes into --out: stamped-parts.onnx, ref_x.npy, ref_y.npy, metrics.json, model.pt.
"""

from __future__ import annotations

import argparse
import json
import random
import sys
import time
from pathlib import Path

import numpy as np
import torch
import torch.nn as nn
import torch.nn.functional as F
from PIL import Image

CLASSES = ["sound", "cracked", "burred", "off-centre-hole"]
SIZE = 64
# Preparation constants, the same numbers are given to `convoy import`. MEAN and STD are the
# training set's pixel mean and standard deviation after scaling by 1/255, rounded to two
# decimals (common practice: normalise with statistics of the training data).
SCALE = 1.0 / 255.0
MEAN = 0.29
STD = 0.21
SEED = 7


def load_png(path: Path) -> np.ndarray:
    """Decode one PNG to uint8 gray at the model's size, refusing any other size: a resize here
    would have to match the server's resize filter bit for bit, and we avoid needing to."""
    with Image.open(path) as im:
        im = im.convert("L")
        if im.size != (SIZE, SIZE):
            raise ValueError(f"{path}: {im.size[0]}x{im.size[1]}, expected {SIZE}x{SIZE}")
        return np.asarray(im, dtype=np.uint8)


def prepare(pixels: np.ndarray) -> np.ndarray:
    """uint8 [..., H, W] -> float32 [..., 1, H, W], as the server computes it for this model."""
    x = (pixels.astype(np.float32) * np.float32(SCALE) - np.float32(MEAN)) / np.float32(STD)
    return x[..., None, :, :]


def load_set(root: Path, name: str, cache: Path):
    """All images of one set as uint8 [N, 64, 64] and labels [N]; cached as .npz."""
    cache.mkdir(parents=True, exist_ok=True)
    cfile = cache / f"{name}.npz"
    if cfile.exists():
        z = np.load(cfile)
        return z["x"], z["y"]
    xs, ys = [], []
    for ci, c in enumerate(CLASSES):
        files = sorted((root / name / c).glob("*.png"))
        if not files:
            raise FileNotFoundError(f"no PNGs in {root / name / c}; run make_images.py sets first")
        xs.extend(load_png(f) for f in files)
        ys.extend([ci] * len(files))
    x, y = np.stack(xs), np.array(ys, dtype=np.int64)
    np.savez(cfile, x=x, y=y)
    return x, y


def block(cin, cout, stride):
    return nn.Sequential(
        nn.Conv2d(cin, cout, 3, stride=stride, padding=1, bias=False),
        nn.BatchNorm2d(cout),
        nn.ReLU(inplace=True),
    )


class PartNet(nn.Module):
    """64x64 gray -> 4 logits. Five conv-BN-ReLU blocks (64 -> 32 -> 16 -> 8 spatially), global
    average pooling, one dense layer. The last block sees about 45 input pixels across, enough
    to relate the hole to the plate's outline."""

    def __init__(self, n_classes=len(CLASSES)):
        super().__init__()
        self.features = nn.Sequential(
            block(1, 16, 2),  # 32x32
            block(16, 32, 1),
            block(32, 32, 2),  # 16x16
            block(32, 64, 1),
            block(64, 64, 2),  # 8x8
        )
        self.head = nn.Linear(64, n_classes)

    def forward(self, x):
        x = self.features(x)
        x = F.adaptive_avg_pool2d(x, 1).flatten(1)
        return self.head(x)


def augment(xb: torch.Tensor, gen: torch.Generator) -> torch.Tensor:
    """Random horizontal and vertical flips: a flipped bracket has the same defect class."""
    n = xb.shape[0]
    fh = torch.rand(n, generator=gen) < 0.5
    fv = torch.rand(n, generator=gen) < 0.5
    xb = torch.where(fh[:, None, None, None], xb.flip(3), xb)
    xb = torch.where(fv[:, None, None, None], xb.flip(2), xb)
    return xb


@torch.inference_mode()
def predict(model, x: np.ndarray, batch=256) -> np.ndarray:
    model.eval()
    out = [model(torch.from_numpy(prepare(x[i : i + batch]))).numpy() for i in range(0, len(x), batch)]
    return np.concatenate(out)


def metrics(logits: np.ndarray, y: np.ndarray) -> dict:
    pred = logits.argmax(1)
    k = len(CLASSES)
    cm = np.zeros((k, k), dtype=int)
    np.add.at(cm, (y, pred), 1)
    return {
        "images": int(len(y)),
        "accuracy": round(float((pred == y).mean()), 4),
        "per_class_accuracy": {c: round(float(cm[i, i] / cm[i].sum()), 4) for i, c in enumerate(CLASSES)},
        "confusion_matrix": {
            "rows": "true class",
            "columns": "predicted class",
            "order": CLASSES,
            "counts": cm.tolist(),
        },
    }


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--data", type=Path, default=Path("target/demo-data"))
    ap.add_argument("--out", type=Path, default=Path("target/demo-data/export"))
    ap.add_argument("--epochs", type=int, default=30)
    ap.add_argument("--batch", type=int, default=64)
    ap.add_argument("--lr", type=float, default=3e-3)
    ap.add_argument("--threads", type=int, default=2)
    ap.add_argument("--val-per-class", type=int, default=100, help="training images kept aside for monitoring")
    args = ap.parse_args(argv)

    random.seed(SEED)
    np.random.seed(SEED)
    torch.manual_seed(SEED)
    torch.set_num_threads(args.threads)
    torch.use_deterministic_algorithms(True)
    args.out.mkdir(parents=True, exist_ok=True)
    cache = args.data / "cache"

    t0 = time.time()
    x_all, y_all = load_set(args.data, "train", cache)
    stats = {"mean": float(x_all.mean() / 255), "std": float(x_all.std() / 255)}
    print(f"train pixels after 1/255: mean {stats['mean']:.4f} std {stats['std']:.4f} (using {MEAN}, {STD})")

    # Monitoring split: the last --val-per-class images of each training class. The held-out set
    # is touched once, after training, and never steers anything.
    val_mask = np.zeros(len(y_all), bool)
    for ci in range(len(CLASSES)):
        idx = np.flatnonzero(y_all == ci)
        val_mask[idx[-args.val_per_class :]] = True
    x_tr, y_tr = x_all[~val_mask], y_all[~val_mask]
    x_va, y_va = x_all[val_mask], y_all[val_mask]
    xt = torch.from_numpy(prepare(x_tr))
    yt = torch.from_numpy(y_tr)

    model = PartNet()
    n_params = sum(p.numel() for p in model.parameters())
    print(f"parameters: {n_params:,}")
    steps_per_epoch = (len(xt) + args.batch - 1) // args.batch
    opt = torch.optim.AdamW(model.parameters(), lr=args.lr, weight_decay=1e-4)
    sched = torch.optim.lr_scheduler.OneCycleLR(
        opt, max_lr=args.lr, total_steps=args.epochs * steps_per_epoch, pct_start=0.2
    )
    gen = torch.Generator().manual_seed(SEED)
    history = []
    for epoch in range(args.epochs):
        model.train()
        perm = torch.randperm(len(xt), generator=gen)
        total, correct, loss_sum = 0, 0, 0.0
        for s in range(steps_per_epoch):
            idx = perm[s * args.batch : (s + 1) * args.batch]
            xb, yb = augment(xt[idx], gen), yt[idx]
            logits = model(xb)
            loss = F.cross_entropy(logits, yb)
            opt.zero_grad(set_to_none=True)
            loss.backward()
            opt.step()
            sched.step()
            loss_sum += loss.item() * len(idx)
            correct += int((logits.argmax(1) == yb).sum())
            total += len(idx)
        va = metrics(predict(model, x_va), y_va)["accuracy"]
        history.append({"epoch": epoch + 1, "loss": round(loss_sum / total, 4), "train_acc": round(correct / total, 4), "val_acc": va})
        print(f"epoch {epoch + 1:2d} loss {loss_sum / total:.4f} train {correct / total:.4f} val {va:.4f} ({time.time() - t0:.0f} s)", flush=True)
    train_seconds = time.time() - t0

    results = {}
    for name in ["heldout", "dim", "defocus"]:
        x, y = load_set(args.data, name, cache)
        results[name] = metrics(predict(model, x), y)
        r = results[name]
        print(f"{name}: accuracy {r['accuracy']:.4f}  per class {r['per_class_accuracy']}")
        print("  confusion (rows true, cols predicted):", r["confusion_matrix"]["counts"])

    # Reference arrays: the first 4 held-out images of each class, prepared as the server does.
    xh, yh = load_set(args.data, "heldout", cache)
    pick = np.concatenate([np.flatnonzero(yh == ci)[:4] for ci in range(len(CLASSES))])
    ref_x = prepare(xh[pick]).astype(np.float32)
    model.eval()
    with torch.inference_mode():
        ref_y = model(torch.from_numpy(ref_x)).numpy().astype(np.float32)
    np.save(args.out / "ref_x.npy", ref_x)
    np.save(args.out / "ref_y.npy", ref_y)

    torch.save(model.state_dict(), args.out / "model.pt")
    onnx_path = args.out / "stamped-parts.onnx"
    torch.onnx.export(
        model,
        (torch.from_numpy(ref_x[:1]),),
        str(onnx_path),
        input_names=["image"],
        output_names=["logits"],
        dynamic_axes={"image": {0: "batch"}, "logits": {0: "batch"}},
        opset_version=17,
        dynamo=False,
    )

    import onnx  # only needed for the export check

    onnx.checker.check_model(onnx.load(str(onnx_path)))
    summary = {
        "parameters": n_params,
        "preparation": {"color": "gray", "size": "64x64", "scale": SCALE, "mean": MEAN, "std": STD},
        "train_pixel_stats": {k: round(v, 4) for k, v in stats.items()},
        "training": {
            "seed": SEED,
            "epochs": args.epochs,
            "batch": args.batch,
            "optimizer": f"AdamW lr {args.lr} one-cycle, weight decay 1e-4",
            "augmentation": "random horizontal and vertical flips",
            "threads": args.threads,
            "train_images": int(len(y_tr)),
            "monitor_images": int(len(y_va)),
            "seconds": round(train_seconds, 1),
            "history": history,
        },
        "results": results,
        "reference": {"images": int(len(pick)), "heldout_indices": pick.tolist()},
        "versions": {
            "python": sys.version.split()[0],
            "torch": torch.__version__,
            "numpy": np.__version__,
            "onnx": onnx.__version__,
            "pillow": Image.__version__,
        },
    }
    (args.out / "metrics.json").write_text(json.dumps(summary, indent=2) + "\n")
    print(f"wrote {onnx_path}, ref_x.npy, ref_y.npy, metrics.json in {args.out}")
    return 0


if __name__ == "__main__":
    sys.exit(main())
