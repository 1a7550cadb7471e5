#!/usr/bin/env python3
"""Generate PyTorch reference outputs ("goldens") for convoy's graph executor.

Generated with PyTorch 2.15.0+cu132 (the default PyPI wheel, run on the CPU)
and NumPy 2.4.6; each case's model.json also records the torch version that
produced it. Another torch version may change the last bits of output.npy.

Rerun from the repository root:

    .venv-ref/bin/python tests/reference/make_goldens.py             # regenerate + self-check
    .venv-ref/bin/python tests/reference/make_goldens.py --selfcheck # re-check committed files (NumPy only)

Every case is a small torch.nn.Module with random weights drawn from a NumPy
generator with a fixed seed (so the weights do not depend on torch's own RNG),
plus a hand-written emitter that describes the same network in convoy's graph
JSON (see the project's graph-schema document). For each case we write, under
tests/reference/cases/<case>/:

    model.json   {"source", "torch_version", "graph", "tensors": {name: "tensors/<file>.npy"}}
    tensors/     one .npy per tensor (float32, little-endian, C order)
    input.npy    [5, ...] float32 standard normal (the XOR case uses its four points)
    output.npy   PyTorch's output for input.npy (eval mode, inference_mode, 1 thread, CPU)

The self-check re-executes each emitted graph with the small NumPy evaluator
at the bottom of this file (float64) and requires
    max |numpy - torch| <= 1e-4 * max(1, max |torch|)  and identical top-1 class,
which shows that the JSON we emitted means what the torch module computed.
"""

import argparse
import json
import math
import re
import shutil
import sys
from pathlib import Path

import numpy as np

HERE = Path(__file__).resolve().parent
CASES_DIR = HERE / "cases"
BATCH = 5
# Relative tolerance of the self-check and of the Rust comparison: float32
# accumulation over a few hundred terms per output stays well inside 1e-4 of
# the output's magnitude (common practice for float32 kernel tests).
REL_TOL = 1e-4

# Every op of the schema table; the generator asserts that the cases use all of them.
SCHEMA_OPS = {
    "conv2d", "batch_norm", "dense", "relu", "clip", "leaky_relu", "sigmoid", "tanh",
    "silu", "hard_swish", "hard_sigmoid", "gelu", "max_pool", "avg_pool",
    "global_avg_pool", "flatten", "reshape", "add", "mul", "concat", "softmax", "pad",
    "identity",
}


# --------------------------------------------------------------------------
# Graph emitter
# --------------------------------------------------------------------------

def tensor_file_name(name):
    safe = re.sub(r"[^a-z0-9_.-]", "_", name.lower())
    return f"tensors/{safe}.npy"


class Graph:
    """Collects nodes and tensors while a case describes its torch module."""

    def __init__(self, model, input_shape, input_name="input"):
        self.module_names = {m: n for n, m in model.named_modules()}
        self.input = {"name": input_name, "shape": list(input_shape)}
        self.nodes = []
        self.tensors = {}
        self.node_names = set()
        self.values = {input_name}

    # -- bookkeeping -------------------------------------------------------
    def name_of(self, module):
        return self.module_names[module]

    def tensor(self, name, value):
        arr = value.detach().cpu().numpy() if hasattr(value, "detach") else np.asarray(value)
        arr = np.ascontiguousarray(arr, dtype="<f4")
        if name in self.tensors:
            assert np.array_equal(self.tensors[name], arr), f"tensor {name} registered twice"
        self.tensors[name] = arr
        return name

    def node(self, name, op, inputs, **fields):
        assert op in SCHEMA_OPS, op
        assert name not in self.node_names, f"duplicate node name {name}"
        for i in inputs:
            assert i in self.values, f"{name}: unknown input {i}"
        out = name  # each node's output value is named after the node
        assert out not in self.values, out
        self.node_names.add(name)
        self.values.add(out)
        self.nodes.append({"name": name, "op": op, "inputs": list(inputs), "output": out, **fields})
        return out

    def to_json(self, output):
        return {"input": self.input, "output": output, "nodes": self.nodes}

    # -- layers ------------------------------------------------------------
    def conv(self, m, x, extra_pad=None, bias_style="tensor", minimal=False, name=None):
        """conv2d from an nn.Conv2d.

        extra_pad: torch-style (left, right, top, bottom) of a preceding
        nn.ZeroPad2d, folded into our [top, left, bottom, right] padding.
        bias_style for a bias-free conv: "null" writes "bias": null, "omit" leaves it out.
        minimal: leave out fields equal to their schema defaults.
        """
        n = name or self.name_of(m)
        ph, pw = m.padding
        t, l, b, r = ph, pw, ph, pw
        if extra_pad is not None:
            el, er, et, eb = extra_pad
            t, l, b, r = t + et, l + el, b + eb, r + er
        fields = {"weight": self.tensor(f"{n}.weight", m.weight)}
        if m.bias is not None:
            fields["bias"] = self.tensor(f"{n}.bias", m.bias)
        elif bias_style == "null":
            fields["bias"] = None
        fields.update(stride=list(m.stride), dilation=list(m.dilation),
                      padding=[t, l, b, r], groups=m.groups)
        if minimal:
            for k, d in (("stride", [1, 1]), ("dilation", [1, 1]),
                         ("padding", [0, 0, 0, 0]), ("groups", 1)):
                if fields[k] == d:
                    del fields[k]
        return self.node(n, "conv2d", [x], **fields)

    def bn(self, m, x, minimal=False, name=None):
        n = name or self.name_of(m)
        fields = {
            "gamma": self.tensor(f"{n}.weight", m.weight),
            "beta": self.tensor(f"{n}.bias", m.bias),
            "mean": self.tensor(f"{n}.running_mean", m.running_mean),
            "variance": self.tensor(f"{n}.running_var", m.running_var),
            "epsilon": float(m.eps),
        }
        if minimal and m.eps == 1e-5:
            del fields["epsilon"]
        return self.node(n, "batch_norm", [x], **fields)

    def dense(self, m, x, layout="out_in", bias_style="tensor", minimal=False, name=None):
        n = name or self.name_of(m)
        if layout == "out_in":
            fields = {"weight": self.tensor(f"{n}.weight", m.weight)}
        else:
            # Stored transposed: [in, out]. The name says so, to avoid a
            # tensor called "weight" with a shape other than torch's.
            fields = {"weight": self.tensor(f"{n}.weight_t", m.weight.detach().t())}
        if m.bias is not None:
            fields["bias"] = self.tensor(f"{n}.bias", m.bias)
        elif bias_style == "null":
            fields["bias"] = None
        if not (minimal and layout == "out_in"):
            fields["weight_layout"] = layout
        return self.node(n, "dense", [x], **fields)

    def pool(self, m, x, name=None, minimal=False):
        import torch.nn as nn

        n = name or self.name_of(m)
        pair = lambda v: list(v) if isinstance(v, (tuple, list)) else [v, v]
        k, s, p = pair(m.kernel_size), pair(m.stride), pair(m.padding)
        fields = {"kernel": k, "stride": s, "padding": [p[0], p[1], p[0], p[1]],
                  "ceil_mode": bool(m.ceil_mode)}
        if isinstance(m, nn.MaxPool2d):
            op = "max_pool"
            fields["dilation"] = pair(m.dilation)
            defaults = {"stride": k, "padding": [0, 0, 0, 0], "dilation": [1, 1], "ceil_mode": False}
        else:
            op = "avg_pool"
            assert m.divisor_override is None
            fields["count_include_pad"] = bool(m.count_include_pad)
            defaults = {"stride": k, "padding": [0, 0, 0, 0], "ceil_mode": False,
                        "count_include_pad": True}
        if minimal:
            for key, d in defaults.items():
                if fields[key] == d:
                    del fields[key]
        return self.node(n, op, [x], **fields)


# --------------------------------------------------------------------------
# Random initialisation (NumPy generator, so weights do not depend on torch's RNG)
# --------------------------------------------------------------------------

def init_weights(model, rng, conv_gain=1.0):
    """Random conv/linear weights scaled to keep activations O(1), and random
    batch-norm statistics so that batch norm is never the identity."""
    import torch
    import torch.nn as nn

    def put(param, arr):
        with torch.no_grad():
            param.copy_(torch.from_numpy(np.asarray(arr, dtype=np.float32)))

    for m in model.modules():
        if isinstance(m, nn.Conv2d):
            fan_in = m.in_channels // m.groups * m.kernel_size[0] * m.kernel_size[1]
            put(m.weight, rng.normal(0.0, conv_gain / math.sqrt(fan_in), m.weight.shape))
            if m.bias is not None:
                put(m.bias, rng.uniform(-0.5, 0.5, m.bias.shape))
        elif isinstance(m, nn.Linear):
            put(m.weight, rng.normal(0.0, 1.0 / math.sqrt(m.in_features), m.weight.shape))
            if m.bias is not None:
                put(m.bias, rng.uniform(-0.5, 0.5, m.bias.shape))
        elif isinstance(m, nn.BatchNorm2d):
            c = m.num_features
            put(m.weight, rng.uniform(0.5, 1.5, c) * rng.choice([-1.0, 1.0], c, p=[0.2, 0.8]))
            put(m.bias, rng.uniform(-0.5, 0.5, c))
            put(m.running_mean, rng.uniform(-0.5, 0.5, c))
            put(m.running_var, rng.uniform(0.5, 2.0, c))


def check_bn_not_default(model):
    import torch.nn as nn

    for name, m in model.named_modules():
        if isinstance(m, nn.BatchNorm2d):
            assert not np.allclose(m.running_mean.numpy(), 0), name
            assert not np.allclose(m.running_var.numpy(), 1), name
            assert not np.allclose(m.weight.detach().numpy(), 1), name
            assert not np.allclose(m.bias.detach().numpy(), 0), name


# --------------------------------------------------------------------------
# Cases
# --------------------------------------------------------------------------

def build_cases():
    """Returns {case name: builder}; a builder returns (model, input, emit, source)."""
    import torch
    import torch.nn as nn
    import torch.nn.functional as F

    cases = {}

    def case(fn):
        cases[fn.__name__] = fn
        return fn

    # 1 ---------------------------------------------------------------------
    @case
    def conv_variants():
        class Net(nn.Module):
            def __init__(self):
                super().__init__()
                self.conv3x3 = nn.Conv2d(4, 8, 3, padding=1)
                self.conv5x5_s2 = nn.Conv2d(8, 8, 5, stride=2, padding=2, bias=False)
                self.conv1x3_g2 = nn.Conv2d(8, 8, (1, 3), padding=(0, 1), groups=2)
                self.conv_dil2 = nn.Conv2d(8, 8, 3, padding=2, dilation=2, bias=False)
                # (left, right, top, bottom): all different, so a swapped order shows.
                self.asym_pad = nn.ZeroPad2d((1, 0, 2, 3))
                self.conv_asym = nn.Conv2d(8, 8, 3)
                self.dw = nn.Conv2d(8, 8, 3, stride=2, padding=1, groups=8)
                self.dw_mult2 = nn.Conv2d(8, 16, 3, padding=1, groups=8, bias=False)
                self.pw = nn.Conv2d(16, 16, 1)
                self.conv_rect = nn.Conv2d(16, 12, 3, stride=(2, 1), padding=(1, 2), dilation=(1, 2))
                self.fc = nn.Linear(12, 10)

            def forward(self, x):
                x = F.relu(self.conv3x3(x))                 # [8,14,18]
                x = self.conv5x5_s2(x)                      # [8,7,9]
                x = F.relu(self.conv1x3_g2(x))              # [8,7,9]
                x = self.conv_dil2(x)                       # [8,7,9]
                x = F.relu(self.conv_asym(self.asym_pad(x)))  # [8,10,8]
                x = self.dw(x)                              # [8,5,4]
                x = F.relu(self.dw_mult2(x))                # [16,5,4]
                x = self.pw(x)                              # [16,5,4]
                x = self.conv_rect(x)                       # [12,3,4]
                x = torch.flatten(F.adaptive_avg_pool2d(x, 1), 1)
                return self.fc(x)

            def emit(self, g, x):
                x = g.conv(self.conv3x3, x)
                x = g.node("relu1", "relu", [x])
                x = g.conv(self.conv5x5_s2, x, bias_style="null")
                x = g.conv(self.conv1x3_g2, x)
                x = g.node("relu2", "relu", [x])
                x = g.conv(self.conv_dil2, x, bias_style="omit")
                x = g.conv(self.conv_asym, x, extra_pad=self.asym_pad.padding)
                x = g.node("relu3", "relu", [x])
                x = g.conv(self.dw, x)
                x = g.conv(self.dw_mult2, x, bias_style="null")
                x = g.node("relu4", "relu", [x])
                x = g.conv(self.pw, x, minimal=True)
                x = g.conv(self.conv_rect, x)
                x = g.node("gap", "global_avg_pool", [x])
                x = g.node("flatten", "flatten", [x])
                return g.dense(self.fc, x)

        rng = np.random.default_rng(1001)
        model = Net()
        init_weights(model, rng)
        inp = rng.standard_normal((BATCH, 4, 14, 18)).astype(np.float32)
        return model, inp, model.emit, (
            "conv2d variants: bias tensor/null/omitted, kernels 3x3 5x5 1x3 1x1, stride 2 and [2,1], "
            "dilation 2 and [1,2], asymmetric padding (ZeroPad2d folded into the conv), groups=2, "
            "depthwise with channel multiplier 1 and 2; then global_avg_pool, flatten, dense")

    # 2 ---------------------------------------------------------------------
    @case
    def activations():
        class HardSigmoidDefault(nn.Module):
            """Schema default hard_sigmoid (alpha 0.2, beta 0.5); torch has no module for it."""

            def forward(self, x):
                return torch.clamp(x * 0.2 + 0.5, 0.0, 1.0)

        # (branch name, torch module, our op, our fields); empty fields = schema defaults.
        acts = [
            ("relu", nn.ReLU(), "relu", {}),
            ("relu6", nn.ReLU6(), "clip", {"min": 0.0, "max": 6.0}),
            ("clip", nn.Hardtanh(-0.5, 0.7), "clip", {"min": -0.5, "max": 0.7}),
            ("leaky_relu", nn.LeakyReLU(0.1), "leaky_relu", {"slope": 0.1}),
            ("leaky_relu_default", nn.LeakyReLU(), "leaky_relu", {}),
            ("sigmoid", nn.Sigmoid(), "sigmoid", {}),
            ("tanh", nn.Tanh(), "tanh", {}),
            ("hard_sigmoid", nn.Hardsigmoid(), "hard_sigmoid", {"alpha": 1.0 / 6.0, "beta": 0.5}),
            ("hard_sigmoid_default", HardSigmoidDefault(), "hard_sigmoid", {}),
            ("hard_swish", nn.Hardswish(), "hard_swish", {}),
            ("silu", nn.SiLU(), "silu", {}),
            ("gelu", nn.GELU(), "gelu", {"approximation": "none"}),
            ("gelu_default", nn.GELU(), "gelu", {}),
            ("gelu_tanh", nn.GELU(approximate="tanh"), "gelu", {"approximation": "tanh"}),
        ]
        # The erf and tanh forms of gelu differ by at most 4.7e-4, too little to
        # show through the 1e-4 relative tolerance on a spread of inputs. Near
        # x = -2.7 gelu is only about -0.01 while the two forms still differ by
        # about 4.4e-4, so these branches feed pre-activations centred there and
        # scale the result by 100: a swapped approximation moves the output by
        # ~1e-2 while float32 rounding stays ~1e-5.
        tails = [
            ("gelu_tail", nn.GELU(), {"approximation": "none"}),
            ("gelu_tanh_tail", nn.GELU(approximate="tanh"), {"approximation": "tanh"}),
        ]
        tail_gain = 100.0

        class Net(nn.Module):
            def __init__(self):
                super().__init__()
                self.stem = nn.Conv2d(4, 8, 3, padding=1)
                self.pre = nn.ModuleDict({n: nn.Conv2d(8, 4, 1) for n, _, _, _ in acts})
                self.act = nn.ModuleDict({n: m for n, m, _, _ in acts})
                self.tail_pre = nn.ModuleDict({n: nn.Conv2d(8, 4, 1) for n, _, _ in tails})
                self.tail_act = nn.ModuleDict({n: m for n, m, _ in tails})
                self.register_buffer("tail_gain", torch.tensor([tail_gain]))
                self.mix = nn.Conv2d(4 * (len(acts) + len(tails)), 8, 1)
                self.fc = nn.Linear(8 * 8 * 10, 10)

            def forward(self, x):
                x = self.stem(x)
                ys = [self.act[n](self.pre[n](x)) for n, _, _, _ in acts]
                ys += [self.tail_act[n](self.tail_pre[n](x)) * self.tail_gain for n, _, _ in tails]
                x = self.mix(torch.cat(ys, 1))
                return self.fc(torch.flatten(x, 1))

            def emit(self, g, x):
                x = g.conv(self.stem, x)
                ys = []
                for n, _, op, fields in acts:
                    y = g.conv(self.pre[n], x)
                    ys.append(g.node(f"act.{n}", op, [y], **fields))
                gain = g.tensor("tail_gain", self.tail_gain)
                for n, _, fields in tails:
                    y = g.conv(self.tail_pre[n], x)
                    y = g.node(f"tail_act.{n}", "gelu", [y], **fields)
                    ys.append(g.node(f"tail_gain.{n}", "mul", [y], constant=gain))
                x = g.node("concat", "concat", ys)
                x = g.conv(self.mix, x)
                x = g.node("flatten", "flatten", [x])
                return g.dense(self.fc, x)

        rng = np.random.default_rng(1002)
        model = Net()
        init_weights(model, rng)
        # Pre-activations with std ~2 so values reach about -6..6 and every
        # activation's saturating or bending region is used.
        with torch.no_grad():
            for conv in model.pre.values():
                conv.weight.mul_(2.0)
                conv.bias.mul_(2.0)
            for conv in model.tail_pre.values():
                conv.weight.mul_(0.3)
                conv.bias.fill_(-2.7)
        inp = rng.standard_normal((BATCH, 4, 8, 10)).astype(np.float32)
        return model, inp, model.emit, (
            "one 1x1-conv branch per activation (relu, clip as ReLU6 and -0.5..0.7, leaky_relu 0.1 "
            "and default, sigmoid, tanh, hard_sigmoid 1/6 and default 0.2, hard_swish, silu, gelu "
            "none/default/tanh) on pre-activations spanning about -6..6, plus gelu erf and tanh on "
            "pre-activations near -2.7 times a constant 100 (where the two forms differ most relative "
            "to their value); concat, 1x1 conv, flatten, dense")

    # 3 ---------------------------------------------------------------------
    @case
    def pooling():
        # Output sizes for an 11x13 input are noted beside each pool; "ceil" marks
        # where ceil_mode changes the size and "drop" where PyTorch's rule drops a
        # last window that would start inside the bottom/right padding.
        pools = [
            ("max_k2_ceil", nn.MaxPool2d(2, ceil_mode=True), True),                     # 6x7 (ceil)
            ("max_k2_p1_ceil", nn.MaxPool2d(2, 2, padding=1, ceil_mode=True), False),   # 6x7 (drop)
            ("max_k3_s1_p1", nn.MaxPool2d(3, 1, padding=1), False),                     # 11x13
            ("max_k2x3_s2x1", nn.MaxPool2d((2, 3), (2, 1)), False),                     # 5x11
            ("max_dil2_ceil", nn.MaxPool2d(3, 3, padding=1, dilation=2, ceil_mode=True), False),  # 4x5 (ceil)
            ("max_dil2", nn.MaxPool2d(3, 2, dilation=2), False),                        # 4x5
            ("avg_k3_s2_p1_incl", nn.AvgPool2d(3, 2, 1), False),                        # 6x7
            ("avg_k3_s2_p1_excl", nn.AvgPool2d(3, 2, 1, count_include_pad=False), False),
            ("avg_k4_s3_p1_ceil_incl", nn.AvgPool2d(4, 3, 1, ceil_mode=True), False),   # 4x5 (ceil)
            ("avg_k4_s3_p1_ceil_excl", nn.AvgPool2d(4, 3, 1, ceil_mode=True, count_include_pad=False), False),
            ("avg_k2_ceil", nn.AvgPool2d(2, ceil_mode=True), True),                     # 6x7 (ceil)
            ("avg_k2_p1_ceil", nn.AvgPool2d(2, 2, 1, ceil_mode=True), False),           # 6x7 (drop)
            ("avg_k2", nn.AvgPool2d(2), True),                                          # 5x6
        ]
        shapes = {}
        for n, m, _ in pools:
            with torch.no_grad():
                shapes[n] = tuple(m(torch.zeros(1, 6, 11, 13)).shape[1:])

        class Net(nn.Module):
            def __init__(self):
                super().__init__()
                self.stem = nn.Conv2d(4, 6, 3, padding=1)
                self.pool = nn.ModuleDict({n: m for n, m, _ in pools})
                self.fc = nn.ModuleDict({n: nn.Linear(int(np.prod(shapes[n])), 10) for n, _, _ in pools})
                self.fc_gap = nn.Linear(6, 10)

            def forward(self, x):
                # No activation after the stem: negative values next to the
                # padding show whether max_pool pads with -inf.
                x = self.stem(x)
                out = self.fc_gap(torch.flatten(F.adaptive_avg_pool2d(x, 1), 1))
                for n, _, _ in pools:
                    out = out + self.fc[n](torch.flatten(self.pool[n](x), 1))
                return out

            def emit(self, g, x):
                x = g.conv(self.stem, x)
                y = g.node("gap", "global_avg_pool", [x])
                y = g.node("gap.flatten", "flatten", [y])
                out = g.dense(self.fc_gap, y)
                for n, _, minimal in pools:
                    y = g.pool(self.pool[n], x, minimal=minimal)
                    y = g.node(f"flatten.{n}", "flatten", [y])
                    y = g.dense(self.fc[n], y)
                    out = g.node(f"sum.{n}", "add", [out, y])
                return out

        rng = np.random.default_rng(1003)
        model = Net()
        init_weights(model, rng)
        inp = rng.standard_normal((BATCH, 4, 11, 13)).astype(np.float32)
        return model, inp, model.emit, (
            "pools on an 11x13 map, each flattened into its own dense and summed: max_pool with "
            "padding, ceil_mode, stride != kernel, rectangular kernel, dilation 2; avg_pool with "
            "count_include_pad true/false, ceil_mode with padding; global_avg_pool. Sizes: "
            + ", ".join(f"{n} {s[1]}x{s[2]}" for n, s in shapes.items()))

    # 4 ---------------------------------------------------------------------
    @case
    def dense_head():
        class Net(nn.Module):
            def __init__(self):
                super().__init__()
                self.fc1 = nn.Linear(4 * 6 * 6, 32)
                self.dropout = nn.Dropout(0.5)
                self.fc2 = nn.Linear(32, 10)

            def forward(self, x):
                x = torch.flatten(x, 1)
                x = self.dropout(F.relu(self.fc1(x)))
                return F.softmax(self.fc2(x), dim=1)

            def emit(self, g, x):
                x = g.node("flatten", "flatten", [x])
                x = g.dense(self.fc1, x, minimal=True)  # weight_layout left at its default
                x = g.node("relu", "relu", [x])
                x = g.node("dropout", "identity", [x])
                x = g.dense(self.fc2, x, layout="in_out")
                return g.node("softmax", "softmax", [x])

        rng = np.random.default_rng(1004)
        model = Net()
        init_weights(model, rng)
        with torch.no_grad():
            model.fc2.weight.mul_(2.0)  # spread the logits so the softmax is far from uniform
        inp = rng.standard_normal((BATCH, 4, 6, 6)).astype(np.float32)
        return model, inp, model.emit, (
            "flatten of [4,6,6], dense (out_in, weight_layout omitted), relu, dropout (identity), "
            "dense (in_out, transposed weight stored), softmax; output is class probabilities")

    # 5 ---------------------------------------------------------------------
    @case
    def residual():
        class BasicBlock(nn.Module):
            def __init__(self, cin, cout, stride):
                super().__init__()
                self.conv1 = nn.Conv2d(cin, cout, 3, stride, 1, bias=False)
                self.bn1 = nn.BatchNorm2d(cout)
                self.conv2 = nn.Conv2d(cout, cout, 3, 1, 1, bias=False)
                self.bn2 = nn.BatchNorm2d(cout)
                self.downsample = None
                if stride != 1 or cin != cout:
                    self.downsample = nn.Sequential(nn.Conv2d(cin, cout, 1, stride, bias=False),
                                                    nn.BatchNorm2d(cout))

            def forward(self, x):
                y = F.relu(self.bn1(self.conv1(x)))
                y = self.bn2(self.conv2(y))
                s = x if self.downsample is None else self.downsample(x)
                return F.relu(y + s)

            def emit(self, g, x, n):
                y = g.conv(self.conv1, x, bias_style="omit")
                y = g.bn(self.bn1, y)
                y = g.node(f"{n}.relu1", "relu", [y])
                y = g.conv(self.conv2, y, bias_style="null")
                y = g.bn(self.bn2, y, minimal=True)
                s = x
                if self.downsample is not None:
                    s = g.conv(self.downsample[0], x, bias_style="omit")
                    s = g.bn(self.downsample[1], s)
                y = g.node(f"{n}.add", "add", [y, s])
                return g.node(f"{n}.relu2", "relu", [y])

        class Net(nn.Module):
            def __init__(self):
                super().__init__()
                self.conv1 = nn.Conv2d(3, 8, 3, padding=1, bias=False)
                self.bn1 = nn.BatchNorm2d(8, eps=1e-3)  # non-default epsilon
                self.layer1 = nn.Sequential(BasicBlock(8, 8, 1), BasicBlock(8, 8, 1))
                self.layer2 = nn.Sequential(BasicBlock(8, 16, 2), BasicBlock(16, 16, 1))
                self.fc = nn.Linear(16, 10)

            def forward(self, x):
                x = F.relu(self.bn1(self.conv1(x)))
                x = self.layer2(self.layer1(x))
                return self.fc(torch.flatten(F.adaptive_avg_pool2d(x, 1), 1))

            def emit(self, g, x):
                x = g.conv(self.conv1, x, bias_style="omit")
                x = g.bn(self.bn1, x)
                x = g.node("relu", "relu", [x])
                for lname, layer in (("layer1", self.layer1), ("layer2", self.layer2)):
                    for i, block in enumerate(layer):
                        x = block.emit(g, x, f"{lname}.{i}")
                x = g.node("gap", "global_avg_pool", [x])
                x = g.node("flatten", "flatten", [x])
                return g.dense(self.fc, x)

        rng = np.random.default_rng(1005)
        model = Net()
        init_weights(model, rng)
        inp = rng.standard_normal((BATCH, 3, 16, 16)).astype(np.float32)
        return model, inp, model.emit, (
            "mini ResNet (basic blocks conv-bn-relu-conv-bn + identity shortcut; one stride-2 block "
            "with a 1x1 stride-2 conv + bn shortcut), 8/16 channels, 3x16x16 input, batch norm with "
            "random statistics (one with epsilon 1e-3), add, relu, global_avg_pool, flatten, dense")

    # 6 ---------------------------------------------------------------------
    @case
    def depthwise_separable():
        class InvertedResidual(nn.Module):
            def __init__(self, cin, cout, expand, stride):
                super().__init__()
                hidden = cin * expand
                self.expand = nn.Conv2d(cin, hidden, 1, bias=False)
                self.expand_bn = nn.BatchNorm2d(hidden)
                self.dw = nn.Conv2d(hidden, hidden, 3, stride, 1, groups=hidden, bias=False)
                self.dw_bn = nn.BatchNorm2d(hidden)
                self.project = nn.Conv2d(hidden, cout, 1, bias=False)
                self.project_bn = nn.BatchNorm2d(cout)
                self.use_res = stride == 1 and cin == cout

            def forward(self, x):
                y = F.relu6(self.expand_bn(self.expand(x)))
                y = F.relu6(self.dw_bn(self.dw(y)))
                y = self.project_bn(self.project(y))
                return x + y if self.use_res else y

            def emit(self, g, x, n):
                y = g.bn(self.expand_bn, g.conv(self.expand, x, bias_style="omit"))
                y = g.node(f"{n}.expand_relu6", "clip", [y], min=0.0, max=6.0)
                y = g.bn(self.dw_bn, g.conv(self.dw, y, bias_style="omit"))
                y = g.node(f"{n}.dw_relu6", "clip", [y], min=0.0, max=6.0)
                y = g.bn(self.project_bn, g.conv(self.project, y, bias_style="omit"))
                return g.node(f"{n}.add", "add", [x, y]) if self.use_res else y

        class SqueezeExcite(nn.Module):
            def __init__(self, c, r):
                super().__init__()
                self.fc1 = nn.Conv2d(c, r, 1)
                self.fc2 = nn.Conv2d(r, c, 1)

            def forward(self, x):
                s = F.adaptive_avg_pool2d(x, 1)
                s = F.hardsigmoid(self.fc2(F.relu(self.fc1(s))))
                return x * s

            def emit(self, g, x, n):
                s = g.node(f"{n}.gap", "global_avg_pool", [x])
                s = g.node(f"{n}.relu", "relu", [g.conv(self.fc1, s)])
                s = g.node(f"{n}.gate", "hard_sigmoid", [g.conv(self.fc2, s)], alpha=1.0 / 6.0, beta=0.5)
                return g.node(f"{n}.scale", "mul", [x, s])  # [C,H,W] * [C,1,1]

        class Net(nn.Module):
            def __init__(self):
                super().__init__()
                self.stem = nn.Conv2d(3, 8, 3, 2, 1, bias=False)
                self.stem_bn = nn.BatchNorm2d(8)
                self.block1 = InvertedResidual(8, 8, 2, 1)
                self.block2 = InvertedResidual(8, 12, 3, 2)
                self.block3 = InvertedResidual(12, 12, 2, 1)
                self.se = SqueezeExcite(12, 4)
                self.head = nn.Conv2d(12, 16, 1, bias=False)
                self.head_bn = nn.BatchNorm2d(16)
                self.dropout = nn.Dropout(0.2)
                self.fc = nn.Linear(16, 10)

            def forward(self, x):
                x = F.relu6(self.stem_bn(self.stem(x)))     # [8,8,10]
                x = self.block1(x)                          # [8,8,10]
                x = self.block2(x)                          # [12,4,5]
                x = self.block3(x)                          # [12,4,5]
                x = self.se(x)
                x = F.hardswish(self.head_bn(self.head(x)))  # [16,4,5]
                x = torch.flatten(F.adaptive_avg_pool2d(x, 1), 1)
                return self.fc(self.dropout(x))

            def emit(self, g, x):
                x = g.bn(self.stem_bn, g.conv(self.stem, x, bias_style="omit"))
                x = g.node("stem_relu6", "clip", [x], min=0.0, max=6.0)
                x = self.block1.emit(g, x, "block1")
                x = self.block2.emit(g, x, "block2")
                x = self.block3.emit(g, x, "block3")
                x = self.se.emit(g, x, "se")
                x = g.bn(self.head_bn, g.conv(self.head, x, bias_style="omit"))
                x = g.node("head_hard_swish", "hard_swish", [x])
                x = g.node("gap", "global_avg_pool", [x])
                x = g.node("flatten", "flatten", [x])
                x = g.node("dropout", "identity", [x])
                return g.dense(self.fc, x)

        rng = np.random.default_rng(1006)
        model = Net()
        init_weights(model, rng)
        inp = rng.standard_normal((BATCH, 3, 16, 20)).astype(np.float32)
        return model, inp, model.emit, (
            "MobileNetV2-style: inverted residual blocks (1x1 expand conv-bn-relu6, 3x3 depthwise "
            "conv-bn-relu6, 1x1 project conv-bn, residual add when shapes match), squeeze-and-excite "
            "(global_avg_pool, 1x1 conv, relu, 1x1 conv, hard_sigmoid 1/6, mul [C,H,W] by [C,1,1]), "
            "hard_swish, global_avg_pool, flatten, dense")

    # 7 ---------------------------------------------------------------------
    @case
    def branches():
        class Net(nn.Module):
            def __init__(self):
                super().__init__()
                self.b1 = nn.Conv2d(4, 4, 1)
                self.b2 = nn.Conv2d(4, 6, 3, padding=1)
                self.b3_pool = nn.MaxPool2d(3, 1, padding=1)
                self.b3 = nn.Conv2d(4, 2, 1)
                # epsilon 0.01 moves the output far more than the tolerance, so
                # an executor that ignores the field fails.
                self.bn = nn.BatchNorm2d(12, eps=0.01)
                # torch order (left, right, top, bottom); value 0.5
                self.pad_lrtb = (2, 3, 1, 0)
                self.down = nn.Conv2d(12, 8, 3, stride=2)
                self.register_buffer("shift", torch.zeros(8, 1, 1))
                self.register_buffer("scale", torch.zeros(1))
                self.ident = nn.Identity()
                self.side = nn.Conv2d(8, 8, 1)
                self.register_buffer("channel_bias", torch.zeros(8))
                self.fc_mid = nn.Linear(8 * 6 * 7, 72, bias=False)
                self.zero_pad = nn.ZeroPad2d((0, 1, 1, 0))  # (left, right, top, bottom)
                self.up = nn.Conv2d(2, 4, 3, padding=1)
                self.fc = nn.Linear(4 * 7 * 7, 10)

            def forward(self, x):                                          # [4,12,10]
                y = torch.cat([F.relu(self.b1(x)), F.relu(self.b2(x)),
                               self.b3(self.b3_pool(x))], 1)               # [12,12,10]
                y = self.bn(y)
                y = F.pad(y, self.pad_lrtb, value=0.5)                     # [12,13,15]
                y = self.down(y)                                           # [8,6,7]
                y = self.ident((y + self.shift) * self.scale)
                z = self.side(y)
                s = y + z
                m = s * z
                m = F.adaptive_avg_pool2d(m, 1) * m                        # [C,1,1] * [C,H,W]
                m = m + self.channel_bias.view(8, 1, 1)                    # stored as [C]
                f = self.fc_mid(m.reshape(m.shape[0], -1))                 # [72]
                u = self.up(self.zero_pad(f.reshape(-1, 2, 6, 6)))         # [4,7,7]
                u = F.softmax(u, dim=1)                                    # over channels per pixel
                return self.fc(torch.flatten(u, 1))

            def emit(self, g, x):
                y1 = g.node("b1.relu", "relu", [g.conv(self.b1, x)])
                y2 = g.node("b2.relu", "relu", [g.conv(self.b2, x)])
                y3 = g.conv(self.b3, g.pool(self.b3_pool, x))
                y = g.node("concat", "concat", [y1, y2, y3])
                y = g.bn(self.bn, y)
                l, r, t, b = self.pad_lrtb
                y = g.node("pad", "pad", [y], padding=[t, l, b, r], value=0.5)
                y = g.conv(self.down, y)
                y = g.node("add_shift", "add", [y], constant=g.tensor("shift", self.shift))
                y = g.node("mul_scale", "mul", [y], constant=g.tensor("scale", self.scale))
                y = g.node("ident", "identity", [y])
                z = g.conv(self.side, y)
                s = g.node("add_same", "add", [y, z])
                m = g.node("mul_same", "mul", [s, z])
                p = g.node("gap", "global_avg_pool", [m])
                m = g.node("mul_gate_first", "mul", [p, m])
                m = g.node("add_channel_bias", "add", [m],
                           constant=g.tensor("channel_bias", self.channel_bias))
                f = g.node("reshape_flat", "reshape", [m], shape=[-1])
                f = g.dense(self.fc_mid, f, bias_style="null")
                u = g.node("reshape_map", "reshape", [f], shape=[2, 6, 6])
                l, r, t, b = self.zero_pad.padding
                u = g.node("zero_pad", "pad", [u], padding=[t, l, b, r])  # value left at its default 0
                u = g.conv(self.up, u)
                u = g.node("softmax_channels", "softmax", [u])
                u = g.node("flatten", "flatten", [u])
                return g.dense(self.fc, u)

        rng = np.random.default_rng(1007)
        model = Net()
        init_weights(model, rng)
        with torch.no_grad():
            model.shift.copy_(torch.from_numpy(rng.uniform(-1, 1, (8, 1, 1)).astype(np.float32)))
            model.scale.copy_(torch.tensor([0.75]))
            model.channel_bias.copy_(torch.from_numpy(rng.uniform(-1, 1, 8).astype(np.float32)))
        inp = rng.standard_normal((BATCH, 4, 12, 10)).astype(np.float32)
        return model, inp, model.emit, (
            "three parallel branches (1x1 conv, 3x3 conv, max_pool+1x1 conv) joined by concat; "
            "standalone batch_norm (epsilon 0.01); pad with value 0.5 and asymmetric amounts; add constant [C,1,1]; "
            "mul constant [1]; identity; add and mul of same-shape values; mul [C,1,1] (first "
            "operand) by [C,H,W]; add constant [C]; reshape to [-1]; dense without bias; reshape "
            "[F] to [2,6,6]; pad with the default value; conv; softmax over channels; flatten; dense")

    # 8 ---------------------------------------------------------------------
    @case
    def xor():
        class Net(nn.Module):
            def __init__(self):
                super().__init__()
                self.fc1 = nn.Linear(2, 2)
                self.fc2 = nn.Linear(2, 1)

            def forward(self, x):
                return self.fc2(F.relu(self.fc1(x)))

            def emit(self, g, x):
                x = g.dense(self.fc1, x, layout="out_in")
                x = g.node("relu", "relu", [x])
                return g.dense(self.fc2, x, layout="out_in")

        model = Net()
        # Goodfellow, Bengio & Courville, "Deep Learning" (MIT Press, 2016),
        # section 6.1 "Example: Learning XOR": W = [[1,1],[1,1]], c = [0,-1],
        # w = [1,-2], b = 0. W is symmetric, so it is also its own out_in form.
        with torch.no_grad():
            model.fc1.weight.copy_(torch.tensor([[1.0, 1.0], [1.0, 1.0]]))
            model.fc1.bias.copy_(torch.tensor([0.0, -1.0]))
            model.fc2.weight.copy_(torch.tensor([[1.0, -2.0]]))
            model.fc2.bias.copy_(torch.tensor([0.0]))
        inp = np.array([[0, 0], [0, 1], [1, 0], [1, 1]], dtype=np.float32)
        return model, inp, model.emit, (
            "XOR network of Goodfellow, Bengio & Courville, Deep Learning (2016), section 6.1: "
            "dense W=[[1,1],[1,1]] c=[0,-1], relu, dense w=[1,-2] b=0; input is the four points "
            "[[0,0],[0,1],[1,0],[1,1]], expected output [[0],[1],[1],[0]]")

    return cases


# --------------------------------------------------------------------------
# Generation
# --------------------------------------------------------------------------

def record_pre_activation_range(model, inp):
    """For the activations case: the spread of the values fed to the activations."""
    import torch

    seen = []
    hooks = [c.register_forward_hook(lambda _m, _i, o: seen.append(o.detach().numpy().ravel()))
             for c in model.pre.values()]
    with torch.inference_mode():
        model(torch.from_numpy(inp))
    for h in hooks:
        h.remove()
    v = np.concatenate(seen)
    return float(v.min()), float(v.max()), float(np.mean(np.abs(v) > 3.0)), float(np.mean(np.abs(v) > 6.0))


GENERATED_WITH_TORCH = "2.15.0+cu132"


def manifest_text(manifest):
    """JSON with one graph node and one tensor per line, so diffs stay readable."""
    dump = lambda v: json.dumps(v, separators=(", ", ": "))
    g = manifest["graph"]
    nodes = ",\n".join(f"   {dump(n)}" for n in g["nodes"])
    tensors = ",\n".join(f"  {dump(k)}: {dump(v)}" for k, v in manifest["tensors"].items())
    text = (
        "{\n"
        f" \"source\": {dump(manifest['source'])},\n"
        f" \"torch_version\": {dump(manifest['torch_version'])},\n"
        " \"graph\": {\n"
        f"  \"input\": {dump(g['input'])},\n"
        f"  \"output\": {dump(g['output'])},\n"
        f"  \"nodes\": [\n{nodes}\n  ]\n"
        " },\n"
        f" \"tensors\": {{\n{tensors}\n }}\n"
        "}\n"
    )
    assert json.loads(text) == json.loads(json.dumps(manifest))
    return text


def generate(out_dir):
    import torch

    if torch.__version__ != GENERATED_WITH_TORCH:
        print(f"note: torch {torch.__version__}, the committed files came from "
              f"{GENERATED_WITH_TORCH}; update the header and README if you commit the result")
    torch.set_num_threads(1)
    cases = build_cases()
    if out_dir.exists():
        shutil.rmtree(out_dir)
    used_ops = set()
    for name, builder in cases.items():
        model, inp, emit, source = builder()
        model.eval()
        check_bn_not_default(model)
        g = Graph(model, inp.shape[1:])
        out_name = emit(g, g.input["name"])
        graph = g.to_json(out_name)
        used_ops |= {n["op"] for n in graph["nodes"]}

        with torch.inference_mode():
            out = model(torch.from_numpy(inp)).numpy().astype(np.float32)

        if name == "xor":
            expected = np.array([[0.0], [1.0], [1.0], [0.0]], dtype=np.float32)
            assert np.array_equal(out, expected), out
        if name == "activations":
            lo, hi, frac3, frac6 = record_pre_activation_range(model, inp)
            assert lo < -6 and hi > 6 and frac3 > 0.05 and frac6 > 0.002, (lo, hi, frac3, frac6)
            source += (f" (pre-activation range {lo:.2f}..{hi:.2f}, {frac3:.1%} beyond |3|, "
                       f"{frac6:.1%} beyond |6|)")

        d = out_dir / name
        (d / "tensors").mkdir(parents=True)
        files = {}
        for tname, arr in g.tensors.items():
            rel = tensor_file_name(tname)
            assert rel not in files.values(), f"file name clash for {tname}"
            files[tname] = rel
            np.save(d / rel, arr)
        manifest = {
            "source": f"tests/reference/make_goldens.py, case {name}: {source}",
            "torch_version": torch.__version__,
            "graph": graph,
            "tensors": files,
        }
        (d / "model.json").write_text(manifest_text(manifest))
        np.save(d / "input.npy", np.ascontiguousarray(inp, dtype="<f4"))
        np.save(d / "output.npy", np.ascontiguousarray(out, dtype="<f4"))

    missing = SCHEMA_OPS - used_ops
    assert not missing, f"ops not covered by any case: {sorted(missing)}"
    return list(cases)


# --------------------------------------------------------------------------
# NumPy evaluator of the graph JSON (float64), used by the self-check
# --------------------------------------------------------------------------

ALLOWED_FIELDS = {
    "conv2d": {"weight", "bias", "stride", "dilation", "padding", "groups"},
    "batch_norm": {"gamma", "beta", "mean", "variance", "epsilon"},
    "dense": {"weight", "bias", "weight_layout"},
    "clip": {"min", "max"},
    "leaky_relu": {"slope"},
    "hard_sigmoid": {"alpha", "beta"},
    "gelu": {"approximation"},
    "max_pool": {"kernel", "stride", "padding", "dilation", "ceil_mode"},
    "avg_pool": {"kernel", "stride", "padding", "ceil_mode", "count_include_pad"},
    "reshape": {"shape"},
    "add": {"constant"},
    "mul": {"constant"},
    "pad": {"padding", "value"},
}
TENSOR_FIELDS = {
    "conv2d": ("weight", "bias"),
    "batch_norm": ("gamma", "beta", "mean", "variance"),
    "dense": ("weight", "bias"),
    "add": ("constant",),
    "mul": ("constant",),
}


def pool_out_size(size, k, s, p_lo, p_hi, d, ceil):
    """PyTorch's pooling output size, with its rule that the last window must
    start inside the input or the leading padding (generalised to asymmetric
    padding by using the leading amount)."""
    span = size + p_lo + p_hi - d * (k - 1) - 1
    assert span >= 0, "window larger than padded input"
    if ceil:
        o = -(-span // s) + 1
        if (o - 1) * s >= size + p_lo:
            o -= 1
    else:
        o = span // s + 1
    return o


def window_slices(k, s, d, o):
    return [slice(i * d, i * d + s * (o - 1) + 1, s) for i in range(k)]


def ev_conv2d(n, x, T):
    w = T[n["weight"]]
    b = T[n["bias"]] if n.get("bias") is not None else None
    sh, sw = n.get("stride", [1, 1])
    dh, dw = n.get("dilation", [1, 1])
    t, l, bo, r = n.get("padding", [0, 0, 0, 0])
    g = n.get("groups", 1)
    N, C, H, W = x.shape
    Co, Cg, kh, kw = w.shape
    assert C == Cg * g and Co % g == 0, (n["name"], x.shape, w.shape, g)
    Ho = (H + t + bo - dh * (kh - 1) - 1) // sh + 1
    Wo = (W + l + r - dw * (kw - 1) - 1) // sw + 1
    assert Ho > 0 and Wo > 0
    xp = np.pad(x, ((0, 0), (0, 0), (t, bo), (l, r)))
    wg = w.reshape(g, Co // g, Cg, kh, kw)
    out = np.zeros((N, g, Co // g, Ho, Wo))
    for i, si in enumerate(window_slices(kh, sh, dh, Ho)):
        for j, sj in enumerate(window_slices(kw, sw, dw, Wo)):
            patch = xp[:, :, si, sj].reshape(N, g, Cg, Ho, Wo)
            out += np.einsum("ngchw,goc->ngohw", patch, wg[:, :, :, i, j])
    out = out.reshape(N, Co, Ho, Wo)
    if b is not None:
        assert b.shape == (Co,)
        out += b[None, :, None, None]
    return out


def ev_pool(n, x, is_max):
    kh, kw = n["kernel"]
    sh, sw = n.get("stride", [kh, kw])
    t, l, b, r = n.get("padding", [0, 0, 0, 0])
    dh, dw = n.get("dilation", [1, 1]) if is_max else (1, 1)
    ceil = n.get("ceil_mode", False)
    N, C, H, W = x.shape
    Ho = pool_out_size(H, kh, sh, t, b, dh, ceil)
    Wo = pool_out_size(W, kw, sw, l, r, dw, ceil)
    # Room for every window, including a ceil-mode window that runs past the padding.
    need_h = (Ho - 1) * sh + dh * (kh - 1) + 1
    need_w = (Wo - 1) * sw + dw * (kw - 1) + 1
    extra_b = max(b, need_h - H - t)
    extra_r = max(r, need_w - W - l)
    fill = -np.inf if is_max else 0.0
    xp = np.pad(x, ((0, 0), (0, 0), (t, extra_b), (l, extra_r)), constant_values=fill)
    hs = window_slices(kh, sh, dh, Ho)
    ws = window_slices(kw, sw, dw, Wo)
    if is_max:
        out = np.full((N, C, Ho, Wo), -np.inf)
        for si in hs:
            for sj in ws:
                out = np.maximum(out, xp[:, :, si, sj])
        assert np.all(np.isfinite(out)), "a max_pool window saw only padding"
        return out
    total = np.zeros((N, C, Ho, Wo))
    for si in hs:
        for sj in ws:
            total += xp[:, :, si, sj]
    # Divisor per axis: PyTorch counts the window's part inside the padded
    # input when count_include_pad, else its part inside the real input.
    def counts(size, lo, hi, extra, slices):
        mask = np.zeros(lo + size + extra)
        if n.get("count_include_pad", True):
            mask[: lo + size + hi] = 1
        else:
            mask[lo: lo + size] = 1
        return sum(mask[s] for s in slices)
    div = np.outer(counts(H, t, b, extra_b, hs), counts(W, l, r, extra_r, ws))
    assert np.all(div > 0)
    return total / div[None, None]


def broadcast_pair(a, b, name):
    """Batched operands a, b; checks the schema's broadcast rules per sample."""
    sa, sb = a.shape[1:], b.shape[1:]
    if sa == sb:
        return a, b

    def fit(small, big_shape):
        ss = small.shape[1:]
        if ss == (1,):
            return small.reshape((small.shape[0],) + (1,) * len(big_shape))
        if len(big_shape) == 3 and ss == (big_shape[0], 1, 1):
            return small
        if len(big_shape) == 3 and ss == (big_shape[0],):
            return small.reshape(small.shape[0], big_shape[0], 1, 1)
        raise AssertionError(f"{name}: shapes {sa} and {sb} do not broadcast under the schema")

    if a.size // a.shape[0] < b.size // b.shape[0]:
        return fit(a, sb), b
    return a, fit(b, sa)


def evaluate(graph, T, x):
    vals = {graph["input"]["name"]: x}
    assert list(x.shape[1:]) == graph["input"]["shape"], (x.shape, graph["input"])
    seen = set()
    erf = np.vectorize(math.erf)
    for n in graph["nodes"]:
        name, op = n["name"], n["op"]
        assert name not in seen, name
        seen.add(name)
        extra = set(n) - {"name", "op", "inputs", "output"} - ALLOWED_FIELDS.get(op, set())
        assert not extra, f"{name}: unexpected fields {extra}"
        for f in TENSOR_FIELDS.get(op, ()):
            if n.get(f) is not None:
                assert n[f] in T, f"{name}: missing tensor {n[f]}"
        ins = [vals[i] for i in n["inputs"]]
        if op not in ("add", "mul", "concat"):
            assert len(ins) == 1, name
        v = ins[0]
        if op == "conv2d":
            y = ev_conv2d(n, v, T)
        elif op == "batch_norm":
            C = v.shape[1]
            shp = (1, C) + (1,) * (v.ndim - 2)
            g, b, m, var = (T[n[k]] for k in ("gamma", "beta", "mean", "variance"))
            assert g.shape == b.shape == m.shape == var.shape == (C,)
            eps = n.get("epsilon", 1e-5)
            y = (v - m.reshape(shp)) / np.sqrt(var.reshape(shp) + eps) * g.reshape(shp) + b.reshape(shp)
        elif op == "dense":
            assert v.ndim == 2, f"{name}: dense needs a flat input"
            w = T[n["weight"]]
            layout = n.get("weight_layout", "out_in")
            y = v @ (w.T if layout == "out_in" else w)
            if n.get("bias") is not None:
                y = y + T[n["bias"]][None]
        elif op == "relu":
            y = np.maximum(v, 0)
        elif op == "clip":
            y = np.clip(v, n["min"], n["max"])
        elif op == "leaky_relu":
            y = np.where(v >= 0, v, v * n.get("slope", 0.01))
        elif op == "sigmoid":
            y = 1 / (1 + np.exp(-v))
        elif op == "tanh":
            y = np.tanh(v)
        elif op == "silu":
            y = v / (1 + np.exp(-v))
        elif op == "hard_swish":
            y = v * np.clip(v / 6 + 0.5, 0, 1)
        elif op == "hard_sigmoid":
            y = np.clip(n.get("alpha", 0.2) * v + n.get("beta", 0.5), 0, 1)
        elif op == "gelu":
            approx = n.get("approximation", "none")
            if approx == "none":
                y = 0.5 * v * (1 + erf(v / math.sqrt(2)))
            else:
                assert approx == "tanh", approx
                y = 0.5 * v * (1 + np.tanh(math.sqrt(2 / math.pi) * (v + 0.044715 * v ** 3)))
        elif op in ("max_pool", "avg_pool"):
            y = ev_pool(n, v, op == "max_pool")
        elif op == "global_avg_pool":
            assert v.ndim == 4
            y = v.mean(axis=(2, 3), keepdims=True)
        elif op == "flatten":
            y = v.reshape(v.shape[0], -1)
        elif op == "reshape":
            shape = n["shape"]
            assert sum(1 for s in shape if s == -1) <= 1
            y = v.reshape((v.shape[0],) + tuple(shape))
        elif op in ("add", "mul"):
            if n.get("constant") is not None:
                assert len(ins) == 1, name
                a, b = v, T[n["constant"]][None]
            else:
                assert len(ins) == 2, name
                a, b = ins
            a, b = broadcast_pair(a, b, name)
            y = a + b if op == "add" else a * b
        elif op == "concat":
            assert len(ins) >= 2 and all(i.shape[2:] == v.shape[2:] for i in ins), name
            y = np.concatenate(ins, axis=1)
        elif op == "softmax":
            e = np.exp(v - v.max(axis=1, keepdims=True))
            y = e / e.sum(axis=1, keepdims=True)
        elif op == "pad":
            t, l, b, r = n["padding"]
            y = np.pad(v, ((0, 0), (0, 0), (t, b), (l, r)), constant_values=n.get("value", 0.0))
        elif op == "identity":
            y = v
        else:
            raise AssertionError(f"unknown op {op}")
        assert n["output"] not in vals, n["output"]
        vals[n["output"]] = y
    return vals[graph["output"]]


def selfcheck(cases_dir, case_names=None):
    names = case_names or sorted(p.name for p in cases_dir.iterdir() if p.is_dir())
    total = 0
    ok = True
    for name in names:
        d = cases_dir / name
        manifest = json.loads((d / "model.json").read_text())
        tensors = {}
        for tname, rel in manifest["tensors"].items():
            assert re.fullmatch(r"tensors/[a-z0-9_.-]+\.npy", rel), rel
            arr = np.load(d / rel)
            assert arr.dtype == np.dtype("<f4") and arr.flags.c_contiguous, rel
            tensors[tname] = arr.astype(np.float64)
        inp = np.load(d / "input.npy")
        ref = np.load(d / "output.npy")
        assert inp.dtype == ref.dtype == np.dtype("<f4")
        got = evaluate(manifest["graph"], tensors, inp.astype(np.float64))
        assert got.shape == ref.shape, (name, got.shape, ref.shape)
        err = float(np.max(np.abs(got - ref)))
        scale = max(1.0, float(np.max(np.abs(ref))))
        top1 = bool(np.array_equal(got.argmax(axis=1), ref.argmax(axis=1)))
        passed = err <= REL_TOL * scale and top1
        ok &= passed
        size = sum(p.stat().st_size for p in d.rglob("*") if p.is_file())
        total += size
        ops = sorted({nd["op"] for nd in manifest["graph"]["nodes"]})
        print(f"{'ok  ' if passed else 'FAIL'} {name:20s} nodes={len(manifest['graph']['nodes']):3d} "
              f"in={list(inp.shape)} out={list(ref.shape)} max|ref|={np.max(np.abs(ref)):.3g} "
              f"max_err={err:.2e} (tol {REL_TOL * scale:.1e}) top1={'same' if top1 else 'DIFF'} "
              f"size={size / 1024:.1f}KiB ops={','.join(ops)}")
    print(f"total size {total / 1024:.1f} KiB")
    if not ok:
        sys.exit("self-check failed")


def main():
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--selfcheck", action="store_true",
                    help="only re-check the committed files with the NumPy evaluator")
    args = ap.parse_args()
    if args.selfcheck:
        selfcheck(CASES_DIR)
        return
    # Build beside the committed files and swap only after the self-check
    # passes, so a failed run leaves them untouched.
    staging = CASES_DIR.with_name("cases.new")
    names = generate(staging)
    selfcheck(staging, names)
    if CASES_DIR.exists():
        shutil.rmtree(CASES_DIR)
    staging.rename(CASES_DIR)


if __name__ == "__main__":
    main()
