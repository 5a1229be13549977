//! Tensor metadata (element type, element count, byte length) and, on
//! request, payloads decoded to `f32` or `i64`.

use std::fs::File;
use std::io::{Read, Seek, SeekFrom};

use crate::error::{Error, ErrorKind, Result};
use crate::load::ExternalData;
use crate::proto::{GraphProto, TensorProto, tensor_proto::DataType};

/// The ONNX name of an element type, lower case (`float`, `int64`, …).
pub fn dtype_name(data_type: i32) -> &'static str {
    match DataType::try_from(data_type) {
        Ok(DataType::Float) => "float32",
        Ok(DataType::Uint8) => "uint8",
        Ok(DataType::Int8) => "int8",
        Ok(DataType::Uint16) => "uint16",
        Ok(DataType::Int16) => "int16",
        Ok(DataType::Int32) => "int32",
        Ok(DataType::Int64) => "int64",
        Ok(DataType::String) => "string",
        Ok(DataType::Bool) => "bool",
        Ok(DataType::Float16) => "float16",
        Ok(DataType::Double) => "float64",
        Ok(DataType::Uint32) => "uint32",
        Ok(DataType::Uint64) => "uint64",
        Ok(DataType::Complex64) => "complex64",
        Ok(DataType::Complex128) => "complex128",
        Ok(DataType::Bfloat16) => "bfloat16",
        Ok(DataType::Float8e4m3fn) => "float8e4m3fn",
        Ok(DataType::Float8e4m3fnuz) => "float8e4m3fnuz",
        Ok(DataType::Float8e5m2) => "float8e5m2",
        Ok(DataType::Float8e5m2fnuz) => "float8e5m2fnuz",
        Ok(DataType::Uint4) => "uint4",
        Ok(DataType::Int4) => "int4",
        Ok(DataType::Float4e2m1) => "float4e2m1",
        Ok(DataType::Undefined) | Err(_) => "unknown",
    }
}

/// Size of one element in bits, for fixed-size element types.
pub fn dtype_bits(data_type: i32) -> Option<u64> {
    Some(match DataType::try_from(data_type).ok()? {
        DataType::Bool | DataType::Uint8 | DataType::Int8 => 8,
        DataType::Float8e4m3fn
        | DataType::Float8e4m3fnuz
        | DataType::Float8e5m2
        | DataType::Float8e5m2fnuz => 8,
        DataType::Uint16 | DataType::Int16 | DataType::Float16 | DataType::Bfloat16 => 16,
        DataType::Float | DataType::Int32 | DataType::Uint32 => 32,
        DataType::Double | DataType::Int64 | DataType::Uint64 | DataType::Complex64 => 64,
        DataType::Complex128 => 128,
        DataType::Uint4 | DataType::Int4 | DataType::Float4e2m1 => 4,
        DataType::String | DataType::Undefined => return None,
    })
}

/// The number of elements of a tensor with these dims, or `None` when a dim
/// is negative or the product overflows `u64`.
pub fn element_count(dims: &[i64]) -> Option<u64> {
    dims.iter().try_fold(1u64, |acc, &d| u64::try_from(d).ok().and_then(|d| acc.checked_mul(d)))
}

/// The byte length a tensor's payload must have, when its type is fixed-size.
pub fn expected_bytes(tensor: &TensorProto) -> Option<u64> {
    let n = element_count(&tensor.dims)?;
    let bits = dtype_bits(tensor.data_type)?;
    n.checked_mul(bits).map(|b| b.div_ceil(8))
}

/// Calls `f` on every tensor stored in `graph`: initializers, tensor-valued
/// attributes (Constant values) and everything inside subgraphs.
pub fn for_each_tensor<'a>(graph: &'a GraphProto, f: &mut dyn FnMut(&'a TensorProto)) {
    for t in &graph.initializer {
        f(t);
    }
    for s in &graph.sparse_initializer {
        if let Some(v) = &s.values {
            f(v);
        }
    }
    for node in &graph.node {
        for a in &node.attribute {
            if let Some(t) = &a.t {
                f(t);
            }
            for t in &a.tensors {
                f(t);
            }
            if let Some(g) = &a.g {
                for_each_tensor(g, f);
            }
            for g in &a.graphs {
                for_each_tensor(g, f);
            }
        }
    }
}

/// The number of learned parameters stored in `graph`: the elements of every
/// initializer, and of every Constant node whose value is a floating-point
/// tensor of two or more elements (converters that write each weight as a
/// Constant node leave no initializer at all), in the graph and in every
/// subgraph it carries. Scalar Constants are the operands of arithmetic
/// (epsilons, clip bounds, `sqrt(d)`) and integer Constants are shapes, axes
/// and indices; neither is a learned weight. Saturates at `u64::MAX`.
pub fn parameter_count(graph: &GraphProto) -> u64 {
    let mut total = graph
        .initializer
        .iter()
        .filter_map(|t| element_count(&t.dims))
        .fold(0u64, u64::saturating_add);
    for node in &graph.node {
        if node.op_type == "Constant" && (node.domain.is_empty() || node.domain == "ai.onnx") {
            total = total.saturating_add(constant_parameters(&node.attribute));
        }
        for a in &node.attribute {
            for g in a.g.iter().chain(a.graphs.iter()) {
                total = total.saturating_add(parameter_count(g));
            }
        }
    }
    total
}

/// The parameters a Constant node's attributes hold (see [`parameter_count`]).
fn constant_parameters(attrs: &[crate::proto::AttributeProto]) -> u64 {
    let weight = |n: u64| if n >= 2 { n } else { 0 };
    let mut total = 0u64;
    for a in attrs {
        match a.name.as_str() {
            "value" => {
                if let Some(t) = a.t.as_deref()
                    && is_float_type(t.data_type)
                {
                    total = total.saturating_add(element_count(&t.dims).map_or(0, weight));
                }
            }
            "sparse_value" => {
                if let Some(v) = a.sparse_tensor.as_deref().and_then(|s| s.values.as_ref())
                    && is_float_type(v.data_type)
                {
                    total = total.saturating_add(element_count(&v.dims).map_or(0, weight));
                }
            }
            "value_floats" => total = total.saturating_add(weight(a.floats.len() as u64)),
            _ => {}
        }
    }
    total
}

fn is_float_type(data_type: i32) -> bool {
    matches!(
        DataType::try_from(data_type),
        Ok(DataType::Float | DataType::Float16 | DataType::Bfloat16 | DataType::Double)
    )
}

/// The raw little-endian payload of a tensor stored as `raw_data` or in an
/// external file; `None` when the values live in the typed `*_data` fields.
fn raw_payload(
    tensor: &TensorProto,
    external: &ExternalData,
    max_bytes: u64,
) -> Result<Option<Vec<u8>>> {
    if let Some(r) = external.resolve(tensor)? {
        if r.length > max_bytes {
            return Err(too_big(tensor, r.length, max_bytes));
        }
        let mut file = File::open(&r.file).map_err(|e| io_err(tensor, &e))?;
        file.seek(SeekFrom::Start(r.offset)).map_err(|e| io_err(tensor, &e))?;
        let mut buf = vec![0u8; r.length as usize];
        file.read_exact(&mut buf).map_err(|e| io_err(tensor, &e))?;
        return Ok(Some(buf));
    }
    if tensor.raw_data.is_empty() {
        return Ok(None);
    }
    if tensor.raw_data.len() as u64 > max_bytes {
        return Err(too_big(tensor, tensor.raw_data.len() as u64, max_bytes));
    }
    Ok(Some(tensor.raw_data.to_vec()))
}

/// Decodes a numeric tensor to `f32`, refusing payloads above `max_bytes`.
pub fn read_f32(tensor: &TensorProto, external: &ExternalData, max_bytes: u64) -> Result<Vec<f32>> {
    let n = element_count(&tensor.dims).ok_or_else(|| bad_dims(tensor))?;
    let dtype = DataType::try_from(tensor.data_type).unwrap_or(DataType::Undefined);
    let values: Vec<f32> = match raw_payload(tensor, external, max_bytes)? {
        Some(raw) => {
            check_len(tensor, raw.len() as u64)?;
            match dtype {
                DataType::Float => chunks::<4>(&raw).map(f32::from_le_bytes).collect(),
                DataType::Double => {
                    chunks::<8>(&raw).map(|b| f64::from_le_bytes(b) as f32).collect()
                }
                DataType::Float16 => {
                    chunks::<2>(&raw).map(|b| f16_to_f32(u16::from_le_bytes(b))).collect()
                }
                DataType::Bfloat16 => chunks::<2>(&raw)
                    .map(|b| f32::from_bits((u16::from_le_bytes(b) as u32) << 16))
                    .collect(),
                DataType::Int8 => raw.iter().map(|&b| b as i8 as f32).collect(),
                DataType::Uint8 | DataType::Bool => raw.iter().map(|&b| b as f32).collect(),
                DataType::Int16 => {
                    chunks::<2>(&raw).map(|b| i16::from_le_bytes(b) as f32).collect()
                }
                DataType::Uint16 => {
                    chunks::<2>(&raw).map(|b| u16::from_le_bytes(b) as f32).collect()
                }
                DataType::Int32 => {
                    chunks::<4>(&raw).map(|b| i32::from_le_bytes(b) as f32).collect()
                }
                DataType::Uint32 => {
                    chunks::<4>(&raw).map(|b| u32::from_le_bytes(b) as f32).collect()
                }
                DataType::Int64 => {
                    chunks::<8>(&raw).map(|b| i64::from_le_bytes(b) as f32).collect()
                }
                DataType::Uint64 => {
                    chunks::<8>(&raw).map(|b| u64::from_le_bytes(b) as f32).collect()
                }
                _ => return Err(unsupported(tensor)),
            }
        }
        None => match dtype {
            DataType::Float => tensor.float_data.clone(),
            DataType::Double => tensor.double_data.iter().map(|&v| v as f32).collect(),
            DataType::Float16 => tensor.int32_data.iter().map(|&v| f16_to_f32(v as u16)).collect(),
            DataType::Bfloat16 => {
                tensor.int32_data.iter().map(|&v| f32::from_bits((v as u32) << 16)).collect()
            }
            DataType::Int8
            | DataType::Uint8
            | DataType::Int16
            | DataType::Uint16
            | DataType::Int32
            | DataType::Bool => tensor.int32_data.iter().map(|&v| v as f32).collect(),
            DataType::Int64 => tensor.int64_data.iter().map(|&v| v as f32).collect(),
            DataType::Uint32 | DataType::Uint64 => {
                tensor.uint64_data.iter().map(|&v| v as f32).collect()
            }
            _ => return Err(unsupported(tensor)),
        },
    };
    with_count(tensor, values, n)
}

/// Decodes an integer tensor (int64 or int32) to `i64`: shapes, axes, pads.
pub fn read_i64(tensor: &TensorProto, external: &ExternalData, max_bytes: u64) -> Result<Vec<i64>> {
    let n = element_count(&tensor.dims).ok_or_else(|| bad_dims(tensor))?;
    let dtype = DataType::try_from(tensor.data_type).unwrap_or(DataType::Undefined);
    let values: Vec<i64> = match raw_payload(tensor, external, max_bytes)? {
        Some(raw) => {
            check_len(tensor, raw.len() as u64)?;
            match dtype {
                DataType::Int64 => chunks::<8>(&raw).map(i64::from_le_bytes).collect(),
                DataType::Int32 => {
                    chunks::<4>(&raw).map(|b| i32::from_le_bytes(b) as i64).collect()
                }
                _ => return Err(unsupported(tensor)),
            }
        }
        None => match dtype {
            DataType::Int64 => tensor.int64_data.clone(),
            DataType::Int32 => tensor.int32_data.iter().map(|&v| v as i64).collect(),
            _ => return Err(unsupported(tensor)),
        },
    };
    with_count(tensor, values, n)
}

/// `values`, if there are as many as the tensor's dims need.
fn with_count<T>(tensor: &TensorProto, values: Vec<T>, n: u64) -> Result<Vec<T>> {
    if values.len() as u64 != n {
        return Err(Error::new(
            ErrorKind::Invalid,
            format!(
                "tensor '{}' holds {} values but its dims {:?} need {n}",
                tensor.name,
                values.len(),
                tensor.dims
            ),
        ));
    }
    Ok(values)
}

/// IEEE 754 half precision to single precision.
pub fn f16_to_f32(h: u16) -> f32 {
    let sign = ((h >> 15) as u32) << 31;
    let exp = ((h >> 10) & 0x1f) as u32;
    let frac = (h & 0x3ff) as u32;
    let bits = match (exp, frac) {
        (0, 0) => sign,
        (0, _) => {
            // Subnormal: normalise the fraction.
            let mut e = 127 - 15 + 1;
            let mut f = frac;
            while f & 0x400 == 0 {
                f <<= 1;
                e -= 1;
            }
            sign | (e << 23) | ((f & 0x3ff) << 13)
        }
        (0x1f, 0) => sign | 0x7f80_0000,
        (0x1f, _) => sign | 0x7fc0_0000 | (frac << 13),
        _ => sign | ((exp + 127 - 15) << 23) | (frac << 13),
    };
    f32::from_bits(bits)
}

fn chunks<const N: usize>(raw: &[u8]) -> impl Iterator<Item = [u8; N]> + '_ {
    raw.chunks_exact(N).map(|c| c.try_into().expect("chunks_exact yields N bytes"))
}

fn check_len(tensor: &TensorProto, len: u64) -> Result<()> {
    match expected_bytes(tensor) {
        Some(want) if want != len => Err(Error::new(
            ErrorKind::Invalid,
            format!(
                "tensor '{}' has {len} payload bytes but {} {:?} needs {want}",
                tensor.name,
                dtype_name(tensor.data_type),
                tensor.dims
            ),
        )),
        _ => Ok(()),
    }
}

fn bad_dims(tensor: &TensorProto) -> Error {
    Error::new(
        ErrorKind::Invalid,
        format!("tensor '{}' has invalid dims {:?}", tensor.name, tensor.dims),
    )
}

fn unsupported(tensor: &TensorProto) -> Error {
    Error::new(
        ErrorKind::Invalid,
        format!(
            "tensor '{}' has element type {} which cannot be read as numbers",
            tensor.name,
            dtype_name(tensor.data_type)
        ),
    )
}

fn too_big(tensor: &TensorProto, len: u64, max: u64) -> Error {
    Error::new(
        ErrorKind::Limit,
        format!("tensor '{}' payload is {len} bytes, above the limit of {max}", tensor.name),
    )
}

fn io_err(tensor: &TensorProto, e: &std::io::Error) -> Error {
    Error::new(
        ErrorKind::ExternalData,
        format!("tensor '{}': reading external data failed: {}", tensor.name, super::io_message(e)),
    )
}

#[cfg(test)]
mod tests {
    use super::*;

    #[test]
    fn half_precision() {
        assert_eq!(f16_to_f32(0x3c00), 1.0);
        assert_eq!(f16_to_f32(0xc000), -2.0);
        assert_eq!(f16_to_f32(0x0000), 0.0);
        assert_eq!(f16_to_f32(0x7bff), 65504.0);
        assert_eq!(f16_to_f32(0x0001), 2f32.powi(-24));
        assert!(f16_to_f32(0x7e00).is_nan());
        assert_eq!(f16_to_f32(0xfc00), f32::NEG_INFINITY);
    }

    #[test]
    fn counts_overflow() {
        assert_eq!(element_count(&[2, 3, 4]), Some(24));
        assert_eq!(element_count(&[]), Some(1));
        assert_eq!(element_count(&[-1, 3]), None);
        assert_eq!(element_count(&[1 << 40, 1 << 40]), None);
    }

    #[test]
    fn reads_inline_values() {
        let t = TensorProto {
            dims: vec![2],
            data_type: DataType::Float as i32,
            float_data: vec![1.5, -2.0],
            ..Default::default()
        };
        assert_eq!(read_f32(&t, &ExternalData::none(), 1 << 20).unwrap(), vec![1.5, -2.0]);
        let raw: Vec<u8> = [3i64, -1].iter().flat_map(|v| v.to_le_bytes()).collect();
        let t = TensorProto {
            dims: vec![2],
            data_type: DataType::Int64 as i32,
            raw_data: raw.into(),
            ..Default::default()
        };
        assert_eq!(read_i64(&t, &ExternalData::none(), 1 << 20).unwrap(), vec![3, -1]);
        let short = TensorProto {
            dims: vec![3],
            data_type: DataType::Float as i32,
            float_data: vec![1.0],
            ..Default::default()
        };
        assert!(read_f32(&short, &ExternalData::none(), 1 << 20).is_err());
    }
}
