#!/usr/bin/env python3
"""Single-operator semantics cases for `convoy import`, checked against the ONNX spec.

Each case is a tiny ONNX model built with `onnx.helper`: ONE graph input `x`, a
float32 tensor with a dynamic batch dimension `N` (`[N, F]` or `[N, C, H, W]`,
the only input ranks convoy accepts), the operator under test (sometimes after a
leading Reshape/Slice/Reduce that makes the rank or the second operand it needs),
every other operand a constant initializer, and ONE graph output `y`.

Expected outputs come from the `onnx` package's own reference evaluator
(`onnx.reference.ReferenceEvaluator`, a NumPy implementation of the operator
specification). No other inference engine is involved. Rerun from the
repository root:

    .venv-ref/bin/python tests/data/onnx_ops/make_op_cases.py

It rewrites tests/data/onnx_ops/<case>.onnx and tests/data/onnx_ops/cases.json:

    {"versions": {...}, "source": "...", "tolerance": {...},
     "cases": [{"name", "file", "op", "opset", "expect": "ok" | "refused",
                "compare": "exact" | "close" | null,
                "input": {"shape": [...], "data": [...]},
                "expected": {"shape": [...], "data": [...]} | null,
                "note"}]}

Float32 values are written exactly: each is the float32 widened to a double and
printed by Python's shortest round-trip repr, so parsing it as f64 and
narrowing to f32 gives back the same bits (as tests/data/onnx_fold/ does).

Every "ok" case is also run per sample (each row of the batch alone, N = 1) and
must give the same rows: that is what makes it a legal per-sample operation for
a classifier with a dynamic batch. Every "refused" case must fail that check
(an error, or a different shape/values) -- which is why an importer of a
dynamic-batch classifier has to refuse it.
"""

import json
import math
from pathlib import Path

import numpy as np
import onnx
import onnx.checker
import onnx.shape_inference
from onnx import TensorProto, helper, numpy_helper
from onnx.reference import ReferenceEvaluator

HERE = Path(__file__).resolve().parent
INT_MAX = int(np.iinfo(np.int64).max)
INT_MIN = int(np.iinfo(np.int64).min)

# Operators whose result is bit-exact whatever the implementation (data
# movement, sign/abs, selection). A case is compared exactly when all of its
# nodes are in this set, otherwise with "close".
EXACT_OPS = {
    "Transpose", "Reshape", "Flatten", "Squeeze", "Unsqueeze", "Split", "Slice",
    "Gather", "Concat", "Expand", "Tile", "Abs", "Neg", "Min", "Max", "Clip",
    "ReduceMax", "GatherND",
}


def i64(*v):
    return np.array(v, dtype=np.int64)


def f32(*v):
    return np.array(v, dtype=np.float32)


def scalar(v):
    return np.array(v, dtype=np.float32)


def node(op, inputs, outputs, **attrs):
    return helper.make_node(op, inputs, outputs, **attrs)


def encode(a):
    a = np.asarray(a, dtype=np.float32)
    data = []
    for v in a.reshape(-1).tolist():
        if not math.isfinite(v):
            raise ValueError("non-finite value in a case")
        data.append(v)
    return {"shape": list(a.shape), "data": data}


CASES = []


class _NotPerSample(Exception):
    pass

_SEED = [5000]


def case(name, op, opset, shape, nodes, inits=None, note="", expect="ok", positive=False, out="y", batch=None):
    """Build, check, evaluate and record one case.

    shape: the input shape without the batch; nodes read `x` and write `out`.
    positive: draw the input as |normal| + 0.5 (for Log, Sqrt, Pow 0.5, Reciprocal, 1/x).
    batch: N of the stored input (by default alternately 3 and 2).
    """
    inits = inits or {}
    _SEED[0] += 1
    rng = np.random.default_rng(_SEED[0])
    if batch is None:
        batch = 2 + _SEED[0] % 2  # alternately 3 and 2
    x = rng.standard_normal((batch, *shape)).astype(np.float32)
    if positive:
        x = (np.abs(x) + np.float32(0.5)).astype(np.float32)
    graph = helper.make_graph(
        nodes,
        name,
        [helper.make_tensor_value_info("x", TensorProto.FLOAT, ["N", *shape])],
        [helper.make_tensor_value_info(out, TensorProto.FLOAT, None)],
        initializer=[numpy_helper.from_array(v, k) for k, v in inits.items()],
    )
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", opset)], producer_name="make_op_cases.py")
    model.ir_version = 8 if opset <= 18 else 10
    # Fill in the output's type and shape (symbolic batch where it follows).
    inferred = onnx.shape_inference.infer_shapes(model, check_type=True, strict_mode=True)
    out_vi = inferred.graph.output[0]
    model.graph.output[0].CopyFrom(out_vi)
    if not out_vi.type.tensor_type.HasField("shape"):
        # Only a refused case (Squeeze without axes on a symbolic batch) has an
        # output rank that shape inference cannot tell; declare the rank seen at
        # batch 2 with unknown dimensions.
        if expect == "ok":
            raise AssertionError(f"{name}: shape inference gives no output shape")
        rank = ReferenceEvaluator(model).run(None, {"x": x})[0].ndim
        model.graph.output[0].CopyFrom(helper.make_tensor_value_info(out, TensorProto.FLOAT, [None] * rank))
    onnx.checker.check_model(model, full_check=True)
    fname = f"{name}.onnx"
    onnx.save_model(model, str(HERE / fname))

    sess = ReferenceEvaluator(model)
    y = sess.run(None, {"x": x})[0]
    if y.dtype != np.float32:
        raise AssertionError(f"{name}: output dtype {y.dtype}")
    if not np.all(np.isfinite(y)):
        raise AssertionError(f"{name}: non-finite output")
    per_sample_ok = True
    reason = ""
    try:
        if y.ndim == 0 or y.shape[0] != batch:
            raise _NotPerSample(f"output shape {list(y.shape)} for input batch {batch}")
        for i in range(batch):
            yi = sess.run(None, {"x": x[i : i + 1]})[0]
            if yi.shape[:1] != (1,) or yi.shape[1:] != y.shape[1:]:
                per_sample_ok, reason = False, f"row {i} alone gives shape {list(yi.shape)}, the batch {list(y.shape)}"
                break
            if not np.allclose(yi[0], y[i], rtol=1e-6, atol=1e-6):
                per_sample_ok, reason = False, f"row {i}: values differ"
                break
    except _NotPerSample as exc:
        per_sample_ok, reason = False, str(exc)
    except Exception as exc:  # e.g. a Reshape that hard-codes the batch size
        per_sample_ok, reason = False, f"{type(exc).__name__} at batch 1"
    if expect == "ok" and not per_sample_ok:
        raise AssertionError(f"{name}: not per-sample ({reason})")
    if expect == "refused" and per_sample_ok:
        raise AssertionError(f"{name}: expected refusal but the op is per-sample")
    entry = {
        "name": name,
        "file": fname,
        "op": op,
        "opset": opset,
        "expect": expect,
        # Exact only when every node of the model is (a leading ReduceMean makes the case "close").
        "compare": (("exact" if all(n.op_type in EXACT_OPS for n in nodes) else "close") if expect == "ok" else None),
        "input": encode(x),
        "expected": encode(y) if expect == "ok" else None,
        "note": note if expect == "ok" else f"{note} (per-sample check with the reference evaluator: {reason})",
    }
    CASES.append(entry)


def build():
    X4 = [3, 4, 5]  # C, H, W of the usual rank-4 input
    # ------------------------------------------------------------------ Transpose
    for perm in ([0, 2, 3, 1], [0, 3, 1, 2], [0, 1, 3, 2], [0, 3, 2, 1]):
        case(f"transpose_r4_{''.join(map(str, perm))}", "Transpose", 13, X4,
             [node("Transpose", ["x"], ["y"], perm=perm)], note=f"perm {perm}")
    case("transpose_r2_identity", "Transpose", 13, [6], [node("Transpose", ["x"], ["y"], perm=[0, 1])],
         note="perm [0, 1] on [N, F]: identity")
    case("transpose_r3_021", "Transpose", 13, [3, 4, 5],
         [node("Reshape", ["x", "s"], ["r"]), node("Transpose", ["r"], ["y"], perm=[0, 2, 1])],
         {"s": i64(0, 3, -1)}, note="Reshape [N,3,4,5] -> [N,3,20], perm [0,2,1]")
    case("transpose_r5_channel_shuffle", "Transpose", 17, [6, 2, 3],
         [node("Reshape", ["x", "s"], ["r"]), node("Transpose", ["r"], ["y"], perm=[0, 2, 1, 3, 4])],
         {"s": i64(0, 2, 3, 2, 3)}, note="Reshape [N,6,2,3] -> [N,2,3,2,3] (groups 2), perm [0,2,1,3,4] (channel shuffle)")
    case("transpose_r5_last_first", "Transpose", 21, [4, 2, 3],
         [node("Reshape", ["x", "s"], ["r"]), node("Transpose", ["r"], ["y"], perm=[0, 4, 2, 3, 1])],
         {"s": i64(0, 2, 2, 2, 3)}, note="rank 5, perm [0,4,2,3,1]")
    case("transpose_r6_space_to_depth", "Transpose", 13, [2, 4, 6],
         [node("Reshape", ["x", "s"], ["r"]), node("Transpose", ["r"], ["y"], perm=[0, 3, 5, 1, 2, 4])],
         {"s": i64(0, 2, 2, 2, 3, 2)},
         note="Reshape [N,2,4,6] -> [N,2,2,2,3,2] (C, H/2, 2, W/2, 2 blocks), perm [0,3,5,1,2,4] as in space-to-depth")
    case("transpose_r6_reverse_rest", "Transpose", 18, [2, 3, 4],
         [node("Reshape", ["x", "s"], ["r"]), node("Transpose", ["r"], ["y"], perm=[0, 5, 4, 3, 2, 1])],
         {"s": i64(0, 2, 3, 2, 2, 1)}, note="rank 6, every non-batch axis reversed; a size-1 axis included")

    # ------------------------------------------------------------------ Reshape
    case("reshape_r4_to_r2", "Reshape", 13, X4, [node("Reshape", ["x", "s"], ["y"])], {"s": i64(0, -1)},
         note="[0, -1]")
    case("reshape_r4_to_r3", "Reshape", 14, X4, [node("Reshape", ["x", "s"], ["y"])], {"s": i64(0, 3, -1)},
         note="[0, 3, -1]")
    case("reshape_r4_copy_two", "Reshape", 13, X4, [node("Reshape", ["x", "s"], ["y"])], {"s": i64(0, 0, -1, 2)},
         note="[0, 0, -1, 2]: copies N and C, infers 10")
    case("reshape_r2_to_r4", "Reshape", 13, [24], [node("Reshape", ["x", "s"], ["y"])], {"s": i64(0, 2, 3, 4)},
         note="[N,24] -> [0, 2, 3, 4]")
    case("reshape_minus1_first", "Reshape", 13, [24], [node("Reshape", ["x", "s"], ["y"])], {"s": i64(-1, 4, 3, 2)},
         note="[-1, 4, 3, 2]: the rest accounts for every element of a row, so -1 is the batch")
    case("reshape_r4_to_r6", "Reshape", 21, [4, 2, 3], [node("Reshape", ["x", "s"], ["y"])], {"s": i64(0, 2, 2, 1, 2, 3)},
         note="rank 4 -> rank 6 at opset 21")
    case("reshape_r4_to_r5_allowzero", "Reshape", 14, X4, [node("Reshape", ["x", "s"], ["y"], allowzero=1)],
         {"s": i64(-1, 3, 2, 2, 5)}, note="allowzero=1 with no 0 in the shape (as the dynamo exporter writes)")

    # ------------------------------------------------------------------ Flatten
    for axis in (1, -3):
        case(f"flatten_axis{axis}".replace("-", "m"), "Flatten", 13, X4,
             [node("Flatten", ["x"], ["y"], axis=axis)], note=f"axis {axis} on rank 4 -> [N, 60]")
    case("flatten_r5_axis1", "Flatten", 21, [4, 2, 3],
         [node("Reshape", ["x", "s"], ["r"]), node("Flatten", ["r"], ["y"], axis=1)], {"s": i64(0, 2, 2, 2, 3)},
         note="rank 5 [N,2,2,2,3], axis 1 -> [N, 24]")
    case("reshape_r4_to_r3_o19", "Reshape", 19, X4, [node("Reshape", ["x", "s"], ["y"])], {"s": i64(0, -1, 5)},
         note="[0, -1, 5] at opset 19")
    case("flatten_opset11_r2", "Flatten", 11, [7], [node("Flatten", ["x"], ["y"], axis=1)], note="rank 2, axis 1")

    # ------------------------------------------------------------------ Squeeze / Unsqueeze
    case("squeeze_axis2_input", "Squeeze", 13, [3, 1, 5], [node("Squeeze", ["x", "a"], ["y"])], {"a": i64(2)},
         note="axes [2] as input")
    case("squeeze_neg_axes_input", "Squeeze", 21, [3, 1, 1], [node("Squeeze", ["x", "a"], ["y"])], {"a": i64(-1, -2)},
         note="axes [-1, -2] as input -> [N, 3]")
    case("squeeze_attr_opset11", "Squeeze", 11, [1, 4, 1], [node("Squeeze", ["x"], ["y"], axes=[1, 3])],
         note="axes attribute [1, 3] (before opset 13)")
    case("squeeze_r5", "Squeeze", 13, [4, 3, 2],
         [node("Reshape", ["x", "s"], ["r"]), node("Squeeze", ["r", "a"], ["y"])],
         {"s": i64(0, 4, 1, 3, 2), "a": i64(-3)}, note="rank 5 [N,4,1,3,2], axes [-3] -> rank 4")
    case("unsqueeze_r2_axis1", "Unsqueeze", 13, [6], [node("Unsqueeze", ["x", "a"], ["y"])], {"a": i64(1)},
         note="[N,6] -> [N,1,6]")
    case("unsqueeze_r2_neg", "Unsqueeze", 13, [6], [node("Unsqueeze", ["x", "a"], ["y"])], {"a": i64(-1, 1)},
         note="axes [-1, 1] (relative to the output rank 4) -> [N,1,6,1]")
    case("unsqueeze_r4_to_r6", "Unsqueeze", 21, X4, [node("Unsqueeze", ["x", "a"], ["y"])], {"a": i64(2, 5)},
         note="axes [2, 5] -> [N,3,1,4,5,1]")
    case("unsqueeze_attr_opset11", "Unsqueeze", 11, X4, [node("Unsqueeze", ["x"], ["y"], axes=[-1])],
         note="axes attribute [-1] (before opset 13)")

    # ------------------------------------------------------------------ Split (one case per output index used)
    for i in range(3):
        case(f"split_num_outputs_o18_out{i}", "Split", 18, [6, 2, 3],
             [node("Split", ["x"], ["y0", "y1", "y2"], axis=1, num_outputs=3)], out=f"y{i}",
             note=f"num_outputs=3 on axis 1 (6 channels), output {i}")
    for i in range(3):
        case(f"split_num_outputs_uneven_o18_out{i}", "Split", 18, [3, 7],
             [node("Split", ["x"], ["y0", "y1", "y2"], axis=-1, num_outputs=3)], out=f"y{i}",
             note=f"num_outputs=3 on axis -1 of size 7: sizes 3, 3, 1 (last one smaller), output {i}")
    for i in range(2):
        case(f"split_equal_nosizes_o13_out{i}", "Split", 13, [2, 4, 3],
             [node("Split", ["x"], ["y0", "y1"], axis=2)], out=f"y{i}",
             note=f"no sizes, 2 outputs on axis 2, output {i}")
    for i in range(3):
        case(f"split_sizes_input_o13_out{i}", "Split", 13, [6, 2, 2],
             [node("Split", ["x", "sp"], ["y0", "y1", "y2"], axis=1)], {"sp": i64(1, 2, 3)}, out=f"y{i}",
             note=f"sizes [1, 2, 3] as input on axis 1, output {i}")
    for i in range(2):
        case(f"split_sizes_input_neg_axis_o18_out{i}", "Split", 18, [2, 3, 5],
             [node("Split", ["x", "sp"], ["y0", "y1"], axis=-1)], {"sp": i64(4, 1)}, out=f"y{i}",
             note=f"sizes [4, 1] as input on axis -1, output {i}")
    for i in range(2):
        case(f"split_sizes_attr_o11_out{i}", "Split", 11, [2, 3, 6],
             [node("Split", ["x"], ["y0", "y1"], axis=3, split=[2, 4])], out=f"y{i}",
             note=f"split attribute [2, 4] on axis 3 (before opset 13), output {i}")
    case("split_r2_o13_out1", "Split", 13, [10], [node("Split", ["x", "sp"], ["y0", "y1", "y2"], axis=1)],
         {"sp": i64(5, 3, 2)}, out="y1", note="[N,10], sizes [5, 3, 2], output 1 (outputs 0 and 2 unused)")

    # ------------------------------------------------------------------ Slice
    def sl(name, opset, shape, starts, ends, axes=None, steps=None, note=""):
        ins = ["x", "st", "en"]
        inits = {"st": i64(*starts), "en": i64(*ends)}
        if axes is not None:
            ins.append("ax")
            inits["ax"] = i64(*axes)
        if steps is not None:
            if axes is None:
                ins.append("")
            ins.append("sp")
            inits["sp"] = i64(*steps)
        case(name, "Slice", opset, shape, [node("Slice", ins, ["y"])], inits, note=note)

    sl("slice_neg_start_end", 13, X4, [-3], [-1], [2], note="axis 2 [-3:-1]")
    sl("slice_step2_intmax", 13, X4, [0], [INT_MAX], [3], [2], note="axis 3 [0:INT64_MAX:2]")
    sl("slice_end_past_dim", 13, X4, [1], [100], [1], note="axis 1 [1:100] (end clamped)")
    sl("slice_reverse_intmin", 13, X4, [-1], [INT_MIN], [3], [-1],
       note="axis 3 [-1:INT64_MIN:-1] (full reversal, as exporters write flip)")
    sl("slice_reverse_step2", 13, X4, [INT_MAX], [INT_MIN], [2], [-2],
       note="axis 2 [INT64_MAX:INT64_MIN:-2] (start clamped to dim-1)")
    sl("slice_reverse_partial", 13, X4, [3], [0], [3], [-1], note="axis 3 [3:0:-1] (element 0 excluded)")
    sl("slice_several_axes", 13, X4, [1, 0, -4], [3, INT_MAX, -1], [1, 2, 3], [1, 3, 2],
       note="axes [1,2,3]: [1:3], [0:INT64_MAX:3], [-4:-1:2]")
    sl("slice_neg_axes", 18, X4, [1, -2], [INT_MAX, INT_MAX], [-1, -2], note="axes [-1, -2]")
    sl("slice_omitted_axes_batch_full", 13, X4, [0, 1], [INT_MAX, 3],
       note="axes omitted -> [0, 1]; axis 0 (batch) sliced [0:INT64_MAX], i.e. kept whole")
    sl("slice_omitted_steps", 11, X4, [1, 1], [2, 4], [1, 3], note="opset 11, steps omitted")
    sl("slice_r2", 13, [9], [2], [-2], [1], note="[N,9] axis 1 [2:-2]")
    sl("slice_empty_clamped_start", 13, X4, [-100], [2], [2], note="axis 2 [-100:2] (start clamped to 0)")

    # ------------------------------------------------------------------ Gather
    def ga(name, shape, idx, axis, opset=13, note=""):
        case(name, "Gather", opset, shape, [node("Gather", ["x", "i"], ["y"], axis=axis)], {"i": np.array(idx, np.int64)},
             note=note)

    ga("gather_scalar_axis1", X4, 2, 1, note="x[:, 2]: scalar index removes axis 1")
    ga("gather_list_axis1", X4, [0, 2, 2], 1, note="indices [0, 2, 2] on axis 1 (repeat)")
    ga("gather_neg_scalar_axis2", X4, -1, 2, note="scalar -1 on axis 2")
    ga("gather_neg_list_axis3", X4, [-1, 0, -5], 3, opset=11, note="indices [-1, 0, -5] on axis 3, opset 11")
    ga("gather_axis_neg1", X4, [1], -1, note="axis -1, one-element list keeps the axis")
    ga("gather_2d_index_axis1", X4, [[0, 1], [2, 0]], 1, note="2-D indices on axis 1 -> rank 5 [N,2,2,4,5]")
    ga("gather_r2_scalar", [8], 3, 1, note="[N,8] x[:, 3] -> [N]")

    # ------------------------------------------------------------------ Concat
    case("concat_single_input", "Concat", 13, X4, [node("Concat", ["x"], ["y"], axis=1)], note="one input")
    for axis in (1, 2, 3, -1, -3):
        case(f"concat_self_axis{axis}".replace("-", "m"), "Concat", 13, X4,
             [node("Concat", ["x", "x"], ["y"], axis=axis)], note=f"[x, x] on axis {axis}")
    case("concat_with_slice_axis2", "Concat", 13, X4,
         [node("Slice", ["x", "st", "en", "ax"], ["s"]), node("Concat", ["x", "s", "x"], ["y"], axis=2)],
         {"st": i64(1), "en": i64(3), "ax": i64(2)}, note="[x, x[:, :, 1:3], x] on axis 2 (three inputs)")
    case("concat_self_and_neg_o16", "Concat", 16, [2, 3, 4],
         [node("Neg", ["x"], ["n"]), node("Concat", ["n", "x"], ["y"], axis=-2)], note="[-x, x] on axis -2 at opset 16")
    case("concat_r2", "Concat", 11, [5],
         [node("Slice", ["x", "st", "en", "ax"], ["s"]), node("Concat", ["s", "x"], ["y"], axis=-1)],
         {"st": i64(-2), "en": i64(INT_MAX), "ax": i64(1)}, note="[x[:, -2:], x] on axis -1, opset 11")

    # ------------------------------------------------------------------ Expand / Tile
    case("expand_hw", "Expand", 13, [3, 1, 1], [node("Expand", ["x", "s"], ["y"])], {"s": i64(1, 3, 4, 5)},
         note="[N,3,1,1] to [1,3,4,5] -> [N,3,4,5]")
    case("expand_channels", "Expand", 13, [1, 2, 3], [node("Expand", ["x", "s"], ["y"])], {"s": i64(4, 1, 1)},
         note="[N,1,2,3] with a shorter shape [4,1,1] -> [N,4,2,3]")
    case("expand_last_axis_short_shape", "Expand", 13, [3, 2, 1], [node("Expand", ["x", "s"], ["y"])], {"s": i64(4)},
         note="[N,3,2,1] with shape [4] -> [N,3,2,4]")
    case("expand_noop_ones", "Expand", 13, X4, [node("Expand", ["x", "s"], ["y"])], {"s": i64(1, 1)},
         note="shape [1,1]: output equals input")
    case("expand_r2_to_r3", "Expand", 13, [5],
         [node("Unsqueeze", ["x", "a"], ["u"]), node("Expand", ["u", "s"], ["y"])],
         {"a": i64(1), "s": i64(1, 3, 1)}, note="[N,1,5] to [1,3,1] -> [N,3,5] (x.expand(-1, 3, -1) after unsqueeze)")
    case("tile_hw", "Tile", 13, [2, 2, 3], [node("Tile", ["x", "r"], ["y"])], {"r": i64(1, 1, 2, 3)},
         note="repeats [1,1,2,3]")
    case("tile_channels", "Tile", 13, [2, 2, 3], [node("Tile", ["x", "r"], ["y"])], {"r": i64(1, 3, 1, 1)},
         note="repeats [1,3,1,1] (x.repeat(1, 3, 1, 1))")
    case("tile_r2", "Tile", 13, [4], [node("Tile", ["x", "r"], ["y"])], {"r": i64(1, 3)}, note="[N,4] repeats [1,3]")

    # ------------------------------------------------------------------ LayerNormalization (opset 17)
    case("layernorm_axis_m1_bias", "LayerNormalization", 17, [3, 4, 6],
         [node("LayerNormalization", ["x", "g", "b"], ["y"], axis=-1, epsilon=1e-5)],
         {"g": np.linspace(0.5, 1.5, 6, dtype=np.float32), "b": np.linspace(-0.2, 0.3, 6, dtype=np.float32)},
         note="axis -1 (over W), scale and bias [6], epsilon 1e-5")
    case("layernorm_axis_m1_nobias", "LayerNormalization", 17, [3, 4, 6],
         [node("LayerNormalization", ["x", "g"], ["y"], axis=-1, epsilon=1e-6)],
         {"g": np.linspace(1.5, 0.5, 6, dtype=np.float32)}, note="axis -1, no bias, epsilon 1e-6")
    case("layernorm_axis1_r4", "LayerNormalization", 17, [2, 3, 4],
         [node("LayerNormalization", ["x", "g", "b"], ["y"], axis=1)],
         {"g": np.linspace(0.5, 1.5, 24, dtype=np.float32).reshape(2, 3, 4),
          "b": np.linspace(-0.5, 0.5, 24, dtype=np.float32).reshape(2, 3, 4)},
         note="axis 1 on rank 4 (normalise over C,H,W), scale/bias [2,3,4], default epsilon 1e-5")
    case("layernorm_axis1_r2", "LayerNormalization", 17, [10],
         [node("LayerNormalization", ["x", "g", "b"], ["y"], axis=1)],
         {"g": np.linspace(0.8, 1.2, 10, dtype=np.float32), "b": np.full(10, 0.1, np.float32)},
         note="[N,10], axis 1")
    case("layernorm_axis_m2_r4", "LayerNormalization", 17, [2, 3, 4],
         [node("LayerNormalization", ["x", "g"], ["y"], axis=-2)],
         {"g": np.linspace(0.5, 1.0, 12, dtype=np.float32).reshape(3, 4)}, note="axis -2 (over H,W), scale [3,4]")

    # ------------------------------------------------------------------ Reductions
    red_variants = [
        ("hw_keep", [2, 3], 1),
        ("c_nokeep", [1], 0),
        ("neg1_keep", [-1], 1),
        ("neg2neg1_nokeep", [-2, -1], 0),
        ("c_h_keep", [1, -2], 1),
    ]
    for op in ("ReduceMean", "ReduceMax", "ReduceSum", "ReduceL2"):
        short = op[len("Reduce"):].lower()
        # Axes moved from attribute to input at opset 13 for ReduceSum, at 18 for the others.
        attr_opset, input_opset = (11, 13) if op == "ReduceSum" else (13, 18)
        for tag, axes, keep in red_variants:
            case(f"reduce{short}_{tag}_attr_o{attr_opset}", op, attr_opset, X4,
                 [node(op, ["x"], ["y"], axes=axes, keepdims=keep)],
                 note=f"axes {axes} as attribute, keepdims {keep}")
            case(f"reduce{short}_{tag}_input_o{input_opset}", op, input_opset, X4,
                 [node(op, ["x", "a"], ["y"], keepdims=keep)], {"a": i64(*axes)},
                 note=f"axes {axes} as input, keepdims {keep}")
    case("reducemean_r2_nokeep", "ReduceMean", 18, [7], [node("ReduceMean", ["x", "a"], ["y"], keepdims=0)],
         {"a": i64(1)}, note="[N,7] -> [N]")
    case("reducemean_noop_empty_axes_o18", "ReduceMean", 18, X4,
         [node("ReduceMean", ["x", "a"], ["y"], noop_with_empty_axes=1)], {"a": np.zeros(0, np.int64)},
         note="empty axes input with noop_with_empty_axes=1: identity")
    case("reducesum_default_keepdims_o13", "ReduceSum", 13, X4, [node("ReduceSum", ["x", "a"], ["y"])], {"a": i64(3)},
         note="keepdims omitted (default 1)")

    # ------------------------------------------------------------------ Unary
    case("sqrt", "Sqrt", 13, X4, [node("Sqrt", ["x"], ["y"])], positive=True, note="input |normal| + 0.5")
    case("reciprocal", "Reciprocal", 13, X4, [node("Reciprocal", ["x"], ["y"])], positive=True, note="input |normal| + 0.5")
    case("abs", "Abs", 13, X4, [node("Abs", ["x"], ["y"])])
    case("neg", "Neg", 13, X4, [node("Neg", ["x"], ["y"])])
    case("exp", "Exp", 13, X4, [node("Exp", ["x"], ["y"])])
    case("log", "Log", 13, X4, [node("Log", ["x"], ["y"])], positive=True, note="input |normal| + 0.5")
    case("exp_o20", "Exp", 20, [7], [node("Exp", ["x"], ["y"])], note="[N,7] at opset 20")
    case("erf", "Erf", 13, X4, [node("Erf", ["x"], ["y"])])
    case("erf_r2_scaled", "Erf", 13, [16], [node("Mul", ["x", "k"], ["m"]), node("Erf", ["m"], ["y"])],
         {"k": scalar(2.0)}, note="Erf of 2x (wider range, saturating tails)")
    # Pow with constant exponents.
    case("pow_2", "Pow", 15, X4, [node("Pow", ["x", "e"], ["y"])], {"e": scalar(2.0)}, note="exponent scalar 2")
    case("pow_3", "Pow", 13, X4, [node("Pow", ["x", "e"], ["y"])], {"e": scalar(3.0)}, note="exponent scalar 3 (negative bases)")
    case("pow_half", "Pow", 13, X4, [node("Pow", ["x", "e"], ["y"])], {"e": scalar(0.5)}, positive=True,
         note="exponent 0.5, input |normal| + 0.5")
    case("pow_2_shape1", "Pow", 12, [6], [node("Pow", ["x", "e"], ["y"])], {"e": f32(2.0)},
         note="exponent as a [1] tensor, opset 12")
    case("pow_per_channel", "Pow", 13, X4, [node("Pow", ["x", "e"], ["y"])], {"e": f32(1.0, 2.0, 0.5).reshape(3, 1, 1)},
         positive=True, note="exponent [3,1,1] = (1, 2, 0.5)")

    # ------------------------------------------------------------------ Sub / Div / Min / Max / Clip
    case("sub_const", "Sub", 13, X4, [node("Sub", ["x", "c"], ["y"])], {"c": scalar(0.75)}, note="x - 0.75")
    case("div_const", "Div", 13, X4, [node("Div", ["x", "c"], ["y"])], {"c": scalar(3.0)},
         note="x / 3 (not the same as x * (1/3) in float32)")
    case("sub_const_first", "Sub", 13, X4, [node("Sub", ["c", "x"], ["y"])], {"c": scalar(2.0)}, note="2 - x")
    case("div_const_first", "Div", 13, X4, [node("Div", ["c", "x"], ["y"])], {"c": scalar(1.0)}, positive=True,
         note="1 / x, input |normal| + 0.5")
    case("div_const_first_channel", "Div", 14, X4, [node("Div", ["c", "x"], ["y"])],
         {"c": f32(1.0, -2.0, 0.5).reshape(3, 1, 1)}, positive=True, note="[3,1,1] / x")
    case("min_2_const", "Min", 13, X4, [node("Min", ["x", "c"], ["y"])], {"c": scalar(0.3)}, note="min(x, 0.3)")
    case("max_2_const_channel", "Max", 13, X4, [node("Max", ["x", "c"], ["y"])], {"c": f32(-0.5, 0.0, 0.5).reshape(3, 1, 1)},
         note="max(x, [3,1,1])")
    case("min_3_consts", "Min", 13, X4, [node("Min", ["x", "a", "b"], ["y"])],
         {"a": f32(0.5, -0.2, 1.0, 0.1, 2.0), "b": f32(0.8, 0.0, -0.4, 0.6).reshape(4, 1)},
         note="min(x, [5], [4,1]): three inputs, two broadcast constants")
    case("max_3_consts", "Max", 12, X4, [node("Max", ["c1", "x", "c2"], ["y"])],
         {"c1": scalar(-0.5), "c2": f32(-1.0, 0.0, 0.25).reshape(3, 1, 1)}, note="max(-0.5, x, [3,1,1]): constant first")
    case("max_value_value", "Max", 13, X4,
         [node("Slice", ["x", "st", "en", "ax", "sp"], ["r"]), node("Max", ["x", "r"], ["y"])],
         {"st": i64(-1), "en": i64(INT_MIN), "ax": i64(3), "sp": i64(-1)}, note="max(x, x reversed on W)")
    case("min_value_value_broadcast", "Min", 13, X4,
         [node("ReduceMean", ["x"], ["m"], axes=[1], keepdims=1), node("Min", ["x", "m"], ["y"])],
         note="min(x, mean over C [N,1,H,W])")
    case("clip_both", "Clip", 13, X4, [node("Clip", ["x", "lo", "hi"], ["y"])], {"lo": scalar(-0.5), "hi": scalar(0.7)},
         note="Clip(-0.5, 0.7)")
    case("clip_min_only", "Clip", 13, X4, [node("Clip", ["x", "lo"], ["y"])], {"lo": scalar(0.0)}, note="max omitted")
    case("clip_max_only", "Clip", 11, X4, [node("Clip", ["x", "", "hi"], ["y"])], {"hi": scalar(6.0 / 8)},
         note="min omitted (empty input name), opset 11")
    case("clip_no_bounds", "Clip", 13, X4, [node("Clip", ["x"], ["y"])], note="both omitted: identity")

    # ------------------------------------------------------------------ MatMul / Gemm
    rngw = np.random.default_rng(4242)

    def w(*shape):
        return (rngw.standard_normal(shape) * 0.5).astype(np.float32)

    case("matmul_r4_last_axis", "MatMul", 13, X4, [node("MatMul", ["x", "w"], ["y"])], {"w": w(5, 6)},
         note="[N,3,4,5] @ [5,6] -> [N,3,4,6]")
    case("matmul_r3_last_axis", "MatMul", 13, X4,
         [node("Reshape", ["x", "s"], ["r"]), node("MatMul", ["r", "w"], ["y"])], {"s": i64(0, 3, -1), "w": w(20, 4)},
         note="Reshape to [N,3,20] then @ [20,4]")
    case("matmul_r2", "MatMul", 13, [6], [node("MatMul", ["x", "w"], ["y"])], {"w": w(6, 4)}, note="[N,6] @ [6,4]")
    case("matmul_r4_batched_weight", "MatMul", 13, X4, [node("MatMul", ["x", "w"], ["y"])], {"w": w(3, 5, 2)},
         note="[N,3,4,5] @ [3,5,2]: weight broadcast over N, one matrix per channel")
    case("matmul_r3_weight_vector", "MatMul", 13, X4,
         [node("Reshape", ["x", "s"], ["r"]), node("MatMul", ["r", "w"], ["y"])], {"s": i64(0, 3, -1), "w": w(20)},
         note="[N,3,20] @ [20] (1-D weight: last axis contracted and dropped) -> [N,3]")
    case("gemm_bias", "Gemm", 13, [6], [node("Gemm", ["x", "w", "b"], ["y"])], {"w": w(6, 4), "b": w(4)},
         note="x @ W + b")
    case("gemm_transb_alpha_beta", "Gemm", 11, [6], [node("Gemm", ["x", "w", "b"], ["y"], transB=1, alpha=0.5, beta=2.0)],
         {"w": w(4, 6), "b": w(1, 4)}, note="transB=1, alpha 0.5, beta 2, bias [1,4], opset 11")
    case("gemm_scalar_bias", "Gemm", 13, [6], [node("Gemm", ["x", "w", "b"], ["y"], transB=1)],
         {"w": w(3, 6), "b": scalar(0.25)}, note="bias scalar (broadcast)")
    case("gemm_no_bias", "Gemm", 13, [6], [node("Gemm", ["x", "w"], ["y"])], {"w": w(6, 5)}, note="C omitted")

    # ------------------------------------------------------------------ Broadcasting corner cases
    consts = {
        "c11": w(3, 1, 1),
        "1w": w(1, 5),
        "h1": w(4, 1),
        "1111": w(1, 1, 1, 1),
        "scalar": np.array(0.625, np.float32),
        "1c1w": w(1, 3, 1, 5),
        "w": w(5),
    }
    for op in ("Add", "Mul", "Sub", "Div"):
        for tag, c in consts.items():
            if op == "Div":
                c = (np.abs(c) + np.float32(0.5)).astype(np.float32) * np.where(c < 0, -1, 1).astype(np.float32)
            case(f"{op.lower()}_bcast_{tag}", op, 14 if op in ("Add", "Mul") else 13, X4,
                 [node(op, ["x", "c"], ["y"])], {"c": c}, note=f"[N,3,4,5] {op} constant {list(c.shape)}")
    for op in ("Add", "Mul", "Sub", "Div"):
        case(f"{op.lower()}_value_value_both_broadcast", op, 18, X4,
             [node("ReduceMean", ["x", "a"], ["p"]), node("ReduceMax", ["x", "b"], ["q"]),
              node("Abs", ["q"], ["qa"]), node("Add", ["qa", "h"], ["q2"]), node(op, ["p", "q2"], ["y"])],
             {"a": i64(2), "b": i64(1, 3), "h": scalar(0.5)},
             note=f"ReduceMean(x, [2]) -> [N,3,1,5] {op} |ReduceMax(x, [1,3])| + 0.5 -> [N,1,4,1]: both operands broadcast")
    case("add_value_value_r2", "Add", 13, [6],
         [node("ReduceSum", ["x", "a"], ["s"]), node("Add", ["s", "x"], ["y"])], {"a": i64(1)},
         note="[N,1] (row sum) + [N,6]")

    # ------------------------------------------------------------------ Cases an importer must REFUSE
    R = "refused"
    case("refuse_transpose_moves_batch", "Transpose", 13, X4, [node("Transpose", ["x"], ["y"], perm=[1, 0, 2, 3])],
         expect=R, note="perm [1,0,2,3] moves the batch axis")
    case("refuse_transpose_default_perm", "Transpose", 13, X4, [node("Transpose", ["x"], ["y"])], expect=R,
         note="no perm: reverses every axis, batch last")
    case("refuse_reshape_mixes_batch", "Reshape", 13, X4, [node("Reshape", ["x", "s"], ["y"])], {"s": i64(-1, 5)},
         expect=R, note="[-1, 5] folds the batch into the first axis")
    case("refuse_reshape_fixed_batch", "Reshape", 13, X4, [node("Reshape", ["x", "s"], ["y"])], {"s": i64(2, -1)},
         expect=R, batch=2, note="[2, -1] hard-codes batch 2 (for other N it mixes rows)")
    case("refuse_reshape_minus1_not_batch", "Reshape", 13, [24], [node("Reshape", ["x", "s"], ["y"])],
         {"s": i64(-1, 4, 3)}, expect=R, note="[-1, 4, 3] on [N,24]: -1 becomes 2N, not the batch")
    case("refuse_gather_axis0", "Gather", 13, X4, [node("Gather", ["x", "i"], ["y"], axis=0)], {"i": i64(0)},
         expect=R, note="Gather on axis 0 picks batch rows")
    case("refuse_slice_batch", "Slice", 13, X4, [node("Slice", ["x", "st", "en", "ax"], ["y"])],
         {"st": i64(0), "en": i64(1), "ax": i64(0)}, expect=R, note="Slice [0:1] on axis 0 drops batch rows")
    case("refuse_split_axis0", "Split", 13, [3, 2, 2], [node("Split", ["x"], ["y0", "y1"], axis=0)], out="y0",
         expect=R, note="Split on the batch axis")
    case("refuse_concat_axis0", "Concat", 13, X4, [node("Concat", ["x", "x"], ["y"], axis=0)], expect=R,
         note="Concat on the batch axis doubles the batch")
    case("refuse_flatten_axis0", "Flatten", 13, X4, [node("Flatten", ["x"], ["y"], axis=0)], expect=R,
         note="Flatten axis 0 gives [1, N*C*H*W]")
    for axis in (2, 3, -1):
        case(f"refuse_flatten_axis{axis}".replace("-", "m"), "Flatten", 13, X4,
             [node("Flatten", ["x"], ["y"], axis=axis)], expect=R,
             note=f"Flatten axis {axis} on rank 4 always gives rank 2 [N*..., ...]: the batch is folded into axis 0")
    case("refuse_unsqueeze_axis0", "Unsqueeze", 13, X4, [node("Unsqueeze", ["x", "a"], ["y"])], {"a": i64(0)},
         expect=R, note="Unsqueeze axis 0 pushes the batch to axis 1")
    case("refuse_squeeze_no_axes", "Squeeze", 13, [3, 1, 5], [node("Squeeze", ["x"], ["y"])], expect=R,
         note="Squeeze without axes also drops the batch axis when N = 1")
    case("refuse_reducemean_all", "ReduceMean", 13, X4, [node("ReduceMean", ["x"], ["y"], keepdims=1)], expect=R,
         note="no axes: reduces over the batch too")
    case("refuse_reducesum_axis0", "ReduceSum", 13, X4, [node("ReduceSum", ["x", "a"], ["y"], keepdims=1)],
         {"a": i64(0)}, expect=R, note="reduces over the batch axis")
    case("refuse_tile_batch", "Tile", 13, X4, [node("Tile", ["x", "r"], ["y"])], {"r": i64(2, 1, 1, 1)}, expect=R,
         note="repeats 2 on the batch axis")
    case("refuse_expand_new_leading_axis", "Expand", 13, [5], [node("Expand", ["x", "s"], ["y"])], {"s": i64(3, 1, 5)},
         expect=R, note="[N,5] to [3,1,5] -> [3,N,5]: the batch moves to axis 1")
    case("refuse_matmul_contracts_batch", "MatMul", 13, [5], [node("MatMul", ["w", "x"], ["y"])], {"w": w(4, 2)},
         expect=R, batch=2, note="[4,N] @ [N,5]: constant on the left contracts over the batch (valid only for N = 2)")

    # ------------------------------------------------ batch moved for a moment (appended last
    # so that the seeds of the cases above stay as they were)
    pos = np.array([[[[[0, 0]], [[0, 2]], [[1, 4]]]], [[[[3, 1]], [[2, 2]], [[-1, -1]]]]], np.int64)  # (2,1,3,1,2)
    case("gathernd_moved_positions", "GatherND", 13, X4,
         [node("Transpose", ["x"], ["t"], perm=[2, 3, 0, 1]), node("GatherND", ["t", "i"], ["g"]),
          node("Transpose", ["g"], ["y"], perm=[4, 5, 0, 1, 2, 3])], {"i": pos},
         note="positions first, GatherND of (H, W) pairs, batch back in front (an enlarging adaptive pool)")
    case("gathernd_moved_channels", "GatherND", 13, X4,
         [node("Transpose", ["x"], ["t"], perm=[1, 0, 3, 2]), node("GatherND", ["t", "i"], ["g"]),
          node("Transpose", ["g"], ["y"], perm=[2, 0, 1, 3, 4])], {"i": i64(2, 0, -1, 0).reshape(2, 2, 1)},
         note="channels first, GatherND of channels [[2, 0], [-1, 0]], back with W and H swapped")
    case("transpose_batch_out_and_back", "Transpose", 13, X4,
         [node("Transpose", ["x"], ["t"], perm=[2, 0, 3, 1]), node("Transpose", ["t"], ["y"], perm=[1, 3, 0, 2])],
         note="two transposes that move the batch and bring it back: one per-sample transpose [0, 2, 1]")
    case("relu_on_moved_batch", "Relu", 13, X4,
         [node("Transpose", ["x"], ["t"], perm=[1, 0, 2, 3]), node("Relu", ["t"], ["r"]),
          node("Transpose", ["r"], ["y"], perm=[1, 0, 3, 2])],
         note="a Relu between a transpose that moves the batch and one that brings it back")
    case("refuse_moved_batch_add", "Add", 13, X4,
         [node("Transpose", ["x"], ["t"], perm=[1, 0, 2, 3]), node("Add", ["t", "c"], ["r"]),
          node("Transpose", ["r"], ["y"], perm=[1, 0, 2, 3])], {"c": f32(1, 2, 3).reshape(3, 1, 1)},
         expect=R, batch=3,
         note="an Add of a [3,1,1] constant to [C,N,H,W] adds along the batch axis (valid only for N = 3)")
    # ------------------------------------------------ the dynamo exporter's as_strided: the
    # batch flattened, indices n*S + offset computed from the batch size
    def as_strided(name, shape, scale, offsets, expect="ok", note=""):
        nodes = [
            node("Shape", ["x"], ["sh"]), node("Gather", ["sh", "zero"], ["n"], axis=0),
            node("Range", ["zero", "n", "one"], ["ramp"]), node("Mul", ["ramp", "scale"], ["starts"]),
            node("Unsqueeze", ["starts", "ax"], ["starts4"]), node("Add", ["starts4", "off"], ["idx"]),
            node("Reshape", ["x", "flat"], ["xf"]), node("Gather", ["xf", "idx"], ["y"], axis=0),
        ]
        inits = {"zero": np.array(0, np.int64), "one": np.array(1, np.int64), "scale": np.array(scale, np.int64),
                 "ax": i64(*range(1, 1 + offsets.ndim)), "off": offsets[None].astype(np.int64), "flat": i64(-1)}
        case(name, "Gather", 18, shape, nodes, inits, expect=expect, note=note)

    as_strided("as_strided_permute_pooled", [6, 1, 1], 6, np.arange(6).reshape(1, 1, 6) * 1,
               note="x.permute(0, 2, 3, 1) of [N,6,1,1] as the dynamo exporter writes it: Gather(x.reshape(-1), n*6 + c)")
    as_strided("as_strided_reordered", [2, 3, 1], 6, np.array([[[5, 0], [1, 4]]]),
               note="offsets in any order within each sample's 6 values")
    as_strided("refuse_as_strided_previous_sample", [6, 1, 1], 6, np.arange(-1, 5).reshape(1, 1, 6), expect=R,
               note="offset -1 reads the previous sample's last value (sample 0: the batch's last)")
    as_strided("refuse_as_strided_other_stride", [6, 1, 1], 3, np.arange(3).reshape(1, 1, 3), expect=R,
               note="stride 3 for samples of 6 values: samples overlap")
    case("refuse_gathernd_batch", "GatherND", 13, X4, [node("GatherND", ["x", "i"], ["y"])], {"i": i64(0, 1).reshape(2, 1)},
         expect=R, note="GatherND on the batch axis picks batch rows")


def dumps(out):
    """JSON with one line per case field (tensors stay on one line), to keep the file short."""
    lines = ["{"]
    for k in ("versions", "source", "tolerance"):
        lines.append(f" {json.dumps(k)}: {json.dumps(out[k])},")
    lines.append(' "cases": [')
    for i, c in enumerate(out["cases"]):
        fields = [f"  {json.dumps(k)}: {json.dumps(v)}" for k, v in c.items()]
        lines.append(" {\n" + ",\n".join(fields) + "\n }" + ("," if i + 1 < len(out["cases"]) else ""))
    lines.append(" ]")
    lines.append("}")
    text = "\n".join(lines) + "\n"
    assert json.loads(text) == json.loads(json.dumps(out))
    return text


def main():
    for old in HERE.glob("*.onnx"):
        old.unlink()
    build()
    out = {
        "versions": {"onnx": onnx.__version__, "numpy": np.__version__},
        "source": (
            "tests/data/onnx_ops/make_op_cases.py; expected outputs from onnx.reference.ReferenceEvaluator "
            "(the onnx package's NumPy implementation of the operator specification)"
        ),
        "tolerance": {
            "shape": "exact",
            "exact": "bit-identical float32 (data movement, Abs, Neg, Min, Max, Clip, ReduceMax)",
            "close": "|convoy - expected| <= 1e-5 * max(1, |expected|) element-wise (arithmetic, reductions, "
            "transcendental functions, MatMul/Gemm, LayerNormalization)",
        },
        "cases": CASES,
    }
    names = [c["name"] for c in CASES]
    assert len(names) == len(set(names)), "duplicate case name"
    (HERE / "cases.json").write_text(dumps(out))
    n_ref = sum(c["expect"] == "refused" for c in CASES)
    ops = sorted({c["op"] for c in CASES})
    print(f"wrote {len(CASES)} cases ({n_ref} to be refused), ops: {', '.join(ops)}")


if __name__ == "__main__":
    main()
