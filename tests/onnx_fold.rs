//! Constant folding against the `onnx` package's reference evaluator.
//!
//! `tests/data/onnx_fold/cases.json` holds one-node models and the outputs that
//! `onnx.reference.ReferenceEvaluator` (onnx 1.23.2, NumPy 2.4.6) computed for them; the
//! generating script sits beside it (`make_fold_cases.py`). Each case is rebuilt here as a
//! `NodeProto` with prost types (with as many outputs as the case's `n_outputs`: several for
//! `Split`), folded, and every output compared: same count, same shapes, same element kind,
//! integers exactly, floats bit for bit (the cases keep to values whose results are exact in
//! float32; NaN matches any NaN, since the JSON does not carry payloads) — except where the
//! case's `ulps` allows a distance in float32 units in the last place. The script sets it
//! for the float results of `Exp`, `Log` and `Pow` only (4): convoy computes them in f64
//! and rounds once, the evaluator uses NumPy's float32 functions, which are not always
//! correctly rounded (the script's docstring gives the measurements); infinities, NaN and
//! signs still compare exactly there. Cases the evaluator refused must be refused by
//! `fold_node` too, with an error rather than a panic.

use std::collections::BTreeSet;

use convoy::import::ImportError;
use convoy::import::onnx::fold::{FOLDABLE_OPS, can_fold, fold_node};
use convoy::import::onnx::proto::{
    AttributeProto, AttributeType, DataType, NodeProto, TensorProto,
};
use convoy::import::onnx::tensor::{ConstData, ConstTensor};
use serde_json::Value;

const CASES: &str = include_str!("data/onnx_fold/cases.json");

fn floats(v: &Value) -> Vec<f32> {
    v.as_array()
        .expect("data is a list")
        .iter()
        .map(|x| match x {
            Value::String(s) => match s.as_str() {
                "nan" => f32::NAN,
                "inf" => f32::INFINITY,
                "-inf" => f32::NEG_INFINITY,
                other => panic!("unknown float {other}"),
            },
            // The JSON holds the exact binary value of a float32 (as a double): exact.
            x => x.as_f64().expect("number") as f32,
        })
        .collect()
}

fn ints(v: &Value) -> Vec<i64> {
    v.as_array()
        .expect("data is a list")
        .iter()
        .map(|x| x.as_i64().expect("integer"))
        .collect()
}

fn is_float(dtype: &str) -> bool {
    matches!(dtype, "float32" | "float16" | "bfloat16" | "float64")
}

fn tensor(v: &Value) -> ConstTensor {
    let dtype = v["dtype"].as_str().expect("dtype");
    let shape: Vec<usize> = ints(&v["shape"]).iter().map(|&d| d as usize).collect();
    if is_float(dtype) {
        ConstTensor::f32(shape, floats(&v["data"]))
    } else {
        ConstTensor::i64(shape, ints(&v["data"]))
    }
}

/// A `TensorProto` for a TENSOR attribute: floats in `raw_data`, integers in their typed field.
fn tensor_proto(v: &Value) -> TensorProto {
    let t = tensor(v);
    let dims = t.shape.iter().map(|&d| d as i64).collect();
    match (v["dtype"].as_str().expect("dtype"), t.data) {
        ("float32", ConstData::F32(x)) => TensorProto {
            dims,
            data_type: DataType::Float as i32,
            raw_data: x.iter().flat_map(|f| f.to_le_bytes()).collect(),
            ..Default::default()
        },
        ("int64", ConstData::I64(x)) => TensorProto {
            dims,
            data_type: DataType::Int64 as i32,
            int64_data: x,
            ..Default::default()
        },
        (other, _) => panic!("attribute tensors of {other} are not generated"),
    }
}

fn attribute(v: &Value) -> AttributeProto {
    let name = v["name"].as_str().expect("name").to_string();
    let value = &v["value"];
    let base = |ty: AttributeType| AttributeProto {
        name: name.clone(),
        r#type: ty as i32,
        ..Default::default()
    };
    match v["type"].as_str().expect("type") {
        "INT" => AttributeProto {
            i: value.as_i64().expect("int"),
            ..base(AttributeType::Int)
        },
        "INTS" => AttributeProto {
            ints: ints(value),
            ..base(AttributeType::Ints)
        },
        "FLOAT" => AttributeProto {
            f: value.as_f64().expect("float") as f32,
            ..base(AttributeType::Float)
        },
        "FLOATS" => AttributeProto {
            floats: floats(value),
            ..base(AttributeType::Floats)
        },
        "TENSOR" => AttributeProto {
            t: Some(tensor_proto(value)),
            ..base(AttributeType::Tensor)
        },
        other => panic!("attribute type {other} is not generated"),
    }
}

/// Distance between two finite floats of one sign in float32 units in the last place.
fn ulps_apart(x: f32, y: f32) -> u32 {
    x.to_bits().abs_diff(y.to_bits())
}

/// Whether `x` stands for `y`: bit for bit (any NaN for a NaN), or, with `ulps` > 0, finite
/// values of one sign at most `ulps` apart (adjacent floats of one sign have adjacent bit
/// patterns, IEEE 754 §3.4).
fn same_float(x: f32, y: f32, ulps: u32) -> bool {
    if x.to_bits() == y.to_bits() || (x.is_nan() && y.is_nan()) {
        return true;
    }
    let comparable = x.is_finite() && y.is_finite() && x.is_sign_negative() == y.is_sign_negative();
    comparable && ulps_apart(x, y) <= ulps
}

fn same(got: &ConstTensor, want: &ConstTensor, ulps: u32) -> bool {
    got.shape == want.shape
        && match (&got.data, &want.data) {
            (ConstData::F32(a), ConstData::F32(b)) => {
                a.len() == b.len() && a.iter().zip(b).all(|(&x, &y)| same_float(x, y, ulps))
            }
            (ConstData::I64(a), ConstData::I64(b)) => a == b,
            _ => false,
        }
}

#[test]
fn folding_matches_the_reference_evaluator() {
    let doc: Value = serde_json::from_str(CASES).expect("cases.json parses");
    let cases = doc["cases"].as_array().expect("cases");
    let mut failures = Vec::new();
    let mut ops = BTreeSet::new();
    for case in cases {
        let name = case["name"].as_str().expect("name");
        let op = case["op"].as_str().expect("op");
        ops.insert(op.to_string());
        assert!(can_fold(op), "{name}: {op} is not foldable");
        let inputs: Vec<Option<ConstTensor>> = case["inputs"]
            .as_array()
            .expect("inputs")
            .iter()
            .map(|v| (!v.is_null()).then(|| tensor(v)))
            .collect();
        let node = NodeProto {
            name: name.to_string(),
            op_type: op.to_string(),
            input: inputs
                .iter()
                .enumerate()
                .map(|(i, t)| t.as_ref().map_or(String::new(), |_| format!("x{i}")))
                .collect(),
            output: match case["n_outputs"].as_u64().expect("n_outputs") {
                1 => vec!["y".into()],
                n => (0..n).map(|i| format!("y{i}")).collect(),
            },
            attribute: case["attributes"]
                .as_array()
                .expect("attributes")
                .iter()
                .map(attribute)
                .collect(),
            ..Default::default()
        };
        let refs: Vec<Option<&ConstTensor>> = inputs.iter().map(Option::as_ref).collect();
        let opset = case["opset"].as_i64().expect("opset");
        let ulps = u32::try_from(case["ulps"].as_u64().expect("ulps")).expect("small");
        let got = fold_node(&node, opset, &refs);
        match (&case["error"], got) {
            (Value::String(_), Ok(out)) => {
                failures.push(format!(
                    "{name}: the evaluator refused it, we folded {out:?}"
                ));
            }
            (Value::String(_), Err(_)) => {}
            (_, Err(e)) => failures.push(format!("{name}: {e}")),
            (_, Ok(out)) => {
                let want: Vec<ConstTensor> = case["outputs"]
                    .as_array()
                    .expect("outputs")
                    .iter()
                    .map(tensor)
                    .collect();
                let all_same = out.iter().zip(&want).all(|(g, w)| same(g, w, ulps));
                if out.len() != want.len() || !all_same {
                    failures.push(format!("{name}: got {out:?}, want {want:?}"));
                }
            }
        }
    }
    assert!(
        failures.is_empty(),
        "{} of {} cases differ:\n{}",
        failures.len(),
        cases.len(),
        failures.join("\n")
    );
    // Every operator the folder claims is exercised by at least one reference case.
    let missing: Vec<_> = FOLDABLE_OPS
        .iter()
        .filter(|op| !ops.contains(**op))
        .collect();
    assert!(
        missing.is_empty(),
        "operators without a reference case: {missing:?}"
    );
}

fn node(op: &str, n_inputs: usize, attributes: Vec<AttributeProto>) -> NodeProto {
    NodeProto {
        name: format!("{op}_1"),
        op_type: op.into(),
        input: (0..n_inputs).map(|i| format!("x{i}")).collect(),
        output: vec!["y".into()],
        attribute: attributes,
        ..Default::default()
    }
}

/// A `Split` node with `outputs` outputs.
fn split_node(n_inputs: usize, outputs: usize, attributes: Vec<AttributeProto>) -> NodeProto {
    NodeProto {
        output: (0..outputs).map(|i| format!("y{i}")).collect(),
        ..node("Split", n_inputs, attributes)
    }
}

fn int_attr(name: &str, i: i64) -> AttributeProto {
    AttributeProto {
        name: name.into(),
        r#type: AttributeType::Int as i32,
        i,
        ..Default::default()
    }
}

fn ints_attr(name: &str, ints: Vec<i64>) -> AttributeProto {
    AttributeProto {
        name: name.into(),
        r#type: AttributeType::Ints as i32,
        ints,
        ..Default::default()
    }
}

/// A node, its opset, its inputs, and a word the refusal must contain.
type Refusal = (NodeProto, i64, Vec<Option<ConstTensor>>, &'static str);

/// A 1-D integer tensor.
fn int_vec(d: Vec<i64>) -> ConstTensor {
    ConstTensor::i64(vec![d.len()], d)
}

fn int_scalar(x: i64) -> ConstTensor {
    ConstTensor::scalar_i64(x)
}

/// A 1-D float tensor.
fn float_vec(d: Vec<f32>) -> ConstTensor {
    ConstTensor::f32(vec![d.len()], d)
}

/// A shape (as a constant) of 2^40 elements.
fn huge() -> ConstTensor {
    int_vec(vec![1 << 20, 1 << 20])
}

/// Each case must be refused with [`ImportError::Unsupported`] naming the node and operator,
/// its problem mentioning the case's word.
fn assert_refused(cases: Vec<Refusal>) {
    for (n, opset, inputs, needle) in cases {
        let refs: Vec<Option<&ConstTensor>> = inputs.iter().map(Option::as_ref).collect();
        match fold_node(&n, opset, &refs) {
            Err(ImportError::Unsupported { node, op, problem }) => {
                assert_eq!(
                    (node.as_str(), op.as_str()),
                    (n.name.as_str(), n.op_type.as_str())
                );
                assert!(
                    problem.contains(needle),
                    "{}: {problem:?} should mention {needle:?}",
                    n.name
                );
            }
            other => panic!("{}: expected an Unsupported error, got {other:?}", n.name),
        }
    }
}

// Inputs the standard rules out (or leaves undefined, like integer division by zero) are
// refused with an error naming the node and operator, and outputs over the size limit are
// refused before anything is allocated. Expectations in the tests below are the operator
// specification's constraints (onnx/defs, docs/Operators.md), not evaluator outputs.

/// Arity, element types and values the operators refuse.
#[test]
fn invalid_values_are_named_errors() {
    assert_refused(vec![
        (
            node("Div", 2, vec![]),
            14,
            vec![Some(int_vec(vec![1, 2])), Some(int_vec(vec![1, 0]))],
            "division by zero",
        ),
        (
            node("Add", 1, vec![]),
            14,
            vec![Some(int_vec(vec![1]))],
            "has 1 inputs",
        ),
        (
            node("Cast", 1, vec![int_attr("to", 8)]),
            13,
            vec![Some(int_scalar(1))],
            "STRING",
        ),
        (
            node("Cast", 1, vec![]),
            13,
            vec![Some(int_scalar(1))],
            "\"to\"",
        ),
        (
            node("Gather", 2, vec![]),
            13,
            vec![Some(int_vec(vec![1, 2])), Some(float_vec(vec![0.0]))],
            "integers",
        ),
        (
            node("Concat", 2, vec![int_attr("axis", 0)]),
            13,
            vec![Some(int_vec(vec![1])), Some(float_vec(vec![2.0]))],
            "mix",
        ),
        (
            node("Floor", 1, vec![]),
            13,
            vec![Some(int_vec(vec![1]))],
            "floating point",
        ),
        (
            node("Not", 1, vec![]),
            13,
            vec![Some(float_vec(vec![1.0]))],
            "boolean",
        ),
        (
            node("Where", 3, vec![]),
            16,
            vec![
                Some(float_vec(vec![1.0])),
                Some(int_scalar(1)),
                Some(int_scalar(2)),
            ],
            "condition",
        ),
        (node("Constant", 0, vec![]), 13, vec![], "exactly one"),
    ]);
}

/// Shapes, axes, indices and permutations the operators refuse.
#[test]
fn invalid_shapes_are_named_errors() {
    assert_refused(vec![
        (
            node("Reshape", 2, vec![]),
            14,
            vec![Some(int_vec(vec![1, 2])), None],
            "omitted",
        ),
        (
            node("Reshape", 2, vec![]),
            14,
            vec![Some(int_vec(vec![1, 2])), Some(int_vec(vec![-1, -1]))],
            "more than one -1",
        ),
        (
            node("ConstantOfShape", 1, vec![]),
            13,
            vec![Some(int_vec(vec![2, -1]))],
            "-1",
        ),
        (
            node("Range", 3, vec![]),
            13,
            vec![
                Some(int_scalar(0)),
                Some(int_scalar(5)),
                Some(int_scalar(0)),
            ],
            "delta",
        ),
        (
            node("Slice", 5, vec![]),
            13,
            vec![
                Some(int_vec(vec![1, 2])),
                Some(int_vec(vec![0])),
                Some(int_vec(vec![2])),
                None,
                Some(int_vec(vec![0])),
            ],
            "steps",
        ),
        (
            node("Transpose", 1, vec![ints_attr("perm", vec![0, 0])]),
            13,
            vec![Some(ConstTensor::i64(vec![1, 1], vec![5]))],
            "permutation",
        ),
        (
            node("Unsqueeze", 1, vec![]),
            13,
            vec![Some(int_vec(vec![1, 2]))],
            "axes",
        ),
        (
            node("Unsqueeze", 2, vec![]),
            13,
            vec![Some(int_vec(vec![1, 2])), Some(int_vec(vec![0, -3]))],
            "twice",
        ),
        (
            node("Concat", 2, vec![]),
            13,
            vec![Some(int_vec(vec![1])), Some(int_vec(vec![2]))],
            "axis",
        ),
        (
            node("Squeeze", 1, vec![ints_attr("axes", vec![3])]),
            11,
            vec![Some(int_vec(vec![1]))],
            "out of range",
        ),
    ]);
}

/// Outputs over MAX_FOLDED_ELEMENTS, element-wise ones included: refused before they
/// are built.
#[test]
fn oversized_outputs_are_refused() {
    assert_refused(vec![
        (
            node("ConstantOfShape", 1, vec![]),
            13,
            vec![Some(huge())],
            "limit",
        ),
        (
            node("Expand", 2, vec![]),
            13,
            vec![Some(int_scalar(1)), Some(huge())],
            "limit",
        ),
        (
            node("Tile", 2, vec![]),
            13,
            vec![Some(int_vec(vec![1, 2])), Some(int_vec(vec![1 << 30]))],
            "limit",
        ),
        (
            node("Range", 3, vec![]),
            13,
            vec![
                Some(int_scalar(0)),
                Some(int_scalar(i64::MAX)),
                Some(int_scalar(1)),
            ],
            "limit",
        ),
        (
            node("Add", 2, vec![]),
            14,
            vec![
                Some(ConstTensor::i64(vec![8192, 1], vec![1; 8192])),
                Some(ConstTensor::i64(vec![1, 8192], vec![1; 8192])),
            ],
            "limit",
        ),
        (
            node("Where", 3, vec![]),
            16,
            vec![
                Some(ConstTensor::i64(vec![8192, 1], vec![1; 8192])),
                Some(ConstTensor::f32(vec![1, 8192], vec![1.0; 8192])),
                Some(ConstTensor::scalar_f32(0.0)),
            ],
            "limit",
        ),
    ]);
}

/// Clip: T is one type for the input and both bounds, and the bounds are scalars; before
/// opset 11 floats only. Reciprocal, Exp, Log, Erf take floats only; Pow refuses negative
/// integer powers of integers, as numpy does.
#[test]
fn invalid_clip_pow_and_float_functions_are_named_errors() {
    assert_refused(vec![
        (
            node("Clip", 3, vec![]),
            13,
            vec![Some(float_vec(vec![1.0, 2.0])), Some(int_scalar(0)), None],
            "mix",
        ),
        (
            node("Clip", 3, vec![]),
            13,
            vec![
                Some(float_vec(vec![1.0, 2.0])),
                None,
                Some(float_vec(vec![0.0, 1.0])),
            ],
            "scalars",
        ),
        (
            node("Clip", 1, vec![]),
            6,
            vec![Some(int_vec(vec![1, 2]))],
            "floating point",
        ),
        (
            node("Reciprocal", 1, vec![]),
            13,
            vec![Some(int_vec(vec![2]))],
            "floating point",
        ),
        (
            node("Exp", 1, vec![]),
            13,
            vec![Some(int_vec(vec![2]))],
            "floating point",
        ),
        (
            node("Erf", 1, vec![]),
            13,
            vec![Some(int_vec(vec![2]))],
            "floating point",
        ),
        (
            node("Pow", 2, vec![]),
            15,
            vec![Some(int_vec(vec![2])), Some(int_vec(vec![-1]))],
            "negative",
        ),
    ]);
}

/// Split: lengths sum to the axis, one per output; equal parts must divide the axis (before
/// opset 18); num_outputs matches the outputs and leaves a last part of 0 or more; split and
/// num_outputs never together; at least one output.
#[test]
fn invalid_splits_are_named_errors() {
    assert_refused(vec![
        (
            split_node(2, 2, vec![]),
            13,
            vec![
                Some(int_vec(vec![1, 2, 3, 4, 5])),
                Some(int_vec(vec![2, 2])),
            ],
            "summing",
        ),
        (
            split_node(2, 2, vec![]),
            13,
            vec![Some(int_vec(vec![1, 2, 3])), Some(int_vec(vec![1, 1, 1]))],
            "one length per output",
        ),
        (
            split_node(1, 2, vec![]),
            13,
            vec![Some(int_vec(vec![1, 2, 3]))],
            "equal parts",
        ),
        (
            split_node(1, 2, vec![int_attr("num_outputs", 3)]),
            18,
            vec![Some(int_vec(vec![1, 2, 3]))],
            "num_outputs",
        ),
        (
            split_node(2, 2, vec![int_attr("num_outputs", 2)]),
            18,
            vec![Some(int_vec(vec![1, 2, 3])), Some(int_vec(vec![1, 2]))],
            "both",
        ),
        (
            split_node(1, 4, vec![int_attr("num_outputs", 4)]),
            18,
            vec![Some(int_vec(vec![1, 2, 3, 4, 5]))],
            "smaller last",
        ),
        (
            split_node(1, 0, vec![]),
            13,
            vec![Some(int_vec(vec![1, 2]))],
            "no outputs",
        ),
        (
            split_node(2, 2, vec![int_attr("axis", 1)]),
            13,
            vec![Some(int_vec(vec![1, 2])), Some(int_vec(vec![1, 1]))],
            "out of range",
        ),
    ]);
}

/// Two outputs where the operator has one; an operator the folder does not know; a
/// Constant stored as external data without a model folder.
#[test]
fn unknown_operators_and_output_counts_are_refused() {
    let one = int_scalar(1);
    let mut two = node("Identity", 1, vec![]);
    two.output.push("z".into());
    assert!(fold_node(&two, 13, &[Some(&one)]).is_err());
    let err = fold_node(&node("Conv", 2, vec![]), 13, &[Some(&one), Some(&one)]).unwrap_err();
    assert!(matches!(err, ImportError::UnsupportedOp { .. }), "{err}");
    assert!(!can_fold("Conv"));

    // A Constant stored as external data needs a model folder, which fold_node does not have.
    let tensor = TensorProto {
        dims: vec![1],
        data_type: DataType::Float as i32,
        data_location: 1,
        external_data: vec![convoy::import::onnx::proto::StringStringEntryProto {
            key: "location".into(),
            value: "w.bin".into(),
        }],
        ..Default::default()
    };
    let constant = node(
        "Constant",
        0,
        vec![AttributeProto {
            name: "value".into(),
            r#type: AttributeType::Tensor as i32,
            t: Some(tensor),
            ..Default::default()
        }],
    );
    let err = fold_node(&constant, 13, &[]).unwrap_err();
    assert!(matches!(err, ImportError::ExternalData { .. }), "{err}");
}

/// Shapes at the edges fold to what the operator specification's shape rules give, without
/// a panic: an empty input tiled by huge repeats (output dim = input dim × repeats, here 0),
/// parts of length 0, a one-element slice whose step is `i64::MIN`, a rank-0 transpose.
#[test]
fn edge_shapes_fold() {
    let empty = ConstTensor::f32(vec![0, 0], vec![]);
    let repeats = ConstTensor::i64(vec![2], vec![1 << 40, 1 << 40]);
    let out = fold_node(
        &node("Tile", 2, vec![]),
        13,
        &[Some(&empty), Some(&repeats)],
    )
    .unwrap();
    assert_eq!(out, vec![ConstTensor::f32(vec![0, 0], vec![])]);

    let nothing = ConstTensor::i64(vec![0], vec![]);
    let out = fold_node(&split_node(1, 3, vec![]), 13, &[Some(&nothing)]).unwrap();
    assert_eq!(out, vec![ConstTensor::i64(vec![0], vec![]); 3]);

    let one = ConstTensor::i64(vec![1], vec![7]);
    let list = |x: i64| ConstTensor::i64(vec![1], vec![x]);
    let (start, end, axes, step) = (list(0), list(1), list(0), list(i64::MIN));
    let out = fold_node(
        &node("Slice", 5, vec![]),
        13,
        &[
            Some(&one),
            Some(&start),
            Some(&end),
            Some(&axes),
            Some(&step),
        ],
    )
    .unwrap();
    // A negative step from index 0 ends before the (clamped) end of 0: nothing.
    assert_eq!(out, vec![ConstTensor::i64(vec![0], vec![])]);
    let (start, end) = (list(0), list(-2));
    let out = fold_node(
        &node("Slice", 5, vec![]),
        13,
        &[
            Some(&one),
            Some(&start),
            Some(&end),
            Some(&axes),
            Some(&step),
        ],
    )
    .unwrap();
    assert_eq!(out, vec![one.clone()]);

    let scalar = ConstTensor::scalar_f32(2.5);
    let out = fold_node(&node("Transpose", 1, vec![]), 13, &[Some(&scalar)]).unwrap();
    assert_eq!(out, vec![scalar]);
}
