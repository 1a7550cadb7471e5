//! Constant folding against the `onnx` package's reference evaluator.
//!
//! `tests/data/onnx_fold/cases.json` holds one-node models and the outputs that
//! `onnx.reference.ReferenceEvaluator` (onnx 1.23.2, NumPy 2.4.6) computed for them; the
//! generating script sits beside it (`make_fold_cases.py`). Each case is rebuilt here as a
//! `NodeProto` with prost types, folded, and compared exactly: same shape, same element kind,
//! floats bit for bit (the cases keep to values whose results are exact in float32; NaN
//! matches any NaN, since the JSON does not carry payloads). Cases the evaluator refused
//! must be refused by `fold_node` too, with an error rather than a panic.

use std::collections::BTreeSet;

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

fn same(got: &ConstTensor, want: &ConstTensor) -> bool {
    got.shape == want.shape
        && match (&got.data, &want.data) {
            (ConstData::F32(a), ConstData::F32(b)) => {
                a.len() == b.len()
                    && a.iter()
                        .zip(b)
                        .all(|(x, y)| x.to_bits() == y.to_bits() || (x.is_nan() && y.is_nan()))
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
            output: vec!["y".into()],
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
                if out.len() != want.len() || !out.iter().zip(&want).all(|(g, w)| same(g, w)) {
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

/// Inputs the standard rules out (or leaves undefined, like integer division by zero) are
/// refused with an error naming the node and operator, and outputs over the size limit are
/// refused before anything is allocated. Expectations here are the operator specification's
/// constraints (onnx/defs, docs/Operators.md), not evaluator outputs.
#[test]
fn invalid_folds_are_named_errors() {
    use convoy::import::ImportError;
    let v = |d: Vec<i64>| ConstTensor::i64(vec![d.len()], d);
    let s = |x: i64| ConstTensor::scalar_i64(x);
    let f = |d: Vec<f32>| ConstTensor::f32(vec![d.len()], d);
    let huge = v(vec![1 << 20, 1 << 20]);
    let cases: Vec<(NodeProto, i64, Vec<Option<ConstTensor>>, &str)> = vec![
        (
            node("Div", 2, vec![]),
            14,
            vec![Some(v(vec![1, 2])), Some(v(vec![1, 0]))],
            "division by zero",
        ),
        (
            node("Add", 1, vec![]),
            14,
            vec![Some(v(vec![1]))],
            "has 1 inputs",
        ),
        (
            node("Reshape", 2, vec![]),
            14,
            vec![Some(v(vec![1, 2])), None],
            "omitted",
        ),
        (
            node("Reshape", 2, vec![]),
            14,
            vec![Some(v(vec![1, 2])), Some(v(vec![-1, -1]))],
            "more than one -1",
        ),
        (
            node("ConstantOfShape", 1, vec![]),
            13,
            vec![Some(huge.clone())],
            "limit",
        ),
        (
            node("ConstantOfShape", 1, vec![]),
            13,
            vec![Some(v(vec![2, -1]))],
            "-1",
        ),
        (
            node("Expand", 2, vec![]),
            13,
            vec![Some(s(1)), Some(huge.clone())],
            "limit",
        ),
        (
            node("Tile", 2, vec![]),
            13,
            vec![Some(v(vec![1, 2])), Some(v(vec![1 << 30]))],
            "limit",
        ),
        (
            node("Range", 3, vec![]),
            13,
            vec![Some(s(0)), Some(s(i64::MAX)), Some(s(1))],
            "limit",
        ),
        (
            node("Range", 3, vec![]),
            13,
            vec![Some(s(0)), Some(s(5)), Some(s(0))],
            "delta",
        ),
        (
            node("Cast", 1, vec![int_attr("to", 8)]),
            13,
            vec![Some(s(1))],
            "STRING",
        ),
        (node("Cast", 1, vec![]), 13, vec![Some(s(1))], "\"to\""),
        (
            node("Slice", 5, vec![]),
            13,
            vec![
                Some(v(vec![1, 2])),
                Some(v(vec![0])),
                Some(v(vec![2])),
                None,
                Some(v(vec![0])),
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
            node("Gather", 2, vec![]),
            13,
            vec![Some(v(vec![1, 2])), Some(f(vec![0.0]))],
            "integers",
        ),
        (
            node("Unsqueeze", 1, vec![]),
            13,
            vec![Some(v(vec![1, 2]))],
            "axes",
        ),
        (
            node("Unsqueeze", 2, vec![]),
            13,
            vec![Some(v(vec![1, 2])), Some(v(vec![0, -3]))],
            "twice",
        ),
        (
            node("Concat", 2, vec![]),
            13,
            vec![Some(v(vec![1])), Some(v(vec![2]))],
            "axis",
        ),
        (
            node("Concat", 2, vec![int_attr("axis", 0)]),
            13,
            vec![Some(v(vec![1])), Some(f(vec![2.0]))],
            "mix",
        ),
        (
            node("Floor", 1, vec![]),
            13,
            vec![Some(v(vec![1]))],
            "floating point",
        ),
        (
            node("Not", 1, vec![]),
            13,
            vec![Some(f(vec![1.0]))],
            "boolean",
        ),
        (
            node("Where", 3, vec![]),
            16,
            vec![Some(f(vec![1.0])), Some(s(1)), Some(s(2))],
            "condition",
        ),
        (node("Constant", 0, vec![]), 13, vec![], "exactly one"),
        (
            node("Squeeze", 1, vec![ints_attr("axes", vec![3])]),
            11,
            vec![Some(v(vec![1]))],
            "out of range",
        ),
    ];
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

    // Two outputs where the operator has one; an operator the folder does not know.
    let mut two = node("Identity", 1, vec![]);
    two.output.push("z".into());
    assert!(fold_node(&two, 13, &[Some(&s(1))]).is_err());
    let err = fold_node(&node("Conv", 2, vec![]), 13, &[Some(&s(1)), Some(&s(1))]).unwrap_err();
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
