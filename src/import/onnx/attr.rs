//! Typed access to a node's attributes.
//!
//! Each kind comes in two forms:
//! - `attr_int(node, "axis") -> Option<i64>`: `None` when the attribute is absent *or* not
//!   usable as that kind (wrong type, a function-attribute reference, invalid UTF-8). Fine
//!   where any such attribute would be refused later anyway;
//! - `attr_int_checked(node, "axis") -> Result<Option<i64>, ImportError>`: `Ok(None)` only when
//!   absent; a present attribute of the wrong type is an [`ImportError::Unsupported`] naming
//!   the node, operator and attribute. Prefer this form: a wrongly typed attribute then
//!   cannot silently fall back to the operator's default.
//!
//! An attribute's type is its `type` discriminator, which the standard requires (since IR
//! version 2); one without it (`UNDEFINED`) is refused rather than guessed from the fields.

use super::proto::{AttributeProto, AttributeType, NodeProto, TensorProto};
use crate::import::ImportError;

/// An [`ImportError::Unsupported`] naming `node` and its operator.
pub fn unsupported(node: &NodeProto, problem: impl Into<String>) -> ImportError {
    ImportError::Unsupported {
        node: node.name.clone(),
        op: node.op_type.clone(),
        problem: problem.into(),
    }
}

/// The attribute called `name`, if any (the first, should a malformed node repeat it).
pub fn find<'a>(node: &'a NodeProto, name: &str) -> Option<&'a AttributeProto> {
    node.attribute.iter().find(|a| a.name == name)
}

/// The attribute `name` if present, after checking that its type is `want`.
fn typed<'a>(
    node: &'a NodeProto,
    name: &str,
    want: AttributeType,
) -> Result<Option<&'a AttributeProto>, ImportError> {
    let Some(a) = find(node, name) else {
        return Ok(None);
    };
    if !a.ref_attr_name.is_empty() {
        return Err(unsupported(
            node,
            format!(
                "attribute {name:?} refers to function attribute {:?}; only plain values are supported",
                a.ref_attr_name
            ),
        ));
    }
    let found = AttributeType::try_from(a.r#type);
    if found != Ok(want) {
        let found = match found {
            Ok(AttributeType::Undefined) => "of no declared type".to_string(),
            Ok(t) => format!("a {}", t.as_str_name()),
            Err(_) => format!("of unknown type {}", a.r#type),
        };
        return Err(unsupported(
            node,
            format!(
                "attribute {name:?} is {found}, but {} takes a {} there",
                node.op_type,
                want.as_str_name()
            ),
        ));
    }
    Ok(Some(a))
}

/// An INT attribute. See the module doc for `Option` vs `_checked`.
pub fn attr_int(node: &NodeProto, name: &str) -> Option<i64> {
    attr_int_checked(node, name).ok().flatten()
}

/// An INT attribute; `Ok(None)` when absent.
///
/// # Errors
/// [`ImportError::Unsupported`] when present with another type.
pub fn attr_int_checked(node: &NodeProto, name: &str) -> Result<Option<i64>, ImportError> {
    Ok(typed(node, name, AttributeType::Int)?.map(|a| a.i))
}

/// An INTS attribute.
pub fn attr_ints(node: &NodeProto, name: &str) -> Option<Vec<i64>> {
    attr_ints_checked(node, name).ok().flatten()
}

/// An INTS attribute; `Ok(None)` when absent.
///
/// # Errors
/// [`ImportError::Unsupported`] when present with another type.
pub fn attr_ints_checked(node: &NodeProto, name: &str) -> Result<Option<Vec<i64>>, ImportError> {
    Ok(typed(node, name, AttributeType::Ints)?.map(|a| a.ints.clone()))
}

/// A FLOAT attribute.
pub fn attr_float(node: &NodeProto, name: &str) -> Option<f32> {
    attr_float_checked(node, name).ok().flatten()
}

/// A FLOAT attribute; `Ok(None)` when absent.
///
/// # Errors
/// [`ImportError::Unsupported`] when present with another type.
pub fn attr_float_checked(node: &NodeProto, name: &str) -> Result<Option<f32>, ImportError> {
    Ok(typed(node, name, AttributeType::Float)?.map(|a| a.f))
}

/// A FLOATS attribute.
pub fn attr_floats(node: &NodeProto, name: &str) -> Option<Vec<f32>> {
    attr_floats_checked(node, name).ok().flatten()
}

/// A FLOATS attribute; `Ok(None)` when absent.
///
/// # Errors
/// [`ImportError::Unsupported`] when present with another type.
pub fn attr_floats_checked(node: &NodeProto, name: &str) -> Result<Option<Vec<f32>>, ImportError> {
    Ok(typed(node, name, AttributeType::Floats)?.map(|a| a.floats.clone()))
}

/// A STRING attribute, decoded as UTF-8.
pub fn attr_string(node: &NodeProto, name: &str) -> Option<String> {
    attr_string_checked(node, name).ok().flatten()
}

/// A STRING attribute decoded as UTF-8 (the standard's encoding); `Ok(None)` when absent.
///
/// # Errors
/// [`ImportError::Unsupported`] when present with another type or not valid UTF-8.
pub fn attr_string_checked(node: &NodeProto, name: &str) -> Result<Option<String>, ImportError> {
    let Some(a) = typed(node, name, AttributeType::String)? else {
        return Ok(None);
    };
    String::from_utf8(a.s.clone())
        .map(Some)
        .map_err(|_| unsupported(node, format!("attribute {name:?} is not valid UTF-8")))
}

/// A TENSOR attribute.
pub fn attr_tensor<'a>(node: &'a NodeProto, name: &str) -> Option<&'a TensorProto> {
    attr_tensor_checked(node, name).ok().flatten()
}

/// A TENSOR attribute; `Ok(None)` when absent.
///
/// # Errors
/// [`ImportError::Unsupported`] when present with another type or without its tensor.
pub fn attr_tensor_checked<'a>(
    node: &'a NodeProto,
    name: &str,
) -> Result<Option<&'a TensorProto>, ImportError> {
    let Some(a) = typed(node, name, AttributeType::Tensor)? else {
        return Ok(None);
    };
    match &a.t {
        Some(t) => Ok(Some(t)),
        None => Err(unsupported(
            node,
            format!("attribute {name:?} is a TENSOR but holds none"),
        )),
    }
}

#[cfg(test)]
mod tests {
    use super::*;

    fn attr(name: &str, ty: AttributeType) -> AttributeProto {
        AttributeProto {
            name: name.into(),
            r#type: ty as i32,
            ..Default::default()
        }
    }

    fn node(attrs: Vec<AttributeProto>) -> NodeProto {
        NodeProto {
            name: "n1".into(),
            op_type: "Gather".into(),
            attribute: attrs,
            ..Default::default()
        }
    }

    #[test]
    fn reads_each_kind() {
        let n = node(vec![
            AttributeProto {
                i: -2,
                ..attr("axis", AttributeType::Int)
            },
            AttributeProto {
                ints: vec![1, 2],
                ..attr("perm", AttributeType::Ints)
            },
            AttributeProto {
                f: 0.5,
                ..attr("alpha", AttributeType::Float)
            },
            AttributeProto {
                floats: vec![0.25],
                ..attr("scales", AttributeType::Floats)
            },
            AttributeProto {
                s: b"tanh".to_vec(),
                ..attr("approximate", AttributeType::String)
            },
            AttributeProto {
                t: Some(TensorProto {
                    name: "v".into(),
                    ..Default::default()
                }),
                ..attr("value", AttributeType::Tensor)
            },
        ]);
        assert_eq!(attr_int(&n, "axis"), Some(-2));
        assert_eq!(attr_ints(&n, "perm"), Some(vec![1, 2]));
        assert_eq!(attr_float(&n, "alpha"), Some(0.5));
        assert_eq!(attr_floats(&n, "scales"), Some(vec![0.25]));
        assert_eq!(attr_string(&n, "approximate").as_deref(), Some("tanh"));
        assert_eq!(attr_tensor(&n, "value").map(|t| t.name.as_str()), Some("v"));
        assert_eq!(attr_int(&n, "missing"), None);
        assert!(attr_int_checked(&n, "missing").unwrap().is_none());
    }

    #[test]
    fn wrong_types_are_named_errors() {
        let n = node(vec![
            AttributeProto {
                f: 1.0,
                ..attr("axis", AttributeType::Float)
            },
            attr("untyped", AttributeType::Undefined),
            AttributeProto {
                ref_attr_name: "outer".into(),
                ..attr("linked", AttributeType::Int)
            },
            AttributeProto {
                s: vec![0xff, 0xfe],
                ..attr("mode", AttributeType::String)
            },
            attr("value", AttributeType::Tensor),
        ]);
        assert_eq!(attr_int(&n, "axis"), None);
        let err = attr_int_checked(&n, "axis").unwrap_err();
        let text = err.to_string();
        assert!(
            text.contains("n1")
                && text.contains("Gather")
                && text.contains("axis")
                && text.contains("FLOAT"),
            "{text}"
        );
        assert!(attr_int_checked(&n, "untyped").is_err());
        assert!(attr_int_checked(&n, "linked").is_err());
        assert!(attr_string_checked(&n, "mode").is_err());
        assert!(attr_tensor_checked(&n, "value").is_err());
        assert!(matches!(
            attr_ints_checked(&n, "axis"),
            Err(ImportError::Unsupported { .. })
        ));
    }
}
