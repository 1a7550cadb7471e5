//! Raw tensor samples: a shape and little-endian f32 bytes, checked and copied into model input.

use super::PrepareError;

/// Checks a raw tensor sample and decodes it into `out`.
///
/// `shape` must equal `expected` (the model's per-sample input shape) dimension by dimension —
/// no implicit batch axis, squeezing or broadcasting — and `f32_le` must hold exactly that many
/// little-endian IEEE-754 f32 values.
///
/// # Errors
/// [`PrepareError::OutputLength`] if `out` does not hold the product of `expected` values;
/// [`PrepareError::TensorShape`] for another shape; [`PrepareError::TensorBytes`] for another
/// byte count; [`PrepareError::NonFinite`] at the first NaN or infinity, in which case `out`
/// holds the values before it.
pub fn prepare_tensor(
    shape: &[u32],
    f32_le: &[u8],
    expected: &[usize],
    out: &mut [f32],
) -> Result<(), PrepareError> {
    // Saturation cannot produce a false match: no slice is usize::MAX elements long.
    let elements = expected.iter().fold(1usize, |n, &d| n.saturating_mul(d));
    if out.len() != elements {
        return Err(PrepareError::OutputLength {
            expected: elements,
            got: out.len(),
        });
    }
    let same_shape = shape.len() == expected.len()
        && shape
            .iter()
            .zip(expected)
            .all(|(&s, &e)| usize::try_from(s).is_ok_and(|s| s == e));
    if !same_shape {
        return Err(PrepareError::TensorShape {
            expected: expected.to_vec(),
            got: shape.to_vec(),
        });
    }
    // `out` exists, so `elements` · 4 bytes is at most what its allocation already spans.
    let want_bytes = elements * 4;
    if f32_le.len() != want_bytes {
        return Err(PrepareError::TensorBytes {
            expected: want_bytes,
            got: f32_le.len(),
        });
    }
    for (index, (o, b)) in out.iter_mut().zip(f32_le.chunks_exact(4)).enumerate() {
        let v = f32::from_le_bytes([b[0], b[1], b[2], b[3]]);
        if !v.is_finite() {
            return Err(PrepareError::NonFinite { index });
        }
        *o = v;
    }
    Ok(())
}

#[cfg(test)]
mod tests {
    use super::*;

    fn le(values: &[f32]) -> Vec<u8> {
        values.iter().flat_map(|v| v.to_le_bytes()).collect()
    }

    #[test]
    fn copies_values_in_order() {
        let mut out = [0.0f32; 6];
        let values = [1.0, -2.5, 0.0, f32::MIN_POSITIVE, f32::MAX, -0.0];
        prepare_tensor(&[1, 2, 3], &le(&values), &[1, 2, 3], &mut out).unwrap();
        assert_eq!(out.map(f32::to_bits), values.map(f32::to_bits));
    }

    #[test]
    fn byte_order_is_little_endian() {
        // IEEE 754 binary32: 1.0 is 0x3F800000, stored least significant byte first.
        let mut out = [0.0f32; 1];
        prepare_tensor(&[1], &[0x00, 0x00, 0x80, 0x3F], &[1], &mut out).unwrap();
        assert_eq!(out[0], 1.0);
    }

    #[test]
    fn a_short_output_buffer_is_reported_first() {
        let mut out = [0.0f32; 5];
        let e = prepare_tensor(&[6], &le(&[0.0; 6]), &[6], &mut out).unwrap_err();
        assert_eq!(
            e.to_string(),
            "output buffer holds 5 values, the model input needs 6"
        );
    }

    #[test]
    fn large_dimensions_compare_exactly() {
        let mut out = [0.0f32; 1];
        let e = prepare_tensor(&[u32::MAX], &[], &[1], &mut out).unwrap_err();
        assert!(matches!(e, PrepareError::TensorShape { .. }));
    }
}
