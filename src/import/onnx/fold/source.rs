//! Operators that make values rather than transform an input's: `Constant` and
//! `ConstantOfShape` (from attributes), `Range` (from three scalars), `Shape` and `Size`
//! (from an input's shape, never its values).

use super::Ctx;
use crate::import::ImportError;
use crate::import::onnx::attr;
use crate::import::onnx::tensor::{ConstData, ConstTensor, ExternalData};

/// `Constant`: exactly one of `value`, `value_float(s)`, `value_int(s)`.
pub(super) fn constant(cx: &Ctx<'_>, external: &ExternalData) -> Result<ConstTensor, ImportError> {
    cx.arity(0, 0)?;
    let node = cx.node;
    if let [a] = &node.attribute[..] {
        match a.name.as_str() {
            "value" => {
                if let Some(t) = attr::attr_tensor_checked(node, "value")? {
                    return ConstTensor::from_proto(t, external);
                }
            }
            "value_float" => {
                if let Some(v) = cx.attr_float("value_float")? {
                    return Ok(ConstTensor::scalar_f32(v));
                }
            }
            "value_floats" => {
                if let Some(v) = attr::attr_floats_checked(node, "value_floats")? {
                    return Ok(ConstTensor::f32(vec![v.len()], v));
                }
            }
            "value_int" => {
                if let Some(v) = cx.attr_int("value_int")? {
                    return Ok(ConstTensor::scalar_i64(v));
                }
            }
            "value_ints" => {
                if let Some(v) = cx.attr_ints("value_ints")? {
                    return Ok(ConstTensor::i64(vec![v.len()], v));
                }
            }
            other => {
                return Err(cx.err(format!(
                    "attribute {other:?} is not supported; use value, value_float(s) or value_int(s)"
                )));
            }
        }
    }
    Err(cx.err(format!(
        "must have exactly one value attribute, has {}",
        node.attribute.len()
    )))
}

/// `ConstantOfShape`: a tensor of the given shape filled with `value` (default float 0).
pub(super) fn constant_of_shape(
    cx: &Ctx<'_>,
    external: &ExternalData,
) -> Result<ConstTensor, ImportError> {
    cx.arity(1, 1)?;
    let shape = cx.sizes(0, "shape")?;
    let n = cx.count(&shape)?;
    let value = match attr::attr_tensor_checked(cx.node, "value")? {
        Some(t) => ConstTensor::from_proto(t, external)?,
        None => ConstTensor::scalar_f32(0.0),
    };
    if value.len() != 1 {
        return Err(cx.err(format!(
            "value must hold one element, holds {}",
            value.len()
        )));
    }
    Ok(match value.data {
        ConstData::F32(v) => ConstTensor::f32(shape, vec![v[0]; n]),
        ConstData::I64(v) => ConstTensor::i64(shape, vec![v[0]; n]),
    })
}

/// `Shape`, sliced by `start`/`end` (opset 15; clamped to `[0, rank]`).
pub(super) fn shape(cx: &Ctx<'_>) -> Result<ConstTensor, ImportError> {
    cx.arity(1, 1)?;
    let dims = &cx.input(0)?.shape;
    let rank = dims.len() as i64;
    let clamp = |v: i64| (if v < 0 { v + rank } else { v }).clamp(0, rank) as usize;
    let start = cx.attr_int("start")?.map_or(0, clamp);
    let end = cx.attr_int("end")?.map_or(dims.len(), clamp);
    let part: Vec<i64> = dims
        .get(start..end.max(start))
        .unwrap_or_default()
        .iter()
        .map(|&d| d as i64)
        .collect();
    Ok(ConstTensor::i64(vec![part.len()], part))
}

/// `Size`: the input's element count, as a scalar.
pub(super) fn size(cx: &Ctx<'_>) -> Result<ConstTensor, ImportError> {
    cx.arity(1, 1)?;
    Ok(ConstTensor::scalar_i64(cx.input(0)?.len() as i64))
}

/// `Range`: `start + i·delta` for `i < max(ceil((limit - start) / delta), 0)`. Floats are
/// computed in f64 and rounded once, as the reference evaluator's `numpy.arange` does.
pub(super) fn range(cx: &Ctx<'_>) -> Result<ConstTensor, ImportError> {
    cx.arity(3, 3)?;
    let [start, limit, delta] = [0, 1, 2].map(|i| cx.input(i));
    let (start, limit, delta) = (start?, limit?, delta?);
    if [start, limit, delta].iter().any(|t| t.len() != 1) {
        return Err(cx.err("start, limit and delta must be scalars"));
    }
    let too_long = |n: u64| -> Result<usize, ImportError> {
        usize::try_from(n)
            .ok()
            .and_then(|n| cx.count(&[n]).ok())
            .ok_or_else(|| cx.err(format!("would produce {n} elements, over the limit")))
    };
    match (&start.data, &limit.data, &delta.data) {
        (ConstData::I64(s), ConstData::I64(l), ConstData::I64(d)) => {
            let (s, l, d) = (s[0], l[0], d[0]);
            if d == 0 {
                return Err(cx.err("delta must not be 0"));
            }
            // i128: the difference of two i64 cannot overflow there.
            let span = i128::from(l) - i128::from(s);
            let d128 = i128::from(d);
            let n = if (span > 0) == (d > 0) && span != 0 {
                (span.unsigned_abs() - 1) / d128.unsigned_abs() + 1
            } else {
                0
            };
            let n = too_long(u64::try_from(n).unwrap_or(u64::MAX))?;
            let v = (0..n as i64)
                .map(|i| s.wrapping_add(i.wrapping_mul(d)))
                .collect();
            Ok(ConstTensor::i64(vec![n], v))
        }
        (ConstData::F32(s), ConstData::F32(l), ConstData::F32(d)) => {
            let (s, l, d) = (f64::from(s[0]), f64::from(l[0]), f64::from(d[0]));
            if d == 0.0 || !(s.is_finite() && l.is_finite() && d.is_finite()) {
                return Err(cx.err("start, limit and delta must be finite, delta not 0"));
            }
            let n = ((l - s) / d).ceil().max(0.0);
            let n = too_long(if n > u64::MAX as f64 {
                u64::MAX
            } else {
                n as u64
            })?;
            let v = (0..n).map(|i| (s + i as f64 * d) as f32).collect();
            Ok(ConstTensor::f32(vec![n], v))
        }
        _ => Err(cx.err("start, limit and delta must share one element type")),
    }
}
