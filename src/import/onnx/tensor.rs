//! Constant tensors: the values an ONNX model fixes at export time (initializers, `Constant`
//! nodes) and the results of folding shape arithmetic over them.
//!
//! A `TensorProto` passes through [`ConstTensor::from_proto`]: its dims are checked and
//! counted before anything is allocated, its bytes come from `raw_data`, from the typed
//! repeated field its data type belongs in, or from an external file read through
//! [`ExternalData`] (which confines reads to the model's folder), and the values are widened
//! to the two element types import-time arithmetic needs: `f32` for floating point types and
//! `i64` for integers and booleans.
//!
//! Layout: this file holds [`ConstTensor`] and the decoding; `external` the confined file
//! reads; `float16` the 16-bit float formats.

mod external;
mod float16;

pub use self::external::{DEFAULT_MAX_EXTERNAL_BYTES, ExternalData};
pub use self::float16::{bf16_bits_to_f32, f16_bits_to_f32, round_to_bf16, round_to_f16};
use super::proto::{DataLocation, DataType, TensorProto, data_type_name};
use crate::import::ImportError;

/// Most elements a constant tensor may hold: 2^30, i.e. 4 GiB of `f32`, far above any weight
/// of a small classifier. Checked from the dims before any buffer is allocated.
pub const MAX_ELEMENTS: usize = 1 << 30;

/// The values of a constant, widened to one of the two element types folding works in.
#[derive(Clone, Debug, PartialEq)]
pub enum ConstData {
    /// FLOAT, FLOAT16, BFLOAT16 and DOUBLE tensors.
    F32(Vec<f32>),
    /// Integer and BOOL tensors (booleans as 0 and 1).
    I64(Vec<i64>),
}

/// A tensor known at import time: initializers, Constant nodes, folded shape arithmetic.
#[derive(Clone, Debug, PartialEq)]
pub struct ConstTensor {
    /// Dimensions, row-major; empty for a scalar.
    pub shape: Vec<usize>,
    pub data: ConstData,
}

impl ConstTensor {
    /// A float tensor; `data.len()` must be the product of `shape`.
    pub fn f32(shape: Vec<usize>, data: Vec<f32>) -> Self {
        debug_assert_eq!(
            shape.iter().product::<usize>(),
            data.len(),
            "shape {shape:?}"
        );
        ConstTensor {
            shape,
            data: ConstData::F32(data),
        }
    }

    /// An integer (or boolean) tensor; `data.len()` must be the product of `shape`.
    pub fn i64(shape: Vec<usize>, data: Vec<i64>) -> Self {
        debug_assert_eq!(
            shape.iter().product::<usize>(),
            data.len(),
            "shape {shape:?}"
        );
        ConstTensor {
            shape,
            data: ConstData::I64(data),
        }
    }

    /// A rank-0 integer tensor.
    pub fn scalar_i64(value: i64) -> Self {
        Self::i64(Vec::new(), vec![value])
    }

    /// A rank-0 float tensor.
    pub fn scalar_f32(value: f32) -> Self {
        Self::f32(Vec::new(), vec![value])
    }

    /// Number of elements.
    pub fn len(&self) -> usize {
        match &self.data {
            ConstData::F32(v) => v.len(),
            ConstData::I64(v) => v.len(),
        }
    }

    pub fn is_empty(&self) -> bool {
        self.len() == 0
    }

    /// Whether the values are floating point.
    pub fn is_float(&self) -> bool {
        matches!(self.data, ConstData::F32(_))
    }

    /// The values as `f32`; integers are rounded to the nearest `f32` (exact below 2^24).
    pub fn to_f32(&self) -> Vec<f32> {
        match &self.data {
            ConstData::F32(v) => v.clone(),
            ConstData::I64(v) => v.iter().map(|&x| x as f32).collect(),
        }
    }

    /// The values as `i64`; floats are truncated toward zero, as ONNX `Cast` does. Out-of-range
    /// values saturate and NaN becomes 0 (the standard leaves both undefined).
    pub fn to_i64(&self) -> Vec<i64> {
        match &self.data {
            ConstData::F32(v) => v.iter().map(|&x| x as i64).collect(),
            ConstData::I64(v) => v.clone(),
        }
    }

    /// Decodes an ONNX `TensorProto`.
    ///
    /// The values come from exactly one place: `raw_data` (fixed-width little-endian), the
    /// typed repeated field the standard assigns to the data type (`float_data`; `int32_data`,
    /// which also holds INT8/UINT8/INT16/UINT16/BOOL values and the bit patterns of
    /// FLOAT16/BFLOAT16; `int64_data`; `double_data`; `uint64_data` for UINT32/UINT64), or
    /// external data (`data_location = EXTERNAL`, keys `location`, `offset`, `length`) read
    /// through `external`. FLOAT, FLOAT16 and BFLOAT16 (both exactly) and DOUBLE (rounded to
    /// nearest) become [`ConstData::F32`]; INT8 to INT64, UINT8 to UINT64 and BOOL become
    /// [`ConstData::I64`]. Typed-field values wider than their type wrap to it (FLOAT16 and
    /// BFLOAT16 bit patterns keep their low 16 bits), as the `onnx` package's
    /// `numpy_helper.to_array` does.
    ///
    /// # Errors
    /// [`ImportError::Tensor`] for a negative dim, an element count that overflows or exceeds
    /// [`MAX_ELEMENTS`], a data type other than those above (strings, complex, 8-bit and
    /// smaller floats, 4- and 2-bit integers), data in more than one place or in a field that
    /// does not belong to the type, a value count that does not match the dims, a UINT64
    /// above `i64::MAX`, or a segmented tensor; [`ImportError::ExternalData`] for any problem
    /// reading external data (see [`ExternalData`]).
    pub fn from_proto(
        t: &TensorProto,
        external: &ExternalData,
    ) -> Result<ConstTensor, ImportError> {
        let err = |problem: String| ImportError::Tensor {
            tensor: t.name.clone(),
            problem,
        };
        let shape = dims_to_shape(&t.dims).map_err(err)?;
        let count = element_count(&shape).map_err(err)?;
        let elem = ElemType::from_data_type(t.data_type).map_err(err)?;
        if t.segment.is_some() {
            return Err(err(
                "is one segment of a larger tensor; segmented tensors are not supported".into(),
            ));
        }
        // At most 8 bytes per element and at most 2^30 elements: no overflow.
        let byte_len = count * elem.size();

        let external_location = match DataLocation::try_from(t.data_location) {
            Ok(DataLocation::Default) => false,
            Ok(DataLocation::External) => true,
            Err(_) => {
                return Err(err(format!(
                    "has data_location {}, which the standard does not define",
                    t.data_location
                )));
            }
        };
        let filled: Vec<&str> = [
            ("raw_data", t.raw_data.is_empty()),
            ("float_data", t.float_data.is_empty()),
            ("int32_data", t.int32_data.is_empty()),
            ("string_data", t.string_data.is_empty()),
            ("int64_data", t.int64_data.is_empty()),
            ("double_data", t.double_data.is_empty()),
            ("uint64_data", t.uint64_data.is_empty()),
        ]
        .into_iter()
        .filter_map(|(name, empty)| (!empty).then_some(name))
        .collect();

        let data = if external_location {
            if let Some(field) = filled.first() {
                return Err(err(format!(
                    "is marked as external data but also holds values in {field}"
                )));
            }
            let bytes = external.read(&t.name, &t.external_data, byte_len as u64)?;
            check_u64_raw(elem, &bytes).map_err(err)?;
            decode_raw(elem, &bytes)
        } else {
            match filled[..] {
                [] if count == 0 => elem.empty(),
                [] => return Err(err(format!("holds no values for its {count} elements"))),
                ["raw_data"] => {
                    if t.raw_data.len() != byte_len {
                        return Err(err(format!(
                            "raw_data is {} bytes, but {count} {} elements take {byte_len}",
                            t.raw_data.len(),
                            elem.name()
                        )));
                    }
                    check_u64_raw(elem, &t.raw_data).map_err(err)?;
                    decode_raw(elem, &t.raw_data)
                }
                [field] => decode_typed(elem, t, field, count).map_err(err)?,
                _ => {
                    return Err(err(format!(
                        "holds values in more than one field ({}); the standard allows one",
                        filled.join(", ")
                    )));
                }
            }
        };
        Ok(ConstTensor { shape, data })
    }
}

/// Checks ONNX dims (non-negative) and converts them to a shape.
///
/// # Errors
/// A sentence naming the first negative dimension.
pub fn dims_to_shape(dims: &[i64]) -> Result<Vec<usize>, String> {
    dims.iter()
        .enumerate()
        .map(|(axis, &d)| {
            usize::try_from(d).map_err(|_| format!("dimension {axis} is negative ({d})"))
        })
        .collect()
}

/// The element count of `shape`, refusing overflow and counts above [`MAX_ELEMENTS`].
///
/// # Errors
/// A sentence saying which limit the shape breaks.
pub fn element_count(shape: &[usize]) -> Result<usize, String> {
    let count = shape
        .iter()
        .try_fold(1usize, |acc, &d| acc.checked_mul(d))
        .ok_or_else(|| format!("shape {shape:?} has more elements than can be counted"))?;
    if count > MAX_ELEMENTS {
        return Err(format!(
            "shape {shape:?} has {count} elements, more than the limit of {MAX_ELEMENTS}"
        ));
    }
    Ok(count)
}

/// The element types a constant may have, as stored in a file.
#[derive(Clone, Copy, Debug, PartialEq, Eq)]
enum ElemType {
    F32,
    F16,
    Bf16,
    F64,
    I8,
    U8,
    I16,
    U16,
    I32,
    U32,
    I64,
    U64,
    Bool,
}

impl ElemType {
    fn from_data_type(data_type: i32) -> Result<ElemType, String> {
        Ok(match DataType::try_from(data_type) {
            Ok(DataType::Float) => ElemType::F32,
            Ok(DataType::Float16) => ElemType::F16,
            Ok(DataType::Bfloat16) => ElemType::Bf16,
            Ok(DataType::Double) => ElemType::F64,
            Ok(DataType::Int8) => ElemType::I8,
            Ok(DataType::Uint8) => ElemType::U8,
            Ok(DataType::Int16) => ElemType::I16,
            Ok(DataType::Uint16) => ElemType::U16,
            Ok(DataType::Int32) => ElemType::I32,
            Ok(DataType::Uint32) => ElemType::U32,
            Ok(DataType::Int64) => ElemType::I64,
            Ok(DataType::Uint64) => ElemType::U64,
            Ok(DataType::Bool) => ElemType::Bool,
            _ => {
                return Err(format!(
                    "has data type {}, which import cannot use as a constant",
                    data_type_name(data_type)
                ));
            }
        })
    }

    /// Bytes per element in `raw_data` and external files.
    fn size(self) -> usize {
        match self {
            ElemType::I8 | ElemType::U8 | ElemType::Bool => 1,
            ElemType::F16 | ElemType::Bf16 | ElemType::I16 | ElemType::U16 => 2,
            ElemType::F32 | ElemType::I32 | ElemType::U32 => 4,
            ElemType::F64 | ElemType::I64 | ElemType::U64 => 8,
        }
    }

    fn is_float(self) -> bool {
        matches!(
            self,
            ElemType::F32 | ElemType::F16 | ElemType::Bf16 | ElemType::F64
        )
    }

    fn data_type(self) -> DataType {
        match self {
            ElemType::F32 => DataType::Float,
            ElemType::F16 => DataType::Float16,
            ElemType::Bf16 => DataType::Bfloat16,
            ElemType::F64 => DataType::Double,
            ElemType::I8 => DataType::Int8,
            ElemType::U8 => DataType::Uint8,
            ElemType::I16 => DataType::Int16,
            ElemType::U16 => DataType::Uint16,
            ElemType::I32 => DataType::Int32,
            ElemType::U32 => DataType::Uint32,
            ElemType::I64 => DataType::Int64,
            ElemType::U64 => DataType::Uint64,
            ElemType::Bool => DataType::Bool,
        }
    }

    fn name(self) -> &'static str {
        self.data_type().as_str_name()
    }

    /// The typed repeated field the standard stores this type in (onnx.proto, TensorProto).
    fn typed_field(self) -> &'static str {
        match self {
            ElemType::F32 => "float_data",
            ElemType::F64 => "double_data",
            ElemType::I64 => "int64_data",
            ElemType::U32 | ElemType::U64 => "uint64_data",
            _ => "int32_data",
        }
    }

    fn empty(self) -> ConstData {
        if self.is_float() {
            ConstData::F32(Vec::new())
        } else {
            ConstData::I64(Vec::new())
        }
    }
}

/// Copies `N` bytes into an array; `chunks_exact(N)` guarantees the length.
fn bytes<const N: usize>(chunk: &[u8]) -> [u8; N] {
    let mut a = [0u8; N];
    a.copy_from_slice(chunk);
    a
}

/// Decodes fixed-width little-endian values; `raw.len()` is a multiple of the element size
/// (checked by the callers against the element count).
fn decode_raw(elem: ElemType, raw: &[u8]) -> ConstData {
    use ConstData::{F32, I64};
    match elem {
        ElemType::F32 => F32(raw
            .chunks_exact(4)
            .map(|c| f32::from_le_bytes(bytes(c)))
            .collect()),
        ElemType::F16 => F32(raw
            .chunks_exact(2)
            .map(|c| f16_bits_to_f32(u16::from_le_bytes(bytes(c))))
            .collect()),
        ElemType::Bf16 => F32(raw
            .chunks_exact(2)
            .map(|c| bf16_bits_to_f32(u16::from_le_bytes(bytes(c))))
            .collect()),
        ElemType::F64 => F32(raw
            .chunks_exact(8)
            .map(|c| f64::from_le_bytes(bytes(c)) as f32)
            .collect()),
        ElemType::I8 => I64(raw.iter().map(|&b| i64::from(b as i8)).collect()),
        ElemType::U8 => I64(raw.iter().map(|&b| i64::from(b)).collect()),
        ElemType::Bool => I64(raw.iter().map(|&b| i64::from(b != 0)).collect()),
        ElemType::I16 => I64(raw
            .chunks_exact(2)
            .map(|c| i64::from(i16::from_le_bytes(bytes(c))))
            .collect()),
        ElemType::U16 => I64(raw
            .chunks_exact(2)
            .map(|c| i64::from(u16::from_le_bytes(bytes(c))))
            .collect()),
        ElemType::I32 => I64(raw
            .chunks_exact(4)
            .map(|c| i64::from(i32::from_le_bytes(bytes(c))))
            .collect()),
        ElemType::U32 => I64(raw
            .chunks_exact(4)
            .map(|c| i64::from(u32::from_le_bytes(bytes(c))))
            .collect()),
        ElemType::I64 => I64(raw
            .chunks_exact(8)
            .map(|c| i64::from_le_bytes(bytes(c)))
            .collect()),
        // Values above i64::MAX were refused by `check_u64_raw` before this point.
        ElemType::U64 => I64(raw
            .chunks_exact(8)
            .map(|c| u64::from_le_bytes(bytes(c)) as i64)
            .collect()),
    }
}

/// Decodes the typed repeated field `field` (the only one holding values).
fn decode_typed(
    elem: ElemType,
    t: &TensorProto,
    field: &str,
    count: usize,
) -> Result<ConstData, String> {
    if field != elem.typed_field() {
        return Err(format!(
            "holds its values in {field}, but {} values belong in {} or raw_data",
            elem.name(),
            elem.typed_field()
        ));
    }
    let found = match field {
        "float_data" => t.float_data.len(),
        "int32_data" => t.int32_data.len(),
        "int64_data" => t.int64_data.len(),
        "double_data" => t.double_data.len(),
        _ => t.uint64_data.len(),
    };
    if found != count {
        return Err(format!(
            "{field} has {found} values, but the dims call for {count}"
        ));
    }
    use ConstData::{F32, I64};
    Ok(match elem {
        ElemType::F32 => F32(t.float_data.clone()),
        ElemType::F64 => F32(t.double_data.iter().map(|&v| v as f32).collect()),
        ElemType::F16 => F32(t
            .int32_data
            .iter()
            .map(|&v| f16_bits_to_f32(v as u16))
            .collect()),
        ElemType::Bf16 => F32(t
            .int32_data
            .iter()
            .map(|&v| bf16_bits_to_f32(v as u16))
            .collect()),
        ElemType::I8 => I64(t.int32_data.iter().map(|&v| i64::from(v as i8)).collect()),
        ElemType::U8 => I64(t.int32_data.iter().map(|&v| i64::from(v as u8)).collect()),
        ElemType::I16 => I64(t.int32_data.iter().map(|&v| i64::from(v as i16)).collect()),
        ElemType::U16 => I64(t.int32_data.iter().map(|&v| i64::from(v as u16)).collect()),
        ElemType::I32 => I64(t.int32_data.iter().map(|&v| i64::from(v)).collect()),
        ElemType::Bool => I64(t.int32_data.iter().map(|&v| i64::from(v != 0)).collect()),
        ElemType::I64 => I64(t.int64_data.clone()),
        ElemType::U32 => I64(t.uint64_data.iter().map(|&v| i64::from(v as u32)).collect()),
        ElemType::U64 => I64(t
            .uint64_data
            .iter()
            .map(|&v| {
                i64::try_from(v)
                    .map_err(|_| format!("UINT64 value {v} does not fit the signed 64-bit range"))
            })
            .collect::<Result<_, _>>()?),
    })
}

/// Refuses UINT64 raw bytes above `i64::MAX`, which import arithmetic cannot hold.
fn check_u64_raw(elem: ElemType, raw: &[u8]) -> Result<(), String> {
    if elem == ElemType::U64
        && let Some(v) = raw
            .chunks_exact(8)
            .map(|c| u64::from_le_bytes(bytes(c)))
            .find(|&v| v > i64::MAX as u64)
    {
        return Err(format!(
            "UINT64 value {v} does not fit the signed 64-bit range"
        ));
    }
    Ok(())
}

#[cfg(test)]
mod tests {
    use prost::Message;
    use serde_json::Value;

    use super::*;

    fn no_files() -> ExternalData {
        ExternalData::new(None)
    }

    fn proto(name: &str, data_type: DataType, dims: &[i64]) -> TensorProto {
        TensorProto {
            name: name.into(),
            data_type: data_type as i32,
            dims: dims.to_vec(),
            ..Default::default()
        }
    }

    fn problem(err: ImportError) -> String {
        match err {
            ImportError::Tensor { problem, .. } | ImportError::ExternalData { problem, .. } => {
                problem
            }
            other => panic!("unexpected error kind: {other}"),
        }
    }

    #[test]
    fn raw_and_typed_fields_decode_alike() {
        let values = [1.0f32, -0.5, 3.25, 1e-3];
        let raw = TensorProto {
            raw_data: values.iter().flat_map(|v| v.to_le_bytes()).collect(),
            ..proto("w", DataType::Float, &[2, 2])
        };
        let typed = TensorProto {
            float_data: values.to_vec(),
            ..proto("w", DataType::Float, &[2, 2])
        };
        let a = ConstTensor::from_proto(&raw, &no_files()).unwrap();
        assert_eq!(a, ConstTensor::from_proto(&typed, &no_files()).unwrap());
        assert_eq!(a, ConstTensor::f32(vec![2, 2], values.to_vec()));

        let ints = [-3i64, 0, i64::MAX];
        let raw = TensorProto {
            raw_data: ints.iter().flat_map(|v| v.to_le_bytes()).collect(),
            ..proto("i", DataType::Int64, &[3])
        };
        let typed = TensorProto {
            int64_data: ints.to_vec(),
            ..proto("i", DataType::Int64, &[3])
        };
        assert_eq!(
            ConstTensor::from_proto(&raw, &no_files()).unwrap(),
            ConstTensor::from_proto(&typed, &no_files()).unwrap()
        );

        // int8 -1 is the byte 0xff; BOOL is one byte per element (onnx.proto, raw_data).
        let raw = TensorProto {
            raw_data: vec![0xff, 0x7f],
            ..proto("b", DataType::Int8, &[2])
        };
        assert_eq!(
            ConstTensor::from_proto(&raw, &no_files()).unwrap().to_i64(),
            [-1, 127]
        );
        let raw = TensorProto {
            raw_data: vec![1, 0, 1],
            ..proto("b", DataType::Bool, &[3])
        };
        assert_eq!(
            ConstTensor::from_proto(&raw, &no_files()).unwrap().to_i64(),
            [1, 0, 1]
        );

        // DOUBLE rounds to the nearest f32.
        let typed = TensorProto {
            double_data: vec![0.1],
            ..proto("d", DataType::Double, &[])
        };
        assert_eq!(
            ConstTensor::from_proto(&typed, &no_files())
                .unwrap()
                .to_f32(),
            [0.1f32]
        );
    }

    /// TensorProtos serialized by the `onnx` package (helper.make_tensor,
    /// numpy_helper.from_array) decode to the values its numpy_helper.to_array reads back.
    /// Data: tests/data/onnx_fold/tensors.json, from make_fold_cases.py (onnx 1.23.2).
    #[test]
    fn tensors_written_by_the_onnx_package() {
        let doc: Value =
            serde_json::from_str(include_str!("../../../tests/data/onnx_fold/tensors.json"))
                .unwrap();
        let tensors = doc["tensors"].as_array().unwrap();
        assert!(tensors.len() > 20);
        for t in tensors {
            let name = t["name"].as_str().unwrap();
            let hex = t["proto_hex"].as_str().unwrap();
            let bytes: Vec<u8> = (0..hex.len())
                .step_by(2)
                .map(|i| u8::from_str_radix(&hex[i..i + 2], 16).unwrap())
                .collect();
            let p = TensorProto::decode(&bytes[..]).unwrap();
            assert_eq!(
                data_type_name(p.data_type),
                t["data_type"].as_str().unwrap()
            );
            let got =
                ConstTensor::from_proto(&p, &no_files()).unwrap_or_else(|e| panic!("{name}: {e}"));
            let e = &t["expected"];
            let shape: Vec<usize> = e["shape"]
                .as_array()
                .unwrap()
                .iter()
                .map(|d| d.as_u64().unwrap() as usize)
                .collect();
            assert_eq!(got.shape, shape, "{name}");
            let data = e["data"].as_array().unwrap();
            match &got.data {
                ConstData::F32(v) => {
                    assert_eq!(e["dtype"], "float32", "{name}");
                    let want: Vec<f32> = data
                        .iter()
                        .map(|x| match x.as_str() {
                            Some("inf") => f32::INFINITY,
                            Some("-inf") => f32::NEG_INFINITY,
                            _ => x.as_f64().unwrap() as f32,
                        })
                        .collect();
                    let bits = |v: &[f32]| v.iter().map(|f| f.to_bits()).collect::<Vec<_>>();
                    assert_eq!(bits(v), bits(&want), "{name}");
                }
                ConstData::I64(v) => {
                    assert_eq!(e["dtype"], "int64", "{name}");
                    let want: Vec<i64> = data.iter().map(|x| x.as_i64().unwrap()).collect();
                    assert_eq!(v, &want, "{name}");
                }
            }
        }
    }

    /// Hand-encoded wire bytes (protobuf encoding: key = field << 3 | wire type) with the
    /// TensorProto field numbers of onnx.proto: dims 1, data_type 2, float_data 4, name 8.
    #[test]
    fn wire_bytes_packed_and_unpacked() {
        let packed = [
            0x08, 0x02, // dims: 2
            0x10, 0x01, // data_type: FLOAT
            0x22, 0x08, 0x00, 0x00, 0x80, 0x3f, 0x00, 0x00, 0x00, 0xc0, // float_data [1, -2]
            0x42, 0x01, b'w', // name "w"
        ];
        // Parsers must accept repeated scalars unpacked too (protobuf.dev, "Encoding",
        // "Packed Repeated Fields"); proto2 writers may emit them so.
        let unpacked = [
            0x08, 0x02, 0x10, 0x01, //
            0x25, 0x00, 0x00, 0x80, 0x3f, // float_data 1.0 (wire type 5, fixed32)
            0x25, 0x00, 0x00, 0x00, 0xc0, // float_data -2.0
            0x42, 0x01, b'w',
        ];
        for bytes in [&packed[..], &unpacked[..]] {
            let t = TensorProto::decode(bytes).unwrap();
            assert_eq!(t.name, "w");
            let c = ConstTensor::from_proto(&t, &no_files()).unwrap();
            assert_eq!(c, ConstTensor::f32(vec![2], vec![1.0, -2.0]));
        }
        // raw_data is field 9: key 0x4a.
        let raw = [0x08, 0x01, 0x10, 0x07, 0x4a, 0x08, 5, 0, 0, 0, 0, 0, 0, 0];
        let t = TensorProto::decode(&raw[..]).unwrap();
        assert_eq!(
            ConstTensor::from_proto(&t, &no_files()).unwrap().to_i64(),
            [5]
        );
    }

    #[test]
    fn typed_fields_follow_the_standard() {
        // FLOAT16 values travel as bit patterns in int32_data.
        let t = TensorProto {
            int32_data: vec![0x3c00, 0xc000],
            ..proto("h", DataType::Float16, &[2])
        };
        assert_eq!(
            ConstTensor::from_proto(&t, &no_files()).unwrap().to_f32(),
            [1.0, -2.0]
        );
        // Only the low 16 bits count, as numpy_helper.to_array reads them
        // (`.view(np.uint32).astype(np.uint16)`): a sign-extended 0xc000 is still -2.
        let t = TensorProto {
            int32_data: vec![-16384, 0x1_3c00],
            ..proto("h", DataType::Float16, &[2])
        };
        assert_eq!(
            ConstTensor::from_proto(&t, &no_files()).unwrap().to_f32(),
            [-2.0, 1.0]
        );
        // UINT32 and UINT64 travel in uint64_data; UINT64 above i64::MAX cannot be held.
        let t = TensorProto {
            uint64_data: vec![u64::from(u32::MAX)],
            ..proto("u", DataType::Uint32, &[1])
        };
        assert_eq!(
            ConstTensor::from_proto(&t, &no_files()).unwrap().to_i64(),
            [4_294_967_295]
        );
        let t = TensorProto {
            uint64_data: vec![u64::MAX],
            ..proto("u", DataType::Uint64, &[1])
        };
        assert!(ConstTensor::from_proto(&t, &no_files()).is_err());
        let t = TensorProto {
            raw_data: u64::MAX.to_le_bytes().to_vec(),
            ..proto("u", DataType::Uint64, &[1])
        };
        assert!(ConstTensor::from_proto(&t, &no_files()).is_err());
        // A field that does not belong to the type.
        let t = TensorProto {
            float_data: vec![1.0],
            ..proto("x", DataType::Int64, &[1])
        };
        let p = problem(ConstTensor::from_proto(&t, &no_files()).unwrap_err());
        assert!(p.contains("float_data") && p.contains("int64_data"), "{p}");
    }

    #[test]
    fn malformed_tensors_are_typed_errors() {
        let none = no_files();
        let check = |t: TensorProto, needle: &str| {
            let err = ConstTensor::from_proto(&t, &none).unwrap_err();
            assert!(matches!(err, ImportError::Tensor { .. }), "{err}");
            let p = problem(err);
            assert!(p.contains(needle), "{p:?} should mention {needle:?}");
        };
        check(proto("t", DataType::Float, &[2, -1]), "negative");
        check(
            proto("t", DataType::Float, &[i64::MAX, i64::MAX]),
            "counted",
        );
        check(proto("t", DataType::Float, &[1 << 20, 1 << 11]), "limit");
        check(
            TensorProto {
                raw_data: vec![0; 7],
                ..proto("t", DataType::Float, &[2])
            },
            "raw_data is 7 bytes",
        );
        check(
            TensorProto {
                float_data: vec![1.0],
                ..proto("t", DataType::Float, &[2])
            },
            "has 1 values",
        );
        check(
            TensorProto {
                float_data: vec![1.0],
                raw_data: vec![0; 4],
                ..proto("t", DataType::Float, &[1])
            },
            "more than one field",
        );
        check(proto("t", DataType::Float, &[3]), "no values");
        check(
            TensorProto {
                string_data: vec![b"a".to_vec()],
                ..proto("t", DataType::String, &[1])
            },
            "STRING",
        );
        check(proto("t", DataType::Complex64, &[0]), "COMPLEX64");
        check(proto("t", DataType::Float8e4m3fn, &[0]), "FLOAT8E4M3FN");
        check(proto("t", DataType::Undefined, &[0]), "UNDEFINED");
        check(
            TensorProto {
                data_type: 999,
                ..Default::default()
            },
            "999",
        );
        check(
            TensorProto {
                segment: Some(Default::default()),
                ..proto("t", DataType::Float, &[0])
            },
            "segment",
        );
        check(
            TensorProto {
                data_location: 7,
                ..proto("t", DataType::Float, &[0])
            },
            "data_location",
        );
        // Zero elements need no data at all.
        let empty = ConstTensor::from_proto(&proto("t", DataType::Int32, &[0, 5]), &none).unwrap();
        assert_eq!((empty.shape.as_slice(), empty.len()), (&[0, 5][..], 0));
    }

    #[test]
    fn conversions_follow_cast() {
        let t = ConstTensor::f32(vec![5], vec![-2.7, -0.5, 0.5, 2.7, f32::NAN]);
        assert_eq!(t.to_i64(), [-2, 0, 0, 2, 0]);
        let t = ConstTensor::i64(vec![2], vec![-3, 1 << 40]);
        assert_eq!(t.to_f32(), [-3.0, (1u64 << 40) as f32]);
        assert!(!t.is_empty() && !t.is_float());
    }
}
