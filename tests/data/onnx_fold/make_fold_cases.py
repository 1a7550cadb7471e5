#!/usr/bin/env python3
"""Expected values for convoy's ONNX constant folding (src/import/onnx/fold.rs).

Each case is a one-node ONNX model evaluated by the `onnx` package's own reference
evaluator (onnx.reference.ReferenceEvaluator), which implements the operator
specification with NumPy. No other inference engine is involved. Rerun from the
repository root:

    .venv-ref/bin/python tests/data/onnx_fold/make_fold_cases.py

and it rewrites tests/data/onnx_fold/cases.json (for tests/onnx_fold.rs):

    {"generator", "onnx_version", "numpy_version",
     "cases": [{"name", "op", "opset", "attributes": [{"name", "type", "value"}],
                "inputs": [tensor | null], "n_outputs", "ulps",
                "outputs": [tensor, ...] | "error": "ExceptionName"}]}
    tensor = {"dtype": "float32" | "int64" | "int32" | "bool" | ..., "shape": [...],
              "data": [...]}   (row-major; NaN and infinities as the strings "nan", "inf", "-inf")

`null` inputs are omitted optional inputs (an empty input name). "n_outputs" is the
node's number of outputs (more than one only for Split; "outputs" then holds every
one, in order). An "error" case is one the evaluator refuses; convoy must refuse it
too. Float cases use values whose results are exact in float32 (small integers,
halves, powers of two) wherever the order of operations could otherwise matter
(ReduceProd, Range), so the Rust side compares bit for bit.

"ulps" is how far, in float32 units in the last place, convoy's result may be from
the evaluator's; it is 0 (bit for bit) for every case but the float results of Exp,
Log and Pow, where it is ULPS below. The rule: convoy computes those in float64 and
rounds once; the evaluator uses NumPy's float32 exp, log and power, which are NumPy's
own vectorized approximations and are not always correctly rounded (measured with
this script's NumPy on the generating machine over 200,000 random values: at most 2,
3 and 1 units away from the float64 result rounded, respectively). Erf stays bit for
bit: the evaluator computes Python's math.erf in float64 and rounds once, as convoy
does. Infinities and NaN always compare exactly.

It also writes tests/data/onnx_fold/tensors.json (for the unit tests in
src/import/onnx/tensor.rs): TensorProtos serialized by the onnx package itself
(helper.make_tensor with typed fields or raw bytes, numpy_helper.from_array), as hex,
with the values numpy_helper.to_array reads back, widened to float32 or int64:

    {"tensors": [{"name", "data_type", "proto_hex", "expected": tensor}]}
"""

import json
import math
from pathlib import Path

import numpy as np
import onnx
from onnx import TensorProto, helper, numpy_helper
from onnx.reference import ReferenceEvaluator

HERE = Path(__file__).resolve().parent
INT_MAX = np.iinfo(np.int64).max
INT_MIN = np.iinfo(np.int64).min

f32 = lambda *v: np.array(v, dtype=np.float32)  # noqa: E731
i64 = lambda *v: np.array(v, dtype=np.int64)  # noqa: E731


def arange(shape, dtype=np.float32, start=0):
    n = int(np.prod(shape))
    return (np.arange(n) + start).astype(dtype).reshape(shape)


def encode(a):
    a = np.asarray(a)
    if a.dtype.kind == "f" or a.dtype.name == "bfloat16":
        data = []
        for v in a.astype(np.float32).reshape(-1).tolist():
            if math.isnan(v):
                data.append("nan")
            elif math.isinf(v):
                data.append("inf" if v > 0 else "-inf")
            else:
                data.append(v)
        dtype = "float32" if a.dtype == np.float32 else str(a.dtype)
    else:
        data = [int(v) for v in a.reshape(-1).tolist()]
        dtype = str(a.dtype)
    return {"dtype": dtype, "shape": list(a.shape), "data": data}


def encode_attr(name, value):
    if isinstance(value, np.ndarray):
        return {"name": name, "type": "TENSOR", "value": encode(value)}
    if isinstance(value, float):
        return {"name": name, "type": "FLOAT", "value": value}
    if isinstance(value, int):
        return {"name": name, "type": "INT", "value": value}
    if isinstance(value, list) and all(isinstance(v, int) for v in value):
        return {"name": name, "type": "INTS", "value": value}
    if isinstance(value, list):
        return {"name": name, "type": "FLOATS", "value": [float(v) for v in value]}
    raise TypeError(f"{name}: {value!r}")


def make_attr(name, value):
    if isinstance(value, np.ndarray):
        return helper.make_attribute(name, numpy_helper.from_array(value))
    if isinstance(value, list) and not all(isinstance(v, int) for v in value):
        return helper.make_attribute(name, [float(v) for v in value])
    return helper.make_attribute(name, value)


CASES = []

# Operators whose float32 results may differ from the evaluator's by this many units in
# the last place (see the module docstring for the rule and why).
ULPS = {"Exp": 4, "Log": 4, "Pow": 4}


def case(name, op, inputs, opset=17, n_outputs=1, **attrs):
    names = [f"x{i}" if x is not None else "" for i, x in enumerate(inputs)]
    outputs = ["y"] if n_outputs == 1 else [f"y{i}" for i in range(n_outputs)]
    node = helper.make_node(op, names, outputs)
    node.attribute.extend(make_attr(k, v) for k, v in attrs.items())
    graph = helper.make_graph(
        [node],
        name,
        [
            helper.make_tensor_value_info(n, helper.np_dtype_to_tensor_dtype(x.dtype), x.shape)
            for n, x in zip(names, inputs)
            if x is not None
        ],
        [helper.make_tensor_value_info(y, TensorProto.UNDEFINED, None) for y in outputs],
    )
    model = helper.make_model(graph, opset_imports=[helper.make_opsetid("", opset)])
    feeds = {n: x for n, x in zip(names, inputs) if x is not None}
    entry = {
        "name": name,
        "op": op,
        "opset": opset,
        "attributes": [encode_attr(k, v) for k, v in attrs.items()],
        "inputs": [encode(x) if x is not None else None for x in inputs],
        "n_outputs": n_outputs,
        "ulps": 0,
    }
    try:
        with np.errstate(all="ignore"):
            ys = ReferenceEvaluator(model).run(None, feeds)
        entry["outputs"] = [encode(y) for y in ys]
        if any(np.asarray(y).dtype.kind == "f" for y in ys):
            entry["ulps"] = ULPS.get(op, 0)
    except Exception as e:  # the evaluator refusing is the expectation
        entry["error"] = type(e).__name__
    CASES.append(entry)


def build():
    x234 = arange((2, 3, 4))
    # Constant (opset 13 has value_float(s) and value_int(s)).
    case("constant_tensor_float", "Constant", [], opset=13, value=f32(1.5, -2, 0.25).reshape(3, 1))
    case("constant_tensor_int", "Constant", [], opset=13, value=i64(4, -5))
    case("constant_value_float", "Constant", [], opset=13, value_float=0.75)
    case("constant_value_floats", "Constant", [], opset=13, value_floats=[1.0, -0.5])
    case("constant_value_int", "Constant", [], opset=13, value_int=-3)
    case("constant_value_ints", "Constant", [], opset=13, value_ints=[2, 0, -1])
    # Shape, with start/end from opset 15.
    case("shape_plain", "Shape", [x234], opset=13)
    case("shape_start", "Shape", [x234], opset=15, start=1)
    case("shape_negative_end", "Shape", [x234], opset=15, end=-1)
    case("shape_negative_start_clamped", "Shape", [x234], opset=15, start=-10, end=2)
    case("shape_start_after_end", "Shape", [x234], opset=15, start=2, end=1)
    case("shape_of_scalar", "Shape", [np.array(3, dtype=np.int64)], opset=15)
    case("size", "Size", [x234], opset=13)
    # Gather: any axis, negative indices, scalar and 2-D indices.
    case("gather_axis0_scalar", "Gather", [i64(5, 6, 7), np.array(-1, dtype=np.int64)], opset=13)
    case("gather_axis1_2d", "Gather", [x234, i64(2, -3, 0, 1).reshape(2, 2)], opset=13, axis=1)
    case("gather_axis_negative", "Gather", [x234, i64(3, 0)], opset=13, axis=-1)
    case("gather_out_of_range", "Gather", [i64(1, 2, 3), i64(3)], opset=13)
    # Unsqueeze / Squeeze: axes attribute before opset 13, input from 13.
    case("unsqueeze_attr", "Unsqueeze", [arange((2, 3))], opset=11, axes=[0, -1])
    case("unsqueeze_input", "Unsqueeze", [arange((2, 3)), i64(1, 3)], opset=13)
    case("unsqueeze_scalar", "Unsqueeze", [np.array(7, dtype=np.int64), i64(0)], opset=13)
    case("squeeze_attr", "Squeeze", [arange((1, 3, 1))], opset=11, axes=[0])
    case("squeeze_input_negative", "Squeeze", [arange((1, 3, 1)), i64(-1)], opset=13)
    case("squeeze_all", "Squeeze", [arange((1, 3, 1, 2))], opset=13)
    case("squeeze_not_one", "Squeeze", [arange((2, 3)), i64(0)], opset=13)
    # Concat.
    case("concat_ints_axis0", "Concat", [i64(1, 2), i64(3), i64(4, 5, 6)], opset=13, axis=0)
    case("concat_floats_axis_negative", "Concat", [arange((2, 1)), arange((2, 3), start=10)], opset=13, axis=-1)
    case("concat_with_empty", "Concat", [arange((2, 0)), arange((2, 2))], opset=13, axis=1)
    case("concat_mismatch", "Concat", [arange((2, 2)), arange((3, 2))], opset=13, axis=1)
    # Slice (inputs from opset 10; attributes before).
    case("slice_basic", "Slice", [x234, i64(0, 1), i64(1, 3), i64(0, 2)], opset=13)
    case("slice_negative_bounds", "Slice", [arange((6,)), i64(-4), i64(-1)], opset=13)
    case("slice_step2", "Slice", [arange((7,)), i64(1), i64(INT_MAX), i64(0), i64(2)], opset=13)
    case("slice_reverse", "Slice", [arange((5,)), i64(-1), i64(INT_MIN), i64(0), i64(-1)], opset=13)
    case("slice_reverse_step2", "Slice", [x234, i64(10), i64(0), i64(-1), i64(-2)], opset=13)
    case("slice_clamped_empty", "Slice", [arange((4,)), i64(5), i64(9)], opset=13)
    case("slice_axes_negative", "Slice", [x234, i64(1), i64(2), i64(-2)], opset=13)
    case("slice_omitted_axes", "Slice", [x234, i64(0, 1), i64(1, 3), None, i64(1, 2)], opset=13)
    case("slice_opset9_attrs", "Slice", [x234], opset=9, starts=[1], ends=[3], axes=[2])
    # Cast.
    case("cast_float_to_int64", "Cast", [f32(-2.7, -0.5, 0.0, 0.5, 2.7, 1e9)], opset=13, to=TensorProto.INT64)
    case("cast_int_to_float", "Cast", [i64(-3, 0, 16777217)], opset=13, to=TensorProto.FLOAT)
    case("cast_float_to_bool", "Cast", [f32(0.0, -0.0, 0.5, -2.0, float("nan"))], opset=13, to=TensorProto.BOOL)
    case("cast_bool_to_float", "Cast", [np.array([True, False, True])], opset=13, to=TensorProto.FLOAT)
    case("cast_int_to_int32_wraps", "Cast", [i64(2**31 + 5, -1, 7)], opset=13, to=TensorProto.INT32)
    case("cast_int_to_uint8_wraps", "Cast", [i64(300, -1, 255)], opset=13, to=TensorProto.UINT8)
    case("cast_int_to_double", "Cast", [i64(5, -6)], opset=13, to=TensorProto.DOUBLE)
    # float16: 65504 is the largest finite value; 65520 ties to infinity; 2^-25 ties to 0;
    # 1 + 2^-11 ties to even (1.0); 1 + 3·2^-11 ties up; 1e-7 rounds to the subnormal 2^-24·2.
    case(
        "cast_float_to_float16",
        "Cast",
        [f32(1.0, 0.1, 65504, 65519.9, 65520, 2.0**-25, 1 + 2.0**-11, 1 + 3 * 2.0**-11, 1e-7, -3.14159, float("inf"))],
        opset=13,
        to=TensorProto.FLOAT16,
    )
    case(
        "cast_float_to_bfloat16",
        "Cast",
        [f32(1.0, 0.1, 3.14159, -1 - 2.0**-8, 1 + 3 * 2.0**-8, 3.3895314e38, 3.4e38, 1e-40)],
        opset=13,
        to=TensorProto.BFLOAT16,
    )
    # ConstantOfShape.
    case("constant_of_shape_default", "ConstantOfShape", [i64(2, 3)], opset=13)
    case("constant_of_shape_int", "ConstantOfShape", [i64(3)], opset=13, value=i64(7))
    case("constant_of_shape_float", "ConstantOfShape", [i64(1, 2)], opset=13, value=f32(1.5))
    case("constant_of_shape_scalar", "ConstantOfShape", [np.zeros(0, dtype=np.int64)], opset=13, value=i64(4))
    case("constant_of_shape_zero_dim", "ConstantOfShape", [i64(2, 0)], opset=13)
    # Reshape.
    case("reshape_copy_and_infer", "Reshape", [x234, i64(0, -1)], opset=13)
    case("reshape_infer_first", "Reshape", [x234, i64(-1, 2, 2)], opset=13)
    case("reshape_allowzero", "Reshape", [arange((0, 3)), i64(3, 0)], opset=14, allowzero=1)
    case("reshape_zero_copies", "Reshape", [arange((2, 3)), i64(0, 3)], opset=14)
    case("reshape_bad_count", "Reshape", [arange((2, 3)), i64(4, 2)], opset=13)
    # Transpose.
    case("transpose_default", "Transpose", [x234], opset=13)
    case("transpose_perm", "Transpose", [x234], opset=13, perm=[1, 0, 2])
    case("transpose_ints", "Transpose", [arange((2, 3), np.int64)], opset=13, perm=[1, 0])
    # Range.
    case("range_int", "Range", [np.array(1, np.int64), np.array(10, np.int64), np.array(3, np.int64)], opset=13)
    case("range_int_negative", "Range", [np.array(5, np.int64), np.array(-2, np.int64), np.array(-2, np.int64)], opset=13)
    case("range_int_empty", "Range", [np.array(5, np.int64), np.array(5, np.int64), np.array(1, np.int64)], opset=13)
    case("range_float", "Range", [np.array(0.5, np.float32), np.array(3.0, np.float32), np.array(0.75, np.float32)], opset=13)
    case("identity", "Identity", [i64(3, 1, 4)], opset=13)
    # Arithmetic with multidirectional broadcasting.
    a = f32(1.5, -2, 3, 0.25, 8, -1).reshape(2, 1, 3)
    b = f32(2, 0.5, -4, 1).reshape(4, 1)
    case("add_broadcast", "Add", [a, b], opset=14)
    case("sub_broadcast", "Sub", [a, b], opset=14)
    case("mul_broadcast", "Mul", [a, b], opset=14)
    case("div_broadcast", "Div", [a, b], opset=14)
    case("div_float_by_zero", "Div", [f32(1, -1, 0), f32(0, 0, 0)], opset=14)
    case("div_int_truncates", "Div", [i64(-7, 7, -7, 7, 6), i64(2, -2, -2, 2, 3)], opset=14)
    case("mul_int_scalar", "Mul", [i64(2, 3, 4), np.array(-5, np.int64)], opset=14)
    case("sub_int_broadcast", "Sub", [i64(10, 20).reshape(2, 1), i64(1, 2, 3)], opset=14)
    case("add_mixed_types", "Add", [f32(1.0), i64(1)], opset=14)
    case("neg_float", "Neg", [f32(1.5, -0.0, -3)], opset=13)
    case("neg_int", "Neg", [i64(2, -7, 0)], opset=13)
    case("abs_float", "Abs", [f32(-1.5, 0.0, 2)], opset=13)
    case("abs_int", "Abs", [i64(-4, 0, 9)], opset=13)
    # Comparisons answer booleans.
    c = f32(1, 2, 3, float("nan"))
    d = f32(2, 2, 2, 2)
    case("equal_float", "Equal", [c, d], opset=13)
    case("less_float", "Less", [c, d], opset=13)
    case("greater_float", "Greater", [c, d], opset=13)
    case("less_or_equal_float", "LessOrEqual", [c, d], opset=16)
    case("greater_or_equal_int", "GreaterOrEqual", [i64(1, 2, 3), np.array(2, np.int64)], opset=16)
    case("equal_int_broadcast", "Equal", [i64(1, 2, 3).reshape(3, 1), i64(3, 2)], opset=13)
    case("less_int", "Less", [i64(-1, 5), i64(0, 5)], opset=13)
    case("greater_int", "Greater", [i64(-1, 5), i64(0, 4)], opset=13)
    case("equal_bool", "Equal", [np.array([True, False]), np.array([True, True])], opset=13)
    # Where, Not, And, Or.
    cond = np.array([[True], [False]])
    case("where_broadcast", "Where", [cond, f32(1, 2, 3), np.array(-1, np.float32)], opset=16)
    case("where_int", "Where", [np.array([True, False, True]), i64(1, 2, 3), i64(7, 8, 9)], opset=16)
    case("not", "Not", [np.array([True, False])], opset=13)
    case("and", "And", [np.array([True, False, True]).reshape(3, 1), np.array([True, False])], opset=13)
    case("or", "Or", [np.array([True, False, False]), np.array([False, False, True])], opset=13)
    # Min / Max: variadic with broadcasting; NaN propagates (numpy minimum/maximum).
    case("min_three", "Min", [f32(1, 5, 3), f32(4, 2, 6).reshape(3, 1), np.array(3.5, np.float32)], opset=13)
    case("max_three", "Max", [f32(1, 5, 3), f32(4, 2, 6).reshape(3, 1), np.array(3.5, np.float32)], opset=13)
    case("min_nan", "Min", [f32(1, float("nan")), f32(float("nan"), 2)], opset=13)
    case("max_int", "Max", [i64(-3, 9), i64(2, 2)], opset=13)
    case("min_single", "Min", [i64(4, -4)], opset=13)
    # Floor / Ceil / Sqrt.
    e = f32(-2.5, -0.5, 0.0, 0.5, 1.0, 2.7, float("inf"))
    case("floor", "Floor", [e], opset=13)
    case("ceil", "Ceil", [e], opset=13)
    case("sqrt", "Sqrt", [f32(0, 1, 2, 9, 0.25, -1, float("inf"))], opset=13)
    # Expand, Tile.
    case("expand_grow", "Expand", [arange((3, 1)), i64(2, 1, 6)], opset=13)
    case("expand_smaller_shape", "Expand", [arange((2, 3)), i64(3)], opset=13)
    case("expand_ones_keep_input", "Expand", [arange((2, 1), np.int64), i64(1, 1)], opset=13)
    case("expand_incompatible", "Expand", [arange((2, 3)), i64(4)], opset=13)
    case("tile_2d", "Tile", [arange((2, 3)), i64(2, 1)], opset=13)
    case("tile_1d_ints", "Tile", [i64(1, 2), i64(3)], opset=13)
    case("tile_zero", "Tile", [arange((2, 2)), i64(0, 2)], opset=13)
    # ReduceProd: axes attribute before opset 18, input from 18.
    r = f32(1, 2, -3, 0.5, 4, 2, 1, -1, 0.25, 2, 8, 3).reshape(2, 3, 2)
    case("reduce_prod_axes_keepdims", "ReduceProd", [r], opset=13, axes=[1])
    case("reduce_prod_axes_nokeep", "ReduceProd", [r], opset=13, axes=[0, -1], keepdims=0)
    case("reduce_prod_all", "ReduceProd", [r], opset=13, keepdims=0)
    case("reduce_prod_input_axes", "ReduceProd", [r, i64(2)], opset=18)
    case("reduce_prod_noop", "ReduceProd", [r, np.zeros(0, np.int64)], opset=18, noop_with_empty_axes=1)
    case("reduce_prod_ints", "ReduceProd", [i64(2, 3, 4, 5).reshape(2, 2)], opset=18, keepdims=0)
    case("reduce_prod_empty_axis", "ReduceProd", [arange((2, 0, 3))], opset=13, axes=[1])
    more_elementwise()
    split_cases()


def more_elementwise():
    """Clip, Pow, Reciprocal, Exp, Log and Erf."""
    inf, nan = float("inf"), float("nan")
    # Clip: bounds are optional inputs from opset 11 (omitted = no bound), float
    # attributes before (omitted = the ends of the float range, so only infinities move).
    x = f32(-3, -1.5, -0.0, 0.25, 2, 7, inf, -inf, nan)
    lo, hi = np.array(-1, np.float32), np.array(2, np.float32)
    case("clip_float_both", "Clip", [x, lo, hi], opset=13)
    case("clip_float_min_only", "Clip", [x, lo], opset=13)
    case("clip_float_max_only", "Clip", [x, None, hi], opset=13)
    case("clip_float_no_bounds", "Clip", [x], opset=13)
    case("clip_float_min_above_max", "Clip", [x, np.array(3, np.float32), hi], opset=13)
    case("clip_float_nan_bound", "Clip", [f32(-1, 0, 5), np.array(nan, np.float32), hi], opset=13)
    case("clip_float_shape_1_bounds", "Clip", [x, f32(-1), f32(2)], opset=11)
    xi = i64(-9, -2, 0, 3, 12).reshape(5, 1)
    case("clip_int_both", "Clip", [xi, np.array(-2, np.int64), np.array(5, np.int64)], opset=13)
    case("clip_int_min_only", "Clip", [xi, np.array(0, np.int64)], opset=13)
    case("clip_int_max_only", "Clip", [xi, None, np.array(1, np.int64)], opset=13)
    case("clip_int_no_bounds", "Clip", [xi], opset=12)
    case("clip_opset6_attrs", "Clip", [x], opset=6, min=-1.5, max=0.5)
    case("clip_opset6_min_attr", "Clip", [x], opset=6, min=0.0)
    case("clip_opset6_defaults", "Clip", [x], opset=6)
    # Pow: the exponent may have another element type than the base.
    base = f32(2, 4, -2, -2, 0, 0, 1.5, 10, 3, -0.0, inf, nan)
    expo = f32(3, 0.5, 3, 0.5, -1, 0, 2.5, -2, 0.1, -3, -1, 0)
    case("pow_float", "Pow", [base, expo], opset=15)
    case("pow_float_broadcast", "Pow", [f32(1, 2, 3, 4).reshape(2, 2), f32(2, -1)], opset=15)
    case("pow_float_int_exponent", "Pow", [f32(2, -3, 0.5, 10), i64(3, 2, -2, 0)], opset=15)
    case("pow_int", "Pow", [i64(2, -3, 7, 0, 2, -1), i64(10, 3, 0, 5, 63, 7)], opset=15)
    case("pow_int_wraps", "Pow", [i64(3, -2), i64(41, 63)], opset=15)
    case("pow_int_float_exponent", "Pow", [i64(9, 2, 10, -8), f32(0.5, 0.5, -1, 2)], opset=15)
    case("pow_int_negative_exponent", "Pow", [i64(2, 3), i64(1, -1)], opset=15)
    # Reciprocal, Exp, Log, Erf: floats.
    case("reciprocal", "Reciprocal", [f32(2, -4, 0.5, 3, 0, -0.0, inf, nan, 1e-40)], opset=13)
    case(
        "exp",
        "Exp",
        [f32(-2, -1, -0.5, -0.0, 0, 0.5, 1, 2, 10, 88, 89, -104, 0.1, 3.3, inf, -inf, nan)],
        opset=13,
    )
    case(
        "log",
        "Log",
        [f32(0.5, 1, 2, 10, 1e-30, 1e30, 0.1, 3.3, 7, 1e-45, 0, -0.0, -1, inf, nan)],
        opset=13,
    )
    case(
        "erf",
        "Erf",
        [f32(-3.5, -1, -0.5, -1e-3, -0.0, 0, 1e-3, 0.1, 0.5, 1, 2, 2.9, 3.1, 3.9, 4, 6, inf, -inf, nan)],
        opset=13,
    )


def split_cases():
    """Split: one output per part, every output compared."""
    x = arange((2, 8))
    case("split_equal", "Split", [arange((6,))], opset=13, n_outputs=3)
    case("split_equal_attr_axis", "Split", [x], opset=11, n_outputs=2, axis=1)
    case("split_attr_unequal", "Split", [arange((3, 2))], opset=11, n_outputs=2, split=[1, 2])
    case("split_input_unequal", "Split", [x, i64(2, 5, 1)], opset=13, n_outputs=3, axis=-1)
    case("split_input_zero_part", "Split", [arange((4,), np.int64), i64(0, 3, 1)], opset=13, n_outputs=3)
    case("split_num_outputs_uneven", "Split", [x], opset=18, n_outputs=3, axis=1, num_outputs=3)
    case("split_num_outputs_even", "Split", [arange((6, 2), np.int64)], opset=18, n_outputs=2, num_outputs=2)
    case("split_input_opset18", "Split", [x, i64(1, 1)], opset=18, n_outputs=2)
    case("split_one_output", "Split", [x], opset=13, n_outputs=1)


def tensors():
    """TensorProtos as the onnx package writes them, with the values it reads back."""
    half_bits = [0x3C00, 0x0001, 0x03FF, 0x0400, 0x7BFF, 0xC000, 0x8000, 0x7C00, 0xFC00, 0x3555]
    protos = [
        helper.make_tensor("f16_typed", TensorProto.FLOAT16, [2, 5], np.array(half_bits, np.uint16).view(np.float16)),
        helper.make_tensor("f16_raw", TensorProto.FLOAT16, [10], np.array(half_bits, np.uint16).tobytes(), raw=True),
        numpy_helper.from_array(np.array([0.5, -65504, 6.1e-5], np.float16), "f16_from_array"),
        helper.make_tensor("bf16_typed", TensorProto.BFLOAT16, [3], [1.0, 3.140625, -2.0]),
        helper.make_tensor("f32_typed", TensorProto.FLOAT, [2, 2], [1.0, -0.5, 3.25, 1e-3]),
        numpy_helper.from_array(np.array([[1.0, -0.5], [3.25, 1e-3]], np.float32), "f32_from_array"),
        helper.make_tensor("f64_typed", TensorProto.DOUBLE, [3], [0.1, -1e300, 2.5]),
        numpy_helper.from_array(np.array([0.1, 1 / 3], np.float64), "f64_from_array"),
        helper.make_tensor("i8_typed", TensorProto.INT8, [3], [-128, 0, 127]),
        numpy_helper.from_array(np.array([-128, 5, 127], np.int8), "i8_from_array"),
        helper.make_tensor("u8_typed", TensorProto.UINT8, [2], [0, 255]),
        helper.make_tensor("i16_typed", TensorProto.INT16, [2], [-32768, 32767]),
        helper.make_tensor("u16_typed", TensorProto.UINT16, [2], [0, 65535]),
        helper.make_tensor("i32_typed", TensorProto.INT32, [2], [-(2**31), 2**31 - 1]),
        numpy_helper.from_array(np.array([-(2**31), 7], np.int32), "i32_from_array"),
        helper.make_tensor("u32_typed", TensorProto.UINT32, [2], [0, 2**32 - 1]),
        helper.make_tensor("i64_typed", TensorProto.INT64, [3], [-(2**63), 0, 2**63 - 1]),
        numpy_helper.from_array(np.array([-(2**63), 42], np.int64), "i64_from_array"),
        helper.make_tensor("u64_typed", TensorProto.UINT64, [2], [0, 2**63 - 1]),
        helper.make_tensor("bool_typed", TensorProto.BOOL, [3], [True, False, True]),
        numpy_helper.from_array(np.array([False, True], np.bool_), "bool_from_array"),
        numpy_helper.from_array(np.zeros((0, 3), np.float32), "empty_from_array"),
        numpy_helper.from_array(np.array(2.5, np.float32), "scalar_from_array"),
    ]
    out = []
    for t in protos:
        a = numpy_helper.to_array(t)
        with np.errstate(over="ignore"):  # -1e300 becomes -inf in float32, as intended
            wide = a.astype(np.float32) if a.dtype.kind == "f" or a.dtype.name == "bfloat16" else a.astype(np.int64)
        out.append(
            {
                "name": t.name,
                "data_type": TensorProto.DataType.Name(t.data_type),
                "proto_hex": t.SerializeToString().hex(),
                "expected": encode(wide),
            }
        )
    return out


def main():
    build()
    out = {
        "generator": "tests/data/onnx_fold/make_fold_cases.py (onnx.reference.ReferenceEvaluator)",
        "onnx_version": onnx.__version__,
        "numpy_version": np.__version__,
        "cases": CASES,
    }
    path = HERE / "cases.json"
    path.write_text(json.dumps(out, indent=1) + "\n")
    errors = sum("error" in c for c in CASES)
    print(f"wrote {len(CASES)} cases ({errors} expected errors) to {path}")
    ts = tensors()
    tpath = HERE / "tensors.json"
    tpath.write_text(
        json.dumps({"generator": out["generator"], "onnx_version": onnx.__version__, "tensors": ts}, indent=1)
        + "\n"
    )
    print(f"wrote {len(ts)} tensors to {tpath}")


if __name__ == "__main__":
    main()
