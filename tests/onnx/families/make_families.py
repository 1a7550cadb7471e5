#!/usr/bin/env python3
"""Build the model-family ONNX zoo that `convoy import` is checked against.

Rerun from the repository root (needs the `.venv-ref` venv, see tests/onnx/README.md):

    .venv-ref/bin/python tests/onnx/families/make_families.py

The networks are torchvision's own model definitions (`torchvision.models`,
no pretrained weights are downloaded), narrowed or shortened through their own
constructor parameters so that each file stays small, plus a few custom
modules written here for layer patterns common in other model definitions
(mixed-kernel depthwise convolutions, cheap "ghost" features, cross-stage
partial blocks, run-time "same" padding, layer norms in both layouts, assorted
reductions and elementwise functions).

Every parameter and buffer is drawn from a NumPy generator with a fixed seed
(so the numbers do not depend on torch's RNG). Then, on a separate seeded
NumPy calibration batch, BatchNorm running statistics are set to that batch's
statistics and randomly perturbed, the layers of the two nets without any
normalisation are rescaled/centred, and the classifier's bias is centred, so
that the outputs depend on the input (see `calibrate`). Finally the
classifier's last layer is scaled once so that the logits have a standard
deviation of about 3.
Each network is exported with both of PyTorch's ONNX exporters:

* the TorchScript exporter (`torch.onnx.export(..., dynamo=False)`), opset 17,
  dynamic batch dimension (ConvNeXt also at opset 13, where LayerNormalization
  does not exist yet and is written out as ReduceMean/Sub/Pow/Sqrt/Div);
* the torch.export-based exporter (`dynamo=True`) at its default opset,
  dynamic batch dimension, weights inline; and once (the reduced ResNet) with
  a fixed example batch of 8 and no `dynamic_shapes`.

Written to tests/onnx/families/:

    <net>.<exporter>[.<variant>].onnx   the exported model
    <net>.input.npy                     float32 [4, C, H, W], standard normal, fixed seed
    <net>.output.npy                    PyTorch's float32 output for that input
                                        (eval mode, torch.inference_mode, 1 thread, CPU)
    <net>.input8.npy / .output8.npy     the same for batch 8 (only for the fixed-batch file)
    manifest.json                       one entry per exported file (see README.md)

Every exported file is checked with `onnx.checker.check_model` and run with the
`onnx` package's own reference evaluator (`onnx.reference.ReferenceEvaluator`)
on the stored input (batch 4, and batch 1 for dynamic-batch files); the largest
absolute difference from PyTorch's output is recorded and must be within
    1e-4 * max(1, max |torch|)
(the rule of tests/onnx/README.md). An export that fails is recorded in the
manifest with its error rather than dropped; the script exits 1 only when the
reference evaluator disagrees with PyTorch.
"""

import collections
import json
import math
import os
import sys
import time
import traceback
import warnings
from functools import partial
from pathlib import Path

import numpy as np
import onnx
import onnx.reference
import onnx.reference.ops.op_max_pool
import onnx.shape_inference
import torch
import torch.nn as nn
import torch.nn.functional as F
import torchvision
from torchvision.models import (
    DenseNet,
    MNASNet,
    ShuffleNetV2,
    SqueezeNet,
    alexnet,
    mobilenet_v2,
    mobilenet_v3_large,
    mobilenet_v3_small,
)
from torchvision.models.convnext import CNBlockConfig, ConvNeXt
from torchvision.models.efficientnet import EfficientNet, MBConvConfig
from torchvision.models.googlenet import BasicConv2d, GoogLeNet, Inception, InceptionAux
from torchvision.models.regnet import BlockParams, RegNet
from torchvision.models.resnet import BasicBlock, ResNet

HERE = Path(__file__).resolve().parent
BATCH = 4
FIXED_BATCH = 8
REL_TOL = 1e-4
TS_OPSET = 17
LOGIT_STD = 3.0


# --------------------------------------------------------------------------
# torchvision families, reduced through their own constructors
# --------------------------------------------------------------------------


class NarrowResNet(ResNet):
    """torchvision's ResNet with every stage a quarter as wide (16/32/64/128 channels).

    torchvision fixes the stage widths at 64/128/256/512; this subclass only
    divides the `planes` argument of its own `_make_layer`. The stem stays at
    64 channels, so the first block of layer1 gets a 1x1 projection shortcut.
    """

    def _make_layer(self, block, planes, blocks, stride=1, dilate=False):
        return super()._make_layer(block, planes // 4, blocks, stride, dilate)


def resnet_narrow():
    """ResNet (He et al. 2016) with basic blocks, one per stage ("ResNet-10"), quarter width."""
    m = NarrowResNet(BasicBlock, [1, 1, 1, 1], num_classes=10)
    m.fc = nn.Linear(128 * BasicBlock.expansion, 10)
    return m


def mobilenet_v2_small():
    """MobileNetV2 (Sandler et al. 2018), width 0.35, one block fewer in four stages."""
    setting = [[1, 16, 1, 1], [6, 24, 1, 2], [6, 32, 2, 2], [6, 64, 2, 2], [6, 96, 2, 1], [6, 160, 1, 2], [6, 320, 1, 1]]
    return mobilenet_v2(width_mult=0.35, num_classes=10, inverted_residual_setting=setting)


def mobilenet_v3_small_half():
    """MobileNetV3-Small (Howard et al. 2019), width 0.5, reduced tail."""
    return mobilenet_v3_small(width_mult=0.5, reduced_tail=True, num_classes=10)


def mobilenet_v3_large_narrow():
    """MobileNetV3-Large (Howard et al. 2019), width 0.35, reduced tail."""
    return mobilenet_v3_large(width_mult=0.35, reduced_tail=True, num_classes=10)


def efficientnet_b0_reduced():
    """EfficientNet-B0's stage table (Tan & Le 2019, table 1) at width 0.35 and depth 0.5."""
    conf = partial(MBConvConfig, width_mult=0.35, depth_mult=0.5)
    setting = [
        conf(1, 3, 1, 32, 16, 1),
        conf(6, 3, 2, 16, 24, 2),
        conf(6, 5, 2, 24, 40, 2),
        conf(6, 3, 2, 40, 80, 3),
        conf(6, 5, 1, 80, 112, 3),
        conf(6, 5, 2, 112, 192, 4),
        conf(6, 3, 1, 192, 320, 1),
    ]
    return EfficientNet(setting, dropout=0.2, num_classes=10)


def regnet_x_tiny():
    """RegNetX (Radosavovic et al. 2020), 7 blocks from the quantised linear width rule, group width 8."""
    params = BlockParams.from_init_params(depth=7, w_0=16, w_a=8.0, w_m=2.0, group_width=8)
    return RegNet(params, num_classes=10, stem_width=16)


def regnet_y_tiny():
    """RegNetY: the RegNetX above plus squeeze-excitation (ratio 0.25) in every block."""
    params = BlockParams.from_init_params(depth=7, w_0=16, w_a=8.0, w_m=2.0, group_width=8, se_ratio=0.25)
    return RegNet(params, num_classes=10, stem_width=16)


def mnasnet_narrow():
    """MnasNet-A1 backbone as torchvision defines it (Tan et al. 2019), depth multiplier 0.35."""
    return MNASNet(0.35, num_classes=10)


def googlenet_quarter():
    """GoogLeNet (Szegedy et al. 2015) with every convolution a quarter as wide.

    Uses the constructor's `blocks` argument: the convolution and Inception
    factories it calls get their channel counts divided by 4 (the RGB input
    stays 3). torchvision's Inception uses 3x3 where the paper has 5x5.
    """

    def scale(c):
        return c if c == 3 else c // 4

    def conv_block(cin, cout, **kw):
        return BasicConv2d(scale(cin), scale(cout), **kw)

    def inception_block(*channels, conv_block=None):
        return Inception(*[scale(c) for c in channels], conv_block=conv_block)

    m = GoogLeNet(
        num_classes=10,
        aux_logits=False,
        transform_input=False,
        init_weights=False,
        blocks=[conv_block, inception_block, InceptionAux],
    )
    m.fc = nn.Linear(1024 // 4, 10)
    return m


def densenet_tiny():
    """DenseNet-BC (Huang et al. 2017): growth 12, blocks (2, 3, 4, 3), 24 initial features, bottleneck 2x."""
    return DenseNet(growth_rate=12, block_config=(2, 3, 4, 3), num_init_features=24, bn_size=2, num_classes=10)


def squeezenet_1_1():
    """SqueezeNet 1.1 (Iandola et al. 2016) at its own width, 10 classes."""
    return SqueezeNet("1_1", num_classes=10)


def shufflenet_v2_tiny():
    """ShuffleNet V2 (Ma et al. 2018), 2 units per stage, channels 16/32/64/128, last conv 256."""
    return ShuffleNetV2([2, 2, 2], [16, 32, 64, 128, 256], num_classes=10)


def convnext_tiny_reduced():
    """ConvNeXt (Liu et al. 2022) with ConvNeXt-T's layout at widths 16/32/64/128 and depths 1/1/2/1."""
    setting = [CNBlockConfig(16, 32, 1), CNBlockConfig(32, 64, 1), CNBlockConfig(64, 128, 2), CNBlockConfig(128, None, 1)]
    return ConvNeXt(setting, num_classes=10)


def alexnet_narrow():
    """AlexNet (Krizhevsky et al. 2012) as torchvision defines it, every layer a quarter (or less) as wide.

    Built with `alexnet(num_classes=10)`, then each Conv2d and Linear is
    replaced by a narrower one with the same kernel, stride and padding
    (features 16/48/96/64/64 channels, classifier 2304 -> 128 -> 128 -> 10),
    so the operators are exactly those of the original.
    """
    m = alexnet(num_classes=10)
    widths = iter([16, 48, 96, 64, 64])
    cin = 3
    for i, layer in enumerate(m.features):
        if isinstance(layer, nn.Conv2d):
            cout = next(widths)
            m.features[i] = nn.Conv2d(cin, cout, layer.kernel_size, layer.stride, layer.padding)
            cin = cout
    fin = cin * 6 * 6
    for i, layer in enumerate(m.classifier):
        if isinstance(layer, nn.Linear):
            fout = 10 if layer.out_features == 10 else 128
            m.classifier[i] = nn.Linear(fin, fout)
            fin = fout
    return m


# --------------------------------------------------------------------------
# Custom modules for patterns of other common model definitions
# --------------------------------------------------------------------------


def conv_bn_act(cin, cout, k=3, stride=1, groups=1, act=nn.ReLU):
    return nn.Sequential(
        nn.Conv2d(cin, cout, k, stride, k // 2, groups=groups, bias=False), nn.BatchNorm2d(cout), act()
    )


class MixConvNet(nn.Module):
    """Mixed-kernel depthwise convolution: channels split unequally, one kernel size per group."""

    def __init__(self):
        super().__init__()
        self.stem = conv_bn_act(3, 24, 3, 2)
        self.sizes = [12, 8, 4]
        self.dw = nn.ModuleList(nn.Conv2d(c, c, k, 1, k // 2, groups=c, bias=False) for c, k in zip(self.sizes, (3, 5, 7)))
        self.bn = nn.BatchNorm2d(24)
        self.pw = conv_bn_act(24, 32, 1)
        # A second mixed block with two unequal groups, stride 2.
        self.sizes2 = [20, 12]
        self.dw2 = nn.ModuleList(nn.Conv2d(c, c, k, 2, k // 2, groups=c, bias=False) for c, k in zip(self.sizes2, (3, 5)))
        self.bn2 = nn.BatchNorm2d(32)
        self.head = nn.Linear(32, 10)

    def forward(self, x):
        x = self.stem(x)
        parts = torch.split(x, self.sizes, dim=1)
        x = torch.cat([conv(p) for conv, p in zip(self.dw, parts)], dim=1)
        x = self.pw(F.relu(self.bn(x)))
        parts = torch.split(x, self.sizes2, dim=1)
        x = F.silu(self.bn2(torch.cat([conv(p) for conv, p in zip(self.dw2, parts)], dim=1)))
        return self.head(x.mean((2, 3)))


class GhostModule(nn.Module):
    """Cheap features (after Han et al. 2020, GhostNet): a 1x1 conv, a depthwise conv on its output, concat, slice."""

    def __init__(self, cin, cout, relu=True):
        super().__init__()
        self.cout = cout
        init = math.ceil(cout / 2)
        act = nn.ReLU if relu else nn.Identity
        self.primary = conv_bn_act(cin, init, 1, act=act)
        self.cheap = conv_bn_act(init, init, 3, groups=init, act=act)

    def forward(self, x):
        x1 = self.primary(x)
        x2 = self.cheap(x1)
        return torch.cat([x1, x2], 1)[:, : self.cout]


class GhostNetLike(nn.Module):
    def __init__(self):
        super().__init__()
        self.stem = conv_bn_act(3, 16, 3, 2)
        self.g1 = GhostModule(16, 21)  # 11 + 11 channels, sliced to 21
        self.g2 = GhostModule(21, 24, relu=False)
        self.down = conv_bn_act(24, 24, 3, 2, groups=24, act=nn.Identity)
        self.g3 = GhostModule(24, 40)
        self.head = nn.Linear(40, 10)

    def forward(self, x):
        x = self.stem(x)
        # Channel-growing residual: the shortcut is zero-padded from 16 to 21 channels.
        x = self.g1(x) + F.pad(x, [0, 0, 0, 0, 0, 5])
        # And from 21 to 24 channels by repeating a slice of its own channels.
        x = self.g2(x) + torch.cat([x, x[:, 2:5]], 1)
        x = self.down(x)
        x = self.g3(x)
        return self.head(F.adaptive_avg_pool2d(x, 1).flatten(1))


class CSPBlock(nn.Module):
    """Cross-stage partial block (after Wang et al. 2020, CSPNet): half the channels bypass the stage."""

    def __init__(self, c):
        super().__init__()
        h = c // 2
        self.b1 = conv_bn_act(h, h, 1, act=nn.SiLU)
        self.b2 = conv_bn_act(h, h, 3, act=nn.SiLU)
        self.transition = conv_bn_act(c, c, 1, act=nn.SiLU)

    def forward(self, x):
        x1, x2 = x.chunk(2, dim=1)
        x2 = x2 + self.b2(self.b1(x2))
        return self.transition(torch.cat([x1, x2], dim=1))


class CSPNetLike(nn.Module):
    def __init__(self):
        super().__init__()
        self.stem = conv_bn_act(3, 32, 3, 2, act=nn.SiLU)
        self.csp1 = CSPBlock(32)
        self.down = conv_bn_act(32, 48, 3, 2, act=nn.SiLU)
        self.csp2 = CSPBlock(48)
        self.head = nn.Linear(48, 10)

    def forward(self, x):
        x = self.csp2(self.down(self.csp1(self.stem(x))))
        return self.head(torch.flatten(F.adaptive_avg_pool2d(x, 1), 1))


class Conv2dSame(nn.Conv2d):
    """Conv2d with TensorFlow's "SAME" padding, computed from the input size at run time."""

    def forward(self, x):
        ih, iw = x.size()[-2:]
        kh, kw = self.weight.size()[-2:]
        sh, sw = self.stride
        dh, dw = self.dilation
        pad_h = max((math.ceil(ih / sh) - 1) * sh + (kh - 1) * dh + 1 - ih, 0)
        pad_w = max((math.ceil(iw / sw) - 1) * sw + (kw - 1) * dw + 1 - iw, 0)
        if pad_h > 0 or pad_w > 0:
            x = F.pad(x, [pad_w // 2, pad_w - pad_w // 2, pad_h // 2, pad_h - pad_h // 2])
        return F.conv2d(x, self.weight, self.bias, self.stride, 0, self.dilation, self.groups)


class TFSameNet(nn.Module):
    """Convolutions with run-time "same" padding on a 36x35 input (odd totals -> asymmetric pads)."""

    def __init__(self):
        super().__init__()
        self.c1 = Conv2dSame(3, 16, 3, stride=2, bias=False)  # 36x35 -> pads h 0/1, w 1/1 -> 18x18
        self.bn1 = nn.BatchNorm2d(16)
        self.c2 = Conv2dSame(16, 16, 5, stride=2, groups=16, bias=False)  # 18x18 -> pads 1/2 -> 9x9
        self.bn2 = nn.BatchNorm2d(16)
        self.c3 = Conv2dSame(16, 32, 3, stride=1, dilation=2)  # pads 2/2 -> 9x9
        self.c4 = Conv2dSame(32, 32, 4, stride=2)  # even kernel: 9x9 -> pads 1/2 -> 5x5
        self.head = nn.Linear(32, 10)

    def forward(self, x):
        x = F.relu6(self.bn1(self.c1(x)))
        x = F.relu6(self.bn2(self.c2(x)))
        x = F.relu(self.c3(x))
        x = F.relu(self.c4(x))
        return self.head(x.mean((2, 3)))


class ChannelsLastBlock(nn.Module):
    """LayerNorm over channels in channels-last form, then an MLP, residual (ConvNeXt-like block)."""

    def __init__(self, c):
        super().__init__()
        self.dw = nn.Conv2d(c, c, 5, padding=2, groups=c)
        self.norm = nn.LayerNorm(c, eps=1e-6)
        self.fc1 = nn.Linear(c, 2 * c)
        self.fc2 = nn.Linear(2 * c, c)

    def forward(self, x):
        y = self.dw(x).permute(0, 2, 3, 1)
        y = self.fc2(F.gelu(self.fc1(self.norm(y))))
        return x + y.permute(0, 3, 1, 2)


class LayerNormCL(nn.Module):
    def __init__(self):
        super().__init__()
        self.stem = nn.Conv2d(3, 24, 4, stride=4)
        self.b1 = ChannelsLastBlock(24)
        self.b2 = ChannelsLastBlock(24)
        self.norm = nn.LayerNorm(24)
        self.head = nn.Linear(24, 10)

    def forward(self, x):
        x = self.b2(self.b1(self.stem(x)))
        return self.head(self.norm(x.mean((2, 3))))


class LayerNormChannelsFirst(nn.Module):
    """LayerNorm over dim 1 of an NCHW tensor, written out (mean, variance, affine [C, 1, 1])."""

    def __init__(self, c, eps=1e-6):
        super().__init__()
        self.eps = eps
        self.weight = nn.Parameter(torch.ones(c, 1, 1))
        self.bias = nn.Parameter(torch.zeros(c, 1, 1))

    def forward(self, x):
        u = x.mean(1, keepdim=True)
        s = (x - u).pow(2).mean(1, keepdim=True)
        x = (x - u) / torch.sqrt(s + self.eps)
        return self.weight * x + self.bias


class LayerNormCF(nn.Module):
    def __init__(self):
        super().__init__()
        self.stem = nn.Conv2d(3, 24, 4, stride=4)
        self.n1 = LayerNormChannelsFirst(24)
        self.pw1 = nn.Conv2d(24, 48, 1)
        self.pw2 = nn.Conv2d(48, 24, 1)
        self.n2 = LayerNormChannelsFirst(24)
        self.down = nn.Conv2d(24, 32, 2, stride=2)
        self.head = nn.Linear(32, 10)

    def forward(self, x):
        x = self.stem(x)
        x = x + self.pw2(F.gelu(self.pw1(self.n1(x))))
        x = self.down(self.n2(x))
        return self.head(x.mean((2, 3)))


class ReduceOps(nn.Module):
    """A head of reductions, elementwise functions, broadcasting, expand/repeat, transpose and gathers."""

    def __init__(self):
        super().__init__()
        self.stem = conv_bn_act(3, 16, 3, 2)
        self.register_buffer("index", torch.tensor([0, 2, 5], dtype=torch.long))
        self.head = nn.Linear(16 + 2 + 3 + 1 + 16, 10)

    def forward(self, x):
        x = self.stem(x)  # [N, 16, 16, 16]
        a = x.amax(dim=(2, 3))  # ReduceMax -> [N, 16]
        s = x.sum(dim=1, keepdim=True)  # ReduceSum -> [N, 1, H, W]
        n = torch.linalg.vector_norm(x, dim=1)  # L2 norm over channels -> [N, H, W]
        p = x.abs() + 0.5  # positive, for exp/log/sqrt/reciprocal
        e = torch.exp(-p)
        lg = torch.log(p)
        r = torch.sqrt(p)
        f = torch.erf(x - 0.3)
        mn = torch.minimum(e, r)
        mx = torch.maximum(lg, f)
        c = torch.clamp(x, -0.5, 0.8)
        q = (x - 0.25) / 1.5 - mn / (r + 1.0) + x.pow(2) * 0.1 + 1 / p
        z = q + torch.transpose(mx, 2, 3) + c + s.expand(-1, 16, -1, -1) * 0.05
        rep = n.unsqueeze(1).repeat(1, 2, 1, 1) * 0.2  # Tile -> [N, 2, H, W]
        sel = torch.index_select(x, 1, self.index)  # Gather, index list -> [N, 3, H, W]
        g = x[:, 3]  # Gather, scalar index -> [N, H, W]
        z = torch.cat([z, rep, sel, g.unsqueeze(1)], dim=1)  # [N, 22, H, W]
        feat = torch.cat([z.mean((2, 3)), a], dim=1)  # [N, 38]
        return self.head(feat)


# name -> (family, constructor, input shape [C, H, W], weight seed, input seed, head module)
NETS = {
    "resnet_narrow": ("ResNet", resnet_narrow, (3, 64, 64), 4101, 5101, "fc"),
    "mobilenet_v2": ("MobileNetV2", mobilenet_v2_small, (3, 64, 64), 4102, 5102, "classifier.1"),
    "mobilenet_v3_small": ("MobileNetV3", mobilenet_v3_small_half, (3, 64, 64), 4103, 5103, "classifier.3"),
    "mobilenet_v3_large": ("MobileNetV3", mobilenet_v3_large_narrow, (3, 64, 64), 4104, 5104, "classifier.3"),
    "efficientnet_b0": ("EfficientNet", efficientnet_b0_reduced, (3, 64, 64), 4105, 5105, "classifier.1"),
    "regnet_x": ("RegNet", regnet_x_tiny, (3, 64, 64), 4106, 5106, "fc"),
    "regnet_y": ("RegNet", regnet_y_tiny, (3, 64, 64), 4107, 5107, "fc"),
    "mnasnet": ("MNASNet", mnasnet_narrow, (3, 64, 64), 4108, 5108, "classifier.1"),
    "googlenet": ("GoogLeNet", googlenet_quarter, (3, 64, 64), 4109, 5109, "fc"),
    "densenet": ("DenseNet", densenet_tiny, (3, 64, 64), 4110, 5110, "classifier"),
    "squeezenet": ("SqueezeNet", squeezenet_1_1, (3, 64, 64), 4111, 5111, "classifier.1"),
    "shufflenet_v2": ("ShuffleNetV2", shufflenet_v2_tiny, (3, 64, 64), 4112, 5112, "fc"),
    "convnext": ("ConvNeXt", convnext_tiny_reduced, (3, 64, 64), 4113, 5113, "classifier.2"),
    "alexnet": ("AlexNet", alexnet_narrow, (3, 64, 64), 4114, 5114, "classifier.6"),
    "mixconv": ("custom", MixConvNet, (3, 32, 32), 4201, 5201, "head"),
    "ghost": ("custom", GhostNetLike, (3, 32, 32), 4202, 5202, "head"),
    "csp": ("custom", CSPNetLike, (3, 32, 32), 4203, 5203, "head"),
    "tfsame": ("custom", TFSameNet, (3, 36, 35), 4204, 5204, "head"),
    "layernorm_cl": ("custom", LayerNormCL, (3, 32, 32), 4205, 5205, "head"),
    "layernorm_cf": ("custom", LayerNormCF, (3, 32, 32), 4206, 5206, "head"),
    "reduce_ops": ("custom", ReduceOps, (3, 32, 32), 4207, 5207, "head"),
}


def _module(model, dotted):
    mod = model
    for part in dotted.split("."):
        mod = getattr(mod, part)
    return mod


def randomise(model, seed):
    """Overwrite every floating-point parameter and buffer from a seeded NumPy generator.

    Convolution and linear weights: He-normal (std sqrt(2 / fan_in), He et al.
    2015) times 0.8, as tests/onnx/make_zoo.py does; biases U(-0.1, 0.1).
    BatchNorm: gamma U(0.5, 1.5), beta U(-0.2, 0.2), running mean N(0, 0.3),
    running variance U(0.5, 2). LayerNorm (and the channels-first one):
    weight U(0.5, 1.5), bias U(-0.1, 0.1). ConvNeXt's layer scale U(0.5, 1).
    """
    rng = np.random.default_rng(seed)
    with torch.no_grad():
        for name, p in model.named_parameters():
            owner = _module(model, name.rsplit(".", 1)[0]) if "." in name else model
            leaf = name.rsplit(".", 1)[-1]
            shape = tuple(p.shape)
            if isinstance(owner, nn.BatchNorm2d):
                val = rng.uniform(0.5, 1.5, shape) if leaf == "weight" else rng.uniform(-0.2, 0.2, shape)
            elif isinstance(owner, (nn.LayerNorm, LayerNormChannelsFirst)):
                val = rng.uniform(0.5, 1.5, shape) if leaf == "weight" else rng.uniform(-0.1, 0.1, shape)
            elif leaf == "layer_scale":
                val = rng.uniform(0.5, 1.0, shape)
            elif isinstance(owner, (nn.Conv2d, nn.Linear)):
                if leaf == "bias":
                    val = rng.uniform(-0.1, 0.1, shape)
                else:
                    fan_in = int(np.prod(shape[1:]))
                    val = rng.standard_normal(shape) * 0.8 * np.sqrt(2.0 / fan_in)
            else:
                raise ValueError(f"no rule for parameter {name} of {type(owner).__name__}")
            p.copy_(torch.from_numpy(val.astype(np.float32)))
        for name, buf in model.named_buffers():
            if not buf.dtype.is_floating_point:
                continue  # num_batches_tracked, constant indices
            shape = tuple(buf.shape)
            if name.endswith("running_mean"):
                val = rng.normal(0.0, 0.3, shape)
            elif name.endswith("running_var"):
                val = rng.uniform(0.5, 2.0, shape)
            else:
                raise ValueError(f"unexpected buffer {name}")
            buf.copy_(torch.from_numpy(val.astype(np.float32)))
    return model


CALIB_BATCH = 16
# Nets without BatchNorm whose ReLU layers get their biases centred on the calibration batch.
CENTRE_ALL_BIASES = {"squeezenet", "alexnet"}


def calibrate(model, net, shape, seed, head_name):
    """Make the random network's output depend on its input; returns notes.

    With random BatchNorm statistics that do not match the activations, the
    input-dependent part of the signal shrinks layer after layer and deep nets
    answer the same logits for every input. So, on a separate calibration
    batch (CALIB_BATCH standard-normal images from NumPy seed `seed`):

    1. BatchNorm running mean/variance are set to that batch's statistics (one
       train-mode forward pass, cumulative average, dropout and stochastic
       depth kept in eval mode), then perturbed from the same NumPy generator:
       mean += N(0, 0.2) * std, variance *= U(0.7, 1.4). The statistics are
       therefore random and far from 0/1, so an importer that folds them wrongly
       still fails.
    2. For the nets without normalisation (SqueezeNet, AlexNet) every
       convolution / linear layer, in order, gets its weight divided by its
       output's standard deviation on the calibration batch and its bias shifted
       so that the output has zero mean per channel (a data-dependent
       initialisation after Mishkin & Matas 2016, "All you need is a good init");
       the classifier's bias then gets the random offset of step 3.
    3. A Linear classifier's bias is shifted by minus its mean logit on the
       calibration batch plus U(-0.5, 0.5) times the logits' standard deviation.
    """
    rng = np.random.default_rng(seed)
    xc = torch.from_numpy(rng.standard_normal((CALIB_BATCH, *shape)).astype(np.float32))
    notes = []
    bns = [m for m in model.modules() if isinstance(m, nn.BatchNorm2d)]
    if bns:
        for m in bns:
            m.reset_running_stats()
            m.momentum = None
        model.eval()
        for m in bns:
            m.train()
        with torch.no_grad():
            model(xc)
        model.eval()
        with torch.no_grad():
            for m in bns:
                sd = m.running_var.sqrt()
                m.running_mean.add_(torch.from_numpy(rng.normal(0.0, 0.2, tuple(sd.shape)).astype(np.float32)) * sd)
                m.running_var.mul_(torch.from_numpy(rng.uniform(0.7, 1.4, tuple(sd.shape)).astype(np.float32)))
        notes.append(f"{len(bns)} BatchNorm layers: running statistics from the calibration batch, randomly perturbed")
    model.eval()
    layers = []
    if net in CENTRE_ALL_BIASES:
        layers = [(n, m) for n, m in model.named_modules() if isinstance(m, (nn.Conv2d, nn.Linear)) and m.bias is not None]
        notes.append(f"{len(layers)} Conv/Linear layers scaled to unit std and centred on the calibration batch")
    head = _module(model, head_name)
    for name, layer in layers:
        _centre(model, layer, xc, rng if name == head_name else None, unit_std=True)
    if isinstance(head, nn.Linear) and net not in CENTRE_ALL_BIASES:
        _centre(model, head, xc, rng)
        notes.append("classifier bias centred on the calibration batch")
    return notes


def _centre(model, layer, xc, rng, unit_std=False):
    """Shift (and optionally scale) one affine layer so its output is centred on the calibration batch."""
    captured = []
    hook = layer.register_forward_hook(lambda mod, inp, out: captured.append(out.detach()))
    with torch.no_grad():
        model(xc)
    hook.remove()
    out = captured[0]
    dims = [d for d in range(out.dim()) if d != 1]
    mean = out.mean(dim=dims)
    with torch.no_grad():
        layer.bias.sub_(mean)
        if unit_std:
            # out - mean = W x + (b - mean); dividing W and b by one scalar keeps the layer affine.
            std = float((out - mean.reshape([1, -1] + [1] * (out.dim() - 2))).std())
            layer.weight.div_(std)
            layer.bias.div_(std)
            out = out / std
        if rng is not None:
            spread = float(out.std())
            layer.bias.add_(torch.from_numpy(rng.uniform(-0.5, 0.5, tuple(mean.shape)).astype(np.float32)) * spread)


def scale_head(model, head_name, x):
    """Scale the last layer so the logits' standard deviation is about LOGIT_STD.

    The gain is rounded to three significant digits. Every head is a Linear or
    a 1x1 Conv followed only by ReLU/average pooling (SqueezeNet), so the
    logits scale by the same positive factor.
    """
    head = _module(model, head_name)
    with torch.inference_mode():
        std = float(model(x).std())
    gain = float(f"{LOGIT_STD / std:.3g}")
    with torch.no_grad():
        head.weight.mul_(gain)
        if head.bias is not None:
            head.bias.mul_(gain)
    return gain


def top1_gap_min(y):
    s = np.sort(y.astype(np.float64), axis=1)
    return float(np.min(s[:, -1] - s[:, -2]))


# --------------------------------------------------------------------------
# Export and checks
# --------------------------------------------------------------------------


def export_torchscript(model, x, path, opset):
    torch.onnx.export(
        model,
        (x,),
        str(path),
        dynamo=False,
        opset_version=opset,
        input_names=["input"],
        output_names=["output"],
        dynamic_axes={"input": {0: "batch"}, "output": {0: "batch"}},
    )


def export_dynamo(model, x, path, dynamic=True):
    kw = {}
    if dynamic:
        kw["dynamic_shapes"] = ({0: torch.export.Dim("batch", min=1, max=1024)},)
    prog = torch.onnx.export(model, (x,), dynamo=True, input_names=["input"], output_names=["output"], **kw)
    data_path = path.parent / (path.name + ".data")
    if data_path.exists():
        data_path.unlink()
    prog.save(str(path), external_data=False)
    if data_path.exists():
        os.chmod(data_path, 0o644)
        return data_path.name
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


def _show(name, arr):
    """`name=[values]`, or `name: int64 [shape]` when the values would not fit a line."""
    text = f"{name}={arr.tolist()}"
    return text if len(text) <= 80 else f"{name}: int64 {list(arr.shape)}"


def int_constants_equal_to(m, value):
    """Names of int64 initializers / Constant nodes that contain `value` (to find a baked-in batch)."""
    hits = []
    for t in m.graph.initializer:
        if t.data_type == onnx.TensorProto.INT64 and value in onnx.numpy_helper.to_array(t).reshape(-1).tolist():
            hits.append(_show(t.name, onnx.numpy_helper.to_array(t)))
    for n in m.graph.node:
        if n.op_type == "Constant":
            for a in n.attribute:
                if a.name == "value" and a.t.data_type == onnx.TensorProto.INT64:
                    arr = onnx.numpy_helper.to_array(a.t)
                    if value in arr.reshape(-1).tolist():
                        hits.append(_show(n.output[0], arr))
    return hits


class MaxPool(onnx.reference.ops.op_max_pool.MaxPool):
    """MaxPool whose output size follows the ONNX spec also for stride 1 with padding and ceil_mode=1.

    onnx 1.23.2's reference MaxPool sends stride-1 pooling to a shared pooling
    routine that pads the input and then applies the ceil-mode size rule to
    the padded size with the pads added again, so a 3x3/stride 1/pad 1
    ceil-mode pool on 8x8 gives 10x10 (the spec, onnx's own shape inference
    and PyTorch give 8x8). GoogLeNet's Inception branch 4 is exactly that
    pool. This override always uses the evaluator's other MaxPool routine
    (`_max_pool`, used by the stock class whenever a stride is not 1), which
    agreed exactly with torch.nn.functional.max_pool2d on 180 combinations of
    input size 7/8/13 x 6/9, kernel 1-3, stride 1-3, pad 0/1, ceil_mode 0/1
    when this script was written. Only used for files that contain such a pool.
    """

    op_domain = ""

    def _run(self, x, auto_pad=None, ceil_mode=None, dilations=None, kernel_shape=None, pads=None,
             storage_order=None, strides=None):
        if auto_pad not in (None, "NOTSET"):
            return super()._run(x, auto_pad=auto_pad, ceil_mode=ceil_mode, dilations=dilations,
                                kernel_shape=kernel_shape, pads=pads, storage_order=storage_order, strides=strides)
        return self._max_pool(x, auto_pad=auto_pad, ceil_mode=ceil_mode, dilations=dilations,
                              kernel_shape=kernel_shape, pads=pads, storage_order=storage_order, strides=strides)


def _needs_maxpool_fix(m):
    for n in m.graph.node:
        if n.op_type != "MaxPool":
            continue
        a = {x.name: onnx.helper.get_attribute_value(x) for x in n.attribute}
        if a.get("ceil_mode", 0) and any(a.get("pads", [0])) and 1 in a.get("strides", [1]):
            return True
    return False


def check_file(path, x, expected):
    """check_model + reference evaluator; returns (opset, op counts, max abs diff, dynamic, notes)."""
    notes = []
    m = onnx.load(str(path))
    external = any(
        t.data_location == onnx.TensorProto.EXTERNAL for t in onnx.load(str(path), load_external_data=False).graph.initializer
    )
    if external:
        onnx.checker.check_model(str(path))
        onnx.shape_inference.infer_shapes(m, check_type=True, strict_mode=True)
        notes.append("checked: check_model(path) + strict shape inference on the loaded model")
    else:
        onnx.checker.check_model(str(path), full_check=True)
    opset = next(o.version for o in m.opset_import if o.domain in ("", "ai.onnx"))
    in_name = m.graph.input[0].name
    dims = m.graph.input[0].type.tensor_type.shape.dim
    dynamic = bool(dims) and dims[0].HasField("dim_param")
    new_ops = None
    if _needs_maxpool_fix(m):
        try:
            stock = onnx.reference.ReferenceEvaluator(m).run(None, {in_name: x})[0]
            stock_msg = f"output {list(stock.shape)}, max abs diff {float(np.max(np.abs(stock - expected))):.3g}"
        except Exception as exc:
            stock_msg = f"fails with {type(exc).__name__}: {str(exc)[:160]}"
        new_ops = [MaxPool]
        notes.append(
            "reference evaluator run with a spec-following MaxPool (stride 1 + pads + ceil_mode=1 is mis-sized by "
            f"the stock onnx {onnx.__version__} MaxPool); the stock evaluator {stock_msg}"
        )
    sess = onnx.reference.ReferenceEvaluator(m, new_ops=new_ops)
    out = sess.run(None, {in_name: x})[0]
    if out.shape != expected.shape:
        raise AssertionError(f"{path.name}: output shape {out.shape} != {expected.shape}")
    diff = float(np.max(np.abs(out.astype(np.float64) - expected.astype(np.float64))))
    tol = REL_TOL * max(1.0, float(np.max(np.abs(expected))))
    if not diff <= tol:
        raise EvaluatorMismatch(f"{path.name}: reference evaluator differs from PyTorch by {diff} > {tol}")
    if not np.array_equal(out.argmax(1), expected.argmax(1)):
        raise EvaluatorMismatch(f"{path.name}: top-1 differs from PyTorch")
    if dynamic:
        out1 = sess.run(None, {in_name: x[:1]})[0]
        d1 = float(np.max(np.abs(out1.astype(np.float64) - expected[:1].astype(np.float64))))
        if out1.shape != expected[:1].shape or not d1 <= tol:
            raise EvaluatorMismatch(f"{path.name}: batch-1 run differs from PyTorch by {d1}")
        notes.append(f"reference evaluator at batch 1: max abs diff {d1:.3g}")
    return opset, op_counts(m), diff, dynamic, notes, m


class EvaluatorMismatch(AssertionError):
    pass


# (net, exporter, variant, kwargs)
EXPORTS = []
for _net in NETS:
    EXPORTS.append((_net, "torchscript", None, {"opset": TS_OPSET}))
    if _net == "convnext":
        EXPORTS.append((_net, "torchscript", "opset13", {"opset": 13}))
    EXPORTS.append((_net, "dynamo", None, {}))
    if _net in ("resnet_narrow", "convnext"):
        EXPORTS.append((_net, "dynamo", "fixed8", {"fixed": True}))


def main():
    torch.set_num_threads(1)
    warnings.filterwarnings("ignore")
    t0 = time.time()
    models, inputs, outputs, info = {}, {}, {}, {}
    for net, (family, ctor, shape, wseed, xseed, head) in NETS.items():
        model = randomise(ctor(), wseed)
        calib_notes = calibrate(model, net, shape, wseed + 500, head)
        model.eval()
        x = np.random.default_rng(xseed).standard_normal((BATCH, *shape)).astype(np.float32)
        gain = scale_head(model, head, torch.from_numpy(x))
        with torch.inference_mode():
            y = model(torch.from_numpy(x)).numpy().astype(np.float32)
        if not np.all(np.isfinite(y)):
            raise AssertionError(f"{net}: non-finite output")
        np.save(HERE / f"{net}.input.npy", x)
        np.save(HERE / f"{net}.output.npy", y)
        models[net], inputs[net], outputs[net] = model, x, y
        n_params = sum(p.numel() for p in model.parameters())
        ratio = float(y.std(axis=0).mean() / y.std())
        info[net] = {"head_gain": gain, "params": n_params, "calib": calib_notes, "ratio": ratio}
        print(
            f"{net}: {n_params} params, head gain {gain}, max|y| {np.abs(y).max():.3g}, "
            f"top-1 {y.argmax(1).tolist()}, min top-1 gap {top1_gap_min(y):.3g}, between-sample ratio {ratio:.2f}"
        )
    # Batch-8 input and output for the fixed-batch export.
    fixed_io = {}
    for net in {e[0] for e in EXPORTS if e[3].get("fixed")}:
        shape = NETS[net][2]
        x8 = np.random.default_rng(NETS[net][4] + 1000).standard_normal((FIXED_BATCH, *shape)).astype(np.float32)
        with torch.inference_mode():
            y8 = models[net](torch.from_numpy(x8)).numpy().astype(np.float32)
        np.save(HERE / f"{net}.input8.npy", x8)
        np.save(HERE / f"{net}.output8.npy", y8)
        fixed_io[net] = (x8, y8)

    manifest = []
    export_failures, mismatches = [], []
    for net, exporter, variant, kw in EXPORTS:
        family = NETS[net][0]
        fname = ".".join(p for p in (net, exporter, variant) if p) + ".onnx"
        path = HERE / fname
        fixed = kw.get("fixed", False)
        x_np, y_np = fixed_io[net] if fixed else (inputs[net], outputs[net])
        entry = {
            "file": fname,
            "net": net,
            "family": family,
            "exporter": exporter,
            "opset": None,
            "external_data": None,
            "input": f"{net}.input8.npy" if fixed else f"{net}.input.npy",
            "output": f"{net}.output8.npy" if fixed else f"{net}.output.npy",
            "input_shape": list(x_np.shape),
            "onnx_input_name": None,
            "onnx_output_name": None,
            "dynamic_batch": None,
            "fixed_batch": FIXED_BATCH if fixed else None,
            "node_op_counts": None,
            "reference_evaluator_max_abs_diff": None,
            "top1_gap_min": top1_gap_min(y_np),
            "notes": "",
        }
        notes = [f"{info[net]['params']} parameters"] + info[net]["calib"] + [
            f"head weights scaled by {info[net]['head_gain']}",
            f"logit std across samples / overall std {info[net]['ratio']:.2f}",
        ]
        model, x = models[net], torch.from_numpy(x_np)
        stage = "export"
        t1 = time.time()
        try:
            if exporter == "torchscript":
                export_torchscript(model, x, path, kw["opset"])
                notes.append(f"torch.onnx.export(dynamo=False, opset_version={kw['opset']}, dynamic_axes batch)")
            elif fixed:
                entry["external_data"] = export_dynamo(model, x, path, dynamic=False)
                notes.append(f"torch.onnx.export(dynamo=True, default opset), example batch {FIXED_BATCH}, no dynamic_shapes")
            else:
                entry["external_data"] = export_dynamo(model, x, path)
                notes.append("torch.onnx.export(dynamo=True, default opset, dynamic_shapes batch)")
            stage = "check"
            t_export = time.time() - t1
            opset, counts, diff, dynamic, check_notes, m = check_file(path, x_np, y_np)
            notes.extend(check_notes)
            if fixed:
                if dynamic:
                    raise AssertionError("fixed-batch export has a dynamic batch")
                hits = int_constants_equal_to(m, FIXED_BATCH)
                notes.append(f"int64 constants containing {FIXED_BATCH}: {hits if hits else 'none'}")
            entry.update(
                opset=opset,
                node_op_counts=counts,
                reference_evaluator_max_abs_diff=diff,
                onnx_input_name=m.graph.input[0].name,
                onnx_output_name=m.graph.output[0].name,
                dynamic_batch=dynamic,
            )
            if net == "tfsame" and exporter == "torchscript" and counts.get("Shape", 0) == 0:
                raise AssertionError("tfsame TorchScript export has no Shape node")
            if variant == "opset13" and counts.get("LayerNormalization", 0):
                raise AssertionError("opset-13 export still has LayerNormalization")
            print(f"{fname}: opset {opset}, diff {diff:.3g}, export {t_export:.1f} s, check {time.time() - t1 - t_export:.1f} s, ops {counts}")
        except EvaluatorMismatch as exc:
            mismatches.append(fname)
            notes.append(f"REFERENCE EVALUATOR MISMATCH: {exc}")
            traceback.print_exc()
        except Exception as exc:  # record the failure instead of dropping the file silently
            msg = f"{type(exc).__name__}: {exc}".strip()
            if stage == "check" and _evaluator_cannot_run(exc):
                notes.append(f"reference evaluator could not run this file: {msg[:1500]}")
                m = onnx.load(str(path))
                entry.update(
                    opset=next(o.version for o in m.opset_import if o.domain in ("", "ai.onnx")),
                    node_op_counts=op_counts(m),
                    onnx_input_name=m.graph.input[0].name,
                    onnx_output_name=m.graph.output[0].name,
                    dynamic_batch=m.graph.input[0].type.tensor_type.shape.dim[0].HasField("dim_param"),
                )
                print(f"{fname}: evaluator could not run it: {msg[:300]}")
            else:
                export_failures.append(fname)
                notes.append(f"{stage.upper()} FAILED: {msg[:1500]}")
                print(f"{fname}: {stage} failed: {msg[:300]}")
                for p in (path, HERE / (fname + ".data")):
                    if p.exists():
                        p.unlink()
                entry["file"] = None
                entry["failed_file"] = fname
        entry["notes"] = "; ".join(notes)
        manifest.append(entry)

    with open(HERE / "manifest.json", "w") as f:
        json.dump(
            {
                "versions": {
                    "torch": torch.__version__,
                    "torchvision": torchvision.__version__,
                    "onnx": onnx.__version__,
                    "onnxscript": _version("onnxscript"),
                    "numpy": np.__version__,
                },
                "tolerance": "max abs error <= 1e-4 * max(1, max|reference|), identical top-1",
                "files": manifest,
            },
            f,
            indent=1,
        )
        f.write("\n")
    print(
        f"wrote {len(manifest)} entries in {time.time() - t0:.0f} s; "
        f"failed exports {export_failures or 'none'}; evaluator mismatches {mismatches or 'none'}"
    )
    return 1 if mismatches else 0


def _evaluator_cannot_run(exc):
    """True when the error comes from the reference evaluator lacking an operator or an attribute."""
    tb = "".join(traceback.format_exception(exc))
    return "onnx/reference" in tb and isinstance(exc, (NotImplementedError, RuntimeError, TypeError, KeyError))


def _version(pkg):
    try:
        return __import__(pkg).__version__
    except Exception:
        return None


if __name__ == "__main__":
    os.environ.setdefault("OMP_NUM_THREADS", "1")
    sys.exit(main())
