#!/usr/bin/env python3
"""Build the ONNX test zoo that `convoy import` is checked against.

Rerun from the repository root (needs the `.venv-ref` venv, see tests/onnx/README.md):

    .venv-ref/bin/python tests/onnx/make_zoo.py

For each network below we draw its weights from a NumPy generator with a fixed
seed (so the numbers do not depend on torch's own RNG), put it in eval mode,
and export it with both of PyTorch's ONNX exporters:

* the TorchScript exporter (`torch.onnx.export(..., dynamo=False)`), opset 17,
  dynamic batch dimension, plus a few variants (other opsets, BatchNormalization
  kept as a node);
* the torch.export-based exporter (`dynamo=True`) at its default opset, dynamic
  batch dimension; two of its files keep their weights in a separate
  `<file>.data` file beside the model (ONNX "external data").

Written to tests/onnx/zoo/:

    <net>.<exporter>[.<variant>].onnx   the exported model (+ .onnx.data when external)
    <net>.input.npy                     float32 [4, C, H, W], standard normal, fixed seed
    <net>.output.npy                    PyTorch's float32 output for that input
                                        (eval mode, torch.inference_mode, 1 thread, CPU)
    manifest.json                       one entry per exported file (see README.md)

Every exported file is checked with `onnx.checker.check_model` and run with the
`onnx` package's own reference evaluator (`onnx.reference.ReferenceEvaluator`)
on the same input; the largest absolute difference from PyTorch's output is
recorded in the manifest and must be within
    1e-4 * max(1, max |torch|)
(the tolerance the Rust side applies too; float32 accumulation over at most a
few thousand terms stays well inside it: common practice for float32 tests).
An export that fails is recorded in the manifest with its error rather than
dropped.
"""

import collections
import json
import os
import sys
import traceback
import warnings
from pathlib import Path

import numpy as np
import onnx
import onnx.reference
import onnx.reference.op_run
import onnx.shape_inference
import torch
import torch.nn as nn
import torch.nn.functional as F
import torchvision

HERE = Path(__file__).resolve().parent
ZOO = HERE / "zoo"
BATCH = 4
REL_TOL = 1e-4
TS_OPSET = 17


# --------------------------------------------------------------------------
# Networks
# --------------------------------------------------------------------------


class LeNet(nn.Module):
    """LeNet-style classifier for 1x28x28 (after LeCun et al. 1998, with ReLU and 3x3 kernels)."""

    def __init__(self):
        super().__init__()
        self.conv1 = nn.Conv2d(1, 16, 3, padding=1)
        self.conv2 = nn.Conv2d(16, 32, 3, padding=1)
        self.fc1 = nn.Linear(32 * 7 * 7, 64)
        self.fc2 = nn.Linear(64, 10)

    def forward(self, x):
        x = F.max_pool2d(F.relu(self.conv1(x)), 2)
        x = F.max_pool2d(F.relu(self.conv2(x)), 2)
        # view(size(0), -1) on purpose: the TorchScript exporter turns it into
        # Shape/Gather/Unsqueeze/Concat/Reshape shape arithmetic, which the
        # importer has to fold.
        x = x.view(x.size(0), -1)
        x = F.relu(self.fc1(x))
        return self.fc2(x)


class BasicBlock(nn.Module):
    """ResNet basic block (He et al. 2016, "Deep Residual Learning", fig. 2), projection shortcut."""

    def __init__(self, cin, cout, stride):
        super().__init__()
        self.conv1 = nn.Conv2d(cin, cout, 3, stride=stride, padding=1, bias=False)
        self.bn1 = nn.BatchNorm2d(cout)
        self.conv2 = nn.Conv2d(cout, cout, 3, padding=1, bias=False)
        self.bn2 = nn.BatchNorm2d(cout)
        self.shortcut = None
        if stride != 1 or cin != cout:
            # Option B of the paper (1x1 projection) when the shape changes.
            self.shortcut = nn.Sequential(
                nn.Conv2d(cin, cout, 1, stride=stride, bias=False), nn.BatchNorm2d(cout)
            )

    def forward(self, x):
        out = F.relu(self.bn1(self.conv1(x)))
        out = self.bn2(self.conv2(out))
        identity = x if self.shortcut is None else self.shortcut(x)
        return F.relu(out + identity)


class ResNet20(nn.Module):
    """ResNet-20 for 3x32x32 inputs (He et al. 2016, section 4.2: 6n+2 layers, n=3, 16/32/64 channels)."""

    def __init__(self, num_classes=10):
        super().__init__()
        self.conv1 = nn.Conv2d(3, 16, 3, padding=1, bias=False)
        self.bn1 = nn.BatchNorm2d(16)
        layers = []
        cin = 16
        for cout, stride in ((16, 1), (32, 2), (64, 2)):
            for i in range(3):
                layers.append(BasicBlock(cin, cout, stride if i == 0 else 1))
                cin = cout
        self.layers = nn.Sequential(*layers)
        self.pool = nn.AdaptiveAvgPool2d(1)
        self.fc = nn.Linear(64, num_classes)

    def forward(self, x):
        x = F.relu(self.bn1(self.conv1(x)))
        x = self.layers(x)
        x = torch.flatten(self.pool(x), 1)
        return self.fc(x)


class Awkward(nn.Module):
    """A network made to exercise unusual padding, pooling, activations and constants (3x32x32)."""

    def __init__(self):
        super().__init__()
        # Asymmetric padding (left 1, right 2, top 0, bottom 1): 3x32x32 -> 3x33x35 -> 8x31x33.
        self.pad = nn.ZeroPad2d((1, 2, 0, 1))
        self.stem = nn.Conv2d(3, 8, 3)
        self.stem_bn = nn.BatchNorm2d(8)
        # Branch A: dilated convolution.
        self.dil = nn.Conv2d(8, 8, 3, padding=2, dilation=2)
        # Branch B: grouped convolution then depthwise convolution.
        self.grouped = nn.Conv2d(8, 8, 3, padding=1, groups=2)
        self.depthwise = nn.Conv2d(8, 8, 3, padding=1, groups=8)
        self.hardtanh = nn.Hardtanh(-0.5, 0.7)
        # BatchNorm after a concat: no convolution to fold it into.
        self.cat_bn = nn.BatchNorm2d(16)
        self.register_buffer("channel_scale", torch.zeros(1, 16, 1, 1))
        self.proj = nn.Conv2d(16, 24, 1)
        # Squeeze-and-excitation style gate (Hu et al. 2018) using mean/Hardswish/Hardsigmoid.
        self.se_reduce = nn.Conv2d(24, 8, 1)
        self.se_expand = nn.Conv2d(8, 24, 1)
        self.dropout = nn.Dropout(0.3)
        self.fc1 = nn.Linear(24 * 3 * 3, 32)
        # Parameters used as `x @ w + b` so the export is MatMul + Add rather than Gemm.
        self.w = nn.Parameter(torch.zeros(32, 10))
        self.b = nn.Parameter(torch.zeros(10))

    def forward(self, x):
        x = F.relu(self.stem_bn(self.stem(self.pad(x))))  # 8x31x33
        a = F.leaky_relu(self.dil(x), 0.1)
        b = F.relu6(self.grouped(x))
        b = self.hardtanh(self.depthwise(b))
        summed = a + b
        gated = a * torch.sigmoid(b)
        x = torch.cat([summed, gated], dim=1)  # 16x31x33
        x = self.cat_bn(x)
        x = x * 0.5
        x = x * self.channel_scale
        x = F.max_pool2d(x, 2, stride=2, ceil_mode=True)  # 16x16x17 (floor mode would give 15x16)
        x = torch.tanh(self.proj(x))  # 24x16x17
        x = F.avg_pool2d(x, 3, stride=2, padding=1, ceil_mode=True, count_include_pad=False)  # 24x9x9
        s = torch.mean(x, dim=(2, 3), keepdim=True)
        s = F.hardswish(self.se_reduce(s))
        s = F.hardsigmoid(self.se_expand(s))
        x = x * s
        x = self.dropout(x)
        x = F.avg_pool2d(x, 3)  # 24x3x3
        x = torch.flatten(x, 1)
        x = F.relu(self.fc1(x))
        x = x @ self.w + self.b
        return torch.softmax(x, dim=1)


def mbv2_half():
    """torchvision's MobileNetV2 (Sandler et al. 2018) at width 0.5, 10 classes."""
    return torchvision.models.mobilenet_v2(width_mult=0.5, num_classes=10)


# name -> (constructor, input shape [C, H, W], weight seed, input seed, extra weight gains)
NETS = {
    "lenet": (LeNet, (1, 28, 28), 2001, 3001, {}),
    "resnet20": (ResNet20, (3, 32, 32), 2002, 3002, {}),
    "mbv2_half": (mbv2_half, (3, 64, 64), 2003, 3003, {}),
    # The two pooling stages and the gate shrink Awkward's features, which
    # left its softmax nearly flat (top-2 gap 6e-5); larger head weights give
    # top-1 gaps of at least 7e-3, far above the 1e-4 tolerance.
    "awkward": (Awkward, (3, 32, 32), 2004, 3004, {"fc1.weight": 4.0, "w": 8.0}),
}


def randomise(model, seed, gains):
    """Overwrite every parameter and buffer with values from a seeded NumPy generator.

    Convolution and linear weights get He-normal scaling (std sqrt(2/fan_in),
    He et al. 2015) shrunk by 0.8 so that activations stay of order one
    through ResNet-20's residual additions; BatchNorm gets non-default
    statistics so that folding it wrongly shows up in the outputs.
    """
    rng = np.random.default_rng(seed)
    with torch.no_grad():
        for name, p in model.named_parameters():
            shape = tuple(p.shape)
            if name.endswith("bias") or name == "b":
                val = rng.uniform(-0.1, 0.1, shape)
            elif isinstance(_owner(model, name), nn.BatchNorm2d):
                val = rng.uniform(0.5, 1.5, shape)  # gamma
            else:
                fan_in = shape[0] if name == "w" else int(np.prod(shape[1:]))
                val = rng.standard_normal(shape) * 0.8 * np.sqrt(2.0 / fan_in) * gains.get(name, 1.0)
            p.copy_(torch.from_numpy(val.astype(np.float32)))
        for name, buf in model.named_buffers():
            shape = tuple(buf.shape)
            if name.endswith("running_mean"):
                val = rng.normal(0.0, 0.3, shape)
            elif name.endswith("running_var"):
                val = rng.uniform(0.5, 2.0, shape)
            elif name.endswith("num_batches_tracked"):
                continue
            elif name == "channel_scale":
                val = rng.uniform(0.5, 2.0, shape)
            else:
                raise ValueError(f"unexpected buffer {name}")
            buf.copy_(torch.from_numpy(val.astype(np.float32)))
    return model


def _owner(model, param_name):
    mod = model
    for part in param_name.split(".")[:-1]:
        mod = getattr(mod, part)
    return mod


# --------------------------------------------------------------------------
# Export
# --------------------------------------------------------------------------


def export_torchscript(model, x, path, opset, keep_bn=False):
    # do_constant_folding=False keeps each BatchNormalization node (with
    # eval-mode semantics: training_mode=0) instead of folding it into the
    # preceding Conv; the model itself stays in eval mode.
    torch.onnx.export(
        model,
        (x,),
        str(path),
        dynamo=False,
        opset_version=opset,
        input_names=["input"],
        output_names=["output"],
        dynamic_axes={"input": {0: "batch"}, "output": {0: "batch"}},
        do_constant_folding=not keep_bn,
    )


def export_dynamo(model, x, path, external):
    """torch.export-based exporter at its default opset.

    external: None (weights inside the .onnx), "torch" (the exporter's own
    external-data save, which leaves small tensors inline) or "all" (re-saved
    with onnx.save_model and size_threshold=0, every initializer external).
    """
    prog = torch.onnx.export(
        model,
        (x,),
        dynamo=True,
        input_names=["input"],
        output_names=["output"],
        dynamic_shapes=({0: torch.export.Dim("batch", min=1, max=1024)},),
    )
    data_name = path.name + ".data"
    data_path = path.parent / data_name
    if data_path.exists():
        data_path.unlink()
    if external == "torch":
        prog.save(str(path), external_data=True)
    elif external == "all":
        prog.save(str(path), external_data=False)
        m = onnx.load(str(path))
        onnx.save_model(
            m,
            str(path),
            save_as_external_data=True,
            all_tensors_to_one_file=True,
            location=data_name,
            size_threshold=0,
        )
    else:
        prog.save(str(path), external_data=False)
    if data_path.exists():
        # onnx.save_model creates the data file owner-only; it is plain test data.
        os.chmod(data_path, 0o644)
        return data_name
    return None


def op_counts(model_proto):
    counts = collections.Counter()

    def walk(graph):
        for n in graph.node:
            key = n.op_type if n.domain in ("", "ai.onnx") else f"{n.domain}::{n.op_type}"
            counts[key] += 1
            for attr in n.attribute:
                if attr.type == onnx.AttributeProto.GRAPH:
                    walk(attr.g)
                for g in attr.graphs:
                    walk(g)

    walk(model_proto.graph)
    for fn in model_proto.functions:
        for n in fn.node:
            counts[f"function {fn.name}: {n.op_type}"] += 1
    return dict(sorted(counts.items()))


class BatchNormalization(onnx.reference.op_run.OpRun):
    """BatchNormalization before opset 14 as the ONNX spec defines it.

    Before opset 14 the number of outputs selects the mode: one output means
    test mode (normalise with the given running mean and variance; momentum
    only matters for the training outputs). The reference evaluator of onnx
    1.23 instead switches to batch statistics whenever `momentum` is set, and
    the TorchScript exporter always sets it (known onnx bug, see onnx/onnx
    pull request #8442). Used only for files whose opset is below 14.
    """

    op_domain = ""

    def _run(self, x, scale, bias, mean, var, epsilon=None, momentum=None, training_mode=None, spatial=None, is_test=None):
        # training_mode is filled in from the newest schema; it does not exist before opset 14.
        if len(self.onnx_node.output) != 1:
            raise NotImplementedError("training-mode BatchNormalization (5 outputs)")
        bshape = (1, -1) + (1,) * (x.ndim - 2)
        eps = 1e-5 if epsilon is None else epsilon
        y = scale.reshape(bshape) * (x - mean.reshape(bshape)) / np.sqrt(var.reshape(bshape) + eps)
        return ((y + bias.reshape(bshape)).astype(x.dtype),)


def check_file(path, x, expected):
    """check_model + reference evaluator; returns (opset, op counts, max abs diff, io names, notes)."""
    notes = []
    m = onnx.load(str(path))  # also loads external data from beside the file
    external = any(
        t.data_location == onnx.TensorProto.EXTERNAL for t in onnx.load(str(path), load_external_data=False).graph.initializer
    )
    if external:
        # full_check on the path cannot read external tensors that feed shape
        # inputs (Reshape's shape, ReduceMean's axes); check the structure on
        # the path, then run strict shape inference on the loaded model.
        onnx.checker.check_model(str(path))
        onnx.shape_inference.infer_shapes(m, check_type=True, strict_mode=True)
        notes.append("checked: check_model(path) + strict shape inference on the loaded model")
    else:
        onnx.checker.check_model(str(path), full_check=True)
    opset = next(o.version for o in m.opset_import if o.domain in ("", "ai.onnx"))
    in_name = m.graph.input[0].name
    new_ops = None
    if opset < 14 and any(n.op_type == "BatchNormalization" for n in m.graph.node):
        stock = onnx.reference.ReferenceEvaluator(m).run(None, {in_name: x})[0]
        stock_diff = float(np.max(np.abs(stock.astype(np.float64) - expected)))
        new_ops = [BatchNormalization]
        notes.append(
            f"reference evaluator run with a spec-following BatchNormalization-9 (test mode for one output); "
            f"the stock onnx {onnx.__version__} BatchNormalization_9 uses batch statistics whenever momentum is set "
            f"and differs from PyTorch by {stock_diff:.3g}"
        )
    sess = onnx.reference.ReferenceEvaluator(m, new_ops=new_ops)
    out = sess.run(None, {in_name: x})[0]
    if out.shape != expected.shape:
        raise AssertionError(f"{path.name}: output shape {out.shape} != {expected.shape}")
    diff = float(np.max(np.abs(out.astype(np.float64) - expected.astype(np.float64))))
    tol = REL_TOL * max(1.0, float(np.max(np.abs(expected))))
    if diff > tol:
        raise AssertionError(f"{path.name}: reference evaluator differs by {diff} > {tol}")
    if not np.array_equal(out.argmax(1), expected.argmax(1)):
        raise AssertionError(f"{path.name}: top-1 differs from PyTorch")
    # Files with a dynamic batch must also run at another batch size.
    dims = m.graph.input[0].type.tensor_type.shape.dim
    dynamic = bool(dims) and dims[0].HasField("dim_param")
    if dynamic:
        out1 = sess.run(None, {in_name: x[:1]})[0]
        if out1.shape[0] != 1 or float(np.max(np.abs(out1 - out[:1]))) > tol:
            raise AssertionError(f"{path.name}: batch-1 run disagrees")
    return opset, op_counts(m), diff, in_name, m.graph.output[0].name, dynamic, notes


# (net, exporter, variant, kwargs)
EXPORTS = [
    ("lenet", "torchscript", None, {"opset": TS_OPSET}),
    ("lenet", "torchscript", "opset11", {"opset": 11}),
    ("lenet", "dynamo", None, {"external": None}),
    ("resnet20", "torchscript", None, {"opset": TS_OPSET}),
    ("resnet20", "torchscript", "keepbn", {"opset": TS_OPSET, "keep_bn": True}),
    ("resnet20", "dynamo", None, {"external": "all"}),
    ("mbv2_half", "torchscript", None, {"opset": TS_OPSET}),
    ("mbv2_half", "dynamo", None, {"external": "torch"}),
    ("awkward", "torchscript", None, {"opset": TS_OPSET}),
    ("awkward", "torchscript", "opset13", {"opset": 13}),
    ("awkward", "dynamo", None, {"external": None}),
]


def main():
    torch.set_num_threads(1)
    warnings.filterwarnings("ignore", category=DeprecationWarning)
    ZOO.mkdir(exist_ok=True)
    models, inputs, outputs = {}, {}, {}
    for net, (ctor, shape, wseed, xseed, gains) in NETS.items():
        model = randomise(ctor(), wseed, gains).eval()
        x = np.random.default_rng(xseed).standard_normal((BATCH, *shape)).astype(np.float32)
        with torch.inference_mode():
            y = model(torch.from_numpy(x)).numpy().astype(np.float32)
        np.save(ZOO / f"{net}.input.npy", x)
        np.save(ZOO / f"{net}.output.npy", y)
        models[net], inputs[net], outputs[net] = model, x, y
        print(f"{net}: output {y.shape}, max|y| {np.abs(y).max():.4g}, top-1 {y.argmax(1).tolist()}")

    manifest = []
    failures = 0
    for net, exporter, variant, kw in EXPORTS:
        fname = ".".join(p for p in (net, exporter, variant) if p) + ".onnx"
        path = ZOO / fname
        entry = {
            "file": fname,
            "net": net,
            "exporter": exporter,
            "opset": None,
            "external_data": None,
            "input": f"{net}.input.npy",
            "output": f"{net}.output.npy",
            "input_shape": list(inputs[net].shape),
            "onnx_input_name": None,
            "onnx_output_name": None,
            "dynamic_batch": None,
            "node_op_counts": None,
            "reference_evaluator_max_abs_diff": None,
            "notes": "",
        }
        notes = []
        model, x = models[net], torch.from_numpy(inputs[net])
        try:
            if exporter == "torchscript":
                export_torchscript(model, x, path, kw["opset"], kw.get("keep_bn", False))
                notes.append(f"torch.onnx.export(dynamo=False, opset_version={kw['opset']}, dynamic_axes batch)")
                if kw.get("keep_bn"):
                    notes.append(
                        "do_constant_folding=False keeps BatchNormalization nodes (eval semantics, "
                        "training_mode=0)"
                    )
            else:
                entry["external_data"] = export_dynamo(model, x, path, kw["external"])
                notes.append("torch.onnx.export(dynamo=True, default opset, dynamic_shapes batch)")
                if kw["external"] == "torch":
                    notes.append("saved with ONNXProgram.save(external_data=True): large tensors external, small ones inline")
                elif kw["external"] == "all":
                    notes.append("re-saved with onnx.save_model(size_threshold=0): every initializer external")
            opset, counts, diff, in_name, out_name, dynamic, check_notes = check_file(path, inputs[net], outputs[net])
            notes.extend(check_notes)
            entry.update(
                opset=opset,
                node_op_counts=counts,
                reference_evaluator_max_abs_diff=diff,
                onnx_input_name=in_name,
                onnx_output_name=out_name,
                dynamic_batch=dynamic,
            )
            if net == "resnet20" and exporter == "torchscript":
                n_bn = counts.get("BatchNormalization", 0)
                if variant == "keepbn" and n_bn == 0:
                    raise AssertionError("keepbn export has no BatchNormalization node")
                if variant is None and n_bn != 0:
                    raise AssertionError("folded export still has BatchNormalization nodes")
                notes.append(f"{n_bn} BatchNormalization nodes")
            print(f"{fname}: opset {opset}, diff {diff:.3g}, ops {counts}")
        except Exception as exc:  # record the failure instead of dropping the file silently
            failures += 1
            notes.append(f"EXPORT OR CHECK FAILED: {type(exc).__name__}: {exc}".strip()[:2000])
            traceback.print_exc()
            for p in (path, ZOO / (fname + ".data")):
                if p.exists():
                    p.unlink()
            entry["file"] = None
            entry["failed_file"] = fname
        entry["notes"] = "; ".join(notes)
        manifest.append(entry)

    with open(ZOO / "manifest.json", "w") as f:
        json.dump(
            {
                "torch_version": torch.__version__,
                "torchvision_version": torchvision.__version__,
                "onnx_version": onnx.__version__,
                "onnxscript_version": _version("onnxscript"),
                "numpy_version": np.__version__,
                "tolerance": "max abs error <= 1e-4 * max(1, max|reference|), identical top-1",
                "files": manifest,
            },
            f,
            indent=1,
        )
        f.write("\n")
    print(f"wrote {len(manifest)} entries, {failures} failed")
    return 1 if failures else 0


def _version(pkg):
    try:
        return __import__(pkg).__version__
    except Exception:
        return None


if __name__ == "__main__":
    os.environ.setdefault("OMP_NUM_THREADS", "1")
    sys.exit(main())
