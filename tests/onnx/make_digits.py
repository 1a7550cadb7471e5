#!/usr/bin/env python3
"""Train a small CNN on the UCI handwritten digits and export it to ONNX.

Rerun from the repository root (needs the `.venv-ref` venv, see tests/onnx/README.md):

    .venv-ref/bin/python tests/onnx/make_digits.py

Data: "Optical Recognition of Handwritten Digits" (Alpaydin & Kaynak, 1998,
UCI Machine Learning Repository), the 8x8 copy that scikit-learn ships as
`sklearn.datasets.load_digits()` (1,797 images, values 0..16); see
tests/onnx/digits/DATA_SOURCE.md. Nothing is downloaded.

Fixed split: train_test_split(test_size=0.25, random_state=0, stratify=y);
pixels scaled by 1/16 to [0, 1]. Training is deterministic (torch.manual_seed,
one thread, deterministic algorithms, a seeded generator for shuffling) and
must reach held-out accuracy >= 0.97.

Written to tests/onnx/digits/:

    digits_cnn.onnx     TorchScript exporter, opset 17, dynamic batch
    test_x.npy          float32 [N, 1, 8, 8], held-out images, scaled
    test_y.npy          float32 [N], held-out labels 0..9
    torch_logits.npy    float32 [N, 10], PyTorch's logits for test_x (eval, inference_mode)
    summary.json        accuracy, predictions, seed, split, epochs, versions
    DATA_SOURCE.md      where the data comes from and its licence

The exported file is checked with onnx.checker and run with the `onnx`
package's reference evaluator on test_x; its largest absolute difference
from torch_logits must be <= 1e-4 * max(1, max |logits|) with identical
top-1 (the tolerance the Rust side applies too).
"""

import json
import sys
import warnings
from pathlib import Path

import numpy as np
import onnx
import onnx.reference
import sklearn
import torch
import torch.nn as nn
import torch.nn.functional as F
from sklearn.datasets import load_digits
from sklearn.model_selection import train_test_split

HERE = Path(__file__).resolve().parent
OUT = HERE / "digits"
SEED = 1234
EPOCHS = 40
BATCH = 32
LR = 2e-3
MIN_ACCURACY = 0.97
REL_TOL = 1e-4


class DigitsCnn(nn.Module):
    """conv3x3(16)+ReLU, conv3x3(32)+ReLU, max-pool 2, flatten, Linear(512, 10) on 1x8x8."""

    def __init__(self):
        super().__init__()
        self.conv1 = nn.Conv2d(1, 16, 3, padding=1)
        self.conv2 = nn.Conv2d(16, 32, 3, padding=1)
        self.fc = nn.Linear(32 * 4 * 4, 10)

    def forward(self, x):
        x = F.relu(self.conv1(x))
        x = F.relu(self.conv2(x))
        x = F.max_pool2d(x, 2)
        return self.fc(torch.flatten(x, 1))


def main():
    torch.set_num_threads(1)
    torch.use_deterministic_algorithms(True)
    torch.manual_seed(SEED)
    warnings.filterwarnings("ignore", category=DeprecationWarning)
    OUT.mkdir(exist_ok=True)

    digits = load_digits()
    x = (digits.data.astype(np.float64) / 16.0).astype(np.float32).reshape(-1, 1, 8, 8)
    y = digits.target.astype(np.int64)
    x_train, x_test, y_train, y_test = train_test_split(
        x, y, test_size=0.25, random_state=0, stratify=y
    )

    model = DigitsCnn()
    opt = torch.optim.Adam(model.parameters(), lr=LR)
    xt, yt = torch.from_numpy(x_train), torch.from_numpy(y_train)
    gen = torch.Generator().manual_seed(SEED)
    for epoch in range(EPOCHS):
        model.train()
        perm = torch.randperm(len(xt), generator=gen)
        total = 0.0
        for i in range(0, len(xt), BATCH):
            idx = perm[i : i + BATCH]
            opt.zero_grad()
            loss = F.cross_entropy(model(xt[idx]), yt[idx])
            loss.backward()
            opt.step()
            total += loss.item() * len(idx)
        if epoch % 10 == 9 or epoch == EPOCHS - 1:
            print(f"epoch {epoch + 1}: train loss {total / len(xt):.4f}")

    model.eval()
    with torch.inference_mode():
        logits = model(torch.from_numpy(x_test)).numpy().astype(np.float32)
    pred = logits.argmax(1)
    acc = float((pred == y_test).mean())
    print(f"held-out accuracy {acc:.4f} on {len(y_test)} images")
    if acc < MIN_ACCURACY:
        print(f"accuracy below {MIN_ACCURACY}", file=sys.stderr)
        return 1

    onnx_path = OUT / "digits_cnn.onnx"
    torch.onnx.export(
        model,
        (torch.from_numpy(x_test[:2]),),
        str(onnx_path),
        dynamo=False,
        opset_version=17,
        input_names=["input"],
        output_names=["logits"],
        dynamic_axes={"input": {0: "batch"}, "logits": {0: "batch"}},
    )
    onnx.checker.check_model(str(onnx_path), full_check=True)
    ref = onnx.reference.ReferenceEvaluator(str(onnx_path)).run(None, {"input": x_test})[0]
    diff = float(np.max(np.abs(ref.astype(np.float64) - logits)))
    tol = REL_TOL * max(1.0, float(np.max(np.abs(logits))))
    if diff > tol or not np.array_equal(ref.argmax(1), pred):
        print(f"reference evaluator differs from PyTorch by {diff} (tolerance {tol})", file=sys.stderr)
        return 1
    m = onnx.load(str(onnx_path))
    ops = sorted({n.op_type for n in m.graph.node})

    np.save(OUT / "test_x.npy", x_test)
    np.save(OUT / "test_y.npy", y_test.astype(np.float32))
    np.save(OUT / "torch_logits.npy", logits)
    summary = {
        "n_test": int(len(y_test)),
        "torch_accuracy": acc,
        "torch_predictions": [int(p) for p in pred],
        "seed": SEED,
        "split": "sklearn.model_selection.train_test_split(test_size=0.25, random_state=0, stratify=y); X/16",
        "epochs": EPOCHS,
        "batch_size": BATCH,
        "optimizer": f"Adam(lr={LR})",
        "model": "conv3x3(1->16,pad1)+ReLU, conv3x3(16->32,pad1)+ReLU, MaxPool2, flatten, Linear(512,10)",
        "onnx_file": onnx_path.name,
        "onnx_opset": 17,
        "onnx_ops": ops,
        "onnx_input_name": "input",
        "onnx_output_name": "logits",
        "reference_evaluator_max_abs_diff": diff,
        "tolerance": "max abs error <= 1e-4 * max(1, max|reference|), identical top-1",
        "torch_version": torch.__version__,
        "onnx_version": onnx.__version__,
        "sklearn_version": sklearn.__version__,
        "numpy_version": np.__version__,
    }
    with open(OUT / "summary.json", "w") as f:
        json.dump(summary, f, indent=1)
        f.write("\n")
    (OUT / "DATA_SOURCE.md").write_text(DATA_SOURCE)
    print(f"reference evaluator max abs diff {diff:.3g}; ops {ops}")
    return 0


DATA_SOURCE = """\
# Data source: handwritten digits

`test_x.npy` and `test_y.npy` are the held-out quarter of the
**Optical Recognition of Handwritten Digits** data set:

- Authors: E. Alpaydin and C. Kaynak, Department of Computer Engineering,
  Bogazici University, Istanbul; donated July 1998.
- Citation: Alpaydin, E. & Kaynak, C. (1998). Optical Recognition of
  Handwritten Digits [Dataset]. UCI Machine Learning Repository,
  https://archive.ics.uci.edu/dataset/80/optical+recognition+of+handwritten+digits
  (DOI 10.24432/C50P49 -- the DOI is quoted from memory; the page above is
  the authority).
- Licence: Creative Commons Attribution 4.0 International (CC BY 4.0), the
  licence the UCI Machine Learning Repository gives this data set.
- Copy used: the one bundled with scikit-learn,
  `sklearn.datasets.load_digits()`: 1,797 images of 8x8 pixels with values
  0..16, which scikit-learn's description calls a copy of the test set of the
  UCI data (`optdigits.tes`, 1,797 instances in the UCI description). Nothing
  is downloaded.

Preparation: `train_test_split(test_size=0.25, random_state=0, stratify=y)`
from scikit-learn, pixels divided by 16 to lie in [0, 1], stored as float32
`[N, 1, 8, 8]`; labels 0..9 stored as float32 `[N]`.

These files are a test check only (the trained CNN in `digits_cnn.onnx` must
reproduce PyTorch's logits and accuracy after `convoy import`), not demo data.

Regenerate from the repository root:

    .venv-ref/bin/python tests/onnx/make_digits.py
"""


if __name__ == "__main__":
    sys.exit(main())
